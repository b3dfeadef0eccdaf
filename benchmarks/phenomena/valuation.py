"""Need-dependent valuation (Menu): an item is chosen when its need is deprived, not when sated.

Expected (Keramati & Gutkin 2014): with the homeostatic reward
r_t = D(h_t) - D(h_{t+1}) the worth of an outcome is not fixed but depends on
the internal state it meets. On Menu (two needs, energy e and water w in
band units, D = (|e|^3 + |w|^3)^(1/2), items act at once, water drains 0.03
and energy 0.02 a step) a drink of meltwater (+0.8 water) from
(e, w) = (-0.5, -2) removes

    D(-0.5, -2) - D(-0.52, -1.23) = 2.850 - 1.415 = +1.436

drive, while the same drink from (-0.5, +0.5), on the set point's other side,
adds drive (overshoot): D(-0.5, 0.5) - D(-0.52, 1.27) = 0.500 - 1.480 = -0.980,
below resting there (+0.006). So a learner that maximises this reward should
value meltwater highly when water is deprived and below rest when water is
sated, with energy the same; these one-step figures are checked against the
task's own lattice model in ``tests/test_phenomena_choice.py``.

Measured on the runs of ``phenomena/valuation`` (tabular-q, internal state
only): in each run's stored evaluation trace, among the steps with energy in
its comfort band (|e| <= 1), the share of steps on which the greedy policy
took meltwater at a water-deprived state (w <= -1 band) minus the share at a
water-sated state (w >= 0). The hiker arrives thirsty, so every trace passes
through both states. The effect is the mean over seeds of that paired
difference with its 95 % stratified bootstrap interval
(:func:`needbench.benchmarks.stats.bootstrap_ci`); expected > 0. The exact
planner's runs in the same suite are read the same way, as a reference.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from needbench.benchmarks import stats
from needbench.benchmarks.phenomena import Effect
from needbench.benchmarks.phenomena import _runs as runs_of_suite
from needbench.benchmarks.store import Store
from needbench.envs.errors import ConfigError
from needbench.envs.tasks.menu import HUT_PANTRY, MenuWorld

NAME = "valuation"
TITLE = "Need-dependent valuation"
TASK = "needbench/Menu-v0"
SUITE = "phenomena/valuation"
#: The suite's own name (its ``[suite] name``), as runs record it.
SUITE_NAME = "phenomena-valuation"
#: The learner whose choices carry the effect.
AGENT = "tabular-q"
#: The item, the need it serves and the other need held the same.
ITEM, NEED, OTHER = "meltwater", "water", "energy"
#: Water deviation (band units) at or below which water counts as deprived.
DEPRIVED = -1.0
#: Water deviation at or above which water counts as sated.
SATED = 0.0
#: Largest |energy deviation| of a counted step: energy inside its comfort band.
OTHER_LIMIT = 1.0

_ITEM_INDEX = [name for name, _ in HUT_PANTRY].index(ITEM)
_NEED_INDEX = MenuWorld.default_needs.index(NEED)
_OTHER_INDEX = MenuWorld.default_needs.index(OTHER)


def traced_runs(store: Store, agent: str | None = None) -> list[tuple[dict[str, Any], dict]]:
    """(run, trace of its first evaluation episode) for each done run of ``agent``."""
    return runs_of_suite.traced_runs(store, SUITE_NAME, TASK, agent, builtin=SUITE)


def deviations(trace: dict) -> np.ndarray:
    """(T, K) deviations (h - h*) / band of the states the T actions were taken in."""
    return (trace["level"][:-1] - trace["set_point"][:-1]) / trace["band"]


def choice_shares(trace: dict) -> tuple[float, float, int, int]:
    """Share of meltwater choices at water-deprived and water-sated steps (energy in band),
    and the number of steps of each kind; a share is NaN when there is no such step."""
    deviation = deviations(trace)
    action = np.asarray(trace["action"]).reshape(-1)
    same_other = np.abs(deviation[:, _OTHER_INDEX]) <= OTHER_LIMIT
    deprived = same_other & (deviation[:, _NEED_INDEX] <= DEPRIVED)
    sated = same_other & (deviation[:, _NEED_INDEX] >= SATED)
    took = action == _ITEM_INDEX
    share = [float(np.mean(took[mask])) if mask.any() else float("nan")
             for mask in (deprived, sated)]
    return share[0], share[1], int(deprived.sum()), int(sated.sum())


def _by_seed(store: Store, agent: str) -> dict[int, tuple[float, float, int, int]]:
    return {run["seed"]: choice_shares(trace) for run, trace in traced_runs(store, agent)}


def measure(store: Store) -> Effect:
    """Meltwater choice share, water-deprived minus water-sated, paired by seed (tabular-q)."""
    shares = _by_seed(store, AGENT)
    paired = {seed: s for seed, s in shares.items() if s[2] and s[3]}
    if len(paired) < 2:
        raise ConfigError("store", str(store.path),
                          f"at least 2 {AGENT} runs whose trace has both water-deprived and "
                          f"water-sated steps; {len(paired)} have")
    seeds = sorted(paired)
    difference = np.array([paired[s][0] - paired[s][1] for s in seeds])
    estimate = stats.bootstrap_ci(difference, stats.mean, np.random.default_rng(0))
    detail: dict[str, Any] = {
        "seeds": seeds,
        "deprived_share": [paired[s][0] for s in seeds],
        "sated_share": [paired[s][1] for s in seeds],
        "deprived_steps": [paired[s][2] for s in seeds],
        "sated_steps": [paired[s][3] for s in seeds],
        "seeds_left_out": sorted(set(shares) - set(paired)),
    }
    reference = [s for s in _reference_shares(store) if s[2] and s[3]]
    if reference:
        detail["exact_planner"] = {
            "deprived_share": float(np.mean([s[0] for s in reference])),
            "sated_share": float(np.mean([s[1] for s in reference]))}
    return Effect(
        name=NAME, task=TASK,
        quantity=(f"share of {ITEM} choices at water <= {DEPRIVED:g} band minus at water >= "
                  f"{SATED:g} (energy in band), {AGENT}"),
        value=estimate.value, low=estimate.low, high=estimate.high, expected=">",
        threshold=0.0, detail=detail)


def _reference_shares(store: Store) -> list[tuple[float, float, int, int]]:
    """The exact planner's shares (none when the store holds no planner runs)."""
    if not store.runs(suite=SUITE_NAME, task_id=TASK, agent="exact-planner", status="done"):
        return []
    return [choice_shares(trace) for _, trace in traced_runs(store, "exact-planner")]


