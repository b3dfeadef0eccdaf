"""Risk attitude against deprivation (Gamble): the sure catch under a convex drive, the gamble
under a concave one.

The exact policy. The exact planner does not apply to Gamble-v0 as shipped
(energy reaches the body through the gut, which the lattice model leaves
out), and neither Gamble-v0's dynamics nor that rule change here. Gamble's
common ``need_overrides`` keyword already makes delivery immediate
(``uptake_rate = inf``, as Menu's default does); the suite uses it, so the
planner's finite model (``needbench.envs.lattice``, built from the task's own
transition and reward channel) applies to that variant with no new code.
That was chosen over a separate dynamic programme here because the lattice
model and the planner are already checked against the task's step.

The hold variant. The suite also sets energy's drain to 0.5 band a step, the
sure catch: the handline holds the deficit where it is and the deep net (1.5
bands one time in three, nothing otherwise) turns it into a mean-zero random
walk. Each choice is then a pure lottery over the next deficit.

Expected, derived. One need, deficit d = (h* - h)/band, drive
D(d) = (|d|^n)^(1/m) = d^p with p = n/m. A dose q moves the deficit to
d - q + 0.5, so the reward r(q) = D(d) - D(d - q + 0.5) has
r''(q) = -D''(d - q + 0.5), and D''(y) = p (p - 1) y^(p - 2):

* n > m (p > 1): D is convex, r is concave in the dose, and by Jensen's
  inequality E[r(risky)] < r(E dose) = r(safe): the sure catch is preferred
  at every deficit (risk aversion). The margin, exactly
  E[r | safe] - E[r | risky] = D(d - 1)/3 + 2 D(d + 0.5)/3 - D(d), is for
  n = 3, m = 2: +0.225, +0.140, +0.112, +0.096, +0.085 at d = 1, 2, 3, 4, 5.
  It shrinks with the deficit (to second order it is D''(d) Var(q) / 2,
  proportional to d^(p - 2) = d^(-1/2)), so deprivation weakens risk
  aversion but never turns it into risk seeking.
* n = m (p = 1): D is linear below the set point and the margin is exactly 0
  once no outcome crosses it (d >= 1): the preference vanishes.
* n < m (p < 1), e.g. n = 1, m = 2: D is concave below the set point, r is
  convex in the dose and the deep net is preferred: margins -0.184, -0.027,
  -0.013, -0.008, -0.006 at d = 1..5 (risk seeking, weaker the deeper).

These are one-step margins; the planner at the suite's discount (0.9)
keeps every sign for d >= 1 (``tests/test_phenomena_choice.py`` checks the
one-step margins against the formula and the discounted policy's signs).

Measured on the runs of ``phenomena/risk``: in each run's stored evaluation
trace, among the catches (handline or deep net) taken at a deficit of at least
1 band, the share that were the deep net. The effect is the mean over seeds of
the learner's (tabular-q) share with n = 3, m = 2 minus its share with n = 1,
m = 2, paired by seed (both start the evaluation at the same deficit), with
its 95 % stratified bootstrap interval; expected < 0. ``detail`` holds each
setting's shares and the exact policy's choice at every lattice deficit.
"""

from __future__ import annotations

from typing import Any

import gymnasium as gym
import numpy as np

from needbench.agents.planner import ExactPlannerAgent
from needbench.benchmarks import stats
from needbench.benchmarks.phenomena import Effect
from needbench.benchmarks.phenomena import _runs as runs_of_suite
from needbench.benchmarks.store import Store
from needbench.envs.errors import ConfigError
from needbench.envs.tasks.gamble import DEEP_NET, HANDLINE, REST

NAME = "risk"
TITLE = "Risk attitude against deprivation"
TASK = "needbench/Gamble-v0"
SUITE = "phenomena/risk"
#: The suite's own name (its ``[suite] name``), as runs record it.
SUITE_NAME = "phenomena-risk"
#: The learner whose choices carry the effect, and the exact reference.
AGENT, EXACT = "tabular-q", "exact-planner"
#: Drive exponents inside the region n > m > 1, and the counterexample outside it.
CONVEX = {"n": 3, "m": 2}
CONCAVE = {"n": 1, "m": 2}
#: Smallest deficit (band units) of a counted catch.
MIN_DEFICIT = 1.0


