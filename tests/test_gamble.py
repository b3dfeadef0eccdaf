"""Gamble: equal means, exact expected rewards, risk attitude as a function of deprivation."""

import math

import gymnasium as gym
import numpy as np
import pytest

import needbench.envs  # noqa: F401  (registers the tasks)
from needbench.envs.errors import ConfigError
from needbench.envs.physiology import BodyState
from needbench.envs.tasks.gamble import DEEP_NET, HANDLINE, REST, GambleEnv, GambleVectorEnv

#: A body whose catch acts at once and that does not drain, so one step moves
#: energy by exactly the dose and the expected rewards have a closed form.
INSTANT = {"energy": {"uptake_rate": math.inf, "drain": 0.0}}


def bodies(deficits):
    d = np.asarray(deficits, dtype=np.float64)[:, None]
    return BodyState(-d, np.zeros_like(d), np.zeros_like(d))


def margins(env, deficits):
    """E[r | safe] - E[r | risky] at each deficit, from the world's exact expectation."""
    values = env.core.world.expected_drive_reduction(env.core.drive, bodies(deficits))
    return values[:, HANDLINE] - values[:, DEEP_NET], values


def test_the_two_catches_have_the_same_mean():
    model = GambleEnv(safe_amount=0.7, risky_probability=0.25).core.world.model()
    means = np.sum(model["probabilities"][..., None] * model["effects"], axis=1)[:, 0]
    # Source: definition of the mean of a two-point lottery, 0.25 * 0.7 / 0.25 + 0.75 * 0 = 0.7.
    assert means[HANDLINE] == pytest.approx(0.7)
    assert means[DEEP_NET] == pytest.approx(0.7)
    assert means[REST] == 0.0


def test_expected_rewards_match_the_closed_form_for_an_instant_body():
    env = GambleEnv(need_overrides=INSTANT)
    deficits = np.array([0.0, 0.3, 1.0, 2.0, 4.5])
    _, values = margins(env, deficits)
    for d, row in zip(deficits, values, strict=True):
        # Source: Keramati & Gutkin (2014) drive with n = 3, m = 2 for one need,
        # D(h) = |h* - h|^(3/2), evaluated by hand for doses 0.5 (sure) and 1.5 (p = 1/3).
        safe = d ** 1.5 - abs(d - 0.5) ** 1.5
        risky = d ** 1.5 - (abs(d - 1.5) ** 1.5 / 3.0 + 2.0 * d ** 1.5 / 3.0)
        assert row[REST] == pytest.approx(0.0, abs=1e-12)
        assert row[HANDLINE] == pytest.approx(safe, rel=1e-12, abs=1e-12)
        assert row[DEEP_NET] == pytest.approx(risky, rel=1e-12, abs=1e-12)


def test_far_below_the_margin_follows_the_arrow_pratt_approximation():
    env = GambleEnv(need_overrides=INSTANT)
    for d in (4.0, 5.5):
        margin, _ = margins(env, [d])
        # Source: Pratt (1964) second-order risk premium: for f(x) = x^(3/2) the
        # certainty gap is about f''(d - mu) Var / 2 = 0.75 (d - 0.5)^(-1/2) * 0.5 / 2,
        # Var = p (1 - p) (1.5)^2 = 0.5 for the deep net.
        approximation = 0.1875 / math.sqrt(d - 0.5)
        assert margin[0] == pytest.approx(approximation, rel=0.05)


def test_registered_drive_prefers_the_sure_catch_at_every_deficit():
    env = GambleEnv()
    deficits = np.linspace(0.0, 5.9, 119)
    margin, _ = margins(env, deficits)
    # Source: Jensen's inequality: D is convex in the level and the next level is
    # affine in the dose, so E[D(next)] >= D(E[next]) and the sure catch pays more.
    assert np.all(margin > 0)
    # Deprivation weakens the preference far below the set point (margin ~ d^(-1/2)).
    far = deficits >= 1.0
    assert np.all(np.diff(margin[far]) < 0)
    assert margin[-1] < 0.5 * margin[deficits == 1.0][0]


