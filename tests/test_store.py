"""The SQLite results store: round trip, idempotence, atomicity, WAL, concurrency, export."""

from __future__ import annotations

import csv
import math
import sqlite3
import sys
import threading

import numpy as np
import pytest

from needbench.benchmarks import spec
from needbench.benchmarks.store import JobResult, Store
from needbench.envs.errors import ConfigError

SUITE = """
[suite]
name = "pantry-check"
seeds = [0, 1, 2]

[[task]]
id = "needbench/Menu-v0"

[[agent]]
name = "random"
total_steps = 0

[[sweep]]
target = "task"
parameter = "task_weight"
values = [0.0, 0.5]
"""
JOBS = spec.expand(spec.parse_suite(SUITE))


def _result(job: spec.Job, *, status: str = "done", returns=(1.0, 3.0)) -> JobResult:
    episodes = [{"return": value, "discounted_drive": 2.0 * value, "time_in_band": 0.25,
                 "survived": 1.0, "length": 50.0, "deviation/water": 0.5} for value in returns]
    traces = [{"level": np.arange(6, dtype=np.float64).reshape(3, 2) + index,
               "alive": np.array([True, False]),
               "action": np.array([[1, 2], [3, 4]], dtype=np.int32),
               "terminated": np.array(False)} for index in range(len(returns))]
    return JobResult(hash=job.hash, config=job.config, status=status,
                     error="Traceback: the agent fell over" if status == "failed" else None,
                     started=1_700_000_000.0, finished=1_700_000_012.5, wall_seconds=12.5,
                     episodes=episodes if status == "done" else [],
                     curves=[(0, "episode/return", -1.0),
                             (100, "episode/return", 0.5),
                             (100, "stability/time_in_band", 0.3)],
                     traces=traces if status == "done" else [], git_revision="abc123")


TABLES = ("runs", "episodes", "learning_curves", "traces")


def _counts(path) -> dict[str, int]:
    """Row counts of the four tables, read in one statement and so from one snapshot."""
    query = "SELECT " + ", ".join(f"(SELECT COUNT(*) FROM {table})" for table in TABLES)
    with sqlite3.connect(path) as connection:
        return dict(zip(TABLES, connection.execute(query).fetchone(), strict=True))


def test_round_trip(tmp_path):
    store = Store(tmp_path / "deep" / "results.sqlite")
    job = JOBS[0]
    assert store.record_job(_result(job)) is True
    assert store.completed_hashes() == {job.hash}

    (run,) = store.runs()
    assert run["hash"] == job.hash and run["status"] == "done"
    assert (run["suite"], run["task_id"], run["agent"], run["seed"]) == (
        "pantry-check", "needbench/Menu-v0", "random", 0)
    assert run["config"] == job.config
    assert run["sweep"] == {"task.task_weight": 0.0}
    assert run["started"] == "2023-11-14T22:13:20.000+00:00"  # 1.7e9 s after the epoch
    assert run["wall_seconds"] == 12.5 and run["git_revision"] == "abc123"

    episodes = store.episodes(job.hash)
    assert [e["episode"] for e in episodes] == [0, 1]
    assert episodes[1]["metrics"]["return"] == 3.0
    assert episodes[1]["metrics"]["deviation/water"] == 0.5

    trace = store.trace(job.hash, 1)
    original = _result(job).traces[1]
    assert set(trace) == set(original)
    for name, array in original.items():
        assert trace[name].dtype == array.dtype and trace[name].shape == array.shape
        np.testing.assert_array_equal(trace[name], array)
    trace["level"][0, 0] = -1.0  # arrays come back writable
    with pytest.raises(KeyError):
        store.trace(job.hash, 7)

    steps, values = store.learning_curve(job.hash, "episode/return")
    np.testing.assert_array_equal(steps, [0, 100])
    np.testing.assert_array_equal(values, [-1.0, 0.5])
    store.close()


def test_plain_columns_are_queryable(tmp_path):
    path = tmp_path / "results.sqlite"
    with Store(path) as store:
        store.record_job(_result(JOBS[0], returns=(1.0, 3.0)))
    with sqlite3.connect(path) as connection:
        row = connection.execute('SELECT AVG("return"), SUM(survived), MAX(length)'
                                 " FROM episodes").fetchone()
    assert row == (2.0, 2, 50)


def test_recording_twice_writes_once(tmp_path):
    path = tmp_path / "results.sqlite"
    store = Store(path)
    assert store.record_job(_result(JOBS[0])) is True
    before = _counts(path)
    assert store.record_job(_result(JOBS[0], returns=(9.0, 9.0, 9.0))) is False
    assert _counts(path) == before == {"runs": 1, "episodes": 2, "learning_curves": 3,
                                       "traces": 8}
    # A later failure of the same job does not overwrite the finished run either.
    assert store.record_job(_result(JOBS[0], status="failed")) is False
    assert store.runs()[0]["status"] == "done"


