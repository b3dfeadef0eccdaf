"""Anticipatory regulation (Forewarn): hearing the horn, a learner deviates less in squalls.

Forewarn's horn sounds ``warning_delay`` = 10 steps before a cold squall of 20
steps; the oilskin keeps the squall out while worn and costs ``coat_cost`` band
of energy a step. The reactive set-point controller puts it on once the body is
half a band cold, so each squall chills it first. A homeostatic Q-learner
(Keramati & Gutkin 2014) that sees the time since the horn can learn to put the
oilskin on during the warning and off after the squall, correcting ahead of the
disturbance; the same learner without the horn can only react.

Why the suite sets ``meal`` = 0.15 and ``coat_cost`` = 0.15. Without timing,
the alternative to reacting is to wear the oilskin all the time. Worn for good
it costs c + d band of energy a step (c = ``coat_cost``, d = 0.02 the basal
drain of energy), and the most a body can take in is one meal a step, ``meal``
= m band. If m > c + d, eating more often pays for the oilskin and a learner
deaf to the horn can wear it always, which keeps the squalls out as well as
timing would. In a trial at the task's defaults (m = 0.5, c = 0.02; three needs,
6 bins, constant step 0.1, 100,000 steps, 4 seeds) the deaf learner wore it in
91 to 100 % of the calm steps and deviated 0.55 to 0.73 times as much as the
controller in the squalls, as the hearing one did (0.63 to 0.74). If m < c + d,
energy falls by at least c + d - m a step while the oilskin is worn, whatever
the agent eats (0.02 band a step here: 6 bands, the lethal bound, within 300
steps), so it must be worn only when needed, and only the horn says when that
is ahead of the cold.

The effect: per seed, the learner's ``anticipation`` against the controller,
mean deviation norm inside the squall windows of its evaluation episodes over
the controller's in the same episodes (the same evaluation seeds, and the weather
draws its numbers whatever the agents do, so both meet the same squalls; the
metric of :func:`needbench.benchmarks.metrics.anticipation` with the baseline
given as its number); the mean over seeds with its 95 % bootstrap interval,
expected < 1. The control: the learner deaf to the horn (horn and clock in one
bin), whose ratio must not lie below 1 (its interval includes 1 or lies above).
Any other agent added to the suite (e.g. ``ppo``, which sees every feature) is
measured the same way into ``detail["other_agents"]`` and drawn in the figure,
without entering ``met``.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np

from needbench.benchmarks.phenomena import Effect, suite_name
from needbench.benchmarks.phenomena import _runs as runs
from needbench.envs.errors import ConfigError

NAME = "anticipation"
TITLE = "Anticipatory regulation"
TASK = "needbench/Forewarn-v0"
SUITE = "phenomena/anticipation"

BASELINE = "setpoint-controller"
LEARNER = "tabular-q"
SWEEP = "agent.world_bins"
#: tabular-q's world bins (cue, time since the horn, oilskin) of the two conditions.
HEARING = json.dumps([1, 4, 2])
DEAF = json.dumps([1, 1, 2])
LABELS = {HEARING: "hears the horn", DEAF: "deaf to the horn"}
METRIC = "disturbance_deviation"


def _condition(run: dict[str, Any]) -> str | None:
    value = run["sweep"].get(SWEEP)
    return None if value is None else json.dumps(value)


def ratios(store: Any) -> tuple[dict[str, dict[int, float]], dict[int, float]]:
    """({condition: {seed: anticipation}}, {seed: the controller's disturbance deviation})."""
    suite = suite_name(SUITE)
    baseline = runs.scores(store, suite, METRIC, lambda run: BASELINE, agent=BASELINE)
    if len(baseline.get(BASELINE, {})) < 2:
        raise ConfigError("store", str(store.path), f"runs of {BASELINE} on {TASK} with "
                          "squalls for 2 or more seeds (the reactive baseline)")
    reference = baseline[BASELINE]
    learner = runs.scores(store, suite, METRIC, _condition, agent=LEARNER)
    runs.require(learner, (HEARING, DEAF), SWEEP)
    # Any other agent of the suite (e.g. ppo, which sees every feature), by its name.
    others = runs.scores(store, suite, METRIC, lambda run: None if run["agent"] in
                         (BASELINE, LEARNER) else run["agent"])
    return ({condition: {seed: value / reference[seed]
                         for seed, value in by_seed.items() if seed in reference}
             for condition, by_seed in {**learner, **others}.items()}, reference)


def oilskin_shares(store: Any) -> dict[str, dict[str, float]]:
    """Share of steps with the oilskin worn in calm, warning and squall steps, and of squalls
    that found it worn on their first step (``onset``), per agent and condition, over the
    stored trace (episode 0) of each run."""
    shares: dict[str, list[np.ndarray]] = {}
    for run in store.runs(suite=suite_name(SUITE), status="done"):
        try:
            trace = store.trace(run["hash"], 0)
        except KeyError:
            continue
        squall = trace["disturbance"].astype(bool)
        cue = trace["cue"].astype(bool)
        warning = np.zeros_like(squall)
        for start in np.flatnonzero(cue):
            warning[start:start + 10] = True
        warning &= ~squall
        worn = trace["prepared"].astype(bool)
        calm = ~squall & ~warning
        onset = squall & ~np.concatenate([[False], squall[:-1]])
        label = BASELINE if run["agent"] == BASELINE else \
            f"{LEARNER}, {LABELS.get(_condition(run), _condition(run))}"
        shares.setdefault(label, []).append(np.array(
            [worn[mask].mean() if mask.any() else np.nan
             for mask in (calm, warning, squall, onset)]))
    return {label: dict(zip(("calm", "warning", "squall", "onset"),
                            np.nanmean(values, axis=0).round(3).tolist(), strict=True))
            for label, values in shares.items()}


def measure(store: Any) -> Effect:
    by_condition, reference = ratios(store)
    hearing = runs.mean_interval(np.array(list(by_condition[HEARING].values())))
    deaf = runs.mean_interval(np.array(list(by_condition[DEAF].values())))
    others = {}
    for agent in sorted(set(by_condition) - {HEARING, DEAF}):
        if len(by_condition[agent]) >= 2:
            other = runs.mean_interval(np.array(list(by_condition[agent].values())))
            others[agent] = [other.value, other.low, other.high]
    return Effect(
        NAME, TASK,
        f"anticipation of {LEARNER} hearing the horn against {BASELINE}: deviation in "
        "squalls over the controller's, mean over seeds",
        hearing.value, hearing.low, hearing.high, "<", 1.0,
        detail={"deaf": [deaf.value, deaf.low, deaf.high], "other_agents": others,
                "per_seed": runs.per_condition(by_condition),
                "baseline_disturbance_deviation": {str(s): v for s, v in
                                                   sorted(reference.items())},
                "oilskin_worn": oilskin_shares(store)},
        control=f"deaf to the horn {deaf.value:.3g} [{deaf.low:.3g}, {deaf.high:.3g}], "
                "expected not < 1",
        control_met=deaf.high >= 1.0)


def figure(store: Any, axes: Any) -> None:
    effect = measure(store)
    by_condition, _ = ratios(store)
    shown = [(HEARING, f"{LEARNER}, {LABELS[HEARING]}"), (DEAF, f"{LEARNER}, {LABELS[DEAF]}")]
    shown += [(agent, f"{agent} (sees every feature)") for agent in effect.detail["other_agents"]]
    colours = ("#1b5e9f", "#c8553d", "#1a9e8f", "#6b4a94")
    for i, (condition, label) in enumerate(shown):
        colour = colours[i % len(colours)]
        values = np.array(list(by_condition[condition].values()))
        interval = runs.mean_interval(values)
        axes.plot(np.full(values.size, i) + np.linspace(-0.12, 0.12, values.size), values,
                  "o", color=colour, alpha=0.45, label=f"{label}: one seed")
        axes.errorbar([i + 0.3], [interval.value], yerr=[[interval.value - interval.low],
                                                         [interval.high - interval.value]],
                      color=colour, marker="s", capsize=5, label=f"{label}: mean, 95 % CI")
    axes.axhline(1.0, color="#4d4d4d", linestyle="--", linewidth=1,
                 label=f"{BASELINE} (reactive reference)")
    axes.set_xticks(range(len(shown)), [label for _, label in shown])
    axes.set_xlim(-0.5, len(shown) - 0.4)
    axes.set_ylabel(f"anticipation vs {BASELINE} (ratio, below 1 = ahead of it)")
    deaf = effect.detail["deaf"]
    axes.set_title(f"{TITLE} (Forewarn): hearing the horn {effect.interval_text}, deaf to it "
                   f"{deaf[0]:.3g} [{deaf[1]:.3g}, {deaf[2]:.3g}]", fontsize=11)
    axes.legend(loc="upper left", fontsize=8)
