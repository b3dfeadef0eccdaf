"""Golden trajectories: fixed rollouts of every task, recorded once as an oracle.

The files ``<task>__<variant>.npz`` beside this module were recorded with the
batched NumPy engine that preceded the compiled (numba) engine, at commit
bcb5d54, by ``python tests/golden/rollouts.py``. Each holds a vector rollout
(3 copies, autoresets included) and a single-env rollout (resets included) of
one task id and one set of keywords: observations, rewards, termination and
truncation flags and every ``info`` field. ``tests/test_golden.py`` replays the
same rollouts on today's engine and compares them field by field.

The ids are recorded without their version suffix, so that a later version of
a task whose dynamics did not change can still be held to its recording.
"""

from __future__ import annotations

import sys
from pathlib import Path

import gymnasium as gym
import numpy as np

import needbench.envs

HERE = Path(__file__).parent

#: Keyword sets replayed on every task. ``long`` exercises terminations (a fast
#: energy drain), ``penalise`` the lethal penalty, clipping and two other channels.
VARIANTS: dict[str, dict] = {
    "default": {"max_steps": 40},
    "starving": {"max_steps": 200, "need_overrides": {"energy": {"drain": 0.2}}},
    "penalise": {"max_steps": 60, "on_lethal": "penalise", "lethal_penalty": 0.5,
                 "reward": "negative_drive", "task_weight": 0.3,
                 "need_overrides": {"energy": {"drain": 0.2}}},
    "sensory": {"max_steps": 50, "reward": "sensory_estimate", "sensory_bias": 0.1,
                "observation": "dict"},
    # The mammal preset: gut uptake, couplings and Newton cooling in real units.
    "mammal": {"preset": "mammal", "max_steps": 80},
}
VECTOR_COPIES, VECTOR_STEPS, SINGLE_STEPS = 3, 150, 120

#: Keywords that give a family's recorded behaviour after a version bump changed
#: its defaults, applied beneath every variant's keywords when replaying (the
#: recordings are never redone):
#: * Lure-v1 made the fudge hyper-palatable; v0's under-registered fudge is
#:   ``lure="under_registered"``.
LEGACY_KEYWORDS: dict[str, dict] = {
    "Lure": {"lure": "under_registered"},
}


def replay_keywords(name: str, variant: str) -> dict:
    """The keywords that replay family ``name``'s recording of ``variant``."""
    return {**LEGACY_KEYWORDS.get(name, {}), **VARIANTS[variant]}


def family(task_id: str) -> str:
    """``needbench/Menu-v0`` -> ``Menu``."""
    return task_id.split("/")[1].rsplit("-v", 1)[0]


def current_id(name: str) -> str:
    """The registered id of family ``name`` (whatever its version)."""
    (task_id,) = [t for t in needbench.envs.TASK_IDS if family(t) == name]
    return task_id


def _actions(space: gym.Space, rng: np.random.Generator, shape: tuple[int, ...]) -> np.ndarray:
    if isinstance(space, gym.spaces.Discrete):
        return rng.integers(space.start, space.start + space.n, size=shape)
    return rng.uniform(space.low, space.high, size=shape + space.shape).astype(space.dtype)


def _flatten(obs) -> dict[str, np.ndarray]:
    if isinstance(obs, dict):
        return {f"obs/{k}": np.asarray(v) for k, v in obs.items()}
    return {"obs": np.asarray(obs)}


def _stack(rows: list[dict]) -> dict[str, np.ndarray]:
    return {key: np.stack([np.asarray(row[key]) for row in rows]) for key in rows[0]}


def rollout(task_id: str, kwargs: dict) -> dict[str, np.ndarray]:
    """The vector and single rollouts of ``task_id`` with ``kwargs``, as named arrays."""
    out: dict[str, np.ndarray] = {}
    vec = gym.make_vec(task_id, num_envs=VECTOR_COPIES, vectorization_mode="vector_entry_point",
                       **kwargs)
    rng = np.random.default_rng(2024)
    obs, info = vec.reset(seed=11)
    rows = [{**_flatten(obs), **{f"info/{k}": v for k, v in info.items()}}]
    steps = []
    for _ in range(VECTOR_STEPS):
        actions = _actions(vec.single_action_space, rng, (VECTOR_COPIES,))
        obs, reward, terminated, truncated, info = vec.step(actions)
        steps.append({"action": actions, **_flatten(obs), "reward": reward,
                      "terminated": terminated, "truncated": truncated,
                      **{f"info/{k}": v for k, v in info.items()}})
    out.update({f"vector/reset/{k}": v for k, v in rows[0].items()})
    out.update({f"vector/{k}": v for k, v in _stack(steps).items()})

    env = gym.make(task_id, **kwargs)
    obs, info = env.reset(seed=5)
    resets = [{**_flatten(obs), **{f"info/{k}": v for k, v in info.items()}}]
    steps = []
    for _ in range(SINGLE_STEPS):
        action = _actions(env.action_space, rng, ())
        obs, reward, terminated, truncated, info = env.step(action)
        steps.append({"action": np.asarray(action), **_flatten(obs), "reward": reward,
                      "terminated": terminated, "truncated": truncated,
                      **{f"info/{k}": v for k, v in info.items()}})
        if terminated or truncated:
            obs, info = env.reset()
            resets.append({**_flatten(obs), **{f"info/{k}": v for k, v in info.items()}})
    out.update({f"single/reset/{k}": v for k, v in _stack(resets).items()})
    out.update({f"single/{k}": v for k, v in _stack(steps).items()})
    return out


def path(name: str, variant: str) -> Path:
    return HERE / f"{name}__{variant}.npz"


def record() -> None:
    for task_id in needbench.envs.TASK_IDS:
        for variant in VARIANTS:
            try:
                arrays = rollout(task_id, replay_keywords(family(task_id), variant))
            except needbench.envs.ConfigError as error:  # e.g. Gamble's needs in mammal units
                print(f"{family(task_id):<12} {variant:<10} not applicable: {error}")
                continue
            np.savez_compressed(path(family(task_id), variant), **arrays)
            print(f"{family(task_id):<12} {variant:<10} {len(arrays)} arrays")


if __name__ == "__main__":
    sys.exit(record())
