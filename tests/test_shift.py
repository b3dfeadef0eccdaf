"""Shift: the body's physics at work and at rest, and the stability-versus-return trade-off."""

import math

import gymnasium as gym
import numpy as np
import pytest
from scipy.optimize import brentq

import needbench.envs  # noqa: F401  (registers the tasks)
from needbench.envs.errors import ConfigError
from needbench.envs.tasks.shift import DRINK, EAT, SHADE, WORK, ShiftEnv, ShiftVectorEnv


def always_work(observations, k):
    return np.full(observations.shape[0], WORK)


def tend_needs(observations, k, threshold=0.5):
    """Tend the most urgent need once it is ``threshold`` band out; work otherwise."""
    deviation = observations[:, :k]
    urgency = np.stack([-deviation[:, 0], -deviation[:, 1], deviation[:, 2]], axis=1)
    remedy = np.array([EAT, DRINK, SHADE])[np.argmax(urgency, axis=1)]
    return np.where(urgency.max(axis=1) > threshold, remedy, WORK)


def score(policy, copies=16, seed=0, **kwargs):
    """Per-copy extrinsic return, total return, time in band and survival over one shift."""
    env = ShiftVectorEnv(num_envs=copies, **kwargs)
    observations, _ = env.reset(seed=seed)
    k = env.core.physiology.num_needs
    extrinsic, total, in_band = np.zeros(copies), np.zeros(copies), np.zeros(copies)
    alive = np.ones(copies, bool)
    for _ in range(env.core.max_steps):
        observations, reward, terminated, _, info = env.step(policy(observations, k))
        extrinsic += info["reward_task"]
        total += reward
        in_band += info["in_band"]
        alive &= ~terminated
    return {"extrinsic": extrinsic, "total": total, "time_in_band": in_band / env.core.max_steps,
            "alive": alive}


def test_working_pays_more_but_tending_keeps_the_body_in_band():
    work, tend = score(always_work), score(tend_needs)
    # Measured: always working 100 task reward and 19 % of steps in band (per
    # copy 12-34 %); the tending rule 66.4 and 100 %. Both survive the shift.
    assert work["alive"].all() and tend["alive"].all()
    assert np.all(work["extrinsic"] == 100.0)
    assert np.all(tend["extrinsic"] < 80.0) and np.all(tend["extrinsic"] > 50.0)
    assert work["time_in_band"].mean() < 0.25 and np.all(work["time_in_band"] < 0.4)
    assert np.all(tend["time_in_band"] > 0.95)


def test_task_weight_decides_which_rule_scores_higher():
    results = {}
    for weight in (1.0, 0.1):
        work = score(always_work, task_weight=weight)["total"].mean()
        tend = score(tend_needs, task_weight=weight)["total"].mean()
        results[weight] = (work, tend)
    # Measured: at task_weight 1, 86.6 against 66.4; at 0.1, -3.4 against 6.6.
    assert results[1.0][0] > results[1.0][1] + 10.0
    assert results[0.1][1] > results[0.1][0] + 5.0
    # Source: the return is linear in the weight, r = w * task + internal, so the
    # totals at two weights fix the line: internal = total - w * extrinsic.
    for policy in (always_work, tend_needs):
        at_one, at_tenth = score(policy, task_weight=1.0), score(policy, task_weight=0.1)
        assert np.allclose(at_one["total"] - at_one["extrinsic"],
                           at_tenth["total"] - 0.1 * at_tenth["extrinsic"], atol=1e-9)


def test_registered_weights_put_the_trade_off_at_the_band_edge():
    env = gym.make("needbench/Shift-v0")
    core = env.unwrapped.core
    assert (core.reward_channel.task_weight, core.reward_channel.drive_weight) == (1.0, 1.0)
    meal = core.world.meal
    set_point = np.zeros(3)

    def meal_minus_pay(deficit):
        level = np.array([-deficit, 0.0, 0.0])
        return (core.drive(level, set_point) - core.drive(level + [meal, 0, 0], set_point)
                - core.world.pay)

    deficit = brentq(meal_minus_pay, 0.5, 5.0)
    # Source: one need alone, D = d^(3/2) (Keramati & Gutkin 2014, n = 3, m = 2);
    # d^1.5 - (d - 0.8)^1.5 = 1 solved by hand with scipy.optimize.brentq.
    by_hand = brentq(lambda d: d ** 1.5 - (d - 0.8) ** 1.5 - 1.0, 0.8, 5.0)
    assert deficit == pytest.approx(by_hand, rel=1e-9)
    assert 1.0 < deficit < 1.5  # just past the comfort-band edge (band 1)


