"""The exact planner: value iteration and policy evaluation against published and exact values."""

from __future__ import annotations

import math
from types import SimpleNamespace

import gymnasium as gym
import numpy as np
import pytest
from gymnasium import spaces
from gymnasium.vector import SyncVectorEnv
from scipy import stats

from needbench.agents.base import Agent
from needbench.agents.planner import (
    ExactPlannerAgent,
    FiniteMDP,
    mdp_from_env,
    mdp_from_toy_text,
    policy_evaluation,
    value_iteration,
)
from needbench.agents.registry import make_agent
from needbench.envs.errors import ConfigError

# --- Sutton & Barto (2018), Example 4.1: the 4x4 gridworld -------------------------------


def small_gridworld() -> FiniteMDP:
    """States 0..15 row by row; 0 and 15 terminal; up/down/right/left; -1 per step;
    a move off the grid leaves the state unchanged; gamma = 1."""
    moves = [(-1, 0), (1, 0), (0, 1), (0, -1)]
    transition = np.zeros((16, 4, 16))
    for s in range(16):
        row, col = divmod(s, 4)
        for a, (dr, dc) in enumerate(moves):
            r, c = row + dr, col + dc
            nxt = r * 4 + c if 0 <= r < 4 and 0 <= c < 4 else s
            transition[s, a, nxt] = 1.0
    reward = -np.ones((16, 4))
    terminal = np.zeros(16, dtype=bool)
    terminal[[0, 15]] = True
    return FiniteMDP(transition, reward, terminal, gamma=1.0)


def test_random_policy_values_match_sutton_barto_figure_4_1():
    mdp = small_gridworld()
    values = policy_evaluation(mdp, np.full((16, 4), 0.25), tol=1e-10)
    # Source: Sutton & Barto (2018), Example 4.1 / Figure 4.1 (k = infinity), v_pi of the
    # equiprobable random policy.
    expected = [0, -14, -20, -22, -14, -18, -20, -20, -20, -20, -18, -14, -22, -20, -14, 0]
    np.testing.assert_allclose(values, expected, atol=1e-6)


def test_optimal_gridworld_values_are_minus_the_distance_to_the_nearest_corner():
    mdp = small_gridworld()
    solution = value_iteration(mdp, tol=1e-10)
    rows, cols = np.divmod(np.arange(16), 4)
    distance = np.minimum(rows + cols, (3 - rows) + (3 - cols))
    # Source: Sutton & Barto (2018), Figure 4.1 (greedy policy at k = infinity): each step
    # costs 1, so v* is minus the Manhattan distance to the nearest terminal corner.
    np.testing.assert_allclose(solution.values, -distance, atol=1e-9)
    # The greedy policy is optimal: evaluating it gives v* back.
    np.testing.assert_allclose(policy_evaluation(mdp, solution.policy, tol=1e-10),
                               solution.values, atol=1e-9)


def test_policy_evaluation_solves_the_bellman_linear_system():
    rng = np.random.default_rng(7)
    transition = rng.random((6, 3, 6))
    transition /= transition.sum(axis=2, keepdims=True)
    reward = rng.normal(size=(6, 3))
    policy = rng.random((6, 3))
    policy /= policy.sum(axis=1, keepdims=True)
    mdp = FiniteMDP(transition, reward, gamma=0.9)
    p_pi = np.einsum("sa,sat->st", policy, transition)
    r_pi = (policy * reward).sum(axis=1)
    # Source: Sutton & Barto (2018), eq. 4.4 as the linear system (I - gamma P_pi) v = r_pi,
    # solved by numpy.linalg.solve.
    exact = np.linalg.solve(np.eye(6) - 0.9 * p_pi, r_pi)
    np.testing.assert_allclose(policy_evaluation(mdp, policy, tol=1e-10), exact, atol=1e-9)
    # Value iteration's optimum dominates this policy's values, state by state.
    assert np.all(value_iteration(mdp, tol=1e-10).values >= exact - 1e-9)


def test_value_iteration_on_a_sparse_model_satisfies_the_bellman_optimality_equation():
    # 300 states, 3 actions, 4 successors each: under 2% nonzeros, the sparse sweep path.
    rng = np.random.default_rng(11)
    states, actions, gamma = 300, 3, 0.95
    transition = np.zeros((states, actions, states))
    for s in range(states):
        for a in range(actions):
            successors = rng.choice(states, size=4, replace=False)
            transition[s, a, successors] = rng.dirichlet(np.ones(4))
    reward = rng.normal(size=(states, actions))
    mdp = FiniteMDP(transition, reward, gamma=gamma)
    solution = value_iteration(mdp, tol=1e-10)
    # Source: Bellman optimality equation (Sutton & Barto 2018, eq. 4.1), evaluated densely
    # with numpy.einsum; and the greedy policy's values by numpy.linalg.solve (eq. 4.4).
    backup = (reward + gamma * np.einsum("sat,t->sa", transition, solution.values)).max(axis=1)
    np.testing.assert_allclose(backup, solution.values, atol=1e-9)
    p_greedy = transition[np.arange(states), solution.policy]
    r_greedy = reward[np.arange(states), solution.policy]
    exact = np.linalg.solve(np.eye(states) - gamma * p_greedy, r_greedy)
    np.testing.assert_allclose(solution.values, exact, atol=1e-8)
    np.testing.assert_allclose(policy_evaluation(mdp, solution.policy, tol=1e-10), exact,
                               atol=1e-8)


