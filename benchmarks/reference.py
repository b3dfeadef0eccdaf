"""Shipped reference results: the per-run scores of a run of a suite, in one JSON file.

A reference file (``benchmarks/reference/<suite>.json``, written by
:func:`write_reference`, read by :func:`load_reference`) holds, for every done
run of one suite in a results store:

    hash          the job's config hash (``benchmarks.spec.Job.hash``)
    task, agent, seed, sweep      the job's identity (sweep: its grid point)
    episodes      its number of evaluation episodes
    total_steps   its learning budget, env steps
    wall_seconds  how long the job took
    metrics       the mean over its evaluation episodes of every metric the store
                  keeps (``benchmarks.metrics.summarise``: discounted drive,
                  return, time in band, survival, the deviation of each need...);
                  a metric that is NaN is written as null

and a header: the format and its version, the suite's name and protocol
(``eval_episodes``, ``gamma``, and each task's keyword arguments), the
needbench versions and git revisions the runs ran with, the date the file was
made, the command that made it, the runs' total wall seconds (the sum over
jobs) and elapsed seconds (first start to last finish). The JSON header is
indented; the runs are one line each, so a new file reads as a small diff.

Normalised scores (:func:`normalised_scores`): per task, 0 is the random
agent and 1 the best non-learning reference: on each metric, the better of
the exact planner (where the file has its runs on the task) and the setpoint
controller, on the discounted drive and on the return. Their aggregate over tasks per agent
(:func:`aggregate_score`) is the IQM with a stratified bootstrap interval
over tasks and runs (Agarwal et al. 2021; :mod:`needbench.benchmarks.stats`).
"""

from __future__ import annotations

import json
import math
import re
import shlex
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from needbench.envs.errors import ConfigError

FORMAT = "needbench-reference"
FORMAT_VERSION = 1

#: Where shipped reference files live: ``<suite>.json``.
REFERENCE_FOLDER = Path(__file__).resolve().parent / "reference"

#: The floor of a normalised score (0) and the non-learning references of its 1:
#: on each task and metric, the better of these two that has runs there. The
#: planner applies to few tasks, and it maximises the reward it is paid, which
#: is not always stability: on Lure the reward pays for the sweet's
#: palatability, so the planner's discounted drive is worse than random's and
#: the controller's is the task's best non-learning figure.
FLOOR_AGENT = "random"
CEILING_AGENTS = ("exact-planner", "setpoint-controller")

#: Metrics with a normalised score: key -> (title with unit, higher is better).
SCORED_METRICS = {
    "discounted_drive": ("discounted drive (drive units)", False),
    "return": ("return (reward units)", True),
}

#: The per-task table's metrics: key -> (title, higher is better).
TABLE_METRICS = {
    "discounted_drive": ("discounted drive", False),
    "time_in_band": ("time in band", True),
    "return": ("return", True),
    "survival": ("survival", True),
}

_HASH = re.compile(r"^[0-9a-f]{64}$")


@dataclass(frozen=True)
class ReferenceRun:
    """One done run of the reference: identity, budget and per-run metric means.

    ``metrics[key]`` is the mean over the run's ``episodes`` evaluation episodes
    (NaN where the store held no finite value).
    """

    hash: str
    task_id: str
    agent: str
    seed: int
    sweep: dict[str, Any]
    episodes: int
    total_steps: int
    wall_seconds: float
    metrics: dict[str, float]

    @property
    def label(self) -> str:
        """The agent and its sweep point, e.g. ``tabular-q agent.learning_rate=0.5``."""
        return series_label(self.agent, self.sweep)


