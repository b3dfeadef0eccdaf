"""Stability versus return (Shift): time in band falls as the pay for work weighs more.

Shift pays ``task_weight`` * pay for raking salt in the sun, which drains and
heats the body, on top of the drive reduction. Drive reduction telescopes (its
episode sum is D(h_0) - D(h_T), bounded) while pay grows with every work step,
so the more the pay weighs, the more a return-maximising learner works: return
rises and the time its needs spend in their comfort bands falls (derived in
Shift's docstring).

The effect: Spearman's rank correlation of the task weight with time in band
over every run (one point per run: its mean over evaluation episodes), as
``scipy.stats.spearmanr`` computes it; its interval is a 95 % bootstrap interval
over seeds resampled within each task weight; expected < 0. ``detail`` holds
the p-value, the same correlation for return and for the pay earned (expected
> 0), and the paired differences at weight 3 minus 0 of time in band and
return with their intervals.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from needbench.benchmarks.phenomena import Effect, suite_name
from needbench.benchmarks.phenomena import _runs as runs

NAME = "tradeoff"
TITLE = "Stability versus return"
TASK = "needbench/Shift-v0"
SUITE = "phenomena/tradeoff"

SWEEP = "task.task_weight"
LOW, HIGH = 0.0, 3.0


def _scores(store: Any, metric: str) -> runs.Scores:
    grouped = runs.scores(store, suite_name(SUITE), metric, runs.sweep_value(SWEEP))
    runs.require(grouped, (LOW, HIGH), SWEEP)
    return grouped


def measure(store: Any) -> Effect:
    in_band = _scores(store, "time_in_band")
    rho, p = runs.rank_correlation(in_band)
    low, high = runs.rank_correlation_interval(in_band)
    detail: dict[str, Any] = {"spearman_p": p}
    for metric in ("return", "extrinsic_return"):
        metric_rho, metric_p = runs.rank_correlation(_scores(store, metric))
        detail[f"spearman/{metric}"] = [metric_rho, metric_p]
    for metric in ("time_in_band", "return"):
        difference = runs.mean_interval(runs.paired(_scores(store, metric), HIGH, LOW))
        detail[f"difference/{metric}"] = [difference.value, difference.low, difference.high]
    detail["means"] = {str(c): v for c, v in sorted(runs.condition_means(in_band).items())}
    detail["per_seed"] = runs.per_condition(in_band)
    return Effect(NAME, TASK,
                  "Spearman's rank correlation of the task weight with time in band over "
                  "every run (scipy.stats.spearmanr; interval: bootstrap over seeds within "
                  "each weight)",
                  rho, low, high, "<", 0.0, detail)


def figure(store: Any, axes: Any) -> None:
    effect = measure(store)
    in_band = _scores(store, "time_in_band")
    gain = _scores(store, "return")
    weights = sorted(in_band)
    positions = np.arange(len(weights))
    for grouped, colour, marker, label, axis in (
            (in_band, "#1b5e9f", "o", "time in band (share of steps)", axes),
            (gain, "#f0a030", "s", "return (reward units)", axes.twinx())):
        means = runs.condition_means(grouped)
        for i, weight in enumerate(weights):
            values = list(grouped[weight].values())
            axis.plot([positions[i]] * len(values), values, marker, color=colour, alpha=0.35)
        axis.plot(positions, [means[w] for w in weights], "-", marker=marker, color=colour,
                  label=f"{label}, mean over seeds")
        axis.set_ylabel(label, color=colour)
        axis.legend(loc="upper center" if axis is axes else "center right")
    axes.set_xticks(positions, [f"{w:g}" for w in weights])
    axes.set_xlabel("task weight (the pay's weight in the reward)")
    return_rho, return_p = effect.detail["spearman/return"]
    axes.set_title(f"{TITLE}: Spearman(weight, time in band) = {effect.interval_text}, "
                   f"p = {effect.detail['spearman_p']:.1g}; return {return_rho:+.2f}")
