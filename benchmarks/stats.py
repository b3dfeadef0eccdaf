"""Aggregate scores over runs and tasks, with honest uncertainty.

Follows Agarwal et al. (2021), "Deep Reinforcement Learning at the Edge of the
Statistical Precipice" (NeurIPS): with a handful of seeds per task, report a
robust aggregate (the interquartile mean) with a stratified bootstrap
confidence interval, and compare two agents by their probability of
improvement, rather than by a bare mean.

Scores are a matrix of shape (runs, tasks): one row per independent run (a
seed), one column per task, in whatever unit the metric has (return, time in
band as a share of steps...). **Higher is better**: negate a cost such as the
discounted drive before calling these functions. A 1-D array is read as the
runs of a single task. Every task must have the same number of runs (drop or
re-run failed jobs first); scores must be finite.

Aggregates reduce the last two axes, so a stack of bootstrap resamples of shape
(repetitions, runs, tasks) is scored in one vectorised call. All randomness
comes from the ``numpy.random.Generator`` passed in.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from needbench.envs.errors import ConfigError

# A statistic maps scores of shape (..., runs, tasks) to shape (...).
Statistic = Callable[[np.ndarray], np.ndarray]

# Resamples are drawn in blocks of at most this many score entries, so memory
# stays near 10 MB whatever the number of repetitions.
_BLOCK_ENTRIES = 1 << 20


@dataclass(frozen=True)
class Estimate:
    """A statistic on the observed scores and its bootstrap confidence interval.

    Attributes:
        value: the statistic computed on the observed scores (metric units).
        low: lower end of the percentile bootstrap interval.
        high: upper end of the percentile bootstrap interval.
        confidence: coverage of the interval, e.g. 0.95.
    """

    value: float
    low: float
    high: float
    confidence: float


# ----------------------------------------------------------------------------
# Input checks
# ----------------------------------------------------------------------------

def score_matrix(scores: ArrayLike, name: str = "scores") -> np.ndarray:
    """Return ``scores`` as a finite float matrix of shape (runs, tasks).

    A 1-D array becomes one task, (runs,) -> (runs, 1). Arrays with leading
    batch axes (..., runs, tasks) pass through unchanged.
    """
    array = np.asarray(scores, dtype=np.float64)
    if array.ndim == 1:
        array = array[:, None]
    if array.ndim < 2 or array.shape[-2] == 0 or array.shape[-1] == 0:
        raise ConfigError(name, f"array of shape {np.shape(scores)}",
                          "a (runs, tasks) matrix, or a 1-D array of runs, with at least one entry")
    if not np.all(np.isfinite(array)):
        raise ConfigError(name, "an array with NaN or inf entries",
                          "finite scores (drop failed runs before aggregating)")
    return array


def _check_generator(rng: object) -> np.random.Generator:
    if not isinstance(rng, np.random.Generator):
        raise ConfigError("rng", rng, "a numpy.random.Generator, e.g. np.random.default_rng(0)")
    return rng


def _check_confidence(confidence: float) -> float:
    if isinstance(confidence, bool) or not isinstance(confidence, (int, float)) \
            or not 0.0 < confidence < 1.0:
        raise ConfigError("confidence", confidence, "a number in (0, 1), e.g. 0.95")
    return float(confidence)


def _check_repetitions(repetitions: int) -> int:
    if isinstance(repetitions, bool) or not isinstance(repetitions, (int, np.integer)) \
            or repetitions < 1:
        raise ConfigError("repetitions", repetitions, "an integer >= 1 (2000 or more is usual)")
    return int(repetitions)


# ----------------------------------------------------------------------------
# Point aggregates over all runs of all tasks
# ----------------------------------------------------------------------------

def mean(scores: ArrayLike) -> np.ndarray | float:
    """Mean of every score in the (runs, tasks) matrix, in the metric's unit."""
    array = score_matrix(scores)
    return _scalar_or_array(np.mean(array, axis=(-2, -1)))


def median(scores: ArrayLike) -> np.ndarray | float:
    """Median of every score in the (runs, tasks) matrix, in the metric's unit."""
    array = score_matrix(scores)
    return _scalar_or_array(np.median(array, axis=(-2, -1)))


