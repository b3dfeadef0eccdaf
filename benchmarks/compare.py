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