# --- Gymnasium FrozenLake-v1 built from env.unwrapped.P --------------------------------


def test_non_slippery_frozen_lake_start_value_is_gamma_to_the_shortest_path_minus_one():
    gamma = 0.9
    env = gym.make("FrozenLake-v1", is_slippery=False)
    model = mdp_from_toy_text(env, gamma)
    solution = value_iteration(model.mdp, tol=1e-12)
    # Source: analytic. The 4x4 map's shortest start-to-goal path has 6 moves and only the
    # last one pays 1, so v*(start) = gamma^(6 - 1).
    assert solution.values[0] == pytest.approx(gamma**5, abs=1e-10)
    # Rolled out in Gymnasium itself, the greedy policy reaches the goal in those 6 moves.
    observation, _ = env.reset(seed=0)
    moves, terminated = 0, False
    while not terminated and moves < 16:
        state = int(model.state_of(np.array([observation]))[0])
        observation, reward, terminated, _, _ = env.step(int(solution.policy[state]))
        moves += 1
    assert (moves, reward, terminated) == (6, 1.0, True)


def test_slippery_frozen_lake_success_rate_matches_the_planned_value():
    env = gym.make("FrozenLake-v1", is_slippery=True, max_episode_steps=1000)
    model = mdp_from_toy_text(env, 1.0)  # gamma = 1: the value is the success probability
    solution = value_iteration(model.mdp, tol=1e-12)
    policy = solution.policy
    # A 1000-step limit cuts off a negligible share of episodes: the mass still on live
    # states after 1000 steps of the greedy chain, computed exactly.
    chain = model.mdp.transition[np.arange(model.mdp.num_states), policy]
    live = ~model.mdp.terminal
    mass = np.zeros(model.mdp.num_states)
    mass[0] = 1.0
    for _ in range(1000):
        mass = (mass @ chain) * live
    assert mass.sum() < 1e-6

    episodes, successes = 3000, 0
    observation, _ = env.reset(seed=2024)
    for episode in range(episodes):
        if episode:
            observation, _ = env.reset()
        done = False
        while not done:
            observation, reward, terminated, truncated, _ = env.step(int(policy[observation]))
            done = terminated or truncated
        successes += int(reward == 1.0)
    # Source: Clopper & Pearson (1934) exact binomial interval via scipy.stats.binomtest.
    # With 3000 episodes and p near 0.82 its 99.9% half width is about 0.023.
    interval = stats.binomtest(successes, episodes).proportion_ci(0.999, method="exact")
    assert interval.low <= solution.values[0] <= interval.high


def test_toy_text_conversion_routes_done_transitions_to_one_absorbing_state():
    env = gym.make("FrozenLake-v1", is_slippery=True)
    mdp = mdp_from_toy_text(env, 0.95).mdp
    table = env.unwrapped.P
    assert mdp.num_states == 17 and mdp.terminal.tolist() == [False] * 16 + [True]
    for s in range(16):
        for a in range(4):
            # Source: Gymnasium's own P table. Done mass goes to the extra state 16; the
            # rest keeps its next state; R is the probability-weighted reward.
            done_mass = sum(p for p, _, _, done in table[s][a] if done)
            assert mdp.transition[s, a, 16] == pytest.approx(done_mass)
            assert mdp.reward[s, a] == pytest.approx(sum(p * r for p, _, r, _ in table[s][a]))


# --- the agent and the env hook ------------------------------------------------------------


def test_planner_agent_on_a_vector_env_acts_greedily_and_survives_save_load(tmp_path):
    vec = SyncVectorEnv([lambda: gym.make("FrozenLake-v1", is_slippery=False)] * 3)
    agent = make_agent("exact-planner", vec.single_observation_space,
                       vec.single_action_space, gamma=0.9)
    agent.learn(vec, total_steps=0, seed=0)
    reference = value_iteration(mdp_from_toy_text(vec, 0.9).mdp)
    observations = np.arange(16)
    np.testing.assert_array_equal(agent.act(observations), reference.policy[:16])
    path = tmp_path / "planner.npz"
    agent.save(path)
    loaded = Agent.load(path)
    assert isinstance(loaded, ExactPlannerAgent) and loaded.hyperparameters.gamma == 0.9
    np.testing.assert_array_equal(loaded.act(observations), agent.act(observations))
    np.testing.assert_array_equal(loaded.values, agent.values)