def test_failed_run_is_replaced_by_done(tmp_path):
    path = tmp_path / "results.sqlite"
    store = Store(path)
    store.record_job(_result(JOBS[1], status="failed"))
    (failed,) = store.runs(status="failed")
    assert "fell over" in failed["error"]
    assert store.completed_hashes() == set()  # a failed job is retried on resume
    assert store.record_job(_result(JOBS[1])) is True
    (run,) = store.runs()
    assert run["status"] == "done" and run["error"] is None
    # the failed attempt's curves are gone: 3 from the done result, not 6
    assert _counts(path) == {"runs": 1, "episodes": 2, "learning_curves": 3, "traces": 8}


def test_wal_mode(tmp_path):
    path = tmp_path / "results.sqlite"
    store = Store(path)
    assert store.journal_mode == "wal"
    store.record_job(_result(JOBS[0]))
    # Source: SQLite documentation, "Write-Ahead Logging": WAL mode is persistent,
    # so a fresh connection reports it, and writes go to the -wal file beside the db.
    with sqlite3.connect(path) as connection:
        assert connection.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert (tmp_path / "results.sqlite-wal").exists()


def test_failure_half_way_leaves_nothing(tmp_path, monkeypatch):
    path = tmp_path / "results.sqlite"
    store = Store(path)

    def broken(self, rows):
        raise RuntimeError("disk on fire")

    # runs and episodes are inserted before the traces: the error strikes after them.
    monkeypatch.setattr(Store, "_insert_traces", broken)
    with pytest.raises(RuntimeError, match="disk on fire"):
        store.record_job(_result(JOBS[0]))
    assert _counts(path) == {"runs": 0, "episodes": 0, "learning_curves": 0, "traces": 0}

    # Replacing a failed run: the failed row survives an interrupted replacement.
    monkeypatch.undo()
    store.record_job(_result(JOBS[1], status="failed"))
    monkeypatch.setattr(Store, "_insert_traces", broken)
    with pytest.raises(RuntimeError):
        store.record_job(_result(JOBS[1]))
    assert [run["status"] for run in store.runs()] == ["failed"]

    monkeypatch.undo()
    assert store.record_job(_result(JOBS[0])) is True
    assert store.completed_hashes() == {JOBS[0].hash}


def test_bad_result_is_rejected_before_writing(tmp_path):
    path = tmp_path / "results.sqlite"
    store = Store(path)
    with pytest.raises(ConfigError, match="result.status"):
        store.record_job(_result(JOBS[0], status="running"))
    bad = _result(JOBS[0], status="failed")
    bad.error = None
    with pytest.raises(ConfigError, match="result.error"):
        store.record_job(bad)
    config = {key: value for key, value in JOBS[0].config.items() if key != "task"}
    with pytest.raises(ConfigError, match=r"result\.config\.task"):
        store.record_job(JobResult(hash="x", config=config, status="done", started=0.0,
                                   finished=1.0, wall_seconds=1.0))
    assert _counts(path)["runs"] == 0


def test_non_finite_metrics_come_back_as_nan(tmp_path):
    store = Store(tmp_path / "results.sqlite")
    result = _result(JOBS[0])
    result.episodes[0]["disturbance_deviation"] = math.nan
    store.record_job(result)
    assert math.isnan(store.episodes(JOBS[0].hash)[0]["metrics"]["disturbance_deviation"])


def test_reader_sees_nothing_of_a_job_being_written(tmp_path, monkeypatch):
    path = tmp_path / "results.sqlite"
    writer, reader = Store(path), Store(path)
    writer.record_job(_result(JOBS[0]))
    seen = {}
    original = Store._insert_traces

    def insert_then_read(self, rows):
        original(self, rows)
        # Mid-transaction: run and episodes of JOBS[1] are written but not committed.
        seen["hashes"] = reader.completed_hashes()
        seen["episodes"] = len(reader.episodes())
        seen["late_reader"] = Store(path).completed_hashes()  # opening does not block

    monkeypatch.setattr(Store, "_insert_traces", insert_then_read)
    writer.record_job(_result(JOBS[1]))
    assert seen == {"hashes": {JOBS[0].hash}, "episodes": 2, "late_reader": {JOBS[0].hash}}
    assert reader.completed_hashes() == {JOBS[0].hash, JOBS[1].hash}