@dataclass(frozen=True)
class Reference:
    """A loaded reference file (module docstring). ``source`` is the file it came from."""

    suite: str
    protocol: dict[str, Any]
    package_versions: tuple[str, ...]
    git_revisions: tuple[str, ...]
    made: str
    command: str
    wall_seconds: float
    elapsed_seconds: float
    runs: tuple[ReferenceRun, ...]
    source: str = field(default="<memory>", compare=False)

    @property
    def eval_episodes(self) -> int:
        return int(self.protocol["eval_episodes"])

    @property
    def gamma(self) -> float:
        return float(self.protocol["gamma"])

    @property
    def task_kwargs(self) -> dict[str, dict[str, Any]]:
        """{task id: its keyword arguments as the suite wrote them}."""
        return self.protocol["tasks"]

    def task_ids(self) -> list[str]:
        """The tasks in the order of the protocol (the suite's order)."""
        return list(self.task_kwargs)

    def labels(self, task_id: str) -> list[str]:
        """Agents (with their sweep points) that have runs on ``task_id``, sorted."""
        return sorted({run.label for run in self.runs if run.task_id == task_id})

    def runs_of(self, task_id: str, label: str) -> list[ReferenceRun]:
        """The runs of one agent (label) on one task, by seed."""
        return sorted((run for run in self.runs if run.task_id == task_id and run.label == label),
                      key=lambda run: (run.seed, run.hash))

    def seeds(self, task_id: str) -> set[int]:
        return {run.seed for run in self.runs if run.task_id == task_id}


def series_label(agent: str, sweep: Mapping[str, Any]) -> str:
    """An agent and its sweep point as one label (the report's convention)."""
    from needbench.benchmarks.report import sweep_text

    return f"{agent} {sweep_text(sweep)}".strip()


# ----------------------------------------------------------------------------
# Building a reference file from a results store
# ----------------------------------------------------------------------------

def _finite_or_none(value: Any) -> float | None:
    number = float(value)
    return number if math.isfinite(number) else None


def _seconds_between(first: str, last: str) -> float:
    return (datetime.fromisoformat(last) - datetime.fromisoformat(first)).total_seconds()


def reference_record(store, suite: str | None = None, *, command: str | None = None,
                     made: datetime | None = None) -> dict[str, Any]:
    """The reference file's content (a JSON-able dict) from the done runs of one suite.

    Args:
        store: a :class:`~needbench.benchmarks.store.Store`.
        suite: the suite whose runs to take; None when the store holds one suite only.
        command: the command line that made the file, recorded in its header.
        made: the date recorded as made (default: now, UTC).

    Raises:
        ConfigError: no done run, several suites and none chosen, or runs of the
            suite that disagree on the protocol (evaluation episodes, discount,
            a task's keywords): a reference holds one protocol per task.
    """
    suites = sorted({run["suite"] for run in store.runs(status="done")})
    if suite is None:
        if len(suites) != 1:
            raise ConfigError("--suite", None, "the suite to take, one of: "
                              + (", ".join(suites) or "(the store holds no done run)"))
        suite = suites[0]
    runs = store.runs(suite=suite, status="done")
    if not runs:
        raise ConfigError("--suite", suite, "a suite with done runs in the store: "
                          + (", ".join(suites) or "(none)"))
    summaries = {row["hash"]: row for row in store.run_summaries()}
    protocol: dict[str, Any] = {"eval_episodes": None, "gamma": None, "tasks": {}}
    rows = []
    for run in runs:
        config = run["config"]
        where = f"run {run['hash'][:12]} ({run['task_id']} {run['agent']} seed={run['seed']})"
        for key in ("eval_episodes", "gamma"):
            if protocol[key] is None:
                protocol[key] = config[key]
            elif protocol[key] != config[key]:
                raise ConfigError(f"{where}.{key}", config[key],
                                  f"{protocol[key]!r}, as the suite's other runs: a reference "
                                  "holds one protocol (sweep no gamma in a reference suite)")
        kwargs = protocol["tasks"].setdefault(run["task_id"], config["task"]["kwargs"])
        if kwargs != config["task"]["kwargs"]:
            raise ConfigError(f"{where}.task.kwargs", config["task"]["kwargs"],
                              f"{kwargs!r}, as the task's other runs: a reference holds one "
                              "protocol per task (sweep no task keyword in a reference suite)")
        summary = summaries[run["hash"]]
        metrics = {key: _finite_or_none(value) for key, value in sorted(summary.items())
                   if key not in ("episodes", *_IDENTITY_KEYS)
                   and isinstance(value, (int, float)) and not isinstance(value, bool)}
        rows.append({"hash": run["hash"], "task": run["task_id"], "agent": run["agent"],
                     "seed": run["seed"], "sweep": run["sweep"],
                     "episodes": int(summary.get("episodes", 0)),
                     "total_steps": config["agent"]["total_steps"],
                     "wall_seconds": run["wall_seconds"], "metrics": metrics})
    order = {task_id: i for i, task_id in enumerate(protocol["tasks"])}
    rows.sort(key=lambda row: (order[row["task"]], row["agent"], json.dumps(row["sweep"],
                               sort_keys=True), row["seed"], row["hash"]))
    return {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "suite": suite,
        "protocol": protocol,
        "package_versions": sorted({run["package_version"] for run in runs}),
        "git_revisions": sorted({run["git_revision"] for run in runs if run["git_revision"]}),
        "made": (made or datetime.now(tz=UTC)).isoformat(timespec="seconds"),
        "command": command or "needbench.benchmarks.reference.reference_record",
        "wall_seconds": float(sum(run["wall_seconds"] for run in runs)),
        "elapsed_seconds": _seconds_between(min(run["started"] for run in runs),
                                            max(run["finished"] for run in runs)),
        "runs": rows,
    }


