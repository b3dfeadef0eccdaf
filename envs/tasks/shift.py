"""Shift: paid work in the sun against tending the body; stability versus return."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from gymnasium import spaces

from needbench.envs.compiled import inline_kernel, kernel
from needbench.envs.engine import (
    ACTIVITY,
    AMBIENT,
    INTAKE,
    OBSERVATION,
    OPTIONS,
    TASK,
    WORLD_OFFSET,
    observe_internal,
    reset_body,
    settle_all,
)
from needbench.envs.errors import ConfigError, check_finite, check_non_negative
from needbench.envs.physiology import Physiology
from needbench.envs.task import NeedEnv, NeedVectorEnv, World

#: Actions of the invented salt-pan harvest, in action-index order.
WORK, EAT, DRINK, SHADE = 0, 1, 2, 3
ACTION_NAMES = ("rake salt", "eat flatbread", "drink at the cistern", "rest under the awning")


@inline_kernel
def sun_at(clock, day_length):
    """Sun strength in [0, 1] at step ``clock``: sin^2(pi (clock mod L) / L)."""
    strength = math.sin(math.pi * (clock % day_length) / day_length)
    return strength * strength  # numpy's x ** 2 is this product


@inline_kernel
def set_ambient(b, action, sun, temperature, sun_heat, shade_ambient, base_ambient, ambient):
    """Copy ``b``'s ambient row: each need's own, the temperature's set by the pan or shade."""
    for k in range(ambient.shape[1]):
        ambient[b, k] = base_ambient[k]
    ambient[b, temperature] = sun_heat * sun if action == WORK else shade_ambient


@kernel
def _sun_batch(clock, day_length, out):
    for b in range(clock.shape[0]):
        out[b] = sun_at(clock[b], day_length)


@kernel
def _ambient_batch(clock, actions, day_length, temperature, sun_heat, shade_ambient,
                   base_ambient, out):
    for b in range(clock.shape[0]):
        set_ambient(b, actions[b], sun_at(clock[b], day_length), temperature, sun_heat,
                    shade_ambient, base_ambient, out)


@inline_kernel
def observe_day(b, clock, day_length, engine):
    """Copy ``b``'s observation: deviations, the sun's strength, the time of day."""
    observe_internal(engine, b)
    observation = engine[OBSERVATION]
    offset = int(engine[OPTIONS][WORLD_OFFSET])
    observation[b, offset] = np.float32(sun_at(clock[b], day_length))
    observation[b, offset + 1] = np.float32((clock[b] % day_length) / day_length)


@kernel
def _reset(mask, constants, state, engine):
    day_length = constants[3]
    (clock,) = state
    for b in range(mask.shape[0]):
        if mask[b]:
            reset_body(engine, b)
            clock[b] = 0
            observe_day(b, clock, day_length, engine)


@kernel
def _step(actions, constants, state, events, engine):
    (intake_table, activity_table, pay_table, day_length, temperature, sun_heat, shade_ambient,
     base_ambient) = constants
    (clock,) = state
    action_event, worked_event, sun_event = events
    intake, activity, task, ambient = engine[INTAKE], engine[ACTIVITY], engine[TASK], \
        engine[AMBIENT]
    for b in range(actions.shape[0]):
        action = actions[b]
        for k in range(intake.shape[1]):
            intake[b, k] = intake_table[action, k]
        activity[b] = activity_table[action]
        task[b] = pay_table[action]
        sun = sun_at(clock[b], day_length)
        if temperature >= 0:
            set_ambient(b, action, sun, temperature, sun_heat, shade_ambient, base_ambient,
                        ambient)
        action_event[b] = action
        worked_event[b] = action == WORK
        sun_event[b] = sun
        clock[b] += 1
    settle_all(engine)
    for b in range(actions.shape[0]):
        observe_day(b, clock, day_length, engine)


@kernel
def _observe(constants, state, engine):
    day_length = constants[3]
    (clock,) = state
    for b in range(clock.shape[0]):
        observe_day(b, clock, day_length, engine)


