"""Wrappers on single and native vector envs of Menu, Gamble, Lure and Shift."""

import math
import warnings

import gymnasium as gym
import numpy as np
import pytest
from gymnasium import spaces
from gymnasium.utils.env_checker import check_env

import needbench.envs  # noqa: F401  (registers the tasks)
from needbench.envs.errors import ConfigError
from needbench.envs.wrappers import (
    HideInteroception,
    NormaliseInternalState,
    PerNeedReward,
    SwitchRewardChannel,
    VectorHideInteroception,
    VectorNormaliseInternalState,
    VectorPerNeedReward,
    VectorSwitchRewardChannel,
    per_need_drive,
)

TASKS = ("needbench/Menu-v0", "needbench/Gamble-v0", "needbench/Lure-v1", "needbench/Shift-v0")

#: (single wrapper, vector wrapper, keyword arguments) of every wrapper.
PAIRS = {
    "hide": (HideInteroception, VectorHideInteroception, {}),
    "normalise": (NormaliseInternalState, VectorNormaliseInternalState, {}),
    "per_need": (PerNeedReward, VectorPerNeedReward, {}),
    "switch": (SwitchRewardChannel, VectorSwitchRewardChannel,
               {"kind": "negative_drive", "task_weight": 0.5}),
}


def make(task_id, **kwargs):
    return gym.make(task_id, **kwargs)


def make_vec(task_id, n, **kwargs):
    return gym.make_vec(task_id, num_envs=n, vectorization_mode="vector_entry_point", **kwargs)