_IDENTITY_KEYS = ("hash", "suite", "task_id", "agent", "seed", "sweep", "status",
                  "wall_seconds", "package_version", "git_revision", "agent_file")


def reference_text(record: Mapping[str, Any]) -> str:
    """The record as JSON: the header indented, then one line per run."""
    header = {key: value for key, value in record.items() if key != "runs"}
    lines = ["{"]
    for key, value in header.items():
        text = json.dumps(value, indent=2, allow_nan=False).replace("\n", "\n  ")
        lines.append(f"  {json.dumps(key)}: {text},")
    runs = [json.dumps(run, sort_keys=False, allow_nan=False) for run in record["runs"]]
    lines.append('  "runs": [')
    lines += [f"    {run}," for run in runs[:-1]] + ([f"    {runs[-1]}"] if runs else [])
    lines += ["  ]", "}"]
    return "\n".join(lines) + "\n"


def write_reference(store, out: str | Path, suite: str | None = None, *,
                    command: str | None = None) -> Reference:
    """Build the reference of ``suite``'s done runs in ``store``, write it to ``out``,
    and return it as loaded back (so a written file is always a valid one)."""
    record = reference_record(store, suite, command=command)
    path = Path(out)
    if path.exists() and path.is_dir():
        raise ConfigError("--out", str(path), "a file name, e.g. benchmarks/reference/core.json")
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(reference_text(record), encoding="utf-8")
    return load_reference(path)


def command_line(argv: Sequence[str]) -> str:
    """The command as a user would type it, for the header."""
    return shlex.join(["needbench", *argv])


# ----------------------------------------------------------------------------
# Loading and validating
# ----------------------------------------------------------------------------

def shipped_references() -> dict[str, Path]:
    """{name: file} of the reference files shipped with needbench (``core``...)."""
    if not REFERENCE_FOLDER.is_dir():
        return {}
    return {path.stem: path for path in sorted(REFERENCE_FOLDER.glob("*.json"))}


def resolve_reference(name: str | Path) -> Path:
    """The file of a shipped reference name (``core``) or of a path to a reference file."""
    path = Path(name)
    if path.is_file():
        return path
    shipped = shipped_references()
    if str(name) in shipped:
        return shipped[str(name)]
    raise ConfigError("reference", str(name), "a shipped reference ("
                      + (", ".join(shipped) or "none shipped yet")
                      + ") or the path of a reference JSON file")


