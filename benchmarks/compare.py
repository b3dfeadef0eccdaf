"""Compare two agents of a results store: probability of improvement and IQM difference.

For each task (and sweep point) both agents ran, and over all of them
together, :func:`compare` reports, after Agarwal et al. (2021):

* P(X > Y), the probability that a run of agent X beats a run of agent Y on
  the metric (``stats.probability_of_improvement_ci``), 0.5 meaning neither;
* IQM(X) - IQM(Y), in the metric's unit, with a percentile bootstrap interval
  whose resamples draw the runs of X and of Y independently, stratified by task.

Lower-is-better metrics (the discounted drive, deviations) are negated for
the probability, so P(X > Y) is always the chance that X does *better*; the
IQM difference stays in the metric's own sign and unit.
"""

from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from needbench.benchmarks.report import (
    CONFIDENCE,
    MIN_RUNS_FOR_INTERVAL,
    NO_INTERVAL_NOTE,
    REPETITIONS,
    SEED,
    task_results,
)
from needbench.envs.errors import ConfigError

#: Metrics a comparison can use: key of a run summary -> (title with unit, higher is better).
COMPARABLE = {
    "return": ("return (reward units)", True),
    "extrinsic_return": ("task return (task units)", True),
    "discounted_drive": ("discounted drive (drive units)", False),
    "normalised_discounted_drive": ("normalised discounted drive (drive units)", False),
    "discounted_deviation": ("discounted deviation (band units)", False),
    "time_in_band": ("time in band (share of steps)", True),
    "survival": ("survival (share of episodes)", True),
    "overconsumption": ("overconsumption (band units per step)", False),
}


@dataclass(frozen=True)
class Row:
    """One line of a comparison: a task (or 'all tasks') and the two estimates.

    Each estimate is (value, low, high); low and high are None when either
    agent has fewer than 3 runs there (no interval is shown then).
    """

    task: str
    runs_x: int
    runs_y: int
    probability: tuple[float, float | None, float | None]
    difference: tuple[float, float | None, float | None]

    @staticmethod
    def make(task: str, runs_x: int, runs_y: int, probability, difference) -> Row:
        if min(runs_x, runs_y) < MIN_RUNS_FOR_INTERVAL:
            probability, difference = (probability[0], None, None), (difference[0], None, None)
        return Row(task, runs_x, runs_y, tuple(probability), tuple(difference))

    @staticmethod
    def bounds(value: tuple[float, float | None, float | None]) -> tuple[float, float, float]:
        """(value, low, high) with a missing interval collapsed onto the value."""
        return (value[0], value[0] if value[1] is None else value[1],
                value[0] if value[2] is None else value[2])


@dataclass(frozen=True)
class Comparison:
    agents: tuple[str, str]
    metric: str
    title: str
    higher_is_better: bool
    rows: list[Row]
    note: str

    def to_json(self) -> str:
        record: dict[str, Any] = {
            "agents": list(self.agents), "metric": self.metric, "metric_title": self.title,
            "higher_is_better": self.higher_is_better, "confidence": CONFIDENCE,
            "note": self.note, "rows": []}
        for row in self.rows:
            entry = asdict(row)
            entry["probability"] = dict(zip(("value", "low", "high"), row.probability, strict=True))
            entry["difference"] = dict(zip(("value", "low", "high"), row.difference, strict=True))
            record["rows"].append(entry)
        return json.dumps(record, indent=2)


def _difference(x: np.ndarray, y: np.ndarray, rng: np.random.Generator
                ) -> tuple[float, float, float]:
    from needbench.benchmarks.stats import (
        bootstrap_distribution,
        interquartile_mean,
        percentile_interval,
    )

    value = float(interquartile_mean(x)) - float(interquartile_mean(y))
    spread = (bootstrap_distribution(x, interquartile_mean, rng, REPETITIONS)
              - bootstrap_distribution(y, interquartile_mean, rng, REPETITIONS))
    low, high = percentile_interval(spread, CONFIDENCE)
    return value, low, high


def _scores(series, metric: str) -> np.ndarray:
    runs = sorted(series.runs, key=lambda run: (run["seed"], run["hash"]))
    return np.array([float(run[metric]) for run in runs
                     if metric in run and math.isfinite(float(run[metric]))])


