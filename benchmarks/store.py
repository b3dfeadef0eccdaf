"""The results store: one SQLite file (standard library ``sqlite3``) in WAL mode.

Tables:

    runs             one row per job: hash (primary key), suite, task_id, agent,
                     seed, sweep point and full config (JSON), status 'done' or
                     'failed', error traceback, start/finish times (ISO 8601,
                     UTC), wall_seconds, package version, git revision,
                     the software it ran with (``environment``: JSON of the
                     Python, needbench, NumPy, numba, Gymnasium, SciPy, torch
                     and Stable-Baselines3 versions, null for those absent),
                     and the file of the trained agent if the run kept it
                     (relative to the store's folder when it lies inside it).
    failed_attempts  failures no longer in ``runs``: a failed row moves here when
                     the job is recorded again, or when a later success of the
                     same cell (suite, task, agent, seed, sweep point; e.g. after
                     a config fix changed the hash) supersedes it, with the hash
                     that superseded it and when.
    episodes         one row per evaluation episode: all metrics as JSON, plus
                     the most queried ones as plain columns ("return",
                     discounted_drive, time_in_band, survived, length).
    learning_curves  (run hash, step, metric, value) scalars logged while learning.
    traces           one row per array of an episode trace: name, dtype, shape
                     and the zlib-compressed bytes.
    schema_version   the layout version, checked when a file is opened (a
                     version-1 file gains ``environment``, ``agent_file`` and
                     ``failed_attempts``).

The runner's driver process alone writes, one transaction per finished job
(:meth:`Store.record_job`), so an interrupted sweep resumes with nothing lost
and nothing doubled; WAL lets reports read while a sweep is writing. Every
query is parameterised.
"""

from __future__ import annotations

import csv
import functools
import importlib
import importlib.metadata
import json
import math
import platform
import sqlite3
import zlib
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from needbench.benchmarks.metrics import summarise
from needbench.envs.errors import ConfigError

SCHEMA_VERSION = 2

#: Distributions whose versions every run records (None when not installed).
RECORDED_DISTRIBUTIONS = ("needbench", "numpy", "numba", "gymnasium", "scipy", "torch",
                          "stable-baselines3")
STATUSES = ("done", "failed")

# Metrics copied from the JSON into plain columns: (column, metric key, type).
_EPISODE_COLUMNS = (
    ('"return"', "return", float),
    ("discounted_drive", "discounted_drive", float),
    ("time_in_band", "time_in_band", float),
    ("survived", "survived", int),
    ("length", "length", int),
)

# The columns runs and failed_attempts share: a job's identity, then how an attempt went.
_IDENTITY_COLUMNS = """
        suite TEXT NOT NULL,
        task_id TEXT NOT NULL,
        agent TEXT NOT NULL,
        seed INTEGER NOT NULL,
        sweep TEXT NOT NULL,
        config TEXT NOT NULL,"""
_ATTEMPT_COLUMNS = """
        error TEXT,
        started TEXT NOT NULL,
        finished TEXT NOT NULL,
        wall_seconds REAL NOT NULL,
        package_version TEXT NOT NULL,
        git_revision TEXT,"""

# What version 2 added; run as well on a version-1 file to bring it up to date.
_HISTORY_SCHEMA = (
    f"""CREATE TABLE IF NOT EXISTS failed_attempts (
        hash TEXT NOT NULL,{_IDENTITY_COLUMNS}{_ATTEMPT_COLUMNS}
        environment TEXT NOT NULL,
        superseded_by TEXT NOT NULL,
        superseded_at TEXT NOT NULL
    )""",
    "CREATE INDEX IF NOT EXISTS failed_attempts_by_hash ON failed_attempts (hash)",
)

# The columns a failed row keeps when it moves to failed_attempts.
_HISTORY_COLUMNS = ("hash, suite, task_id, agent, seed, sweep, config, error, started, finished,"
                    " wall_seconds, package_version, git_revision, environment")

