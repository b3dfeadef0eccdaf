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
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from gymnasium import spaces

from needbench.envs.errors import (
    ConfigError,
    check_choice,
    check_finite,
    check_non_negative,
    check_positive,
    check_range,
)
from needbench.envs.physiology import BodyState, Physiology
from needbench.envs.streams import CopyStreams
from needbench.envs.task import Effects, NeedEnv, NeedVectorEnv, World

#: Cell types. Open cells (everything but shade and wall) take the sun.
SAND, SHADE, WALL, WATER, FOOD = 0, 1, 2, 3, 4
CELL_NAMES = ("sand", "shade", "wall", "water", "food")
#: The action index and its (row, column) step: stay, north, east, south, west.
ACTION_NAMES = ("stay", "north", "east", "south", "west")
MOVES = np.array([[0, 0], [-1, 0], [0, 1], [1, 0], [0, -1]], dtype=np.int64)
#: The cell type that serves each need. Shade serves temperature both ways: its
#: air is neutral, so it cools a hot body by day and warms a cold one at night.
SOURCE_CELLS = {"energy": FOOD, "water": WATER, "temperature": SHADE}
#: Cell types of the three sources in the full view's order: food, water, shade.
SOURCE_KINDS = np.array([FOOD, WATER, SHADE], dtype=np.int8)[:, None, None]
#: Columns of the full view's world features holding the row and column offsets.
FULL_ROW_OFFSETS = [4, 7, 9]
FULL_COLUMN_OFFSETS = [5, 8, 10]
#: Local-view channels (wall, water, shade) of each cell type.
WINDOW_CHANNELS = np.array([[0, 0, 0], [0, 0, 1], [1, 0, 0], [0, 1, 0], [0, 0, 0]],
                           dtype=np.float64)
#: Characters of the text frame, by cell type (food: see ``ForageWorld.text``).
CELL_CHARACTERS = (".", ":", "#", "~", "F")
#: Side of one cell in the picture, pixels.
CELL_PIXELS = 8

_FAR = 1 << 30  # distance given to cells that are not sources


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


