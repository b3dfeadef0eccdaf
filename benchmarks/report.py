"""A report of a results store: a self-contained HTML page, a Markdown summary, PNG figures.

:func:`build_report` reads a store (``benchmarks.store``), scores every agent
on every task with the interquartile mean and a 95 % stratified bootstrap
interval (``benchmarks.stats``), draws the figures of ``benchmarks.figures``
and writes:

* ``report.html``: one page, every figure embedded as a base64 PNG, no script
  and no link outside the page, so it opens with no network;
* or ``report.md``: the same tables, figures linked as files;
* ``<name>-figures/*.png``: every figure as a PNG file.

The page holds: the run's suites, needbench version and git revision (as
recorded with the runs), the dependency versions, date and machine of the
report; one section per task with its table (rows: metrics; columns: agents
at each sweep point) and its figures (internal-state traces of one episode
per agent, the path on the map for spatial tasks, stability against return,
learning curves, deviation per need); and the drive landscape of the run's
drive. Every name that came from a suite file is escaped.

A cell with fewer than :data:`MIN_RUNS_FOR_INTERVAL` runs shows its IQM with
no interval: a bootstrap over one or two runs says nothing about spread.
"""

from __future__ import annotations

import base64
import html
import json
import math
import platform
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

import numpy as np

from needbench.agents.curves import EPISODE_RETURN, TIME_IN_BAND
from needbench.envs.errors import ConfigError, check_choice

FORMATS = ("html", "md")

#: Bootstrap resamples behind each interval, and the seed that makes a report repeatable.
REPETITIONS = 2000
SEED = 0
CONFIDENCE = 0.95
#: Fewer runs than this: the IQM alone, no interval.
MIN_RUNS_FOR_INTERVAL = 3
#: Said on a figure where some estimate has no interval.
NO_INTERVAL_NOTE = f"no whiskers where fewer than {MIN_RUNS_FOR_INTERVAL} runs"

#: Learning-curve scalar names (the names agents log, needbench.agents.curves); the
#: first one a run logged is used.
CURVE_NAMES: dict[str, tuple[str, ...]] = {
    "return": (EPISODE_RETURN,),
    "time_in_band": (TIME_IN_BAND,),
}
#: Titles (with units) of the learning-curve panels.
CURVE_TITLES = {"return": "episode return (reward units)",
                "time_in_band": "time in band (share of steps)"}
#: Step bins of a learning-curve figure.
CURVE_BINS = 40
CURVE_REPETITIONS = 500


@dataclass(frozen=True)
class Metric:
    """A row of a task table: a key of ``metrics.summarise``, a title with unit, a direction."""

    key: str
    title: str
    higher_is_better: bool


#: The table's rows, in order (a row appears when some run of the task has the metric).
METRICS = (
    Metric("return", "return (reward units)", True),
    Metric("extrinsic_return", "task return (task units, unweighted)", True),
    Metric("discounted_drive", "discounted drive (drive units)", False),
    Metric("normalised_discounted_drive", "normalised discounted drive (drive units)", False),
    Metric("discounted_deviation", "discounted deviation (band units)", False),
    Metric("time_in_band", "time in band (share of steps)", True),
    Metric("survival", "survival (share of episodes)", True),
    Metric("time_alive", "time alive (share of steps)", True),
    Metric("overconsumption", "overconsumption (band units per step)", False),
    Metric("disturbance_deviation", "deviation in disturbances (band units)", False),
)
#: The planner whose return is the optimum of a task, where it applies.
PLANNER = "exact-planner"
#: The reactive baseline of the anticipation ratio.
REACTIVE_BASELINE = "setpoint-controller"


# ----------------------------------------------------------------------------
# Estimates
# ----------------------------------------------------------------------------

@dataclass(frozen=True)
class Estimate:
    """IQM over runs, and its 95 % interval (None with fewer than 3 runs)."""

    value: float
    low: float | None
    high: float | None
    runs: int

    @property
    def bounds(self) -> tuple[float, float, float]:
        """(value, low, high), the interval collapsed onto the value when there is none."""
        low = self.value if self.low is None else self.low
        high = self.value if self.high is None else self.high
        return self.value, low, high


