"""Evaluation rollouts: traces in the shared format, the same whichever way the env is stepped."""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest
from gymnasium.wrappers.vector import RecordEpisodeStatistics

import needbench.envs  # noqa: F401  (registers the tasks)
from needbench.agents.base import copy_seeds
from needbench.agents.registry import make_agent
from needbench.benchmarks import evaluate as evaluation
from needbench.benchmarks.evaluate import (
    evaluate,
    evaluation_metrics,
    evaluation_seeds,
    rollout_vector,
)
from needbench.envs.errors import ConfigError

# Forewarn with an agent that never learned: it always takes the first action,
# so its episodes end by death at different steps (next-step autoreset matters),
# and the task's event keys (cue, disturbance) are recorded.
FOREWARN = "needbench/Forewarn-v0"
MENU = "needbench/Menu-v0"


def _agent(task_id: str, total_steps: int, **kwargs):
    env = gym.make_vec(task_id, num_envs=4, vectorization_mode="vector_entry_point", **kwargs)
    agent = make_agent("tabular-q", env.single_observation_space, env.single_action_space)
    agent.learn(env, total_steps, seed=3)
    env.close()
    return agent


@pytest.fixture(scope="module")
def forewarn_agent():
    return _agent(FOREWARN, 0)


@pytest.fixture(scope="module")
def menu_agent():
    return _agent(MENU, 4000, max_steps=60)


def _assert_same_traces(first, second):
    assert len(first) == len(second)
    for a, b in zip(first, second, strict=True):
        assert sorted(a) == sorted(b)
        for key in a:
            np.testing.assert_array_equal(a[key], b[key], err_msg=key)


def test_trace_has_the_shared_shapes(forewarn_agent):
    traces = evaluate(forewarn_agent, FOREWARN, {}, 3, seed=0)
    env = gym.make(FOREWARN)
    band = env.unwrapped.core.band
    k = env.unwrapped.core.physiology.num_needs
    for trace in traces:
        steps = trace["reward"].shape[0]
        assert trace["level"].shape == trace["set_point"].shape == (steps + 1, k)
        assert trace["drive"].shape == (steps + 1,)
        for key in ("reward_internal", "reward_task", "alive", "action", "cue", "disturbance"):
            assert trace[key].shape[0] == steps, key
        assert trace["intake"].shape == (steps, k)
        assert trace["alive"].dtype == bool and trace["disturbance"].dtype == bool
        np.testing.assert_array_equal(trace["band"], band)
        assert trace["terminated"].shape == () and trace["truncated"].shape == ()
        # An episode ends once: by death (alive turns false on the last step) or by the limit.
        assert bool(trace["terminated"]) != bool(trace["truncated"])
        assert bool(trace["terminated"]) == (not trace["alive"][-1])
        assert trace["alive"][:-1].all()
        # deviation and in_band are functions of level and band, so they are left out.
        assert "deviation" not in trace and "in_band" not in trace


def test_first_state_and_drive_come_from_reset_and_the_tasks_drive(forewarn_agent):
    seed = evaluation_seeds(5, 1)[0]
    env = gym.make(FOREWARN)
    _, info = env.reset(seed=seed)
    trace = evaluate(forewarn_agent, FOREWARN, {}, 1, seed=5, mode="single")[0]
    np.testing.assert_array_equal(trace["level"][0], info["level"])
    core = env.unwrapped.core
    # The env's own drive object scores every recorded state.
    np.testing.assert_allclose(trace["drive"], core.drive(trace["level"], trace["set_point"]),
                               rtol=1e-12, atol=1e-12)


def test_native_vector_sync_vector_and_single_env_record_the_same_traces(forewarn_agent):
    # Source: Gymnasium's SyncVectorEnv (next-step autoreset) and its plain single-env loop
    # are the references for where an episode ends in a batch.
    vector = evaluate(forewarn_agent, FOREWARN, {}, 5, seed=1, mode="vector")
    lengths = {trace["reward"].shape[0] for trace in vector}
    assert len(lengths) > 1, "the episodes should end at different steps"
    _assert_same_traces(vector, evaluate(forewarn_agent, FOREWARN, {}, 5, seed=1, mode="sync"))
    _assert_same_traces(vector, evaluate(forewarn_agent, FOREWARN, {}, 5, seed=1,
                                         mode="single"))


def test_returns_and_lengths_match_gymnasiums_episode_statistics(forewarn_agent):
    # Source: gymnasium.wrappers.vector.RecordEpisodeStatistics, Gymnasium's own account of
    # each finished episode's return and length under next-step autoreset.
    seeds = evaluation_seeds(2, 6)
    env = RecordEpisodeStatistics(gym.make_vec(FOREWARN, num_envs=6,
                                               vectorization_mode="vector_entry_point"))
    traces = rollout_vector(env, forewarn_agent, seeds)
    expected = sorted(zip(env.length_queue, env.return_queue, strict=True))
    recorded = sorted((trace["reward"].shape[0], trace["reward"].sum()) for trace in traces)
    assert [length for length, _ in recorded] == [length for length, _ in expected]
    np.testing.assert_allclose([r for _, r in recorded], [r for _, r in expected], rtol=1e-9)


def test_learned_agent_traces_do_not_depend_on_batching(menu_agent, monkeypatch):
    whole = evaluate(menu_agent, MENU, {"max_steps": 60}, 5, seed=4)
    monkeypatch.setattr(evaluation, "MAX_BATCH", 2)
    _assert_same_traces(whole, evaluate(menu_agent, MENU, {"max_steps": 60}, 5, seed=4))
    assert all(trace["reward"].shape == (60,) for trace in whole)


def test_evaluation_seeds_are_reproducible_and_apart_from_the_learning_copies():
    seeds = evaluation_seeds(7, 50)
    assert seeds == evaluation_seeds(7, 50)
    assert evaluation_seeds(7, 10) == seeds[:10]
    assert len(set(seeds)) == 50
    assert not set(seeds) & set(copy_seeds(7, 50))
    assert not set(seeds) & set(evaluation_seeds(8, 50))
    assert all(0 <= seed < 2**31 for seed in seeds)


def test_metrics_of_the_traces(forewarn_agent):
    traces = evaluate(forewarn_agent, FOREWARN, {}, 2, seed=0)
    metrics = evaluation_metrics(traces, 0.9, ["energy", "water", "temperature"])
    for trace, episode in zip(traces, metrics, strict=True):
        # Common practice, no source: the return is the plain sum of the rewards.
        assert episode["return"] == pytest.approx(float(np.sum(trace["reward"])))
        assert episode["length"] == trace["reward"].shape[0]
        assert "deviation/temperature" in episode


def test_bad_arguments_are_config_errors(menu_agent):
    with pytest.raises(ConfigError, match="mode"):
        evaluate(menu_agent, MENU, {}, 1, seed=0, mode="parallel")
    with pytest.raises(ConfigError, match="episodes"):
        evaluation_seeds(0, 0)
    with pytest.raises(ConfigError, match="seed"):
        evaluation_seeds(-1, 3)
