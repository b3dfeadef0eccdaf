"""Forage: a walled oasis garden with fig bushes, springs, palm shade and a day-night cycle.

The garden is a grid drawn afresh for every episode from the episode's random
stream (so it is reproducible from the seed): a mud-brick wall runs round the
edge, stone pillars stand at some of the sites of a fixed lattice inside, and
fig bushes (food), springs (water) and palms (shade) sit on the free cells. Fig
bushes deplete when eaten and regrow at a constant rate; springs never run dry.
A sinusoidal day drives the air temperature: warm day, cold night. Open cells
(sand, bushes, springs) take the full air temperature and, by day, the sun,
which warms the body and dries it out; palm shade is neutral at every hour.

Cell types are small integers (:data:`SAND` ... :data:`FOOD`); the world state
of B copies is a dict of arrays with a leading batch axis:

* ``terrain``: (B, H, W) int8 cell types.
* ``stock``: (B, H, W) food on each fig bush, in band units of energy (0 off bushes).
* ``position``: (B, 2) int64 row and column of the agent.
* ``clock``: (B,) int64 steps since the episode began (the episode starts at dawn).
* ``sources``: (B, 1 + 2 H W) int64, the count then the row and column of each
  food, water and shade cell (row-major), listed at reset for the nearest-source search and the
  regrowth of bushes (terrain is fixed within an episode; after writing
  ``terrain`` from outside, ``core.observe()`` lists the cells afresh).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from gymnasium import spaces

from needbench.envs import rendering
from needbench.envs.compiled import inline_kernel, kernel
from needbench.envs.engine import (
    ACTIVITY,
    AMBIENT,
    COUNTERS,
    FORCING,
    INTAKE,
    KEYS,
    OBSERVATION,
    OPTIONS,
    TASK,
    WORLD_OFFSET,
    observe_internal,
    reset_body,
    settle_all,
)
from needbench.envs.errors import (
    ConfigError,
    check_choice,
    check_finite,
    check_non_negative,
    check_positive,
    check_range,
)
from needbench.envs.physiology import Physiology
from needbench.envs.streams import draw_uniform
from needbench.envs.task import NeedEnv, NeedVectorEnv, SourceGuide, World

#: Cell types. Open cells (everything but shade and wall) take the sun.
SAND, SHADE, WALL, WATER, FOOD = 0, 1, 2, 3, 4
CELL_NAMES = ("sand", "shade", "wall", "water", "food")
#: The action index and its (row, column) step: stay, north, east, south, west.
ACTION_NAMES = ("stay", "north", "east", "south", "west")
MOVES = np.array([[0, 0], [-1, 0], [0, 1], [1, 0], [0, -1]], dtype=np.int64)
#: The cell type that serves each need. Shade serves temperature both ways: its
#: air is neutral, so it cools a hot body by day and warms a cold one at night.
SOURCE_CELLS = {"energy": FOOD, "water": WATER, "temperature": SHADE}
#: Characters of the text frame, by cell type (food: see ``ForageWorld.text``).
CELL_CHARACTERS = (".", ":", "#", "~", "F")
#: Side of one cell in the picture, pixels.
CELL_PIXELS = 8

_NONE = 1 << 62  # the search key of "no source found yet", above every real key


def check_whole(path: str, value: Any, low: int, high: int) -> int:
    """A whole number in [low, high] (bools are refused)."""
    if (isinstance(value, bool) or not isinstance(value, (int, np.integer))
            or not low <= value <= high):
        raise ConfigError(path, value, f"a whole number in [{low}, {high}]")
    return int(value)


def grid_shape(size: Any) -> tuple[int, int]:
    """(rows, columns) from ``size``: one whole number (square) or a pair."""
    if isinstance(size, (int, np.integer)) and not isinstance(size, bool):
        size = (size, size)
    if not isinstance(size, (tuple, list)) or len(size) != 2:
        raise ConfigError("size", size, "a whole number in [5, 99] or a pair (rows, columns)")
    return (check_whole("size", size[0], 5, 99), check_whole("size", size[1], 5, 99))


# --- the compiled kernels ---------------------------------------------------------------
# The constants tuple (ForageWorld.constants) is seven arrays, few so that a call
# unboxes little (nested tuples of twenty cost about 3 us a call on a single env):
#   sites (2, S) int64: rows and columns of the pillar sites;
#   counts int64: food_patches, water_cells, palms, full view (1) or local (0), view_radius;
#   numbers float64: pillar_chance, food_capacity, bite, regrowth;
#   by_hour (4, day_length): open air, daylight, sine and cosine of the day;
#   by_cell (2, 5): exposure to air and sun, water drunk, by cell type;
#   by_action (5,): activity of each action;
#   by_need (5, K): food to intake, water to intake, neutral ambient, air to ambient,
#     sun to forcing, into each need's units.
# The kernels unpack them once per call and pass plain arrays and numbers per copy.
FOOD_PATCHES, WATER_CELLS, PALMS, FULL_VIEW, VIEW_RADIUS = range(5)
PILLAR_CHANCE, FOOD_CAPACITY, BITE, REGROWTH = range(4)
OPEN_AIR, DAYLIGHT, DAY_SINE, DAY_COSINE = range(4)
EXPOSURE, WATER_DRUNK = range(2)
FOOD_TO_INTAKE, WATER_TO_INTAKE, NEUTRAL_AMBIENT, AIR_TO_AMBIENT, SUN_TO_FORCING = range(5)
#: Kinds of source in the order of the nearest-source search (and of the full view).
FOOD_KIND, WATER_KIND, SHADE_KIND = 0, 1, 2
SOURCE_KIND = {"energy": FOOD_KIND, "water": WATER_KIND, "temperature": SHADE_KIND}


@inline_kernel
def holds_a_bite(stock, bite):
    """Whether a bush holding ``stock`` offers one full bite (a 1e-12 tolerance)."""
    return stock >= bite - 1e-12


@inline_kernel
def nearest_listed_sources(b, terrain, stock, position, bite, sources, found):
    """Copy ``b``'s nearest food, water and shade among its listed source cells
    (:func:`list_sources`), by Manhattan distance from the agent, ties to the
    first cell in row-major order (the least key distance * cells + flat index).
    Food counts only bushes holding a full bite, unless none does (then every bush).

    Writes ``found`` (3, 2): the (row, column) of the nearest food, water and
    shade, (-1, -1) for none. No integer division: on the hot path it costs
    more than the rest of the search.
    """
    columns = terrain.shape[2]
    cells = terrain.shape[1] * columns
    row, column = position[b, 0], position[b, 1]
    best_ready = best_food = best_water = best_shade = _NONE
    for kind in range(3):
        found[kind, 0] = found[kind, 1] = -1
    ready_r = ready_c = -1
    for j in range(sources[b, 0]):
        r, c = sources[b, 1 + 2 * j], sources[b, 2 + 2 * j]
        cell = terrain[b, r, c]
        key = (abs(r - row) + abs(c - column)) * cells + r * columns + c
        if cell == FOOD:
            if key < best_food:
                best_food, found[FOOD_KIND, 0], found[FOOD_KIND, 1] = key, r, c
            if holds_a_bite(stock[b, r, c], bite) and key < best_ready:
                best_ready, ready_r, ready_c = key, r, c
        elif cell == WATER:
            if key < best_water:
                best_water, found[WATER_KIND, 0], found[WATER_KIND, 1] = key, r, c
        elif cell == SHADE:
            if key < best_shade:
                best_shade, found[SHADE_KIND, 0], found[SHADE_KIND, 1] = key, r, c
    if best_ready < _NONE:
        found[FOOD_KIND, 0], found[FOOD_KIND, 1] = ready_r, ready_c


@inline_kernel
def list_sources(b, terrain, sources):
    """List copy ``b``'s food, water and shade cells, row-major, in ``sources[b]``:
    the count, then each cell's row and column."""
    count = 0
    for r in range(terrain.shape[1]):
        for c in range(terrain.shape[2]):
            cell = terrain[b, r, c]
            if cell == FOOD or cell == WATER or cell == SHADE:
                sources[b, 1 + 2 * count], sources[b, 2 + 2 * count] = r, c
                count += 1
    sources[b, 0] = count