class _Checker:
    """Checks one decoded reference document; every problem is a ConfigError naming the file."""

    def __init__(self, source: str):
        self.source = source

    def fail(self, path: str, value: Any, allowed: str) -> ConfigError:
        return ConfigError(path, value, allowed, context=self.source)

    def get(self, table: Mapping[str, Any], key: str, path: str, kinds: type | tuple,
            what: str) -> Any:
        value = table.get(key, _ABSENT)
        bad_bool = isinstance(value, bool) and bool not in (
            kinds if isinstance(kinds, tuple) else (kinds,))
        if value is _ABSENT or not isinstance(value, kinds) or bad_bool:
            raise self.fail(f"{path}{key}", "<missing>" if value is _ABSENT else value, what)
        return value

    def document(self, document: Any) -> Reference:
        if not isinstance(document, dict):
            raise self.fail("(file)", type(document).__name__, "a JSON object")
        if document.get("format") != FORMAT:
            raise self.fail("format", document.get("format", "<missing>"), repr(FORMAT))
        if document.get("format_version") != FORMAT_VERSION:
            raise self.fail("format_version", document.get("format_version", "<missing>"),
                            f"{FORMAT_VERSION}, the version this needbench reads")
        suite = self.get(document, "suite", "", str, "the suite's name")
        protocol = self.get(document, "protocol", "", dict, "an object")
        episodes = self.get(protocol, "eval_episodes", "protocol.", int, "an integer >= 1")
        if episodes < 1:
            raise self.fail("protocol.eval_episodes", episodes, "an integer >= 1")
        gamma = self.get(protocol, "gamma", "protocol.", (int, float), "a number in (0, 1)")
        if not 0.0 < gamma < 1.0:
            raise self.fail("protocol.gamma", gamma, "a number in (0, 1)")
        tasks = self.get(protocol, "tasks", "protocol.", dict,
                         "an object {task id: keyword arguments}")
        if not tasks or not all(isinstance(kwargs, dict) for kwargs in tasks.values()):
            raise self.fail("protocol.tasks", tasks, "a non-empty object {task id: {keywords}}")
        versions = self.strings(document, "package_versions")
        revisions = self.strings(document, "git_revisions")
        made = self.get(document, "made", "", str, "an ISO 8601 date")
        try:
            datetime.fromisoformat(made)
        except ValueError:
            raise self.fail("made", made, "an ISO 8601 date") from None
        command = self.get(document, "command", "", str, "the command that made the file")
        wall = self.get(document, "wall_seconds", "", (int, float), "seconds >= 0")
        elapsed = self.get(document, "elapsed_seconds", "", (int, float), "seconds >= 0")
        rows = self.get(document, "runs", "", list, "a list of runs")
        if not rows:
            raise self.fail("runs", rows, "at least one run")
        runs = tuple(self.run(row, f"runs[{i}].", tasks, episodes) for i, row in enumerate(rows))
        seen: dict[str, int] = {}
        for i, run in enumerate(runs):
            if run.hash in seen:
                raise self.fail(f"runs[{i}].hash", run.hash,
                                f"a hash not already listed (runs[{seen[run.hash]}] has it)")
            seen[run.hash] = i
        return Reference(suite, {"eval_episodes": episodes, "gamma": float(gamma),
                                 "tasks": tasks}, versions, revisions, made, command,
                         float(wall), float(elapsed), runs, self.source)

    def strings(self, document: Mapping[str, Any], key: str) -> tuple[str, ...]:
        values = self.get(document, key, "", list, "a list of strings")
        if not all(isinstance(value, str) for value in values):
            raise self.fail(key, values, "a list of strings")
        return tuple(values)

    def run(self, row: Any, path: str, tasks: Mapping[str, Any], episodes: int) -> ReferenceRun:
        if not isinstance(row, dict):
            raise self.fail(path.rstrip("."), row, "an object")
        run_hash = self.get(row, "hash", path, str, "64 hexadecimal digits")
        if not _HASH.match(run_hash):
            raise self.fail(f"{path}hash", run_hash, "64 lowercase hexadecimal digits")
        task_id = self.get(row, "task", path, str, "a task id")
        if task_id not in tasks:
            raise self.fail(f"{path}task", task_id, "a task of protocol.tasks: "
                            + ", ".join(tasks))
        agent = self.get(row, "agent", path, str, "an agent name")
        seed = self.get(row, "seed", path, int, "an integer >= 0")
        if seed < 0:
            raise self.fail(f"{path}seed", seed, "an integer >= 0")
        sweep = self.get(row, "sweep", path, dict, "an object (the sweep point, {} for none)")
        count = self.get(row, "episodes", path, int, f"{episodes}, protocol.eval_episodes")
        if count != episodes:
            raise self.fail(f"{path}episodes", count, f"{episodes}, protocol.eval_episodes")
        steps = self.get(row, "total_steps", path, int, "an integer >= 0")
        wall = self.get(row, "wall_seconds", path, (int, float), "seconds >= 0")
        metrics = self.get(row, "metrics", path, dict, "an object {metric: mean or null}")
        values = {}
        for key, value in metrics.items():
            if value is None:
                values[key] = math.nan
            elif isinstance(value, (int, float)) and not isinstance(value, bool) \
                    and math.isfinite(value):
                values[key] = float(value)
            else:
                raise self.fail(f"{path}metrics.{key}", value, "a finite number or null")
        for key in SCORED_METRICS:
            if key not in values:
                raise self.fail(f"{path}metrics.{key}", "<missing>", "the run's mean " + key)
        return ReferenceRun(run_hash, task_id, agent, seed, sweep, count, steps, float(wall),
                            values)