_SCHEMA = (
    "CREATE TABLE IF NOT EXISTS schema_version (version INTEGER NOT NULL)",
    f"""CREATE TABLE IF NOT EXISTS runs (
        hash TEXT PRIMARY KEY,{_IDENTITY_COLUMNS}
        status TEXT NOT NULL CHECK (status IN ('done', 'failed')),{_ATTEMPT_COLUMNS}
        environment TEXT NOT NULL DEFAULT '{{}}',
        agent_file TEXT
    )""",
    "CREATE INDEX IF NOT EXISTS runs_by_cell ON runs (suite, task_id, agent, status)",
    *_HISTORY_SCHEMA,
    """CREATE TABLE IF NOT EXISTS episodes (
        run_hash TEXT NOT NULL REFERENCES runs (hash) ON DELETE CASCADE,
        episode INTEGER NOT NULL,
        metrics TEXT NOT NULL,
        "return" REAL,
        discounted_drive REAL,
        time_in_band REAL,
        survived INTEGER,
        length INTEGER,
        PRIMARY KEY (run_hash, episode)
    )""",
    """CREATE TABLE IF NOT EXISTS learning_curves (
        run_hash TEXT NOT NULL REFERENCES runs (hash) ON DELETE CASCADE,
        step INTEGER NOT NULL,
        metric TEXT NOT NULL,
        value REAL
    )""",
    "CREATE INDEX IF NOT EXISTS learning_curves_by_run"
    " ON learning_curves (run_hash, metric, step)",
    """CREATE TABLE IF NOT EXISTS traces (
        run_hash TEXT NOT NULL REFERENCES runs (hash) ON DELETE CASCADE,
        episode INTEGER NOT NULL,
        name TEXT NOT NULL,
        dtype TEXT NOT NULL,
        shape TEXT NOT NULL,
        data BLOB NOT NULL,
        PRIMARY KEY (run_hash, episode, name)
    )""",
)

# The columns of a run's row in exports, before its mean metrics.
_EXPORT_COLUMNS = ("hash", "suite", "task_id", "agent", "seed", "sweep", "status",
                   "wall_seconds", "package_version", "git_revision", "agent_file")


def _distribution_version(name: str) -> str | None:
    try:
        return importlib.metadata.version(name)
    except importlib.metadata.PackageNotFoundError:
        return None


def _installed_version() -> str:
    return _distribution_version("needbench") or "unknown"


@functools.cache
def software_versions() -> dict[str, str | None]:
    """The Python version and those of :data:`RECORDED_DISTRIBUTIONS` in this process."""
    versions: dict[str, str | None] = {"python": platform.python_version()}
    versions.update({name: _distribution_version(name) for name in RECORDED_DISTRIBUTIONS})
    return versions


@dataclass(kw_only=True)
class JobResult:
    """Everything one finished job produced, as the runner hands it to the store.

    Attributes:
        hash: the job's hash (``benchmarks.spec.Job.hash``), the run's identity.
        config: the fully resolved job config (``Job.config``): must hold
            ``suite``, ``task.id``, ``agent.name`` and ``seed``; ``sweep`` is optional.
        status: ``'done'`` or ``'failed'``.
        started: start time, seconds since the Unix epoch (``time.time()``).
        finished: end time, seconds since the Unix epoch.
        wall_seconds: elapsed wall-clock time of the job, seconds.
        error: the traceback text of a failed job (required when failed).
        episodes: one metrics dict per evaluation episode
            (``benchmarks.metrics.episode_metrics``).
        curves: learning-curve points (step, metric name, value).
        traces: episode traces by episode index (traces[i] is episode i's);
            may be shorter than ``episodes`` when only some are kept.
        package_version: needbench version that ran the job.
        git_revision: commit of the checkout that ran the job, if known.
        agent_file: the file the trained agent was saved to (``Agent.save``),
            if the run kept it.
        environment: the software it ran with (:func:`software_versions` of
            the process that made the result).
    """

    hash: str
    config: dict[str, Any]
    status: str
    started: float
    finished: float
    wall_seconds: float
    error: str | None = None
    episodes: list[dict[str, float]] = field(default_factory=list)
    curves: list[tuple[int, str, float]] = field(default_factory=list)
    traces: list[dict[str, np.ndarray]] = field(default_factory=list)
    package_version: str = field(default_factory=_installed_version)
    git_revision: str | None = None
    agent_file: str | None = None
    environment: dict[str, str | None] = field(default_factory=lambda: dict(software_versions()))