def protocols(store) -> dict[str, set[str]]:
    """{task id: the evaluation protocols of its done runs}, each protocol the task's
    keywords, the evaluation episodes and the scoring discount as canonical JSON."""
    found: dict[str, set[str]] = {}
    for run in store.runs(status="done"):
        config = run["config"]
        protocol = json.dumps({"task": config["task"], "eval_episodes": config["eval_episodes"],
                               "gamma": config["gamma"]}, sort_keys=True)
        found.setdefault(config["task"]["id"], set()).add(protocol)
    return found


def compare(store, first: str, second: str, metric: str = "return",
            reference=None) -> Comparison:
    """P(first > second) and IQM(first) - IQM(second) per task and over all shared tasks.

    With ``reference`` (another results store), ``second``'s runs come from it;
    a task is compared only when both stores evaluated it under the same
    protocol (task keywords, evaluation episodes, scoring discount), and a task
    evaluated under different protocols is refused with a ConfigError.
    """
    from needbench.benchmarks.stats import probability_of_improvement_ci

    if metric not in COMPARABLE:
        raise ConfigError("metric", metric, "one of " + ", ".join(COMPARABLE))
    if first == second:
        raise ConfigError("agents", [first, second], "two different agent names")
    title, higher = COMPARABLE[metric]
    sign = 1.0 if higher else -1.0
    pairs = []
    tasks = task_results(store)
    others = {task.task_id: task for task in task_results(reference)} if reference else {}
    if reference is not None:
        ours, theirs = protocols(store), protocols(reference)
        for task_id in sorted(set(ours) & set(theirs)):
            if ours[task_id] != theirs[task_id]:
                raise ConfigError(f"reference.{task_id}", sorted(theirs[task_id]),
                                  "the protocol of this run's evaluations: "
                                  + "; ".join(sorted(ours[task_id])))
    for task in tasks:
        by_label = {}
        second_series = others[task.task_id].series if reference else task.series
        if reference is not None and task.task_id not in others:
            continue
        for series in task.series:
            if series.agent == first:
                by_label.setdefault(series.label.removeprefix(series.agent).strip(),
                                    {})[first] = series
        for series in second_series:
            if series.agent == second:
                by_label.setdefault(series.label.removeprefix(series.agent).strip(),
                                    {})[second] = series
        for sweep, both in sorted(by_label.items()):
            if len(both) < 2:
                continue
            x, y = _scores(both[first], metric), _scores(both[second], metric)
            if x.size and y.size:
                pairs.append((f"{task.name} {sweep}".strip(), x, y))
    agents_seen = {s.agent for task in tasks for s in task.series}
    reference_seen = {s.agent for task in others.values() for s in task.series}
    for name, seen, where in ((first, agents_seen, "this store"),
                              (second, reference_seen if reference else agents_seen,
                               "the reference" if reference else "this store")):
        if name not in seen:
            raise ConfigError("agents", name, f"an agent with runs in {where}: "
                              + ", ".join(sorted(seen)))
    if not pairs:
        raise ConfigError("agents", [first, second],
                          f"two agents that both have runs with {metric!r} on some task")
    rng = np.random.default_rng(SEED)
    rows = []
    for label, x, y in pairs:
        p = probability_of_improvement_ci(sign * x, sign * y, rng, confidence=CONFIDENCE,
                                          repetitions=REPETITIONS)
        rows.append(Row.make(label, int(x.size), int(y.size), (p.value, p.low, p.high),
                             _difference(x, y, rng)))
    # The aggregate needs the same number of runs on every task: the first runs by seed.
    n = min(x.size for _, x, _ in pairs)
    m = min(y.size for _, _, y in pairs)
    x_all = np.stack([x[:n] for _, x, _ in pairs], axis=1)
    y_all = np.stack([y[:m] for _, _, y in pairs], axis=1)
    p = probability_of_improvement_ci(sign * x_all, sign * y_all, rng, confidence=CONFIDENCE,
                                      repetitions=REPETITIONS)
    rows.insert(0, Row.make(f"all {len(pairs)} tasks", n, m, (p.value, p.low, p.high),
                            _difference(x_all, y_all, rng)))
    trimmed = any(x.size != n for _, x, _ in pairs) or any(y.size != m for _, _, y in pairs)
    note = (f"P({first} > {second}): the chance that a run of {first} does better than a run "
            f"of {second} on {metric} ({'higher' if higher else 'lower'} is better); 0.5 means "
            f"neither. Difference: IQM({first}) - IQM({second}) in {title}. 95 % stratified "
            "bootstrap intervals (Agarwal et al. 2021), shown only where both agents have "
            f"{MIN_RUNS_FOR_INTERVAL} or more runs.")
    if trimmed:
        note += (f" The aggregate uses the first {n} and {m} runs (by seed) of each task, "
                 "so that every task counts the same number of runs.")
    return Comparison((first, second), metric, title, higher, rows, note)


