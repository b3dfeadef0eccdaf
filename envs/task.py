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
  ``sensory_bias``, ``palatability_weight``: see :class:`~needbench.envs.rewards.RewardChannel`.
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
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar

import gymnasium as gym
import numpy as np
from gymnasium import spaces
from gymnasium.vector import AutoresetMode, VectorEnv
from gymnasium.vector.utils import batch_space

from needbench.envs import rendering
from needbench.envs.drives import Drive, make_drive
from needbench.envs.engine import (
    ACTIVITY,
    ALIVE,
    AMBIENT,
    BIAS,
    BODY_FLAGS,
    CHANNEL,
    CLOCK,
    COEFFICIENTS,
    COUNTERS,
    COUPLING,
    COUPLING_BELOW,
    DEVIATION,
    DRIVE,
    DRIVE_EXPONENTS,
    DRIVE_TABLE,
    ENGINE_SIZE,
    FAULT,
    FORCING,
    GUT,
    HAS_PERCEIVED,
    IN_BAND,
    INTAKE,
    INTERNAL,
    KEYS,
    LEVEL,
    LEVEL_BEFORE,
    OBSERVATION,
    OPTIONS,
    PALATABILITY,
    PERCEIVED,
    REWARD,
    SCRATCH,
    SET_POINT,
    SET_POINT_BEFORE,
    TASK,
    TERMINATED,
    TRUNCATED,
    USES_AMBIENT,
    box_violation,
    clear_step,
    discrete_violation,
    refresh,
)
from needbench.envs.errors import ActionError, ConfigError, check_choice
from needbench.envs.needs import Coupling
from needbench.envs.physiology import BodyState, Physiology
from needbench.envs.presets import preset as load_preset
from needbench.envs.rewards import RewardChannel
from needbench.envs.streams import CopyStreams, EpisodeKeys, key_from


@dataclass(frozen=True)
class SourceGuide:
    """How an agent finds what serves one need: part of a world's public face.

    Attributes:
        need: the need served.
        source: what serves it, in the task's words (``food``, ``shade``...).
        effect: ``"raises"`` (the source adds to the need), ``"lowers"``, or
            ``"restores"`` (it pulls the need back toward its set point from
            either side, as shade does for temperature).
        features: per source instance, the names of the world features that
            locate it (offsets, vectors or view channels; see the task's docs).
        radius: per source instance, its reach in the world's units (0 for a cell).
    """

    need: str
    source: str
    effect: str
    features: tuple[tuple[str, ...], ...]
    radius: tuple[float, ...] = ()