_ABSENT = object()


def load_reference(name: str | Path) -> Reference:
    """Load and check a reference: a shipped name (``core``) or the path of a file.

    Raises:
        ConfigError: an unknown name, an unreadable file, text that is not
            JSON, or a document that is not a valid reference (naming the
            file, the key path, the bad value and what is allowed).
    """
    path = resolve_reference(name)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as error:
        raise ConfigError("reference", str(path), f"a readable reference file ({error})") from None
    try:
        document = json.loads(text)
    except json.JSONDecodeError as error:
        raise ConfigError("reference", str(path), f"a JSON reference file ({error})") from None
    return _Checker(str(path)).document(document)


# ----------------------------------------------------------------------------
# The jobs a reference must cover
# ----------------------------------------------------------------------------

def job_applies(job) -> str | None:
    """None if ``job``'s agent handles its task, else what the agent needs (as
    ``needbench run`` lists the pair as not applicable).

    The same two rejections as the runner's job (``benchmarks.runner.run_job``):
    building the agent for one copy's spaces, and the agent's check of the task
    (``check_env``, which every ``learn`` calls first). Agents that do not learn
    from experience (the planner, the controller) decide in ``learn`` whether the
    task has what they read (a finite model, a known outcome model), so they
    ``learn`` here too, with no steps.
    """
    from needbench.agents.base import NotApplicableError, env_spaces, learning_env
    from needbench.agents.registry import AGENTS, make_agent

    arguments = job.task_arguments
    agent_class = AGENTS[job.agent_name]
    from needbench.agents.base import make_task_vector_env

    spaces_env = make_task_vector_env(job.task_id, 1, agent_class.autoreset_mode, arguments)
    try:
        agent = make_agent(job.agent_name, *env_spaces(spaces_env), **job.agent_hyperparameters)
    except NotApplicableError as rejection:
        return rejection.allowed
    finally:
        spaces_env.close()
    env = learning_env(agent, job.task_id, arguments)
    try:
        agent.check_env(env)
        if not agent.learns_from_experience:
            agent.learn(env, 0, job.seed, None)
    except NotApplicableError as rejection:
        return rejection.allowed
    finally:
        env.close()
    return None


def applicable_jobs(suite) -> list:
    """The suite's jobs (``spec.expand``, distinct hashes) whose agent handles the task.

    Applicability depends on the task, its keywords, the agent and its
    hyperparameters, not on the seed, so each such pair is probed once.
    """
    from needbench.benchmarks.spec import canonical_json, expand

    verdicts: dict[str, bool] = {}
    jobs = []
    for job in {job.hash: job for job in expand(suite)}.values():
        key = canonical_json([job.task_id, job.task_kwargs, job.agent_name,
                              job.agent_hyperparameters])
        if key not in verdicts:
            verdicts[key] = job_applies(job) is None
        if verdicts[key]:
            jobs.append(job)
    return jobs


