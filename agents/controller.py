"""``setpoint-controller``: a reactive homeostat from classical control.

The controller looks at the current internal state and acts to reduce the
largest deviation from the set points, in comfort-band units. It neither
learns nor anticipates: every action is a function of the present
observation alone.

* Outcome tasks (worlds with a known outcome model, ``world.model()`` giving
  ``probabilities`` (I, O) and ``effects`` (I, O, K) per item, as Menu,
  Gamble, Lure, Drift and Forewarn do): one-step drive-greedy. For every item it scores the
  expected drive after the step, sum_o p_io D(h + e_io), with the task's own
  drive object (``env.unwrapped.core.drive``), and takes the item with the
  lowest (ties: the lowest index). The outcome is counted in full at once:
  the controller cannot see the gut, so food still on its way is invisible to
  it; and the passive drift of the step, the same whatever the item, is left
  out. Lure's perceived outcomes and palatability are ignored: the
  controller acts on the body's true effects. Drift's model is the
  annual-mean one (``world.model()``): the controller does not see the
  season (hidden by default), so it scores every item at its mean yield and
  acts on the deviation from the current, adapted set point, which the
  observation gives.
* Forewarn (an outcome model with a ``shelter``): the outcome rule over the
  actions that change the needs (rest, eat, drink), and the oilskin worn
  reactively: put on once the squall's need is ``shelter_at`` band out on the
  squall's side, taken off once it is back within ``rest_below`` of its set
  point (in a long squall it may come off and go on again). The horn is
  ignored: this is the reactive baseline that anticipation is measured
  against.
* Shift (an action model with ``intake`` and ``task_reward``): never work
  unless every need is in its comfort band; otherwise the one-step
  drive-greedy choice among the unpaid actions (all of them in the shade).
* Spatial tasks (Forage, ForageWide, Arena): it heads for the nearest source
  of the most urgent need and stays on it while that need is the most
  urgent. A need's urgency is the part of its deviation its sources can
  correct: the deficit for a source that raises the need (food, water, a
  warm spot), the excess for one that lowers it, and the whole |deviation|
  for one that brings it back either way (Forage's shade). The need whose
  source the agent stands on counts ``hysteresis`` band units more while it
  is still being corrected (switching hysteresis: without it the agent
  dithers between two sources whose needs are about equally urgent). When
  no urgency exceeds ``rest_below`` the controller rests: it stays where it
  is, or steps off a source whose need is not in deficit (a source keeps
  feeding the agent while it stands on it).

Observations, not env internals
-------------------------------
``act`` reads everything from the observation, so it works on any batch of
observations of the task it learned on (a vector env, or a fresh evaluation
env): the first K entries are the deviations (h - h*)/band, so the
controller **requires interoception** (``interoception=True``, the default;
``learn`` raises ConfigError otherwise), and the world features give the
source offsets. What ``learn`` reads from ``env.unwrapped.core`` is fixed for
the task, not for an episode, and only through the world's public face: the
set points, bands and drive; the outcome model (``world.model()``); which
features locate the source of each need and what the source does
(``world.source_guides()``, ``world.feature_index(name)``); Forage's moves
and the cells where walls may stand (``world.moves()``,
``world.possible_walls()``; pillars are not in the full-view observation, so
the controller walks round every possible pillar site, unless pillars cannot
stand); Arena's ``max_speed`` and ``sensing_range``. It
reads deviations against the current set point, so under set point
adaptation (Drift) it holds the body near where the set point has moved.

Forage's local view (ForageWide) shows only a window: the controller heads for
the nearest visible source of the most urgent need, avoiding visible walls,
and when none is in sight it wanders (a random open move, reproducible from
the ``learn`` seed; the only randomness in this agent).

Every needbench task has a rule; other tasks are refused with a ConfigError
at ``learn``.
"""

from __future__ import annotations

from collections.abc import Mapping
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
    check_seed,
    check_total_steps,
    task_core,
)
from needbench.envs.drives import Drive, make_drive
from needbench.envs.errors import ConfigError, check_non_negative

