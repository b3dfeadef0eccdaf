"""The task engine shared by every family: one batched core, two Gymnasium shells.

A task family writes only its outside world, as a :class:`World`: what the
actions do (intakes, activity, ambient conditions, extrinsic payoff), what the
agent sees of the world, and how a frame is drawn. :class:`TaskCore` runs B
copies of world and body together with the physiology core, the drive and the
reward channel; :class:`NeedEnv` is the single Gymnasium env (B = 1) and
:class:`NeedVectorEnv` the native vector env (B = N). Both shells call the same
core, so they read the same physics, and per-copy random streams make the
vector env with seeds s..s+N-1 reproduce N single envs step for step.

Common constructor arguments (every task accepts them; a family adds its own):

* ``preset``: units of the body, ``"abstract"`` or ``"mammal"``.
* ``needs``: names of the needs the body has (a family's default otherwise).
* ``need_overrides``: ``{need: {field: value}}`` changes to the preset's needs.
* ``extra_needs``: further :class:`~needbench.envs.needs.Need` objects.
* ``couplings``: cross-need couplings; None keeps the preset's, ``()`` has none.
* ``drive``: drive family (``homeostatic``, ``quadratic``, ``asymmetric``) and
  ``drive_params``: its parameters. Deviations are scaled by the comfort bands.
* ``reward``: reward channel kind; ``drive_weight``, ``task_weight``,
  ``sensory_bias``: see :class:`~needbench.envs.rewards.RewardChannel`.
* ``max_steps``: time limit (truncation).
* ``on_lethal``: ``"terminate"`` ends the episode when a need leaves its lethal
  bounds; ``"penalise"`` holds the level at the bound and continues.
  ``lethal_penalty`` is subtracted from the reward on every such step.
* ``interoception``: when false the internal state is left out of the
  observation (the agent must infer it); ``observation``: ``"flat"`` (one
  float32 Box) or ``"dict"`` (``{"internal": ..., "world": ...}``).
"""

from __future__ import annotations

import difflib
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar, NamedTuple

import gymnasium as gym
import numpy as np
from gymnasium import spaces
from gymnasium.vector import AutoresetMode, VectorEnv
from gymnasium.vector.utils import batch_space

from needbench.envs import rendering
from needbench.envs.drives import Drive, make_drive
from needbench.envs.errors import ActionError, ConfigError, check_choice
from needbench.envs.physiology import BodyState, Physiology
from needbench.envs.presets import preset as load_preset
from needbench.envs.rewards import RewardChannel
from needbench.envs.streams import CopyStreams, key_from


class Effects(NamedTuple):
    """What the world does to B bodies in one step (arrays with a leading batch axis).

    ``intake`` (B, K) true amounts consumed; ``activity`` (B,); ``ambient``
    (B, K) or None for each need's default; ``forcing`` (B, K) or None;
    ``task_reward`` (B,) extrinsic payoff; ``perceived`` (B, K) outcome as the
    agent perceives it (sensory-estimate channel) or None; ``events`` named
    (B, ...) arrays copied into ``info``.
    """

    intake: np.ndarray
    activity: np.ndarray
    task_reward: np.ndarray
    ambient: np.ndarray | None = None
    forcing: np.ndarray | None = None
    perceived: np.ndarray | None = None
    events: Mapping[str, np.ndarray] = {}


