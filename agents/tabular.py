"""``tabular-q``: homeostatic Q-learning, batched over env copies and seeds in NumPy.

Q-learning (Watkins & Dayan 1992) on whatever reward the env gives. With a
needbench task's drive-reduction channel, r_t = D(h_t) - D(h_{t+1}), this is
the homeostatic reinforcement learning of Keramati & Gutkin (2014).

Observations are turned into one state index:

* Discrete: the index itself; MultiDiscrete: the mixed-radix index of its entries.
* Box: every entry falls into one of a few equal-width bins and the bin indices
  are combined (mixed radix). The first ``internal_dimensions`` entries are the
  internal state as deviations in comfort-band units, binned over
  [-internal_range, +internal_range] band units; the remaining (world) entries
  are binned over [world_low, world_high] (by default the Box bounds). Values
  beyond the range fall into the end bins.

Batched learning: one step of the loop steps every copy of a Gymnasium vector
env and applies one vectorised update to all of them. Several seeds learn in
the same pass (:meth:`TabularQAgent.learn_many`): Q has shape (seeds, S, A) and
seed g owns copies g*C .. g*C+C-1. When several copies of one seed update the
same (state, action) in one step, their TD errors are averaged, so the step
size does not grow with the number of copies. Exploration draws come from
per-copy counter-based streams (needbench.envs.streams, keyed by
:func:`needbench.agents.base.exploration_keys`), and seed g's copies are reset
with :func:`needbench.agents.base.copy_seeds` (seed + j), so seed g learns the
same Q-table whether it learns alone or beside other seeds.

Learning curves: at each episode's end the scalars of
:mod:`needbench.agents.curves` (``episode/return``, ``episode/length``,
``stability/...`` with the logger's scoring discount), at the seed's step count.

Vector autoreset is Gymnasium's next-step mode: the step after a copy's
episode ends only resets it; that transition (last observation -> first one)
is skipped. Truncation bootstraps from the last observation; termination does not.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import gymnasium as gym
import numpy as np
from gymnasium import spaces
from gymnasium.vector import VectorEnv

from needbench.agents.base import (
    Agent,
    Logger,
    NotApplicableError,
    as_vector_env,
    check_seed,
    check_total_steps,
    copy_seeds,
    exploration_keys,
    require_next_step_autoreset,
    task_core,
)
from needbench.agents.curves import EpisodeStability, scoring_discount
from needbench.envs.errors import ConfigError, check_choice, check_finite, check_range
from needbench.envs.streams import CopyStreams

#: Upper bound on S * A per seed (a float64 Q-table of this size takes 512 MiB).
MAX_TABLE_ENTRIES = 2**26


def _check_whole(path: str, value: Any, low: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
        raise ConfigError(path, value, f"a whole number >= {low}")
    return int(value)


def _check_range_bound(path: str, value: Any) -> None:
    if value is None:
        return
    values = value if isinstance(value, (list, tuple)) else [value]
    for i, item in enumerate(values):
        check_finite(f"{path}[{i}]" if isinstance(value, (list, tuple)) else path, item)


@dataclass(frozen=True)
class TabularQHyperparameters:
    learning_rate: float = 0.1  # step size alpha of the Q update, in (0, 1]
    visit_exponent: float = 0.0  # alpha / n(s,a)^this; 0 = constant, (0.5, 1] = Robbins-Monro
    gamma: float = 0.99  # discount factor, in [0, 1]
    exploration: str = "epsilon"  # 'epsilon' (epsilon-greedy) or 'softmax' (Boltzmann)
    epsilon_start: float = 1.0  # exploration probability at the first step
    epsilon_end: float = 0.05  # exploration probability after the decay (and in act())
    epsilon_decay_fraction: float = 0.5  # share of total_steps over which epsilon falls linearly
    temperature: float = 1.0  # softmax temperature, in reward units
    initial_value: float = 0.0  # Q of every (state, action) before learning
    internal_dimensions: int | None = None  # leading Box entries that are band-unit deviations;
    # None: the task's number of needs when its observation starts with them, else 0
    internal_bins: int = 8  # bins per internal dimension
    internal_range: float = 4.0  # internal bins cover [-range, +range] comfort-band units
    world_bins: int | list[int] = 4  # bins per world Box dimension: one number, or one per
    # world feature (1 ignores that feature)
    world_low: float | list[float] | None = None  # lower edge of the world bins (None: Box low)
    world_high: float | list[float] | None = None  # upper edge of the world bins (None: Box high)

    def __post_init__(self):
        name = "tabular-q"
        check_range(f"{name}.learning_rate", self.learning_rate, 0.0, 1.0)
        if self.learning_rate == 0:
            raise ConfigError(f"{name}.learning_rate", self.learning_rate, "a number in (0, 1]")
        check_range(f"{name}.visit_exponent", self.visit_exponent, 0.0, 1.0)
        check_range(f"{name}.gamma", self.gamma, 0.0, 1.0)
        check_choice(f"{name}.exploration", self.exploration, ("epsilon", "softmax"))
        check_range(f"{name}.epsilon_start", self.epsilon_start, 0.0, 1.0)
        check_range(f"{name}.epsilon_end", self.epsilon_end, 0.0, 1.0)
        check_range(f"{name}.epsilon_decay_fraction", self.epsilon_decay_fraction, 0.0, 1.0)
        check_range(f"{name}.temperature", self.temperature, 0.0, math.inf, closed=False)
        check_finite(f"{name}.initial_value", self.initial_value)
        if self.internal_dimensions is not None:
            _check_whole(f"{name}.internal_dimensions", self.internal_dimensions, 0)
        _check_whole(f"{name}.internal_bins", self.internal_bins, 1)
        check_range(f"{name}.internal_range", self.internal_range, 0.0, math.inf, closed=False)
        if isinstance(self.world_bins, (list, tuple, np.ndarray)):
            object.__setattr__(self, "world_bins", [
                _check_whole(f"{name}.world_bins[{i}]", b, 1)
                for i, b in enumerate(self.world_bins)])
        else:
            _check_whole(f"{name}.world_bins", self.world_bins, 1)
        for field in ("world_low", "world_high"):
            value = getattr(self, field)
            if isinstance(value, (tuple, np.ndarray)):
                # Lists, as they come back from an agent file, so equality survives save/load.
                object.__setattr__(self, field, np.asarray(value, dtype=np.float64).tolist())
            _check_range_bound(f"{name}.{field}", getattr(self, field))

    def epsilon(self, steps_done: int, total_steps: int) -> float:
        """Exploration probability after ``steps_done`` of ``total_steps`` steps (per seed)."""
        horizon = self.epsilon_decay_fraction * total_steps
        if horizon <= 0:
            return self.epsilon_end
        remaining = max(0.0, 1.0 - steps_done / horizon)
        return self.epsilon_end + (self.epsilon_start - self.epsilon_end) * remaining


# --- observation -> state index -------------------------------------------------------


class StateIndexer:
    """Maps a batch of observations of one space to (B,) state indices in [0, num_states)."""

    def __init__(self, space: spaces.Space, hp: TabularQHyperparameters, internal_dimensions: int):
        self.space = space
        if isinstance(space, spaces.Discrete):
            self.kind = "discrete"
            self.start = np.int64(space.start)
            self.num_states = int(space.n)
        elif isinstance(space, spaces.MultiDiscrete):
            self.kind = "radix"
            self.start = np.asarray(space.start, dtype=np.int64).reshape(-1)
            self.radix = np.asarray(space.nvec, dtype=np.int64).reshape(-1)
            self.num_states = math.prod(int(n) for n in self.radix)
        elif isinstance(space, spaces.Box):
            self.kind = "bins"
            self._init_bins(space, hp, internal_dimensions)
        else:
            raise NotApplicableError("observation_space", space,
                                     "a Discrete, MultiDiscrete or Box space (for Dict tasks use "
                              "observation='flat')")
        if self.kind == "radix":
            self.strides = _strides(self.radix)

    def _init_bins(self, space: spaces.Box, hp: TabularQHyperparameters, internal: int) -> None:
        size = int(np.prod(space.shape))
        if internal > size:
            raise ConfigError("tabular-q.internal_dimensions", internal,
                              f"at most {size}, the observation size")
        world = size - internal
        low = np.empty(size)
        high = np.empty(size)
        bins = np.empty(size, dtype=np.int64)
        low[:internal], high[:internal] = -hp.internal_range, hp.internal_range
        bins[:internal] = hp.internal_bins
        world_bins = np.asarray(hp.world_bins, dtype=np.int64)
        if world_bins.ndim == 1 and world_bins.shape != (world,):
            raise ConfigError("tabular-q.world_bins", hp.world_bins,
                              f"one number or {world} numbers (one per world feature)")
        bins[internal:] = world_bins
        box_low = np.asarray(space.low, dtype=np.float64).reshape(-1)[internal:]
        box_high = np.asarray(space.high, dtype=np.float64).reshape(-1)[internal:]
        for target, given, default, field in ((low, hp.world_low, box_low, "world_low"),
                                              (high, hp.world_high, box_high, "world_high")):
            values = default if given is None else np.asarray(given, dtype=np.float64)
            if values.ndim == 0:
                values = np.full(world, float(values))
            if values.shape != (world,):
                raise ConfigError(f"tabular-q.{field}", given,
                                  f"one number or {world} numbers (one per world feature)")
            if not np.all(np.isfinite(values)):
                raise ConfigError(f"tabular-q.{field}", given,
                                  "finite bin edges: the observation Box is unbounded there, "
                                  f"so set {field} explicitly")
            target[internal:] = values
        if np.any(high[internal:] <= low[internal:]):
            raise ConfigError("tabular-q.world_high", hp.world_high, "above world_low everywhere")
        self.low = low
        self.width = (high - low) / bins
        self.bins = bins
        self.radix = bins
        self.num_states = math.prod(int(b) for b in bins)
        self.strides = _strides(bins)

    def __call__(self, observations: Any) -> np.ndarray:
        obs = np.asarray(observations)
        if self.kind == "discrete":
            return obs.reshape(-1).astype(np.int64) - self.start
        flat = obs.reshape(obs.shape[0], -1)
        if self.kind == "radix":
            digits = flat.astype(np.int64) - self.start
        else:
            digits = np.floor((flat.astype(np.float64) - self.low) / self.width).astype(np.int64)
            np.clip(digits, 0, self.bins - 1, out=digits)
        return digits @ self.strides


def _strides(radix: np.ndarray) -> np.ndarray:
    """Mixed-radix place values, last entry fastest."""
    return np.concatenate([np.cumprod(radix[::-1])[::-1][1:], [1]]).astype(np.int64)


def internal_dimensions_of(env: gym.Env | VectorEnv) -> int:
    """Leading observation entries that are internal deviations: the needbench task's
    number of needs when interoception is on with flat observations, else 0."""
    core = task_core(env)
    config = getattr(core, "config", None)
    if core is None or config is None:
        return 0
    if getattr(config, "interoception", False) and getattr(config, "observation", "") == "flat":
        return int(core.physiology.num_needs)
    return 0


def log_finished_episodes(curves: EpisodeStability, ended: np.ndarray,
                          loggers: Sequence[Logger | None], owner: np.ndarray, steps: int,
                          need_names: Sequence[str] | None) -> None:
    """Log the figures of every copy whose episode ended, to the logger of its seed."""
    for i in np.flatnonzero(ended):
        logger = loggers[owner[i]]
        if logger is None:
            continue
        for tag, value in curves.figures(int(i)).scalars(need_names).items():
            logger.log_scalar(tag, value, steps)


def shared_discount(loggers: Sequence[Logger | None]) -> float:
    """The scoring discount of the loggers (one for all seeds learning side by side)."""
    discounts = {scoring_discount(logger) for logger in loggers if logger is not None}
    if len(discounts) > 1:
        raise ConfigError("loggers.discount", sorted(discounts),
                          "one scoring discount for all seeds of one pass")
    return discounts.pop() if discounts else scoring_discount(None)


# --- the agent ------------------------------------------------------------------------


class TabularQAgent(Agent):
    """Homeostatic Q-learning with a table over binned observations.

    After ``learn``: ``q`` (S, A) action values, ``indexer`` (observation ->
    state), ``internal_dimensions`` (resolved from the env when not given).
    """

    name = "tabular-q"
    Hyperparameters = TabularQHyperparameters

    def __init__(self, observation_space: spaces.Space, action_space: spaces.Space,
                 **hyperparameters: Any):
        super().__init__(observation_space, action_space, **hyperparameters)
        if not isinstance(action_space, spaces.Discrete):
            raise NotApplicableError("action_space", action_space, "a Discrete space")
        self.num_actions = int(action_space.n)
        self.q: np.ndarray | None = None
        self.indexer: StateIndexer | None = None
        self.internal_dimensions: int | None = None
        self.seed = 0
        self._act_rng = np.random.default_rng(0)
        if not isinstance(observation_space, spaces.Box):
            self._build_indexer(0)
        elif self.hyperparameters.internal_dimensions is not None:
            self._build_indexer(self.hyperparameters.internal_dimensions)

    def _build_indexer(self, internal_dimensions: int) -> None:
        indexer = StateIndexer(self.observation_space, self.hyperparameters, internal_dimensions)
        if indexer.num_states * self.num_actions > MAX_TABLE_ENTRIES:
            raise ConfigError("tabular-q state count", indexer.num_states,
                              f"at most {MAX_TABLE_ENTRIES // self.num_actions} states "
                              "(use fewer bins per dimension)")
        self.indexer = indexer
        self.internal_dimensions = internal_dimensions

    # --- learning ------------------------------------------------------------------

    def learn(self, env: gym.Env | VectorEnv, total_steps: int, seed: int,
              logger: Logger | None = None) -> TabularQAgent:
        """Learn on a single env or a vector env; ``total_steps`` counts steps over all copies."""
        q = self._q_learning(as_vector_env(env), total_steps, [seed], [logger])
        self.q = q[0]
        self._reseed(seed)
        return self

    def learn_many(self, env: VectorEnv, total_steps: int, seeds: Sequence[int],
                   loggers: Sequence[Logger | None] | None = None) -> list[TabularQAgent]:
        """Learn one independent agent per seed in a single batched pass.

        ``env`` has len(seeds) * C copies; seed ``seeds[g]`` uses copies
        g*C .. g*C+C-1 and ``total_steps`` steps summed over its C copies.
        Returns one new agent per seed (this agent's own table is left as it was).
        """
        if not isinstance(env, VectorEnv):
            raise ConfigError("env", env, "a gymnasium VectorEnv with len(seeds) * C copies")
        loggers = [None] * len(seeds) if loggers is None else list(loggers)
        if len(loggers) != len(seeds):
            raise ConfigError("loggers", f"{len(loggers)} loggers", f"{len(seeds)}, one per seed")
        q = self._q_learning(env, total_steps, list(seeds), loggers)
        agents = []
        for g, seed in enumerate(seeds):
            agent = TabularQAgent(self.observation_space, self.action_space,
                                  **vars(self.hyperparameters))
            agent._build_indexer(self.internal_dimensions)
            agent.q = q[g].copy()
            agent._reseed(seed)
            agents.append(agent)
        return agents

    def _copies_per_seed(self, env: VectorEnv, seeds: list[int]) -> int:
        require_next_step_autoreset(env)
        self.check_env(env)
        if not seeds:
            raise ConfigError("seeds", seeds, "at least one seed")
        for i, seed in enumerate(seeds):
            check_seed(f"seeds[{i}]", seed)
        if len(set(seeds)) != len(seeds):
            raise ConfigError("seeds", seeds, "distinct seeds")
        if env.num_envs % len(seeds):
            raise ConfigError("env.num_envs", env.num_envs,
                              f"a multiple of {len(seeds)}, the number of seeds")
        return env.num_envs // len(seeds)

    def check_env(self, env: gym.Env | VectorEnv) -> None:
        """The spaces must be the agent's, and the table must fit (:data:`MAX_TABLE_ENTRIES`)."""
        super().check_env(env)
        if self.indexer is None:
            # A Box observation whose internal part was not given: ask the task.
            self._build_indexer(internal_dimensions_of(env))

    def _q_learning(self, env: VectorEnv, total_steps: int, seeds: list[int],
                    loggers: Sequence[Logger | None]) -> np.ndarray:
        """Q-tables (len(seeds), S, A) learned in one batched pass (module docstring)."""
        total_steps = check_total_steps(total_steps)
        copies_per_seed = self._copies_per_seed(env, seeds)
        hp = self.hyperparameters
        indexer = self.indexer
        groups, copies = len(seeds), env.num_envs
        states, actions = indexer.num_states, self.num_actions
        owner = np.repeat(np.arange(groups), copies_per_seed)
        base = owner * states  # row offset of each copy's seed in the flattened table
        reset_seeds = [s for seed in seeds for s in copy_seeds(seed, copies_per_seed)]
        streams = CopyStreams(np.concatenate([exploration_keys(seed, copies_per_seed)
                                              for seed in seeds]))

        q = np.full((groups * states, actions), float(hp.initial_value))
        flat_q = q.reshape(-1)
        visits = np.zeros(groups * states * actions, np.int64) if hp.visit_exponent > 0 else None
        need_names = getattr(task_core(env), "need_names", None)
        curves = EpisodeStability(copies, shared_discount(loggers))
        logging = any(logger is not None for logger in loggers)

        observations, info = env.reset(seed=reset_seeds)
        state = indexer(observations)
        resetting = np.zeros(copies, dtype=bool)
        curves.begin(~resetting, info)
        action_start = int(self.action_space.start)
        iterations = -(-total_steps // copies_per_seed)
        for iteration in range(iterations):
            epsilon = hp.epsilon(iteration * copies_per_seed, total_steps)
            draws = streams.random((copies, 2))
            action = self._explore(q[base + state], draws, epsilon)
            observations, reward, terminated, truncated, info = env.step(action + action_start)
            next_state = indexer(observations)
            real = ~resetting  # the reset step of next-step autoreset is no transition

            row = base + state
            bootstrap = np.where(terminated, 0.0, q[base + next_state].max(axis=1))
            td_error = reward + hp.gamma * bootstrap - q[row, action]
            entry = (row * actions + action)[real]
            unique, inverse, counts = np.unique(entry, return_inverse=True, return_counts=True)
            mean_error = np.bincount(inverse, weights=td_error[real]) / counts
            if visits is None:
                step_size = hp.learning_rate
            else:
                visits[unique] += counts
                step_size = hp.learning_rate / visits[unique] ** hp.visit_exponent
            flat_q[unique] += step_size * mean_error

            curves.step(real, reward, info)
            ended = real & (terminated | truncated)
            if logging and ended.any():
                log_finished_episodes(curves, ended, loggers, owner,
                                      (iteration + 1) * copies_per_seed, need_names)
            if resetting.any():
                curves.begin(resetting, info)
            state = next_state
            resetting = terminated | truncated
        return q.reshape(groups, states, actions)

    def _explore(self, q_rows: np.ndarray, draws: np.ndarray, epsilon: float) -> np.ndarray:
        """Behaviour actions (B,) from Q rows (B, A) and two uniforms per copy (B, 2).

        Epsilon-greedy: explore when draws[:, 0] < epsilon, uniformly by
        draws[:, 1]; otherwise greedy with ties broken uniformly by draws[:, 1]
        (with Q all equal at the start, first-index ties would always pick action 0).
        Softmax: inverse-CDF sampling of draws[:, 1].
        """
        actions = q_rows.shape[1]
        if self.hyperparameters.exploration == "softmax":
            logits = (q_rows - q_rows.max(axis=1, keepdims=True)) / self.hyperparameters.temperature
            weights = np.exp(logits)
            cumulative = np.cumsum(weights, axis=1)
            threshold = draws[:, 1:2] * cumulative[:, -1:]
            return np.minimum((cumulative <= threshold).sum(axis=1), actions - 1)
        best = q_rows == q_rows.max(axis=1, keepdims=True)
        pick = np.floor(draws[:, 1] * best.sum(axis=1)).astype(np.int64)
        greedy = np.argmax(np.cumsum(best, axis=1) > pick[:, None], axis=1)
        uniform = np.minimum(np.floor(draws[:, 1] * actions).astype(np.int64), actions - 1)
        return np.where(draws[:, 0] < epsilon, uniform, greedy)

    # --- acting --------------------------------------------------------------------

    def _reseed(self, seed: int) -> None:
        self.seed = check_seed("seed", seed)
        self._act_rng = np.random.default_rng(self.seed)

    def greedy(self, observations: Any) -> np.ndarray:
        """Greedy actions (B,), ties to the lowest action index."""
        if self.q is None:
            raise RuntimeError("call learn() (or load a saved agent) before act()")
        return np.argmax(self.q[self.indexer(observations)], axis=1) + int(self.action_space.start)

    def _act(self, observations: Any, deterministic: bool) -> np.ndarray:
        """Greedy actions, or with ``deterministic=False`` the final exploration policy
        (epsilon_end-greedy or softmax) drawn from a generator seeded by ``learn``."""
        if deterministic or self.q is None:
            return self.greedy(observations)
        q_rows = self.q[self.indexer(observations)]
        draws = self._act_rng.random((q_rows.shape[0], 2))
        return self._explore(q_rows, draws, self.hyperparameters.epsilon_end) + int(
            self.action_space.start)

    # --- persistence ----------------------------------------------------------------

    def _get_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        if self.q is None:
            return {"learned": False}, {}
        return ({"learned": True, "internal_dimensions": self.internal_dimensions,
                 "seed": self.seed}, {"q": self.q})

    def _set_state(self, meta, arrays) -> None:
        if not meta.get("learned"):
            return
        self._build_indexer(int(meta["internal_dimensions"]))
        q = np.asarray(arrays["q"], dtype=np.float64)
        if q.shape != (self.indexer.num_states, self.num_actions):
            raise ConfigError("state/q.shape", q.shape,
                              f"({self.indexer.num_states}, {self.num_actions})")
        self.q = q
        self._reseed(int(meta["seed"]))
