"""The agent protocol, the registry, the agent file format and the random agent."""

from __future__ import annotations

import json
import subprocess
import sys

import gymnasium as gym
import numpy as np
import pytest
from gymnasium import spaces
from gymnasium.vector import SyncVectorEnv, VectorEnv
from scipy import stats

import needbench.envs  # noqa: F401  (registers the tasks)
from needbench.agents import registry
from needbench.agents.base import (
    Agent,
    Logger,
    NullLogger,
    as_vector_env,
    copy_seeds,
    decode_space,
    encode_space,
    exploration_keys,
)
from needbench.agents.curves import EPISODE_RETURN
from needbench.agents.random_agent import RandomAgent
from needbench.agents.registry import AGENTS, make_agent, register_agent
from needbench.envs.errors import ConfigError

# --- registry ------------------------------------------------------------------------------------


def test_registry_names_and_lookup():
    for name in ("random", "exact-planner", "tabular-q"):
        assert name in AGENTS
        assert AGENTS[name].name == name
    agent = make_agent("random", spaces.Discrete(3), spaces.Discrete(2))
    assert isinstance(agent, RandomAgent)


def test_unknown_agent_names_and_hyperparameters_are_config_errors():
    with pytest.raises(ConfigError, match=r"did you mean 'tabular-q'\?") as error:
        make_agent("tabular_q", spaces.Discrete(3), spaces.Discrete(2))
    assert error.value.path == "agent" and error.value.value == "tabular_q"
    with pytest.raises(ConfigError, match=r"did you mean 'gamma'\?"):
        make_agent("exact-planner", spaces.Discrete(3), spaces.Discrete(2), gama=0.9)
    with pytest.raises(ConfigError, match="no hyperparameters"):
        make_agent("random", spaces.Discrete(3), spaces.Discrete(2), learning_rate=0.1)
    with pytest.raises(ConfigError, match="observation_space"):
        make_agent("random", "Discrete(3)", spaces.Discrete(2))


def test_registry_imports_no_agent_module_and_no_torch_until_asked():
    # A fresh interpreter, so that modules other tests imported do not count.
    code = (
        "import sys\n"
        "from needbench.agents.registry import AGENTS, make_agent\n"
        "names = sorted(AGENTS)\n"
        "assert 'torch' not in sys.modules, 'torch imported'\n"
        "assert 'needbench.agents.tabular' not in sys.modules, 'tabular imported'\n"
        "AGENTS['tabular-q']\n"
        "assert 'needbench.agents.tabular' in sys.modules\n"
        "assert 'torch' not in sys.modules, 'torch imported by tabular-q'\n"
        "print(names)\n"
    )
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert result.returncode == 0, result.stderr
    assert "tabular-q" in result.stdout


def test_register_agent_adds_one_lazy_line_and_reports_missing_packages():
    register_agent("test-missing-extra", "needbench_missing_extra_package.module:Agent")
    try:
        assert "test-missing-extra" in AGENTS
        with pytest.raises(ImportError, match="needbench_missing_extra_package"):
            AGENTS["test-missing-extra"]
    finally:  # leave the shared registry as other tests expect it
        del registry._ENTRIES["test-missing-extra"]
    assert "test-missing-extra" not in AGENTS
    with pytest.raises(ConfigError, match="not yet registered"):
        register_agent("random", RandomAgent)
    with pytest.raises(ConfigError, match="module:Class"):
        register_agent("test-bad-target", "no_colon_here")


# --- the protocol and the file format ------------------------------------------------------------


def test_null_logger_fits_the_logger_protocol():
    assert isinstance(NullLogger(), Logger)
    assert NullLogger().log_scalar(EPISODE_RETURN, 1.0, 3) is None


def test_as_vector_env_batches_a_single_env_and_keeps_vector_envs():
    single = gym.make("FrozenLake-v1")
    batched = as_vector_env(single)
    assert isinstance(batched, VectorEnv) and batched.num_envs == 1
    observations, _ = batched.reset(seed=[0])
    # Source: Gymnasium vector API: batched observations have a leading copy axis.
    assert observations.shape == (1,)
    assert batched.single_observation_space == single.observation_space
    vec = SyncVectorEnv([lambda: gym.make("FrozenLake-v1")] * 2)
    assert as_vector_env(vec) is vec
    with pytest.raises(ConfigError, match="env"):
        as_vector_env("FrozenLake-v1")