class ForageWorld(World):
    """B walled oasis gardens, moved together with array operations only.

    Actions: 0 stay, 1 north, 2 east, 3 south, 4 west. A move into a wall
    leaves the agent where it is (``bumped`` in info) but still costs the
    effort. Eating and drinking are automatic: every step the agent ends on a
    fig bush it takes one bite (at most ``bite``, at most what the bush holds),
    and every step it ends on a water cell it drinks ``sip``. Staying put on a
    source therefore goes on consuming: the agent must leave when sated.

    Order within a step: move; all bushes regrow by ``regrowth`` (capped at
    ``food_capacity``); the agent eats; the body is advanced with the air and
    sun of the time of day at the start of the step; the clock ticks.

    Sources for reactive controllers: :meth:`source_mask`, :meth:`sources`
    and :meth:`nearest_source` (Manhattan distance, ignoring pillars: pillars
    stand alone, so a detour round one costs at most two steps).

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
        # Manhattan distance tables: row_distance[r] (H,) = |r - rows|, likewise columns.
        self.row_distance = np.abs(np.arange(rows)[:, None] - np.arange(rows)[None, :])
        self.column_distance = np.abs(np.arange(columns)[:, None] - np.arange(columns)[None, :])
        # cell_distance[c] (H * W,) = Manhattan distance from flat cell c to every cell,
        # one gather per step instead of a broadcast sum.
        self.cell_distance = (self.row_distance[:, None, :, None]
                              + self.column_distance[None, :, None, :]).reshape(
                                  rows * columns, rows * columns).astype(np.int32)

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
        angle = (2.0 * math.pi / self.day_length) * np.arange(self.day_length)
        self.day_sine, self.day_cosine = np.sin(angle), np.cos(angle)
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
            span = range(-self.view_radius, self.view_radius + 1)
            window = [f"{dr:+d},{dc:+d}" for dr in span for dc in span]
            names = list(head) + [f"window/{channel}/{cell}" for channel in
                                  ("wall", "water", "shade", "food") for cell in window]
            low = head_low + [0.0] * (4 * len(window))
            self.window_offsets = np.arange(-self.view_radius, self.view_radius + 1)
        self.feature_names = tuple(names)
        self.feature_low = np.array(low)
        self.feature_high = np.ones(len(names))

    # --- layout ---------------------------------------------------------------

    def initial(self, rng: CopyStreams, batch: int) -> dict[str, np.ndarray]:
        rows, columns = self.rows, self.columns
        terrain = np.full((batch, rows, columns), SAND, dtype=np.int8)
        terrain[:, 0, :] = terrain[:, -1, :] = WALL
        terrain[:, :, 0] = terrain[:, :, -1] = WALL
        pillars = rng.random((batch, self.site_rows.size)) < self.pillar_chance
        terrain[:, self.site_rows, self.site_columns] = np.where(pillars, WALL, SAND)
        # A random order of the free cells (walls sorted last); food, water, palms and
        # the start cell take its first places. Every copy draws H * W numbers.
        flat = terrain.reshape(batch, -1)
        keys = rng.random((batch, rows * columns))
        keys[flat == WALL] = 2.0
        order = np.argsort(keys, axis=1)
        copies = np.arange(batch)[:, None]
        n_food, n_water, n_palms = self.food_patches, self.water_cells, self.palms
        flat[copies, order[:, :n_food]] = FOOD
        flat[copies, order[:, n_food:n_food + n_water]] = WATER
        palm = np.zeros((batch, rows * columns), dtype=bool)
        palm[copies, order[:, n_food + n_water:n_food + n_water + n_palms]] = True
        palm = palm.reshape(batch, rows, columns)
        canopy = palm.copy()  # a palm shades its own cell and its four neighbours
        canopy[:, 1:, :] |= palm[:, :-1, :]
        canopy[:, :-1, :] |= palm[:, 1:, :]
        canopy[:, :, 1:] |= palm[:, :, :-1]
        canopy[:, :, :-1] |= palm[:, :, 1:]
        terrain[canopy & (terrain == SAND)] = SHADE
        start = order[:, n_food + n_water + n_palms]
        position = np.stack([start // columns, start % columns], axis=1).astype(np.int64)
        stock = np.where(terrain == FOOD, self.food_capacity, 0.0)
        return {"terrain": terrain, "stock": stock, "position": position,
                "clock": np.zeros(batch, dtype=np.int64)}

    # --- time of day ----------------------------------------------------------

    def phase(self, clock: np.ndarray) -> np.ndarray:
        """Angle of the day, radians: 0 at dawn, pi/2 at noon, 3 pi/2 at midnight."""
        return (2.0 * math.pi / self.day_length) * (clock % self.day_length)

    def air_temperature(self, clock: np.ndarray) -> np.ndarray:
        """Open-air temperature, band units of temperature above the neutral ambient:
        ``air_mean + air_swing * sin(phase)``, peaking at ``air_day`` at noon and
        falling to ``air_night`` at midnight."""
        return self.air_mean + self.air_swing * np.sin(self.phase(clock))

    # --- dynamics -------------------------------------------------------------

    def step(self, state, actions, body: BodyState, rng: CopyStreams):
        terrain, position, clock = state["terrain"], state["position"], state["clock"]
        copies = np.arange(position.shape[0])
        target = position + MOVES[actions]
        bumped = terrain[copies, target[:, 0], target[:, 1]] == WALL
        position = np.where(bumped[:, None], position, target)
        row, column = position[:, 0], position[:, 1]
        cell = terrain[copies, row, column]
        # Regrow, then eat: off-bush stock is 0, so "eaten" is 0 there without a test.
        stock = np.where(terrain == FOOD,
                         np.minimum(state["stock"] + self.regrowth, self.food_capacity), 0.0)
        eaten = np.minimum(stock[copies, row, column], self.bite)
        stock[copies, row, column] -= eaten
        drunk = self.water_per_cell[cell]
        # The body feels the air and sun of the hour at which the step begins.
        hour = clock % self.day_length
        exposure = self.exposure[cell]
        air = self.open_air[hour] * exposure
        sunlight = self.daylight[hour] * exposure
        effects = Effects(
            intake=eaten[:, None] * self.food_to_intake + drunk[:, None] * self.water_to_intake,
            activity=self.activity_per_action[actions],
            task_reward=np.zeros(position.shape[0]),
            ambient=self.neutral_ambient + air[:, None] * self.air_to_ambient,
            forcing=sunlight[:, None] * self.sun_to_forcing,
            events={"eaten": eaten, "drunk": drunk, "bumped": bumped, "sunlight": sunlight,
                    "air_temperature": air, "time_of_day": hour / self.day_length},
        )
        return {"terrain": terrain, "stock": stock, "position": position,
                "clock": clock + 1}, effects

    # --- sources --------------------------------------------------------------

    def source_mask(self, state: dict[str, np.ndarray], need: str) -> np.ndarray:
        """(B, H, W) bool: the cells that serve ``need`` now.

        ``energy``: fig bushes holding at least one full bite (all bushes, in a
        copy where none does: the agent should wait by one); ``water``: water
        cells; ``temperature``: shade.
        """
        if need not in SOURCE_CELLS or need not in self.physiology.index:
            served = [n for n in SOURCE_CELLS if n in self.physiology.index]
            raise ConfigError("need", need, "a need with sources here: " + ", ".join(served))
        terrain = state["terrain"]
        mask = terrain == SOURCE_CELLS[need]
        if need == "energy":
            ready = mask & (state["stock"] >= self.bite - 1e-12)
            mask = np.where(ready.any(axis=(1, 2))[:, None, None], ready, mask)
        return mask

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
        (0, 0) on a source, and also in a copy that has none (e.g. ``palms=0``)."""
        mask = self.source_mask(state, need)[:, None]
        if need == "temperature" and self.palms == 0:  # shade exists iff there are palms
            return np.zeros_like(state["position"])
        row_offset, column_offset, _ = self._nearest(state["position"], mask)
        return np.stack([row_offset[:, 0], column_offset[:, 0]], axis=1)

    def _nearest(self, position: np.ndarray, masks: np.ndarray):
        """Row offsets, column offsets and flat cell indices, each (B, S), of the
        nearest cell of each of S non-empty masks (B, S, H, W)."""
        batch, kinds = position.shape[0], masks.shape[1]
        distance = self.cell_distance[position[:, 0] * self.columns + position[:, 1]]
        index = np.where(masks.reshape(batch, kinds, -1), distance[:, None, :],
                         np.int32(_FAR)).argmin(axis=2)
        return (index // self.columns - position[:, 0, None],
                index % self.columns - position[:, 1, None], index)

    # --- observation ----------------------------------------------------------

    def observe(self, state):
        # Every feature lies inside [feature_low, feature_high] by construction (the
        # agent never leaves the interior, stocks never pass the capacity), so no clip.
        terrain, stock, position = state["terrain"], state["stock"], state["position"]
        batch = position.shape[0]
        hour = state["clock"] % self.day_length
        features = np.empty((batch, len(self.feature_names)))
        features[:, 0] = position[:, 0] / (self.rows - 1)
        features[:, 1] = position[:, 1] / (self.columns - 1)
        features[:, 2] = self.day_sine[hour]
        features[:, 3] = self.day_cosine[hour]
        if self.view == "full":
            masks = terrain[:, None] == SOURCE_KINDS  # (B, 3, H, W): food, water, shade
            ready = masks[:, 0] & (stock >= self.bite - 1e-12)
            masks[:, 0] = np.where(ready.any(axis=(1, 2))[:, None, None], ready, masks[:, 0])
            row_offset, column_offset, index = self._nearest(position, masks)
            if self.palms == 0:  # no shade anywhere: report no offset
                row_offset[:, 2] = column_offset[:, 2] = 0
            features[:, FULL_ROW_OFFSETS] = row_offset / (self.rows - 1)
            features[:, FULL_COLUMN_OFFSETS] = column_offset / (self.columns - 1)
            features[:, 6] = (stock.reshape(batch, -1)[np.arange(batch), index[:, 0]]
                              / self.food_capacity)
        else:
            # Clipping maps cells beyond the grid onto the outer wall, which is what
            # the window should show there.
            rows = np.clip(position[:, 0, None] + self.window_offsets, 0, self.rows - 1)
            columns = np.clip(position[:, 1, None] + self.window_offsets, 0, self.columns - 1)
            copies = np.arange(batch)[:, None, None]
            rows, columns = rows[:, :, None], columns[:, None, :]
            channels = WINDOW_CHANNELS[terrain[copies, rows, columns]]  # (B, S, S, 3)
            cells = self.window_offsets.size ** 2
            features[:, 4:4 + 3 * cells] = channels.transpose(0, 3, 1, 2).reshape(batch, -1)
            features[:, 4 + 3 * cells:] = (stock[copies, rows, columns].reshape(batch, -1)
                                           / self.food_capacity)
        return features

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
        """(8 H, 8 W, 3) uint8: walls, sand tinted by the hour, shade, water, food
        shaded by stock (brown empty to green full) and the agent in red."""
        terrain, stock = state["terrain"][index], state["stock"][index]
        light = 0.5 * (1.0 + np.sin(self.phase(state["clock"][index])))  # 0 midnight, 1 noon
        sand = np.array([45.0, 50.0, 90.0]) + light * np.array([190.0, 160.0, 50.0])
        palette = np.array([sand, [40, 100, 50], [110, 90, 70], [50, 110, 220], [0, 0, 0]])
        picture = palette[terrain]
        fill = (stock / self.food_capacity)[:, :, None]
        food = np.array([130.0, 90.0, 40.0]) + fill * np.array([-90.0, 110.0, 0.0])
        picture = np.where((terrain == FOOD)[:, :, None], food, picture)
        picture = np.repeat(np.repeat(picture, CELL_PIXELS, axis=0), CELL_PIXELS, axis=1)
        row, column = state["position"][index] * CELL_PIXELS
        picture[row + 2:row + CELL_PIXELS - 2, column + 2:column + CELL_PIXELS - 2] = (220, 40, 40)
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
    ``nearest_source(state, need)`` and ``sources(state)`` for controllers.

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
