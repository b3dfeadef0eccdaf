"""Reading a phenomenon's runs out of a store, and the statistics their effects use.

Scores are grouped as ``{condition: {seed: value}}``: a condition is a sweep
value or an agent's setting, a value the mean of a metric over the run's
evaluation episodes. Intervals are 95 % percentile bootstrap intervals over
seeds from :mod:`needbench.benchmarks.stats`, with a fixed generator so that a
measurement is repeatable.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Callable, Mapping
from typing import Any

import numpy as np

from needbench.benchmarks import stats
from needbench.envs.errors import ConfigError

#: Seed of every bootstrap of a measurement, and its resamples.
SEED = 0
REPETITIONS = 2000

Scores = dict[Any, dict[int, float]]


def done_runs(store: Any, suite: str) -> list[dict[str, Any]]:
    """The done runs of ``suite``; ConfigError when there are none."""
    runs = store.runs(suite=suite, status="done")
    if not runs:
        raise ConfigError("store", str(store.path),
                          f"a results store holding done runs of suite {suite!r} "
                          f"(run it: needbench run phenomena)")
    return runs


def traced_runs(store: Any, suite: str, task: str, agent: str | None = None, *,
                builtin: str = "phenomena") -> list[tuple[dict[str, Any], dict]]:
    """(run, trace of its first evaluation episode) for each done run of ``suite`` on
    ``task`` (of ``agent`` if given); ConfigError when there are none (naming the
    built-in suite to run, ``builtin``) or a run has no stored trace."""
    found = store.runs(suite=suite, task_id=task, agent=agent, status="done")
    if not found:
        who = f"{agent} runs" if agent else "runs"
        raise ConfigError("store", str(store.path),
                          f"done {who} of suite {suite!r} (run it: needbench run {builtin})")
    pairs = []
    for run in found:
        try:
            pairs.append((run, store.trace(run["hash"], 0)))
        except KeyError as error:
            raise ConfigError("run --traces", 0, "at least 1 stored trace per run "
                              "(the default)") from error
    return pairs


def scores(store: Any, suite: str, metric: str,
           condition: Callable[[dict[str, Any]], Any], *,
           agent: str | None = None) -> Scores:
    """{condition: {seed: mean of ``metric`` over the run's episodes}} for the done runs of
    ``suite`` (of ``agent`` if given); ``condition(run)`` names a run's condition, None
    leaves the run out. Episodes without the metric (NaN) are left out of the mean."""
    hashes = {}
    for run in done_runs(store, suite):
        if agent is not None and run["agent"] != agent:
            continue
        key = condition(run)
        if key is not None:
            hashes[run["hash"]] = (key, run["seed"])
    values: dict[str, list[float]] = defaultdict(list)
    for episode in store.episodes(suite=suite, status="done"):
        if episode["hash"] in hashes:
            values[episode["hash"]].append(episode["metrics"].get(metric, np.nan))
    grouped: Scores = defaultdict(dict)
    for run_hash, (key, seed) in hashes.items():
        finite = [v for v in values.get(run_hash, []) if np.isfinite(v)]
        if finite:
            grouped[key][seed] = float(np.mean(finite))
    return dict(grouped)


def sweep_value(label: str) -> Callable[[dict[str, Any]], Any]:
    """A ``condition`` for :func:`scores`: the run's value of one sweep axis."""
    return lambda run: run["sweep"].get(label)


def require(grouped: Scores, conditions, what: str) -> None:
    """ConfigError unless every condition has at least 2 seeds."""
    for condition in conditions:
        if len(grouped.get(condition, {})) < 2:
            raise ConfigError(what, condition, "a condition with runs of 2 or more seeds in "
                              f"the store (have: {sorted(map(str, grouped))})")


def paired(grouped: Scores, first: Any, second: Any) -> np.ndarray:
    """(seeds,) first - second for the seeds both conditions have."""
    seeds = sorted(set(grouped[first]) & set(grouped[second]))
    return np.array([grouped[first][s] - grouped[second][s] for s in seeds])


def mean_interval(values: np.ndarray) -> stats.Estimate:
    """The mean over seeds with its 95 % bootstrap interval."""
    return stats.bootstrap_ci(np.asarray(values, dtype=float), stats.mean,
                              np.random.default_rng(SEED), repetitions=REPETITIONS)


def _scipy_stats():
    from scipy import stats as scipy_stats  # a dependency of needbench

    return scipy_stats


def rank_correlation(grouped: Scores) -> tuple[float, float]:
    """Spearman's rank correlation of the condition (a number) with the score over every
    run, and its two-sided p-value: ``scipy.stats.spearmanr``."""
    x = [float(c) for c in grouped for _ in grouped[c]]
    y = [grouped[c][s] for c in grouped for s in grouped[c]]
    result = _scipy_stats().spearmanr(x, y)
    return float(result.statistic), float(result.pvalue)


def spearman_rows(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Spearman's rho of ``x`` (n,) with each row of ``y`` (..., n): the Pearson correlation
    of average ranks; 0 for a row whose scores are all equal (no order to correlate)."""
    rankdata = _scipy_stats().rankdata
    rx = rankdata(np.asarray(x, dtype=float))
    ry = rankdata(np.asarray(y, dtype=float), axis=-1)
    rx = rx - rx.mean()
    ry = ry - ry.mean(axis=-1, keepdims=True)
    denominator = np.sqrt(np.sum(rx**2) * np.sum(ry**2, axis=-1))
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = np.sum(rx * ry, axis=-1) / denominator
    return np.where(denominator > 0, rho, 0.0)


def rank_correlation_interval(grouped: Scores) -> tuple[float, float]:
    """95 % bootstrap interval of Spearman's rho: seeds resampled with replacement within
    each condition (the conditions are the strata, as tasks are in
    :func:`needbench.benchmarks.stats.bootstrap_distribution`)."""
    conditions = sorted(grouped, key=float)
    counts = {len(grouped[c]) for c in conditions}
    if len(counts) != 1:
        raise ConfigError("runs", {str(c): len(grouped[c]) for c in conditions},
                          "the same number of seeds at every condition")
    matrix = np.array([[grouped[c][s] for c in conditions]
                       for s in sorted(grouped[conditions[0]])])
    runs = matrix.shape[0]
    x = np.repeat(np.array(conditions, dtype=float)[None, :], runs, axis=0).reshape(-1)

    def rho(block: np.ndarray) -> np.ndarray:
        return spearman_rows(x, block.reshape(*block.shape[:-2], -1))

    distribution = stats.bootstrap_distribution(matrix, rho, np.random.default_rng(SEED),
                                                REPETITIONS)
    return stats.percentile_interval(distribution)


def per_condition(grouped: Scores) -> dict[str, dict[str, float]]:
    """Plain JSON: {condition: {seed: score}} with string keys, for ``Effect.detail``."""
    return {str(c): {str(s): float(v) for s, v in sorted(by_seed.items())}
            for c, by_seed in grouped.items()}


def condition_means(grouped: Mapping[Any, Mapping[int, float]]) -> dict[Any, float]:
    return {c: float(np.mean(list(by_seed.values()))) for c, by_seed in grouped.items()}
