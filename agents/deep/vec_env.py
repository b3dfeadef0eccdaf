"""The one bridge from a Gymnasium vector env to Stable-Baselines3: :func:`stable_vec_env`.

SB3 steps its copies through its own ``VecEnv`` interface, whose autoreset
happens within the step: a copy whose episode ends returns the first
observation of its next episode, with the last one in
``info["terminal_observation"]`` and ``info["TimeLimit.truncated"]`` telling a
time limit from a termination. That is Gymnasium's same-step autoreset
(``AutoresetMode.SAME_STEP``: the final observation and info in
``info["final_obs"]`` and ``info["final_info"]``), so the adapter wraps a
vector env made in that mode (``NeedVectorEnv(autoreset_mode=SAME_STEP)``, or
Gymnasium's ``SyncVectorEnv`` for other envs) and only renames: it calls the
env's public ``reset`` and ``step`` and nothing else, so seeding and autoreset
live in the env alone.

Seeding: the first ``reset`` of an adapter passes its seed s to the vector env
(copy j gets s + j, Gymnasium's convention); later resets (SB3 resets again
only when a new ``learn`` call starts) continue the copies' own streams.

Learning curves: the adapter feeds every step to
:class:`needbench.agents.curves.EpisodeStability` and logs each finished
episode's scalars to the needbench logger at SB3's step count. It sees the
env's own rewards, below any ``VecNormalize``.
"""

from __future__ import annotations

import functools
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from gymnasium.vector import AutoresetMode, VectorEnv

from needbench.agents.base import Logger, require_autoreset
from needbench.agents.curves import EpisodeStability, update_tag

#: Entries of a same-step info that are not one copy's own step info.
_FINAL_KEYS = ("final_obs", "final_info")


def _rows(value: Any, copies: int) -> list[Any]:
    array = np.asarray(value)
    if array.dtype == object:
        return [array[i] for i in range(copies)]
    return array.tolist() if array.ndim == 1 else list(array.copy())


def per_copy_infos(info: Mapping[str, Any], copies: int) -> list[dict[str, Any]]:
    """One info dict per copy from a batched info, as a single env gives it: 0-d
    entries as Python scalars, others as arrays of their own. Gymnasium's ``_key``
    masks are honoured (a copy gets only the keys it has) and dropped."""
    keys = [key for key in info if not key.startswith("_") and key not in _FINAL_KEYS]
    columns = [per_copy_infos(info[key], copies) if isinstance(info[key], Mapping)
               else _rows(info[key], copies) for key in keys]
    infos = [dict(zip(keys, row, strict=True)) for row in zip(*columns, strict=True)] \
        if keys else [{} for _ in range(copies)]
    for key in keys:
        present = info.get(f"_{key}")
        if present is not None:
            for i in np.flatnonzero(~np.asarray(present, dtype=bool)):
                del infos[i][key]
    return infos


def _merge_final(info: Mapping[str, Any], done: np.ndarray) -> dict[str, Any]:
    """The step info of every copy's last step: ``final_info`` rows where a copy just
    ended (same-step autoreset moved them there), the step's own elsewhere."""
    final = info.get("final_info")
    merged = {key: value for key, value in info.items() if key not in _FINAL_KEYS
              and not key.startswith("_")}
    if final is None or not done.any():
        return merged
    for key, value in final.items():
        if key.startswith("_"):
            continue
        if key in merged and np.shape(merged[key]) == np.shape(value):
            column = np.array(merged[key], copy=True)
            column[done] = np.asarray(value)[done]
            merged[key] = column
        else:
            merged[key] = value
    return merged


def _final_observation(info: Mapping[str, Any], index: int) -> Any:
    final = info["final_obs"]
    if isinstance(final, Mapping):
        return {key: np.array(value[index]) for key, value in final.items()}
    return np.array(final[index])


