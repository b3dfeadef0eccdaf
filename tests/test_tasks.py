"""Checks every registered task must pass (Gymnasium API, SB3, seeding, vector == single)."""

import warnings

import gymnasium as gym
import numpy as np
import pytest
from gymnasium import spaces
from gymnasium.utils.env_checker import check_env

import needbench.envs
from needbench.envs.errors import ActionError, ConfigError

TASK_IDS = needbench.envs.TASK_IDS
STEP_KEYS = {"level", "set_point", "deviation", "drive", "reward_internal", "reward_task",
             "alive", "in_band", "intake"}
RESET_KEYS = {"level", "set_point", "deviation", "drive", "in_band"}


def sample_actions(space, rng, n):
    space.seed(int(rng.integers(2**31)))
    return [space.sample() for _ in range(n)]


@pytest.mark.parametrize("task_id", TASK_IDS)
@pytest.mark.parametrize("kwargs", [{}, {"interoception": False}, {"observation": "dict"}])
def test_gymnasium_env_checker(task_id, kwargs):
    # Source: Gymnasium's own checker, gymnasium.utils.env_checker.check_env.
    env = gym.make(task_id, **kwargs)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        check_env(env.unwrapped, skip_render_check=False)


@pytest.mark.parametrize("task_id", TASK_IDS)
def test_stable_baselines3_env_checker(task_id):
    # Source: Stable-Baselines3's checker, stable_baselines3.common.env_checker.check_env.
    sb3_checker = pytest.importorskip("stable_baselines3.common.env_checker")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        sb3_checker.check_env(gym.make(task_id).unwrapped, warn=True)


@pytest.mark.parametrize("task_id", TASK_IDS)
def test_same_seed_same_trajectory(task_id):
    runs = []
    for _ in range(2):
        env = gym.make(task_id)
        obs, _ = env.reset(seed=123)
        trace = [obs]
        for action in sample_actions(env.action_space, np.random.default_rng(5), 60):
            obs, reward, terminated, truncated, _ = env.step(action)
            trace.append(np.append(np.ravel(obs), reward))
            if terminated or truncated:
                obs, _ = env.reset()
                trace.append(obs)
        runs.append(trace)
    for a, b in zip(*runs, strict=True):
        assert np.array_equal(a, b)
    assert not np.array_equal(gym.make(task_id).reset(seed=124)[0], runs[0][0])


@pytest.mark.parametrize("task_id", TASK_IDS)
def test_vector_env_reproduces_single_envs(task_id):
    n, seed = 3, 40
    # A short time limit forces several autoresets within the run.
    vec = gym.make_vec(task_id, num_envs=n, vectorization_mode="vector_entry_point",
                       max_steps=25)
    singles = [gym.make(task_id, max_steps=25) for _ in range(n)]
    v_obs, v_info = vec.reset(seed=seed)
    for i, env in enumerate(singles):
        obs, info = env.reset(seed=seed + i)
        assert np.array_equal(obs, v_obs[i])
        assert np.allclose(info["level"], v_info["level"][i])
    done = [False] * n
    rng = np.random.default_rng(0)
    for _ in range(80):
        actions = np.stack(sample_actions(vec.single_action_space, rng, n))
        v_obs, v_rew, v_term, v_trunc, v_info = vec.step(actions)
        for i, env in enumerate(singles):
            if done[i]:
                obs, info = env.reset()
                reward, terminated, truncated = 0.0, False, False
            else:
                obs, reward, terminated, truncated, info = env.step(actions[i])
            done[i] = terminated or truncated
            assert np.array_equal(obs, v_obs[i])
            assert reward == pytest.approx(v_rew[i], abs=1e-12)
            assert (terminated, truncated) == (v_term[i], v_trunc[i])
            assert np.allclose(info["level"], v_info["level"][i])
    assert set(v_info) >= STEP_KEYS


@pytest.mark.parametrize("task_id", TASK_IDS)
def test_info_carries_the_internal_state(task_id):
    env = gym.make(task_id)
    _, info = env.reset(seed=0)
    assert set(info) >= RESET_KEYS
    k = env.unwrapped.core.physiology.num_needs
    _, reward, _, _, info = env.step(env.action_space.sample())
    assert set(info) >= STEP_KEYS
    assert info["level"].shape == (k,) and info["deviation"].shape == (k,)
    core = env.unwrapped.core
    assert info["drive"] == pytest.approx(core.drive(info["level"], info["set_point"]))
    assert np.allclose(info["deviation"], (info["level"] - info["set_point"]) / core.band)