class World:
    """The outside world of a task family, for B copies at once.

    Subclasses set ``action_space`` (one copy's) and ``feature_names`` (the
    world part of the observation) in ``__init__`` and implement ``initial``,
    ``step`` and ``observe``. World state is a dict of arrays whose first axis is
    the batch; all randomness comes from the ``rng`` argument (per-copy streams),
    and every call draws the same count of numbers for every copy.
    """

    #: Parameters of this world and their defaults (constructor keywords of the task).
    parameters: ClassVar[dict[str, Any]] = {}
    #: Needs a body has in this task unless the user names others.
    default_needs: ClassVar[tuple[str, ...]] = ("energy", "water", "temperature")
    spatial: ClassVar[bool] = False

    action_space: spaces.Space
    feature_names: tuple[str, ...] = ()
    feature_low: np.ndarray
    feature_high: np.ndarray

    def __init__(self, physiology: Physiology, **params: Any):
        self.physiology = physiology
        for key, value in params.items():
            setattr(self, key, value)

    def initial(self, rng: CopyStreams, batch: int) -> dict[str, np.ndarray]:
        return {}

    def step(self, state: dict[str, np.ndarray], actions: np.ndarray, body: BodyState,
             rng: CopyStreams) -> tuple[dict[str, np.ndarray], Effects]:
        raise NotImplementedError

    def observe(self, state: dict[str, np.ndarray]) -> np.ndarray:
        """(B, W) world features; default: none."""
        batch = next(iter(state.values())).shape[0] if state else 0
        return np.zeros((batch, 0))

    def text(self, state: dict[str, np.ndarray], index: int) -> str:
        """A readable frame of copy ``index``'s world (ANSI render)."""
        return ""

    def image(self, state: dict[str, np.ndarray], index: int) -> np.ndarray | None:
        """An (H, W, 3) uint8 picture of copy ``index``'s world, if it has one."""
        return None

    def zeros(self, batch: int) -> np.ndarray:
        """(B, K) zeros, a convenience for building Effects."""
        return np.zeros((batch, self.physiology.num_needs))


@dataclass(frozen=True)
class TaskConfig:
    """Validated common arguments of a task (see the module docstring)."""

    preset: str = "abstract"
    needs: tuple[str, ...] | None = None
    need_overrides: Mapping[str, Mapping[str, float]] = field(default_factory=dict)
    extra_needs: tuple = ()
    couplings: tuple | None = None
    drive: str = "homeostatic"
    drive_params: Mapping[str, Any] = field(default_factory=dict)
    reward: str = "drive_reduction"
    drive_weight: float = 1.0
    task_weight: float = 0.0
    sensory_bias: Any = 0.0
    max_steps: int = 500
    on_lethal: str = "terminate"
    lethal_penalty: float = 0.0
    interoception: bool = True
    observation: str = "flat"


COMMON_PARAMETERS = tuple(TaskConfig.__dataclass_fields__)


def split_arguments(world_cls: type[World], defaults: Mapping[str, Any],
                    kwargs: Mapping[str, Any]) -> tuple[TaskConfig, dict[str, Any]]:
    """Split constructor keywords into common and world parts; reject unknown ones."""
    allowed = set(COMMON_PARAMETERS) | set(world_cls.parameters)
    for key in kwargs:
        if key not in allowed:
            near = difflib.get_close_matches(key, sorted(allowed), n=1)
            hint = f" (did you mean {near[0]!r}?)" if near else ""
            raise ConfigError(key, kwargs[key], "a keyword among " + ", ".join(sorted(allowed))
                              + hint)
    merged = {**defaults, **kwargs}
    common = {k: v for k, v in merged.items() if k in COMMON_PARAMETERS}
    world = {**world_cls.parameters, **{k: v for k, v in merged.items()
                                        if k in world_cls.parameters}}
    if "needs" in common and common["needs"] is not None:
        common["needs"] = tuple(common["needs"])
    return TaskConfig(**common), world