#: What a source does to its need: raise it (serves a deficit), lower it
#: (serves an excess), or bring it back toward the set point from either side.
RAISES, LOWERS, RESTORES = 1, -1, 0

SUPPORTED = ("a task with a known outcome model (world.model() with 'probabilities' and "
             "'effects', e.g. Menu, Gamble, Lure, Drift, Forewarn), an action model with "
             "'intake' and 'task_reward' (Shift) or a spatial task with sources "
             "(Forage, ForageWide, Arena)")


@dataclass(frozen=True)
class ControllerHyperparameters:
    #: Band units: in spatial tasks, rest while no need's correctable
    #: deviation exceeds this (0: always on the way to some source).
    rest_below: float = 0.1
    #: Band units: head start of the need whose source the agent stands on,
    #: while that need is still being corrected (classical switching
    #: hysteresis; without it the agent dithers between two sources).
    hysteresis: float = 0.5
    #: Band units: in Forewarn, put the oilskin on once the squall's need is
    #: this far from its set point on the squall's side (it is felt, not heard).
    shelter_at: float = 0.5

    def __post_init__(self):
        check_non_negative("setpoint-controller.rest_below", self.rest_below)
        check_non_negative("setpoint-controller.hysteresis", self.hysteresis)
        check_non_negative("setpoint-controller.shelter_at", self.shelter_at)


def urgency(deviation: np.ndarray, direction: np.ndarray) -> np.ndarray:
    """(B, K) the part of each deviation (band units) that the need's sources correct.

    ``direction`` (K,): RAISES (deficit counts), LOWERS (excess counts) or
    RESTORES (|deviation| counts).
    """
    deficit = np.maximum(-deviation, 0.0)
    excess = np.maximum(deviation, 0.0)
    return np.where(direction == RAISES, deficit,
                    np.where(direction == LOWERS, excess, np.abs(deviation)))


def choose_need(deviation: np.ndarray, direction: np.ndarray, has_source: np.ndarray,
                on_source: np.ndarray, settings: ControllerHyperparameters
                ) -> tuple[np.ndarray, np.ndarray]:
    """(target need (B,), resting (B,) bool) of a spatial rule.

    The target is the need of largest urgency, the need whose source the
    agent stands on (``on_source`` (B, K)) counting ``hysteresis`` more while
    it is still being corrected; the agent rests when the target's urgency is
    at most ``rest_below``. Needs without sources (``has_source`` (K,)) are
    never targets.
    """
    need_urgency = np.where(has_source, urgency(deviation, direction), -np.inf)
    held = on_source & (need_urgency > 0.0)
    target = np.argmax(need_urgency + np.where(held, settings.hysteresis, 0.0), axis=1)
    resting = need_urgency[np.arange(len(target)), target] <= settings.rest_below
    return target, resting


# --- outcome tasks ---------------------------------------------------------------------


class OutcomeRule:
    """One-step drive-greedy choice among items with known outcome lotteries.

    Args:
        set_point, band: (K,) in need units.
        drive: the task's drive object.
        probabilities: (I, O) outcome probabilities per item.
        effects: (I, O, K) change of each need per outcome, in need units.
    """

    kind = "outcome"

    def __init__(self, set_point: np.ndarray, band: np.ndarray, drive: Drive,
                 probabilities: np.ndarray, effects: np.ndarray):
        self.set_point = np.asarray(set_point, dtype=np.float64)
        self.band = np.asarray(band, dtype=np.float64)
        self.drive = drive
        self.probabilities = np.asarray(probabilities, dtype=np.float64)
        self.effects = np.asarray(effects, dtype=np.float64)
        self.num_needs = len(self.set_point)

    @classmethod
    def from_core(cls, core: Any) -> OutcomeRule:
        model = core.world.model()
        return cls(core.physiology.set_point, core.band, core.drive, model["probabilities"],
                   model["effects"])

    def expected_drive(self, deviation: np.ndarray) -> np.ndarray:
        """(B, I) expected drive after each item, sum_o p_io D(h + e_io)."""
        level = self.set_point + deviation * self.band  # (B, K)
        after = level[:, None, None, :] + self.effects[None]  # (B, I, O, K)
        return np.sum(self.probabilities[None] * self.drive(after, self.set_point), axis=2)

    def act(self, observations: np.ndarray, deviation: np.ndarray) -> np.ndarray:
        return np.argmin(self.expected_drive(deviation), axis=1)  # ties: the lowest index

    def state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        return ({"drive": self.drive.params()},
                {"set_point": self.set_point, "band": self.band,
                 "probabilities": self.probabilities, "effects": self.effects})

    @classmethod
    def restore(cls, settings: ControllerHyperparameters, meta: Mapping[str, Any],
                arrays: Mapping[str, np.ndarray]) -> OutcomeRule:
        return cls(arrays["set_point"], arrays["band"], _saved_drive(meta, arrays),
                   arrays["probabilities"], arrays["effects"])