@pytest.mark.parametrize("space", [
    spaces.Discrete(5, start=2),
    spaces.MultiDiscrete([[2, 3], [4, 5]], start=[[0, 1], [-1, 0]]),
    spaces.MultiBinary(4),
    spaces.Box(np.array([-1.0, -np.inf], np.float32), np.array([2.0, np.inf], np.float32)),
])
def test_spaces_survive_the_file_encoding(space):
    record, arrays = encode_space(space, "observation_space")
    json.dumps(record, allow_nan=False)  # the header part is plain JSON
    restored = decode_space(record, {f"space/observation/{k}": v for k, v in arrays.items()},
                            "observation")
    # Source: gymnasium Space equality.
    assert restored == space


def test_agent_files_are_plain_npz_with_a_json_header(tmp_path):
    agent = RandomAgent(spaces.Box(-1, 1, (3,), np.float32), spaces.Discrete(4))
    agent.learn(None, 0, seed=12)
    path = tmp_path / "random-agent"  # no suffix: the name is used as given
    agent.save(path)
    # Source: numpy.load without pickle reads the file; the header is JSON.
    with np.load(path, allow_pickle=False) as archive:
        header = json.loads(str(archive["header"]))
    assert header["format"] == "needbench-agent" and header["agent"] == "random"
    assert header["state"] == {"seed": 12}
    loaded = Agent.load(path)
    assert isinstance(loaded, RandomAgent) and loaded.seed == 12


def test_loading_a_file_that_is_no_agent_file_is_a_config_error(tmp_path):
    junk = tmp_path / "junk.npz"
    junk.write_bytes(b"not an archive")
    with pytest.raises(ConfigError, match="needbench-agent"):
        Agent.load(junk)
    other = tmp_path / "other.npz"
    np.savez(other, header=np.array(json.dumps({"format": "something-else"})))
    with pytest.raises(ConfigError, match="needbench-agent"):
        Agent.load(other)


def test_copy_seeds_are_gymnasiums_seed_plus_copy_index():
    assert copy_seeds(3, 4) == [3, 4, 5, 6]
    keys_a, keys_b = exploration_keys(3, 4), exploration_keys(3, 8)
    assert np.array_equal(keys_a, keys_b[:4]) and len(set(keys_b.tolist())) == 8
    # Copy 1 of seed 3 and copy 0 of seed 4 are the same copy seed, so the same stream.
    assert keys_a[1] == exploration_keys(4, 1)[0]
    with pytest.raises(ConfigError, match="seed"):
        copy_seeds(-1, 2)


def test_the_vector_envs_apply_copy_seeds_to_an_int_seed():
    # Source: Gymnasium's SyncVectorEnv.reset(seed=s) seeds copy j with s + j; the native
    # vector env and copy_seeds follow it, so an int seed and the list agree.
    native = gym.make_vec("needbench/Menu-v0", num_envs=3, vectorization_mode="vector_entry_point")
    sync = gym.make_vec("needbench/Menu-v0", num_envs=3, vectorization_mode="sync")
    from_int, _ = native.reset(seed=11)
    from_list, _ = native.reset(seed=copy_seeds(11, 3))
    from_sync, _ = sync.reset(seed=11)
    np.testing.assert_array_equal(from_int, from_list)
    np.testing.assert_array_equal(from_int, from_sync)
    native.close()
    sync.close()


# --- random --------------------------------------------------------------------------------------