def format_comparison(comparison: Comparison) -> str:
    from needbench.benchmarks.report import number

    first, second = comparison.agents
    header = ["task", "runs", f"P({first} > {second}) [95% CI]",
              f"IQM difference [95% CI], {comparison.title}"]
    lines = [header]
    def cell(value) -> str:
        if value[1] is None:
            return f"{number(value[0])} (no CI)"
        return f"{number(value[0])} [{number(value[1])}, {number(value[2])}]"

    for row in comparison.rows:
        lines.append([row.task, f"{row.runs_x} vs {row.runs_y}", cell(row.probability),
                      cell(row.difference)])
    widths = [max(len(line[i]) for line in lines) for i in range(len(header))]
    text = ["  ".join(cell.ljust(width) for cell, width in zip(line, widths, strict=True))
            .rstrip() for line in lines]
    text.insert(1, "  ".join("-" * width for width in widths))
    return "\n".join(text + ["", comparison.note])


def comparison_figure(comparison: Comparison, agents: list[str] | None = None):
    """The comparison as a figure; ``agents`` (all agents of the store, sorted) keeps each
    agent's colour the same as in the report."""
    from needbench.benchmarks.figures import agent_colours
    from needbench.benchmarks.figures import comparison_figure as draw

    styles = agent_colours(agents or sorted(comparison.agents))
    return draw(f"{comparison.agents[0]} against {comparison.agents[1]} on "
                f"{comparison.metric}: IQM and 95 % CI",
                [(row.task, Row.bounds(row.probability), Row.bounds(row.difference))
                 for row in comparison.rows],
                comparison.title, comparison.agents, styles,
                NO_INTERVAL_NOTE if any(row.probability[1] is None for row in comparison.rows)
                else None)


# ----------------------------------------------------------------------------
# A store's runs beside a shipped reference file
# ----------------------------------------------------------------------------

@dataclass(frozen=True)
class Standing:
    """One agent (with its sweep point) on one task: a user's runs or the reference's.

    ``metrics[key]`` and ``scores[key]`` are (mean, IQM, low, high) over runs of
    each run's mean over its evaluation episodes (raw metric) or of its
    normalised score; low and high are None under 3 runs; the entry is None when
    no run has a finite value.
    """

    task_id: str
    label: str
    source: str
    runs: int
    seeds: tuple[int, ...]
    metrics: dict[str, tuple[float, float, float | None, float | None] | None]
    scores: dict[str, tuple[float, float, float | None, float | None] | None]


@dataclass(frozen=True)
class Pairing:
    """A user's agent against a shipped one on one normalised score, over the tasks both ran.

    ``probability`` is P(yours > shipped) and ``difference`` IQM(yours) - IQM(shipped)
    of the normalised scores, each (value, low, high) with 95 % intervals (None
    under 3 runs per task).
    """

    yours: str
    shipped: str
    metric: str
    tasks: int
    runs_yours: int
    runs_shipped: int
    probability: tuple[float, float | None, float | None]
    difference: tuple[float, float | None, float | None]


@dataclass(frozen=True)
class ReferenceComparison:
    """What ``needbench compare DIR --reference core`` prints (:func:`compare_with_reference`)."""

    reference: str
    source: str
    made: str
    package_versions: tuple[str, ...]
    metrics: tuple[str, ...]
    tasks: tuple[str, ...]
    left_out: dict[str, str]
    standings: tuple[Standing, ...]
    aggregates: dict[str, dict[str, dict[str, Any]]]
    pairings: tuple[Pairing, ...]
    baselines: dict[str, dict[str, dict[str, Any]]]
    notes: tuple[str, ...]

    def to_json(self) -> str:
        record = asdict(self)
        return json.dumps(record, indent=2, allow_nan=False, default=float)