def _saved_drive(meta: Mapping[str, Any], arrays: Mapping[str, np.ndarray]) -> Drive:
    params = dict(meta["drive"])
    family = params.pop("family")
    scale = params.pop("scale")
    return make_drive(family, scale=np.asarray(scale), num_needs=len(arrays["set_point"]),
                      **params)


class ShelterRule(OutcomeRule):
    """Forewarn: the outcome rule over the other actions, and a shelter worn reactively.

    Args (beyond :class:`OutcomeRule`'s):
        need: index of the need the disturbance pushes; ``direction`` (-1 or
            +1): the side it pushes it to.
        put_on, take_off: action indices of the shelter.
        worn_column: observation column that is 1 while the shelter is worn.
        shelter_at: band units on the disturbance's side that put it on.
        take_off_at: band units on that side at or below which it comes off
            (below ``shelter_at``: the gap is the switching hysteresis).
    """

    kind = "shelter"

    def __init__(self, set_point, band, drive, probabilities, effects, need: int,
                 direction: int, put_on: int, take_off: int, worn_column: int,
                 shelter_at: float, take_off_at: float):
        super().__init__(set_point, band, drive, probabilities, effects)
        self.need, self.direction = int(need), int(direction)
        self.put_on, self.take_off = int(put_on), int(take_off)
        self.worn_column, self.shelter_at = int(worn_column), float(shelter_at)
        self.take_off_at = min(float(take_off_at), self.shelter_at)

    @classmethod
    def from_core(cls, core: Any, settings: ControllerHyperparameters) -> ShelterRule:
        model = core.world.model()
        shelter = model["shelter"]
        k = core.physiology.num_needs
        return cls(core.physiology.set_point, core.band, core.drive, model["probabilities"],
                   model["effects"], core.physiology.index[shelter["need"]],
                   shelter["direction"], shelter["put_on"], shelter["take_off"],
                   k + core.world.feature_index(shelter["worn_feature"]), settings.shelter_at,
                   settings.rest_below)

    def act(self, observations: np.ndarray, deviation: np.ndarray) -> np.ndarray:
        expected = self.expected_drive(deviation)
        expected[:, [self.put_on, self.take_off]] = np.inf  # the shelter is decided below
        action = np.argmin(expected, axis=1)
        worn = observations[:, self.worn_column] > 0.5
        pushed = self.direction * deviation[:, self.need]  # > 0: on the disturbance's side
        action = np.where(~worn & (pushed >= self.shelter_at), self.put_on, action)
        return np.where(worn & (pushed <= self.take_off_at), self.take_off, action)

    def state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        meta, arrays = super().state()
        return ({**meta, "need": self.need, "direction": self.direction, "put_on": self.put_on,
                 "take_off": self.take_off, "worn_column": self.worn_column,
                 "shelter_at": self.shelter_at, "take_off_at": self.take_off_at}, arrays)

    @classmethod
    def restore(cls, settings, meta, arrays) -> ShelterRule:
        return cls(arrays["set_point"], arrays["band"], _saved_drive(meta, arrays),
                   arrays["probabilities"], arrays["effects"], meta["need"], meta["direction"],
                   meta["put_on"], meta["take_off"], meta["worn_column"], meta["shelter_at"],
                   meta["take_off_at"])