def estimate(values: Sequence[float], higher_is_better: bool = True) -> Estimate | None:
    """IQM of the finite values with its stratified bootstrap interval; None if none is finite."""
    from needbench.benchmarks.stats import bootstrap_ci, interquartile_mean

    finite = np.array([v for v in values if v is not None and math.isfinite(v)], dtype=float)
    if finite.size == 0:
        return None
    if finite.size < MIN_RUNS_FOR_INTERVAL:
        return Estimate(float(interquartile_mean(finite)), None, None, int(finite.size))
    sign = 1.0 if higher_is_better else -1.0
    # The stats functions score higher-is-better; a cost is negated and turned back after.
    result = bootstrap_ci(sign * finite, interquartile_mean, np.random.default_rng(SEED),
                          confidence=CONFIDENCE, repetitions=REPETITIONS)
    low, high = sorted((sign * result.low, sign * result.high))
    return Estimate(sign * result.value, low, high, int(finite.size))


def number(value: float | None) -> str:
    """The one number format of the report: 3 significant digits."""
    if value is None or not math.isfinite(value):
        return "n/a"
    return f"{value:.3g}"


def estimate_text(value: Estimate | None) -> str:
    if value is None:
        return "n/a"
    if value.low is None:
        return f"{number(value.value)} (n={value.runs})"
    return f"{number(value.value)} [{number(value.low)}, {number(value.high)}]"


# ----------------------------------------------------------------------------
# Reading a store
# ----------------------------------------------------------------------------

def sweep_text(sweep: Mapping[str, Any]) -> str:
    return " ".join(f"{key}={json.dumps(value)}" for key, value in sorted(sweep.items()))


@dataclass
class Series:
    """The done runs of one agent at one sweep point on one task."""

    agent: str
    sweep: dict[str, Any]
    runs: list[dict[str, Any]] = field(default_factory=list)

    @property
    def label(self) -> str:
        return f"{self.agent} {sweep_text(self.sweep)}".strip()

    def values(self, key: str) -> list[float]:
        return [float(run[key]) for run in self.runs if key in run]


@dataclass
class TaskResults:
    task_id: str
    kwargs: dict[str, Any]
    series: list[Series]

    @property
    def name(self) -> str:
        return self.task_id.removeprefix("needbench/")


def task_results(store, suite: str | None = None) -> list[TaskResults]:
    """Done runs (mean metrics over episodes) grouped by task, then by agent and sweep point."""
    by_task: dict[str, dict[tuple[str, str], Series]] = {}
    kwargs: dict[str, dict[str, Any]] = {}
    configs = {run["hash"]: run["config"] for run in store.runs(status="done", suite=suite)}
    for row in store.run_summaries():
        if row["hash"] not in configs:
            continue
        key = (row["agent"], row["sweep"])
        series = by_task.setdefault(row["task_id"], {}).setdefault(
            key, Series(row["agent"], json.loads(row["sweep"]) if row["sweep"] else {}))
        series.runs.append(row)
        kwargs.setdefault(row["task_id"], dict(configs[row["hash"]]["task"]["kwargs"]))
    return [TaskResults(task_id, kwargs[task_id],
                        sorted(groups.values(), key=lambda s: (s.agent, s.label)))
            for task_id, groups in sorted(by_task.items())]