@functools.cache
def _adapter_class():
    """The SB3 VecEnv subclass (built on first use: SB3 is an optional dependency)."""
    from stable_baselines3.common.vec_env.base_vec_env import VecEnv as StableVecEnv

    class StableVecEnvAdapter(StableVecEnv):
        """A same-step-autoreset Gymnasium vector env as an SB3 ``VecEnv`` (module docstring)."""

        def __init__(self, env: VectorEnv, seed: int, logger: Logger, discount: float,
                     need_names: Sequence[str] | None, timesteps: int):
            require_autoreset(env, AutoresetMode.SAME_STEP)
            self.env = env
            self.first_seed: int | None = int(seed)
            self.target = logger
            self.need_names = None if need_names is None else tuple(need_names)
            self.timesteps = int(timesteps)
            self.stability = EpisodeStability(env.num_envs, discount)
            self.actions: np.ndarray | None = None
            super().__init__(env.num_envs, env.single_observation_space,
                             env.single_action_space)

        def reset(self):
            observations, info = self.env.reset(seed=self.first_seed)
            self.first_seed = None
            self.reset_infos = per_copy_infos(info, self.num_envs)
            self.stability.begin(np.ones(self.num_envs, dtype=bool), info)
            return observations

        def step_async(self, actions: np.ndarray) -> None:
            self.actions = actions

        def step_wait(self):
            observations, rewards, terminated, truncated, info = self.env.step(self.actions)
            terminated = np.asarray(terminated, dtype=bool)
            truncated = np.asarray(truncated, dtype=bool)
            dones = terminated | truncated
            last = _merge_final(info, dones)
            self.timesteps += self.num_envs
            self.stability.step(np.ones(self.num_envs, dtype=bool), rewards, last)
            infos = per_copy_infos(last, self.num_envs)
            for i in np.flatnonzero(dones):
                infos[i]["terminal_observation"] = _final_observation(info, i)
                infos[i]["TimeLimit.truncated"] = bool(truncated[i] and not terminated[i])
                for tag, value in self.stability.figures(int(i)).scalars(
                        self.need_names).items():
                    self.target.log_scalar(tag, value, self.timesteps)
            if dones.any():
                self.stability.begin(dones, info)  # the reset info of the copies that ended
            # float32 rewards, as SB3's DummyVecEnv holds them.
            return observations, np.asarray(rewards, dtype=np.float32), dones, infos

        def close(self) -> None:
            return None  # the env belongs to the caller

        def seed(self, seed: int | None = None) -> list[int | None]:
            """SB3 seeds before its first reset; the env applies Gymnasium's convention."""
            if seed is not None:
                self.first_seed = int(seed)
            return [None if seed is None else seed + j for j in range(self.num_envs)]

        def get_attr(self, attr_name: str, indices: Any = None) -> list[Any]:
            """The vector env's attribute, once per copy asked for (one env serves all)."""
            value = getattr(self.env, attr_name)
            return [value for _ in self._get_indices(indices)]

        def set_attr(self, attr_name: str, value: Any, indices: Any = None) -> None:
            raise AttributeError(f"cannot set {attr_name!r} per copy: the copies are one "
                                 "vector env")

        def env_method(self, method_name: str, *args: Any, indices: Any = None,
                       **kwargs: Any) -> list[Any]:
            raise AttributeError(f"cannot call {method_name!r} per copy: the copies are one "
                                 "vector env")

        def env_is_wrapped(self, wrapper_class: type, indices: Any = None) -> list[bool]:
            return [False for _ in self._get_indices(indices)]

    return StableVecEnvAdapter


def stable_vec_env(env: VectorEnv, seed: int, logger: Logger, discount: float,
                   need_names: Sequence[str] | None = None, timesteps: int = 0) -> Any:
    """``env`` (same-step autoreset) as an SB3 VecEnv that logs episode curves to ``logger``.

    ``timesteps`` is SB3's step count when learning starts (a continued model's).
    """
    return _adapter_class()(env, seed, logger, discount, need_names, timesteps)


@functools.cache
def _forwarding_class():
    from stable_baselines3.common.logger import KVWriter

    class ForwardUpdateScalars(KVWriter):
        """An SB3 logger output that hands the optimiser's figures (SB3's ``train/<name>``)
        to a needbench logger as ``update/<name>``; every other SB3 record is dropped."""

        def __init__(self, logger: Logger):
            self.target = logger

        def write(self, key_values, key_excluded, step: int = 0) -> None:
            for key, value in key_values.items():
                group, _, name = key.partition("/")
                if group != "train" or name == "n_updates" or isinstance(value, str):
                    continue
                if not np.isscalar(value) and np.ndim(value) != 0:
                    continue
                self.target.log_scalar(update_tag(name), float(value), int(step))

        def close(self) -> None:
            return None

    return ForwardUpdateScalars


def stable_logger(logger: Logger, verbose: int) -> Any:
    """An SB3 logger that writes no files of its own: the optimiser's figures go to
    ``logger`` as ``update/<name>``; with ``verbose`` > 0 SB3's table goes to stdout too."""
    import sys

    from stable_baselines3.common.logger import HumanOutputFormat
    from stable_baselines3.common.logger import Logger as StableLogger

    outputs = [_forwarding_class()(logger)]
    if verbose > 0:
        outputs.append(HumanOutputFormat(sys.stdout))
    return StableLogger(folder=None, output_formats=outputs)
