"""Drift: allostatic set points against the closed form, seasonal yields, adaptation pays."""

import math

import gymnasium as gym
import numpy as np
import pytest

import needbench.envs  # noqa: F401  (registers the tasks)
from needbench.envs.errors import ConfigError
from needbench.envs.tasks.drift import ALLOSTASIS_RATE, VALLEY_ITEMS, DriftEnv, DriftVectorEnv

REST, SEEDS, BROOK, APPLES = range(4)


@pytest.mark.parametrize("rate", [0.002, 0.01, 0.05])
def test_set_point_follows_a_constant_level_as_the_moving_average_says(rate):
    # No drain and a fixed initial level hold energy at h = 2 while resting.
    overrides = {"energy": {"drain": 0.0, "initial_low": 2.0, "initial_high": 2.0,
                            "adaptation_rate": rate}}
    env = DriftEnv(needs=("energy",), need_overrides=overrides)
    _, info = env.reset(seed=0)
    s0, h = info["set_point"][0], 2.0
    assert s0 == 0.0
    gaps = []
    for t in range(1, 401):
        _, _, _, _, info = env.step(REST)
        gaps.append(h - info["set_point"][0])
        # Source: closed-form solution of the exponential moving average (first-order
        # linear recurrence s_{t+1} = (1 - a) s_t + a h, constant h):
        # s_t = s_0 + (1 - (1 - a)^t) (h - s_0).
        expected = s0 + (1.0 - (1.0 - rate) ** t) * (h - s0)
        assert info["level"][0] == pytest.approx(h, abs=1e-12)
        assert info["set_point"][0] == pytest.approx(expected, rel=1e-9, abs=1e-12)
        assert info["deviation"][0] == pytest.approx(h - expected, abs=1e-9)
    # Source: same recurrence; the gap h - s_t first falls to half its start after
    # ceil(ln 2 / -ln(1 - a)) steps.
    halved = math.ceil(math.log(2.0) / -math.log1p(-rate))
    assert np.flatnonzero(np.array(gaps) <= (h - s0) / 2)[0] + 1 == halved


def test_allostasis_is_on_by_default_and_merged_with_user_overrides():
    core = DriftEnv().unwrapped.core
    assert np.allclose(core.physiology.adaptation_rate, ALLOSTASIS_RATE)
    core = DriftEnv(need_overrides={"energy": {"drain": 0.01}}).unwrapped.core
    assert np.allclose(core.physiology.adaptation_rate, ALLOSTASIS_RATE)
    assert core.physiology.drain[0] == 0.01
    core = DriftEnv(need_overrides={"water": {"adaptation_rate": 0.0}}).unwrapped.core
    assert list(core.physiology.adaptation_rate) == [ALLOSTASIS_RATE, 0.0]
    core = DriftEnv(needs=("water",)).unwrapped.core
    assert core.need_names == ("water",) and core.physiology.adaptation_rate[0] == ALLOSTASIS_RATE


def yields_of(action, steps, **kwargs):
    """Intake (steps, K) and time of year (steps,) when always taking ``action``."""
    env = DriftEnv(on_lethal="penalise", random_start=False, max_steps=steps, **kwargs)
    env.reset(seed=0)
    intake, season = [], []
    for _ in range(steps):
        _, _, _, _, info = env.step(action)
        intake.append(info["intake"])
        season.append(info["season"])
    return np.array(intake), np.array(season)