def _summary_estimate(values: list[float], higher: bool
                      ) -> tuple[float, float, float | None, float | None] | None:
    from needbench.benchmarks.report import estimate

    finite = [value for value in values if math.isfinite(value)]
    result = estimate(finite, higher)
    if result is None:
        return None
    return float(np.mean(finite)), result.value, result.low, result.high


def _protocol_errors(run: dict[str, Any], reference) -> list[tuple[str, Any, Any]]:
    """(field, this run's value, the reference's) for each protocol field that differs."""
    config = run["config"]
    task_id = config["task"]["id"]
    differences = []
    expected = reference.task_kwargs[task_id]
    if config["task"]["kwargs"] != expected:
        differences.append(("task.kwargs", config["task"]["kwargs"], expected))
    if config["eval_episodes"] != reference.eval_episodes:
        differences.append(("eval_episodes", config["eval_episodes"], reference.eval_episodes))
    if config["gamma"] != reference.gamma:
        differences.append(("gamma", config["gamma"], reference.gamma))
    if run["seed"] not in reference.seeds(task_id):
        differences.append(("seed", run["seed"], sorted(reference.seeds(task_id))))
    return differences


def check_protocol(store, reference) -> tuple[list[str], dict[str, str]]:
    """(tasks compared, {task left out: why}) for a store's done runs against a reference.

    A task the reference holds is compared only if every done run of it in the
    store was evaluated as the reference's runs were: the same task keywords
    (as the suite wrote them), evaluation episodes and scoring discount, and a
    seed the reference has. Episode e of a job with seed s resets with
    ``evaluate.evaluation_seeds(s, eval_episodes)[e]``, so the same seed and
    number of episodes means the very same evaluation episodes. Tasks the
    reference does not hold are left out (and said so).

    Raises:
        ConfigError: naming the task, the field, this run's value and the
            reference's, for the first run that differs.
    """
    runs = store.runs(status="done")
    if not runs:
        raise ConfigError("results", str(store.path), "a store with done runs to compare")
    left_out: dict[str, str] = {}
    compared: list[str] = []
    for run in runs:
        task_id = run["task_id"]
        if task_id not in reference.task_kwargs:
            left_out[task_id] = f"not in the reference {reference.suite!r}"
            continue
        differences = _protocol_errors(run, reference)
        if differences:
            name, yours, theirs = differences[0]
            what = ("a seed the reference has, " if name == "seed" else "the reference's ")
            raise ConfigError(
                f"{task_id} {run['agent']} seed={run['seed']}: {name}", yours,
                f"{what}{theirs!r} ({reference.source}); with another protocol the runs are "
                "not comparable: rerun with the reference's [suite] eval_episodes, gamma, "
                "seeds and task keywords", context=str(store.path))
        if task_id not in compared:
            compared.append(task_id)
    order = {task_id: i for i, task_id in enumerate(reference.task_ids())}
    compared.sort(key=order.__getitem__)
    if not compared:
        raise ConfigError("results", str(store.path), "runs on a task of the reference "
                          f"{reference.suite!r}: " + ", ".join(reference.task_ids()))
    return compared, left_out


