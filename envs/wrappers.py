"""Wrappers that change what an agent of a needbench task sees or is paid.

Each wrapper has one meaning and two classes, as Gymnasium keeps single and
vector wrappers apart: ``Name`` wraps a single ``gymnasium.Env`` and
``VectorName`` a native ``gymnasium.vector.VectorEnv`` (next-step autoreset).
Both read the task engine through ``env.unwrapped.core`` and share the same
transformation functions, so a vector env and N single envs stay equal step
for step under the same wrapper.

* :class:`HideInteroception`: drop the internal state from the observation.
* :class:`NormaliseInternalState`: internal deviations from band units to [-1, 1].
* :class:`PerNeedReward`: a (K,) reward, one drive-reduction term per need.
* :class:`SwitchRewardChannel`: pay with another reward channel.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import gymnasium as gym
import numpy as np
from gymnasium import spaces
from gymnasium.vector import VectorEnv, VectorObservationWrapper, VectorWrapper
from gymnasium.vector.utils import batch_space

from needbench.envs.drives import Drive
from needbench.envs.errors import ConfigError
from needbench.envs.rewards import RewardChannel
from needbench.envs.task import TaskCore

# --- shared pieces -----------------------------------------------------------


def task_core(env: gym.Env | VectorEnv) -> TaskCore:
    """The batched task engine under ``env``; ConfigError if it is not a needbench task."""
    core = getattr(env.unwrapped, "core", None)
    if not isinstance(core, TaskCore):
        raise ConfigError("env", type(env.unwrapped).__name__,
                          "a needbench task (one whose env.unwrapped has a TaskCore `core`)")
    return core


def _internal_layout(core: TaskCore, space: spaces.Space) -> str:
    """``"flat"`` or ``"dict"``: where the internal state sits in one copy's observation.

    Raises ConfigError when the observation has no internal state to work on
    (interoception off, or an earlier wrapper removed or reshaped it).
    """
    k = core.physiology.num_needs
    width = k + len(core.world.feature_names)
    if not core.config.interoception:
        raise ConfigError("interoception", False,
                          "an env whose observation includes the internal state")
    if isinstance(space, spaces.Dict) and "internal" in space.spaces:
        return "dict"
    if isinstance(space, spaces.Box) and space.shape == (width,):
        return "flat"
    raise ConfigError("observation_space", space,
                      f"a flat Box of shape ({width},) whose first {k} entries are the "
                      "internal state, or a Dict with an 'internal' key")


def _without_internal(space: spaces.Space, layout: str, k: int) -> spaces.Space:
    if layout == "dict":
        return spaces.Dict({key: sub for key, sub in space.spaces.items() if key != "internal"})
    return spaces.Box(space.low[k:], space.high[k:], space.low[k:].shape, space.dtype)


def _drop_internal(observation: Any, layout: str, k: int) -> Any:
    if layout == "dict":
        return {key: value for key, value in observation.items() if key != "internal"}
    return observation[..., k:]


def _normalised_space(space: spaces.Space, layout: str, k: int) -> spaces.Space:
    if layout == "dict":
        internal = space.spaces["internal"]
        unit = spaces.Box(-1.0, 1.0, internal.shape, np.float32)
        return spaces.Dict({key: (unit if key == "internal" else sub)
                            for key, sub in space.spaces.items()})
    low, high = space.low.copy(), space.high.copy()
    low[:k], high[:k] = -1.0, 1.0
    return spaces.Box(low, high, low.shape, space.dtype)


def _normalise(observation: Any, layout: str, k: int, limit: np.float32) -> Any:
    # The engine clips deviations to +-limit (in float64, then casts), and a
    # float32 quotient |x| / limit with |x| <= limit never exceeds 1.
    if layout == "dict":
        return {key: (value / limit if key == "internal" else value)
                for key, value in observation.items()}
    out = np.array(observation, dtype=np.float32, copy=True)
    out[..., :k] = out[..., :k] / limit
    return out


def per_need_drive(drive: Drive, level: np.ndarray, set_point: np.ndarray) -> np.ndarray:
    """(..., K) drive of each need alone: D evaluated with every other need at its set point.

    Entry i is ``drive(x_i, set_point)`` where ``x_i`` equals ``set_point``
    except in need i, which keeps its level. Calls the task's drive object;
    the drive formula is not repeated here.
    """
    level = np.asarray(level, dtype=np.float64)
    set_point = np.broadcast_to(np.asarray(set_point, dtype=np.float64), level.shape)
    k = level.shape[-1]
    alone = np.where(np.eye(k, dtype=bool), level[..., None, :], set_point[..., None, :])
    return drive(alone, np.broadcast_to(set_point[..., None, :], alone.shape))


def _switched_channel(core: TaskCore, kind: str | None, changes: dict[str, Any]) -> RewardChannel:
    fields = {name: value for name, value in changes.items() if value is not None}
    if kind is not None:
        fields["kind"] = kind
    if not fields:
        raise ConfigError("kind", kind, "a reward channel kind or at least one of drive_weight, "
                          "task_weight, bias, palatability_weight to change")
    # dataclasses.replace runs RewardChannel's own validation (ConfigError on bad values).
    return dataclasses.replace(core.reward_channel, **fields)


# --- HideInteroception ---------------------------------------------------------


class HideInteroception(gym.ObservationWrapper, gym.utils.RecordConstructorArgs):
    """Drop the internal state from the observation: the agent must infer its needs.

    A flat observation loses its first K entries (the internal deviations);
    a dict observation loses its ``"internal"`` key. Rewards and ``info``
    (which still carry the internal state, for metrics) are unchanged. The
    same as building the task with ``interoception=False``, but usable on an
    env that already exists.
    """

    def __init__(self, env: gym.Env):
        gym.utils.RecordConstructorArgs.__init__(self)
        gym.ObservationWrapper.__init__(self, env)
        core = task_core(env)
        self._k = core.physiology.num_needs
        self._layout = _internal_layout(core, env.observation_space)
        self.observation_space = _without_internal(env.observation_space, self._layout, self._k)

    def observation(self, observation):
        return _drop_internal(observation, self._layout, self._k)


class VectorHideInteroception(VectorObservationWrapper):
    """:class:`HideInteroception` for a native vector env (observations (N, ...))."""

    def __init__(self, env: VectorEnv):
        super().__init__(env)
        core = task_core(env)
        self._k = core.physiology.num_needs
        self._layout = _internal_layout(core, env.single_observation_space)
        self.single_observation_space = _without_internal(env.single_observation_space,
                                                          self._layout, self._k)
        self.observation_space = batch_space(self.single_observation_space, env.num_envs)

    def observations(self, observations):
        return _drop_internal(observations, self._layout, self._k)


# --- NormaliseInternalState ----------------------------------------------------


class NormaliseInternalState(gym.ObservationWrapper, gym.utils.RecordConstructorArgs):
    """Map the internal deviations from band units into [-1, 1].

    Each internal entry (h - h*)/band is divided by the core's
    ``deviation_limit`` (twice the widest lethal distance in bands, the bound
    the engine clips to), so +-1 is that bound and a comfort-band edge sits
    at +-1/deviation_limit (1/12 in the abstract preset). World features are
    unchanged.
    """

    def __init__(self, env: gym.Env):
        gym.utils.RecordConstructorArgs.__init__(self)
        gym.ObservationWrapper.__init__(self, env)
        core = task_core(env)
        self._k = core.physiology.num_needs
        self._layout = _internal_layout(core, env.observation_space)
        self._limit = np.float32(core.deviation_limit)
        self.observation_space = _normalised_space(env.observation_space, self._layout, self._k)

    def observation(self, observation):
        return _normalise(observation, self._layout, self._k, self._limit)


class VectorNormaliseInternalState(VectorObservationWrapper):
    """:class:`NormaliseInternalState` for a native vector env."""

    def __init__(self, env: VectorEnv):
        super().__init__(env)
        core = task_core(env)
        self._k = core.physiology.num_needs
        self._layout = _internal_layout(core, env.single_observation_space)
        self._limit = np.float32(core.deviation_limit)
        self.single_observation_space = _normalised_space(env.single_observation_space,
                                                          self._layout, self._k)
        self.observation_space = batch_space(self.single_observation_space, env.num_envs)

    def observations(self, observations):
        return _normalise(observations, self._layout, self._k, self._limit)


# --- PerNeedReward -------------------------------------------------------------


class PerNeedReward(gym.Wrapper, gym.utils.RecordConstructorArgs):
    """A vector reward: one drive-reduction term per need, shape (K,) float64.

    r_t[i] = D_i(h_t) - D_i(h_{t+1}), where D_i is the task's own drive
    evaluated with need i at its level and every other need at its set point
    (:func:`per_need_drive`), read from ``info["level"]`` and
    ``info["set_point"]``. The terms are unweighted and leave out the task's
    extrinsic reward and any lethal penalty; the scalar reward the env paid
    is kept in ``info["reward_scalar"]``. Their sum equals the scalar drive
    reduction only for an additive drive (homeostatic with m = 1, quadratic);
    with m > 1 the needs interact and the sum differs.
    """

    def __init__(self, env: gym.Env):
        gym.utils.RecordConstructorArgs.__init__(self)
        gym.Wrapper.__init__(self, env)
        self._drive = task_core(env).drive
        self._drive_before: np.ndarray | None = None

    def reset(self, **kwargs):
        observation, info = self.env.reset(**kwargs)
        self._drive_before = per_need_drive(self._drive, info["level"], info["set_point"])
        return observation, info

    def step(self, action):
        if self._drive_before is None:
            raise RuntimeError("call reset() before step()")
        observation, reward, terminated, truncated, info = self.env.step(action)
        drive_after = per_need_drive(self._drive, info["level"], info["set_point"])
        per_need = self._drive_before - drive_after
        self._drive_before = drive_after
        info = {**info, "reward_scalar": reward}
        return observation, per_need, terminated, truncated, info


class VectorPerNeedReward(VectorWrapper):
    """:class:`PerNeedReward` for a native vector env: rewards of shape (N, K).

    A copy that autoresets in a step (next-step mode: its previous step ended
    the episode) gets the zero vector, as the env pays it 0, and its drive
    terms restart from the fresh body reported in that step's ``info``.
    """

    def __init__(self, env: VectorEnv):
        super().__init__(env)
        self._drive = task_core(env).drive
        self._drive_before: np.ndarray | None = None
        self._done = np.zeros(env.num_envs, dtype=bool)

    def reset(self, **kwargs):
        observations, infos = self.env.reset(**kwargs)
        self._drive_before = per_need_drive(self._drive, infos["level"], infos["set_point"])
        self._done[:] = False
        return observations, infos

    def step(self, actions):
        if self._drive_before is None:
            raise RuntimeError("call reset() before step()")
        observations, rewards, terminations, truncations, infos = self.env.step(actions)
        drive_after = per_need_drive(self._drive, infos["level"], infos["set_point"])
        per_need = np.where(self._done[:, None], 0.0, self._drive_before - drive_after)
        self._drive_before = drive_after
        self._done = np.asarray(terminations) | np.asarray(truncations)
        infos = {**infos, "reward_scalar": rewards}
        return observations, per_need, terminations, truncations, infos


# --- SwitchRewardChannel -------------------------------------------------------


class SwitchRewardChannel(gym.Wrapper, gym.utils.RecordConstructorArgs):
    """Pay with another reward channel (kind, weights, sensory bias or palatability weight).

    Design: the wrapper replaces the core's ``reward_channel`` with a copy
    that has the given fields changed (``dataclasses.replace``, so the
    channel validates them), and the engine then computes every reward with
    it. This is the simplest way that is correct for every channel:
    recomputing from ``info`` would repeat the engine's reward assembly and
    could not serve ``sensory_estimate`` on tasks whose perceived outcomes are
    not all in ``info``. The cost is that the change is made to the wrapped
    env itself: anything holding the same env object is paid with the new
    channel too (``previous_channel`` keeps the old one). ``info`` stays
    consistent: ``reward_internal`` is the new channel's internal part.

    Args:
        env: a needbench task.
        kind: ``drive_reduction``, ``negative_drive``, ``survival`` or
            ``sensory_estimate`` (None keeps the current kind).
        drive_weight, task_weight, bias, palatability_weight: new values (None
            keeps the current).
    """

    def __init__(self, env: gym.Env, kind: str | None = None, *,
                 drive_weight: float | None = None, task_weight: float | None = None,
                 bias: float | list[float] | None = None,
                 palatability_weight: float | None = None):
        gym.utils.RecordConstructorArgs.__init__(self, kind=kind, drive_weight=drive_weight,
                                                 task_weight=task_weight, bias=bias,
                                                 palatability_weight=palatability_weight)
        gym.Wrapper.__init__(self, env)
        core = task_core(env)
        self.previous_channel = core.reward_channel
        self.reward_channel = _switched_channel(
            core, kind, {"drive_weight": drive_weight, "task_weight": task_weight, "bias": bias,
                         "palatability_weight": palatability_weight})
        core.reward_channel = self.reward_channel


class VectorSwitchRewardChannel(VectorWrapper):
    """:class:`SwitchRewardChannel` for a native vector env (same design and caveat)."""

    def __init__(self, env: VectorEnv, kind: str | None = None, *,
                 drive_weight: float | None = None, task_weight: float | None = None,
                 bias: float | list[float] | None = None,
                 palatability_weight: float | None = None):
        super().__init__(env)
        core = task_core(env)
        self.previous_channel = core.reward_channel
        self.reward_channel = _switched_channel(
            core, kind, {"drive_weight": drive_weight, "task_weight": task_weight, "bias": bias,
                         "palatability_weight": palatability_weight})
        core.reward_channel = self.reward_channel


__all__ = [
    "HideInteroception", "NormaliseInternalState", "PerNeedReward", "SwitchRewardChannel",
    "VectorHideInteroception", "VectorNormaliseInternalState", "VectorPerNeedReward",
    "VectorSwitchRewardChannel", "per_need_drive", "task_core",
]