def test_energy_and_water_fall_at_the_documented_rates_while_working():
    env = ShiftEnv(needs=("energy", "water"))
    _, info = env.reset(seed=5)
    start = info["level"]
    for t in range(1, 41):
        _, reward, _, _, info = env.step(WORK)
        # Source: exact solution of dh/dt = -(drain + activity_cost * activity) with
        # the abstract preset's rates: energy 0.02 + 0.02, water 0.03 + 0.01 per step.
        assert np.allclose(info["level"], start - np.array([0.04, 0.04]) * t, atol=1e-12)
        assert info["reward_task"] == 1.0 and info["worked"]


@pytest.mark.parametrize(("action", "kwargs", "ambient", "heat"), [
    (SHADE, {"shade_ambient": 0.8}, 0.8, 0.0),
    (WORK, {"sun_heat": 0.0}, 0.0, 0.02),
])
def test_temperature_relaxes_as_newtons_law_predicts(action, kwargs, ambient, heat):
    warm = {"temperature": {"initial_low": 0.1, "initial_high": 0.5}}
    env = ShiftEnv(need_overrides=warm, **kwargs)
    _, info = env.reset(seed=2)
    t0 = info["level"][2]
    for t in range(1, 61):
        _, _, _, _, info = env.step(action)
        # Source: Newton's law of cooling with a constant heat input q,
        # dT/dt = -k (T - a) + q, T(t) = a + q/k + (T0 - a - q/k) exp(-k t), k = 0.05.
        # The body stays above its set point, so no shivering coupling acts.
        target = ambient + heat / 0.05
        assert info["level"][2] == pytest.approx(target + (t0 - target) * math.exp(-0.05 * t),
                                                 abs=1e-12)


def test_sun_follows_the_day_cycle_and_features_stay_in_bounds():
    env = ShiftVectorEnv(num_envs=2, day_length=40, max_steps=80)
    observations, _ = env.reset(seed=0)
    suns = []
    for _ in range(80):
        assert env.single_observation_space.contains(observations[0])
        observations, _, _, _, info = env.step(np.array([WORK, SHADE]))
        suns.append(info["sun"][0])
    suns = np.array(suns)
    # Source: sin^2(pi t / L) is 0 at t = 0 and 1 at t = L / 2.
    assert suns[0] == 0.0 and suns[20] == pytest.approx(1.0) and suns[40] == pytest.approx(0.0)
    assert np.allclose(suns[:40], suns[40:])


def test_always_working_survives_the_default_shift():
    work = score(always_work, copies=64, seed=100)
    assert work["alive"].all()


def test_a_body_without_temperature_gets_no_heat_load():
    env = ShiftEnv(needs=("energy", "water"))
    assert env.core.world.ambient(np.zeros(1, dtype=np.int64), np.array([WORK])) is None
    env.reset(seed=0)
    _, _, _, _, info = env.step(DRINK)
    assert info["intake"].tolist() == [0.0, 0.8]


@pytest.mark.parametrize(("kwargs", "field"), [
    ({"pay": -1.0}, "pay"),
    ({"work_activity": float("nan")}, "work_activity"),
    ({"sun_heat": float("inf")}, "sun_heat"),
    ({"day_length": 1}, "day_length"),
    ({"day_length": 2.5}, "day_length"),
    ({"meal": -0.1}, "meal"),
    ({"shade": 0.0}, "shade"),
])
def test_bad_parameters_name_the_field(kwargs, field):
    with pytest.raises(ConfigError) as caught:
        gym.make("needbench/Shift-v0", **kwargs)
    assert caught.value.path == field


def test_sun_and_ambient_are_what_the_step_used():
    env = ShiftVectorEnv(num_envs=2, day_length=30, max_steps=61)
    observations, _ = env.reset(seed=1)
    world = env.core.world
    clocks, actions, suns = [], [], []
    for _ in range(60):
        # The tending rule keeps both bodies in band, so no episode ends (no autoreset).
        action = tend_needs(observations, 3)
        clocks.append(env.core.state["clock"].copy())
        observations, _, terminated, truncated, info = env.step(action)
        assert not np.any(terminated | truncated)
        actions.append(action)
        suns.append(info["sun"])
    clocks, actions, suns = np.array(clocks), np.array(actions), np.array(suns)
    assert np.array_equal(clocks[:, 0], np.arange(60))
    assert np.array_equal(world.sun(clocks), suns)
    # Source: the double-angle identity sin^2 x = (1 - cos 2x) / 2, with numpy's cos.
    assert np.allclose(suns, (1.0 - np.cos(2.0 * np.pi * (clocks % 30) / 30)) / 2.0, atol=1e-12)
    ambient = world.ambient(clocks.ravel(), actions.ravel())
    temperature = env.core.physiology.index["temperature"]
    worked = actions.ravel() == WORK
    assert worked.any() and not worked.all()
    assert np.array_equal(ambient[worked, temperature], world.sun_heat * suns.ravel()[worked])
    assert np.all(ambient[~worked, temperature] == world.shade_ambient)
    others = [k for k in range(3) if k != temperature]
    assert np.array_equal(ambient[:, others],
                          np.broadcast_to(env.core.physiology.ambient[others], (120, 2)))
