"""Aggregates, stratified bootstrap intervals and probability of improvement."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats as scipy_stats

from needbench.benchmarks import stats
from needbench.envs.errors import ConfigError


def _iqm_scipy(sample, axis=-1):
    return scipy_stats.trim_mean(sample, 0.25, axis=axis)


# ----------------------------------------------------------------------------
# Point aggregates
# ----------------------------------------------------------------------------

@pytest.mark.parametrize("shape", [(1, 1), (3, 1), (5, 2), (7, 3), (10, 4), (13, 5)])
def test_interquartile_mean_matches_scipy_trim_mean(shape):
    rng = np.random.default_rng(sum(shape))
    scores = rng.standard_cauchy(size=shape)  # heavy tails: the trimming matters
    # Source: scipy.stats.trim_mean(x, 0.25) over all runs of all tasks, as
    # Agarwal et al. (2021) define the IQM.
    assert stats.interquartile_mean(scores) == pytest.approx(
        scipy_stats.trim_mean(scores, 0.25, axis=None), rel=1e-12)


def test_interquartile_mean_by_hand():
    # Eight scores 1..8: floor(0.25 * 8) = 2 cut at each end, leaving 3, 4, 5, 6,
    # whose mean is 18 / 4 = 4.5. An outlier in place of 8 changes nothing.
    # Source: hand computation from the 25% trimmed-mean definition.
    scores = np.array([[1.0, 5.0], [8.0, 2.0], [3.0, 7.0], [6.0, 4.0]])
    assert stats.interquartile_mean(scores) == pytest.approx(4.5)
    scores[1, 0] = 1e9
    assert stats.interquartile_mean(scores) == pytest.approx(4.5)


def test_mean_and_median_match_numpy():
    scores = np.random.default_rng(1).normal(size=(9, 4))
    # Source: numpy.mean / numpy.median over the flattened matrix.
    assert stats.mean(scores) == pytest.approx(np.mean(scores.ravel()))
    assert stats.median(scores) == pytest.approx(np.median(scores.ravel()))


def test_aggregates_score_a_stack_of_matrices_at_once():
    stack = np.random.default_rng(2).normal(size=(6, 5, 3))
    for name, aggregate in stats.AGGREGATES.items():
        one_by_one = [aggregate(matrix) for matrix in stack]
        np.testing.assert_allclose(aggregate(stack), one_by_one, err_msg=name)


# ----------------------------------------------------------------------------
# Stratified bootstrap
# ----------------------------------------------------------------------------

@pytest.mark.parametrize("name, scipy_statistic", [("mean", np.mean),
                                                   ("interquartile_mean", _iqm_scipy)])
def test_one_task_interval_matches_scipy_bootstrap(name, scipy_statistic):
    data = np.random.default_rng(3).gamma(2.0, 1.5, size=40)
    repetitions = 20000
    ours = stats.bootstrap_ci(data, stats.AGGREGATES[name], np.random.default_rng(4),
                              repetitions=repetitions)
    # Source: scipy.stats.bootstrap(method='percentile'), the same data and level.
    reference = scipy_stats.bootstrap((data,), scipy_statistic, method="percentile",
                                      confidence_level=0.95, n_resamples=repetitions,
                                      vectorized=True, rng=np.random.default_rng(5))
    spread = np.std(reference.bootstrap_distribution)
    # Monte-Carlo error of a 2.5% quantile from 20000 draws is about 0.02 spread
    # per estimate; 0.15 spread is over five standard errors of the difference.
    assert ours.low == pytest.approx(reference.confidence_interval.low, abs=0.15 * spread)
    assert ours.high == pytest.approx(reference.confidence_interval.high, abs=0.15 * spread)
    assert ours.value == pytest.approx(scipy_statistic(data, axis=-1))


def test_stratified_bootstrap_variance_of_the_mean():
    # Resampling runs within each task independently, the bootstrap variance of the
    # grand mean is (1 / tasks^2) * sum_j s_j^2 / n with s_j^2 the plug-in
    # (ddof = 0) variance of task j.
    # Value from memory of Efron & Tibshirani (1993), An Introduction to the
    # Bootstrap: the ideal bootstrap variance of a sample mean is s^2 / n.
    rng = np.random.default_rng(6)
    scores = rng.normal(size=(8, 3)) * np.array([1.0, 5.0, 0.2]) + np.array([0.0, 10.0, -3.0])
    runs, tasks = scores.shape
    expected = np.sum(np.var(scores, axis=0) / runs) / tasks**2
    distribution = stats.bootstrap_distribution(scores, stats.mean, rng, repetitions=40000)
    # Relative standard error of a variance from 40000 draws is sqrt(2 / 40000) = 0.7%.
    assert np.var(distribution) == pytest.approx(expected, rel=0.04)


def test_resampling_stays_within_each_task():
    # Task 0 always scores 1, task 1 always 3: a stratified resample keeps both
    # tasks, so every resampled mean is exactly 2. Resampling the runs of all tasks
    # pooled together would give means anywhere in [1, 3].
    # Source: hand computation.
    scores = np.array([[1.0, 3.0]] * 4)
    distribution = stats.bootstrap_distribution(scores, stats.mean, np.random.default_rng(7),
                                                repetitions=500)
    np.testing.assert_array_equal(distribution, 2.0)


def test_two_run_interval_by_hand():
    # One task, runs {0, 1}: the resampled means are 0, 1/2, 1/2, 1 with chance
    # 1/4 each, so the 2.5% and 97.5% quantiles are 0 and 1 (each end holds 25%).
    # Source: hand enumeration of the four equally likely resamples.
    distribution = stats.bootstrap_distribution([0.0, 1.0], stats.mean,
                                                np.random.default_rng(8), repetitions=4000)
    shares = [np.mean(distribution == v) for v in (0.0, 0.5, 1.0)]
    np.testing.assert_allclose(shares, [0.25, 0.5, 0.25], atol=0.03)
    estimate = stats.bootstrap_ci([0.0, 1.0], stats.mean, np.random.default_rng(8),
                                  repetitions=4000)
    assert (estimate.value, estimate.low, estimate.high) == (0.5, 0.0, 1.0)


def test_aggregate_estimates_use_the_generator():
    scores = np.random.default_rng(9).normal(size=(5, 4))
    first = stats.aggregate_estimates(scores, np.random.default_rng(10), repetitions=300)
    again = stats.aggregate_estimates(scores, np.random.default_rng(10), repetitions=300)
    other = stats.aggregate_estimates(scores, np.random.default_rng(11), repetitions=300)
    assert first == again
    assert first["interquartile_mean"] != other["interquartile_mean"]
    for name, estimate in first.items():
        assert estimate.value == pytest.approx(stats.AGGREGATES[name](scores))
        assert estimate.low <= estimate.value <= estimate.high


# ----------------------------------------------------------------------------
# Probability of improvement
# ----------------------------------------------------------------------------

def test_probability_of_improvement_by_hand():
    # X = (1, 2, 3), Y = (2, 2, 0). Pairs won by X, ties counting 1/2:
    #   x = 1: beats 0 only                 -> 1
    #   x = 2: ties 2 and 2, beats 0        -> 1/2 + 1/2 + 1 = 2
    #   x = 3: beats all three              -> 3
    # total 6 of 9 pairs: P(X > Y) = 2/3, and P(Y > X) = 1 - 2/3 = 1/3.
    # Source: hand computation.
    x, y = [1.0, 2.0, 3.0], [2.0, 2.0, 0.0]
    assert stats.probability_of_improvement(x, y) == pytest.approx(2 / 3)
    assert stats.probability_of_improvement(y, x) == pytest.approx(1 / 3)


def test_probability_of_improvement_matches_mann_whitney():
    rng = np.random.default_rng(12)
    x = rng.integers(0, 6, size=(7, 3)).astype(float)  # small integers: many ties
    y = rng.integers(0, 6, size=(5, 3)).astype(float)
    # Source: scipy.stats.mannwhitneyu, U / (n m) per task, averaged over tasks.
    per_task = [scipy_stats.mannwhitneyu(x[:, j], y[:, j]).statistic / (7 * 5)
                for j in range(3)]
    assert stats.probability_of_improvement(x, y) == pytest.approx(np.mean(per_task))


def test_probability_of_improvement_interval():
    rng = np.random.default_rng(13)
    x = rng.normal(1.0, 1.0, size=(10, 2))
    y = rng.normal(0.0, 1.0, size=(10, 2))
    estimate = stats.probability_of_improvement_ci(x, y, np.random.default_rng(14),
                                                   repetitions=2000)
    assert estimate.value == pytest.approx(stats.probability_of_improvement(x, y))
    assert 0.0 <= estimate.low < estimate.value < estimate.high <= 1.0
    # X always ahead on every task: every resample has P = 1.
    # Source: hand computation.
    certain = stats.probability_of_improvement_ci(y + 100.0, y, np.random.default_rng(15),
                                                  repetitions=200)
    assert (certain.value, certain.low, certain.high) == (1.0, 1.0, 1.0)


# ----------------------------------------------------------------------------
# Bad input
# ----------------------------------------------------------------------------

def test_bad_input_raises_config_error():
    rng = np.random.default_rng(0)
    with pytest.raises(ConfigError, match="finite"):
        stats.mean([[1.0, np.nan]])
    with pytest.raises(ConfigError, match="scores"):
        stats.mean(3.0)
    with pytest.raises(ConfigError, match="Generator"):
        stats.bootstrap_ci([1.0, 2.0], stats.mean, 0)
    with pytest.raises(ConfigError, match="confidence"):
        stats.bootstrap_ci([1.0, 2.0], stats.mean, rng, confidence=95)
    with pytest.raises(ConfigError, match="repetitions"):
        stats.bootstrap_ci([1.0, 2.0], stats.mean, rng, repetitions=0)
    with pytest.raises(ConfigError, match="same tasks"):
        stats.probability_of_improvement(np.ones((3, 2)), np.ones((3, 3)))