def test_seasonal_yields_follow_the_documented_year():
    year = 400
    seeds, season = yields_of(SEEDS, year)
    brook, _ = yields_of(BROOK, year)
    apples, _ = yields_of(APPLES, year)
    assert np.allclose(season, np.arange(year) / year)
    # Documented yield: mean amount * (1 + 0.9 cos(2 pi (p - peak))).
    assert np.allclose(seeds[:, 0], 0.6 * (1 + 0.9 * np.cos(2 * np.pi * season)), atol=1e-12)
    assert np.allclose(brook[:, 1], 0.6 * (1 + 0.9 * np.cos(2 * np.pi * (season - 0.5))),
                       atol=1e-12)
    # Source: sum_{t=0}^{P-1} cos(2 pi t / P + c) = 0 for P >= 2 (the P-th roots of unity
    # sum to zero), so over one whole year each item yields its mean amount on average.
    assert seeds[:, 0].mean() == pytest.approx(0.6, abs=1e-12)
    assert brook[:, 1].mean() == pytest.approx(0.6, abs=1e-12)
    # Richest at its peak (1 + amplitude times the mean), poorest half a year later.
    assert np.argmax(seeds[:, 0]) == 0 and np.argmin(seeds[:, 0]) == year // 2
    assert np.argmax(brook[:, 1]) == year // 2 and np.argmin(brook[:, 1]) == 0
    assert seeds[0, 0] == pytest.approx(0.6 * 1.9) and seeds[year // 2, 0] == pytest.approx(0.06)
    # Food and water run in opposite phase; the cellar never changes.
    assert np.corrcoef(seeds[:, 0], brook[:, 1])[0, 1] == pytest.approx(-1.0, abs=1e-9)
    assert np.allclose(apples, [0.2, 0.15])
    assert np.all(seeds[:, 1] == 0.0) and np.all(brook[:, 0] == 0.0)


def test_season_observation_and_random_start():
    env = DriftEnv(show_season=True, year_length=8, random_start=False)
    obs, _ = env.reset(seed=0)
    angles = []
    for _ in range(8):
        angles.append(obs[-2:])
        obs, *_ = env.step(REST)
    # Source: unit-circle coordinates (cos, sin) of 2 pi k / 8.
    k = np.arange(8)
    assert np.allclose(angles, np.stack([np.cos(2 * np.pi * k / 8),
                                         np.sin(2 * np.pi * k / 8)], axis=1), atol=1e-6)
    starts = [DriftEnv().unwrapped for _ in range(2)]
    for seed, env in enumerate(starts):
        env.reset(seed=seed)
    first = [float(env.core.world.season(env.core.state)[0]) for env in starts]
    assert first[0] != first[1] and all(0.0 <= p < 1.0 for p in first)
    assert DriftEnv().reset(seed=0)[0].shape == (2 + 2,)


def run(policy, copies=16, steps=2000, seed=0):
    env = gym.make_vec("needbench/Drift-v0", num_envs=copies,
                       vectorization_mode="vector_entry_point")
    obs, _ = env.reset(seed=seed)
    drives, deaths = [], 0
    for t in range(steps):
        obs, _, terminated, _, info = env.step(policy(obs, t))
        drives.append(info["drive"])
        deaths += int(terminated.sum())
    return float(np.mean(drives)), deaths


def feedback(obs, t):
    """Forage for whichever need is below its band's half: adapts to any yield."""
    actions = np.full(obs.shape[0], REST)
    actions = np.where(obs[:, 1] < -0.5, BROOK, actions)
    return np.where(obs[:, 0] < -0.5, SEEDS, actions)


def calendar(obs, t):
    """A fixed timetable matched to the annual mean yields (0.6 per meal): seed heads
    every 30 steps (drain 0.02) and brook water every 20 (drain 0.03)."""
    if (t + 1) % 20 == 0:
        return np.full(obs.shape[0], BROOK)
    if (t + 1) % 30 == 0:
        return np.full(obs.shape[0], SEEDS)
    return np.full(obs.shape[0], REST)


def test_tracking_the_season_beats_a_timetable_for_the_average_year():
    # Common practice, no source: with yields drifting through the year, a policy that
    # reads the internal state must beat one tuned to the annual mean.
    tracking_drive, tracking_deaths = run(feedback)
    timetable_drive, timetable_deaths = run(calendar)
    # Measured (seed 0): feedback 0.32 mean drive, no deaths; timetable 3.8 and 46 deaths.
    assert tracking_deaths == 0 and timetable_deaths > 10
    assert tracking_drive < 0.2 * timetable_drive


@pytest.mark.parametrize(("kwargs", "path"), [
    ({"year_length": 1}, "year_length"),
    ({"amplitude": 1.5}, "amplitude"),
    ({"show_season": 1}, "show_season"),
    ({"items": ()}, "items"),
    ({"items": (("moss", {"energy": 0.1}, 2.0),)}, "items.moss.peak"),
    ({"items": (("moss", {"salt": 0.1}, None),)}, "need"),
    ({"items": (("moss", {"energy": 0.1}),)}, "items[0]"),
    ({"need_overrides": {"energy": 0.1}}, "need_overrides.energy"),
])
def test_bad_parameters_name_the_field(kwargs, path):
    with pytest.raises(ConfigError) as error:
        DriftEnv(**kwargs)
    assert error.value.path == path


def test_vector_env_takes_the_same_defaults():
    vec = DriftVectorEnv(num_envs=2)
    assert np.allclose(vec.core.physiology.adaptation_rate, ALLOSTASIS_RATE)
    assert len(VALLEY_ITEMS) == vec.single_action_space.n