class WorkRule(OutcomeRule):
    """Shift: work (the best-paid action) only while every need is in its comfort band;
    otherwise the one-step drive-greedy choice among the unpaid actions.

    Args:
        set_point, band: (K,) in need units.
        drive: the task's drive object.
        intake: (A, K) what each action delivers, in need units: a sure outcome
            per action, counted in full at once as in the outcome rule.
        task_reward: (A,) the pay of each action.
    """

    kind = "work"

    def __init__(self, set_point: np.ndarray, band: np.ndarray, drive: Drive,
                 intake: np.ndarray, task_reward: np.ndarray):
        intake = np.asarray(intake, dtype=np.float64)
        super().__init__(set_point, band, drive, np.ones((len(intake), 1)), intake[:, None, :])
        self.task_reward = np.asarray(task_reward, dtype=np.float64)
        self.work = int(np.argmax(self.task_reward))
        self.paid = self.task_reward > 0.0
        if not self.paid.any() or self.paid.all():
            raise ConfigError("world.model().task_reward", self.task_reward.tolist(),
                              "at least one paid (> 0) and one unpaid (<= 0) action")

    @classmethod
    def from_core(cls, core: Any) -> WorkRule:
        model = core.world.model()
        return cls(core.physiology.set_point, core.band, core.drive, model["intake"],
                   model["task_reward"])

    def act(self, observations: np.ndarray, deviation: np.ndarray) -> np.ndarray:
        expected = self.expected_drive(deviation)
        expected[:, self.paid] = np.inf  # tending is done by the unpaid actions
        in_band = np.all(np.abs(deviation) <= 1.0, axis=1)
        return np.where(in_band, self.work, np.argmin(expected, axis=1))

    def state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        return ({"drive": self.drive.params()},
                {"set_point": self.set_point, "band": self.band, "intake": self.effects[:, 0],
                 "task_reward": self.task_reward})

    @classmethod
    def restore(cls, settings, meta, arrays) -> WorkRule:
        return cls(arrays["set_point"], arrays["band"], _saved_drive(meta, arrays),
                   arrays["intake"], arrays["task_reward"])


# --- grid worlds (Forage) -----------------------------------------------------------------


def _grid_score(goal: np.ndarray, moves: np.ndarray) -> np.ndarray:
    """(B, A) preference of each move toward ``goal`` (B, 2): Manhattan gain first, then
    the axis with more of the way left, then the lower action index."""
    gain = np.abs(goal).sum(axis=1)[:, None] - np.abs(goal[:, None, :] - moves[None]).sum(2)
    axis_left = np.abs(goal) @ np.abs(moves).T
    return 100.0 * gain + axis_left - 0.01 * np.arange(len(moves))


