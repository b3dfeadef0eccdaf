"""``exact-planner``: dynamic programming on a finite MDP the env knows exactly.

A :class:`FiniteMDP` holds P[s, a, s'] and R[s, a] (expected reward of taking a
in s), a terminal mask and the discount. :func:`value_iteration` and
:func:`policy_evaluation` are the two sweeps of Sutton & Barto (2018),
sections 4.1 and 4.4, each one array expression per sweep over all states at
once (no Python loop over states).

Terminal states are absorbing with value 0: their rows of P and R are ignored
by both sweeps (they must still be valid rows).

The agent builds its MDP from the env it is given (:func:`mdp_from_env`): a
needbench task's own finite model if it offers one, else the ``P`` table of a
Gymnasium toy-text env (FrozenLake, CliffWalking, Taxi).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, NamedTuple

import gymnasium as gym
import numpy as np
from gymnasium import spaces
from gymnasium.vector import VectorEnv

from needbench.agents.base import (
    Agent,
    Logger,
    NotApplicableError,
    check_total_steps,
    single_unwrapped,
    task_core,
)
from needbench.envs.errors import ConfigError, check_positive, check_range

#: Largest allowed |sum_s' P[s, a, s'] - 1|.
ROW_SUM_TOLERANCE = 1e-6
#: Below this share of nonzero entries, sweeps sum over the nonzeros of P only.
SPARSE_FRACTION = 0.05


class FiniteMDP:
    """A finite Markov decision process.

    Args:
        transition: P, shape (S, A, S): P[s, a, s'] probability of s' after a in s.
        reward: R, shape (S, A): expected reward of taking a in s.
        terminal: (S,) bool, absorbing states of value 0 (default: none).
        gamma: discount in [0, 1]; gamma = 1 only for episodic MDPs, i.e. with
            terminal states reachable from every state.

    Raises ConfigError naming the first bad entry (shape, probability, row sum,
    non-finite reward, gamma).
    """

    def __init__(self, transition: Any, reward: Any, terminal: Any = None, gamma: float = 0.99):
        transition = np.asarray(transition, dtype=np.float64)
        reward = np.asarray(reward, dtype=np.float64)
        if transition.ndim != 3 or transition.shape[0] != transition.shape[2]:
            raise ConfigError("mdp.transition.shape", transition.shape, "(S, A, S)")
        states, actions = transition.shape[:2]
        if states == 0 or actions == 0:
            raise ConfigError("mdp.transition.shape", transition.shape, "S >= 1 and A >= 1")
        if reward.shape != (states, actions):
            raise ConfigError("mdp.reward.shape", reward.shape, f"({states}, {actions}) = (S, A)")
        if not np.all(np.isfinite(transition)) or np.any(transition < 0):
            where = tuple(int(i) for i in np.argwhere(~(transition >= 0))[0])
            raise ConfigError(f"mdp.transition{list(where)}", float(transition[where]),
                              "a probability >= 0")
        sums = transition.sum(axis=2)
        error = np.abs(sums - 1.0)
        if np.any(error > ROW_SUM_TOLERANCE):
            s, a = (int(i) for i in np.unravel_index(np.argmax(error), error.shape))
            raise ConfigError(f"mdp.transition[{s}, {a}, :].sum()", float(sums[s, a]),
                              f"1 within {ROW_SUM_TOLERANCE} (each row is a distribution)")
        if not np.all(np.isfinite(reward)):
            s, a = (int(i) for i in np.argwhere(~np.isfinite(reward))[0])
            raise ConfigError(f"mdp.reward[{s}, {a}]", float(reward[s, a]), "a finite number")
        if terminal is None:
            terminal = np.zeros(states, dtype=bool)
        terminal = np.asarray(terminal)
        if terminal.shape != (states,) or terminal.dtype != bool:
            raise ConfigError("mdp.terminal", f"{terminal.dtype} array of shape {terminal.shape}",
                              f"a bool array of shape ({states},)")
        gamma = check_range("mdp.gamma", gamma, 0.0, 1.0)
        if gamma == 1.0:
            if not terminal.any():
                raise ConfigError("mdp.gamma", gamma, "< 1 for an MDP without terminal states")
            unreached = ~_can_reach(transition, terminal)
            if unreached.any():
                raise ConfigError("mdp.gamma", gamma,
                                  f"< 1: no terminal state is reachable from state "
                                  f"{int(np.argmax(unreached))}, so the MDP is not episodic")
        self.transition = transition
        self.reward = reward
        self.terminal = terminal
        self.gamma = gamma
        self._sparse: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None
        flat = transition.reshape(states * actions, states)
        if np.count_nonzero(flat) < SPARSE_FRACTION * flat.size:
            rows, columns = np.nonzero(flat)
            self._sparse = (rows, columns, flat[rows, columns])

    @property
    def num_states(self) -> int:
        return self.transition.shape[0]

    @property
    def num_actions(self) -> int:
        return self.transition.shape[1]

    def expected_next(self, values: np.ndarray) -> np.ndarray:
        """(S, A) expectation sum_s' P[s, a, s'] V[s'] of a value vector (S,).

        Lattice models have a handful of successors per (s, a), so when P is
        mostly zeros the sum runs over its nonzero entries only (one bincount),
        which is far cheaper than the dense (S*A, S) product.
        """
        if self._sparse is None:
            return self.transition @ values
        rows, columns, probabilities = self._sparse
        return np.bincount(rows, weights=probabilities * values[columns],
                           minlength=self.num_states * self.num_actions).reshape(
                               self.num_states, self.num_actions)

    def action_values(self, values: np.ndarray) -> np.ndarray:
        """Q[s, a] = R[s, a] + gamma sum_s' P[s, a, s'] V[s'] (0 on terminal states), (S, A)."""
        live_values = np.where(self.terminal, 0.0, values)
        q = self.reward + self.gamma * self.expected_next(live_values)
        q[self.terminal] = 0.0
        return q


def _can_reach(transition: np.ndarray, target: np.ndarray) -> np.ndarray:
    """(S,) True where some action sequence reaches ``target`` with positive probability.

    That suffices for a proper policy to exist: always taking an action that
    moves closer with positive probability ends the episode with probability 1.
    """
    adjacency = np.any(transition > 0, axis=1)  # (S, S'): some action may lead s -> s'
    reach = target.copy()
    for _ in range(transition.shape[0]):  # breadth-first layers, at most S of them
        step = reach | adjacency[:, reach].any(axis=1)
        if np.array_equal(step, reach):
            break
        reach = step
    return reach


def _stopping_threshold(gamma: float, tol: float) -> float:
    """Sup-norm change between sweeps at which V is within ``tol`` of its limit.

    For gamma < 1 the contraction bound ||V_k+1 - V*|| <= gamma/(1-gamma)
    ||V_k+1 - V_k|| (Puterman 1994, Theorem 6.3.1) gives tol (1-gamma)/gamma;
    for gamma = 1 there is no such bound and the change itself is used.
    """
    if gamma == 0.0:
        return np.inf
    if gamma == 1.0:
        return tol
    return tol * (1.0 - gamma) / gamma


class Solution(NamedTuple):
    """Result of :func:`value_iteration`: V (S,), greedy policy (S,) action indices, Q (S, A)."""

    values: np.ndarray
    policy: np.ndarray
    action_values: np.ndarray


def _check_sweep_arguments(mdp: FiniteMDP, tol: float, max_iterations: int) -> None:
    if not isinstance(mdp, FiniteMDP):
        raise ConfigError("mdp", mdp, "a FiniteMDP")
    check_positive("tol", tol)
    if not isinstance(max_iterations, (int, np.integer)) or max_iterations < 1:
        raise ConfigError("max_iterations", max_iterations, "a whole number >= 1")


def value_iteration(mdp: FiniteMDP, tol: float = 1e-8, max_iterations: int = 100_000) -> Solution:
    """Optimal values, a greedy optimal policy and Q (Sutton & Barto 2018, section 4.4).

    Stops once V is within ``tol`` (sup norm) of V* by the contraction bound
    (gamma < 1), or once a sweep changes V by less than ``tol`` (gamma = 1).
    Greedy ties go to the lowest action index. Raises ConfigError if
    ``max_iterations`` sweeps do not get there (e.g. gamma = 1 with a
    reward-earning loop that never ends).
    """
    _check_sweep_arguments(mdp, tol, max_iterations)
    threshold = _stopping_threshold(mdp.gamma, tol)
    values = np.zeros(mdp.num_states)
    for _ in range(max_iterations):
        new_values = mdp.action_values(values).max(axis=1)
        change = float(np.max(np.abs(new_values - values)))
        values = new_values
        if change < threshold:
            break
    else:
        raise ConfigError("max_iterations", max_iterations,
                          f"more sweeps: the last sweep still changed V by {change:.3g}")
    q = mdp.action_values(values)
    return Solution(values, np.argmax(q, axis=1), q)


def policy_matrix(policy: Any, num_states: int, num_actions: int) -> np.ndarray:
    """A policy as (S, A) probabilities, from (S, A) probabilities or (S,) action indices."""
    policy = np.asarray(policy)
    if policy.shape == (num_states,) and policy.dtype.kind in "iu":
        if np.any((policy < 0) | (policy >= num_actions)):
            raise ConfigError("policy", policy.tolist(), f"action indices in [0, {num_actions})")
        return np.eye(num_actions)[policy]
    if policy.shape != (num_states, num_actions):
        raise ConfigError("policy.shape", policy.shape,
                          f"({num_states}, {num_actions}) probabilities or ({num_states},) actions")
    policy = policy.astype(np.float64)
    if not np.all(np.isfinite(policy)) or np.any(policy < 0):
        raise ConfigError("policy", "negative or non-finite entries", "probabilities >= 0")
    error = np.abs(policy.sum(axis=1) - 1.0)
    if np.any(error > ROW_SUM_TOLERANCE):
        s = int(np.argmax(error))
        raise ConfigError(f"policy[{s}, :].sum()", float(policy[s].sum()),
                          f"1 within {ROW_SUM_TOLERANCE}")
    return policy


def policy_evaluation(mdp: FiniteMDP, policy: Any, tol: float = 1e-8,
                      max_iterations: int = 100_000) -> np.ndarray:
    """V^pi (S,) of a stochastic (S, A) or deterministic (S,) policy (Sutton & Barto 2018, 4.1).

    Iterates V <- R_pi + gamma P_pi V with the same stopping rule as
    :func:`value_iteration`. With gamma = 1 the policy must end episodes, or
    the sweeps do not settle and ConfigError is raised.
    """
    _check_sweep_arguments(mdp, tol, max_iterations)
    pi = policy_matrix(policy, mdp.num_states, mdp.num_actions)
    live = ~mdp.terminal
    reward_pi = np.where(live, np.einsum("sa,sa->s", pi, mdp.reward), 0.0)
    # Arrivals in terminal states add nothing: zero those columns once.
    transition_pi = np.einsum("sa,sat->st", pi, mdp.transition) * live[None, :] * live[:, None]
    threshold = _stopping_threshold(mdp.gamma, tol)
    values = np.zeros(mdp.num_states)
    for _ in range(max_iterations):
        new_values = reward_pi + mdp.gamma * (transition_pi @ values)
        change = float(np.max(np.abs(new_values - values)))
        values = new_values
        if change < threshold:
            return values
    raise ConfigError("max_iterations", max_iterations,
                      f"more sweeps (or a policy that ends episodes): last change {change:.3g}")


# --- models from envs ------------------------------------------------------------


StateIndex = Callable[[np.ndarray], np.ndarray]


class EnvModel(NamedTuple):
    """An env's finite MDP and the map from a batch of observations to state indices."""

    mdp: FiniteMDP
    state_of: StateIndex
    #: The same map as data, when the model offers it (what a saved planner stores).
    table: ObservationTable | None = None


class DiscreteStates:
    """Observation -> state for Discrete observations: the index itself (minus ``start``)."""

    def __init__(self, space: spaces.Discrete):
        self.start = int(space.start)
        self.count = int(space.n)

    def __call__(self, observations: np.ndarray) -> np.ndarray:
        return np.asarray(observations, dtype=np.int64).reshape(-1) - self.start


class ObservationTable:
    """Observation -> state by the nearest row of an (S, D) table of state observations.

    Only the first D entries of an observation are compared (a lattice model of
    the internal state ignores the world features that follow). A finite model
    whose states each emit one observation can hand this table to the planner;
    unlike an arbitrary function, it is saved with the agent.
    """

    def __init__(self, observations: Any):
        table = np.asarray(observations, dtype=np.float64)
        if table.ndim != 2 or not np.all(np.isfinite(table)):
            raise ConfigError("state_observations", f"array of shape {table.shape}",
                              "a finite (S, D) array")
        self.table = table
        self._norms = (table**2).sum(axis=1)[None, :]

    def __call__(self, observations: np.ndarray) -> np.ndarray:
        flat = np.asarray(observations, dtype=np.float64).reshape(len(observations), -1)
        head = flat[:, :self.table.shape[1]]
        # |x - t|^2 = |x|^2 - 2 x.t + |t|^2, without a (B, S, D) intermediate.
        distance = (head**2).sum(axis=1)[:, None] - 2.0 * head @ self.table.T + self._norms
        return np.argmin(distance, axis=1)


def mdp_from_toy_text(env: gym.Env | VectorEnv, gamma: float) -> EnvModel:
    """The finite MDP of a Gymnasium toy-text env from ``env.unwrapped.P``.

    ``P[s][a]`` is a list of ``(probability, next_state, reward, done)``.
    Termination belongs to a transition, not to a state (Taxi ends on the
    drop-off but its next state is an ordinary one), so when some transition
    is ``done`` the MDP gets one extra absorbing terminal state, index S, and
    every done transition leads there. Observations map to their own index.
    """
    inner = single_unwrapped(env)
    table = getattr(inner, "P", None)
    space = inner.observation_space
    if not isinstance(table, dict) or not isinstance(space, spaces.Discrete):
        raise ConfigError("env.unwrapped.P", type(table).__name__,
                          "a toy-text table P[s][a] = [(probability, next, reward, done), ...] "
                          "with a Discrete observation space")
    if not isinstance(inner.action_space, spaces.Discrete):
        raise ConfigError("env.action_space", inner.action_space, "a Discrete space")
    states, actions = int(space.n), int(inner.action_space.n)
    rows = [(s, a, p, nxt, r, done)
            for s, by_action in table.items() for a, outcomes in by_action.items()
            for p, nxt, r, done in outcomes]
    s, a, p, nxt, r, done = (np.array(column) for column in zip(*rows, strict=True))
    s, a, nxt = s.astype(np.int64), a.astype(np.int64), nxt.astype(np.int64)
    p, r, done = p.astype(np.float64), r.astype(np.float64), done.astype(bool)
    ends = bool(done.any())
    total = states + 1 if ends else states
    transition = np.zeros((total, actions, total))
    reward = np.zeros((total, actions))
    np.add.at(transition, (s, a, np.where(done, states, nxt)), p)
    np.add.at(reward, (s, a), p * r)
    terminal = np.zeros(total, dtype=bool)
    if ends:
        transition[states, :, states] = 1.0
        terminal[states] = True
    return EnvModel(FiniteMDP(transition, reward, terminal, gamma), DiscreteStates(space))


def _model_from_core(core: Any, gamma: float, options: dict[str, Any]) -> EnvModel:
    """Adapt a needbench task core's ``finite_model(**options)`` to an EnvModel.

    The model has ``transition`` (S, A, S), ``reward`` (S, A) and optionally
    ``terminal`` (S,) arrays (a FiniteMDP itself, or any object with those
    fields, so envs need not import agents) and a ``state_of(observations)``
    method. A ``(model, state_of)`` pair is accepted too, with ``state_of`` a
    function or an (S, D) table of state observations (see ObservationTable).
    """
    try:
        result = core.finite_model(**options)
    except ConfigError as error:
        # The task offers no finite model in this configuration.
        raise NotApplicableError(error.path, error.value, error.allowed) from error
    model, state_of = result if isinstance(result, tuple) else (result, result.state_of)
    mdp = model if isinstance(model, FiniteMDP) else FiniteMDP(
        model.transition, model.reward, getattr(model, "terminal", None), gamma)
    if mdp.gamma != gamma:
        mdp = FiniteMDP(mdp.transition, mdp.reward, mdp.terminal, gamma)
    if not callable(state_of):
        state_of = ObservationTable(state_of)
    return EnvModel(mdp, state_of, _observation_table(model))


def _observation_table(model: Any) -> ObservationTable | None:
    """The lattice of a needbench lattice model as a table of internal deviations.

    Such a model's live states are lattice points ``levels`` (S - 1, K) in need
    units, observed as deviations (h - h*)/band; its last state is the absorbing
    death state, which is never observed. On a rectilinear lattice the nearest
    row is the nearest lattice point, so the table reproduces ``state_of`` and
    can be stored in an agent file where a function cannot.
    """
    if not all(hasattr(model, name) for name in ("levels", "set_point", "band")):
        return None
    levels = np.asarray(model.levels, dtype=np.float64)
    return ObservationTable((levels - model.set_point) / model.band)


def mdp_from_env(env: gym.Env | VectorEnv, gamma: float, **model_options: Any) -> EnvModel:
    """The env's finite model: a needbench task's ``core.finite_model(**model_options)``
    first, else a toy-text ``P`` table; ConfigError naming what is missing otherwise."""
    core = task_core(env)
    if core is not None and callable(getattr(core, "finite_model", None)):
        return _model_from_core(core, gamma, model_options)
    inner = single_unwrapped(env)
    if isinstance(getattr(inner, "P", None), dict):
        return mdp_from_toy_text(env, gamma)
    if core is not None:
        raise NotApplicableError("env.unwrapped.core.finite_model", None,
                          f"a finite model of the task; {type(inner).__name__} offers none")
    raise NotApplicableError("env", type(inner).__name__,
                             "an env with a finite model: env.unwrapped.core.finite_model "
                      "(needbench tasks) or env.unwrapped.P (Gymnasium toy-text)")


# --- the agent ---------------------------------------------------------------------


@dataclass(frozen=True)
class PlannerHyperparameters:
    gamma: float = 0.99  # discount of the planned return, in [0, 1]
    tol: float = 1e-8  # sup-norm accuracy of the optimal values
    max_iterations: int = 100_000  # cap on value-iteration sweeps
    resolution: float | None = None  # lattice spacing (band units) asked of a needbench
    # task's finite model; None: the task's default

    def __post_init__(self):
        check_range("exact-planner.gamma", self.gamma, 0.0, 1.0)
        check_positive("exact-planner.tol", self.tol)
        if self.resolution is not None:
            check_positive("exact-planner.resolution", self.resolution)
        if not isinstance(self.max_iterations, int) or self.max_iterations < 1:
            raise ConfigError("exact-planner.max_iterations", self.max_iterations,
                              "a whole number >= 1")


class ExactPlannerAgent(Agent):
    """Acts greedily on the optimal values of the env's exact finite model.

    ``learn`` reads the model (:func:`mdp_from_env`) and runs value iteration;
    it takes no env steps, so ``total_steps``, ``seed`` and ``logger`` are
    unused. After ``learn``: ``values`` (S,), ``action_values`` (S, A),
    ``policy`` (S,) and ``mdp``.
    """

    name = "exact-planner"
    learns_from_experience = False
    Hyperparameters = PlannerHyperparameters

    def __init__(self, observation_space: spaces.Space, action_space: spaces.Space,
                 **hyperparameters: Any):
        super().__init__(observation_space, action_space, **hyperparameters)
        if not isinstance(action_space, spaces.Discrete):
            raise NotApplicableError("action_space", action_space, "a Discrete space")
        self.mdp: FiniteMDP | None = None
        self.values: np.ndarray | None = None
        self.action_values: np.ndarray | None = None
        self.policy: np.ndarray | None = None
        self._state_of: StateIndex | None = None
        self._table: ObservationTable | None = None  # the state map as data, for save

    def learn(self, env: gym.Env | VectorEnv, total_steps: int = 0, seed: int = 0,
              logger: Logger | None = None) -> ExactPlannerAgent:
        check_total_steps(total_steps)
        hp = self.hyperparameters
        options = {} if hp.resolution is None else {"resolution": hp.resolution}
        if options and task_core(env) is None:
            raise ConfigError("exact-planner.resolution", hp.resolution,
                              "None for envs that are not needbench tasks")
        model = mdp_from_env(env, hp.gamma, **options)
        if model.mdp.num_actions != self.action_space.n:
            raise ConfigError("mdp.num_actions", model.mdp.num_actions,
                              f"{self.action_space.n}, the size of the action space")
        solution = value_iteration(model.mdp, hp.tol, hp.max_iterations)
        self.mdp = model.mdp
        self.values, self.policy, self.action_values = solution
        self._state_of = model.state_of
        self._table = model.table
        return self

    def _act(self, observations: np.ndarray, deterministic: bool) -> np.ndarray:
        """Greedy actions (B,) (the optimal policy is deterministic; so is ``act``)."""
        if self.policy is None or self._state_of is None:
            raise RuntimeError("call learn(env) (or load a saved planner) before act()")
        states = self._state_of(observations)
        return self.policy[states] + int(self.action_space.start)

    def _get_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        if self.policy is None:
            return {"learned": False}, {}
        arrays = {"values": self.values, "action_values": self.action_values,
                  "policy": self.policy}
        if isinstance(self._state_of, DiscreteStates):
            meta = {"learned": True, "state_index": "discrete"}
        elif isinstance(self._state_of, ObservationTable) or self._table is not None:
            table = self._state_of if isinstance(self._state_of, ObservationTable) else self._table
            meta = {"learned": True, "state_index": "table"}
            arrays["state_observations"] = table.table
        else:
            raise ConfigError("exact-planner state index", self._state_of,
                              "a Discrete observation space or an (S, D) table of state "
                              "observations from the model (a bare function cannot be saved)")
        return meta, arrays

    def _set_state(self, meta, arrays) -> None:
        if not meta.get("learned"):
            return
        self.values = arrays["values"]
        self.action_values = arrays["action_values"]
        self.policy = arrays["policy"].astype(np.int64)
        if meta["state_index"] == "discrete":
            self._state_of = DiscreteStates(self.observation_space)
        else:
            self._state_of = ObservationTable(arrays["state_observations"])