def task_table(task: TaskResults) -> tuple[list[str], list[tuple[str, list[str]]]]:
    """(column labels, rows of (metric title, cell texts)) of a task: IQM [95% CI] per cell.

    Rows: every metric of :data:`METRICS` some run has (task return only when
    some run earned any), the deviation of each need, the optimality gap of the
    return against the planner when it ran, and the anticipation ratio against
    the reactive controller when both have disturbance deviations.
    """
    columns = [series.label for series in task.series]
    rows: list[tuple[str, list[str]]] = []
    keys = {key for series in task.series for run in series.runs for key in run}
    for metric in METRICS:
        if metric.key not in keys:
            continue
        if metric.key == "extrinsic_return" and not any(
                abs(v) > 0 for s in task.series for v in s.values(metric.key)
                if math.isfinite(v)):
            continue
        rows.append((metric.title, [estimate_text(estimate(s.values(metric.key),
                                                           metric.higher_is_better))
                                    for s in task.series]))
    for key in sorted(k for k in keys if k.startswith("deviation/")):
        need = key.split("/", 1)[1]
        rows.append((f"deviation of {need} (band units)",
                     [estimate_text(estimate(s.values(key), False)) for s in task.series]))
    optimum = _reference(task, PLANNER, "return", True)
    if optimum is not None:
        from needbench.benchmarks.metrics import optimality_gap

        rows.append((f"optimality gap of the return vs {PLANNER} (reward units, 0 = optimal)",
                     [estimate_text(estimate([optimality_gap(v, optimum)
                                              for v in s.values("return")], False))
                      for s in task.series]))
    baseline = _reference(task, REACTIVE_BASELINE, "disturbance_deviation", False)
    if baseline is not None and baseline > 0:
        rows.append((f"anticipation vs {REACTIVE_BASELINE} (ratio, below 1 = ahead of it)",
                     [estimate_text(estimate([v / baseline for v in
                                              s.values("disturbance_deviation")], False))
                      for s in task.series]))
    return columns, rows


def _reference(task: TaskResults, agent: str, key: str, higher: bool) -> float | None:
    """IQM of ``key`` over the reference agent's runs on the task (its default sweep point)."""
    values = [v for s in task.series if s.agent == agent for v in s.values(key)]
    result = estimate(values, higher)
    return None if result is None else result.value


# ----------------------------------------------------------------------------
# Data for the figures
# ----------------------------------------------------------------------------

