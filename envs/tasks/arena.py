"""Arena: move in a continuous 2-D island to reach food, water and warm spots (Box actions)."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from gymnasium import spaces

from needbench.envs import rendering
from needbench.envs.compiled import inline_kernel, kernel
from needbench.envs.engine import (
    ACTIVITY,
    AMBIENT,
    COUNTERS,
    INTAKE,
    KEYS,
    OBSERVATION,
    OPTIONS,
    TASK,
    USES_AMBIENT,
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
    check_range,
)
from needbench.envs.physiology import Physiology
from needbench.envs.streams import draw_uniform
from needbench.envs.task import NeedEnv, NeedVectorEnv, SourceGuide, World

#: The sources of an invented tidal island at dusk, by need (band units).
#: ``intake`` sources feed their need while the agent is inside the radius:
#: ``rate`` band units per step at the centre, falling linearly to 0 at the rim.
#: ``ambient`` sources change the air the need relaxes toward: ``outside`` band
#: units from the need's default ambient everywhere outside the sources, rising
#: linearly to ``peak`` at a source's centre.
ISLAND_SOURCES: Mapping[str, Mapping[str, Any]] = {
    # Bramble thickets heavy with blackberries.
    "energy": {"kind": "intake", "count": 2, "radius": 0.08, "rate": 0.25},
    # Rock pools filled by the last rain.
    "water": {"kind": "intake", "count": 2, "radius": 0.08, "rate": 0.25},
    # A sun-warmed boulder field out of the sea wind that chills the open ground.
    "temperature": {"kind": "ambient", "count": 1, "radius": 0.12, "peak": 2.5, "outside": -1.5},
}

SOURCE_FIELDS = {
    "intake": ("kind", "count", "radius", "rate"),
    "ambient": ("kind", "count", "radius", "peak", "outside"),
}
MAX_SOURCES_PER_NEED = 16

GROUND_COLOUR = np.array([214, 200, 160], np.float64)
#: Side of the picture, pixels (sources take their need's colour, rendering.need_colour).
IMAGE_SIZE = 256
MAP_WIDTH, MAP_HEIGHT = 32, 16


@dataclass(frozen=True)
class SourceSpec:
    """The sources of one need: ``count`` discs of ``radius`` (island units).

    ``rate`` (intake kind): band units per step at the centre. ``peak`` and
    ``outside`` (ambient kind): the need's ambient, in band units from its
    default, at a centre and away from every source.
    """

    need: str
    kind: str
    count: int
    radius: float
    rate: float = 0.0
    peak: float = 0.0
    outside: float = 0.0


def parse_sources(table: Mapping[str, Mapping[str, Any]] | None,
                  physiology: Physiology) -> tuple[SourceSpec, ...]:
    """Validated source specs in the body's need order.

    ``None`` takes :data:`ISLAND_SOURCES` restricted to the body's needs; an
    explicit table must name only needs of the body.
    """
    if table is None:
        table = {n: s for n, s in ISLAND_SOURCES.items() if n in physiology.index}
    elif not isinstance(table, Mapping):
        raise ConfigError("sources", table, "a mapping {need: {kind, count, radius, ...}}")
    specs = []
    for name, entry in table.items():
        path = f"sources.{name}"
        if name not in physiology.index:
            raise ConfigError("sources", name,
                              "a need of this body: " + ", ".join(physiology.names))
        if not isinstance(entry, Mapping):
            raise ConfigError(path, entry, "a mapping with kind, count, radius, ...")
        kind = check_choice(f"{path}.kind", entry.get("kind"), SOURCE_FIELDS)
        unknown = sorted(set(entry) - set(SOURCE_FIELDS[kind]))
        if unknown:
            raise ConfigError(path, unknown, f"fields of a {kind} source: "
                              + ", ".join(SOURCE_FIELDS[kind]))
        count = entry.get("count", 1)
        if (not isinstance(count, (int, np.integer)) or isinstance(count, bool)
                or not 1 <= count <= MAX_SOURCES_PER_NEED):
            raise ConfigError(f"{path}.count", count,
                              f"a whole number in [1, {MAX_SOURCES_PER_NEED}]")
        radius = check_range(f"{path}.radius", entry.get("radius"), 0.0, 0.5, closed=False)
        if kind == "intake":
            rate = check_non_negative(f"{path}.rate", entry.get("rate"))
            specs.append(SourceSpec(name, kind, int(count), radius, rate=rate))
        else:
            need = physiology.needs[physiology.index[name]]
            if need.ambient_rate <= 0:
                raise ConfigError(f"{path}.kind", kind, f"'intake' ({name} does not relax toward "
                                  "an ambient value: its ambient_rate is 0)")
            peak = check_finite(f"{path}.peak", entry.get("peak"))
            outside = check_finite(f"{path}.outside", entry.get("outside"))
            specs.append(SourceSpec(name, kind, int(count), radius, peak=peak, outside=outside))
    if not specs:
        raise ConfigError("sources", table, "at least one source for a need of this body")
    specs.sort(key=lambda s: physiology.index[s.need])
    return tuple(specs)


# --- the compiled world: per-copy functions shared by the kernels and the public methods ---
#
# np.linalg.norm along an axis of length 2 (what the NumPy world used) is
# sqrt(add.reduce(x * x)) = sqrt(x0 * x0 + x1 * x1) in that order, which the
# kernels write out as is (not math.hypot, which rounds differently).


@inline_kernel
def source_richness(x, y, centre_x, centre_y, radius):
    """Strength of one disc source at point (x, y): 1 - d/r inside, 0 outside."""
    dx = centre_x - x
    dy = centre_y - y
    distance = math.sqrt(dx * dx + dy * dy)
    return min(max(1.0 - distance / radius, 0.0), 1.0)


@kernel
def _richness_batch(position, sources, radius, out):
    for b in range(position.shape[0]):
        for s in range(radius.shape[0]):
            out[b, s] = source_richness(position[b, 0], position[b, 1], sources[b, s, 0],
                                        sources[b, s, 1], radius[s])


@inline_kernel
def move(b, actions, position, max_speed):
    """Move copy ``b`` by its velocity action; return its speed (the action's length, cut to 1)."""
    ax, ay = actions[b, 0], actions[b, 1]
    norm = math.sqrt(ax * ax + ay * ay)
    # Speeds above 1 are cut to 1, keeping the heading.
    scale = max(norm, 1.0)
    position[b, 0] = min(max(position[b, 0] + max_speed * (ax / scale), 0.0), 1.0)
    position[b, 1] = min(max(position[b, 1] + max_speed * (ay / scale), 0.0), 1.0)
    return min(norm, 1.0)


@inline_kernel
def feed(b, position, sources, radius, intake_gain, ambient_map, outside, peak, ambient_needs,
         base_ambient, band, uses_ambient, intake, ambient):
    """Copy ``b``'s intake (and ambient, when the world sets it) at its position.

    Overlapping sources of one need do not add up: the richest one counts.
    The maxima are gathered in the intake and ambient rows, then scaled.
    """
    x, y = position[b, 0], position[b, 1]
    num_needs = intake.shape[1]
    for k in range(num_needs):
        intake[b, k] = 0.0
        if uses_ambient:
            ambient[b, k] = 0.0
    for s in range(radius.shape[0]):
        strength = source_richness(x, y, sources[b, s, 0], sources[b, s, 1], radius[s])
        for k in range(num_needs):
            intake[b, k] = max(intake[b, k], strength * intake_gain[s, k])
            if uses_ambient:
                ambient[b, k] = max(ambient[b, k], strength * ambient_map[s, k])
    for k in range(num_needs):
        intake[b, k] = intake[b, k] * band[k]
        if uses_ambient:
            if ambient_needs[k]:
                warmth = ambient[b, k]
                ambient[b, k] = base_ambient[k] + band[k] * (
                    outside[k] + (peak[k] - outside[k]) * warmth)
            else:
                ambient[b, k] = base_ambient[k]


@inline_kernel
def observe_island(b, position, sources, sensing_range, engine):
    """Copy ``b``'s observation: deviations, position, then the capped source vectors."""
    observe_internal(engine, b)
    observation = engine[OBSERVATION]
    offset = int(engine[OPTIONS][WORLD_OFFSET])
    x, y = position[b, 0], position[b, 1]
    observation[b, offset] = np.float32(x)
    observation[b, offset + 1] = np.float32(y)
    for s in range(sources.shape[1]):
        dx = (sources[b, s, 0] - x) / sensing_range
        dy = (sources[b, s, 1] - y) / sensing_range
        # Beyond the sensing range the vector keeps its heading, its length stops at 1.
        scale = max(math.sqrt(dx * dx + dy * dy), 1.0)
        column = offset + 2 + 2 * s
        observation[b, column] = np.float32(min(max(dx / scale, -1.0), 1.0))
        observation[b, column + 1] = np.float32(min(max(dy / scale, -1.0), 1.0))


@kernel
def _reset(mask, constants, state, engine):
    radius, sensing_range = constants[0], constants[2]
    position, sources = state
    keys, counters = engine[KEYS], engine[COUNTERS]
    for b in range(mask.shape[0]):
        if mask[b]:
            reset_body(engine, b)
            position[b, 0] = draw_uniform(keys, counters, b)
            position[b, 1] = draw_uniform(keys, counters, b)
            # Centres keep a whole disc on the island: uniform in [r, 1 - r]^2.
            for s in range(radius.shape[0]):
                for j in range(2):
                    u = draw_uniform(keys, counters, b)
                    sources[b, s, j] = radius[s] + (1.0 - 2.0 * radius[s]) * u
            observe_island(b, position, sources, sensing_range, engine)


@kernel
def _step(actions, constants, state, events, engine):
    (radius, max_speed, sensing_range, intake_gain, ambient_map, outside, peak, ambient_needs,
     base_ambient, band) = constants
    position, sources = state
    speed_event, position_event = events
    intake, ambient, activity, task = engine[INTAKE], engine[AMBIENT], engine[ACTIVITY], \
        engine[TASK]
    uses_ambient = engine[USES_AMBIENT][0]
    for b in range(actions.shape[0]):
        speed = move(b, actions, position, max_speed)
        feed(b, position, sources, radius, intake_gain, ambient_map, outside, peak,
             ambient_needs, base_ambient, band, uses_ambient, intake, ambient)
        activity[b] = speed
        task[b] = 0.0
        speed_event[b] = speed
        position_event[b, 0] = position[b, 0]
        position_event[b, 1] = position[b, 1]
    settle_all(engine)
    for b in range(actions.shape[0]):
        observe_island(b, position, sources, sensing_range, engine)


@kernel
def _observe(constants, state, engine):
    sensing_range = constants[2]
    position, sources = state
    for b in range(position.shape[0]):
        observe_island(b, position, sources, sensing_range, engine)


class ArenaWorld(World):
    """A unit-square island; the agent's velocity is the action; sources are discs.

    State: ``position`` (B, 2) of the agent and ``sources`` (B, S, 2) centres of
    all S sources (grouped by need in the body's order), both in island units
    with (0, 0) the south-west corner. Sources stay put for an episode.
    Events in ``info``: ``speed`` (the action's length, cut to 1) and
    ``position`` after the step.
    """

    parameters = {"sources": None, "max_speed": 0.05, "sensing_range": 1.5}
    spatial = True
    reset_kernel = staticmethod(_reset)
    step_kernel = staticmethod(_step)
    observe_kernel = staticmethod(_observe)

    def __init__(self, physiology: Physiology, sources: Mapping | None = None,
                 max_speed: float = 0.05, sensing_range: float = 1.5):
        super().__init__(physiology)
        self.max_speed = check_range("max_speed", max_speed, 0.0, 0.5, closed=False)
        self.sensing_range = check_range("sensing_range", sensing_range, 0.0, 10.0, closed=False)
        self.specs = parse_sources(sources, physiology)
        k = physiology.num_needs
        rows = [(spec, j) for spec in self.specs for j in range(spec.count)]
        self.num_sources = len(rows)
        self.source_need = np.array([physiology.index[s.need] for s, _ in rows])
        self.source_radius = np.array([s.radius for s, _ in rows], dtype=np.float64)
        # (S, K) gains: intake per step at a centre (band units), and which
        # sources set which need's ambient.
        self.intake_gain = np.zeros((self.num_sources, k))
        self.ambient_map = np.zeros((self.num_sources, k))
        self.ambient_outside = np.zeros(k)
        self.ambient_peak = np.zeros(k)
        for s, (spec, _) in enumerate(rows):
            i = physiology.index[spec.need]
            if spec.kind == "intake":
                self.intake_gain[s, i] = spec.rate
            else:
                self.ambient_map[s, i] = 1.0
                self.ambient_outside[i] = spec.outside
                self.ambient_peak[i] = spec.peak
        self.ambient_needs = self.ambient_map.any(axis=0)
        # Without ambient sources every need relaxes toward its own ambient.
        self.uses_ambient = bool(self.ambient_needs.any())
        self.action_space = spaces.Box(-1.0, 1.0, (2,), np.float32)
        names = ["position/x", "position/y"]
        for spec in self.specs:
            for j in range(spec.count):
                names += [f"{spec.need}/{j}/dx", f"{spec.need}/{j}/dy"]
        self.feature_names = tuple(names)
        self.feature_low = np.concatenate([np.zeros(2), -np.ones(2 * self.num_sources)])
        self.feature_high = np.ones(2 + 2 * self.num_sources)

    def constants(self) -> tuple:
        physiology = self.physiology
        return (self.source_radius, float(self.max_speed), float(self.sensing_range),
                self.intake_gain, self.ambient_map, self.ambient_outside, self.ambient_peak,
                self.ambient_needs, physiology.ambient, physiology.band)

    def allocate(self, batch: int) -> dict[str, np.ndarray]:
        return {"position": np.zeros((batch, 2)), "sources": np.zeros((batch, self.num_sources, 2))}

    def allocate_events(self, batch: int) -> dict[str, np.ndarray]:
        return {"speed": np.zeros(batch), "position": np.zeros((batch, 2))}

    def richness(self, position: np.ndarray, sources: np.ndarray) -> np.ndarray:
        """(B, S) strength of each source at ``position`` (B, 2): 1 - d/r inside, 0 outside.

        ``sources`` (B, S, 2) or (S, 2) centres (one layout for every point);
        the kernels' own :func:`source_richness`.
        """
        position = np.ascontiguousarray(position, dtype=np.float64)
        sources = np.asarray(sources, dtype=np.float64)
        if position.ndim != 2 or position.shape[1] != 2:
            raise ValueError(f"position of shape {position.shape}; expected (B, 2)")
        sources = np.ascontiguousarray(np.broadcast_to(
            sources, (position.shape[0], self.num_sources, 2)))
        out = np.empty((position.shape[0], self.num_sources))
        _richness_batch(position, sources, self.source_radius, out)
        return out

    def source_guides(self) -> dict[str, SourceGuide]:
        """Intake sources raise their need; an ambient source raises it when its
        peak is above the ambient outside, lowers it otherwise. Features: per
        disc, the (dx, dy) vector to its centre, over ``sensing_range``."""
        guides = {}
        for spec in self.specs:
            warms = spec.kind == "intake" or spec.peak > spec.outside
            guides[spec.need] = SourceGuide(
                spec.need, spec.kind, "raises" if warms else "lowers",
                tuple((f"{spec.need}/{j}/dx", f"{spec.need}/{j}/dy") for j in range(spec.count)),
                (spec.radius,) * spec.count)
        return guides

    def position(self, state: dict[str, np.ndarray]) -> np.ndarray:
        """(B, 2) the agent's position (x east, y north) in island units, a copy."""
        return state["position"].copy()

    def sources(self, state: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        """Centres of each need's sources, ``{need: (B, count, 2)}`` in island units."""
        out = {}
        for spec in self.specs:
            columns = self.source_need == self.physiology.index[spec.need]
            out[spec.need] = state["sources"][:, columns].copy()
        return out

    def text(self, state, index):
        grid = [["." for _ in range(MAP_WIDTH)] for _ in range(MAP_HEIGHT)]

        def cell(point):
            column = min(int(point[0] * MAP_WIDTH), MAP_WIDTH - 1)
            row = MAP_HEIGHT - 1 - min(int(point[1] * MAP_HEIGHT), MAP_HEIGHT - 1)
            return row, column

        lines = []
        for spec, centres in zip(self.specs, self.sources(state).values(), strict=True):
            mark = spec.need[0].upper()
            for centre in centres[index]:
                row, column = cell(centre)
                grid[row][column] = mark
            where = ", ".join(f"({x:.2f}, {y:.2f})" for x, y in centres[index])
            lines.append(f"{mark} {spec.need} ({spec.kind}, r {spec.radius:.2f}): {where}")
        x, y = state["position"][index]
        row, column = cell((x, y))
        grid[row][column] = "@"
        picture = ["+" + "-" * MAP_WIDTH + "+"] + ["|" + "".join(r) + "|" for r in grid]
        picture.append(picture[0])
        return "\n".join(picture + [f"@ agent: ({x:.2f}, {y:.2f})"] + lines)

    def image(self, state, index):
        """(IMAGE_SIZE, IMAGE_SIZE, 3) uint8: sand tinted by every source in its need's
        colour as strongly as it is rich there, and the agent in the agent colour."""
        centres = (np.arange(IMAGE_SIZE) + 0.5) / IMAGE_SIZE
        xs, ys = np.meshgrid(centres, centres[::-1])
        pixels = np.stack([xs.ravel(), ys.ravel()], axis=1)
        # Each pixel is tinted by the richest source of each need, so gradients show.
        richness = self.richness(pixels, state["sources"][index])
        picture = np.broadcast_to(GROUND_COLOUR, (pixels.shape[0], 3)).copy()
        needs = self.physiology.needs
        for s in range(self.num_sources):
            need = int(self.source_need[s])
            colour = rendering.need_colour(needs[need].name, need).astype(np.float64)
            r = richness[:, s:s + 1]
            picture = picture * (1.0 - r) + colour * r
        picture = picture.reshape(IMAGE_SIZE, IMAGE_SIZE, 3)
        x, y = state["position"][index]
        column = min(int(x * IMAGE_SIZE), IMAGE_SIZE - 1)
        row = IMAGE_SIZE - 1 - min(int(y * IMAGE_SIZE), IMAGE_SIZE - 1)
        mark = max(IMAGE_SIZE // 48, 2)
        picture[max(row - mark - 2, 0):row + mark + 3,
                max(column - mark - 2, 0):column + mark + 3] = rendering.AGENT_OUTLINE
        picture[max(row - mark, 0):row + mark + 1,
                max(column - mark, 0):column + mark + 1] = rendering.AGENT_COLOUR
        return picture.astype(np.uint8)


class ArenaEnv(NeedEnv):
    """Arena: steer through a continuous island to food, water and a warm spot.

    ## Description
    An invented tidal island at dusk, the unit square. Two bramble thickets
    (energy), two rock pools (water) and a sun-warmed boulder field
    (temperature) lie at places drawn afresh each episode. Inside a thicket or
    pool the agent eats or drinks at a rate that is highest at the centre and
    falls linearly to zero at the rim; away from the boulders the sea wind
    chills the body, and the boulders' air is warmer the nearer their centre.
    Moving costs energy and water and makes heat, in proportion to speed. The
    agent must travel between sources in an order and for stays that suit its
    internal state: too long in a source overshoots the set point, and food
    reaches the body through the gut with a delay. Sources may overlap. For
    continuous-control agents (SAC, PPO with a Gaussian policy).

    ## Action Space
    ``Box(-1, 1, (2,), float32)``: the velocity (east, north) as a fraction of
    ``max_speed`` (0.05 island units per step). A vector longer than 1 is cut
    to length 1 with its heading kept. The agent stops at the shore (edges).

    ## Observation Space
    ``Box(float32)``: the K internal deviations (h - h*)/band; the agent's
    position (x, y) in [0, 1]; then, for each source (needs in body order, then
    source index), the vector from the agent to its centre divided by
    ``sensing_range``, its length capped at 1 (heading kept), each component in
    [-1, 1]. Default: 3 + 2 + 10 = 15 numbers.

    ## Rewards
    By default drive reduction r_t = D(h_t) - D(h_{t+1}) with the homeostatic
    drive (n = 3, m = 2) on band-scaled deviations. See ``reward``.

    ## Starting State
    Levels uniform within half a band of the set points, gut empty; agent
    uniform on the island; each source centre uniform in [r, 1 - r]^2 (all
    from the episode's random stream).

    ## Episode End
    Termination when a need leaves its lethal bounds (+-6 bands); truncation
    at ``max_steps`` (500).

    ## Arguments
    * ``sources``: ``{need: {"kind": "intake", "count", "radius", "rate"}}`` or
      ``{need: {"kind": "ambient", "count", "radius", "peak", "outside"}}``
      (radius in island units, rate/peak/outside in band units); default
      :data:`ISLAND_SOURCES` restricted to the body's needs.
    * ``max_speed``: island units per step at full speed (0.05).
    * ``sensing_range``: island units at which a source vector reaches length 1
      (1.5: never capped on the unit square).
    * the common task arguments (``needbench.envs.task``).

    For controllers, ``env.unwrapped.core.world.sources(env.unwrapped.core.state)``
    gives ``{need: (B, count, 2)}`` source centres, ``world.position(state)`` the
    (B, 2) agent positions and ``world.richness(position, centres)`` each source's
    strength there (the step's own computation).

    ## Vectorized environment
    ``gymnasium.make_vec("needbench/Arena-v0", num_envs=N,
    vectorization_mode="vector_entry_point")`` gives :class:`ArenaVectorEnv`.

    ## Version History
    * v0: initial version.
    """

    world_cls = ArenaWorld
    defaults = {"max_steps": 500}


class ArenaVectorEnv(NeedVectorEnv):
    """Native vector version of :class:`ArenaEnv` (same core, B = num_envs)."""

    world_cls = ArenaWorld
    defaults = ArenaEnv.defaults