def test_random_actions_are_uniform_and_in_the_space():
    agent = RandomAgent(spaces.Discrete(2), spaces.Discrete(5, start=1)).learn(None, 0, seed=5)
    actions = agent.act(np.zeros((20_000,), dtype=np.int64))
    counts = np.bincount(actions - 1, minlength=5)
    assert actions.min() >= 1 and actions.max() <= 5
    # Source: scipy.stats.chisquare goodness of fit to the uniform distribution.
    assert stats.chisquare(counts).pvalue > 1e-3
    box = spaces.Box(np.array([-2.0, 0.0]), np.array([0.0, 3.0]), dtype=np.float64)
    samples = RandomAgent(spaces.Discrete(2), box).learn(None, 0, seed=1).act(np.zeros(4000))
    assert samples.shape == (4000, 2) and np.all(samples >= box.low) and np.all(samples <= box.high)
    # Source: scipy.stats.kstest against the uniform law on each coordinate's interval.
    assert stats.kstest(samples[:, 1], stats.uniform(0.0, 3.0).cdf).pvalue > 1e-3


def test_random_agent_is_reproducible_from_its_seed(tmp_path):
    def actions(agent):
        return [agent.act(np.zeros((8,))).tolist() for _ in range(3)]

    first = RandomAgent(spaces.Discrete(2), spaces.Discrete(6)).learn(None, 0, seed=9)
    second = RandomAgent(spaces.Discrete(2), spaces.Discrete(6)).learn(None, 0, seed=9)
    other = RandomAgent(spaces.Discrete(2), spaces.Discrete(6)).learn(None, 0, seed=10)
    assert actions(first) == actions(second) != actions(other)
    first.save(tmp_path / "r.npz")
    reloaded = Agent.load(tmp_path / "r.npz")
    fresh = RandomAgent(spaces.Discrete(2), spaces.Discrete(6)).learn(None, 0, seed=9)
    assert actions(reloaded) == actions(fresh)  # a loaded agent restarts its seed's stream
    with pytest.raises(ConfigError, match="seed"):
        first.learn(None, 0, seed=-3)


# --- one observation or a batch, for every registered agent ---------------------------------------

#: A task each agent handles, and a budget that is quick.
ACT_CASES = {
    "random": ("needbench/Menu-v0", 0, {}),
    "exact-planner": ("needbench/Menu-v0", 0, {}),
    "tabular-q": ("needbench/Menu-v0", 200, {}),
    "setpoint-controller": ("needbench/Forage-v0", 0, {}),
    "ppo": ("needbench/Menu-v0", 64, {"n_steps": 32, "batch_size": 32, "n_epochs": 1}),
    "a2c": ("needbench/Menu-v0", 64, {"n_steps": 8}),
    "dqn": ("needbench/Menu-v0", 64, {"learning_starts": 16, "batch_size": 16}),
    "sac": ("needbench/Arena-v0", 64, {"learning_starts": 16, "batch_size": 16}),
}


def test_every_registered_agent_has_an_act_case():
    assert set(ACT_CASES) == set(AGENTS)


@pytest.mark.parametrize("name", sorted(ACT_CASES))
def test_act_takes_one_observation_or_a_batch(name):
    from needbench.agents.base import learning_env

    if name in ("ppo", "a2c", "dqn", "sac"):
        pytest.importorskip("stable_baselines3")
    task, budget, hyperparameters = ACT_CASES[name]
    single = gym.make(task)
    agent = make_agent(name, single.observation_space, single.action_space, **hyperparameters)
    env = learning_env(agent, task, {"max_steps": 30})
    agent.learn(env, budget, seed=0)
    env.close()
    observations, _ = gym.make_vec(task, num_envs=5,
                                   vectorization_mode="vector_entry_point").reset(seed=1)
    batch = np.asarray(agent.act(observations))
    # Source: Gymnasium's batch_space: B actions of the single space, with a leading axis.
    assert batch.shape == (5,) + single.action_space.shape
    one = agent.act(observations[0])  # as Stable-Baselines3's predict: one action
    assert np.shape(one) == single.action_space.shape
    assert single.action_space.contains(np.asarray(one, dtype=single.action_space.dtype))
    if name != "random":  # random draws afresh on every call
        np.testing.assert_allclose(np.asarray(one, dtype=float), batch[0].astype(float),
                                   rtol=1e-5, atol=1e-6)
    with pytest.raises(ConfigError, match="observations"):
        agent.act(observations[:, :2])  # neither one observation nor a batch of them