@kernel
def _nearest_offsets(terrain, stock, position, bite, kind, sources, found, out):
    """``out`` (B, 2): each copy's offset to its nearest source of ``kind``, (0, 0)
    where there is none; the cells are listed afresh from ``terrain`` first."""
    for b in range(position.shape[0]):
        list_sources(b, terrain, sources)
        nearest_listed_sources(b, terrain, stock, position, bite, sources, found)
        r, c = found[kind, 0], found[kind, 1]
        out[b, 0], out[b, 1] = (r - position[b, 0], c - position[b, 1]) if r >= 0 else (0, 0)


@kernel
def _source_masks(terrain, stock, cell_type, bite, out):
    """``out`` (B, H, W): the cells of ``cell_type`` that serve now (food: ready bushes,
    or every bush in a copy where none is ready)."""
    rows, columns = terrain.shape[1], terrain.shape[2]
    for b in range(terrain.shape[0]):
        any_ready = False
        if cell_type == FOOD:
            for r in range(rows):
                for c in range(columns):
                    if terrain[b, r, c] == FOOD and holds_a_bite(stock[b, r, c], bite):
                        any_ready = True
        for r in range(rows):
            for c in range(columns):
                out[b, r, c] = terrain[b, r, c] == cell_type and (
                    not any_ready or holds_a_bite(stock[b, r, c], bite))


@kernel
def _by_hour(clock, table, out):
    """``out[i] = table[clock[i] mod day_length]``: the kernels' lookup of the hour."""
    for i in range(clock.shape[0]):
        out[i] = table[clock[i] % table.shape[0]]


