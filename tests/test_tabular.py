"""Homeostatic tabular Q-learning: convergence, batching, autoreset and persistence."""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest
from gymnasium import spaces
from gymnasium.vector import AutoresetMode, SyncVectorEnv
from gymnasium.wrappers import TimeLimit
from gymnasium.wrappers.vector import RecordEpisodeStatistics

import needbench.envs  # noqa: F401  (registers needbench/Menu-v0)
from needbench.agents.base import Agent
from needbench.agents.curves import (
    DISCOUNTED_DRIVE,
    EPISODE_LENGTH,
    EPISODE_RETURN,
    TIME_IN_BAND,
    deviation_tag,
)
from needbench.agents.planner import mdp_from_toy_text, policy_evaluation, value_iteration
from needbench.agents.random_agent import RandomAgent
from needbench.agents.registry import make_agent
from needbench.agents.tabular import StateIndexer, TabularQAgent, TabularQHyperparameters
from needbench.envs.errors import ConfigError

GAMMA = 0.9


def lake(slippery: bool = False) -> gym.Env:
    return gym.make("FrozenLake-v1", is_slippery=slippery)


def lake_copies(count: int, slippery: bool = False) -> SyncVectorEnv:
    return SyncVectorEnv([lambda: lake(slippery)] * count)


def new_agent(env, **hyperparameters) -> TabularQAgent:
    space = getattr(env, "single_observation_space", env.observation_space)
    actions = getattr(env, "single_action_space", env.action_space)
    return make_agent("tabular-q", space, actions, **{"gamma": GAMMA, **hyperparameters})


def greedy_start_value(agent: TabularQAgent, slippery: bool, gamma: float) -> tuple[float, float]:
    """(value of the agent's greedy policy, optimal value) at the start state, by the planner."""
    mdp = mdp_from_toy_text(lake(slippery), gamma).mdp
    policy = np.append(agent.act(np.arange(16)), 0)  # the planner's extra episode-end state
    return policy_evaluation(mdp, policy, tol=1e-12)[0], value_iteration(mdp, tol=1e-12).values[0]


class _Curves:
    def __init__(self, discount: float = 0.99):
        self.discount = discount  # the scoring discount of the stability curves
        self.points: dict[str, list[tuple[int, float]]] = {}

    def log_scalar(self, tag, value, step):
        self.points.setdefault(tag, []).append((step, value))


# --- convergence ---------------------------------------------------------------------------------


@pytest.mark.parametrize("exploration", [{}, {"exploration": "softmax", "temperature": 0.05}])
def test_q_learning_on_non_slippery_frozen_lake_finds_the_planners_optimum(exploration):
    vec = lake_copies(4)
    curves = _Curves()
    agent = new_agent(vec, learning_rate=0.5, **exploration).learn(vec, 8000, seed=1,
                                                                   logger=curves)
    # FrozenLake pays 1 at the goal and nothing else; it reports no drive.
    assert {v for _, v in curves.points[EPISODE_RETURN]} == {0.0, 1.0}
    assert set(curves.points) == {EPISODE_RETURN, EPISODE_LENGTH}
    value, optimum = greedy_start_value(agent, slippery=False, gamma=GAMMA)
    # Source: Watkins & Dayan (1992) convergence of Q-learning, checked against the exact
    # planner (itself checked against the analytic gamma^5 in test_planner.py).
    assert value == pytest.approx(optimum, abs=1e-9)
    assert optimum == pytest.approx(GAMMA**5)
    # On the optimal path the learned values are the optimal ones: gamma^(moves left - 1).
    np.testing.assert_allclose(agent.q[0].max(), GAMMA**5, rtol=1e-6)
    env = lake()
    observation, _ = env.reset(seed=5)
    for _ in range(6):
        observation, reward, terminated, _, _ = env.step(int(agent.act(np.array([observation]))[0]))
    assert terminated and reward == 1.0  # rolled out in Gymnasium: the goal in 6 moves


@pytest.mark.slow
def test_q_learning_on_slippery_frozen_lake_finds_an_optimal_policy():
    vec = lake_copies(16, slippery=True)
    agent = new_agent(vec, gamma=0.99, learning_rate=0.05, epsilon_decay_fraction=0.8)
    agent.learn(vec, 200_000, seed=0)
    value, optimum = greedy_start_value(agent, slippery=True, gamma=0.99)
    # Source: Watkins & Dayan (1992); the optimum from the exact planner.
    assert value == pytest.approx(optimum, abs=1e-3)


