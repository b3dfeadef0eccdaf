"""One definition of each stability number: learning curves equal the metrics of the traces."""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest
from gymnasium.vector import AutoresetMode, SyncVectorEnv

import needbench.envs  # noqa: F401  (registers the tasks)
from needbench.agents.base import autoreset_mode, learning_env
from needbench.agents.curves import (
    DISCOUNTED_DRIVE,
    EPISODE_LENGTH,
    EPISODE_RETURN,
    TIME_IN_BAND,
    EpisodeStability,
    deviation_tag,
    scoring_discount,
)
from needbench.agents.registry import make_agent
from needbench.benchmarks.metrics import episode_metrics
from needbench.envs.errors import ConfigError

TASK = "needbench/Menu-v0"


class Recorder:
    """A logger with a scoring discount that keeps every point."""

    def __init__(self, discount: float):
        self.discount = discount
        self.rows: list[tuple[str, float, int]] = []

    def log_scalar(self, tag, value, step):
        self.rows.append((tag, value, step))

    def values(self, tag):
        return [value for name, value, _ in self.rows if name == tag]


class TraceRecorder(gym.vector.VectorWrapper):
    """Cuts what a vector env returns into one episode trace per finished episode,
    in the layout of benchmarks.metrics, in either autoreset mode."""

    def __init__(self, env):
        super().__init__(env)
        self.band = env.unwrapped.core.band
        self.same_step = autoreset_mode(env) == AutoresetMode.SAME_STEP
        self.traces: list[dict[str, np.ndarray]] = []

    def _open(self, info, i):
        self.current[i] = {"level": [info["level"][i]], "set_point": [info["set_point"][i]],
                           "drive": [info["drive"][i]], "reward": []}

    def reset(self, *, seed=None, options=None):
        observations, info = self.env.reset(seed=seed, options=options)
        self.current = [None] * self.num_envs
        for i in range(self.num_envs):
            self._open(info, i)
        self.restarting = np.zeros(self.num_envs, dtype=bool)
        return observations, info

    def step(self, actions):
        observations, reward, terminated, truncated, info = self.env.step(actions)
        done = terminated | truncated
        for i in range(self.num_envs):
            if self.restarting[i]:  # next-step autoreset: this step only reset the copy
                self._open(info, i)
                continue
            last = info["final_info"] if self.same_step and done[i] else info
            episode = self.current[i]
            for key in ("level", "set_point", "drive"):
                episode[key].append(last[key][i])
            episode["reward"].append(reward[i])
            if done[i]:
                trace = {key: np.array(value) for key, value in episode.items()}
                trace["band"] = self.band
                trace["terminated"] = np.array(bool(terminated[i]))
                self.traces.append(trace)
                if self.same_step:
                    self._open(info, i)
        self.restarting = done & ~self.same_step
        return observations, reward, terminated, truncated, info


@pytest.mark.parametrize("agent_name, hyperparameters", [
    ("tabular-q", {"gamma": 0.5}),
    pytest.param("ppo", {"n_steps": 32, "batch_size": 32, "n_epochs": 1, "gamma": 0.5,
                         "n_envs": 3}, marks=pytest.mark.filterwarnings("ignore")),
])
def test_the_learning_curve_of_an_episode_is_the_metric_of_its_trace(agent_name,
                                                                     hyperparameters):
    pytest.importorskip("stable_baselines3") if agent_name == "ppo" else None
    single = gym.make(TASK)
    agent = make_agent(agent_name, single.observation_space, single.action_space,
                       **hyperparameters)
    env = TraceRecorder(learning_env(agent, TASK, {"max_steps": 25}))
    discount = 0.9  # the suite's scoring discount, not the agent's own 0.5
    logger = Recorder(discount)
    agent.learn(env, 600, seed=3, logger=logger)
    need_names = env.unwrapped.core.need_names
    # In episode order per step, copies in index order: as the learners log them.
    assert len(env.traces) == len(logger.values(EPISODE_RETURN)) >= 10
    metrics = [episode_metrics(trace, discount, need_names) for trace in env.traces]
    pairs = [(EPISODE_RETURN, "return"), (EPISODE_LENGTH, "length"),
             (DISCOUNTED_DRIVE, "discounted_drive"), (TIME_IN_BAND, "time_in_band")]
    pairs += [(deviation_tag(need), f"deviation/{need}") for need in need_names]
    for tag, key in pairs:
        # One accumulator serves both: equal to the last rounding.
        np.testing.assert_allclose(logger.values(tag), [m[key] for m in metrics],
                                   rtol=1e-12, atol=0.0, err_msg=tag)