class ShiftWorld(World):
    """A salt pan in the sun (paid work), a hut with bread and water, and shade.

    Working pays ``pay`` task reward per step, costs ``work_activity`` units of
    activity (energy and water drain faster, the body makes heat) and is done
    in the sun, whose ambient temperature follows a day cycle,
    ``sun_heat * sun(t)`` with ``sun(t) = sin^2(pi t / day_length)`` (0 at dawn
    and dusk, 1 at noon). Every other action pays nothing and is taken in the
    shade (ambient ``shade_ambient``). Needs the body lacks are skipped (no
    temperature: no heat load, and every need keeps its own ambient).

    State: ``clock`` (B,) steps since dawn. Events in ``info``: ``action``,
    ``worked`` and ``sun`` (the sun's strength during the step).
    """

    parameters = {"pay": 1.0, "work_activity": 1.0, "meal": 0.8, "drink": 0.8,
                  "sun_heat": 1.5, "shade_ambient": -0.5, "day_length": 100}
    default_needs = ("energy", "water", "temperature")
    reset_kernel = staticmethod(_reset)
    step_kernel = staticmethod(_step)
    observe_kernel = staticmethod(_observe)

    def __init__(self, physiology: Physiology, pay: float = 1.0, work_activity: float = 1.0,
                 meal: float = 0.8, drink: float = 0.8, sun_heat: float = 1.5,
                 shade_ambient: float = -0.5, day_length: int = 100):
        super().__init__(physiology)
        self.pay = check_non_negative("pay", pay)
        self.work_activity = check_non_negative("work_activity", work_activity)
        self.meal = check_non_negative("meal", meal)
        self.drink = check_non_negative("drink", drink)
        self.sun_heat = check_finite("sun_heat", sun_heat)
        self.shade_ambient = check_finite("shade_ambient", shade_ambient)
        if (not isinstance(day_length, (int, np.integer)) or isinstance(day_length, bool)
                or day_length < 2):
            raise ConfigError("day_length", day_length, "a whole number of steps >= 2")
        self.day_length = int(day_length)
        names = physiology.names
        intake = np.zeros((len(ACTION_NAMES), physiology.num_needs))
        if "energy" in names:
            intake[EAT] = physiology.vector({"energy": self.meal})
        if "water" in names:
            intake[DRINK] = physiology.vector({"water": self.drink})
        self.intake = intake
        self.activity = np.array([self.work_activity, 0.0, 0.0, 0.0])
        self.task_reward = np.array([self.pay, 0.0, 0.0, 0.0])
        self.temperature = physiology.index.get("temperature")
        self.uses_ambient = self.temperature is not None
        self.action_space = spaces.Discrete(len(ACTION_NAMES))
        self.feature_names = ("sun", "time_of_day")
        self.feature_low = np.zeros(2)
        self.feature_high = np.ones(2)

    def constants(self) -> tuple:
        temperature = -1 if self.temperature is None else self.temperature
        return (self.intake, self.activity, self.task_reward, self.day_length, temperature,
                float(self.sun_heat), float(self.shade_ambient), self.physiology.ambient)

    def allocate(self, batch: int) -> dict[str, np.ndarray]:
        return {"clock": np.zeros(batch, dtype=np.int64)}

    def allocate_events(self, batch: int) -> dict[str, np.ndarray]:
        return {"action": np.zeros(batch, np.int64), "worked": np.zeros(batch, np.bool_),
                "sun": np.zeros(batch)}

    def sun(self, clock: np.ndarray) -> np.ndarray:
        """Sun strength in [0, 1] at step ``clock`` of the day cycle (any shape)."""
        clock = np.asarray(clock)
        flat = np.ascontiguousarray(clock, dtype=np.float64).reshape(-1)
        out = np.empty(flat.shape[0])
        _sun_batch(flat, self.day_length, out)
        return out.reshape(clock.shape)

    def ambient(self, clock: np.ndarray, actions: np.ndarray) -> np.ndarray | None:
        """(B, K) ambient values of a step: the sun's heat at the pan, shade elsewhere.

        None when the body has no temperature need (every need keeps its own).
        """
        if self.temperature is None:
            return None
        clock = np.ascontiguousarray(clock, dtype=np.float64).reshape(-1)
        actions = np.ascontiguousarray(actions, dtype=np.int64).reshape(-1)
        if clock.shape != actions.shape:
            clock = np.ascontiguousarray(np.broadcast_to(clock, actions.shape))
        out = np.empty((actions.shape[0], self.physiology.num_needs))
        _ambient_batch(clock, actions, self.day_length, self.temperature, float(self.sun_heat),
                       float(self.shade_ambient), self.physiology.ambient, out)
        return out

    def text(self, state, index):
        clock = int(state["clock"][index])
        return (f"salt pan, step {clock % self.day_length} of a {self.day_length}-step day, "
                f"sun {float(self.sun(np.array(clock))):.2f}")

    def model(self) -> dict[str, Any]:
        """The known action model, for planners and controllers.

        ``actions`` names; ``intake`` (A, K) in need units; ``activity`` (A,);
        ``task_reward`` (A,); ``in_sun`` (A,) bool. The ambient of a step is
        :meth:`ambient` (clock, actions), the clock being the step of the day.
        """
        return {"actions": ACTION_NAMES, "intake": self.intake, "activity": self.activity,
                "task_reward": self.task_reward, "in_sun": np.arange(len(ACTION_NAMES)) == WORK}