class GridRule:
    """Forage with the full view: the observation gives the offset to each nearest source.

    Moves are chosen greedily on Manhattan distance, never onto the outer wall
    or a possible pillar site (unless that cell is the target), sidestepping
    when the straight move is barred. Action 0 of ``moves`` is "stay".
    """

    kind = "grid"

    def __init__(self, settings: ControllerHyperparameters, num_needs: int,
                 direction: np.ndarray, offset_columns: np.ndarray,
                 position_columns: np.ndarray, moves: np.ndarray, barred: np.ndarray):
        self.settings = settings
        self.num_needs = int(num_needs)
        self.direction = np.asarray(direction, dtype=np.int64)  # (K,)
        self.offset_columns = np.asarray(offset_columns, dtype=np.int64)  # (K, 2), -1: none
        self.position_columns = np.asarray(position_columns, dtype=np.int64)  # (2,)
        self.moves = np.asarray(moves, dtype=np.int64)  # (A, 2) row, column steps
        self.barred = np.asarray(barred, dtype=bool)  # (H, W) wall or possible pillar
        self.scale = np.array(self.barred.shape, dtype=np.float64) - 1.0

    @classmethod
    def from_core(cls, core: Any, settings: ControllerHyperparameters) -> GridRule:
        world = core.world
        k = core.physiology.num_needs
        direction = np.full(k, RAISES)
        offsets = np.full((k, 2), -1)
        for need, guide in world.source_guides().items():
            i = core.physiology.index[need]
            offsets[i] = [k + world.feature_index(name) for name in guide.features[0]]
            direction[i] = RESTORES if guide.effect == "restores" else RAISES
        position = np.array([k + world.feature_index("row"), k + world.feature_index("column")])
        return cls(settings, k, direction, offsets, position, world.moves(),
                   world.possible_walls())

    def act(self, observations: np.ndarray, deviation: np.ndarray) -> np.ndarray:
        copies = np.arange(observations.shape[0])
        has_source = self.offset_columns[:, 0] >= 0
        columns = np.where(has_source[:, None], self.offset_columns, 0)
        position = np.rint(observations[:, self.position_columns] * self.scale).astype(np.int64)
        offsets = np.rint(observations[:, columns] * self.scale).astype(np.int64)  # (B, K, 2)
        on_source = np.all(offsets == 0, axis=2) & has_source[None]
        target, resting = choose_need(deviation, self.direction, has_source, on_source,
                                      self.settings)
        action = self.toward(position, offsets[copies, target])
        # Rest: stay, but step off a source that feeds a need not in deficit.
        feeding_surplus = np.any(on_source & (self.direction[None] == RAISES)
                                 & (deviation >= 0.0), axis=1)
        rest = np.where(feeding_surplus, self.off_source(position), 0)
        return np.where(resting, rest, action)

    def _open(self, destination: np.ndarray, allowed: np.ndarray | None = None) -> np.ndarray:
        rows = np.clip(destination[..., 0], 0, self.barred.shape[0] - 1)
        columns = np.clip(destination[..., 1], 0, self.barred.shape[1] - 1)
        open_cell = ~self.barred[rows, columns]
        if allowed is not None:
            open_cell |= np.all(destination == allowed, axis=-1)
        return open_cell

    def toward(self, position: np.ndarray, goal: np.ndarray) -> np.ndarray:
        """(B,) the move toward ``goal`` (offset from ``position``) along open cells."""
        moves = self.moves[1:]
        destination = position[:, None, :] + moves[None]  # (B, A-1, 2)
        target = (position + goal)[:, None, :]
        score = np.where(self._open(destination, target), _grid_score(goal, moves), -np.inf)
        return np.where(np.all(goal == 0, axis=1), 0, 1 + np.argmax(score, axis=1))

    def off_source(self, position: np.ndarray) -> np.ndarray:
        """(B,) the first move onto an open cell."""
        destination = position[:, None, :] + self.moves[1:][None]
        return 1 + np.argmax(self._open(destination), axis=1)

    def state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        return ({"num_needs": self.num_needs},
                {"direction": self.direction, "offset_columns": self.offset_columns,
                 "position_columns": self.position_columns, "moves": self.moves,
                 "barred": self.barred})

    @classmethod
    def restore(cls, settings, meta, arrays) -> GridRule:
        return cls(settings, meta["num_needs"], arrays["direction"], arrays["offset_columns"],
                   arrays["position_columns"], arrays["moves"], arrays["barred"])