@inline_kernel
def lay_out_garden(b, sites, counts, pillar_chance, capacity, terrain, stock, position, clock,
                   best_keys, order, keys, counters):
    """A fresh garden for copy ``b`` from its stream: the outer wall, pillars (one
    uniform per lattice site), a random order of the free cells (one uniform per
    cell, row-major; walls sorted last) whose first places take food, water, palms
    and the start cell; palm shade on the palm and its four neighbours; full bushes.

    The order is numpy's ``argsort`` of the keys with the walls' keys set to 2, as
    the layout was first defined; keys are distinct almost surely, so the order
    of the free cells is unique. ``best_keys`` and ``order`` are work arrays of
    the first ``food_patches + water_cells + palms + 1`` places.
    """
    site_rows, site_columns = sites[0], sites[1]
    n_food, n_water, n_palms = counts[FOOD_PATCHES], counts[WATER_CELLS], counts[PALMS]
    rows, columns = terrain.shape[1], terrain.shape[2]
    for r in range(rows):
        for c in range(columns):
            edge = r == 0 or r == rows - 1 or c == 0 or c == columns - 1
            terrain[b, r, c] = WALL if edge else SAND
    for j in range(site_rows.shape[0]):
        pillar = draw_uniform(keys, counters, b) < pillar_chance
        terrain[b, site_rows[j], site_columns[j]] = WALL if pillar else SAND
    # The cells with the smallest keys, in order: an insertion into the first
    # ``places`` slots as the keys are drawn (walls take key 2 and never enter).
    places = n_food + n_water + n_palms + 1
    for j in range(places):
        best_keys[j] = 1.0  # above every uniform draw
    for r in range(rows):
        for c in range(columns):
            u = draw_uniform(keys, counters, b)
            if terrain[b, r, c] == WALL or not u < best_keys[places - 1]:
                continue
            j = places - 1
            while j > 0 and best_keys[j - 1] > u:
                best_keys[j], order[j] = best_keys[j - 1], order[j - 1]
                j -= 1
            best_keys[j], order[j] = u, r * columns + c
    for j in range(n_food + n_water):
        terrain[b, order[j] // columns, order[j] % columns] = FOOD if j < n_food else WATER
    for j in range(n_food + n_water, n_food + n_water + n_palms):
        r, c = order[j] // columns, order[j] % columns  # palms stand inside the wall
        for rr, cc in ((r, c), (r - 1, c), (r + 1, c), (r, c - 1), (r, c + 1)):
            if terrain[b, rr, cc] == SAND:
                terrain[b, rr, cc] = SHADE
    start = order[n_food + n_water + n_palms]
    position[b, 0], position[b, 1] = start // columns, start % columns
    for r in range(rows):
        for c in range(columns):
            stock[b, r, c] = capacity if terrain[b, r, c] == FOOD else 0.0
    clock[b] = 0


@inline_kernel
def observe_garden(b, terrain, stock, position, clock, sources, found, capacity, bite,
                   day_sine, day_cosine, full_view, radius, observation, at):
    """Copy ``b``'s world features from column ``at`` of ``observation``: position,
    time of day and the view (the deviations before them: ``observe_internal``).

    Every feature lies inside its bounds by construction (the agent never leaves
    the interior, stocks never pass the capacity), so nothing is clipped.
    """
    rows, columns = terrain.shape[1], terrain.shape[2]
    row, column = position[b, 0], position[b, 1]
    hour = clock[b] % day_sine.shape[0]
    observation[b, at] = np.float32(row / (rows - 1))
    observation[b, at + 1] = np.float32(column / (columns - 1))
    observation[b, at + 2] = np.float32(day_sine[hour])
    observation[b, at + 3] = np.float32(day_cosine[hour])
    if full_view:
        # Food offset and stock, water offset, shade offset; (0, 0) where none is.
        nearest_listed_sources(b, terrain, stock, position, bite, sources, found)
        slot = at + 4
        for kind in range(3):
            r, c = found[kind, 0], found[kind, 1]
            row_offset, column_offset = (r - row, c - column) if r >= 0 else (0, 0)
            observation[b, slot] = np.float32(row_offset / (rows - 1))
            observation[b, slot + 1] = np.float32(column_offset / (columns - 1))
            slot += 2
            if kind == FOOD_KIND:
                held = stock[b, r, c] if r >= 0 else 0.0
                observation[b, slot] = np.float32(held / capacity)
                slot += 1
    else:
        # Clipping maps cells beyond the grid onto the outer wall, which is what the
        # window should show there. Channels: wall, water, shade, food stock.
        side = 2 * radius + 1
        cells = side * side
        for i in range(side):
            r = min(max(row - radius + i, 0), rows - 1)
            for j in range(side):
                c = min(max(column - radius + j, 0), columns - 1)
                cell = terrain[b, r, c]
                slot = at + 4 + i * side + j
                observation[b, slot] = np.float32(cell == WALL)
                observation[b, slot + cells] = np.float32(cell == WATER)
                observation[b, slot + 2 * cells] = np.float32(cell == SHADE)
                observation[b, slot + 3 * cells] = np.float32(stock[b, r, c] / capacity)


@kernel
def observe_copies(mask, constants, state, engine):
    """Write the observation of every copy where ``mask`` is true (None: all)."""
    counts, numbers, by_hour = constants[1], constants[2], constants[3]
    capacity, bite = numbers[FOOD_CAPACITY], numbers[BITE]
    day_sine, day_cosine = by_hour[DAY_SINE], by_hour[DAY_COSINE]
    full_view, radius = counts[FULL_VIEW] != 0, counts[VIEW_RADIUS]
    terrain, stock, position, clock, sources = state
    found = constants[9]
    observation = engine[OBSERVATION]
    at = int(engine[OPTIONS][WORLD_OFFSET])
    for b in range(position.shape[0]):
        if mask is None or mask[b]:
            observe_internal(engine, b)
            observe_garden(b, terrain, stock, position, clock, sources, found, capacity, bite,
                           day_sine, day_cosine, full_view, radius, observation, at)


@kernel
def _reset(mask, constants, state, engine):
    sites, counts, numbers = constants[0], constants[1], constants[2]
    best_keys, order = constants[7], constants[8]
    terrain, stock, position, clock, sources = state
    keys, counters = engine[KEYS], engine[COUNTERS]
    for b in range(mask.shape[0]):
        if mask[b]:
            reset_body(engine, b)
            lay_out_garden(b, sites, counts, numbers[PILLAR_CHANCE], numbers[FOOD_CAPACITY],
                           terrain, stock, position, clock, best_keys, order, keys, counters)
            list_sources(b, terrain, sources)
    observe_copies(mask, constants, state, engine)


@kernel
def _step(actions, constants, state, events, engine):
    """Every copy's world step (move, regrow, eat and drink, the air and sun of the
    hour), then the bodies, then the observations."""
    _, _, numbers, by_hour, by_cell, activity_per_action, by_need, _, _, _ = constants
    capacity, bite, regrowth = numbers[FOOD_CAPACITY], numbers[BITE], numbers[REGROWTH]
    open_air, daylight = by_hour[OPEN_AIR], by_hour[DAYLIGHT]
    exposure, water_per_cell = by_cell[EXPOSURE], by_cell[WATER_DRUNK]
    food_to_intake, water_to_intake = by_need[FOOD_TO_INTAKE], by_need[WATER_TO_INTAKE]
    neutral_ambient, air_to_ambient = by_need[NEUTRAL_AMBIENT], by_need[AIR_TO_AMBIENT]
    sun_to_forcing = by_need[SUN_TO_FORCING]
    terrain, stock, position, clock, sources = state
    eaten_event, drunk_event, bumped_event, sun_event, air_event, time_event, where = events
    intake, ambient, forcing = engine[INTAKE], engine[AMBIENT], engine[FORCING]
    activity, task = engine[ACTIVITY], engine[TASK]
    day_length = open_air.shape[0]
    for b in range(actions.shape[0]):
        action = actions[b]
        target_row = position[b, 0] + MOVES[action, 0]
        target_column = position[b, 1] + MOVES[action, 1]
        bumped = terrain[b, target_row, target_column] == WALL
        if not bumped:
            position[b, 0], position[b, 1] = target_row, target_column
        row, column = position[b, 0], position[b, 1]
        cell = terrain[b, row, column]
        # Regrow, then eat: off-bush stock is 0, so "eaten" is 0 there without a test.
        # Only bushes hold stock: the listed source cells cover them all.
        for j in range(sources[b, 0]):
            r, c = sources[b, 1 + 2 * j], sources[b, 2 + 2 * j]
            if terrain[b, r, c] == FOOD:
                stock[b, r, c] = min(stock[b, r, c] + regrowth, capacity)
        eaten = min(stock[b, row, column], bite)
        stock[b, row, column] -= eaten
        drunk = water_per_cell[cell]
        # The body feels the air and sun of the hour at which the step begins.
        hour = clock[b] % day_length
        air = open_air[hour] * exposure[cell]
        sunlight = daylight[hour] * exposure[cell]
        for k in range(intake.shape[1]):
            intake[b, k] = eaten * food_to_intake[k] + drunk * water_to_intake[k]
            ambient[b, k] = neutral_ambient[k] + air * air_to_ambient[k]
            forcing[b, k] = sunlight * sun_to_forcing[k]
        activity[b] = activity_per_action[action]
        task[b] = 0.0
        eaten_event[b], drunk_event[b], bumped_event[b] = eaten, drunk, bumped
        sun_event[b], air_event[b], time_event[b] = sunlight, air, hour / day_length
        where[b, 0], where[b, 1] = row, column
        clock[b] += 1
    settle_all(engine)
    observe_copies(None, constants, state, engine)


@kernel
def _observe(constants, state, engine):
    # Called from Python (TaskCore.observe): terrain written from outside since the
    # last reset is listed afresh before the search.
    terrain, sources = state[0], state[4]
    for b in range(terrain.shape[0]):
        list_sources(b, terrain, sources)
    observe_copies(None, constants, state, engine)


class ForageWorld(World):
    """B walled oasis gardens, stepped by compiled kernels copy by copy.

    Actions: 0 stay, 1 north, 2 east, 3 south, 4 west. A move into a wall
    leaves the agent where it is (``bumped`` in info; ``position`` in info is the
    agent's row and column after the move) but still costs the
    effort. Eating and drinking are automatic: every step the agent ends on a
    fig bush it takes one bite (at most ``bite``, at most what the bush holds),
    and every step it ends on a water cell it drinks ``sip``. Staying put on a
    source therefore goes on consuming: the agent must leave when sated.

    Order within a step: move; all bushes regrow by ``regrowth`` (capped at
    ``food_capacity``); the agent eats; the body is advanced with the air and
    sun of the time of day at the start of the step; the clock ticks.

    Sources for reactive controllers: :meth:`source_mask`, :meth:`sources`
    and :meth:`nearest_source` (Manhattan distance, ignoring pillars: pillars
    stand alone, so a detour round one costs at most two steps); the agent's
    cell: :meth:`position`. They call the compiled search the observation uses.

    No finite outcome model is offered (no ``model()``): the world state holds
    continuous food stocks that regrow, so no small finite table describes it.
    """

    parameters = {
        "size": 9,
        "food_patches": 3,
        "water_cells": 2,
        "palms": 2,
        "pillar_chance": 0.35,
        "food_capacity": 2.0,
        "bite": 0.5,
        "regrowth": 0.02,
        "sip": 0.5,
        "day_length": 60,
        "air_day": 1.0,
        "air_night": -3.0,
        "sun_heat": 0.1,
        "sun_water_loss": 0.02,
        "move_activity": 1.0,
        "view": "full",
        "view_radius": 3,
    }
    spatial = True
    uses_ambient = True
    reset_kernel = staticmethod(_reset)
    step_kernel = staticmethod(_step)
    observe_kernel = staticmethod(_observe)

    def __init__(self, physiology: Physiology, size: Any = 9, food_patches: int = 3,
                 water_cells: int = 2, palms: int = 2, pillar_chance: float = 0.35,
                 food_capacity: float = 2.0, bite: float = 0.5, regrowth: float = 0.02,
                 sip: float = 0.5, day_length: int = 60, air_day: float = 1.0,
                 air_night: float = -3.0, sun_heat: float = 0.1, sun_water_loss: float = 0.02,
                 move_activity: float = 1.0, view: str = "full", view_radius: int = 3):
        super().__init__(physiology)
        self.rows, self.columns = grid_shape(size)
        self.food_patches = check_whole("food_patches", food_patches, 1, 10_000)
        self.water_cells = check_whole("water_cells", water_cells, 1, 10_000)
        self.palms = check_whole("palms", palms, 0, 10_000)
        self.pillar_chance = check_range("pillar_chance", pillar_chance, 0.0, 1.0)
        self.food_capacity = check_positive("food_capacity", food_capacity)
        self.bite = check_positive("bite", bite)
        self.regrowth = check_non_negative("regrowth", regrowth)
        self.sip = check_positive("sip", sip)
        self.day_length = check_whole("day_length", day_length, 2, 1_000_000)
        self.air_day = check_finite("air_day", air_day)
        self.air_night = check_finite("air_night", air_night)
        self.sun_heat = check_non_negative("sun_heat", sun_heat)
        self.sun_water_loss = check_non_negative("sun_water_loss", sun_water_loss)
        self.move_activity = check_non_negative("move_activity", move_activity)
        self.view = check_choice("view", view, ("full", "local"))
        self.view_radius = check_whole("view_radius", view_radius, 1, 10)

        rows, columns = self.rows, self.columns
        # Pillar sites: every second interior cell from the third row and column on,
        # so no two pillars touch and none touches the outer wall: the free cells
        # always form one connected garden.
        site_r, site_c = np.meshgrid(np.arange(2, rows - 2, 2), np.arange(2, columns - 2, 2),
                                     indexing="ij")
        self.site_rows, self.site_columns = site_r.ravel(), site_c.ravel()
        always_free = (rows - 2) * (columns - 2) - self.site_rows.size
        wanted = self.food_patches + self.water_cells + self.palms + 1
        if wanted > always_free:
            raise ConfigError("size", size, f"a grid whose {always_free} surely free cells hold "
                              f"food_patches + water_cells + palms + 1 start cell = {wanted}")

        # Per-need conversion vectors (K,): world quantities are in band units of
        # the need they touch; the body wants need units per unit time.
        band, dt = physiology.band, physiology.dt
        index = physiology.index
        self.food_to_intake = np.zeros(physiology.num_needs)
        self.water_to_intake = np.zeros(physiology.num_needs)
        self.air_to_ambient = np.zeros(physiology.num_needs)
        self.sun_to_forcing = np.zeros(physiology.num_needs)
        if "energy" in index:
            self.food_to_intake[index["energy"]] = band[index["energy"]]
        if "water" in index:
            self.water_to_intake[index["water"]] = band[index["water"]]
            self.sun_to_forcing[index["water"]] = -self.sun_water_loss * band[index["water"]] / dt
        if "temperature" in index:
            self.air_to_ambient[index["temperature"]] = band[index["temperature"]]
            self.sun_to_forcing[index["temperature"]] = (
                self.sun_heat * band[index["temperature"]] / dt)
        self.neutral_ambient = physiology.ambient.copy()
        self.air_mean = 0.5 * (self.air_day + self.air_night)
        self.air_swing = 0.5 * (self.air_day - self.air_night)
        # Tables by hour (clock mod day_length) and by cell type keep the hot path to a
        # few lookups instead of trigonometry and comparisons every step.
        self.day_angle = (2.0 * math.pi / self.day_length) * np.arange(self.day_length)
        self.day_sine, self.day_cosine = np.sin(self.day_angle), np.cos(self.day_angle)
        self.open_air = self.air_mean + self.air_swing * self.day_sine
        self.daylight = np.maximum(self.day_sine, 0.0)
        self.exposure = np.array([1.0, 0.0, 1.0, 1.0, 1.0])  # by cell type: shade has none
        self.water_per_cell = np.where(np.arange(len(CELL_NAMES)) == WATER, self.sip, 0.0)
        self.activity_per_action = np.where(np.arange(len(ACTION_NAMES)) == 0, 0.0,
                                            self.move_activity)

        self.action_space = spaces.Discrete(len(ACTION_NAMES))
        head = ("row", "column", "time_sin", "time_cos")
        head_low = [0.0, 0.0, -1.0, -1.0]
        if self.view == "full":
            names = list(head)
            low = list(head_low)
            for kind in ("food", "water", "shade"):
                names += [f"{kind}/row_offset", f"{kind}/column_offset"]
                low += [-1.0, -1.0]
                if kind == "food":
                    names.append("food/stock")
                    low.append(0.0)
        else:
            window = [f"{dr:+d},{dc:+d}" for dr, dc in self.window_cells()]
            names = list(head) + [f"window/{channel}/{cell}" for channel in
                                  ("wall", "water", "shade", "food") for cell in window]
            low = head_low + [0.0] * (4 * len(window))
        self.feature_names = tuple(names)
        self.feature_low = np.array(low)
        self.feature_high = np.ones(len(names))

    # --- the kernels' inputs -----------------------------------------------------

    def constants(self) -> tuple:
        sites = np.stack([self.site_rows, self.site_columns]).astype(np.int64)
        counts = np.array([self.food_patches, self.water_cells, self.palms,
                           self.view == "full", self.view_radius], dtype=np.int64)
        numbers = np.array([self.pillar_chance, self.food_capacity, self.bite, self.regrowth])
        by_hour = np.stack([self.open_air, self.daylight, self.day_sine, self.day_cosine])
        by_cell = np.stack([self.exposure, self.water_per_cell])
        by_need = np.stack([self.food_to_intake, self.water_to_intake, self.neutral_ambient,
                            self.air_to_ambient, self.sun_to_forcing])
        # Work arrays of the garden's layout: the first places of the free cells.
        places = self.food_patches + self.water_cells + self.palms + 1
        # ... and of the nearest-source search: (row, column) of each kind found.
        return (sites, counts, numbers, by_hour, by_cell, self.activity_per_action, by_need,
                np.empty(places), np.empty(places, dtype=np.int64),
                np.empty((3, 2), dtype=np.int64))

    def allocate(self, batch: int) -> dict[str, np.ndarray]:
        shape = (batch, self.rows, self.columns)
        return {"terrain": np.full(shape, WALL, dtype=np.int8), "stock": np.zeros(shape),
                "position": np.ones((batch, 2), dtype=np.int64),
                "clock": np.zeros(batch, dtype=np.int64),
                # Count, then flat indices of the food, water and shade cells (row-major),
                # listed at reset: the nearest-source search skips sand and walls.
                "sources": np.zeros((batch, 1 + 2 * self.rows * self.columns), dtype=np.int64)}

    def allocate_events(self, batch: int) -> dict[str, np.ndarray]:
        return {"eaten": np.zeros(batch), "drunk": np.zeros(batch),
                "bumped": np.zeros(batch, dtype=np.bool_), "sunlight": np.zeros(batch),
                "air_temperature": np.zeros(batch), "time_of_day": np.zeros(batch),
                "position": np.zeros((batch, 2), dtype=np.int64)}

    # --- time of day ----------------------------------------------------------

    def _by_hour(self, clock, table: np.ndarray):
        clock = np.asarray(clock, dtype=np.int64)
        out = np.empty(clock.size)
        _by_hour(clock.reshape(-1), table, out)
        return out.reshape(clock.shape)[()]

    def phase(self, clock: np.ndarray) -> np.ndarray:
        """Angle of the day, radians: 0 at dawn, pi/2 at noon, 3 pi/2 at midnight."""
        return self._by_hour(clock, self.day_angle)

    def air_temperature(self, clock: np.ndarray) -> np.ndarray:
        """Open-air temperature, band units of temperature above the neutral ambient:
        ``air_mean + air_swing * sin(phase)``, peaking at ``air_day`` at noon and
        falling to ``air_night`` at midnight (the table the step reads)."""
        return self._by_hour(clock, self.open_air)

    # --- the agent and the sources ------------------------------------------------

    def position(self, state: dict[str, np.ndarray]) -> np.ndarray:
        """(B, 2) int64 row and column of each copy's agent (a copy of the state)."""
        return state["position"].copy()

    def source_guides(self) -> dict[str, SourceGuide]:
        """Food raises energy, water raises water, shade restores temperature. Full
        view: each need's features are the (row, column) offsets to its nearest
        source; local view: that source's channel over the window, cell by cell in
        the order of :meth:`window_cells`."""
        guides = {}
        for need, cell in SOURCE_CELLS.items():
            if need not in self.physiology.index:
                continue
            name = CELL_NAMES[cell]
            if self.view == "full":
                features = ((f"{name}/row_offset", f"{name}/column_offset"),)
            else:
                features = (tuple(f"window/{name}/{dr:+d},{dc:+d}"
                                  for dr, dc in self.window_cells()),)
            guides[need] = SourceGuide(need, name, "restores" if cell == SHADE else "raises",
                                       features, (0.0,))
        return guides

    def moves(self) -> np.ndarray:
        """(A, 2) int64 (row, column) step of each action (action 0 stays)."""
        return MOVES.copy()

    def possible_walls(self) -> np.ndarray:
        """(H, W) bool: cells that are, or may be, walls in some garden (the outer
        wall and the pillar sites, when pillars can stand)."""
        barred = np.zeros((self.rows, self.columns), dtype=bool)
        barred[[0, -1], :] = True
        barred[:, [0, -1]] = True
        if self.pillar_chance > 0.0:
            barred[self.site_rows, self.site_columns] = True
        return barred

    def window_cells(self) -> list[tuple[int, int]]:
        """(row, column) offsets of the local view's cells, row by row."""
        span = range(-self.view_radius, self.view_radius + 1)
        return [(dr, dc) for dr in span for dc in span]

    def _check_source(self, need: str) -> None:
        if need not in SOURCE_CELLS or need not in self.physiology.index:
            served = [n for n in SOURCE_CELLS if n in self.physiology.index]
            raise ConfigError("need", need, "a need with sources here: " + ", ".join(served))

    def source_mask(self, state: dict[str, np.ndarray], need: str) -> np.ndarray:
        """(B, H, W) bool: the cells that serve ``need`` now.

        ``energy``: fig bushes holding at least one full bite (all bushes, in a
        copy where none does: the agent should wait by one); ``water``: water
        cells; ``temperature``: shade.
        """
        self._check_source(need)
        terrain = state["terrain"]
        out = np.empty(terrain.shape, dtype=np.bool_)
        _source_masks(terrain, state["stock"], SOURCE_CELLS[need], self.bite, out)
        return out

    def sources(self, state: dict[str, np.ndarray]) -> dict[str, list[np.ndarray]]:
        """Positions of the sources of each need of the body, per copy.

        Returns ``{need: [copy 0's (n_0, 2) int array of (row, column), ...]}``
        for the needs among energy, water and temperature that the body has;
        see :meth:`source_mask` for which cells count. Not for the hot path:
        it loops over copies; use :meth:`nearest_source` there.
        """
        out = {}
        for need in SOURCE_CELLS:
            if need in self.physiology.index:
                mask = self.source_mask(state, need)
                out[need] = [np.argwhere(copy) for copy in mask]
        return out

    def nearest_source(self, state: dict[str, np.ndarray], need: str) -> np.ndarray:
        """(B, 2) int64 offset (rows, columns) from the agent to its nearest source
        of ``need`` by Manhattan distance (ties: the first in row-major order);
        (0, 0) on a source, and also in a copy that has none (e.g. ``palms=0``).
        The observation's full view reads the same compiled search."""
        self._check_source(need)
        position = state["position"]
        out = np.empty(position.shape, dtype=np.int64)
        # Work arrays: terrain written from outside is listed afresh, state untouched.
        sources = np.empty((position.shape[0], 1 + 2 * self.rows * self.columns), np.int64)
        _nearest_offsets(state["terrain"], state["stock"], position, self.bite,
                         SOURCE_KIND[need], sources, np.empty((3, 2), np.int64), out)
        return out

    # --- rendering ------------------------------------------------------------

    def text(self, state, index):
        """ASCII map: ``#`` wall, ``.`` sand, ``:`` shade, ``~`` water, ``F`` food
        with at least a bite, ``f`` food with less, ``@`` the agent."""
        terrain, stock = state["terrain"][index], state["stock"][index]
        grid = np.array(CELL_CHARACTERS)[terrain]
        grid[(terrain == FOOD) & (stock < self.bite - 1e-12)] = "f"
        row, column = state["position"][index]
        grid[row, column] = "@"
        clock = state["clock"][index]
        fraction = (clock % self.day_length) / self.day_length
        light = "day" if fraction < 0.5 else "night"  # dawn to dusk, then dusk to dawn
        header = (f"time of day {fraction:.2f} ({light}), air "
                  f"{self.air_temperature(clock):+.2f} band")
        return "\n".join([header] + ["".join(line) for line in grid])

    def image(self, state, index):
        """(8 H, 8 W, 3) uint8: walls, sand tinted by the hour, shade, water in the water
        colour, food shaded by stock (dull brown empty to the energy colour full) and the
        agent in the agent colour (``needbench.envs.rendering``)."""
        terrain, stock = state["terrain"][index], state["stock"][index]
        light = 0.5 * (1.0 + np.sin(self.phase(state["clock"][index])))  # 0 midnight, 1 noon
        sand = np.array([45.0, 50.0, 90.0]) + light * np.array([190.0, 160.0, 50.0])
        water = rendering.need_colour("water", 1).astype(np.float64)
        palette = np.array([sand, [40, 100, 50], [110, 90, 70], water, [0, 0, 0]])
        picture = palette[terrain]
        fill = (stock / self.food_capacity)[:, :, None]
        empty = np.array([95.0, 75.0, 55.0])
        food = empty + fill * (rendering.need_colour("energy", 0) - empty)
        picture = np.where((terrain == FOOD)[:, :, None], food, picture)
        picture = np.repeat(np.repeat(picture, CELL_PIXELS, axis=0), CELL_PIXELS, axis=1)
        row, column = state["position"][index] * CELL_PIXELS
        picture[row + 1:row + CELL_PIXELS - 1, column + 1:column + CELL_PIXELS - 1] = \
            rendering.AGENT_OUTLINE
        picture[row + 2:row + CELL_PIXELS - 2, column + 2:column + CELL_PIXELS - 2] = \
            rendering.AGENT_COLOUR
        return picture.astype(np.uint8)


class ForageEnv(NeedEnv):
    """Forage: keep fed, watered and at a comfortable temperature in a small oasis garden.

    ## Description
    An invented walled oasis garden, 9 x 9 cells with its outer wall, drawn
    afresh each episode from the episode's seed: stone pillars (walls) on a
    sparse lattice, 3 fig bushes (food), 2 water cells and 2 palms whose shade
    covers their cell and its four neighbours. The body has energy, water and
    core temperature (abstract preset by default). Energy and water drain;
    moving costs effort (energy and water, and warms the body). A day lasts 60
    steps: the open air is warm by day (``air_day`` = +1 band at noon) and cold
    by night (``air_night`` = -3 bands at midnight) on a sinusoid, and by day
    the sun warms the body and dries it on open cells. Shade is neutral at all
    hours: no sun, air at the neutral ambient. Fig bushes hold 2 bands of
    energy, lose a bite (0.5) every step the agent stands on them and regrow
    0.02 a step; water cells give 0.5 band of water a step and never run dry.
    The agent must plan trips: to food and water, into the shade in the heat
    of the day and the cold of the night, and away again before it overeats.

    ## Action Space
    ``Discrete(5)``: 0 stay, 1 north, 2 east, 3 south, 4 west. Eating and
    drinking are automatic on the cell the agent ends the step on. A move into
    a wall leaves the agent in place but still costs the effort (activity 1).

    ## Observation Space
    ``Box(float32, (K + 11,))``: the K internal deviations (h - h*)/band; the
    agent's row and column divided by (size - 1); sin and cos of the time of
    day (0 at dawn); then, for food, water and shade, the offset (rows,
    columns) to the nearest such cell divided by (size - 1), in [-1, 1], with
    the stock of that food cell as a fraction of its capacity after the food
    offset. Food counts only bushes holding a full bite, unless none does.
    With ``interoception=False`` only the 11 world features.

    ## Rewards
    By default drive reduction r_t = D(h_t) - D(h_{t+1}) with the homeostatic
    drive (n = 3, m = 2) on band-scaled deviations. See ``reward``.

    ## Starting State
    Levels uniform within half a band of the set points; gut empty; the agent
    on a random free sand or shade cell; every bush full; the clock at dawn.

    ## Episode End
    Termination when a need leaves its lethal bounds (+-6 bands); truncation at
    ``max_steps`` (300, five days).

    ## Arguments
    Garden: ``size`` (int or (rows, columns), outer wall included, >= 5),
    ``food_patches``, ``water_cells``, ``palms``, ``pillar_chance``. Food and
    water, band units of energy or water: ``food_capacity``, ``bite``,
    ``regrowth`` (per step), ``sip``. Climate, band units of temperature:
    ``day_length`` (steps), ``air_day``, ``air_night`` (above the neutral
    ambient), ``sun_heat`` (per step at noon), ``sun_water_loss`` (band units
    of water per step at noon). ``move_activity``: activity of one move.
    ``view``: ``"full"`` (this summary) or ``"local"`` (a window, see
    :class:`ForageWideEnv`), ``view_radius``. And the common task arguments
    (``needbench.envs.task``). The world (``env.unwrapped.core.world``) offers
    ``nearest_source(state, need)``, ``sources(state)`` and ``position(state)``
    for controllers.

    ## Vectorized environment
    ``gymnasium.make_vec("needbench/Forage-v0", num_envs=N,
    vectorization_mode="vector_entry_point")`` gives :class:`ForageVectorEnv`.

    ## Version History
    * v0: initial version.
    """

    world_cls = ForageWorld
    defaults = {"max_steps": 300}


class ForageVectorEnv(NeedVectorEnv):
    """Native vector version of :class:`ForageEnv` (same core, B = num_envs)."""

    world_cls = ForageWorld
    defaults = ForageEnv.defaults


class ForageWideEnv(NeedEnv):
    """ForageWide: the oasis garden at 21 x 21, seen through a 7 x 7 window.

    ## Description
    The world of :class:`ForageEnv` on a 21 x 21 grid with 10 fig bushes, 4
    water cells and 8 palms, and a day of 100 steps. The agent sees only the
    cells within 3 of itself: it must explore and remember where things are.

    ## Action Space
    ``Discrete(5)``: 0 stay, 1 north, 2 east, 3 south, 4 west (as in Forage).

    ## Observation Space
    ``Box(float32, (K + 4 + 4 * 49,))``: the K internal deviations; row and
    column divided by (size - 1); sin and cos of the time of day; then four
    7 x 7 channels centred on the agent, flattened row by row: wall (1; cells
    beyond the grid count as wall), water (1), shade (1) and food stock as a
    fraction of capacity.

    ## Rewards
    By default drive reduction with the homeostatic drive, as in Forage.

    ## Starting State
    As in Forage: levels within half a band of the set points, a random free
    cell, full bushes, dawn.

    ## Episode End
    Termination when a need leaves its lethal bounds; truncation at
    ``max_steps`` (600, six days).

    ## Arguments
    Those of :class:`ForageEnv`; this version sets ``size=21``,
    ``food_patches=10``, ``water_cells=4``, ``palms=8``, ``day_length=100``,
    ``view="local"``, ``view_radius=3``.

    ## Vectorized environment
    ``gymnasium.make_vec("needbench/ForageWide-v0", num_envs=N,
    vectorization_mode="vector_entry_point")`` gives :class:`ForageWideVectorEnv`.

    ## Version History
    * v0: initial version.
    """

    world_cls = ForageWorld
    defaults = {"max_steps": 600, "size": 21, "food_patches": 10, "water_cells": 4,
                "palms": 8, "day_length": 100, "view": "local", "view_radius": 3}


class ForageWideVectorEnv(NeedVectorEnv):
    """Native vector version of :class:`ForageWideEnv` (same core, B = num_envs)."""

    world_cls = ForageWorld
    defaults = ForageWideEnv.defaults