# ----------------------------------------------------------------------------
# Normalised scores
# ----------------------------------------------------------------------------

@dataclass(frozen=True)
class Baseline:
    """The 0 and the 1 of one task's normalised score on one metric.

    Attributes:
        floor: the mean, over the random agent's runs (seeds) on the task, of
            each run's mean over its evaluation episodes (metric units).
        ceiling: the same mean for the reference agent.
        ceiling_agent: the reference agent (the better on this metric of the
            planner, where it has runs on the task, and the setpoint controller).
    """

    task_id: str
    metric: str
    floor: float
    ceiling: float
    ceiling_agent: str

    def normalise(self, values: Iterable[float]) -> np.ndarray:
        """(x - floor) / (ceiling - floor) for each run's mean ``x``: 0 = random, 1 = reference.

        The score is higher-is-better for the discounted drive too (the
        reference's drive is lower than random's, so both numerator and
        denominator are negative for a run better than random).
        """
        return (np.asarray(list(values), dtype=np.float64) - self.floor) \
            / (self.ceiling - self.floor)


def baseline(reference: Reference, task_id: str, metric: str) -> Baseline:
    """The task's 0 (random) and 1 (the better of planner and controller) on ``metric``.

    Each is the mean over that agent's runs on the task (one run per seed, no
    sweep point) of the run's mean over its evaluation episodes; runs whose
    metric is not finite are left out.

    Raises:
        ConfigError: the file has no random runs or no reference runs on the
            task, or the two means are equal (a zero denominator).
    """
    if metric not in SCORED_METRICS:
        raise ConfigError("metric", metric, "one of " + ", ".join(SCORED_METRICS))

    def mean_of(agent: str) -> float | None:
        values = [run.metrics[metric] for run in reference.runs_of(task_id, agent)
                  if math.isfinite(run.metrics[metric])]
        return float(np.mean(values)) if values else None

    where = f"{reference.source}: {task_id}"
    floor = mean_of(FLOOR_AGENT)
    if floor is None:
        raise ConfigError(f"{where}.{FLOOR_AGENT}", None, f"runs of {FLOOR_AGENT} with a "
                          f"finite {metric} (the 0 of the normalised score)")
    higher = SCORED_METRICS[metric][1]
    candidates = [(mean, agent) for agent in CEILING_AGENTS
                  if (mean := mean_of(agent)) is not None]
    if not candidates:
        raise ConfigError(f"{where}.reference agent", None, "runs of "
                          + " or ".join(CEILING_AGENTS) + f" with a finite {metric} (the 1 of "
                          "the normalised score)")
    ceiling, agent = (max if higher else min)(candidates, key=lambda pair: pair[0])
    if ceiling == floor:
        raise ConfigError(f"{where}.{metric}", ceiling,
                          f"a mean of {agent} different from {FLOOR_AGENT}'s ({floor!r}): "
                          "with equal means the normalised score divides by zero")
    return Baseline(task_id, metric, floor, ceiling, agent)


def normalised_scores(reference: Reference, metric: str
                      ) -> dict[str, dict[str, np.ndarray]]:
    """{task: {agent label: normalised score of each run, by seed}} of every run in the file."""
    scores: dict[str, dict[str, np.ndarray]] = {}
    for task_id in reference.task_ids():
        base = baseline(reference, task_id, metric)
        for label in reference.labels(task_id):
            values = [run.metrics[metric] for run in reference.runs_of(task_id, label)]
            scores.setdefault(task_id, {})[label] = base.normalise(values)
    return scores


@dataclass(frozen=True)
class Aggregate:
    """The IQM of an agent's normalised scores over tasks and runs, with its interval.

    ``low`` and ``high`` are None when fewer than 3 runs per task were used.
    ``runs`` is the runs used per task (the first by seed, the same number on
    every task), ``tasks`` the tasks the agent ran on, of ``of_tasks``.
    """

    value: float
    low: float | None
    high: float | None
    runs: int
    tasks: int
    of_tasks: int


