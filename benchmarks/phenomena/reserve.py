"""Reserves loaded by overconsumption (Lure with a slow store need).

The suite declares, with no code, a third need beside Lure's energy and water:
a store s (band units, set point 0 = empty, drive weight 0) fed by four sided
couplings. While energy is above its set point by e > 0, energy loses a e a
step and the store gains a e; while the store holds s > 0, it loses b s a step
and energy gains b s (a = 0.05, b = 0.005). Between meals, then,

    s_{t+1} = (1 - b) s_t + a max(e_t, 0),

a first-order low-pass filter of the energy surplus with gain a / b = 10 and a
time constant of 1 / b = 200 steps, Lure's episode length. A learner that holds
energy above its set point by a mean surplus e-bar (the overconsumption
phenomenon, Keramati & Gutkin 2014) fills the store toward 10 e-bar, and the
store keeps growing for as long as the overconsumption lasts (within an
episode it reaches about 1 - exp(-1) = 63 % of that level); with T = 0 energy
stays near its set point and the store takes up only the overshoot of single
meals. The store does not enter the drive, so the reward, and what is learned,
is the overconsumption suite's; the couplings only move the surplus.

The effect: the store's mean content over an episode (the ``deviation/store``
metric: its mean absolute deviation from empty, band units; the content is
never negative) at palatability weight 2 minus at 0, paired by seed, mean over
seeds with its 95 % bootstrap interval; expected > 0. ``detail`` holds each
weight's mean content; from each run's stored episode, the mean energy
surplus (mean of max(e, 0), band units) and the steady content the filter
predicts from it (10 x that surplus: approached over 200 steps, so a bound on
an episode's mean content); and the per-seed values.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from needbench.benchmarks.phenomena import Effect, suite_name
from needbench.benchmarks.phenomena import _runs as runs

NAME = "reserve"
TITLE = "Reserves loaded by overconsumption"
TASK = "needbench/Lure-v1"
SUITE = "phenomena/reserve"

SWEEP = "task.palatability_weight"
METRIC = "deviation/store"
HONEST, STRONG = 0.0, 2.0
#: Store gain over release of the suite's couplings, a / b: the steady content per
#: band of mean energy surplus.
STEADY_GAIN = 0.05 / 0.005


def _scores(store: Any, metric: str) -> runs.Scores:
    grouped = runs.scores(store, suite_name(SUITE), metric, runs.sweep_value(SWEEP))
    runs.require(grouped, (HONEST, STRONG), SWEEP)
    return grouped


def _energy_surplus(store: Any) -> runs.Scores:
    """{weight: {seed: mean over steps of max(energy - set point, 0) / band}}, from each
    run's stored episode 0 (energy is the first need)."""
    surplus: runs.Scores = {}
    for run in store.runs(suite=suite_name(SUITE), status="done"):
        weight = run["sweep"].get(SWEEP)
        try:
            trace = store.trace(run["hash"], 0)
        except KeyError:
            continue
        excess = (trace["level"][1:, 0] - trace["set_point"][1:, 0]) / trace["band"][0]
        surplus.setdefault(weight, {})[run["seed"]] = float(np.mean(np.maximum(excess, 0.0)))
    return surplus


def measure(store: Any) -> Effect:
    content = _scores(store, METRIC)
    effect = runs.mean_interval(runs.paired(content, STRONG, HONEST))
    means = runs.condition_means(content)
    surplus_means = runs.condition_means(_energy_surplus(store))
    return Effect(
        NAME, TASK,
        "the store's mean content over an episode at palatability weight 2 minus 0, paired "
        "by seed (band units)",
        effect.value, effect.low, effect.high, ">", 0.0,
        detail={"means": {str(c): v for c, v in sorted(means.items())},
                "energy_surplus_means": {str(c): v for c, v in sorted(surplus_means.items())},
                "steady_content_bound": {str(c): STEADY_GAIN * v
                                         for c, v in sorted(surplus_means.items())},
                "per_seed": runs.per_condition(content)})


def figure(store: Any, axes: Any) -> None:
    """The store's content through the stored episode of each run, by palatability weight."""
    effect = measure(store)
    colours = {HONEST: "#79b4e3", STRONG: "#c2452d"}
    labelled = set()
    for run in store.runs(suite=suite_name(SUITE), status="done"):
        weight = run["sweep"].get(SWEEP)
        if weight not in colours:
            continue
        try:
            trace = store.trace(run["hash"], 0)
        except KeyError:
            continue
        content = (trace["level"][:, -1] - trace["set_point"][:, -1]) / trace["band"][-1]
        axes.plot(np.arange(content.shape[0]), content, color=colours[weight], alpha=0.8,
                  label=None if weight in labelled else f"palatability weight {weight:g}")
        labelled.add(weight)
    axes.axhline(0.0, color="#4d4d4d", linewidth=0.8, linestyle=":")
    axes.set_xlabel("step of the stored evaluation episode")
    axes.set_ylabel("store content (band units above empty)")
    axes.set_title(f"{TITLE}: weight 2 minus 0 = {effect.interval_text}")
    axes.legend(loc="upper left")