class WindowRule:
    """Forage with the local view: sources and walls are seen in a square window.

    The agent heads for the nearest visible source of the most urgent need
    (Manhattan distance inside the window, visible walls avoided) and wanders
    (a random open move) when none is in sight.
    """

    kind = "window"

    def __init__(self, settings: ControllerHyperparameters, num_needs: int,
                 direction: np.ndarray, channel_columns: np.ndarray, wall_columns: np.ndarray,
                 cells: np.ndarray, moves: np.ndarray, seed: int):
        self.settings = settings
        self.num_needs = int(num_needs)
        self.direction = np.asarray(direction, dtype=np.int64)  # (K,)
        self.channel_columns = np.asarray(channel_columns, dtype=np.int64)  # (K, C), -1: none
        self.wall_columns = np.asarray(wall_columns, dtype=np.int64)  # (C,)
        self.cells = np.asarray(cells, dtype=np.int64)  # (C, 2) window cell offsets
        self.moves = np.asarray(moves, dtype=np.int64)
        self.seed = int(seed)
        self.generator = np.random.default_rng(self.seed)
        self.centre = int(np.flatnonzero(np.all(self.cells == 0, axis=1))[0])
        # Window cell of each move's destination.
        self.move_cells = np.array([int(np.flatnonzero(np.all(self.cells == m, axis=1))[0])
                                    for m in self.moves[1:]])

    @classmethod
    def from_core(cls, core: Any, settings: ControllerHyperparameters, seed: int) -> WindowRule:
        world = core.world
        k = core.physiology.num_needs
        cells = world.window_cells()
        direction = np.full(k, RAISES)
        columns = np.full((k, len(cells)), -1)
        for need, guide in world.source_guides().items():
            i = core.physiology.index[need]
            columns[i] = [k + world.feature_index(name) for name in guide.features[0]]
            direction[i] = RESTORES if guide.effect == "restores" else RAISES
        walls = [k + world.feature_index(f"window/wall/{dr:+d},{dc:+d}") for dr, dc in cells]
        return cls(settings, k, direction, columns, np.array(walls), np.array(cells),
                   world.moves(), seed)

    def act(self, observations: np.ndarray, deviation: np.ndarray) -> np.ndarray:
        batch = observations.shape[0]
        copies = np.arange(batch)
        has_source = self.channel_columns[:, 0] >= 0
        channels = np.where(has_source[:, None], self.channel_columns, 0)
        # Food cells show their stock (0 when eaten bare): "> 0" means worth a visit.
        visible = (observations[:, channels] > 0.0) & has_source[None, :, None]  # (B, K, C)
        on_source = visible[:, :, self.centre]
        target, resting = choose_need(deviation, self.direction, has_source, on_source,
                                      self.settings)
        wall = observations[:, self.wall_columns] > 0.5  # (B, C)
        blocked = wall[:, self.move_cells]  # (B, A-1)
        wander = self._wander(blocked)
        seen = visible[copies, target]  # (B, C)
        distance = np.abs(self.cells).sum(axis=1)
        nearest = np.argmin(np.where(seen, distance[None], np.iinfo(np.int64).max), axis=1)
        goal = self.cells[nearest]
        score = np.where(blocked, -np.inf, _grid_score(goal, self.moves[1:]))
        action = np.where(np.all(goal == 0, axis=1), 0, 1 + np.argmax(score, axis=1))
        action = np.where(seen.any(axis=1), action, wander)
        feeding_surplus = np.any(on_source & (self.direction[None] == RAISES)
                                 & (deviation >= 0.0), axis=1)
        rest = np.where(feeding_surplus, wander, 0)
        return np.where(resting, rest, action)

    def _wander(self, blocked: np.ndarray) -> np.ndarray:
        # One draw per copy and move every call, so the stream depends on batch sizes only.
        keys = self.generator.random(blocked.shape)
        return 1 + np.argmax(np.where(blocked, -1.0, keys), axis=1)

    def state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        return ({"num_needs": self.num_needs, "seed": self.seed},
                {"direction": self.direction, "channel_columns": self.channel_columns,
                 "wall_columns": self.wall_columns, "cells": self.cells, "moves": self.moves})

    @classmethod
    def restore(cls, settings, meta, arrays) -> WindowRule:
        return cls(settings, meta["num_needs"], arrays["direction"], arrays["channel_columns"],
                   arrays["wall_columns"], arrays["cells"], arrays["moves"], meta["seed"])


# --- continuous worlds (Arena) -------------------------------------------------------------


