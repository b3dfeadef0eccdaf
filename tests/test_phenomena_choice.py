"""The choice phenomena: need-dependent valuation (Menu) and risk attitude against
deprivation (Gamble). Each suite is run at its own budget and its effect checked with
the 95 % bootstrap interval of its module's ``measure``; the one-step values behind each
expectation are checked against the drive formula evaluated outside the project.

``python -m pytest tests/test_phenomena_choice.py -s`` prints the effects quoted in the README.
"""

from __future__ import annotations

import math

import gymnasium as gym
import numpy as np
import pytest
from scipy import stats as scipy_stats
from scipy.spatial.distance import minkowski

from needbench.agents.planner import ExactPlannerAgent
from needbench.benchmarks import stats
from needbench.benchmarks.cli import builtin_suites, main
from needbench.benchmarks.phenomena import risk, valuation
from needbench.benchmarks.store import Store
from needbench.envs.errors import ConfigError
from needbench.envs.tasks.gamble import DEEP_NET, HANDLINE


def run_suite(name: str, folder) -> Store:
    assert main(["run", name, "--out", str(folder), "--workers", "2", "--quiet"]) == 0
    return Store(folder / "results.sqlite3")


def report(effect) -> None:
    print(f"{effect.name}: {effect.quantity}: {effect.value:+.3f} "
          f"[{effect.low:+.3f}, {effect.high:+.3f}], expected {effect.expectation}")


def drive(deviation, n: float = 3.0, m: float = 2.0) -> float:
    """D = (sum_i |h*_i - h_i|^n)^(1/m), as the n-Minkowski norm to the power n/m."""
    # Source: Keramati & Gutkin 2014, the homeostatic drive; the norm by scipy.
    return minkowski(np.asarray(deviation, float), np.zeros(len(deviation)), p=n) ** (n / m)


def test_both_suites_are_built_in():
    assert {valuation.SUITE, risk.SUITE} <= set(builtin_suites())


def test_measure_refuses_a_store_without_the_suite(tmp_path):
    with Store(tmp_path / "empty.sqlite3") as store:
        for module in (valuation, risk):
            with pytest.raises(ConfigError, match=module.SUITE):
                module.measure(store)


# --- need-dependent valuation ---------------------------------------------------------


def test_meltwater_is_worth_more_to_a_thirsty_body():
    """Menu's one-step reward of meltwater (its lattice model, which runs the task's own
    transition and reward channel) against the drive computed by scipy."""
    env = gym.make(valuation.TASK)
    model = env.unwrapped.core.finite_model()
    item = env.unwrapped.core.world.item_names.index(valuation.ITEM)
    drains = np.array([0.02, 0.03])  # the abstract preset's energy and water drains
    dose = np.array([0.0, 0.8])  # meltwater: 0.8 band of water, at once
    rewards = {}
    for state in ((-0.5, -2.0), (-0.5, 0.5)):
        index = int(np.argmin(np.abs(model.levels - state).sum(axis=1)))
        assert np.allclose(model.levels[index], state)
        after = np.array(state) + dose - drains
        # Source: the drive formula above, evaluated with scipy.spatial.distance.minkowski.
        expected = drive(state) - drive(after)
        assert model.reward[index, item] == pytest.approx(expected, abs=1e-9)
        rewards[state] = expected
    # The figures of the module docstring.
    assert rewards[(-0.5, -2.0)] == pytest.approx(1.436, abs=5e-4)
    assert rewards[(-0.5, 0.5)] == pytest.approx(-0.980, abs=5e-4)


@pytest.mark.slow
def test_valuation_suite_shows_need_dependent_choice(tmp_path):
    with run_suite(valuation.SUITE, tmp_path / "out") as store:
        effect = valuation.measure(store)
        report(effect)
        print("  per seed, deprived:", np.round(effect.detail["deprived_share"], 2).tolist(),
              "sated:", np.round(effect.detail["sated_share"], 2).tolist(),
              "exact planner:", effect.detail["exact_planner"])
        assert effect.met
        assert not effect.detail["seeds_left_out"]
        # The exact optimum on the same task draws the same line.
        exact = effect.detail["exact_planner"]
        assert exact["deprived_share"] > exact["sated_share"]
        from matplotlib.figure import Figure

        axes = Figure().subplots()
        valuation.figure(store, axes)
        assert axes.get_xlabel() and axes.get_ylabel() and axes.get_legend() is not None


# --- risk attitude ---------------------------------------------------------------------


def hold_variant(n: float, m: float) -> dict:
    """The suite's Gamble variant: immediate delivery, drain = the sure catch."""
    return {"drive_params": {"n": n, "m": m},
            "need_overrides": {"energy": {"uptake_rate": math.inf, "drain": 0.5,
                                          "initial_low": -5.0, "initial_high": -2.5}}}