def test_the_convention_against_a_trace_worked_by_hand():
    # Common practice, no source: three steps worked by hand with g = 0.5.
    stability = EpisodeStability(1, 0.5)
    yes = np.ones(1, dtype=bool)
    stability.begin(yes, {"drive": np.array([4.0])})
    steps = [(1.0, 2.0, True, [0.5, -1.0]), (0.5, 1.0, False, [-2.0, 0.0]),
             (-0.5, 3.0, True, [1.0, 1.0])]
    for reward, drive, in_band, deviation in steps:
        stability.step(yes, np.array([reward]),
                       {"drive": np.array([drive]), "in_band": np.array([in_band]),
                        "deviation": np.array([deviation])})
    figures = stability.figures(0)
    assert figures.episode_return == 1.0 and figures.length == 3
    assert figures.discounted_drive == 4.0 + 0.5 * 2.0 + 0.25 * 1.0  # D(h_0)..D(h_2)
    assert figures.time_in_band == pytest.approx(2 / 3)
    np.testing.assert_allclose(figures.deviation, [3.5 / 3, 2.0 / 3])


def test_without_drive_infos_only_return_and_length_are_kept():
    stability = EpisodeStability(2, 0.9)
    stability.begin(np.ones(2, dtype=bool), {})
    stability.step(np.ones(2, dtype=bool), np.array([1.0, 2.0]), {})
    assert stability.figures(1).scalars() == {EPISODE_RETURN: 2.0, EPISODE_LENGTH: 1.0}
    with pytest.raises(ConfigError, match="discount"):
        scoring_discount(type("L", (), {"discount": 1.5})())
    assert scoring_discount(None) == 0.99


def test_same_step_autoreset_follows_gymnasiums_sync_vector_env():
    # Source: Gymnasium's SyncVectorEnv with AutoresetMode.SAME_STEP, the reference for
    # the native vector env's same-step mode (final_obs, final_info, reset observation).
    native = gym.make_vec(TASK, num_envs=3, vectorization_mode="vector_entry_point",
                          autoreset_mode=AutoresetMode.SAME_STEP, max_steps=12)
    sync = SyncVectorEnv([lambda: gym.make(TASK, max_steps=12)] * 3,
                         autoreset_mode=AutoresetMode.SAME_STEP)
    assert native.metadata["autoreset_mode"] == AutoresetMode.SAME_STEP
    observed = [env.reset(seed=5)[0] for env in (native, sync)]
    np.testing.assert_array_equal(*observed)
    rng = np.random.default_rng(0)
    ends = 0
    for _ in range(40):
        actions = rng.integers(0, native.single_action_space.n, size=3)
        (o1, r1, t1, u1, i1), (o2, r2, t2, u2, i2) = native.step(actions), sync.step(actions)
        np.testing.assert_array_equal(o1, o2)
        np.testing.assert_array_equal(r1, r2)
        np.testing.assert_array_equal(t1 | u1, t2 | u2)
        np.testing.assert_allclose(i1["drive"], i2["drive"])
        done = t1 | u1
        if done.any():
            ends += int(done.sum())
            np.testing.assert_array_equal(i1["_final_obs"], i2["_final_obs"])
            for i in np.flatnonzero(done):
                np.testing.assert_array_equal(i1["final_obs"][i], i2["final_obs"][i])
                assert i1["final_info"]["drive"][i] == pytest.approx(
                    i2["final_info"]["drive"][i])
    assert ends >= 3
    with pytest.raises(ConfigError, match="autoreset_mode"):
        gym.make_vec(TASK, num_envs=2, vectorization_mode="vector_entry_point",
                     autoreset_mode="Sometimes")