# --- batching and determinism --------------------------------------------------------------------


def test_eight_seeds_in_one_pass_learn_the_same_tables_as_each_seed_alone():
    seeds, copies, steps = [3, 1, 4, 15, 9, 2, 6, 5], 2, 3000
    template = new_agent(lake_copies(1), learning_rate=0.5, visit_exponent=0.6)
    together = template.learn_many(lake_copies(len(seeds) * copies), steps, seeds)
    assert template.q is None  # learn_many returns new agents
    for seed, agent in zip(seeds, together, strict=True):
        alone = new_agent(lake_copies(1), learning_rate=0.5, visit_exponent=0.6)
        alone.learn(lake_copies(copies), steps, seed=seed)
        # Common practice, no source: batching must not change any seed's arithmetic.
        np.testing.assert_array_equal(agent.q, alone.q)
    assert not np.array_equal(together[0].q, together[1].q)  # seeds do differ


def test_a_single_env_learns_like_a_vector_env_of_one_copy():
    single = new_agent(lake(), learning_rate=0.5).learn(lake(), 2000, seed=7)
    vector = new_agent(lake(), learning_rate=0.5).learn(lake_copies(1), 2000, seed=7)
    # Common practice, no source: the single env is stepped as a batch of one.
    np.testing.assert_array_equal(single.q, vector.q)


def test_native_vector_env_matches_copies_of_the_single_env():
    kwargs = dict(learning_rate=0.2, gamma=0.95)
    native = gym.make_vec("needbench/Menu-v0", num_envs=4, vectorization_mode="vector_entry_point")
    sync = SyncVectorEnv([lambda: gym.make("needbench/Menu-v0")] * 4)
    a = new_agent(native, **kwargs).learn(native, 2000, seed=11)
    b = new_agent(sync, **kwargs).learn(sync, 2000, seed=11)
    # Source: Gymnasium's SyncVectorEnv of single envs, the reference for a vector env.
    np.testing.assert_allclose(a.q, b.q, rtol=0, atol=1e-9)


# --- next-step autoreset and truncation ----------------------------------------------------------


def test_the_reset_step_of_next_step_autoreset_is_not_learned_from():
    vec = lake_copies(4, slippery=True)
    assert vec.metadata["autoreset_mode"] == AutoresetMode.NEXT_STEP
    agent = new_agent(vec, initial_value=0.25).learn(vec, 20_000, seed=0)
    holes_and_goal = [5, 7, 11, 12, 15]
    # Source: Gymnasium FrozenLake map. Holes and the goal are only ever the last
    # observation of an episode; the next step only resets the copy, so no update may
    # start there. Learning from that pseudo-transition would move these rows.
    np.testing.assert_array_equal(agent.q[holes_and_goal], 0.25)
    assert np.all(agent.q[[0, 1, 4]] != 0.25)


class _EndlessPayoff(gym.Env):
    """One state, one action, reward 1 a step, never terminates."""

    observation_space = spaces.Discrete(1)
    action_space = spaces.Discrete(1)

    def reset(self, *, seed=None, options=None):
        super().reset(seed=seed)
        return 0, {}

    def step(self, action):
        return 0, 1.0, False, False, {}


def test_truncation_bootstraps_and_termination_does_not():
    env = TimeLimit(_EndlessPayoff(), max_episode_steps=3)
    agent = TabularQAgent(env.observation_space, env.action_space, gamma=0.5,
                          learning_rate=0.5).learn(env, 400, seed=0)
    # Source: analytic, sum_t 0.5^t = 2: a time limit is no terminal state, so the
    # target bootstraps from the last observation (Pardo et al. 2018).
    assert agent.q[0, 0] == pytest.approx(2.0, abs=1e-9)


def test_copies_updating_one_entry_in_a_step_share_one_step_size():
    vec = SyncVectorEnv([_EndlessPayoff] * 8)
    agent = TabularQAgent(vec.single_observation_space, vec.single_action_space, gamma=0.5,
                          learning_rate=0.5).learn(vec, 8, seed=0)  # one batched step
    # Source: the Q-learning update Q <- Q + alpha (r + gamma max Q' - Q) (Sutton & Barto
    # 2018, eq. 6.8) from Q = 0 with alpha = 0.5 and r = 1: eight copies making the same
    # update in one step average their TD errors rather than add eight steps.
    assert agent.q[0, 0] == pytest.approx(0.5)