def compare_with_reference(store, reference, metric: str | None = None,
                           agents: tuple[str, str] | None = None) -> ReferenceComparison:
    """A store's runs beside a reference file's, on the tasks both hold.

    Per task and agent (yours and the reference's): mean and IQM with 95 %
    interval of the discounted drive, time in band, return and survival, and
    of the normalised scores (``reference.baseline``: 0 = the reference's
    random agent, 1 = its planner or controller, from the reference's runs
    only). Per agent: the IQM of its normalised scores over the compared tasks
    it ran on (``reference.aggregate_score``). For each of your agents against
    each shipped one: P(yours > shipped) and the IQM difference of the
    normalised scores over the tasks both ran (higher is better for both
    scores). ``metric`` limits the scores to one of ``reference.SCORED_METRICS``
    (default both); ``agents`` (yours, shipped) limits the pairings to one pair.

    Raises:
        ConfigError: a protocol that differs (:func:`check_protocol`), an
            unknown metric or agent.
    """
    from needbench.benchmarks.reference import (
        SCORED_METRICS,
        TABLE_METRICS,
        aggregate_score,
        baseline,
        score_matrix,
        series_label,
    )
    from needbench.benchmarks.stats import probability_of_improvement_ci

    if metric is not None and metric not in SCORED_METRICS:
        raise ConfigError("--metric", metric, "one of " + ", ".join(SCORED_METRICS)
                          + ": the metrics with a normalised score (with a reference file)")
    metrics = (metric,) if metric is not None else tuple(SCORED_METRICS)
    tasks, left_out = check_protocol(store, reference)
    bases = {task: {key: baseline(reference, task, key) for key in metrics} for task in tasks}
    summaries = {row["hash"]: row for row in store.run_summaries()}
    yours: dict[tuple[str, str], list[dict[str, Any]]] = {}
    for run in store.runs(status="done"):
        if run["task_id"] in tasks:
            yours.setdefault((run["task_id"], series_label(run["agent"], run["sweep"])),
                             []).append({"seed": run["seed"], "hash": run["hash"],
                                         **summaries[run["hash"]]})
    groups: list[tuple[str, str, str, list[int], list[dict[str, float]]]] = []
    for (task, label), runs in yours.items():
        runs.sort(key=lambda row: (row["seed"], row["hash"]))
        groups.append((task, label, "yours", [row["seed"] for row in runs],
                       [{key: float(row.get(key, math.nan)) for key in
                         {*TABLE_METRICS, *metrics}} for row in runs]))
    for task in tasks:
        for label in reference.labels(task):
            runs = reference.runs_of(task, label)
            groups.append((task, label, reference.suite, [run.seed for run in runs],
                           [run.metrics for run in runs]))
    mine = sorted({label for task, label, source, _, _ in groups if source == "yours"})
    shipped = sorted({label for task, label, source, _, _ in groups if source != "yours"})
    if agents is not None:
        if agents[0] not in mine:
            raise ConfigError("--agents", agents[0], "an agent of your runs: " + ", ".join(mine))
        if agents[1] not in shipped:
            raise ConfigError("--agents", agents[1], f"an agent of the reference "
                              f"{reference.suite!r}: " + ", ".join(shipped))
    standings = []
    scores: dict[tuple[str, str], dict[str, np.ndarray]] = {}
    order = {task: i for i, task in enumerate(tasks)}
    for task, label, source, seeds, rows in sorted(
            groups, key=lambda g: (order[g[0]], g[2] != "yours", g[1])):
        table = {key: _summary_estimate([row.get(key, math.nan) for row in rows], higher)
                 for key, (_, higher) in TABLE_METRICS.items()}
        normalised = {}
        for key in metrics:
            values = bases[task][key].normalise(row.get(key, math.nan) for row in rows)
            normalised[key] = _summary_estimate(list(values), True)
            scores.setdefault((source, label), {}).setdefault(key, {})[task] = values
        standings.append(Standing(task, label, source, len(rows), tuple(seeds), table,
                                  normalised))
    aggregates: dict[str, dict[str, dict[str, Any]]] = {}
    for (source, label), by_metric in sorted(scores.items(),
                                             key=lambda item: (item[0][0] != "yours", item[0])):
        name = label if source == "yours" else f"{label} ({source})"
        aggregates[name] = {key: asdict(aggregate_score(by_task, len(tasks)))
                            for key, by_task in by_metric.items()}
    pairings = []
    for ours in ([agents[0]] if agents else mine):
        for theirs in ([agents[1]] if agents else shipped):
            for key in metrics:
                x_by = scores[("yours", ours)][key]
                y_by = scores[(reference.suite, theirs)][key]
                common = [task for task in tasks if task in x_by and task in y_by]
                if not common:
                    continue
                x = score_matrix({task: x_by[task] for task in common})
                y = score_matrix({task: y_by[task] for task in common})
                rng = np.random.default_rng(SEED)
                p = probability_of_improvement_ci(x, y, rng, confidence=CONFIDENCE,
                                                  repetitions=REPETITIONS)
                row = Row.make("", x.shape[0], y.shape[0], (p.value, p.low, p.high),
                               _difference(x, y, rng))
                pairings.append(Pairing(ours, theirs, key, len(common), x.shape[0], y.shape[0],
                                        row.probability, row.difference))
    notes = [
        "Normalised score per task: (x - random) / (reference - random), x a run's mean over "
        "its evaluation episodes, random and reference the means over seeds of the "
        "reference's random runs and of the better on that metric of its planner and "
        "controller runs; 0 = random, 1 = that reference agent, higher is better for both "
        "scores.",
        "Aggregates: IQM over the tasks an agent ran on (tasks k/K) and their runs, with a "
        "95 % stratified bootstrap interval (Agarwal et al. 2021); tasks where an agent is "
        "not applicable are left out of its aggregate.",
        "P(yours > shipped): the chance that a run of yours scores higher than a shipped run "
        "on a task both ran; difference: IQM(yours) - IQM(shipped) of the normalised scores.",
    ]
    from needbench.benchmarks.cli import package_version

    if package_version() not in reference.package_versions:
        made_with = ", ".join(reference.package_versions)
        notes.append(f"The reference was made with needbench {made_with}; this is "
                     f"{package_version()} (a change that alters a task's results bumps its "
                     "id's version, so the same task id should score alike).")
    if left_out:
        notes.append("Left out: " + "; ".join(f"{task} ({why})" for task, why in
                                              sorted(left_out.items())) + ".")
    baselines = {task: {key: asdict(base) for key, base in by_metric.items()}
                 for task, by_metric in bases.items()}
    return ReferenceComparison(reference.suite, reference.source, reference.made,
                               reference.package_versions, metrics, tuple(tasks), left_out,
                               tuple(standings), aggregates, tuple(pairings), baselines,
                               tuple(notes))