def score_matrix(by_task: Mapping[str, np.ndarray]) -> np.ndarray:
    """(runs, tasks): the first ``min runs`` finite scores of each task, in task order.

    The stratified bootstrap needs the same number of runs on every task, so a
    task with more runs contributes its first runs (by seed).
    """
    columns = [np.asarray(values, dtype=np.float64) for values in by_task.values()]
    columns = [column[np.isfinite(column)] for column in columns]
    runs = min(column.size for column in columns)
    if runs == 0:
        raise ConfigError("scores", {task: list(values) for task, values in by_task.items()},
                          "at least one finite score on every task")
    return np.stack([column[:runs] for column in columns], axis=1)


def aggregate_score(by_task: Mapping[str, np.ndarray], of_tasks: int | None = None
                    ) -> Aggregate:
    """IQM over the (runs, tasks) score matrix of the tasks an agent ran on, with the
    95 % stratified bootstrap interval of ``benchmarks.stats`` (2000 resamples,
    seeded, so the same scores always give the same interval).

    Tasks where the agent is not applicable are simply absent from ``by_task``:
    the aggregate is over the tasks it runs on, and says how many (``tasks`` of
    ``of_tasks``).
    """
    from needbench.benchmarks.report import CONFIDENCE, MIN_RUNS_FOR_INTERVAL, REPETITIONS, SEED
    from needbench.benchmarks.stats import bootstrap_ci, interquartile_mean

    matrix = score_matrix(by_task)
    runs, tasks = matrix.shape
    of_tasks = tasks if of_tasks is None else of_tasks
    if runs < MIN_RUNS_FOR_INTERVAL:
        return Aggregate(float(interquartile_mean(matrix)), None, None, runs, tasks, of_tasks)
    result = bootstrap_ci(matrix, interquartile_mean, np.random.default_rng(SEED),
                          confidence=CONFIDENCE, repetitions=REPETITIONS)
    return Aggregate(result.value, result.low, result.high, runs, tasks, of_tasks)


def ranking(reference: Reference, metric: str = "discounted_drive"
            ) -> list[tuple[str, Aggregate]]:
    """(agent label, aggregate normalised score) of every agent of the file, best first."""
    scores = normalised_scores(reference, metric)
    labels = sorted({label for by_label in scores.values() for label in by_label})
    tasks = len(scores)
    rows = [(label, aggregate_score({task: by_label[label] for task, by_label in scores.items()
                                     if label in by_label}, tasks)) for label in labels]
    return sorted(rows, key=lambda row: (-row[1].value, row[0]))


# ----------------------------------------------------------------------------
# The README's reference table
# ----------------------------------------------------------------------------

def score_number(value: float | None) -> str:
    """A normalised score (or a difference of two) to 3 significant digits.

    Scores are ratios of order 1, so what lies within 1e-9 of 0 is rounding
    (the random agent's own runs average to 0 up to it) and is shown as 0.
    """
    from needbench.benchmarks.report import number

    return number(0.0 if value is not None and abs(value) < 1e-9 else value)


def _markdown_rows(header: Sequence[str], rows: Sequence[Sequence[str]]) -> list[str]:
    lines = ["| " + " | ".join(header) + " |", "| " + " | ".join("---" for _ in header) + " |"]
    return lines + ["| " + " | ".join(row) + " |" for row in rows]


def _mean_and_iqm(values: Sequence[float], higher: bool) -> str:
    from needbench.benchmarks.report import estimate, number

    finite = [value for value in values if math.isfinite(value)]
    result = estimate(finite, higher)
    if result is None:
        return "n/a"
    interval = "" if result.low is None else f" [{number(result.low)}, {number(result.high)}]"
    return f"{number(float(np.mean(finite)))} / {number(result.value)}{interval}"