def check_wrapped(env):
    """Gymnasium's check_env with warnings as errors, except its note that env is wrapped."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        warnings.filterwarnings("ignore", message=".*different from the unwrapped version")
        check_env(env)


def drive_alone_by_hand(deviation):
    # Source: Keramati & Gutkin (2014) drive, n = 3, m = 2, for one need alone:
    # D = (|d|^3)^(1/2) = |d|^(3/2), d in band units.
    return abs(deviation) ** 1.5


@pytest.mark.parametrize("task_id", TASKS)
@pytest.mark.parametrize("name", sorted(PAIRS))
def test_vector_wrapper_reproduces_single_wrappers(task_id, name):
    single_cls, vector_cls, kwargs = PAIRS[name]
    n, seed = 3, 21
    vec = vector_cls(make_vec(task_id, n, max_steps=12), **kwargs)
    singles = [single_cls(make(task_id, max_steps=12), **kwargs) for _ in range(n)]
    v_obs, _ = vec.reset(seed=seed)
    for i, env in enumerate(singles):
        obs, _ = env.reset(seed=seed + i)
        assert np.array_equal(obs, v_obs[i])
    assert vec.single_observation_space == singles[0].observation_space
    done = [False] * n
    rng = np.random.default_rng(1)
    resets = 0
    for _ in range(40):
        actions = rng.integers(0, vec.single_action_space.n, size=n)
        v_obs, v_rew, v_term, v_trunc, _ = vec.step(actions)
        assert vec.observation_space.contains(v_obs)
        for i, env in enumerate(singles):
            if done[i]:
                obs, _ = env.reset()
                reward, terminated, truncated = np.zeros_like(v_rew[i]), False, False
                resets += 1
            else:
                obs, reward, terminated, truncated, _ = env.step(actions[i])
            done[i] = terminated or truncated
            assert np.array_equal(obs, v_obs[i])
            assert np.allclose(reward, v_rew[i], atol=1e-12)
            assert (terminated, truncated) == (v_term[i], v_trunc[i])
    assert resets >= n  # the run crossed autoresets


@pytest.mark.parametrize("task_id", TASKS)
def test_hide_interoception_matches_a_task_built_without_it(task_id):
    hidden = HideInteroception(make(task_id))
    blind = make(task_id, interoception=False)
    assert hidden.observation_space == blind.observation_space
    obs_a, _ = hidden.reset(seed=3)
    obs_b, _ = blind.reset(seed=3)
    k = hidden.unwrapped.core.physiology.num_needs
    for action in [1, 0, 2, 1, 1, 0, 2, 0]:
        assert np.array_equal(obs_a, obs_b)
        obs_a, _, _, _, info = hidden.step(action)
        obs_b, _, _, _, _ = blind.step(action)
        assert info["level"].shape == (k,)  # info still carries the internal state
    vec = VectorHideInteroception(make_vec(task_id, 2))
    assert vec.single_observation_space == blind.observation_space
    assert vec.reset(seed=0)[0].shape == (2,) + blind.observation_space.shape


def test_hide_interoception_on_a_dict_observation_drops_the_key():
    env = HideInteroception(make("needbench/Shift-v0", observation="dict"))
    assert list(env.observation_space.spaces) == ["world"]
    obs, _ = env.reset(seed=0)
    assert set(obs) == {"world"} and env.observation_space.contains(obs)
    vec = VectorHideInteroception(make_vec("needbench/Shift-v0", 2, observation="dict"))
    obs, _ = vec.reset(seed=0)
    assert set(obs) == {"world"} and obs["world"].shape == (2, 2)
    # Source: Gymnasium's own checker on the wrapped env.
    check_wrapped(env)


@pytest.mark.parametrize("task_id", TASKS)
def test_normalised_internal_state_is_deviation_over_the_limit(task_id):
    raw = make(task_id)
    env = NormaliseInternalState(make(task_id))
    limit = env.unwrapped.core.deviation_limit
    k = env.unwrapped.core.physiology.num_needs
    obs, info = env.reset(seed=8)
    raw.reset(seed=8)
    for action in [1, 2, 0, 1, 3 % raw.action_space.n]:
        # Source: the documented map x -> x / deviation_limit (band units to [-1, 1]).
        assert np.allclose(obs[:k], info["deviation"] / limit, atol=1e-6)
        assert env.observation_space.contains(obs)
        obs, _, _, _, info = env.step(action)
        raw_obs, _, _, _, _ = raw.step(action)
        assert np.array_equal(obs[k:], raw_obs[k:])  # world features untouched
    space = env.observation_space
    assert np.all(space.low[:k] == -1) and np.all(space.high[:k] == 1)


def test_normalised_state_reaches_but_never_passes_one():
    # A need driven to its lethal bound and held there (penalise) for many steps.
    overrides = {"energy": {"drain": 3.0}}
    env = NormaliseInternalState(make("needbench/Menu-v0", need_overrides=overrides,
                                      on_lethal="penalise"))
    env.reset(seed=0)
    for _ in range(10):
        obs, _, _, _, info = env.step(0)
    # Source: abstract preset, lethal at -6 bands; limit 2 * 6 = 12, so -6 / 12 = -0.5.
    assert obs[0] == pytest.approx(-0.5, abs=1e-5)
    assert env.observation_space.contains(obs)
    vec = VectorNormaliseInternalState(make_vec("needbench/Lure-v1", 2, observation="dict"))
    obs, _ = vec.reset(seed=0)
    assert vec.single_observation_space["internal"] == spaces.Box(-1.0, 1.0, (2,), np.float32)
    assert np.all(np.abs(obs["internal"]) <= 1.0)
    # Source: Gymnasium's own checker on the wrapped env.
    check_wrapped(NormaliseInternalState(make("needbench/Gamble-v0")))


@pytest.mark.parametrize("task_id", TASKS)
def test_per_need_reward_is_each_needs_own_drive_reduction(task_id):
    env = PerNeedReward(make(task_id))
    _, info = env.reset(seed=6)
    k = env.unwrapped.core.physiology.num_needs
    for action in [1, 0, 2, 1, 0, 0]:
        before = info["deviation"]
        _, reward, _, _, info = env.step(action)
        assert reward.shape == (k,) and reward.dtype == np.float64
        expected = [drive_alone_by_hand(b) - drive_alone_by_hand(a)
                    for b, a in zip(before, info["deviation"], strict=True)]
        assert np.allclose(reward, expected, atol=1e-12)
        assert "reward_scalar" in info


def test_per_need_terms_sum_to_the_drive_reduction_only_for_an_additive_drive():
    # Source: with m = 1 the homeostatic drive is a sum over needs,
    # D = sum_i |d_i|^n, so per-need reductions add up to the total reduction.
    additive = PerNeedReward(make("needbench/Shift-v0", drive_params={"n": 2, "m": 1},
                                  task_weight=0.0))
    coupled = PerNeedReward(make("needbench/Shift-v0", task_weight=0.0))
    additive.reset(seed=1)
    coupled.reset(seed=1)
    gaps = []
    for action in [0] * 30 + [1, 2, 3]:
        _, reward, _, _, info = additive.step(action)
        assert reward.sum() == pytest.approx(info["reward_internal"], abs=1e-12)
        _, reward, _, _, info = coupled.step(action)
        gaps.append(abs(reward.sum() - info["reward_internal"]))
    assert max(gaps) > 1e-3  # m = 2: the needs interact


def test_per_need_drive_holds_other_needs_at_their_set_points():
    drive = make("needbench/Shift-v0").unwrapped.core.drive
    level = np.array([[-2.0, 1.0, 0.5], [0.0, 0.0, 3.0]])
    alone = per_need_drive(drive, level, np.zeros(3))
    by_hand = np.vectorize(drive_alone_by_hand)(level)
    assert np.allclose(alone, by_hand, atol=1e-12)


def test_vector_per_need_reward_is_zero_on_autoreset_steps():
    vec = VectorPerNeedReward(make_vec("needbench/Menu-v0", 2, max_steps=3))
    vec.reset(seed=0)
    for t in range(7):
        _, reward, _, truncated, info = vec.step(np.array([1, 2]))
        if t == 3:  # steps 0-2 end the first episode; step 3 is the autoreset
            assert np.all(reward == 0.0)
        else:
            assert np.any(reward != 0.0)
        assert np.array_equal(info["reward_scalar"] == 0.0, np.all(reward == 0.0, axis=1))


def test_switch_reward_channel_pays_the_new_channel():
    env = SwitchRewardChannel(make("needbench/Menu-v0"), "negative_drive")
    assert env.previous_channel.kind == "drive_reduction"
    env.reset(seed=0)
    for action in [1, 2, 0]:
        _, reward, _, _, info = env.step(action)
        # Source: negative drive r = -D(h_{t+1}), with D computed by hand.
        by_hand = -math.sqrt(sum(abs(d) ** 3 for d in info["deviation"]))
        assert reward == pytest.approx(by_hand, abs=1e-12)
        assert info["reward_internal"] == pytest.approx(by_hand, abs=1e-12)
    # Honest drive reduction: the fudge's palatability switched off too.
    env = SwitchRewardChannel(make("needbench/Lure-v1"), "drive_reduction",
                              palatability_weight=0.0)
    _, info = env.reset(seed=0)
    for action in [3, 3, 1]:
        before = info["deviation"]
        _, reward, _, _, info = env.step(action)
        expected = (math.sqrt(sum(abs(d) ** 3 for d in before))
                    - math.sqrt(sum(abs(d) ** 3 for d in info["deviation"])))
        assert reward == pytest.approx(expected, abs=1e-12)
    vec = VectorSwitchRewardChannel(make_vec("needbench/Shift-v0", 2), task_weight=0.25)
    vec.reset(seed=0)
    _, reward, _, _, info = vec.step(np.array([0, 1]))
    assert np.allclose(reward, 0.25 * info["reward_task"] + info["reward_internal"])
    # Source: Gymnasium's own checker on the wrapped env.
    check_wrapped(SwitchRewardChannel(make("needbench/Gamble-v0"), "survival"))


def test_bad_wrapper_inputs_name_the_field():
    with pytest.raises(ConfigError) as caught:
        SwitchRewardChannel(make("needbench/Menu-v0"), "pleasure")
    assert caught.value.path == "reward.kind"
    with pytest.raises(ConfigError) as caught:
        VectorSwitchRewardChannel(make_vec("needbench/Menu-v0", 2))
    assert caught.value.path == "kind"
    with pytest.raises(ConfigError) as caught:
        SwitchRewardChannel(make("needbench/Menu-v0"), drive_weight=float("nan"))
    assert caught.value.path == "reward.drive_weight"
    for wrapper in (HideInteroception, NormaliseInternalState):
        with pytest.raises(ConfigError) as caught:
            wrapper(make("needbench/Gamble-v0", interoception=False))
        assert caught.value.path == "interoception"
    # The internal state is gone once hidden, so it cannot be normalised afterwards.
    with pytest.raises(ConfigError) as caught:
        NormaliseInternalState(HideInteroception(make("needbench/Menu-v0")))
    assert caught.value.path == "observation_space"
    with pytest.raises(ConfigError) as caught:
        PerNeedReward(gym.make("CartPole-v1"))
    assert caught.value.path == "env"