def planner_margins(n: float, m: float, gamma: float) -> dict[float, float]:
    """Q(handline) - Q(deep net) of the exact planner at deficits 1..5 bands."""
    env = gym.make(risk.TASK, **hold_variant(n, m))
    planner = ExactPlannerAgent(env.observation_space, env.action_space, gamma=gamma).learn(env)
    levels = env.unwrapped.core.finite_model().levels[:, 0]
    margins = {}
    for deficit in (1.0, 2.0, 3.0, 4.0, 5.0):
        index = int(np.argmin(np.abs(levels + deficit)))
        assert levels[index] == pytest.approx(-deficit)
        q = planner.action_values[index]
        margins[deficit] = float(q[HANDLINE] - q[DEEP_NET])
    return margins


@pytest.mark.parametrize("n, m", [(3, 2), (1, 1), (1, 2)])
def test_one_step_margin_is_jensens_gap(n, m):
    """At discount 0 the planner's margin is E[r | safe] - E[r | risky] of the hold variant:
    the sure catch leaves the deficit d where it is (r = 0); the net takes it to d - q + 0.5."""
    catch = scipy_stats.rv_discrete(values=([0, 1], [2 / 3, 1 / 3]))  # 1: the 1.5-band haul
    margins = planner_margins(n, m, gamma=0.0)
    for deficit, margin in margins.items():
        # Source: scipy.stats.rv_discrete.expect over the deep net's two outcomes.
        reward = np.vectorize(lambda k, d=deficit: drive([d], n, m)
                              - drive([d - 1.5 * k + 0.5], n, m))
        risky = catch.expect(reward)
        assert margin == pytest.approx(0.0 - risky, abs=1e-9)
    values = np.array(list(margins.values()))
    if n > m:  # risk averse at every deficit, less so the deeper
        assert np.all(values > 0) and np.all(np.diff(values) < 0)
        assert values == pytest.approx([0.225, 0.140, 0.112, 0.096, 0.085], abs=1e-3)
    elif n == m:  # linear drive below the set point: no preference
        assert np.all(np.abs(values) < 1e-9)
    else:  # concave drive: risk seeking
        assert np.all(values < 0)


def test_discounted_policy_keeps_the_signs():
    """At the suite's discount (0.9) the exact policy casts the net exactly when the drive is
    concave, for every deficit from 1 to 5 bands; with n = m the preference nearly vanishes."""
    convex, linear, concave = (planner_margins(n, m, 0.9) for n, m in ((3, 2), (1, 1), (1, 2)))
    assert all(v > 0 for v in convex.values())
    assert all(v < 0 for v in concave.values())
    assert max(abs(v) for v in linear.values()) < 0.01 * min(convex.values())


@pytest.mark.slow
def test_risk_suite_shows_risk_aversion_with_a_convex_drive(tmp_path):
    with run_suite(risk.SUITE, tmp_path / "out") as store:
        effect = risk.measure(store)
        report(effect)
        learned = effect.detail[risk.AGENT]
        exact = effect.detail[risk.EXACT]
        for label in learned:
            print(f"  {risk.AGENT} {label}: deep-net share per seed",
                  np.round(learned[label]["risky_share"], 2).tolist())
            print(f"  {risk.EXACT} {label}: deep-net share per seed",
                  np.round(exact[label]["risky_share"], 2).tolist())
        assert effect.met
        convex, concave = (f"n={d['n']}, m={d['m']}" for d in (risk.CONVEX, risk.CONCAVE))
        # The learner is risk averse under the convex drive: below the risk-neutral 1/2.
        share = np.array(learned[convex]["risky_share"])
        averse = stats.bootstrap_ci(share, stats.mean, np.random.default_rng(0))
        print(f"  {risk.AGENT} {convex}: mean deep-net share {averse.value:.3f} "
              f"[{averse.low:.3f}, {averse.high:.3f}]")
        assert averse.high < 0.5
        # The exact policy: never the net with n = 3, m = 2, always with n = 1, m = 2.
        assert all(s == 0.0 for s in exact[convex]["risky_share"])
        assert all(s == 1.0 for s in exact[concave]["risky_share"])
        policy = effect.detail["exact_policy"]
        deep = [r for d, r in zip(policy[concave]["deficit"], policy[concave]["risky"],
                                  strict=True) if 1.0 <= d <= 5.0]
        assert deep and all(r == 1.0 for r in deep)
        from matplotlib.figure import Figure

        axes = Figure().subplots()
        risk.figure(store, axes)
        assert axes.get_xlabel() and axes.get_ylabel() and axes.get_legend() is not None