def test_a_drive_concave_in_the_deviation_turns_risk_seeking_when_deprived():
    env = GambleEnv(need_overrides=INSTANT, drive_params={"n": 1, "m": 2})
    margin, _ = margins(env, [0.4, 3.0])
    # Source: D = |d|^(1/2) for one need, by hand: at d = 3 every outcome stays
    # below the set point and sqrt is concave there, so the risky net pays more:
    # -(2.5)^0.5 + (1.5)^0.5 / 3 + 2 (3)^0.5 / 3 = -0.0182.
    by_hand = -math.sqrt(2.5) + math.sqrt(1.5) / 3.0 + 2.0 * math.sqrt(3.0) / 3.0
    assert margin[1] == pytest.approx(by_hand, rel=1e-12)
    assert margin[1] < 0
    # Just below the set point the big haul overshoots and the sure line wins.
    assert margin[0] > 0
    # With the registered gut delay the flip survives (documented: -0.031 at d = 0.75).
    delayed = GambleEnv(drive_params={"n": 1, "m": 2})
    margin, _ = margins(delayed, [0.2, 0.75, 3.0])
    assert margin[0] > 0 and margin[1] < 0 and margin[2] < 0


def test_expectation_agrees_with_sampled_env_steps():
    n = 6000
    env = GambleVectorEnv(num_envs=n)
    env.reset(seed=3)
    start = BodyState(np.full((n, 1), -1.2), np.full((n, 1), 0.3), np.zeros((n, 1)))
    env.core.body = start
    expected = env.core.world.expected_drive_reduction(env.core.drive, start)[0]
    _, reward, _, _, info = env.step(np.full(n, DEEP_NET))
    hauls = info["outcome"] == 0
    # Source: binomial standard error sqrt(p (1 - p) / n) for the haul rate p = 1/3.
    assert abs(hauls.mean() - 1 / 3) < 4 * math.sqrt((1 / 3) * (2 / 3) / n)
    # Source: law of large numbers; 4 standard errors of the sample mean.
    assert abs(reward.mean() - expected[DEEP_NET]) < 4 * reward.std() / math.sqrt(n)
    assert info["risky"].all()
    assert np.allclose(info["intake"][hauls, 0], 1.5) and np.allclose(info["intake"][~hauls], 0)


def test_greedy_agent_picks_the_sure_catch_unless_the_drive_is_concave():
    # A one-step greedy agent on the exact expectation, over 32 deprived starts.
    counts = {}
    for params in ({}, {"n": 1, "m": 2}):
        env = GambleVectorEnv(num_envs=32, max_steps=60, drive_params=params)
        env.reset(seed=11)
        chosen = []
        for _ in range(60):
            values = env.core.world.expected_drive_reduction(env.core.drive, env.core.body)
            actions = np.argmax(values, axis=1)
            chosen.append(actions)
            env.step(actions)
        chosen = np.concatenate(chosen)
        counts[bool(params)] = (np.sum(chosen == HANDLINE), np.sum(chosen == DEEP_NET))
    safe, risky = counts[False]
    # Source: Jensen's inequality (see above): the convex drive never favours the net.
    assert risky == 0 and safe > 100
    safe, risky = counts[True]
    assert risky > safe  # the concave drive gambles when deprived


@pytest.mark.parametrize(("kwargs", "field"), [
    ({"need": "salt"}, "need"),
    ({"safe_amount": 0.0}, "safe_amount"),
    ({"safe_amount": float("nan")}, "safe_amount"),
    ({"risky_probability": 1.0}, "risky_probability"),
    ({"risky_probability": 0.0}, "risky_probability"),
    ({"risky_probabilty": 0.5}, "risky_probabilty"),
])
def test_bad_parameters_name_the_field(kwargs, field):
    with pytest.raises(ConfigError) as caught:
        gym.make("needbench/Gamble-v0", **kwargs)
    assert caught.value.path == field


def test_noisy_body_refuses_an_exact_expectation():
    env = GambleEnv(need_overrides={"energy": {"noise": 0.1}})
    env.reset(seed=0)
    with pytest.raises(ConfigError, match="noise"):
        env.core.world.expected_drive_reduction(env.core.drive, env.core.body)


def test_start_spans_deprivations_and_another_need_can_be_gambled():
    env = GambleVectorEnv(num_envs=200)
    _, info = env.reset(seed=0)
    assert info["level"].min() < -2.5 and info["level"].max() > 0.0
    assert np.all((info["level"] >= -3.0) & (info["level"] <= 0.5))
    env = GambleEnv(needs=("water",), need="water", need_overrides={})
    env.reset(seed=0)
    _, _, _, _, info = env.step(HANDLINE)
    assert info["intake"][0] == pytest.approx(0.5)