class TaskCore:
    """B copies of one task: world, body, drive and reward, stepped together.

    Attributes:
        physiology: the body (needs, couplings, dt).
        drive: the drive object every metric and agent must reuse.
        reward_channel: how reward is made.
        world: the family's outside world.
        batch: B.
    """

    def __init__(self, world_cls: type[World], config: TaskConfig, world_params: dict[str, Any],
                 batch: int):
        check_choice("on_lethal", config.on_lethal, ("terminate", "penalise"))
        check_choice("observation", config.observation, ("flat", "dict"))
        if not isinstance(config.max_steps, (int, np.integer)) or config.max_steps < 1:
            raise ConfigError("max_steps", config.max_steps, "a whole number >= 1")
        needs = config.needs if config.needs is not None else world_cls.default_needs
        body = load_preset(config.preset)
        self.physiology = body.physiology(needs, config.need_overrides, extra=config.extra_needs,
                                          couplings=config.couplings)
        self.config = config
        self.band = self.physiology.band
        self.need_names = self.physiology.names
        self.drive: Drive = make_drive(config.drive, scale=self.band,
                                       num_needs=self.physiology.num_needs,
                                       **dict(config.drive_params))
        self.reward_channel = RewardChannel(config.reward, config.drive_weight,
                                            config.task_weight, config.sensory_bias)
        self.world = world_cls(self.physiology, **world_params)
        self.batch = batch
        self.max_steps = int(config.max_steps)
        # Observation bounds: deviations are clipped to the widest lethal distance.
        self.deviation_limit = float(np.max(np.maximum(
            self.physiology.set_point - self.physiology.lethal_low,
            self.physiology.lethal_high - self.physiology.set_point) / self.band)) * 2.0
        self.streams = CopyStreams(np.zeros(batch, dtype=np.uint64))
        self.body: BodyState | None = None
        self._drive_of: tuple[BodyState | None, np.ndarray | None] = (None, None)
        self.state: dict[str, np.ndarray] = {}
        self.t = np.zeros(batch, dtype=np.int64)

    # --- spaces --------------------------------------------------------------

    def observation_space(self) -> spaces.Space:
        """One copy's observation space."""
        k = self.physiology.num_needs
        internal = spaces.Box(-self.deviation_limit, self.deviation_limit, (k,), np.float32)
        world = spaces.Box(np.asarray(self.world.feature_low, np.float32),
                           np.asarray(self.world.feature_high, np.float32),
                           (len(self.world.feature_names),), np.float32)
        if self.config.observation == "dict":
            parts = {"world": world}
            if self.config.interoception:
                parts = {"internal": internal, **parts}
            return spaces.Dict(parts)
        if not self.config.interoception:
            return world
        return spaces.Box(np.concatenate([internal.low, world.low]),
                          np.concatenate([internal.high, world.high]),
                          (k + world.shape[0],), np.float32)

    # --- the batched functions ------------------------------------------------

    def reset(self, keys: np.ndarray, mask: np.ndarray | None = None) -> None:
        """Start new episodes in all copies, or only where ``mask`` is true."""
        if mask is None:
            self.streams = CopyStreams(keys)
            self.body = self.physiology.initial(self.streams, self.batch)
            self.state = self.world.initial(self.streams, self.batch)
            self.t = np.zeros(self.batch, dtype=np.int64)
            return
        self.streams.rekey(mask, keys)
        sub = self.streams.subset(mask)
        count = int(mask.sum())
        fresh_body = self.physiology.initial(sub, count)
        fresh_world = self.world.initial(sub, count)
        self.streams.merge(mask, sub)
        for old, new in zip(self.body, fresh_body, strict=True):
            old[mask] = new
        self._drive_of = (None, None)  # the bodies changed in place
        for key, value in fresh_world.items():
            self.state[key][mask] = value
        self.t[mask] = 0

    def observe(self) -> np.ndarray | dict[str, np.ndarray]:
        """(B, D) float32 observations (or a dict of them)."""
        internal = np.clip(self.physiology.deviation(self.body), -self.deviation_limit,
                           self.deviation_limit).astype(np.float32)
        world = np.asarray(self.world.observe(self.state), dtype=np.float32)
        if self.config.observation == "dict":
            parts = {"world": world}
            if self.config.interoception:
                parts = {"internal": internal, **parts}
            return parts
        if not self.config.interoception:
            return world
        return np.concatenate([internal, world], axis=1)

    def current_drive(self) -> np.ndarray:
        """(B,) D(h) of the current bodies, computed once per step and cached.

        The cache is tied to the body object, so a body set from outside (or
        changed in place by a reset) is scored afresh.
        """
        body, drive = self._drive_of
        if body is not self.body:
            drive = self.drive(self.body.level, self.body.set_point)
            self._drive_of = (self.body, drive)
        return drive

    def body_info(self) -> dict[str, np.ndarray]:
        """The internal-state part of ``info``, batched."""
        body = self.body
        return {
            "level": body.level.copy(),
            "set_point": body.set_point.copy(),
            "deviation": self.physiology.deviation(body),
            "drive": self.current_drive().copy(),
            "in_band": self.physiology.in_band(body),
        }

    def step(self, actions: np.ndarray):
        """Advance every copy one step. Returns (reward, terminated, truncated, info), batched."""
        before = self.body
        self.state, effects = self.world.step(self.state, actions, before, self.streams)
        after = self.physiology.transition(
            before, self.streams, intake=effects.intake, activity=effects.activity,
            ambient=effects.ambient, forcing=effects.forcing)
        alive = self.physiology.alive(after)
        if self.config.on_lethal == "penalise":
            # Hold the level just inside its lethal bounds; the episode goes on.
            margin = 1e-6 * self.band
            level = np.clip(after.level, self.physiology.lethal_low + margin,
                            self.physiology.lethal_high - margin)
            after = BodyState(level, after.gut, after.set_point)
        parts = self.reward_channel.compute(
            self.drive, before, after, intake=effects.intake, alive=alive,
            task=effects.task_reward, perceived=effects.perceived,
            drive_before=self.current_drive())
        reward = parts.total - self.config.lethal_penalty * (~alive)
        self.body = after
        self._drive_of = (after, parts.drive_after)
        self.t += 1
        terminated = ~alive if self.config.on_lethal == "terminate" else np.zeros_like(alive)
        truncated = (self.t >= self.max_steps) & ~terminated
        info = self.body_info()
        info.update(
            reward_internal=parts.internal,
            reward_task=parts.task,
            alive=alive,
            intake=np.asarray(effects.intake, dtype=np.float64),
        )
        info.update(effects.events)
        return reward.astype(np.float64), terminated, truncated, info

    def finite_model(self, resolution: float = 0.25):
        """The task as a finite MDP on a lattice of internal states (outcome tasks only).

        See :mod:`needbench.envs.lattice`; used by the exact planner.
        """
        from needbench.envs.lattice import lattice_model

        return lattice_model(self, resolution)

    def validate_actions(self, actions: Any, space: spaces.Space) -> np.ndarray:
        """Check a batch of actions against the batched action space."""
        if isinstance(space, spaces.Box):
            arr = np.asarray(actions)
            if arr.shape != space.shape:
                raise ActionError(f"actions of shape {arr.shape} given; expected {space.shape}")
            if not np.issubdtype(arr.dtype, np.number):
                raise ActionError(f"actions of dtype {arr.dtype} given; expected numbers")
            if not np.all(np.isfinite(arr)):
                raise ActionError("actions contain NaN or inf")
            if np.any(arr < space.low) or np.any(arr > space.high):
                raise ActionError(f"actions outside [{space.low.min()}, {space.high.max()}]")
            return arr.astype(np.float64)
        arr = np.asarray(actions)
        if arr.dtype.kind == "f" and np.all(np.isfinite(arr)) and np.all(arr == np.round(arr)):
            arr = arr.astype(np.int64)
        if arr.dtype.kind not in "iu" or not space.contains(arr.astype(space.dtype)):
            raise ActionError(f"actions {actions!r} are not in {space}")
        return arr.astype(np.int64)