def test_concurrent_reader_sees_whole_jobs(tmp_path):
    path = tmp_path / "results.sqlite"
    Store(path).close()
    many = spec.parse_suite(SUITE.replace("seeds = [0, 1, 2]", f"seeds = {list(range(20))}"))
    results = [_result(job) for job in spec.expand(many)]  # 40 jobs of 2 episodes each
    done = threading.Event()
    snapshots, errors = [], []

    def write():
        try:
            with Store(path) as store:
                for result in results:
                    store.record_job(result)
        except Exception as error:  # surfaced below
            errors.append(error)
        finally:
            done.set()

    def read():
        try:
            with Store(path) as store:
                while not done.is_set():
                    snapshots.append(_counts(path))
                snapshots.append(_counts(path))
                assert len(store.completed_hashes()) == len(results)
        except Exception as error:
            errors.append(error)

    threads = [threading.Thread(target=write), threading.Thread(target=read)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(timeout=60)
    assert errors == []
    # Every snapshot holds whole jobs only: 2 episodes, 3 curve points, 8 trace
    # arrays per run, never a part of one.
    for counts in snapshots:
        runs = counts["runs"]
        assert counts == {"runs": runs, "episodes": 2 * runs, "learning_curves": 3 * runs,
                          "traces": 8 * runs}
    assert snapshots[-1]["runs"] == len(results)


def test_csv_export(tmp_path):
    store = Store(tmp_path / "results.sqlite")
    store.record_job(_result(JOBS[0], returns=(1.0, 3.0)))
    store.record_job(_result(JOBS[1], returns=(4.0, 8.0)))
    store.record_job(_result(JOBS[2], status="failed"))
    path = store.export_csv(tmp_path / "out" / "runs.csv")
    with path.open(newline="") as handle:
        rows = {row["hash"]: row for row in csv.DictReader(handle)}
    assert set(rows) == {JOBS[0].hash, JOBS[1].hash, JOBS[2].hash}
    first, second, failed = rows[JOBS[0].hash], rows[JOBS[1].hash], rows[JOBS[2].hash]
    # Source: hand computation. Returns (1, 3) -> mean 2, (4, 8) -> mean 6;
    # discounted drive is twice the return in these results: 4 and 12.
    assert float(first["return"]) == 2.0 and float(second["return"]) == 6.0
    assert float(first["discounted_drive"]) == 4.0 and float(second["discounted_drive"]) == 12.0
    assert float(first["survival"]) == 1.0 and float(first["episodes"]) == 2.0
    assert float(first["deviation/water"]) == 0.5
    assert first["task_id"] == "needbench/Menu-v0" and first["status"] == "done"
    assert first["sweep"] == '{"task.task_weight": 0.0}'
    assert failed["status"] == "failed" and failed["return"] == ""


def test_parquet_needs_pyarrow(tmp_path, monkeypatch):
    store = Store(tmp_path / "results.sqlite")
    monkeypatch.setitem(sys.modules, "pyarrow", None)  # import now fails as if not installed
    with pytest.raises(ConfigError, match="pyarrow"):
        store.export_parquet(tmp_path / "runs.parquet")


def test_parquet_export(tmp_path):
    parquet = pytest.importorskip("pyarrow.parquet")
    store = Store(tmp_path / "results.sqlite")
    store.record_job(_result(JOBS[0], returns=(1.0, 3.0)))
    table = parquet.read_table(store.export_parquet(tmp_path / "runs.parquet"))
    assert table.column("return").to_pylist() == [2.0]


def test_schema_version_is_checked(tmp_path):
    path = tmp_path / "results.sqlite"
    Store(path).close()
    with sqlite3.connect(path) as connection:
        connection.execute("UPDATE schema_version SET version = 99")
    with pytest.raises(ConfigError, match="schema_version"):
        Store(path)


def test_agent_files_are_kept_relative_to_the_store(tmp_path):
    folder = tmp_path / "run"
    inside = _result(JOBS[0])
    inside.agent_file = str(folder / "agents" / "a.npz")
    outside = _result(JOBS[1])
    outside.agent_file = str(tmp_path / "elsewhere" / "b.npz")
    with Store(folder / "results.sqlite3") as store:
        store.record_job(inside)
        store.record_job(outside)
        store.record_job(_result(JOBS[2]))
        stored = {run["hash"]: run["agent_file"] for run in store.runs()}
        assert stored[JOBS[0].hash] == "agents/a.npz"  # the run folder can move whole
        assert stored[JOBS[1].hash] == str((tmp_path / "elsewhere" / "b.npz").resolve())
        assert store.agent_file(JOBS[0].hash) == folder / "agents" / "a.npz"
        assert store.agent_file(JOBS[2].hash) is None
        with pytest.raises(KeyError):
            store.agent_file("no-such-run")
        store.export_csv(folder / "runs.csv")
    assert "agents/a.npz" in (folder / "runs.csv").read_text()


def test_a_version_1_store_gains_the_agent_file_column(tmp_path):
    path = tmp_path / "results.sqlite3"
    with Store(path) as store:
        store.record_job(_result(JOBS[0]))
    with sqlite3.connect(path) as connection:  # the layout of version 1
        connection.execute("ALTER TABLE runs DROP COLUMN agent_file")
        connection.execute("ALTER TABLE runs DROP COLUMN environment")
        connection.execute("DROP TABLE failed_attempts")
        connection.execute("UPDATE schema_version SET version = 1")
    with Store(path) as store:
        assert [run["agent_file"] for run in store.runs()] == [None]
        assert store.agent_file(JOBS[0].hash) is None
        assert store.record_job(_result(JOBS[1]))
    with sqlite3.connect(path) as connection:
        assert connection.execute("SELECT version FROM schema_version").fetchall() == [(2,)]


def test_a_file_that_is_not_sqlite_is_a_config_error(tmp_path):
    # Issue 11, item 1: this was a raw DatabaseError.
    path = tmp_path / "x.sqlite3"
    path.write_text("hello\n")
    with pytest.raises(ConfigError, match="a needbench results store") as caught:
        Store(path)
    assert caught.value.path == "results" and caught.value.value == str(path)
    assert path.read_text() == "hello\n"  # left as it was


def test_a_store_under_a_file_or_at_a_folder_is_a_config_error(tmp_path):
    # Issue 11, item 2: a file where the store's folder should be was a raw FileExistsError.
    (tmp_path / "taken").write_text("not a folder")
    with pytest.raises(ConfigError, match="a file of that name exists"):
        Store(tmp_path / "taken" / "results.sqlite3")
    with pytest.raises(ConfigError, match="not a folder"):
        Store(tmp_path)


def test_a_later_success_supersedes_failures_of_its_cell(tmp_path):
    # Issue 11, item 8: after a fix changed the job's hash, the old failure still counted.
    store = Store(tmp_path / "results.sqlite")
    broken, other = JOBS[0], JOBS[1]
    store.record_job(_result(broken, status="failed"))
    store.record_job(_result(other, status="failed"))
    fixed_config = {**broken.config, "agent": {**broken.config["agent"], "total_steps": 5}}
    fixed = spec.Job(fixed_config)
    assert fixed.hash != broken.hash
    store.record_job(_result(fixed))
    runs = {run["hash"]: run["status"] for run in store.runs()}
    assert runs == {fixed.hash: "done", other.hash: "failed"}  # another cell's failure stays
    (attempt,) = store.failed_attempts()
    assert attempt["hash"] == broken.hash and attempt["superseded_by"] == fixed.hash
    assert attempt["error"] == "Traceback: the agent fell over"
    assert attempt["config"] == broken.config
    # A rerun of the same hash moves the failed row to the history as well.
    store.record_job(_result(other))
    assert store.failed_hashes() == set()
    assert [a["hash"] for a in store.failed_attempts()] == [broken.hash, other.hash]
    assert _counts(store.path)["runs"] == 2


def test_every_run_records_the_software_it_ran_with(tmp_path):
    store = Store(tmp_path / "results.sqlite")
    store.record_job(_result(JOBS[0]))
    (run,) = store.runs()
    environment = run["environment"]
    assert set(environment) >= {"python", "needbench", "numpy", "numba", "gymnasium",
                                "torch", "stable-baselines3"}
    assert environment["numpy"] == np.__version__
    assert environment["python"] == ".".join(map(str, sys.version_info[:3]))
    assert run["config"] == JOBS[0].config and run["git_revision"] == "abc123"


def test_a_version_1_store_is_brought_up_to_date(tmp_path):
    path = tmp_path / "results.sqlite"
    Store(path).record_job(_result(JOBS[0]))
    with sqlite3.connect(path) as connection:  # as version 1 wrote it
        connection.execute("DROP TABLE failed_attempts")
        connection.execute("ALTER TABLE runs DROP COLUMN environment")
        connection.execute("ALTER TABLE runs DROP COLUMN agent_file")
        connection.execute("UPDATE schema_version SET version = 1")
    store = Store(path)
    (run,) = store.runs()
    assert run["environment"] == {} and store.failed_attempts() == []
    store.record_job(_result(JOBS[1]))
    assert len(store.runs()) == 2
