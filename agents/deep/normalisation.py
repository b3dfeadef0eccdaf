"""VecNormalize's settings and running statistics for the deep agents, kept between
``learn`` calls and in the agent file.

With ``normalise_observations`` and/or ``normalise_rewards`` the copies are
wrapped in SB3's ``VecNormalize``: each observation entry is scaled by its
running mean and variance (clipped to +-10), and rewards are divided by the
running standard deviation of the discounted return (with the algorithm's
gamma). ``act`` scales observations with the statistics as
``VecNormalize.normalize_obs`` does.
"""

from __future__ import annotations

import copy
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from needbench.envs.errors import ConfigError


def _running_statistics(mean: np.ndarray, variance: np.ndarray, count: float) -> Any:
    from stable_baselines3.common.running_mean_std import RunningMeanStd

    statistics = RunningMeanStd(shape=np.shape(mean))
    statistics.mean = np.array(mean, dtype=np.float64)
    statistics.var = np.array(variance, dtype=np.float64)
    statistics.count = float(count)
    return statistics


@dataclass
class Normalisation:
    """VecNormalize's settings and running statistics, kept between ``learn`` calls.

    ``observation_statistics`` is an SB3 ``RunningMeanStd`` (a dict of them
    per key for dict observations; None without observation normalisation),
    ``return_statistics`` that of the discounted return. ``clip_observation``
    (normalised units) and ``epsilon`` are VecNormalize's.
    """

    observations: bool
    rewards: bool
    observation_statistics: Any = None
    return_statistics: Any = None
    clip_observation: float = 10.0
    clip_reward: float = 10.0
    epsilon: float = 1e-8

    def wrap(self, vec_env: Any, gamma: float) -> Any:
        """``vec_env`` in a training VecNormalize that starts from these statistics."""
        from stable_baselines3.common.vec_env import VecNormalize

        wrapped = VecNormalize(vec_env, norm_obs=self.observations, norm_reward=self.rewards,
                               clip_obs=self.clip_observation, clip_reward=self.clip_reward,
                               gamma=gamma, epsilon=self.epsilon)
        if self.observation_statistics is not None:
            wrapped.obs_rms = copy.deepcopy(self.observation_statistics)
        if self.return_statistics is not None:
            wrapped.ret_rms = copy.deepcopy(self.return_statistics)
        return wrapped

    def take_statistics(self, wrapped: Any) -> None:
        """Keep the statistics a VecNormalize reached."""
        self.observation_statistics = copy.deepcopy(wrapped.obs_rms) if self.observations \
            else None
        self.return_statistics = copy.deepcopy(wrapped.ret_rms)

    def scale(self, observations: Any) -> Any:
        """Observations scaled as ``VecNormalize.normalize_obs`` does (float32)."""
        if not self.observations or self.observation_statistics is None:
            return observations

        def one(values: np.ndarray, statistics: Any) -> np.ndarray:
            scaled = (values - statistics.mean) / np.sqrt(statistics.var + self.epsilon)
            return np.clip(scaled, -self.clip_observation, self.clip_observation).astype(
                np.float32)

        if isinstance(self.observation_statistics, dict):
            return {key: one(np.asarray(value), self.observation_statistics[key])
                    if key in self.observation_statistics else value
                    for key, value in observations.items()}
        return one(np.asarray(observations), self.observation_statistics)

    def state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        """(JSON-able settings, named arrays) for the agent file."""
        meta = {"observations": self.observations, "rewards": self.rewards,
                "clip_observation": self.clip_observation, "clip_reward": self.clip_reward,
                "epsilon": self.epsilon,
                "keys": (sorted(self.observation_statistics)
                         if isinstance(self.observation_statistics, dict) else None)}
        arrays: dict[str, np.ndarray] = {}

        def put(prefix: str, statistics: Any) -> None:
            arrays[f"{prefix}_mean"] = np.asarray(statistics.mean, dtype=np.float64)
            arrays[f"{prefix}_variance"] = np.asarray(statistics.var, dtype=np.float64)
            arrays[f"{prefix}_count"] = np.asarray(statistics.count, dtype=np.float64)

        if isinstance(self.observation_statistics, dict):
            for key, statistics in self.observation_statistics.items():
                put(f"observation/{key}", statistics)
        elif self.observation_statistics is not None:
            put("observation", self.observation_statistics)
        if self.return_statistics is not None:
            put("return", self.return_statistics)
        return meta, arrays

    @classmethod
    def restore(cls, meta: Mapping[str, Any], arrays: Mapping[str, np.ndarray]) -> Normalisation:
        def get(prefix: str) -> Any:
            names = [f"{prefix}_{part}" for part in ("mean", "variance", "count")]
            missing = [name for name in names if name not in arrays]
            if missing:
                raise ConfigError("state/normalisation", sorted(arrays),
                                  "arrays " + ", ".join(names))
            return _running_statistics(*(arrays[name] for name in names))

        observation = None
        if meta["keys"] is not None:
            observation = {key: get(f"observation/{key}") for key in meta["keys"]}
        elif meta["observations"]:
            observation = get("observation")
        returns = get("return") if "return_mean" in arrays else None
        return cls(bool(meta["observations"]), bool(meta["rewards"]), observation, returns,
                   float(meta["clip_observation"]), float(meta["clip_reward"]),
                   float(meta["epsilon"]))
