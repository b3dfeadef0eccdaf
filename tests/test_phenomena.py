"""The built-in phenomena suites (benchmarks/suites/phenomena/): each is run at its
own small budget and the direction of its effect is checked with a 95 % stratified
bootstrap interval over seeds (needbench.benchmarks.stats) that excludes zero.

``python -m pytest tests/test_phenomena.py -s`` prints the measured effects
quoted in the README.
"""

from __future__ import annotations

from collections import defaultdict

import numpy as np
import pytest
from scipy import stats as scipy_stats

from needbench.benchmarks import stats
from needbench.benchmarks.cli import builtin_suites, main
from needbench.benchmarks.store import Store


def run_suite(name: str, folder) -> dict[float, dict[int, dict[str, float]]]:
    """Run a built-in suite with one sweep into ``folder``; {sweep value: {seed:
    {metric: mean over the run's evaluation episodes}}}."""
    assert main(["run", name, "--out", str(folder), "--workers", "2", "--quiet"]) == 0
    episodes: dict[float, dict[int, list]] = defaultdict(lambda: defaultdict(list))
    with Store(folder / "results.sqlite3") as store:
        assert all(run["status"] == "done" for run in store.runs())
        for episode in store.episodes():
            (value,) = episode["sweep"].values()
            episodes[value][episode["seed"]].append(episode["metrics"])
    return {value: {seed: {key: float(np.mean([m[key] for m in metrics]))
                           for key in metrics[0]}
                    for seed, metrics in by_seed.items()}
            for value, by_seed in episodes.items()}


def paired_difference(runs, metric: str, high: float, low: float) -> stats.Estimate:
    """Mean over seeds of metric(high) - metric(low), paired by seed, with its interval."""
    seeds = sorted(runs[low])
    difference = np.array([runs[high][s][metric] - runs[low][s][metric] for s in seeds])
    return stats.bootstrap_ci(difference, stats.mean, np.random.default_rng(0))


def rank_correlation(runs, metric: str):
    values = [value for value in runs for _ in runs[value]]
    scores = [runs[value][seed][metric] for value in runs for seed in runs[value]]
    # Source: scipy.stats.spearmanr, Spearman's rank correlation with its p-value.
    return scipy_stats.spearmanr(values, scores)


def report(name: str, estimate: stats.Estimate) -> None:
    print(f"{name}: {estimate.value:+.3f} [{estimate.low:+.3f}, {estimate.high:+.3f}]")


def test_every_phenomena_suite_has_a_check():
    checked = {"phenomena/overconsumption", "phenomena/tradeoff"}
    assert {name for name in builtin_suites() if name.startswith("phenomena/")} == checked


@pytest.mark.slow
def test_overconsumption_grows_with_palatability(tmp_path):
    runs = run_suite("phenomena/overconsumption", tmp_path / "out")
    assert sorted(runs) == [0.0, 0.5, 1.0, 2.0]
    # Learned steady state above the set point with T > 0, against T = 0 (paired seeds).
    for weight in (1.0, 2.0):
        excess = paired_difference(runs, "overconsumption", weight, 0.0)
        report(f"overconsumption, palatability weight {weight} - 0", excess)
        assert excess.low > 0.0
    correlation = rank_correlation(runs, "overconsumption")
    print(f"Spearman(palatability weight, overconsumption) = {correlation.statistic:+.2f}, "
          f"p = {correlation.pvalue:.1g}")
    assert correlation.statistic > 0 and correlation.pvalue < 0.05
    # With T = 0 the fudge is an honest food: the learner stays close to the set point.
    honest = np.mean([m["overconsumption"] for m in runs[0.0].values()])
    palatable = np.mean([m["overconsumption"] for m in runs[2.0].values()])
    assert honest < palatable / 2


@pytest.mark.slow
def test_time_in_band_falls_and_return_rises_with_the_task_weight(tmp_path):
    runs = run_suite("phenomena/tradeoff", tmp_path / "out")
    assert sorted(runs) == [0.0, 0.1, 0.3, 1.0, 3.0]
    in_band = paired_difference(runs, "time_in_band", 3.0, 0.0)
    gain = paired_difference(runs, "return", 3.0, 0.0)
    report("time in band, task weight 3 - 0", in_band)
    report("return, task weight 3 - 0", gain)
    assert in_band.high < 0.0 and gain.low > 0.0
    for metric, sign in (("time_in_band", -1), ("return", 1), ("extrinsic_return", 1)):
        correlation = rank_correlation(runs, metric)
        print(f"Spearman(task weight, {metric}) = {correlation.statistic:+.2f}, "
              f"p = {correlation.pvalue:.1g}")
        assert np.sign(correlation.statistic) == sign and correlation.pvalue < 0.05