class _TwoChoiceCore:
    """A made-up finite model in the shape a needbench task core offers: state 0 can
    stay (reward 1 per step, forever) or jump to terminal state 1 (reward 5 once)."""

    def __init__(self, table: bool):
        self.table = table

    def finite_model(self):
        transition = np.zeros((2, 2, 2))
        transition[0, 0, 0] = 1.0
        transition[0, 1, 1] = 1.0
        transition[1, :, 1] = 1.0
        model = SimpleNamespace(transition=transition, reward=np.array([[1.0, 5.0], [0.0, 0.0]]),
                                terminal=np.array([False, True]))
        if self.table:
            return model, np.array([[0.0], [1.0]])
        return model, lambda observations: np.rint(observations[:, 0]).astype(np.int64)


class _TwoChoiceTask(gym.Env):
    observation_space = spaces.Box(0.0, 1.0, (1,), np.float32)
    action_space = spaces.Discrete(2)

    def __init__(self, table: bool):
        self.core = _TwoChoiceCore(table)


@pytest.mark.parametrize("table", [True, False])
def test_mdp_from_env_prefers_the_task_core_finite_model(table, tmp_path):
    env = _TwoChoiceTask(table)
    for gamma, best in ((0.9, 0), (0.5, 1)):
        agent = ExactPlannerAgent(env.observation_space, env.action_space, gamma=gamma)
        agent.learn(env)
        # Source: analytic. Staying is worth 1/(1 - gamma) (10 at 0.9, 2 at 0.5), jumping 5.
        assert agent.values[0] == pytest.approx(max(1 / (1 - gamma), 5.0), abs=1e-7)
        assert agent.act(np.array([[0.1]], np.float32)).tolist() == [best]
    path = tmp_path / "two.npz"
    if table:
        agent.save(path)
        assert Agent.load(path).act(np.array([[0.0], [0.9]])).tolist() == [1, 0]
    else:
        with pytest.raises(ConfigError, match="cannot be saved"):
            agent.save(path)


class _ModelFreeTask(gym.Env):
    """A task core without a finite model."""

    observation_space = spaces.Box(0.0, 1.0, (1,), np.float32)
    action_space = spaces.Discrete(2)
    core = object()


def test_mdp_from_env_names_what_is_missing():
    with pytest.raises(ConfigError, match="finite_model"):
        mdp_from_env(_ModelFreeTask(), 0.9)
    with pytest.raises(ConfigError, match=r"env.unwrapped.P"):
        mdp_from_env(gym.make("CartPole-v1"), 0.9)
    with pytest.raises(ConfigError, match="exact-planner.resolution"):
        ExactPlannerAgent(spaces.Discrete(16), spaces.Discrete(4), resolution=0.5).learn(
            gym.make("FrozenLake-v1"))


def test_planner_on_menu_uses_the_tasks_lattice_model_and_saves_its_state_map(tmp_path):
    import needbench.envs  # noqa: F401  (registers the tasks)

    env = gym.make("needbench/Menu-v0")
    agent = ExactPlannerAgent(env.observation_space, env.action_space, gamma=0.9,
                              resolution=0.5).learn(env)
    model = env.unwrapped.core.finite_model(resolution=0.5)
    # Source: the task's own finite model (needbench.envs.lattice): same MDP, same states.
    np.testing.assert_array_equal(agent.mdp.transition, model.transition)
    rng = np.random.default_rng(3)
    observations = rng.uniform(-8.0, 8.0, size=(2000, 4)).astype(np.float32)
    np.testing.assert_array_equal(agent.act(observations),
                                  agent.policy[model.state_of(observations)])
    path = tmp_path / "menu-planner.npz"
    agent.save(path)
    loaded = Agent.load(path)
    # The saved lattice table reproduces the model's state_of (nearest lattice point).
    np.testing.assert_array_equal(loaded.act(observations), agent.act(observations))