@pytest.mark.parametrize("task_id", TASK_IDS)
def test_lethal_bound_terminates_or_penalises(task_id):
    first = gym.make(task_id).unwrapped.core.need_names[0]
    overrides = {first: {"drain": 40.0}}
    env = gym.make(task_id, need_overrides=overrides)
    env.reset(seed=0)
    _, _, terminated, truncated, info = env.step(env.action_space.sample())
    assert terminated and not truncated and info["alive"] is False
    with pytest.raises(RuntimeError, match="reset"):
        env.step(env.action_space.sample())
    env = gym.make(task_id, need_overrides=overrides, on_lethal="penalise", lethal_penalty=5.0)
    env.reset(seed=0)
    config = env.unwrapped.core.config
    for _ in range(3):
        _, reward, terminated, _, info = env.step(env.action_space.sample())
        assert not terminated and info["alive"] is False
        expected = (config.drive_weight * info["reward_internal"]
                    + config.task_weight * info["reward_task"] - 5.0)
        assert reward == pytest.approx(expected, abs=1e-9)


@pytest.mark.parametrize("task_id", TASK_IDS)
def test_time_limit_truncates(task_id):
    env = gym.make(task_id, max_steps=7, on_lethal="penalise")
    env.reset(seed=1)
    flags = [env.step(env.action_space.sample())[3] for _ in range(7)]
    assert flags == [False] * 6 + [True]


@pytest.mark.parametrize("task_id", TASK_IDS)
def test_render_modes(task_id):
    env = gym.make(task_id, render_mode="ansi")
    env.reset(seed=0)
    env.step(env.action_space.sample())
    frame = env.render()
    assert isinstance(frame, str)
    assert all(name in frame for name in env.unwrapped.core.need_names)
    env = gym.make(task_id, render_mode="rgb_array")
    env.reset(seed=0)
    image = env.render()
    assert image.dtype == np.uint8 and image.ndim == 3 and image.shape[2] == 3
    assert min(image.shape[:2]) >= 256  # readable: issue 10's floor on the short side
    vec = gym.make_vec(task_id, num_envs=2, vectorization_mode="vector_entry_point",
                       render_mode="rgb_array")
    vec.reset(seed=0)
    assert len(vec.render()) == 2


@pytest.mark.parametrize("task_id", TASK_IDS)
def test_bad_actions_raise_clear_errors(task_id):
    env = gym.make(task_id)
    env.reset(seed=0)
    space = env.action_space
    if isinstance(space, spaces.Discrete):
        bad = [space.n, -1, 1.5, "1", np.array([0, 1])]
    else:
        bad = [np.full(space.shape, np.nan), space.high + 1.0, np.zeros(space.shape[0] + 1),
               "go"]
    for action in bad:
        with pytest.raises(ActionError):
            env.step(action)
    vec = gym.make_vec(task_id, num_envs=2, vectorization_mode="vector_entry_point")
    vec.reset(seed=0)
    with pytest.raises(ActionError):
        vec.step(np.stack([space.sample()] * 3))


@pytest.mark.parametrize("task_id", TASK_IDS)
def test_unknown_keyword_is_named(task_id):
    with pytest.raises(ConfigError, match="max_stepz.*did you mean 'max_steps'"):
        gym.make(task_id, max_stepz=10)
    with pytest.raises(ConfigError, match="on_lethal"):
        gym.make(task_id, on_lethal="ignore")
    with pytest.raises(ConfigError, match="needs"):
        gym.make(task_id, needs=("energy", "sleep"))


@pytest.mark.parametrize(("kwargs", "path", "allowed"), [
    # Issue 11, item 4: inf times "alive" made every reward NaN.
    ({"lethal_penalty": float("inf")}, "lethal_penalty", "a finite number"),
    ({"lethal_penalty": float("nan")}, "lethal_penalty", "a finite number"),
    ({"lethal_penalty": -1.0}, "lethal_penalty", "a finite number >= 0"),
    # Item 5: the first step raised NumPy's broadcasting error.
    ({"reward": "sensory_estimate", "sensory_bias": [0.0] * 7}, "sensory_bias",
     "a list of 2 numbers (one per need)"),
    # Item 6: any non-empty string was taken as true.
    ({"interoception": "no"}, "interoception", "True or False"),
])
def test_task_arguments_of_issue_11_are_config_errors(kwargs, path, allowed):
    with pytest.raises(ConfigError) as caught:
        gym.make("needbench/Menu-v0", **kwargs)
    assert caught.value.path == path and allowed in str(caught.value)