def markdown_table(reference: Reference) -> str:
    """The reference as Markdown: one table per task, then the aggregate ranking.

    Task tables: per agent, the mean / IQM [95 % CI] over runs of each run's
    mean discounted drive, time in band, return and survival, and the IQM
    [95 % CI] of its normalised scores on discounted drive and return. The
    ranking: agents by the IQM of their normalised discounted-drive score over
    the tasks they run on, with its stratified bootstrap interval. A task where
    the reference agent does worse than random on a metric is named in a note.
    """
    from needbench.benchmarks.report import number

    def interval(aggregate: Aggregate) -> str:
        if aggregate.low is None:
            return f"{score_number(aggregate.value)} (no CI, {aggregate.runs} runs)"
        return (f"{score_number(aggregate.value)} [{score_number(aggregate.low)}, "
                f"{score_number(aggregate.high)}]")

    drive_scores = normalised_scores(reference, "discounted_drive")
    return_scores = normalised_scores(reference, "return")
    revisions = ", ".join(revision[:12] for revision in reference.git_revisions) or "unknown"
    hours = reference.elapsed_seconds / 3600.0
    shipped = shipped_references().get(reference.suite)
    name = reference.suite if shipped is not None and Path(reference.source).resolve() == \
        shipped.resolve() else reference.source
    lines = [
        f"Suite `{reference.suite}`: {len(reference.runs)} runs, "
        f"{reference.eval_episodes} evaluation episodes each, discount {reference.gamma:g}; "
        f"needbench {', '.join(reference.package_versions)} at revision {revisions}; "
        f"{hours:.2f} h from first start to last finish ({reference.wall_seconds / 3600.0:.2f} "
        f"h of jobs). File made {reference.made[:10]} with `{reference.command}`; this table: "
        f"`needbench reference table {name}`.",
        "",
        "Cells: mean / IQM [95 % CI] over runs (seeds), each run the mean of its evaluation "
        "episodes; 3 significant digits. Discounted drive: lower is better. Normalised "
        "scores: 0 = random, 1 = the task's best non-learning agent on that metric (marked * "
        "on the drive, + on the return), from the means over seeds; higher is better.",
    ]
    for task_id in reference.task_ids():
        drive_base = baseline(reference, task_id, "discounted_drive")
        return_base = baseline(reference, task_id, "return")
        rows = []
        for label in reference.labels(task_id):
            runs = reference.runs_of(task_id, label)
            marks = ("*" if label == drive_base.ceiling_agent else "") \
                + ("+" if label == return_base.ceiling_agent else "")
            cells = [f"{label} {marks}" if marks else label, str(len(runs))]
            cells += [_mean_and_iqm([run.metrics.get(key, math.nan) for run in runs], higher)
                      for key, (_, higher) in TABLE_METRICS.items()]
            for scores in (drive_scores, return_scores):
                result = aggregate_score({task_id: scores[task_id][label]})
                cells.append(interval(result))
            rows.append(cells)
        header = ["agent", "runs", *(title for title, _ in TABLE_METRICS.values()),
                  "score (drive)", "score (return)"]
        lines += ["", f"**{task_id}**", "", *_markdown_rows(header, rows)]
    backwards = []
    for task_id in reference.task_ids():
        for metric, (title, higher) in SCORED_METRICS.items():
            base = baseline(reference, task_id, metric)
            if (base.ceiling > base.floor) != higher:
                backwards.append(f"{task_id} ({title.split(' (')[0]}: {base.ceiling_agent} "
                                 f"{number(base.ceiling)}, random {number(base.floor)})")
    if backwards:
        lines += ["", "On " + "; ".join(backwards) + " the reference agent does worse than "
                  "random, so there a higher score means closer to random."]
    ranked = ranking(reference, "discounted_drive")
    return_rank = dict(ranking(reference, "return"))
    rows = [[str(i), label, f"{aggregate.tasks}/{aggregate.of_tasks}", interval(aggregate),
             interval(return_rank[label])] for i, (label, aggregate) in enumerate(ranked, 1)]
    lines += ["", "**Aggregate ranking** (IQM over the tasks each agent runs on and their "
              "runs, 95 % stratified bootstrap CI; an agent is ranked on the tasks it applies "
              "to)", "", *_markdown_rows(["rank", "agent", "tasks",
                                         "normalised discounted drive", "normalised return"],
                                        rows)]
    return "\n".join(lines) + "\n"