# ----------------------------------------------------------------------------
# Turning a JobResult into rows (before any write, so bad input touches nothing)
# ----------------------------------------------------------------------------

def _config_value(config: Mapping[str, Any], *keys: str) -> Any:
    value: Any = config
    for depth, key in enumerate(keys):
        if not isinstance(value, Mapping) or key not in value:
            path = "result.config." + ".".join(keys[:depth + 1])
            raise ConfigError(path, "<missing>", "the resolved job config of benchmarks.spec.Job")
        value = value[key]
    return value


def _timestamp(seconds: float, path: str) -> str:
    if isinstance(seconds, bool) or not isinstance(seconds, (int, float)) \
            or not math.isfinite(seconds):
        raise ConfigError(path, seconds, "seconds since the Unix epoch, as from time.time()")
    return datetime.fromtimestamp(seconds, tz=UTC).isoformat(timespec="milliseconds")


def _finite_or_none(value: Any) -> float | None:
    """JSON has no NaN or inf: such metric values are stored as null, read back as NaN."""
    number = float(value)
    return number if math.isfinite(number) else None


def _run_row(result: JobResult, folder: Path) -> tuple:
    if result.status not in STATUSES:
        raise ConfigError("result.status", result.status, "'done' or 'failed'")
    if result.status == "failed" and not result.error:
        raise ConfigError("result.error", result.error, "the traceback text of the failure")
    if not isinstance(result.hash, str) or not result.hash:
        raise ConfigError("result.hash", result.hash, "the job's hash, a non-empty string")
    return (
        result.hash,
        str(_config_value(result.config, "suite")),
        str(_config_value(result.config, "task", "id")),
        str(_config_value(result.config, "agent", "name")),
        int(_config_value(result.config, "seed")),
        json.dumps(result.config.get("sweep", {}), sort_keys=True),
        json.dumps(result.config, sort_keys=True),
        result.status,
        result.error,
        _timestamp(result.started, "result.started"),
        _timestamp(result.finished, "result.finished"),
        float(result.wall_seconds),
        str(result.package_version),
        result.git_revision,
        _stored_path(result.agent_file, folder),
        json.dumps(result.environment, sort_keys=True),
    )


def _stored_path(path: str | None, folder: Path) -> str | None:
    """A file path as the store keeps it: relative to ``folder`` (the store's) when it lies
    inside it, so a run folder can be moved whole; else absolute."""
    if path is None:
        return None
    absolute = Path(path).resolve()
    try:
        return absolute.relative_to(folder.resolve()).as_posix()
    except ValueError:
        return str(absolute)


def _episode_rows(result: JobResult) -> list[tuple]:
    rows = []
    for index, metrics in enumerate(result.episodes):
        clean = {str(key): _finite_or_none(value) for key, value in metrics.items()}
        columns = []
        for _, key, kind in _EPISODE_COLUMNS:
            value = clean.get(key)
            columns.append(None if value is None else kind(value))
        rows.append((result.hash, index, json.dumps(clean, sort_keys=True), *columns))
    return rows


def _curve_rows(result: JobResult) -> list[tuple]:
    return [(result.hash, int(step), str(metric), _finite_or_none(value))
            for step, metric, value in result.curves]