class ShiftEnv(NeedEnv):
    """Shift: rake salt in the sun for pay, or tend the body for nothing.

    ## Description
    A worker at an invented salt pan chooses each step between raking salt in
    the sun (+1 task reward, activity 1: energy and water drain faster and
    the body makes heat, while the sun heats it toward ``sun_heat * sun(t)``
    band, peaking at noon of the 100-step day), eating flatbread (+0.8 band of
    energy, through the gut), drinking at the cistern (+0.8 band of water) and
    resting under the awning (shade, ambient -0.5 band). Tending the body
    pays nothing outside, so the task probes the trade-off between stability
    and extrinsic return.

    Measured over 32 seeds with the registered weights: always raking earns
    100 task reward, survives the shift (lowest water seen -5.5 bands, lethal
    at -6) but spends only 19 % of the steps in the comfort band, return
    86.5; a rule that tends the most urgent need once it is half a band out
    and rakes otherwise earns 66.4, stays in band 100 % of the time, return
    66.4. Because drive reduction telescopes (its episode sum is
    D(h_0) - D(h_T)), the ranking of the two rules flips at task_weight of
    about 0.40: below it the tending rule has the higher return.

    ## Action Space
    ``Discrete(4)``: 0 rake salt (work), 1 eat flatbread, 2 drink at the
    cistern, 3 rest under the awning.

    ## Observation Space
    ``Box(float32, (K + 2,))``: the K internal deviations (h - h*)/band, then
    the sun's strength in [0, 1] and the time of day in [0, 1). With
    ``interoception=False`` only the latter two. K = 3 (energy, water,
    temperature) by default.

    ## Rewards
    r_t = task_weight * task_t + drive_weight * (D(h_t) - D(h_{t+1})), with
    task_t = ``pay`` (1) on a work step and 0 otherwise, and the homeostatic
    drive (n = 3, m = 2) on band-scaled deviations. Registered weights:
    task_weight = drive_weight = 1. Why: one step's pay then equals the drive
    reduction of one meal eaten 1.11 bands below the set point (other needs
    at their set points), so a reward-greedy worker lets a need drift just
    past the edge of its comfort band before tending it is worth a step of
    work: the two goals meet at the band edge rather than one swamping the
    other, and the return-maximising simple rule is the unstable one.

    ## Starting State
    Levels uniform within half a band of the set points, gut empty, dawn
    (sun 0).

    ## Episode End
    Termination when a need leaves its lethal bounds (+-6 bands); truncation
    at ``max_steps`` (100, one day).

    ## Arguments
    ``pay`` (>= 0, 1.0): task reward per work step; ``work_activity`` (>= 0,
    1.0): activity while working; ``meal`` and ``drink`` (>= 0, 0.8): amounts
    in need units; ``sun_heat`` (1.5) and ``shade_ambient`` (-0.5): ambient
    temperature at the pan at noon and in the shade; ``day_length`` (whole
    number >= 2, 100 steps); and the common task arguments
    (``needbench.envs.task``). ``info`` adds ``action``, ``worked`` and
    ``sun`` (the sun's strength during the step).

    ## Vectorized environment
    ``gymnasium.make_vec("needbench/Shift-v0", num_envs=N,
    vectorization_mode="vector_entry_point")`` gives :class:`ShiftVectorEnv`.

    ## Version History
    * v0: initial version.
    """

    world_cls = ShiftWorld
    defaults = {"max_steps": 100, "task_weight": 1.0, "drive_weight": 1.0}


class ShiftVectorEnv(NeedVectorEnv):
    """Native vector version of :class:`ShiftEnv` (same core, B = num_envs)."""

    world_cls = ShiftWorld
    defaults = ShiftEnv.defaults