class PlaneRule:
    """Arena: the observation gives the vector to every source centre; the action is a velocity.

    The agent steers straight at the nearest source of the target need,
    slowing on the last step so as to stop on its centre.
    """

    kind = "plane"

    def __init__(self, settings: ControllerHyperparameters, num_needs: int,
                 direction: np.ndarray, source_need: np.ndarray, source_columns: np.ndarray,
                 source_radius: np.ndarray, sensing_range: float, max_speed: float):
        self.settings = settings
        self.num_needs = int(num_needs)
        self.direction = np.asarray(direction, dtype=np.int64)  # (K,)
        self.source_need = np.asarray(source_need, dtype=np.int64)  # (S,)
        self.source_columns = np.asarray(source_columns, dtype=np.int64)  # (S, 2)
        self.source_radius = np.asarray(source_radius, dtype=np.float64)  # (S,)
        self.sensing_range = float(sensing_range)
        self.max_speed = float(max_speed)
        self.membership = self.source_need[:, None] == np.arange(self.num_needs)[None]  # (S, K)

    @classmethod
    def from_core(cls, core: Any, settings: ControllerHyperparameters) -> PlaneRule:
        world = core.world
        k = core.physiology.num_needs
        direction = np.full(k, RAISES)
        needs, columns, radius = [], [], []
        for need, guide in world.source_guides().items():
            i = core.physiology.index[need]
            direction[i] = LOWERS if guide.effect == "lowers" else RAISES
            for features, reach in zip(guide.features, guide.radius, strict=True):
                needs.append(i)
                columns.append([k + world.feature_index(name) for name in features])
                radius.append(reach)
        return cls(settings, k, direction, np.array(needs), np.array(columns), np.array(radius),
                   world.sensing_range, world.max_speed)

    def act(self, observations: np.ndarray, deviation: np.ndarray) -> np.ndarray:
        copies = np.arange(observations.shape[0])
        has_source = self.membership.any(axis=0)
        # Island units; a capped vector (beyond sensing range) keeps its heading.
        relative = observations[:, self.source_columns] * self.sensing_range  # (B, S, 2)
        distance = np.linalg.norm(relative, axis=2)
        inside = distance < self.source_radius[None]  # (B, S)
        on_source = (inside[:, :, None] & self.membership[None]).any(axis=1)  # (B, K)
        target, resting = choose_need(deviation, self.direction, has_source, on_source,
                                      self.settings)
        of_target = self.source_need[None, :] == target[:, None]
        nearest = np.argmin(np.where(of_target, distance, np.inf), axis=1)
        heading = relative[copies, nearest] / self.max_speed
        # Full speed until one step from the centre, then exactly onto it.
        velocity = heading / np.maximum(np.linalg.norm(heading, axis=1, keepdims=True), 1.0)
        # Rest: stand still, but leave a source that feeds a need not in deficit.
        surplus = ((self.direction[self.source_need][None] == RAISES)
                   & (deviation[:, self.source_need] >= 0.0))  # (B, S)
        away = -np.where((inside & surplus)[:, :, None], relative, 0.0).sum(axis=1)
        length = np.linalg.norm(away, axis=1, keepdims=True)
        away = np.where(length > 0.0, away / np.maximum(length, 1e-12), 0.0)
        return np.where(resting[:, None], away, velocity).astype(np.float32)

    def state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        return ({"num_needs": self.num_needs, "sensing_range": self.sensing_range,
                 "max_speed": self.max_speed},
                {"direction": self.direction, "source_need": self.source_need,
                 "source_columns": self.source_columns, "source_radius": self.source_radius})

    @classmethod
    def restore(cls, settings, meta, arrays) -> PlaneRule:
        return cls(settings, meta["num_needs"], arrays["direction"], arrays["source_need"],
                   arrays["source_columns"], arrays["source_radius"], meta["sensing_range"],
                   meta["max_speed"])


RULES = {rule.kind: rule for rule in (OutcomeRule, ShelterRule, WorkRule, GridRule,
                                      WindowRule, PlaneRule)}