# --- observations -> states ----------------------------------------------------------------------


def test_box_bins_count_band_units_like_numpy_digitize():
    space = spaces.Box(-12.0, 12.0, (3,), np.float32)
    hp = TabularQHyperparameters(internal_bins=8, internal_range=4.0, world_bins=3,
                                 world_low=-3.0, world_high=3.0)
    indexer = StateIndexer(space, hp, internal_dimensions=2)
    rng = np.random.default_rng(0)
    observations = rng.uniform(-6, 6, size=(500, 3)).astype(np.float32)
    # Source: numpy.digitize on the edges: interior edges -3..3 band units (one per band
    # unit, so the band edges +-1 and the set point 0 are edges), world edges -1 and 1.
    internal = np.digitize(observations[:, :2], np.arange(-3.0, 4.0))
    world = np.digitize(observations[:, 2], [-1.0, 1.0])
    expected = (internal[:, 0] * 8 + internal[:, 1]) * 3 + world
    np.testing.assert_array_equal(indexer(observations), expected)
    assert indexer.num_states == 8 * 8 * 3


def test_multidiscrete_states_follow_numpy_ravel_multi_index():
    space = spaces.MultiDiscrete([3, 4, 2], start=[1, 0, -1])
    indexer = StateIndexer(space, TabularQHyperparameters(), 0)
    space.seed(0)
    samples = np.stack([space.sample() for _ in range(50)])
    # Source: numpy.ravel_multi_index (C order).
    expected = np.ravel_multi_index((samples - space.start).T, (3, 4, 2))
    np.testing.assert_array_equal(indexer(samples), expected)


def test_menu_observations_start_with_the_internal_deviations():
    vec = gym.make_vec("needbench/Menu-v0", num_envs=2, vectorization_mode="vector_entry_point")
    agent = new_agent(vec).learn(vec, 20, seed=0)
    # Source: the Menu docstring: the K = 2 internal deviations come first.
    assert agent.internal_dimensions == 2
    assert agent.indexer.num_states == 8**2 * 4**2


# --- learning on a needbench task ----------------------------------------------------------------


def test_episode_curves_agree_with_gymnasium_episode_statistics():
    vec = RecordEpisodeStatistics(
        gym.make_vec("needbench/Menu-v0", num_envs=8, vectorization_mode="vector_entry_point"))
    curves = _Curves()
    recorded: list[tuple[float, int]] = []
    step = vec.step

    def recording_step(actions):
        result = step(actions)
        info = result[-1]
        if "episode" in info:
            done = info["_episode"]
            recorded.extend(zip(info["episode"]["r"][done], info["episode"]["l"][done],
                                strict=True))
        return result

    vec.step = recording_step
    agent = new_agent(vec, gamma=0.95)
    agent.learn(vec, 8 * 400, seed=2, logger=curves)
    returns = [v for _, v in curves.points[EPISODE_RETURN]]
    lengths = [v for _, v in curves.points[EPISODE_LENGTH]]
    # Source: gymnasium.wrappers.vector.RecordEpisodeStatistics (same episodes, same order
    # within a step: copy index).
    assert len(returns) == len(recorded) > 10
    np.testing.assert_allclose(returns, [r for r, _ in recorded], rtol=1e-5)
    np.testing.assert_array_equal(lengths, [n for _, n in recorded])
    for tag in (DISCOUNTED_DRIVE, TIME_IN_BAND, deviation_tag("energy"),
                deviation_tag("water")):
        assert len(curves.points[tag]) == len(returns)
    assert all(0.0 <= v <= 1.0 for _, v in curves.points[TIME_IN_BAND])