def _trace_rows(result: JobResult) -> list[tuple]:
    rows = []
    for episode, trace in enumerate(result.traces):
        for name, values in sorted(trace.items()):
            array = np.asarray(values)
            if array.dtype.hasobject:
                raise ConfigError(f"result.traces[{episode}][{name!r}]", str(array.dtype),
                                  "a numeric or boolean array")
            rows.append((result.hash, episode, str(name), array.dtype.str,
                         json.dumps(list(array.shape)),
                         zlib.compress(array.tobytes(order="C"))))
    return rows


# ----------------------------------------------------------------------------
# The store
# ----------------------------------------------------------------------------

class Store:
    """A results store in one SQLite file.

    Args:
        path: the database file; its folder is created if needed.

    Raises:
        ConfigError: when the path is a folder, its folder cannot be made (a
            file of that name, no permission), or the file is not a SQLite
            database (path ``results``).

    Open one ``Store`` per process (or thread): a connection is not shared.
    """

    def __init__(self, path: str | Path):
        self.path = Path(path)
        if self.path.is_dir():
            raise ConfigError("results", str(self.path), "a results store file, not a folder")
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
        except (FileExistsError, NotADirectoryError) as error:
            raise ConfigError("results", str(self.path.parent),
                              "a folder for the results store (a file of that name exists)"
                              ) from error
        except PermissionError as error:
            raise ConfigError("results", str(self.path.parent),
                              "a folder this user may create") from error
        try:
            # isolation_level=None: no implicit transactions; record_job opens its own.
            self._connection = sqlite3.connect(self.path, timeout=30.0, isolation_level=None)
        except sqlite3.Error as error:
            raise ConfigError("results", str(self.path),
                              f"a SQLite file this user may open ({error})") from error
        self._connection.row_factory = sqlite3.Row
        try:
            self.journal_mode = self._connection.execute("PRAGMA journal_mode=WAL").fetchone()[0]
            # NORMAL is durable across application crashes in WAL mode, and much faster than FULL.
            self._connection.execute("PRAGMA synchronous=NORMAL")
            self._connection.execute("PRAGMA foreign_keys=ON")
            self._create_schema()
        except sqlite3.DatabaseError as error:
            self._connection.close()
            # OperationalError: the file could not be opened or written (a
            # read-only folder, a full disk); any other: the file is not SQLite.
            allowed = ("a SQLite file this user can open and write" if isinstance(
                error, sqlite3.OperationalError) else "a needbench results store, a SQLite "
                "database")
            raise ConfigError("results", str(self.path), f"{allowed} ({error})") from error
        except BaseException:
            self._connection.close()
            raise

    def _create_schema(self) -> None:
        exists = self._connection.execute(
            "SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = ?",
            ("schema_version",)).fetchone()
        # An existing store is only read here, so opening one never waits for
        # the write lock of a sweep in progress.
        if exists is None:
            with self._transaction():
                for statement in _SCHEMA:
                    self._connection.execute(statement)
                self._connection.execute(
                    "INSERT INTO schema_version (version)"
                    " SELECT ? WHERE NOT EXISTS (SELECT 1 FROM schema_version)",
                    (SCHEMA_VERSION,))
        versions = [row[0] for row in self._connection.execute(
            "SELECT version FROM schema_version")]
        if versions == [1]:
            self._upgrade_from_version_1()
            versions = [SCHEMA_VERSION]
        if versions != [SCHEMA_VERSION]:
            raise ConfigError(f"{self.path}: schema_version", versions,
                              f"[{SCHEMA_VERSION}], the layout this needbench writes; "
                              "use a new results file")

    def _upgrade_from_version_1(self) -> None:
        """Version 2 added runs.environment, runs.agent_file (empty for older runs) and
        the failed_attempts table."""
        with self._transaction():
            self._connection.execute(
                "ALTER TABLE runs ADD COLUMN environment TEXT NOT NULL DEFAULT '{}'")
            self._connection.execute("ALTER TABLE runs ADD COLUMN agent_file TEXT")
            for statement in _HISTORY_SCHEMA:
                self._connection.execute(statement)
            self._connection.execute("UPDATE schema_version SET version = ?", (SCHEMA_VERSION,))

    def close(self) -> None:
        self._connection.close()

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    @contextmanager
    def _transaction(self) -> Iterator[None]:
        # IMMEDIATE takes the write lock up front, so the status check and the
        # writes that depend on it cannot interleave with another writer.
        self._connection.execute("BEGIN IMMEDIATE")
        try:
            yield
        except BaseException:
            self._connection.execute("ROLLBACK")
            raise
        self._connection.execute("COMMIT")

    # -- writing ---------------------------------------------------------------

    def completed_hashes(self) -> set[str]:
        """Hashes of the runs recorded as 'done' (failed runs are retried on resume)."""
        rows = self._connection.execute("SELECT hash FROM runs WHERE status = ?", ("done",))
        return {row[0] for row in rows}

    def failed_hashes(self) -> set[str]:
        """Hashes of the runs recorded as 'failed' (and not superseded since)."""
        rows = self._connection.execute("SELECT hash FROM runs WHERE status = ?", ("failed",))
        return {row[0] for row in rows}

    def record_job(self, result: JobResult) -> bool:
        """Write a finished job (run row, episodes, curves, traces) in one transaction.

        Returns False, writing nothing, when the hash is already 'done'. A
        'failed' row is replaced (with its episodes, curves and traces) by the
        new result and moves to ``failed_attempts``. A 'done' result also
        supersedes the failed rows of its cell (same suite, task, agent, seed
        and sweep point) under other hashes, e.g. of a config since fixed:
        they move to ``failed_attempts`` too, so the results table counts the
        cell's success, not its old failure. If any write fails, the
        transaction rolls back and the store is as before.
        """
        run = _run_row(result, self.path.parent)
        episodes = _episode_rows(result)
        curves = _curve_rows(result)
        traces = _trace_rows(result)  # compressed before taking the write lock
        with self._transaction():
            row = self._connection.execute("SELECT status FROM runs WHERE hash = ?",
                                           (result.hash,)).fetchone()
            if row is not None and row["status"] == "done":
                return False
            superseded = "hash = ?"
            parameters: list[Any] = [result.hash]
            if result.status == "done":
                # run[1:6]: suite, task_id, agent, seed, sweep.
                superseded += (" OR (status = 'failed' AND suite = ? AND task_id = ?"
                               " AND agent = ? AND seed = ? AND sweep = ?)")
                parameters += list(run[1:6])
            self._retire_failures(superseded, parameters, result.hash)
            self._insert_run(run)
            self._insert_episodes(episodes)
            self._insert_curves(curves)
            self._insert_traces(traces)
        return True

    def _retire_failures(self, where: str, parameters: list[Any], by: str) -> None:
        """Move the failed runs matching ``where`` to failed_attempts, superseded by ``by``."""
        now = _timestamp(datetime.now(tz=UTC).timestamp(), "now")
        self._connection.execute(
            f"INSERT INTO failed_attempts ({_HISTORY_COLUMNS}, superseded_by, superseded_at)"
            f" SELECT {_HISTORY_COLUMNS}, ?, ? FROM runs WHERE status = 'failed' AND ({where})",
            [by, now, *parameters])
        # ON DELETE CASCADE removes the failed attempts' episodes, curves, traces.
        self._connection.execute(f"DELETE FROM runs WHERE status = 'failed' AND ({where})",
                                 parameters)

    def _insert_run(self, row: tuple) -> None:
        self._connection.execute(
            "INSERT INTO runs (hash, suite, task_id, agent, seed, sweep, config, status, error,"
            " started, finished, wall_seconds, package_version, git_revision, agent_file,"
            " environment)"
            " VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)", row)

    def _insert_episodes(self, rows: list[tuple]) -> None:
        columns = ", ".join(column for column, _, _ in _EPISODE_COLUMNS)
        self._connection.executemany(
            f"INSERT INTO episodes (run_hash, episode, metrics, {columns})"
            " VALUES (?, ?, ?, ?, ?, ?, ?, ?)", rows)

    def _insert_curves(self, rows: list[tuple]) -> None:
        self._connection.executemany(
            "INSERT INTO learning_curves (run_hash, step, metric, value) VALUES (?, ?, ?, ?)",
            rows)

    def _insert_traces(self, rows: list[tuple]) -> None:
        self._connection.executemany(
            "INSERT INTO traces (run_hash, episode, name, dtype, shape, data)"
            " VALUES (?, ?, ?, ?, ?, ?)", rows)

    # -- reading ---------------------------------------------------------------

    @staticmethod
    def _where(filters: Mapping[str, Any], prefix: str = "") -> tuple[str, list[Any]]:
        """A WHERE clause from fixed column names (never user text) and ? placeholders."""
        clauses, parameters = [], []
        for column, value in filters.items():
            if value is not None:
                clauses.append(f"{prefix}{column} = ?")
                parameters.append(value)
        return (" WHERE " + " AND ".join(clauses)) if clauses else "", parameters

    def runs(self, *, suite: str | None = None, task_id: str | None = None,
             agent: str | None = None, status: str | None = None) -> list[dict[str, Any]]:
        """Run rows matching every given filter, with ``config`` and ``sweep`` decoded."""
        where, parameters = self._where(
            {"suite": suite, "task_id": task_id, "agent": agent, "status": status})
        rows = self._connection.execute(
            f"SELECT * FROM runs{where} ORDER BY suite, task_id, agent, seed, hash", parameters)
        return [_decoded(row) for row in rows]

    def failed_attempts(self, hash: str | None = None) -> list[dict[str, Any]]:
        """Failures moved out of ``runs`` (oldest first), with ``config``, ``sweep`` and
        ``environment`` decoded, and ``superseded_by``, ``superseded_at``."""
        where, parameters = self._where({"hash": hash})
        rows = self._connection.execute(
            f"SELECT * FROM failed_attempts{where} ORDER BY superseded_at, rowid", parameters)
        return [_decoded(row) for row in rows]

    def episodes(self, hash: str | None = None, *, suite: str | None = None,
                 task_id: str | None = None, agent: str | None = None,
                 status: str | None = None) -> list[dict[str, Any]]:
        """Episode rows matching every given filter, joined with their run.

        Each row: ``hash``, ``suite``, ``task_id``, ``agent``, ``seed``,
        ``sweep`` (dict), ``episode`` (index) and ``metrics`` (dict; metrics
        stored as null come back as NaN).
        """
        where, parameters = self._where(
            {"hash": hash, "suite": suite, "task_id": task_id, "agent": agent, "status": status},
            prefix="r.")
        rows = self._connection.execute(
            "SELECT r.hash, r.suite, r.task_id, r.agent, r.seed, r.sweep, e.episode, e.metrics"
            f" FROM episodes AS e JOIN runs AS r ON r.hash = e.run_hash{where}"
            " ORDER BY r.suite, r.task_id, r.agent, r.seed, r.hash, e.episode", parameters)
        episodes = []
        for row in rows:
            episode = dict(row)
            episode["sweep"] = json.loads(episode["sweep"])
            episode["metrics"] = {key: math.nan if value is None else value
                                  for key, value in json.loads(episode["metrics"]).items()}
            episodes.append(episode)
        return episodes

    def trace(self, hash: str, episode: int) -> dict[str, np.ndarray]:
        """The stored trace of one episode, as writable arrays of their original dtype."""
        rows = self._connection.execute(
            "SELECT name, dtype, shape, data FROM traces WHERE run_hash = ? AND episode = ?"
            " ORDER BY name", (hash, int(episode))).fetchall()
        if not rows:
            raise KeyError(f"no trace stored for run {hash!r}, episode {episode}")
        return {row["name"]: np.frombuffer(zlib.decompress(row["data"]), dtype=row["dtype"])
                .reshape(json.loads(row["shape"])).copy() for row in rows}

    def agent_file(self, hash: str) -> Path | None:
        """The saved agent of a run (``run --save-agents``), or None if the run kept none."""
        row = self._connection.execute("SELECT agent_file FROM runs WHERE hash = ?",
                                       (hash,)).fetchone()
        if row is None:
            raise KeyError(f"no run {hash!r} in {self.path}")
        if row["agent_file"] is None:
            return None
        path = Path(row["agent_file"])
        return path if path.is_absolute() else self.path.parent / path

    def learning_curve(self, hash: str, metric: str) -> tuple[np.ndarray, np.ndarray]:
        """(steps, values) of one logged metric of a run, sorted by step; empty if none."""
        rows = self._connection.execute(
            "SELECT step, value FROM learning_curves WHERE run_hash = ? AND metric = ?"
            " ORDER BY step, rowid", (hash, metric)).fetchall()
        steps = np.array([row["step"] for row in rows], dtype=np.int64)
        values = np.array([math.nan if row["value"] is None else row["value"] for row in rows],
                          dtype=np.float64)
        return steps, values

    # -- exporting -------------------------------------------------------------

    def run_summaries(self) -> list[dict[str, Any]]:
        """One dict per run: its identity columns, then the mean of each metric over episodes.

        Metric means follow ``benchmarks.metrics.summarise`` (``episodes``
        count, ``survival`` share); a run without episodes has no metric entries.
        """
        by_run: dict[str, list[dict[str, float]]] = {}
        for episode in self.episodes():
            by_run.setdefault(episode["hash"], []).append(episode["metrics"])
        summaries = []
        for run in self.runs():
            row = {column: run[column] for column in _EXPORT_COLUMNS}
            row["sweep"] = json.dumps(run["sweep"], sort_keys=True)
            if run["hash"] in by_run:
                row.update(summarise(by_run[run["hash"]]))
            summaries.append(row)
        return summaries

    def export_csv(self, path: str | Path) -> Path:
        """Write one CSV row per run (identity columns, then mean metrics, sorted by name)."""
        summaries = self.run_summaries()
        columns = list(_EXPORT_COLUMNS) + _metric_columns(summaries)
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        with path.open("w", newline="", encoding="utf-8") as handle:
            writer = csv.DictWriter(handle, fieldnames=columns, restval="")
            writer.writeheader()
            writer.writerows(summaries)
        return path

    def export_parquet(self, path: str | Path) -> Path:
        """Write the same table as :meth:`export_csv` as Parquet (needs the optional pyarrow)."""
        try:
            arrow = importlib.import_module("pyarrow")
            parquet = importlib.import_module("pyarrow.parquet")
        except ImportError as error:
            raise ConfigError("export format", "parquet",
                              "'csv' (export_csv), or install the optional package pyarrow "
                              "(pip install pyarrow) to write Parquet") from error
        summaries = self.run_summaries()
        columns = list(_EXPORT_COLUMNS) + _metric_columns(summaries)
        table = arrow.table({column: [row.get(column) for row in summaries] for column in columns})
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        parquet.write_table(table, path)
        return path


def _decoded(row: sqlite3.Row) -> dict[str, Any]:
    """A row of runs or failed_attempts with its JSON columns decoded."""
    run = dict(row)
    for column in ("config", "sweep", "environment"):
        run[column] = json.loads(run[column])
    return run


def _metric_columns(summaries: Sequence[Mapping[str, Any]]) -> list[str]:
    return sorted({key for row in summaries for key in row} - set(_EXPORT_COLUMNS))