def rule_for(core: Any, action_space: spaces.Space, settings: ControllerHyperparameters,
             seed: int):
    """The control rule that fits the task behind ``core``; ConfigError if none does."""
    world = core.world
    model = getattr(world, "model", None)
    if callable(model) and isinstance(action_space, spaces.Discrete):
        table = model()
        if {"probabilities", "effects"} <= set(table):
            if np.shape(table["probabilities"])[0] != action_space.n:
                raise ConfigError("world.model().probabilities",
                                  np.shape(table["probabilities"]),
                                  f"one row per action ({action_space.n} rows)")
            if "shelter" in table:
                return ShelterRule.from_core(core, settings)
            return OutcomeRule.from_core(core)
        if {"intake", "task_reward"} <= set(table):
            return WorkRule.from_core(core)
    from needbench.envs.tasks.arena import ArenaWorld
    from needbench.envs.tasks.forage import ForageWorld

    if isinstance(world, ForageWorld):
        if world.view == "full":
            return GridRule.from_core(core, settings)
        return WindowRule.from_core(core, settings, seed)
    if isinstance(world, ArenaWorld):
        return PlaneRule.from_core(core, settings)
    raise NotApplicableError("env", type(world).__name__, SUPPORTED)


# --- the agent -----------------------------------------------------------------------------


class SetpointController(Agent):
    """Reactive homeostat: reduce the largest band-normalised deviation (module docstring).

    ``learn`` takes no env steps: it checks the task and reads its fixed
    model (``total_steps`` and ``logger`` are unused; ``seed`` seeds the
    wandering of the local-view rule). ``act`` needs only observations.
    """

    name = "setpoint-controller"
    learns_from_experience = False
    Hyperparameters = ControllerHyperparameters

    def __init__(self, observation_space: spaces.Space, action_space: spaces.Space,
                 **hyperparameters: Any):
        super().__init__(observation_space, action_space, **hyperparameters)
        self.rule: OutcomeRule | WorkRule | GridRule | WindowRule | PlaneRule | None = None

    def learn(self, env: gym.Env | VectorEnv, total_steps: int = 0, seed: int = 0,
              logger: Logger | None = None) -> SetpointController:
        check_total_steps(total_steps)
        seed = check_seed("seed", seed)
        core = task_core(env)
        if core is None:
            raise NotApplicableError("env", type(env.unwrapped).__name__,
                                     "a needbench task (env.unwrapped.core): " + SUPPORTED)
        if not core.config.interoception:
            raise NotApplicableError("interoception", False, "True: the set-point controller reads "
                              "the internal state from the observation")
        single = env.single_action_space if isinstance(env, VectorEnv) else env.action_space
        if single != self.action_space:
            raise ConfigError("env.action_space", single,
                              f"the agent's action space {self.action_space}")
        self.rule = rule_for(core, self.action_space, self.hyperparameters, seed)
        return self

    def _act(self, observations: Any, deterministic: bool) -> np.ndarray:
        """Actions (B, ...) for observations (B, D) (or a dict with ``internal`` and
        ``world``).

        ``deterministic`` is ignored: the rule is deterministic, apart from the
        local-view rule's wandering when no source is in sight.
        """
        if self.rule is None:
            raise RuntimeError("call learn(env) (or load a saved controller) before act()")
        if isinstance(observations, Mapping):
            observations = np.concatenate([np.asarray(observations["internal"]),
                                           np.asarray(observations["world"])], axis=1)
        observations = np.asarray(observations, dtype=np.float64)
        deviation = observations[:, :self.rule.num_needs]
        actions = self.rule.act(observations, deviation)
        if isinstance(self.action_space, spaces.Discrete):
            return actions.astype(np.int64) + int(self.action_space.start)
        return actions

    def _get_state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        if self.rule is None:
            return {"learned": False}, {}
        meta, arrays = self.rule.state()
        return {"learned": True, "rule": self.rule.kind, **meta}, arrays

    def _set_state(self, meta: Mapping[str, Any], arrays: Mapping[str, np.ndarray]) -> None:
        if not meta.get("learned"):
            return
        kind = meta.get("rule")
        if kind not in RULES:
            raise ConfigError("state.rule", kind, "one of " + ", ".join(RULES))
        self.rule = RULES[kind].restore(self.hyperparameters, meta, arrays)