def chosen_traces(store, task: TaskResults) -> dict[str, dict[str, np.ndarray]]:
    """One stored evaluation episode per agent: episode 0 of its median-return run."""
    chosen = {}
    for agent in dict.fromkeys(series.agent for series in task.series):
        runs = sorted((run for series in task.series if series.agent == agent
                       for run in series.runs),
                      key=lambda run: (run.get("return", -math.inf), run["seed"], run["hash"]))
        for run in runs[(len(runs) - 1) // 2:] + runs[:(len(runs) - 1) // 2]:
            try:
                chosen[agent] = store.trace(run["hash"], 0)
            except KeyError:
                continue
            break
    return chosen


def curve_points(store, run_hash: str, metric: str) -> tuple[np.ndarray, np.ndarray]:
    """(steps, values) of a learning curve, under the first of its names the run logged."""
    for name in CURVE_NAMES[metric]:
        steps, values = store.learning_curve(run_hash, name)
        if steps.size:
            return steps, values
    return np.zeros(0, dtype=np.int64), np.zeros(0)


def binned_curves(runs: Sequence[tuple[np.ndarray, np.ndarray]], bins: int = CURVE_BINS):
    """IQM over runs with a 95 % interval, on a common grid of step bins.

    Each run's points are averaged within each bin; a bin's IQM is over the
    runs with a point in it, its interval only with 3 or more such runs.
    Returns (bin centres, IQM, low, high), NaN where undefined; None if no run
    has a point.
    """
    from needbench.benchmarks.stats import bootstrap_ci, interquartile_mean

    runs = [(s, v) for s, v in runs if s.size]
    if not runs:
        return None
    top = max(float(s.max()) for s, _ in runs)
    # About three points of every run per bin, so that a bin is rarely empty.
    bins = max(4, min(bins, min(s.size for s, _ in runs) // 3))
    edges = np.linspace(0.0, top, bins + 1) if top > 0 else np.array([0.0, 1.0])
    table = np.full((len(runs), len(edges) - 1), np.nan)
    for row, (steps, values) in enumerate(runs):
        where = np.clip(np.searchsorted(edges, steps, side="right") - 1, 0, len(edges) - 2)
        for column in np.unique(where):
            picked = values[where == column]
            picked = picked[np.isfinite(picked)]
            if picked.size:
                table[row, column] = picked.mean()
    centre = np.full(table.shape[1], np.nan)
    low, high = centre.copy(), centre.copy()
    rng = np.random.default_rng(SEED)
    for column in range(table.shape[1]):
        present = table[:, column][np.isfinite(table[:, column])]
        if present.size == 0:
            continue
        centre[column] = interquartile_mean(present)
        if present.size >= MIN_RUNS_FOR_INTERVAL:
            result = bootstrap_ci(present, interquartile_mean, rng, confidence=CONFIDENCE,
                                  repetitions=CURVE_REPETITIONS)
            low[column], high[column] = result.low, result.high
    return (edges[:-1] + edges[1:]) / 2, centre, low, high


# ----------------------------------------------------------------------------
# The figures of one report
# ----------------------------------------------------------------------------

@dataclass
class FigureFile:
    """A figure of the report: where its PNG is, a caption and the PNG bytes."""

    title: str
    caption: str
    path: Path
    data: bytes


def _safe(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]+", "_", text).strip("_") or "figure"


def _needs_of(task: TaskResults):
    import gymnasium as gym

    from needbench.benchmarks.figures import NeedInfo

    env = gym.make(task.task_id, **task.kwargs)
    try:
        core = env.unwrapped.core
        needs = [NeedInfo(need.name, need.unit, float(need.lethal_low), float(need.lethal_high))
                 for need in core.physiology.needs]
        return needs, core
    finally:
        env.close()


def task_figures(store, task: TaskResults, styles, folder: Path) -> list[FigureFile]:
    """Every figure of one task, written as PNGs in ``folder``."""
    from needbench.benchmarks import figures

    made: list[FigureFile] = []
    stem = _safe(task.name)

    def keep(figure, kind: str, title: str, caption: str) -> None:
        path = folder / f"{stem}-{kind}.png"
        made.append(FigureFile(title, caption, path, figures.save_png(figure, path)))

    needs, _ = _needs_of(task)
    traces = chosen_traces(store, task)
    if traces:
        keep(figures.trace_figure(task.name, traces, needs, styles), "traces",
             "Internal state over one episode",
             "Each need over evaluation episode 0 of each agent's median-return run: "
             "set point dashed, comfort band shaded, lethal bounds dotted; task events "
             "as markers below.")
        paths = {agent: trace["position"] for agent, trace in traces.items()
                 if "position" in trace and np.ndim(trace["position"]) == 2}
        if paths:
            keep(figures.path_figure(task.name, paths, styles), "path", "Path on the map",
                 "The positions of the same episodes; each agent's marker is its start, X its "
                 "end.")
    # Stability against return: task return when the task pays any, else the return.
    extrinsic = any(abs(v) > 0 for s in task.series for v in s.values("extrinsic_return")
                    if math.isfinite(v))
    x_key, x_title = (("extrinsic_return", "task return (task units)") if extrinsic else
                      ("return", "return (reward units)"))
    points = []
    missing = False
    for series in task.series:
        x = estimate(series.values(x_key), True)
        y = estimate(series.values("discounted_deviation"), False)
        if x is not None and y is not None:
            points.append(figures.Point(series.agent, series.label, x.bounds, y.bounds))
            missing |= x.low is None or y.low is None
    if points:
        keep(figures.tradeoff_figure(task.name, points, styles, x_title,
                                     "discounted deviation (band units)",
                                     NO_INTERVAL_NOTE if missing else None), "tradeoff",
             "Stability against return",
             "Each agent and sweep point: IQM over runs with 95 % CI whiskers on both axes "
             "(none with fewer than 3 runs); the dashed line joins the Pareto front.")
    panels = []
    for metric in CURVE_NAMES:
        curves = []
        for series in task.series:
            binned = binned_curves([curve_points(store, run["hash"], metric)
                                    for run in series.runs])
            if binned is not None:
                curves.append(figures.Curve(series.agent, series.label, *binned,
                                            runs=len(series.runs)))
        if curves:
            panels.append((CURVE_TITLES[metric], curves))
    if panels:
        keep(figures.learning_figure(task.name, panels, styles), "learning",
             "Learning curves",
             "Per-episode scalars logged while learning, averaged per step bin per run, "
             "then IQM over runs; agents that do not learn have no curve.")
    names = [need.name for need in needs]
    bars = {}
    missing = False
    for series in task.series:
        values = [estimate(series.values(f"deviation/{name}"), False) for name in names]
        if any(value is not None for value in values):
            bars[series.label] = [None if value is None else value.bounds for value in values]
            missing |= any(value is not None and value.low is None for value in values)
    if bars:
        keep(figures.deviation_figure(task.name, names, bars, styles,
                                      {s.label: s.agent for s in task.series},
                                      NO_INTERVAL_NOTE if missing else None),
             "deviation", "Deviation per need",
             "Mean |h - h*| / band over each episode's steps, IQM over runs with 95 % CI.")
    return made


def drive_landscape(task: TaskResults, folder: Path) -> FigureFile | None:
    """The drive of a task with two or more needs, over its first two needs."""
    from needbench.benchmarks import figures

    needs, core = _needs_of(task)
    if len(needs) < 2:
        return None
    physiology = core.physiology
    drive = core.drive
    description = _drive_description(drive)

    def two_needs(level, set_point):
        # The task's drive over all its needs, the others held at their set points.
        full = np.broadcast_to(np.asarray(physiology.set_point, dtype=float),
                               level.shape[:-1] + (len(needs),)).copy()
        full[..., :2] = level
        point = full.copy()
        point[..., :2] = set_point
        return drive(full, point)

    figure = figures.drive_figure(two_needs, [n.name for n in needs[:2]],
                                  [n.unit for n in needs[:2]], physiology.set_point[:2],
                                  physiology.band[:2], f"{task.name}, {description}")
    path = folder / f"drive-{_safe(task.name)}.png"
    data = figures.save_png(figure, path)
    return FigureFile("The drive landscape", "The task's own drive over its first two needs "
                      "(the others at their set points), and the reward of one fixed outcome "
                      "at several internal states.", path, data)


def _drive_description(drive) -> str:
    params = {k: v for k, v in drive.params().items()
              if k not in ("family", "scale", "weights")}
    return f"{drive.family} drive " + ", ".join(f"{k} = {v:g}" if isinstance(v, (int, float))
                                                 else f"{k} = {v}" for k, v in params.items())


# ----------------------------------------------------------------------------
# Phenomena
# ----------------------------------------------------------------------------

#: The section of the phenomena measured in a report, and its table's columns.
PHENOMENA_TITLE = "Phenomena"
PHENOMENA_COLUMNS = ["task", "measured effect [95 % interval]", "expected", "met"]


def phenomenon_figure(module, store, folder: Path) -> FigureFile | None:
    """A phenomenon's own figure (its module's ``figure(store, axes)``) as a PNG."""
    from needbench.benchmarks import figures

    if not hasattr(module, "figure"):
        return None
    figure, axes = figures.new_figure()
    module.figure(store, axes[0, 0])
    path = folder / f"phenomenon-{_safe(module.NAME)}.png"
    return FigureFile(module.TITLE, f"{module.TITLE} on {module.TASK.removeprefix('needbench/')}"
                      f" (suite {module.SUITE}); the effect and its 95 % interval are in the "
                      "title and in the table above.", path, figures.save_png(figure, path))


def phenomena_rows(measured) -> list[tuple[str, list[str]]]:
    return [(row[0], list(row[1:])) for row in (m.row() for m in measured)]


def phenomena_of(store, folder: Path, suite: str | None = None):
    """The report section of the phenomena whose suites ran in ``store`` (None if none):
    (title, heading, [(columns, one row per phenomenon)], their figures)."""
    from needbench.benchmarks import phenomena

    modules = [module for module in phenomena.in_store(store)
               if suite is None or phenomena.suite_name(module) == suite]
    if not modules:
        return None
    measured = [phenomena.measure(module, store) for module in modules]
    made = [phenomenon_figure(m.module, store, folder) for m in measured if m.effect is not None]
    return (PHENOMENA_TITLE, PHENOMENA_TITLE, [(PHENOMENA_COLUMNS, phenomena_rows(measured))],
            [figure for figure in made if figure is not None])


def phenomena_folders(folder: Path, store_name: str) -> list[Path]:
    """The sub-folders of a ``needbench run phenomena`` folder that hold a results store."""
    return sorted(path.parent for path in folder.glob(f"*/{store_name}"))


def build_phenomena_report(folder: str | Path, out: str | Path, *, format: str = "html",
                           store_name: str = "results.sqlite3") -> Report:
    """The report of a ``needbench run phenomena`` folder: one table line and one figure per
    phenomenon, measured on the store in each sub-folder."""
    from needbench.benchmarks import phenomena
    from needbench.benchmarks.store import Store

    check_choice("format", format, FORMATS)
    folder, out = Path(folder), Path(out)
    figure_folder = out.parent / f"{out.stem}-figures"
    measured, made, facts = [], [], []
    for sub in phenomena_folders(folder, store_name):
        with Store(sub / store_name) as store:
            for module in phenomena.in_store(store):
                measurement = phenomena.measure(module, store)
                measured.append(measurement)
                runs = store.runs()
                done = sum(run["status"] == "done" for run in runs)
                facts.append((f"{module.NAME} ({sub.name}/)",
                              f"{done} runs done, {len(runs) - done} failed; revision "
                              + ", ".join(sorted({run["git_revision"] or "unknown"
                                                  for run in runs}))))
                if measurement.effect is not None:
                    figure = phenomenon_figure(module, store, figure_folder)
                    if figure is not None:
                        made.append(figure)
    if not measured:
        raise ConfigError("results", str(folder), "a folder of `needbench run phenomena` "
                          f"(sub-folders holding {store_name} with runs of a phenomena suite)")
    facts += [("report made", datetime.now(tz=UTC).isoformat(timespec="seconds")),
              ("packages of the report", ", ".join(f"{k} {v}" for k, v in _versions().items())),
              ("effects met", f"{sum(m.met for m in measured)} of {len(measured)}")]
    facts.insert(0, ("suite", "phenomena"))
    sections = [(PHENOMENA_TITLE, PHENOMENA_TITLE,
                 [(PHENOMENA_COLUMNS, phenomena_rows(measured))], made)]
    if format == "html":
        text = _html(facts, sections, None, [])
    else:
        text = _markdown(facts, sections, None, [], out.parent)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(text, encoding="utf-8")
    return Report(out, made, ["Run", PHENOMENA_TITLE])


# ----------------------------------------------------------------------------
# The page
# ----------------------------------------------------------------------------

def _versions() -> dict[str, str]:
    found = {}
    for package in ("needbench", "numpy", "gymnasium", "matplotlib", "scipy", "torch",
                    "stable-baselines3", "ray"):
        try:
            found[package] = version(package)
        except PackageNotFoundError:
            continue
    return found


def run_facts(store, suite: str | None) -> list[tuple[str, str]]:
    """(label, value) pairs of the report's header."""
    runs = store.runs(suite=suite)
    done = [run for run in runs if run["status"] == "done"]
    suites = sorted({run["suite"] for run in runs})
    revisions = sorted({run["git_revision"] or "unknown" for run in runs})
    ran_with = sorted({run["package_version"] for run in runs})
    finished = sorted(run["finished"] for run in runs)
    facts = [
        ("suite", ", ".join(suites) or "none"),
        ("runs", f"{len(done)} done, {len(runs) - len(done)} failed"),
        ("needbench that ran the jobs", ", ".join(ran_with) or "unknown"),
        ("git revision of the runs", ", ".join(revisions) or "unknown"),
        ("runs finished", f"{finished[0]} to {finished[-1]}" if finished else "none"),
        ("report made", datetime.now(tz=UTC).isoformat(timespec="seconds")),
        ("machine of the report", f"{platform.node()}: {platform.platform()}, "
                                  f"Python {platform.python_version()}"),
        ("packages of the report", ", ".join(f"{k} {v}" for k, v in _versions().items())),
    ]
    return facts


INTERVAL_NOTE = (f"Cells: IQM over runs (each run the mean of its evaluation episodes) and "
                 f"its 95 % stratified bootstrap interval [low, high]; with fewer than "
                 f"{MIN_RUNS_FOR_INTERVAL} runs a cell shows the IQM and (n=runs) only, "
                 "since a bootstrap over one or two runs says nothing about spread.")

_STYLE = """
body { font-family: system-ui, sans-serif; margin: 2em auto; max-width: 1100px;
       color: #1d1d1d; line-height: 1.45; padding: 0 1em; }
h1 { border-bottom: 3px solid #1b5e9f; padding-bottom: .3em; }
h2 { margin-top: 2.2em; border-bottom: 1px solid #ccc; }
table { border-collapse: collapse; margin: 1em 0; font-size: .88em; }
th, td { border: 1px solid #d0d0d0; padding: .3em .6em; text-align: right; }
th:first-child, td:first-child { text-align: left; }
thead th { background: #eef3f8; }
table.facts td { text-align: left; }
figure { margin: 1.5em 0; }
figure img { max-width: 100%; border: 1px solid #e0e0e0; }
figcaption { font-size: .88em; color: #444; }
.note { font-size: .88em; color: #444; }
.swatch { display: inline-block; width: .9em; height: .9em; margin-right: .3em;
          vertical-align: middle; border: 1px solid #333; }
"""


@dataclass
class Report:
    """A built report: the files written and the sections of the page."""

    path: Path
    figures: list[FigureFile]
    sections: list[str]


def build_report(store, out: str | Path, *, format: str = "html",
                 suite: str | None = None, allow_import: bool = False) -> Report:
    """Write the report of ``store`` to ``out`` (HTML or Markdown) and its figures beside it.

    Args:
        store: an open ``benchmarks.store.Store``.
        out: the page's file; figures go to ``<out stem>-figures/`` beside it.
        format: 'html' or 'md'.
        suite: only the runs of this suite (default: every run in the store).
        allow_import: make tasks named ``module:EnvId`` (their figures need
            the task, and making it imports the module and runs its code);
            without it such a store is a ConfigError saying so.
    """
    from needbench.agents.imports import is_import_form, require_import_allowed
    from needbench.benchmarks.figures import PALETTE, agent_colours

    check_choice("format", format, FORMATS)
    out = Path(out)
    folder = out.parent / f"{out.stem}-figures"
    tasks = task_results(store, suite)
    if not tasks:
        raise ConfigError("results", str(out), "a store with at least one run done")
    for task in tasks:
        if is_import_form(task.task_id):
            require_import_allowed("task", task.task_id, "task id", allow_import,
                                   context=str(store.path))
    agents = sorted({series.agent for task in tasks for series in task.series})
    styles = agent_colours(agents)
    facts = run_facts(store, suite)
    sections: list[tuple[str, str, list[tuple[list[str], list[tuple[str, list[str]]]]],
                         list[FigureFile]]] = []
    for task in tasks:
        table = task_table(task)
        sections.append((task.name, task.task_id, [table],
                         task_figures(store, task, styles, folder)))
    phenomena_section = phenomena_of(store, folder, suite)
    if phenomena_section is not None:
        sections.append(phenomena_section)
    landscape = next((figure for figure in (drive_landscape(task, folder) for task in tasks)
                      if figure is not None), None)
    all_figures = [figure for section in sections for figure in section[3]]
    if landscape is not None:
        all_figures.append(landscape)
    legend = [(agent, styles[agent].colour,
               next(name for name, colour in PALETTE if colour == styles[agent].colour))
              for agent in agents]
    if format == "html":
        text = _html(facts, sections, landscape, legend)
    else:
        text = _markdown(facts, sections, landscape, legend, out.parent)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(text, encoding="utf-8")
    titles = ["Run"] + [section[0] for section in sections] + (
        ["The drive landscape"] if landscape is not None else [])
    return Report(out, all_figures, titles)


def _first_column(columns: Sequence[str]) -> str:
    return "phenomenon" if list(columns) == PHENOMENA_COLUMNS else "metric"


def _html_table(columns: Sequence[str], rows: Sequence[tuple[str, Sequence[str]]],
                css: str = "") -> str:
    e = html.escape
    head = "".join(f"<th>{e(c)}</th>" for c in [_first_column(columns), *columns])
    body = "".join("<tr><td>" + e(title) + "</td>" + "".join(f"<td>{e(v)}</td>" for v in cells)
                   + "</tr>" for title, cells in rows)
    return f'<table{css}><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>'


def _html_figure(figure: FigureFile) -> str:
    e = html.escape
    data = base64.b64encode(figure.data).decode("ascii")
    return (f'<figure><img src="data:image/png;base64,{data}" alt="{e(figure.title)}">'
            f"<figcaption><b>{e(figure.title)}.</b> {e(figure.caption)} "
            f"(file: {e(figure.path.name)})</figcaption></figure>")


def _html(facts, sections, landscape, legend) -> str:
    e = html.escape
    suite = dict(facts)["suite"]
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             f"<title>needbench report: {e(suite)}</title>",
             f"<style>{_STYLE}</style></head><body>",
             f"<h1>needbench report: {e(suite)}</h1>",
             '<section id="run"><h2>Run</h2><table class="facts"><tbody>']
    parts += [f"<tr><td>{e(k)}</td><td>{e(v)}</td></tr>" for k, v in facts]
    parts.append("</tbody></table>")
    if legend:
        parts.append("<p>Agents and their colours, the same in every figure: " + ", ".join(
            f'<span class="swatch" style="background:{colour}"></span>{e(agent)} ({e(name)})'
            for agent, colour, name in legend) + ".</p>")
    parts.append(f'<p class="note">{e(INTERVAL_NOTE)}</p>')
    parts.append("<nav><b>Tasks:</b> " + " · ".join(
        f'<a href="#task-{_safe(name)}">{e(name)}</a>' for name, *_ in sections)
        + (' · <a href="#drive">drive landscape</a>' if landscape else "") + "</nav></section>")
    for name, task_id, tables, figures in sections:
        parts.append(f'<section id="task-{_safe(name)}"><h2>{e(task_id)}</h2>')
        for columns, rows in tables:
            parts.append(_html_table(columns, rows))
        parts += [_html_figure(figure) for figure in figures]
        parts.append("</section>")
    if landscape is not None:
        parts.append('<section id="drive"><h2>The drive landscape</h2>'
                     + _html_figure(landscape) + "</section>")
    parts.append("</body></html>")
    return "\n".join(parts)


def _md_escape(text: str) -> str:
    return html.escape(text).replace("|", "\\|")


def _markdown(facts, sections, landscape, legend, base: Path) -> str:
    lines = [f"# needbench report: {_md_escape(dict(facts)['suite'])}", "", "## Run", "",
             "| | |", "| --- | --- |"]
    lines += [f"| {_md_escape(k)} | {_md_escape(v)} |" for k, v in facts]
    lines.append("")
    if legend:
        lines += ["Agents and their colours: " + ", ".join(
            f"{_md_escape(agent)} ({name}, {colour})" for agent, colour, name in legend) + ".",
            ""]
    lines += [INTERVAL_NOTE, ""]

    def image(figure: FigureFile) -> list[str]:
        relative = figure.path.relative_to(base).as_posix()
        return [f"![{_md_escape(figure.title)}]({relative})", "",
                f"*{_md_escape(figure.title)}.* {_md_escape(figure.caption)}", ""]

    for _name, task_id, tables, figures in sections:
        lines += [f"## {_md_escape(task_id)}", ""]
        for columns, rows in tables:
            lines.append(f"| {_first_column(columns)} | "
                         + " | ".join(_md_escape(c) for c in columns) + " |")
            lines.append("| --- |" + " ---: |" * len(columns))
            lines += ["| " + _md_escape(title) + " | " + " | ".join(_md_escape(v) for v in cells)
                      + " |" for title, cells in rows]
            lines.append("")
        for figure in figures:
            lines += image(figure)
    if landscape is not None:
        lines += ["## The drive landscape", "", *image(landscape)]
    return "\n".join(lines)