def _label(drive: dict[str, Any]) -> str:
    return f"n={drive['n']:g}, m={drive['m']:g}"


def _drive_of(run: dict[str, Any]) -> dict[str, Any]:
    """The run's drive exponents (Gamble's default homeostatic drive: n = 3, m = 2)."""
    params = run["config"]["task"]["kwargs"].get("drive_params") or {}
    return {"n": params.get("n", 3), "m": params.get("m", 2)}


def traced_runs(store: Store, agent: str) -> list[tuple[dict[str, Any], dict]]:
    """(run, trace of its first evaluation episode) for each done run of ``agent``."""
    return runs_of_suite.traced_runs(store, SUITE_NAME, TASK, agent, builtin=SUITE)


def deficits(trace: dict) -> np.ndarray:
    """(T,) energy deficit (h* - h) / band at each of the T choices (one need)."""
    return ((trace["set_point"][:-1] - trace["level"][:-1]) / trace["band"])[:, 0]


def risky_share(trace: dict, min_deficit: float = MIN_DEFICIT) -> tuple[float, int]:
    """Share of deep-net casts among the catches at a deficit >= ``min_deficit``, and how
    many catches there were (NaN share when none)."""
    action = np.asarray(trace["action"]).reshape(-1)
    catch = (action != REST) & (deficits(trace) >= min_deficit)
    if not catch.any():
        return float("nan"), 0
    return float(np.mean(action[catch] == DEEP_NET)), int(catch.sum())


def _shares(store: Store, agent: str) -> dict[str, dict[int, tuple[float, int]]]:
    """{drive label: {seed: (share, catches)}}."""
    shares: dict[str, dict[int, tuple[float, int]]] = {}
    for run, trace in traced_runs(store, agent):
        shares.setdefault(_label(_drive_of(run)), {})[run["seed"]] = risky_share(trace)
    return shares


def exact_policy(task_kwargs: dict[str, Any], gamma: float) -> dict[str, list[float]]:
    """The exact planner's choice at every lattice deficit of the task variant.

    Returns ``deficit`` (band units, deepest first) and ``risky``: 1 where the
    optimal choice is the deep net, 0 the handline, NaN rest; ``margin``:
    Q(handline) - Q(deep net).
    """
    env = gym.make(TASK, **task_kwargs)
    try:
        planner = ExactPlannerAgent(env.observation_space, env.action_space, gamma=gamma)
        planner.learn(env)
        model = env.unwrapped.core.finite_model()
    finally:
        env.close()
    live = ~model.terminal
    deficit = ((model.set_point - model.levels) / model.band)[:, 0]
    policy = planner.policy[live]
    q = planner.action_values[live]
    risky = np.where(policy == DEEP_NET, 1.0, np.where(policy == HANDLINE, 0.0, np.nan))
    return {"deficit": deficit.tolist(), "risky": risky.tolist(),
            "margin": (q[:, HANDLINE] - q[:, DEEP_NET]).tolist()}