def interquartile_mean(scores: ArrayLike) -> np.ndarray | float:
    """Interquartile mean (IQM): the mean of the middle 50% of all scores.

    The N = runs * tasks scores are sorted and floor(0.25 N) are discarded at
    each end before averaging: the 25% trimmed mean, with the same cut rule as
    ``scipy.stats.trim_mean(x, 0.25)``. Robust to a few outlying runs, yet
    uses more of the data than the median (Agarwal et al. 2021).
    """
    array = score_matrix(scores)
    flat = np.sort(array.reshape(*array.shape[:-2], -1), axis=-1)
    count = flat.shape[-1]
    cut = int(0.25 * count)
    return _scalar_or_array(np.mean(flat[..., cut:count - cut], axis=-1))


AGGREGATES: dict[str, Statistic] = {
    "mean": mean,
    "median": median,
    "interquartile_mean": interquartile_mean,
}


def _scalar_or_array(value: np.ndarray) -> np.ndarray | float:
    return float(value) if np.ndim(value) == 0 else value


# ----------------------------------------------------------------------------
# Stratified bootstrap
# ----------------------------------------------------------------------------

def _stratified_resamples(scores: np.ndarray, rng: np.random.Generator,
                          repetitions: int) -> Iterator[np.ndarray]:
    """Yield blocks of resampled score matrices, shape (block, runs, tasks).

    Stratified: within each task (column) the runs are drawn with replacement
    from that task's own runs, independently across tasks, so every resample
    keeps every task exactly once (Agarwal et al. 2021).
    """
    runs, tasks = scores.shape
    block = max(1, _BLOCK_ENTRIES // (runs * tasks))
    task_index = np.arange(tasks)
    for start in range(0, repetitions, block):
        size = min(block, repetitions - start)
        rows = rng.integers(0, runs, size=(size, runs, tasks))
        # scores[rows[b, i, j], j]: run i of resample b for task j.
        yield scores[rows, task_index]


def bootstrap_distribution(scores: ArrayLike, statistic: Statistic, rng: np.random.Generator,
                           repetitions: int = 2000) -> np.ndarray:
    """The statistic on ``repetitions`` stratified bootstrap resamples, shape (repetitions,).

    Args:
        scores: (runs, tasks) matrix (or 1-D runs of one task), higher is better.
        statistic: maps (..., runs, tasks) to (...), e.g. :func:`interquartile_mean`.
        rng: the source of all randomness.
        repetitions: number of bootstrap resamples.
    """
    matrix = score_matrix(scores)
    rng = _check_generator(rng)
    repetitions = _check_repetitions(repetitions)
    blocks = [np.asarray(statistic(block)) for block in _stratified_resamples(matrix, rng,
                                                                              repetitions)]
    distribution = np.concatenate([np.atleast_1d(b) for b in blocks])
    if distribution.shape != (repetitions,):
        raise ConfigError("statistic", f"output of shape {distribution.shape}",
                          "a function mapping (repetitions, runs, tasks) to (repetitions,)")
    return distribution


def percentile_interval(distribution: ArrayLike, confidence: float = 0.95) -> tuple[float, float]:
    """Percentile bootstrap interval: the (1-c)/2 and (1+c)/2 quantiles of the distribution.

    Quantiles use numpy's default linear interpolation between order statistics.
    """
    confidence = _check_confidence(confidence)
    tail = (1.0 - confidence) / 2.0
    low, high = np.percentile(np.asarray(distribution, dtype=np.float64),
                              [100.0 * tail, 100.0 * (1.0 - tail)])
    return float(low), float(high)


def bootstrap_ci(scores: ArrayLike, statistic: Statistic, rng: np.random.Generator, *,
                 confidence: float = 0.95, repetitions: int = 2000) -> Estimate:
    """A statistic of the scores with its stratified percentile bootstrap interval."""
    matrix = score_matrix(scores)
    distribution = bootstrap_distribution(matrix, statistic, rng, repetitions)
    low, high = percentile_interval(distribution, confidence)
    return Estimate(float(statistic(matrix)), low, high, float(confidence))


def aggregate_estimates(scores: ArrayLike, rng: np.random.Generator, *,
                        confidence: float = 0.95,
                        repetitions: int = 2000) -> dict[str, Estimate]:
    """Mean, median and IQM with intervals, all read from the same bootstrap resamples."""
    matrix = score_matrix(scores)
    rng = _check_generator(rng)
    repetitions = _check_repetitions(repetitions)
    confidence = _check_confidence(confidence)
    distributions: dict[str, list[np.ndarray]] = {name: [] for name in AGGREGATES}
    for block in _stratified_resamples(matrix, rng, repetitions):
        for name, statistic in AGGREGATES.items():
            distributions[name].append(np.atleast_1d(statistic(block)))
    estimates = {}
    for name, statistic in AGGREGATES.items():
        low, high = percentile_interval(np.concatenate(distributions[name]), confidence)
        estimates[name] = Estimate(float(statistic(matrix)), low, high, confidence)
    return estimates


# ----------------------------------------------------------------------------
# Probability of improvement
# ----------------------------------------------------------------------------

def _pairwise_probability(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """P(X > Y) averaged over tasks for x (..., n, tasks) and y (..., m, tasks) -> (...).

    Every (run of x, run of y) pair of a task scores 1 if x wins, 1/2 on a tie
    and 0 if y wins; (sign(x - y) + 1) / 2 gives exactly these three values.
    All tasks have n * m pairs, so the mean over pairs and tasks equals the
    mean over tasks of each task's share.
    """
    difference = x[..., :, None, :] - y[..., None, :, :]
    return np.mean((np.sign(difference) + 1.0) / 2.0, axis=(-3, -2, -1))


def _pair_matrices(x_scores: ArrayLike, y_scores: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    x = score_matrix(x_scores, "x_scores")
    y = score_matrix(y_scores, "y_scores")
    if x.ndim != 2 or y.ndim != 2 or x.shape[1] != y.shape[1]:
        raise ConfigError("y_scores", f"array of shape {y.shape}",
                          f"a (runs, {x.shape[-1]}) matrix: the same tasks, in the same "
                          f"column order, as x_scores of shape {x.shape}")
    return x, y


def probability_of_improvement(x_scores: ArrayLike, y_scores: ArrayLike) -> float:
    """P(X > Y): the chance that a run of agent X beats a run of agent Y on a random task.

        P(X > Y) = (1 / tasks) * sum_j (1 / (n m)) * sum_i sum_k S(x_ij, y_kj),

    with S(x, y) = 1 if x > y, 1/2 if x = y, 0 otherwise: per task, the
    Mann-Whitney U statistic of X over Y divided by n m (Agarwal et al. 2021,
    who use it to compare agents). A value in [0, 1]; 0.5 means neither agent is better.

    Args:
        x_scores: (n, tasks) scores of agent X, higher is better.
        y_scores: (m, tasks) scores of agent Y on the same tasks (column order).
    """
    x, y = _pair_matrices(x_scores, y_scores)
    return float(_pairwise_probability(x, y))


def probability_of_improvement_ci(x_scores: ArrayLike, y_scores: ArrayLike,
                                  rng: np.random.Generator, *, confidence: float = 0.95,
                                  repetitions: int = 2000) -> Estimate:
    """P(X > Y) with its percentile bootstrap interval.

    Each resample draws, within every task, the runs of X and the runs of Y
    with replacement and independently of each other.
    """
    x, y = _pair_matrices(x_scores, y_scores)
    rng = _check_generator(rng)
    repetitions = _check_repetitions(repetitions)
    confidence = _check_confidence(confidence)
    (n, tasks), m = x.shape, y.shape[0]
    block = max(1, _BLOCK_ENTRIES // (n * m * tasks))
    task_index = np.arange(tasks)
    distribution = np.empty(repetitions)
    for start in range(0, repetitions, block):
        size = min(block, repetitions - start)
        x_resample = x[rng.integers(0, n, size=(size, n, tasks)), task_index]
        y_resample = y[rng.integers(0, m, size=(size, m, tasks)), task_index]
        distribution[start:start + size] = _pairwise_probability(x_resample, y_resample)
    low, high = percentile_interval(distribution, confidence)
    return Estimate(float(_pairwise_probability(x, y)), low, high, confidence)