def _aligned(rows: list[list[str]]) -> list[str]:
    widths = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    lines = ["  ".join(cell.ljust(width) for cell, width in zip(row, widths, strict=True))
             .rstrip() for row in rows]
    lines.insert(1, "  ".join("-" * width for width in widths))
    return lines


def _interval_text(value, number=None) -> str:
    """'IQM [low, high]' of (mean, IQM, low, high) or (value, low, high); 'n/a' for None."""
    if number is None:
        from needbench.benchmarks.report import number
    if value is None:
        return "n/a"
    point, low, high = value[-3:]
    if low is None:
        return f"{number(point)} (no CI)"
    return f"{number(point)} [{number(low)}, {number(high)}]"


def format_reference_comparison(comparison: ReferenceComparison) -> str:
    """The comparison as text: one table per task, the aggregates, the pairings, notes."""
    from needbench.benchmarks.reference import SCORED_METRICS, TABLE_METRICS, score_number

    score_titles = [f"score ({SCORED_METRICS[key][0].split(' (')[0]})"
                    for key in comparison.metrics]
    text = [f"Your runs beside the reference {comparison.reference!r} ({comparison.source}, "
            f"made {comparison.made}); cells: IQM [95% CI] over runs."]
    for task in comparison.tasks:
        rows = [["agent", "runs", *(title for title, _ in TABLE_METRICS.values()),
                 *score_titles]]
        for standing in comparison.standings:
            if standing.task_id != task:
                continue
            name = standing.label if standing.source == "yours" else \
                f"{standing.label} ({standing.source})"
            rows.append([name, str(standing.runs),
                         *(_interval_text(standing.metrics[key]) for key in TABLE_METRICS),
                         *(_interval_text(standing.scores[key], score_number)
                           for key in comparison.metrics)])
        text += ["", task.removeprefix("needbench/"), *_aligned(rows)]
    rows = [["agent", "tasks", *(f"IQM of {title} [95% CI]" for title in score_titles)]]
    for name, by_metric in comparison.aggregates.items():
        first = by_metric[comparison.metrics[0]]
        rows.append([name, f"{first['tasks']}/{first['of_tasks']}",
                     *(_interval_text((by_metric[key]["value"], by_metric[key]["low"],
                                       by_metric[key]["high"]), score_number)
                       for key in comparison.metrics)])
    text += ["", "Aggregate over tasks", *_aligned(rows)]
    if comparison.pairings:
        rows = [["yours", "shipped", "score", "tasks", "runs", "P(yours > shipped) [95% CI]",
                 "IQM difference [95% CI]"]]
        for pairing in comparison.pairings:
            rows.append([pairing.yours, pairing.shipped,
                         SCORED_METRICS[pairing.metric][0].split(" (")[0], str(pairing.tasks),
                         f"{pairing.runs_yours} vs {pairing.runs_shipped}",
                         _interval_text(pairing.probability),
                         _interval_text(pairing.difference, score_number)])
        text += ["", "Your agents against the shipped ones (normalised scores)", *_aligned(rows)]
    return "\n".join(text + [""] + [f"({note})" for note in comparison.notes])