#: Water-deviation bins of the figure, band units.
FIGURE_BINS = np.arange(-4.0, 2.01, 0.5)


def share_by_water(traces: list[dict]) -> tuple[np.ndarray, np.ndarray]:
    """Meltwater choice share in each water-deviation bin of :data:`FIGURE_BINS` (energy
    in band), pooled over traces; NaN where no step fell; and the step counts."""
    water, took = [], []
    for trace in traces:
        deviation = deviations(trace)
        keep = np.abs(deviation[:, _OTHER_INDEX]) <= OTHER_LIMIT
        water.append(deviation[keep, _NEED_INDEX])
        took.append(np.asarray(trace["action"]).reshape(-1)[keep] == _ITEM_INDEX)
    water, took = np.concatenate(water), np.concatenate(took)
    index = np.digitize(water, FIGURE_BINS) - 1
    inside = (index >= 0) & (index < len(FIGURE_BINS) - 1)
    counts = np.bincount(index[inside], minlength=len(FIGURE_BINS) - 1)
    chosen = np.bincount(index[inside], weights=took[inside], minlength=len(FIGURE_BINS) - 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(counts > 0, chosen / np.maximum(counts, 1), np.nan), counts


def figure(store: Store, axes) -> None:
    """Meltwater choice share against the water deviation, per agent, pooled over seeds."""
    centres = (FIGURE_BINS[:-1] + FIGURE_BINS[1:]) / 2
    agents = sorted({run["agent"] for run, _ in traced_runs(store)})
    for agent in agents:
        share, _ = share_by_water([trace for _, trace in traced_runs(store, agent)])
        axes.plot(centres, share, marker="o", label=agent)
    axes.axvspan(FIGURE_BINS[0], DEPRIVED, color="tab:blue", alpha=0.08, label="water deprived")
    axes.axvspan(SATED, FIGURE_BINS[-1], color="tab:orange", alpha=0.08, label="water sated")
    axes.set_xlabel("water deviation at the choice (h - h*) / band, band units")
    axes.set_ylabel(f"share of steps choosing {ITEM}")
    axes.set_ylim(-0.05, 1.05)
    axes.set_title("Need-dependent valuation (Menu): energy in its band")
    axes.legend()