def test_lattice_rewards_and_planner_values_follow_the_tasks_lethal_rule():
    import needbench.envs  # noqa: F401  (registers the tasks)

    kwargs = {"lethal_penalty": 5.0,
              "need_overrides": {"energy": {"drain": 0.6, "uptake_rate": math.inf}}}
    envs = {rule: gym.make("needbench/Menu-v0", on_lethal=rule, **kwargs)
            for rule in ("terminate", "penalise")}
    models = {rule: env.unwrapped.core.finite_model(resolution=0.5) for rule, env in envs.items()}
    terminate, penalise = models["terminate"], models["penalise"]
    edge = np.argmin(terminate.levels[:, 0])  # the hungriest lattice point
    # Under "terminate" resting at the edge leads to death; under "penalise" the
    # level is held at the bound and nothing dies (no mass on the death state).
    assert terminate.transition[edge, 0, -1] > 0.5
    assert np.all(penalise.transition[:-1, :, -1] == 0.0)
    # The step that crosses the bound pays the penalty under both rules.
    assert terminate.reward[edge, 0] < -4.0 and penalise.reward[edge, 0] < -4.0
    # The task's own step under "penalise" pays what the model says.
    env = envs["penalise"]
    env.reset(seed=0)
    core = env.unwrapped.core
    core.body = core.body._replace(level=penalise.levels[edge:edge + 1].copy())
    _, reward, *_ = env.step(0)
    assert reward == pytest.approx(penalise.reward[edge, 0], abs=1e-12)
    # Death ends the penalties under "terminate"; held at the bound, a body that
    # only rests keeps paying them, so that policy is worth less under "penalise".
    mdps = {rule: mdp_from_env(env, 0.9, resolution=0.5).mdp for rule, env in envs.items()}
    rest = {rule: policy_evaluation(mdp, np.zeros(mdp.transition.shape[0], np.int64))
            for rule, mdp in mdps.items()}
    assert rest["penalise"][edge] < rest["terminate"][edge] - 5.0


# --- validation -----------------------------------------------------------------------------


def _with_entry(transition, index, row):
    transition = transition.copy()
    transition[index] = row
    return transition


def _chain(states=3, actions=2):
    transition = np.zeros((states, actions, states))
    transition[:, :, -1] = 1.0
    return transition, np.zeros((states, actions))


@pytest.mark.parametrize(
    ("change", "path"),
    [
        (lambda p, r: (p[:, :, :2], r), "mdp.transition.shape"),
        (lambda p, r: (p, r[:, :1]), "mdp.reward.shape"),
        (lambda p, r: (p * 0.9, r), r"mdp.transition\[0, 0, :\].sum\(\)"),
        (lambda p, r: (_with_entry(p, (0, 0), [-0.5, 0.5, 1.0]), r), r"mdp.transition\[0, 0, 0\]"),
        (lambda p, r: (p, np.where(r == 0, np.nan, r)), r"mdp.reward\[0, 0\]"),
    ],
)
def test_finite_mdp_rejects_malformed_arrays(change, path):
    transition, reward = change(*_chain())
    with pytest.raises(ConfigError, match=path):
        FiniteMDP(transition, reward, gamma=0.9)


def test_finite_mdp_gamma_rules():
    transition, reward = _chain()
    for gamma in (-0.1, 1.5, float("nan")):
        with pytest.raises(ConfigError, match="mdp.gamma"):
            FiniteMDP(transition, reward, gamma=gamma)
    with pytest.raises(ConfigError, match="without terminal states"):
        FiniteMDP(transition, reward, gamma=1.0)
    FiniteMDP(transition, reward, [False, False, True], gamma=1.0)  # episodic: allowed
    # State 0 loops on itself whatever it does, so it never reaches the terminal state.
    transition[0] = 0.0
    transition[0, :, 0] = 1.0
    with pytest.raises(ConfigError, match="not episodic"):
        FiniteMDP(transition, reward, [False, False, True], gamma=1.0)
    with pytest.raises(ConfigError, match="mdp.terminal"):
        FiniteMDP(transition, reward, [0, 0, 1], gamma=0.5)


def test_sweeps_reject_bad_policies_and_report_non_convergence():
    mdp = small_gridworld()
    with pytest.raises(ConfigError, match=r"policy\[0, :\].sum"):
        policy_evaluation(mdp, np.full((16, 4), 0.3))
    with pytest.raises(ConfigError, match="policy.shape"):
        policy_evaluation(mdp, np.full((16, 3), 1 / 3))
    with pytest.raises(ConfigError, match="action indices"):
        policy_evaluation(mdp, np.full(16, 4))
    # Always "up" keeps states 1-3 bumping into the top wall: with gamma = 1 their
    # values fall without bound.
    with pytest.raises(ConfigError, match="max_iterations"):
        policy_evaluation(mdp, np.zeros(16, dtype=np.int64), max_iterations=500)
    with pytest.raises(ConfigError, match="tol"):
        value_iteration(mdp, tol=0.0)
    with pytest.raises(ConfigError, match="exact-planner.gamma"):
        ExactPlannerAgent(spaces.Discrete(16), spaces.Discrete(4), gamma=2.0)