def measure(store: Store) -> Effect:
    """Deep-net share of the learner, n = 3, m = 2 minus n = 1, m = 2, paired by seed."""
    learned = _shares(store, AGENT)
    convex, concave = learned.get(_label(CONVEX), {}), learned.get(_label(CONCAVE), {})
    seeds = sorted(s for s in set(convex) & set(concave) if convex[s][1] and concave[s][1])
    if len(seeds) < 2:
        raise ConfigError("store", str(store.path),
                          f"at least 2 seeds with {AGENT} runs at both {_label(CONVEX)} and "
                          f"{_label(CONCAVE)} that cast at a deficit >= {MIN_DEFICIT:g}; "
                          f"{len(seeds)} have")
    difference = np.array([convex[s][0] - concave[s][0] for s in seeds])
    estimate = stats.bootstrap_ci(difference, stats.mean, np.random.default_rng(0))
    detail: dict[str, Any] = {"seeds": seeds}
    for agent, shares in ((AGENT, learned), (EXACT, _optional_shares(store, EXACT))):
        detail[agent] = {label: {"seeds": sorted(by_seed),
                                 "risky_share": [by_seed[s][0] for s in sorted(by_seed)],
                                 "catches": [by_seed[s][1] for s in sorted(by_seed)]}
                         for label, by_seed in shares.items()}
    detail["exact_policy"] = _exact_policies(store)
    return Effect(
        name=NAME, task=TASK,
        quantity=(f"share of deep-net casts among catches at a deficit >= {MIN_DEFICIT:g} "
                  f"band, {_label(CONVEX)} minus {_label(CONCAVE)}, {AGENT}"),
        value=estimate.value, low=estimate.low, high=estimate.high, expected="<",
        threshold=0.0, detail=detail)


def _optional_shares(store: Store, agent: str) -> dict[str, dict[int, tuple[float, int]]]:
    if not store.runs(suite=SUITE_NAME, task_id=TASK, agent=agent, status="done"):
        return {}
    return _shares(store, agent)


def _exact_policies(store: Store) -> dict[str, dict[str, list[float]]]:
    """The exact policy over the lattice for each drive setting of the planner's runs."""
    policies = {}
    for run in store.runs(suite=SUITE_NAME, task_id=TASK, agent=EXACT, status="done"):
        label = _label(_drive_of(run))
        if label not in policies:
            gamma = run["config"]["agent"]["hyperparameters"].get("gamma", 0.99)
            policies[label] = exact_policy(run["config"]["task"]["kwargs"], gamma)
    return policies


#: Deficit bins of the figure, band units.
FIGURE_BINS = np.arange(0.0, 6.01, 0.5)


def figure(store: Store, axes) -> None:
    """Deep-net share among catches against the deficit: learned (points, pooled over
    seeds) and exact (lines), for each drive setting."""
    centres = (FIGURE_BINS[:-1] + FIGURE_BINS[1:]) / 2
    colours = {_label(CONVEX): "tab:blue", _label(CONCAVE): "tab:red"}
    by_drive: dict[str, list[dict]] = {}
    for run, trace in traced_runs(store, AGENT):
        by_drive.setdefault(_label(_drive_of(run)), []).append(trace)
    for label, traces in sorted(by_drive.items()):
        deficit = np.concatenate([deficits(t) for t in traces])
        action = np.concatenate([np.asarray(t["action"]).reshape(-1) for t in traces])
        catch = action != REST
        index = np.digitize(deficit[catch], FIGURE_BINS) - 1
        inside = (index >= 0) & (index < len(centres))
        counts = np.bincount(index[inside], minlength=len(centres))
        risky = np.bincount(index[inside], weights=action[catch][inside] == DEEP_NET,
                            minlength=len(centres))
        share = np.where(counts > 0, risky / np.maximum(counts, 1), np.nan)
        axes.plot(centres, share, "o", color=colours.get(label), label=f"{AGENT}, {label}")
    for label, policy in sorted(_exact_policies(store).items()):
        order = np.argsort(policy["deficit"])
        axes.step(np.asarray(policy["deficit"])[order], np.asarray(policy["risky"])[order],
                  where="mid", color=colours.get(label), label=f"{EXACT}, {label}")
    axes.axhline(0.5, color="grey", linestyle=":", label="risk neutral (1/2)")
    axes.set_xlim(0.0, 6.0)
    axes.set_ylim(-0.05, 1.05)
    axes.set_xlabel("energy deficit at the choice (h* - h) / band, band units")
    axes.set_ylabel("share of catches cast with the deep net")
    axes.set_title("Risk attitude against deprivation (Gamble, hold variant)")
    axes.legend()