def test_stability_curves_follow_the_episode_trace_and_the_tasks_drive():
    gamma = 0.9
    vec = gym.make_vec("needbench/Menu-v0", num_envs=1, vectorization_mode="vector_entry_point",
                       max_steps=30)
    core = vec.unwrapped.core
    levels: list[np.ndarray] = []  # per env step: (level, set_point, done, first of episode)
    reset, step = vec.reset, vec.step

    def recording_reset(**kwargs):
        observations, info = reset(**kwargs)
        levels.append((info["level"][0], info["set_point"][0], False, True))
        return observations, info

    def recording_step(actions):
        result = step(actions)
        info, first = result[-1], bool(levels[-1][2])
        levels.append((info["level"][0], info["set_point"][0],
                       bool(result[2][0] or result[3][0]), first))
        return result

    vec.reset, vec.step = recording_reset, recording_step
    curves = _Curves(discount=gamma)  # the scoring discount, not the agent's 0.5
    new_agent(vec, gamma=0.5).learn(vec, 200, seed=4, logger=curves)

    # The reference: split the trace into episodes h_0..h_T and score each with the
    # task's own drive object and comfort bands.
    episodes, current = [], []
    for level, set_point, done, first in levels:
        if first:
            current = [(level, set_point)]
            continue
        current.append((level, set_point))
        if done:
            episodes.append(current)
    assert len(episodes) >= 3
    expected_drive, expected_band, expected_energy = [], [], []
    for episode in episodes:
        level = np.array([h for h, _ in episode])
        set_point = np.array([h_star for _, h_star in episode])
        # Source: the task's drive object (interfaces: never reimplement the drive) and
        # the convention of needbench.agents.curves: D(h_0)..D(h_{T-1}) discounted by gamma^t.
        drive = core.drive(level, set_point)[:-1]
        expected_drive.append(float(np.sum(gamma ** np.arange(len(drive)) * drive)))
        deviation = (level[1:] - set_point[1:]) / core.band
        expected_band.append(float(np.mean(np.all(np.abs(deviation) <= 1.0, axis=1))))
        expected_energy.append(float(np.mean(np.abs(deviation[:, 0]))))
    logged = {tag: [v for _, v in points] for tag, points in curves.points.items()}
    np.testing.assert_allclose(logged[DISCOUNTED_DRIVE], expected_drive, rtol=1e-9)
    np.testing.assert_allclose(logged[TIME_IN_BAND], expected_band, rtol=1e-9)
    np.testing.assert_allclose(logged[deviation_tag("energy")], expected_energy, rtol=1e-9)


def test_tabular_q_keeps_menu_bodies_alive_longer_than_random_actions():
    vec = gym.make_vec("needbench/Menu-v0", num_envs=64, vectorization_mode="vector_entry_point")
    agent = new_agent(vec, gamma=0.95).learn(vec, 64 * 1500, seed=0)
    random_agent = RandomAgent(vec.single_observation_space, vec.single_action_space)
    random_agent.learn(vec, 0, seed=0)

    def mean_steps_alive(policy) -> float:
        observations, _ = vec.reset(seed=list(range(1000, 1064)))
        alive_steps = np.zeros(64)
        ended = np.zeros(64, dtype=bool)
        for _ in range(200):
            observations, _, terminated, truncated, _ = vec.step(policy(observations))
            alive_steps += ~ended
            ended |= terminated | truncated
        return float(alive_steps.mean())

    learned, random_steps = mean_steps_alive(agent.act), mean_steps_alive(random_agent.act)
    # Common practice, no source: a learner must beat uniform random actions.
    assert learned > random_steps + 50


@pytest.mark.slow
def test_tabular_q_on_menu_reaches_the_planners_greedy_policy():
    gamma, resolution = 0.9, 0.5
    env = gym.make("needbench/Menu-v0")
    planner = make_agent("exact-planner", env.observation_space, env.action_space, gamma=gamma,
                         resolution=resolution).learn(env)
    model = env.unwrapped.core.finite_model(resolution=resolution)
    lattice = (model.levels - model.set_point) / model.band  # (S - 1, K) band units
    side = len(model.axes[0])
    vec = gym.make_vec("needbench/Menu-v0", num_envs=256, vectorization_mode="vector_entry_point")
    # Bins of the lattice spacing centred on the lattice points; the world part is ignored,
    # so tabular-q's states are the planner's states.
    agent = new_agent(vec, gamma=gamma, internal_bins=side, internal_range=side * resolution / 2,
                      world_bins=1, learning_rate=0.1, epsilon_end=0.1)
    agent.learn(vec, 256 * 2500, seed=0)
    lattice_observations = np.concatenate([lattice, np.zeros_like(lattice)], axis=1)
    # Source: the task's own state_of (needbench.envs.lattice).
    np.testing.assert_array_equal(agent.indexer(lattice_observations),
                                  model.state_of(lattice_observations))

    # Where the planner's policy takes the body, count the steps on which the two agree.
    observations, _ = vec.reset(seed=list(range(9000, 9256)))
    agree = steps = 0
    for _ in range(200):
        planned = planner.act(observations)
        agree += int(np.sum(agent.act(observations) == planned))
        steps += planned.size
        observations, *_ = vec.step(planned)
    # Source: Watkins & Dayan (1992) convergence, against the exact planner. Not 100%:
    # Q-learning on aggregated lattice cells and the planner's interpolated lattice
    # model are different MDPs; their greedy choices part where action values are close.
    assert agree / steps >= 0.95


