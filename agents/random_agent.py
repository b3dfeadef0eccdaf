"""``random``: actions drawn uniformly from the action space; the floor every agent must beat."""

from __future__ import annotations

from typing import Any

import gymnasium as gym
import numpy as np
from gymnasium import spaces
from gymnasium.vector import VectorEnv
from gymnasium.vector.utils import batch_space

from needbench.agents.base import Agent, Logger, batch_size, check_seed, check_total_steps


class RandomAgent(Agent):
    """Uniform random actions, reproducible from a seed.

    ``learn`` only sets the seed (it neither steps nor reads the env). ``act``
    samples a batch from Gymnasium's batched action space, whatever
    ``deterministic`` says: there is no greedy action to fall back on. The
    stream of actions depends on the seed and on the sequence of batch sizes
    asked for. Before any ``learn`` the seed is 0.
    """

    name = "random"
    learns_from_experience = False

    def __init__(self, observation_space: spaces.Space, action_space: spaces.Space,
                 **hyperparameters: Any):
        super().__init__(observation_space, action_space, **hyperparameters)
        self._reseed(0)

    def _reseed(self, seed: int) -> None:
        self.seed = seed
        self._generator = np.random.default_rng(seed)
        self._batched_spaces: dict[int, spaces.Space] = {}

    def learn(self, env: gym.Env | VectorEnv, total_steps: int, seed: int,
              logger: Logger | None = None) -> RandomAgent:
        check_total_steps(total_steps)
        self._reseed(check_seed("seed", seed))
        return self

    def _act(self, observations: Any, deterministic: bool) -> np.ndarray:
        count = batch_size(observations)
        space = self._batched_spaces.get(count)
        if space is None:
            space = batch_space(self.action_space, count)
            space.seed(int(self._generator.integers(2**31)))
            self._batched_spaces[count] = space
        return space.sample()

    def _get_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        return {"seed": self.seed}, {}

    def _set_state(self, meta, arrays) -> None:
        self._reseed(check_seed("state.seed", meta["seed"]))
