"""Allostasis (Drift): adapting set points shrink the deviation a little and let the body drift.

Drift's allostasis moves each set point toward the experienced level,
s_{t+1} = s_t + a (h_{t+1} - s_t), a = ``adaptation_rate`` (0.002 a step for
energy and water by default). What that does to the deviation the drive
measures, e_t = h_t - s_t, follows from the rule:

    e_{t+1} = h_{t+1} - s_{t+1} = (1 - a)(h_{t+1} - s_t) = (1 - a)(e_t + (h_{t+1} - h_t)),

a first-order high-pass filter of the level: in z, E / H = (1 - a)(z - 1) / (z - (1 - a)).
A steady offset of the level (frequency 0) is removed entirely; the seasonal
swing, of period P = ``year_length`` = 400 steps, passes with gain
|E / H| at z = exp(2 pi i / P), 0.991 for a = 0.002 (the filter's time constant,
1 / a = 500 steps, is longer than the year). So with adaptation on:

* the deviation from the current set point loses only its steady part (the
  controller's steady under- or overshoot of each need): the discounted
  deviation falls, but only a little (expected: on minus off < 0);
* that steady part does not vanish from the body: it carries the set point,
  and the body held near it, away from the preset set point, by about a times
  the offset each step. The deviation from the *preset* set points grows
  (expected: on minus off > 0): stability of the measured deviation bought by
  moving the reference.

The effect: discounted deviation (the suite's discount 0.999; band units) with
adaptation on minus off, paired by seed, mean over seeds with its 95 %
bootstrap interval; expected < 0. ``detail`` holds the mean deviation from the
preset set points on minus off over each run's stored episode (its interval
too; expected > 0), and the set points' shift over that episode, per need.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from needbench.benchmarks.phenomena import Effect, suite_name
from needbench.benchmarks.phenomena import _runs as runs

NAME = "allostasis"
TITLE = "Allostasis"
TASK = "needbench/Drift-v0"
SUITE = "phenomena/allostasis"

AGENT = "setpoint-controller"
SWEEP = "task.need_overrides"
ON, OFF = "adaptation on", "adaptation off"
METRIC = "discounted_deviation"


def _condition(run: dict[str, Any]) -> str | None:
    overrides = run["sweep"].get(SWEEP)
    if overrides is None:
        return None
    rates = [changes.get("adaptation_rate") for changes in overrides.values()]
    return OFF if rates and all(rate == 0 for rate in rates) else ON


def preset_drift(store: Any) -> tuple[runs.Scores, dict[str, dict[str, float]]]:
    """({condition: {seed: mean |h - s_0| / band over steps and needs}}, {condition: {need:
    mean shift of the set point over the episode, band units}}), from each run's stored
    episode 0 (s_0: the set points at reset, the preset's)."""
    deviation: runs.Scores = {}
    shifts: dict[str, list[np.ndarray]] = {}
    names: list[str] = []
    for run in store.runs(suite=suite_name(SUITE), status="done", agent=AGENT):
        condition = _condition(run)
        try:
            trace = store.trace(run["hash"], 0)
        except KeyError:
            continue
        if condition is None:
            continue
        band = trace["band"]
        offset = (trace["level"][1:] - trace["set_point"][0]) / band
        deviation.setdefault(condition, {})[run["seed"]] = float(np.mean(np.abs(offset)))
        shifts.setdefault(condition, []).append((trace["set_point"][-1] - trace["set_point"][0])
                                                / band)
        names = [f"need_{k}" for k in range(band.shape[0])]
    needs = _need_names(store) or names
    return deviation, {c: dict(zip(needs, np.mean(v, axis=0).round(3).tolist(), strict=True))
                       for c, v in shifts.items()}


def _need_names(store: Any) -> list[str]:
    for episode in store.episodes(suite=suite_name(SUITE), agent=AGENT, status="done"):
        return [key.split("/", 1)[1] for key in episode["metrics"] if key.startswith("deviation/")]
    return []


def measure(store: Any) -> Effect:
    grouped = runs.scores(store, suite_name(SUITE), METRIC, _condition, agent=AGENT)
    runs.require(grouped, (ON, OFF), SWEEP)
    effect = runs.mean_interval(runs.paired(grouped, ON, OFF))
    drift, shifts = preset_drift(store)
    runs.require(drift, (ON, OFF), "stored traces")
    away = runs.mean_interval(runs.paired(drift, ON, OFF))
    means = runs.condition_means(grouped)
    return Effect(
        NAME, TASK,
        f"discounted deviation of {AGENT} with set-point adaptation on minus off, paired by "
        "seed (band units, discount 0.999)",
        effect.value, effect.low, effect.high, "<", 0.0,
        detail={"means": means, "relative": effect.value / means[OFF],
                "preset_deviation_difference": [away.value, away.low, away.high],
                "preset_deviation": runs.condition_means(drift),
                "set_point_shift": shifts, "per_seed": runs.per_condition(grouped)})


def figure(store: Any, axes: Any) -> None:
    """The stored episode of the first seed, on and off: each need's level and set point as
    offsets from the preset set point."""
    effect = measure(store)
    done = store.runs(suite=suite_name(SUITE), status="done", agent=AGENT)
    first = min(run["seed"] for run in done)
    needs = _need_names(store)
    colours = ("#f0a030", "#1b5e9f", "#1a9e8f", "#c8553d")
    for run in (run for run in done if run["seed"] == first):
        condition = _condition(run)
        trace = store.trace(run["hash"], 0)
        band, start = trace["band"], trace["set_point"][0]
        steps = np.arange(trace["level"].shape[0])
        for k, name in enumerate(needs):
            colour = colours[k % len(colours)]
            axes.plot(steps, (trace["level"][:, k] - start[k]) / band[k], color=colour,
                      linewidth=0.6, alpha=0.6 if condition == ON else 0.9,
                      linestyle="-" if condition == ON else ":", label=f"{name} level, "
                      f"{condition}")
            if condition == ON:
                axes.plot(steps, (trace["set_point"][:, k] - start[k]) / band[k], color=colour,
                          linewidth=2.2, label=f"{name} set point, {ON}")
    axes.axhline(0.0, color="#2f6b3b", linestyle="--", linewidth=1, label="preset set point")
    axes.set_xlabel(f"step of seed {first}'s first evaluation episode (a year is 400 steps)")
    axes.set_ylabel("offset from the preset set point (band units)")
    away = effect.detail["preset_deviation_difference"]
    axes.set_title(f"{TITLE}: discounted deviation on - off {effect.interval_text}; "
                   f"|offset from the preset| {away[0]:+.3g} [{away[1]:+.3g}, {away[2]:+.3g}]",
                   fontsize=10)
    axes.legend(loc="lower left", fontsize=7, ncol=3)