def _unbatch(info: dict[str, np.ndarray]) -> dict[str, Any]:
    """Copy 0 of a batched info, with 0-d values as Python scalars."""
    return {key: value[0].item() if value.ndim == 1 else value[0]
            for key, value in info.items()}


class NeedEnv(gym.Env):
    """Single-copy Gymnasium shell around :class:`TaskCore` (B = 1)."""

    world_cls: ClassVar[type[World]]
    defaults: ClassVar[dict[str, Any]] = {}
    metadata = {"render_modes": ["ansi", "rgb_array"], "render_fps": 8}

    def __init__(self, render_mode: str | None = None, **kwargs: Any):
        if render_mode is not None:
            check_choice("render_mode", render_mode, self.metadata["render_modes"])
        self.render_mode = render_mode
        config, world_params = split_arguments(self.world_cls, self.defaults, kwargs)
        self.core = TaskCore(self.world_cls, config, world_params, batch=1)
        self.observation_space = self.core.observation_space()
        self.action_space = self.core.world.action_space
        self._batched_actions = batch_space(self.action_space, 1)
        self._needs_reset = True

    def reset(self, *, seed: int | None = None, options: dict | None = None):
        super().reset(seed=seed)
        self.core.reset(np.array([key_from(self.np_random)], dtype=np.uint64))
        self._needs_reset = False
        return self._observation(), _unbatch(self.core.body_info())

    def step(self, action):
        if self._needs_reset:
            raise RuntimeError("call reset() before step() (and after an episode ends)")
        reward, terminated, truncated, info = self.core.step(self._one_action(action))
        self._needs_reset = bool(terminated[0] or truncated[0])
        return (self._observation(), float(reward[0]), bool(terminated[0]),
                bool(truncated[0]), _unbatch(info))

    def _one_action(self, action) -> np.ndarray:
        """Validate one action and return it as a batch of one."""
        space = self.action_space
        if isinstance(space, spaces.Discrete):
            # The common case first: a plain or numpy integer inside the range.
            if isinstance(action, (int, np.integer)) and not isinstance(action, (bool, np.bool_)):
                if space.start <= action < space.start + space.n:
                    return np.array([action], dtype=np.int64)
            elif isinstance(action, np.ndarray) and action.shape == () and \
                    action.dtype.kind in "iu" and space.contains(action):
                return action.reshape(1).astype(np.int64)
            raise ActionError(f"action {action!r} is not one integer in {space}")
        if np.shape(action) != space.shape:
            raise ActionError(f"action of shape {np.shape(action)} given; expected {space.shape}")
        return self.core.validate_actions(np.asarray(action)[None], self._batched_actions)

    def _observation(self):
        obs = self.core.observe()
        if isinstance(obs, dict):
            return {k: v[0] for k, v in obs.items()}
        return obs[0]

    def render(self):
        if self.render_mode is None:
            gym.logger.warn("render() called without a render_mode; pass render_mode='ansi'")
            return None
        if self.core.body is None:
            raise RuntimeError("call reset() before render()")
        return rendering.frame(self.core, 0, self.render_mode)