class World:
    """The outside world of a task family, for B copies at once.

    A subclass sets ``action_space`` (one copy's), ``feature_names``,
    ``feature_low`` and ``feature_high`` (the world part of the observation)
    in ``__init__``, and provides three compiled kernels as class attributes
    (see ``envs/tasks/menu.py`` for the pattern):

    * ``reset_kernel(mask, constants, state, engine)``: for every copy where
      ``mask`` is true, a fresh body (:func:`~needbench.envs.engine.reset_body`)
      and a fresh world, then its observation;
    * ``step_kernel(actions, constants, state, events, engine)``: the world
      acts for every copy (writing the engine's intake, activity, ambient,
      forcing, task, perceived and palatability rows and its own events), then
      :func:`~needbench.envs.engine.settle_all`, then the observations;
    * ``observe_kernel(constants, state, engine)``: the observations alone.

    ``constants()`` is the tuple of the world's parameters as arrays and
    numbers, ``allocate(batch)`` its state arrays and ``allocate_events(batch)``
    the arrays of the events it reports in ``info`` (each a dict whose order is
    the kernels' tuple order). All randomness comes from the copies' streams
    in the engine, and every step draws the same count of words for every copy.

    The public face for agents and benchmarks: :meth:`feature_index`,
    ``model()`` where the world has an outcome model, ``sources(state)`` where
    it has places that serve needs. Nothing outside envs reads a world's
    private fields.
    """

    #: Parameters of this world and their defaults (constructor keywords of the task).
    parameters: ClassVar[dict[str, Any]] = {}
    #: Needs a body has in this task unless the user names others.
    default_needs: ClassVar[tuple[str, ...]] = ("energy", "water", "temperature")
    spatial: ClassVar[bool] = False
    reset_kernel: ClassVar[Callable]
    step_kernel: ClassVar[Callable]
    observe_kernel: ClassVar[Callable]

    action_space: spaces.Space
    feature_names: tuple[str, ...] = ()
    feature_low: np.ndarray
    feature_high: np.ndarray
    #: Whether the world sets each need's ambient (else each need's own ambient holds).
    uses_ambient: bool = False
    #: Whether the world says how an outcome is perceived (the sensory channel reads it).
    has_perceived: bool = False

    def __init__(self, physiology: Physiology, **params: Any):
        self.physiology = physiology
        for key, value in params.items():
            setattr(self, key, value)

    def constants(self) -> tuple:
        return ()

    def allocate(self, batch: int) -> dict[str, np.ndarray]:
        return {}

    def allocate_events(self, batch: int) -> dict[str, np.ndarray]:
        return {}

    def source_guides(self) -> dict[str, SourceGuide]:
        """{need: SourceGuide} for the needs this world has places to serve (default: none)."""
        return {}

    def feature_index(self, name: str) -> int:
        """Column of world feature ``name`` in the world part of the observation."""
        if name not in self.feature_names:
            near = difflib.get_close_matches(name, self.feature_names, n=1)
            hint = f" (did you mean {near[0]!r}?)" if near else ""
            raise ConfigError("feature", name, "a world feature: "
                              + ", ".join(self.feature_names) + hint)
        return self.feature_names.index(name)

    def text(self, state: dict[str, np.ndarray], index: int) -> str:
        """A readable frame of copy ``index``'s world (ANSI render)."""
        return ""

    def image(self, state: dict[str, np.ndarray], index: int) -> np.ndarray | None:
        """An (H, W, 3) uint8 picture of copy ``index``'s world, if it has one."""
        return None


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
    palatability_weight: float = 1.0
    interoception: bool = True
    observation: str = "flat"


COMMON_PARAMETERS = tuple(TaskConfig.__dataclass_fields__)


def _check_common_types(values: Mapping[str, Any]) -> None:
    """The common keywords' kinds, checked before anything reads them."""
    for key in ("preset", "drive", "reward", "on_lethal", "observation"):
        if key in values and not isinstance(values[key], str):
            raise ConfigError(key, values[key], "a name (a string)")
    needs = values.get("needs")
    if needs is not None and (isinstance(needs, (str, bytes)) or not isinstance(
            needs, (list, tuple)) or not all(isinstance(name, str) for name in needs)):
        raise ConfigError("needs", needs, "a list of need names, or None for the task's own")
    overrides = values.get("need_overrides", {})
    if not isinstance(overrides, Mapping) or not all(
            isinstance(changes, Mapping) for changes in overrides.values()):
        raise ConfigError("need_overrides", overrides, "a mapping {need: {field: value}}")
    if not isinstance(values.get("drive_params", {}), Mapping):
        raise ConfigError("drive_params", values["drive_params"],
                          "a mapping {parameter: value}")
    couplings = values.get("couplings")
    if couplings is not None and (isinstance(couplings, (str, bytes, Mapping))
                                  or not isinstance(couplings, (list, tuple))
                                  or not all(isinstance(c, Coupling) for c in couplings)):
        raise ConfigError("couplings", couplings,
                          "a list of Coupling objects, () for none, or None for the preset's")


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
    _check_common_types(merged)
    common = {k: v for k, v in merged.items() if k in COMMON_PARAMETERS}
    world = {**world_cls.parameters, **{k: v for k, v in merged.items()
                                        if k in world_cls.parameters}}
    if "needs" in common and common["needs"] is not None:
        common["needs"] = tuple(common["needs"])
    return TaskConfig(**common), world


