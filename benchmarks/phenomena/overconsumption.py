"""Overconsumption of palatable food (Lure): the learned steady state rises with palatability.

Lure's reward is r_t = D(h_t) - D(h_t + k_hat_t) + w T_t (Keramati & Gutkin
2014): the honey fudge pays its palatability T beyond what it does for energy,
scaled by the swept ``palatability_weight`` w. A learner of this reward holds
energy above its set point, the more so the larger w T; with w = 0 the fudge is
an honest food (the threshold is derived in Lure's docstring).

The effect: the mean over seeds of overconsumption (mean excess above the set
points, band units per step) at w = 2 minus at w = 0, paired by seed, with its
95 % bootstrap interval; expected > 0. ``detail`` also holds the same
difference at w = 1, Spearman's rank correlation of w with overconsumption over
every run (``scipy.stats.spearmanr``, with its p-value) and each weight's mean.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from needbench.benchmarks.phenomena import Effect, suite_name
from needbench.benchmarks.phenomena import _runs as runs

NAME = "overconsumption"
TITLE = "Overconsumption of palatable food"
TASK = "needbench/Lure-v1"
SUITE = "phenomena/overconsumption"

SWEEP = "task.palatability_weight"
METRIC = "overconsumption"
HONEST, STRONG, MIDDLE = 0.0, 2.0, 1.0


def _scores(store: Any) -> runs.Scores:
    grouped = runs.scores(store, suite_name(SUITE), METRIC,
                          runs.sweep_value(SWEEP))
    runs.require(grouped, (HONEST, MIDDLE, STRONG), SWEEP)
    return grouped


def measure(store: Any) -> Effect:
    grouped = _scores(store)
    strong = runs.mean_interval(runs.paired(grouped, STRONG, HONEST))
    middle = runs.mean_interval(runs.paired(grouped, MIDDLE, HONEST))
    rho, p = runs.rank_correlation(grouped)
    return Effect(
        NAME, TASK,
        "overconsumption at palatability weight 2 minus 0, paired by seed (band units per "
        "step)",
        strong.value, strong.low, strong.high, ">", 0.0,
        detail={"difference_weight_1": [middle.value, middle.low, middle.high],
                "spearman": rho, "spearman_p": p,
                "means": {str(c): v for c, v in sorted(runs.condition_means(grouped).items())},
                "per_seed": runs.per_condition(grouped)})


def figure(store: Any, axes: Any) -> None:
    grouped = _scores(store)
    effect = measure(store)
    weights = sorted(grouped)
    for weight in weights:
        values = list(grouped[weight].values())
        axes.plot([weight] * len(values), values, "o", color="#79b4e3", alpha=0.7,
                  label="one seed" if weight == weights[0] else None)
    means = runs.condition_means(grouped)
    intervals = [runs.mean_interval(np.array(list(grouped[w].values()))) for w in weights]
    axes.errorbar(weights, [means[w] for w in weights],
                  yerr=[[means[w] - i.low for w, i in zip(weights, intervals, strict=True)],
                        [i.high - means[w] for w, i in zip(weights, intervals, strict=True)]],
                  color="#1b5e9f", marker="s", capsize=4, label="mean over seeds, 95 % CI")
    axes.axhline(0.0, color="#4d4d4d", linewidth=0.8, linestyle=":")
    axes.set_xlabel("palatability weight w (the fudge pays w T, T = 0.5)")
    axes.set_ylabel("overconsumption (band units per step)")
    axes.set_title(f"{TITLE}: weight 2 minus 0 = {effect.interval_text} "
                   f"(Spearman {effect.detail['spearman']:+.2f})")
    axes.legend(loc="upper left")