class NeedVectorEnv(VectorEnv):
    """Native vector shell around :class:`TaskCore` (B = num_envs).

    Autoreset follows Gymnasium's modes (``autoreset_mode``). ``NEXT_STEP``
    (the default): after a copy's episode ends, the following ``step`` resets
    that copy, ignores its action and returns its first observation with
    reward 0. ``SAME_STEP``: the step that ends a copy's episode resets it at
    once and returns its first observation, with the step's reward and end
    flags; the last observation and step info are in ``info["final_obs"]``
    and ``info["final_info"]`` (rows of the copies flagged by
    ``info["_final_obs"]``), and the copy's other info rows are its reset info.
    """

    world_cls: ClassVar[type[World]]
    defaults: ClassVar[dict[str, Any]] = {}
    metadata = {"render_modes": ["ansi", "rgb_array"], "render_fps": 8,
                "autoreset_mode": AutoresetMode.NEXT_STEP}

    def __init__(self, num_envs: int = 1, render_mode: str | None = None,
                 autoreset_mode: AutoresetMode | str = AutoresetMode.NEXT_STEP, **kwargs: Any):
        if not isinstance(num_envs, (int, np.integer)) or num_envs < 1:
            raise ConfigError("num_envs", num_envs, "a whole number >= 1")
        modes = (AutoresetMode.NEXT_STEP, AutoresetMode.SAME_STEP)
        if autoreset_mode not in modes and autoreset_mode not in [m.value for m in modes]:
            raise ConfigError("autoreset_mode", autoreset_mode,
                              "AutoresetMode.NEXT_STEP or AutoresetMode.SAME_STEP")
        self.autoreset_mode = AutoresetMode(autoreset_mode)
        self.metadata = {**type(self).metadata, "autoreset_mode": self.autoreset_mode}
        if render_mode is not None:
            check_choice("render_mode", render_mode, self.metadata["render_modes"])
        self.render_mode = render_mode
        self.num_envs = int(num_envs)
        config, world_params = split_arguments(self.world_cls, self.defaults, kwargs)
        self.core = TaskCore(self.world_cls, config, world_params, batch=self.num_envs)
        self.single_observation_space = self.core.observation_space()
        self.single_action_space = self.core.world.action_space
        self.observation_space = batch_space(self.single_observation_space, self.num_envs)
        self.action_space = batch_space(self.single_action_space, self.num_envs)
        self._copy_rngs: list[np.random.Generator] = []
        self._done = np.zeros(self.num_envs, dtype=bool)

    def reset(self, *, seed: int | list[int] | None = None, options: dict | None = None):
        if seed is None:
            seeds = [None] * self.num_envs
        elif isinstance(seed, (int, np.integer)):
            seeds = [int(seed) + i for i in range(self.num_envs)]
        else:
            seeds = list(seed)
            if len(seeds) != self.num_envs:
                raise ConfigError("seed", seed, f"an int or a list of {self.num_envs} seeds")
        if seed is not None or not self._copy_rngs:
            self._copy_rngs = [np.random.default_rng(s) if s is None
                               else gym.utils.seeding.np_random(s)[0] for s in seeds]
            if seed is not None:
                self._np_random, self._np_random_seed = gym.utils.seeding.np_random(seeds[0])
        keys = np.array([key_from(g) for g in self._copy_rngs], dtype=np.uint64)
        self.core.reset(keys)
        self._done[:] = False
        return self.core.observe(), self.core.body_info()

    def step(self, actions):
        batched = self.core.validate_actions(actions, self.action_space)
        if self.autoreset_mode == AutoresetMode.SAME_STEP:
            return self._step_same(batched)
        resetting = self._done.copy()
        reward, terminated, truncated, info = self.core.step(batched)
        if resetting.any():
            self._reset_copies(resetting, info)
            reward[resetting] = 0.0
            terminated[resetting] = False
            truncated[resetting] = False
        self._done = terminated | truncated
        return self.core.observe(), reward, terminated, truncated, info

    def _step_same(self, batched: np.ndarray):
        """One step in same-step autoreset (class docstring)."""
        reward, terminated, truncated, info = self.core.step(batched)
        done = terminated | truncated
        if done.any():
            observed = self.core.observe()  # copied: the reset below may reuse world arrays
            final_obs = ({key: value.copy() for key, value in observed.items()}
                         if isinstance(observed, dict) else observed.copy())
            final_info = {key: np.array(value, copy=True) for key, value in info.items()}
            self._reset_copies(done, info)
            info.update(final_obs=final_obs, _final_obs=done.copy(), final_info=final_info,
                        _final_info=done.copy())
        return self.core.observe(), reward, terminated, truncated, info

    def _reset_copies(self, mask: np.ndarray, info: dict[str, np.ndarray]) -> None:
        """Reset the copies in ``mask``; their rows of ``info`` become their reset info."""
        keys = np.array([key_from(self._copy_rngs[i]) for i in np.flatnonzero(mask)],
                        dtype=np.uint64)
        self.core.reset(keys, mask)
        fresh = self.core.body_info()
        for key, value in info.items():
            if key in fresh:
                value[mask] = fresh[key][mask]
            else:
                value[mask] = 0
        info["alive"][mask] = True

    def render(self):
        if self.render_mode is None:
            return None
        return tuple(rendering.frame(self.core, i, self.render_mode)
                     for i in range(self.num_envs))