class TaskCore:
    """B copies of one task: world, body, drive and reward, stepped by compiled kernels.

    Attributes:
        physiology: the body (needs, couplings, dt).
        drive: the drive object every metric and agent must reuse.
        reward_channel: how reward is made (assignable: a wrapper may swap it).
        world: the family's outside world.
        batch: B.
        state: the world state, a dict of (B, ...) arrays updated in place.
        engine: the tuple of arrays the kernels share (``needbench.envs.engine``).
    """

    def __init__(self, world_cls: type[World], config: TaskConfig, world_params: dict[str, Any],
                 batch: int):
        check_choice("observation", config.observation, ("flat", "dict"))
        max_steps = config.max_steps
        if (isinstance(max_steps, bool) or not isinstance(max_steps, (int, np.integer))
                or max_steps < 1):
            raise ConfigError("max_steps", config.max_steps, "a whole number >= 1")
        if not isinstance(config.interoception, (bool, np.bool_)):
            raise ConfigError("interoception", config.interoception, "True or False")
        needs = config.needs if config.needs is not None else world_cls.default_needs
        body = load_preset(config.preset)
        self.physiology = body.physiology(needs, config.need_overrides, extra=config.extra_needs,
                                          couplings=config.couplings)
        self.config = config
        self.band = self.physiology.band
        self.need_names = self.physiology.names
        k = self.physiology.num_needs
        self.drive: Drive = make_drive(config.drive, scale=self.band, num_needs=k,
                                       **dict(config.drive_params))
        self.world = world_cls(self.physiology, **world_params)
        self.batch = batch
        self.max_steps = int(config.max_steps)
        # Observation bounds: deviations are clipped to the widest lethal distance.
        self.deviation_limit = float(np.max(np.maximum(
            self.physiology.set_point - self.physiology.lethal_low,
            self.physiology.lethal_high - self.physiology.set_point) / self.band)) * 2.0
        self.streams = CopyStreams(np.zeros(batch, dtype=np.uint64))
        width = k + len(self.world.feature_names)
        B = batch
        engine: list[Any] = [None] * ENGINE_SIZE
        for index, shape, dtype in (
                (LEVEL, (B, k), np.float64), (GUT, (B, k), np.float64),
                (SET_POINT, (B, k), np.float64), (DRIVE, (B,), np.float64),
                (INTAKE, (B, k), np.float64), (ACTIVITY, (B,), np.float64),
                (AMBIENT, (B, k), np.float64), (FORCING, (B, k), np.float64),
                (TASK, (B,), np.float64), (PERCEIVED, (B, k), np.float64),
                (REWARD, (B,), np.float64), (INTERNAL, (B,), np.float64),
                (ALIVE, (B,), np.bool_), (TERMINATED, (B,), np.bool_),
                (TRUNCATED, (B,), np.bool_), (CLOCK, (B,), np.int64),
                (DEVIATION, (B, k), np.float64), (IN_BAND, (B,), np.bool_),
                (OBSERVATION, (B, width), np.float32), (SCRATCH, (3, k), np.float64),
                (LEVEL_BEFORE, (B, k), np.float64), (SET_POINT_BEFORE, (B, k), np.float64),
                (FAULT, (2,), np.int64), (PALATABILITY, (B,), np.float64)):
            engine[index] = np.zeros(shape, dtype)
        engine[ALIVE][:] = True
        physiology = self.physiology
        engine[COEFFICIENTS] = physiology.coefficients
        engine[COUPLING], engine[COUPLING_BELOW] = physiology.coupling, physiology.coupling_below
        engine[BODY_FLAGS] = physiology.flags
        engine[DRIVE_TABLE], engine[DRIVE_EXPONENTS] = self.drive.table(k), self.drive.exponents
        engine[OPTIONS] = np.array([self.max_steps, self.deviation_limit, k], dtype=np.float64)
        engine[USES_AMBIENT] = np.array([self.world.uses_ambient])
        engine[HAS_PERCEIVED] = np.array([self.world.has_perceived])
        engine[KEYS], engine[COUNTERS] = self.streams.keys, self.streams.counter
        self._engine = engine
        self.reward_channel = RewardChannel(config.reward, config.drive_weight,
                                            config.task_weight, config.sensory_bias,
                                            config.on_lethal, config.lethal_penalty,
                                            config.palatability_weight)
        self.state = self.world.allocate(batch)
        self.events = self.world.allocate_events(batch)
        self._state = tuple(self.state.values())
        self._events = tuple(self.events.values())
        self._constants = self.world.constants()
        self._all = np.ones(batch, dtype=np.bool_)
        self._box_bounds: dict[tuple[int, ...], tuple[np.ndarray, np.ndarray]] = {}
        self._started = False
        # info: (name, array) pairs read after each step; the body's part first.
        self._body_info = (("level", engine[LEVEL]), ("set_point", engine[SET_POINT]),
                           ("deviation", engine[DEVIATION]), ("drive", engine[DRIVE]),
                           ("in_band", engine[IN_BAND]))
        self._step_info = self._body_info + (
            ("reward_internal", engine[INTERNAL]), ("reward_task", engine[TASK]),
            ("alive", engine[ALIVE]), ("intake", engine[INTAKE])) + tuple(self.events.items())

    # --- the reward channel ---------------------------------------------------

    @property
    def reward_channel(self) -> RewardChannel:
        return self._reward_channel

    @reward_channel.setter
    def reward_channel(self, channel: RewardChannel) -> None:
        if not isinstance(channel, RewardChannel):
            raise ConfigError("reward_channel", channel, "a RewardChannel")
        vector, bias = channel.parameters(self.physiology.num_needs)
        self._reward_channel = channel
        self._engine[CHANNEL], self._engine[BIAS] = vector, bias
        self.engine = tuple(self._engine)

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

    @property
    def body(self) -> BodyState | None:
        """The bodies now: views of the engine's arrays (None before the first reset)."""
        if not self._started:
            return None
        return BodyState(self.engine[LEVEL], self.engine[GUT], self.engine[SET_POINT])

    @body.setter
    def body(self, state: BodyState) -> None:
        """Set the bodies from outside (tests, planners); drive and observation follow."""
        for index, value in zip((LEVEL, GUT, SET_POINT), state, strict=True):
            self.engine[index][...] = value
        refresh(self.engine)
        self._started = True

    def reset(self, keys: np.ndarray, mask: np.ndarray | None = None) -> None:
        """Start new episodes in all copies, or only where ``mask`` is true."""
        if mask is None:
            mask = self._all
        self.streams.rekey(mask, keys)
        self.world.reset_kernel(mask, self._constants, self._state, self.engine)
        self._started = True

    def step(self, actions: np.ndarray) -> None:
        """Advance every copy one step (validated actions, batched); results stay in
        the engine's arrays (see :meth:`outcome` and :meth:`info`)."""
        self.world.step_kernel(actions, self._constants, self._state, self._events, self.engine)
        fault = self.engine[FAULT]
        if fault[0] >= 0:
            copy, need = int(fault[0]), int(fault[1])
            raise ConfigError(
                f"needs.{self.need_names[need]}", float(self.engine[LEVEL_BEFORE][copy, need]),
                f"dynamics that keep the level a finite number; at step "
                f"{int(self.engine[CLOCK][copy])} of copy {copy} it became "
                f"{self.engine[LEVEL][copy, need]} (the value shown is the level before)")

    def observe(self) -> np.ndarray | dict[str, np.ndarray]:
        """(B, D) float32 observations (or a dict of them), computed afresh: levels and
        world state written in place from outside (tests, planners) are seen."""
        refresh(self.engine)
        self.world.observe_kernel(self._constants, self._state, self.engine)
        return self.observation()

    def observation(self) -> np.ndarray | dict[str, np.ndarray]:
        """A copy of the observations the last reset or step wrote."""
        obs = self.engine[OBSERVATION]
        k = self.physiology.num_needs
        if self.config.observation == "dict":
            parts = {"world": obs[:, k:].copy()}
            if self.config.interoception:
                parts = {"internal": obs[:, :k].copy(), **parts}
            return parts
        if not self.config.interoception:
            return obs[:, k:].copy()
        return obs.copy()

    def outcome(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Copies of the last step's (reward, terminated, truncated), each (B,)."""
        engine = self.engine
        return engine[REWARD].copy(), engine[TERMINATED].copy(), engine[TRUNCATED].copy()

    @property
    def t(self) -> np.ndarray:
        """(B,) steps since each copy's episode began."""
        return self.engine[CLOCK]

    def current_drive(self) -> np.ndarray:
        """(B,) D(h) of the current bodies."""
        return self.engine[DRIVE]

    def body_info(self) -> dict[str, np.ndarray]:
        """The internal-state part of ``info``, batched (copies)."""
        return {name: value.copy() for name, value in self._body_info}

    def info(self) -> dict[str, np.ndarray]:
        """The last step's ``info``, batched (copies): body, reward parts, events."""
        return {name: value.copy() for name, value in self._step_info}

    def single_info(self, after_step: bool) -> dict[str, Any]:
        """Copy 0's ``info`` with 0-d values as Python scalars (the single env)."""
        items = self._step_info if after_step else self._body_info
        return {name: value[0].item() if value.ndim == 1 else value[0].copy()
                for name, value in items}

    def finite_model(self, resolution: float = 0.25):
        """The task as a finite MDP on a lattice of internal states (outcome tasks only).

        See :mod:`needbench.envs.lattice`; used by the exact planner.
        """
        from needbench.envs.lattice import lattice_model

        return lattice_model(self, resolution)

    def validate_actions(self, actions: Any, space: spaces.Space) -> np.ndarray:
        """Check a batch of actions against the batched action space (compiled checks)."""
        single = self.world.action_space
        try:
            arr = np.asarray(actions)
        except (TypeError, ValueError) as error:  # ragged or odd nested sequences
            raise ActionError(f"actions {actions!r} are not an array of shape {space.shape}") \
                from error
        if isinstance(space, spaces.Box):
            if arr.shape != space.shape:
                raise ActionError(f"actions of shape {arr.shape} given; expected {space.shape}")
            if arr.dtype.kind not in "iuf":
                raise ActionError(f"actions of dtype {arr.dtype} given; expected numbers")
            values = np.ascontiguousarray(arr, dtype=np.float64)
            bounds = self._box_bounds.get(space.shape)
            if bounds is None:
                bounds = self._box_bounds[space.shape] = (
                    np.ascontiguousarray(np.broadcast_to(space.low, space.shape), np.float64)
                    .reshape(-1), np.ascontiguousarray(np.broadcast_to(space.high, space.shape),
                                                       np.float64).reshape(-1))
            problem = box_violation(values.reshape(-1), *bounds)
            if problem == 1:
                raise ActionError("actions contain NaN or inf")
            if problem == 2:
                raise ActionError(f"actions outside [{space.low.min()}, {space.high.max()}]")
            return values
        if arr.dtype.kind == "f" and np.all(np.isfinite(arr)) and np.all(arr == np.round(arr)):
            arr = arr.astype(np.int64)
        if arr.dtype.kind not in "iu" or arr.shape != space.shape or discrete_violation(
                np.ascontiguousarray(arr, dtype=np.int64).reshape(-1), int(single.start),
                int(single.n)):
            raise ActionError(f"actions {actions!r} are not in {space}")
        return np.ascontiguousarray(arr, dtype=np.int64)


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
        self._action = np.zeros(1, np.int64)
        self._needs_reset = True
        engine = self.core.engine
        self._flags = (engine[REWARD], engine[TERMINATED], engine[TRUNCATED])

    def reset(self, *, seed: int | None = None, options: dict | None = None):
        super().reset(seed=seed)
        self.core.reset(np.array([key_from(self.np_random)], dtype=np.uint64))
        self._needs_reset = False
        return self._observation(), self.core.single_info(after_step=False)

    def step(self, action):
        if self._needs_reset:
            raise RuntimeError("call reset() before step() (and after an episode ends)")
        self.core.step(self._one_action(action))
        reward, terminated, truncated = self._flags
        terminated, truncated = bool(terminated[0]), bool(truncated[0])
        self._needs_reset = terminated or truncated
        return (self._observation(), float(reward[0]), terminated, truncated,
                self.core.single_info(after_step=True))

    def _one_action(self, action) -> np.ndarray:
        """Validate one action and return it as a batch of one."""
        space = self.action_space
        if isinstance(space, spaces.Discrete):
            # The common case first: a plain or numpy integer inside the range.
            if isinstance(action, (int, np.integer)) and not isinstance(action, (bool, np.bool_)):
                if space.start <= action < space.start + space.n:
                    self._action[0] = action
                    return self._action
            elif isinstance(action, np.ndarray) and action.shape == () and \
                    action.dtype.kind in "iu" and space.contains(action):
                self._action[0] = action
                return self._action
            raise ActionError(f"action {action!r} is not one integer in {space}")
        try:
            action = np.asarray(action)
        except (TypeError, ValueError) as error:  # ragged or odd nested sequences
            raise ActionError(f"action {action!r} is not an array of shape {space.shape}") \
                from error
        if action.shape != space.shape:
            raise ActionError(f"action of shape {action.shape} given; expected {space.shape}")
        return self.core.validate_actions(action[None], self._batched_actions)

    def _observation(self):
        obs = self.core.observation()
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
        self._keys: EpisodeKeys | None = None
        self._done = np.zeros(self.num_envs, dtype=bool)
        self._copies = np.arange(self.num_envs)

    def reset(self, *, seed: int | list[int] | None = None, options: dict | None = None):
        if seed is None:
            seeds = [None] * self.num_envs
        elif isinstance(seed, (int, np.integer)):
            seeds = [int(seed) + i for i in range(self.num_envs)]
        else:
            seeds = list(seed)
            if len(seeds) != self.num_envs:
                raise ConfigError("seed", seed, f"an int or a list of {self.num_envs} seeds")
        if seed is not None or self._keys is None:
            self._keys = EpisodeKeys([np.random.default_rng(s) if s is None
                                      else gym.utils.seeding.np_random(s)[0] for s in seeds])
            if seed is not None:
                self._np_random, self._np_random_seed = gym.utils.seeding.np_random(seeds[0])
        self.core.reset(self._keys.next(self._copies))
        self._done[:] = False
        return self.core.observation(), self.core.body_info()

    def step(self, actions):
        core = self.core
        batched = core.validate_actions(actions, self.action_space)
        if self.autoreset_mode == AutoresetMode.SAME_STEP:
            return self._step_same(batched)
        resetting = self._done
        core.step(batched)
        if resetting.any():
            self._reset_copies(resetting, outcome=True)
        reward, terminated, truncated = core.outcome()
        self._done = terminated | truncated
        return core.observation(), reward, terminated, truncated, core.info()

    def _step_same(self, batched: np.ndarray):
        """One step in same-step autoreset (class docstring)."""
        core = self.core
        core.step(batched)
        reward, terminated, truncated = core.outcome()
        info = core.info()
        done = terminated | truncated
        if done.any():
            final_obs, final_info = core.observation(), info
            self._reset_copies(done)
            info = core.info()
            info.update(final_obs=final_obs, _final_obs=done.copy(), final_info=final_info,
                        _final_info=done.copy())
        return core.observation(), reward, terminated, truncated, info

    def _reset_copies(self, mask: np.ndarray, outcome: bool = False) -> None:
        """New episodes in the copies in ``mask``; their rows of the step's info (reward
        parts, intake, events) become those of a reset: zero, and alive. With
        ``outcome``, their reward and end flags are zeroed too."""
        core = self.core
        copies = np.flatnonzero(mask)
        core.reset(self._keys.next(copies), mask)
        clear_step(core.engine, copies, outcome)
        for value in core.events.values():
            value[copies] = 0

    def render(self):
        if self.render_mode is None:
            return None
        return tuple(rendering.frame(self.core, i, self.render_mode)
                     for i in range(self.num_envs))