# --- persistence and validation ------------------------------------------------------------------


def test_save_load_round_trip_restores_the_table_and_the_actions(tmp_path):
    vec = gym.make_vec("needbench/Menu-v0", num_envs=4, vectorization_mode="vector_entry_point")
    agent = new_agent(vec, internal_bins=6, exploration="softmax", world_low=(-2.0, -1.0),
                      world_high=2.0).learn(vec, 800, seed=3)
    path = tmp_path / "tabular.npz"
    agent.save(path)
    loaded = Agent.load(path)
    assert isinstance(loaded, TabularQAgent)
    assert loaded.hyperparameters == agent.hyperparameters
    np.testing.assert_array_equal(loaded.q, agent.q)
    observations, _ = vec.reset(seed=99)
    np.testing.assert_array_equal(loaded.act(observations), agent.act(observations))
    agent._reseed(3)  # both stochastic streams restart from the learning seed
    np.testing.assert_array_equal(loaded.act(observations, deterministic=False),
                                  agent.act(observations, deterministic=False))
    with pytest.raises(ConfigError, match="'tabular-q'"):
        from needbench.agents.planner import ExactPlannerAgent

        ExactPlannerAgent.load(path)


def test_configuration_errors_name_the_field():
    vec = lake_copies(3)
    with pytest.raises(ConfigError, match="tabular-q.exploration"):
        new_agent(vec, exploration="greedy")
    with pytest.raises(ConfigError, match="tabular-q.learning_rate"):
        new_agent(vec, learning_rate=0.0)
    with pytest.raises(ConfigError, match=r"did you mean 'learning_rate'"):
        new_agent(vec, learning_rat=0.1)
    with pytest.raises(ConfigError, match="a multiple of 2"):
        new_agent(vec).learn_many(vec, 100, seeds=[0, 1])
    with pytest.raises(ConfigError, match="distinct seeds"):
        new_agent(vec).learn_many(lake_copies(2), 100, seeds=[0, 0])
    same_step = SyncVectorEnv([lake] * 2, autoreset_mode=AutoresetMode.SAME_STEP)
    with pytest.raises(ConfigError, match="NEXT_STEP"):
        new_agent(vec).learn(same_step, 100, seed=0)
    unbounded = spaces.Box(-np.inf, np.inf, (2,), np.float32)
    with pytest.raises(ConfigError, match="world_low"):
        TabularQAgent(unbounded, spaces.Discrete(2), internal_dimensions=0)
    with pytest.raises(ConfigError, match="state count"):
        TabularQAgent(spaces.Box(-1, 1, (12,), np.float32), spaces.Discrete(2),
                      internal_dimensions=12)
    with pytest.raises(RuntimeError, match="learn"):
        new_agent(vec).act(np.zeros(3, dtype=np.int64))


def test_world_bins_per_feature():
    # By hand: Forage-v0 has 3 needs and 11 world features; 6 bins per need and
    # bins (1, 1, 2, 2, 3, 3, 1, 3, 3, 3, 3) give 6^3 * 2^2 * 3^6 = 629,856 states.
    import gymnasium as gym

    from needbench.agents import make_agent
    from needbench.envs.errors import ConfigError

    env = gym.make("needbench/Forage-v0")
    agent = make_agent("tabular-q", env.observation_space, env.action_space, internal_bins=6,
                       world_bins=[1, 1, 2, 2, 3, 3, 1, 3, 3, 3, 3])
    agent.learn(env, 10, seed=0)
    assert agent.q.shape == (6 ** 3 * 2 ** 2 * 3 ** 6, 5)
    with pytest.raises(ConfigError, match="world_bins"):
        make_agent("tabular-q", env.observation_space, env.action_space,
                   world_bins=[2, 2]).learn(env, 10, seed=0)
    with pytest.raises(ConfigError, match=r"world_bins\[1\]"):
        make_agent("tabular-q", env.observation_space, env.action_space, world_bins=[2, 0])
