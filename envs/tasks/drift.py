"""Drift: seasons change what food and water yield, and set points adapt to experience."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from gymnasium import spaces

from needbench.envs.compiled import inline_kernel, kernel
from needbench.envs.engine import (
    COUNTERS,
    INTAKE,
    KEYS,
    OBSERVATION,
    OPTIONS,
    WORLD_OFFSET,
    reset_body,
    settle_all,
)
from needbench.envs.errors import ConfigError, check_finite, check_range
from needbench.envs.physiology import Physiology
from needbench.envs.streams import draw_uniform
from needbench.envs.task import NeedEnv, NeedVectorEnv, World
from needbench.envs.tasks.menu import observe_last_outcome, record_last_outcome

#: The larder of an invented upland valley through the year: (name, {need:
#: amount at the annual mean yield, band units}, peak) with ``peak`` the time
#: of year (fraction in [0, 1)) of the item's richest yield, or None for an
#: item whose yield never changes.
VALLEY_ITEMS: tuple[tuple[str, Mapping[str, float], float | None], ...] = (
    ("rest", {}, None),
    # Seed heads on the meadow: richest at the turn of the year (phase 0).
    ("seed heads", {"energy": 0.6}, 0.0),
    # The snowmelt brook: richest half a year later, nearly dry at harvest time.
    ("brook water", {"water": 0.6}, 0.5),
    # The cellar's dried apples: a little of both, whatever the season.
    ("dried apples", {"energy": 0.2, "water": 0.15}, None),
)

#: Per-step rate at which set points follow the experienced level (allostasis),
#: given by default to these needs through ``need_overrides``.
ALLOSTASIS_RATE = 0.002
ALLOSTATIC_NEEDS = ("energy", "water")


@inline_kernel
def time_of_year(start, day, year_length):
    """Time of year, a fraction in [0, 1), ``day`` steps after a year began at ``start``."""
    return (start + day / year_length) % 1.0


@inline_kernel
def yield_multiplier(phase, peak, seasonal, amplitude):
    """m = 1 + amplitude * cos(2 pi (phase - peak)) for a seasonal item, 1 otherwise."""
    if not seasonal:
        return 1.0
    return 1.0 + amplitude * math.cos(2.0 * math.pi * (phase - peak))


@kernel
def _multipliers(phase, peaks, seasonal, amplitude, out):
    for b in range(phase.shape[0]):
        for i in range(peaks.shape[0]):
            out[b, i] = yield_multiplier(phase[b], peaks[i], seasonal[i], amplitude)


@kernel
def _seasons(start, day, year_length, out):
    for b in range(start.shape[0]):
        out[b] = time_of_year(start[b], day[b], year_length)


@kernel
def _yields(start, day, year_length, effects, peaks, seasonal, amplitude, out):
    for b in range(start.shape[0]):
        phase = time_of_year(start[b], day[b], year_length)
        for i in range(effects.shape[0]):
            m = yield_multiplier(phase, peaks[i], seasonal[i], amplitude)
            for k in range(effects.shape[1]):
                out[b, i, k] = m * effects[i, k]


def season_yield(phase: np.ndarray, peaks: np.ndarray, seasonal: np.ndarray,
                 amplitude: float) -> np.ndarray:
    """(B, I) yield multipliers at time of year ``phase`` (B,) in [0, 1).

    m_i = 1 + amplitude * cos(2 pi (phase - peak_i)) for a seasonal item, 1 otherwise
    (:func:`yield_multiplier`, the function the step kernel calls).
    """
    phase = np.ascontiguousarray(phase, dtype=np.float64).reshape(-1)
    peaks = np.ascontiguousarray(peaks, dtype=np.float64)
    out = np.empty((phase.shape[0], peaks.shape[0]))
    _multipliers(phase, peaks, np.ascontiguousarray(seasonal, dtype=np.bool_),
                 float(amplitude), out)
    return out


@inline_kernel
def observe_harvest(b, phase, last_outcome, show_season, engine):
    """Copy ``b``'s observation: deviations, what the last item delivered (as in
    Menu), then cos and sin of the time of year if shown."""
    observe_last_outcome(b, last_outcome, engine)
    if show_season:
        column = int(engine[OPTIONS][WORLD_OFFSET]) + last_outcome.shape[1]
        angle = 2.0 * math.pi * phase
        observation = engine[OBSERVATION]
        observation[b, column] = np.float32(math.cos(angle))
        observation[b, column + 1] = np.float32(math.sin(angle))


@kernel
def _reset(mask, constants, state, engine):
    _, _, _, _, year_length, random_start, show_season, _ = constants
    day, start, last_outcome = state
    for b in range(mask.shape[0]):
        if mask[b]:
            reset_body(engine, b)
            # Drawn whether used or not, so that the streams stay aligned either way.
            u = draw_uniform(engine[KEYS], engine[COUNTERS], b)
            start[b] = u if random_start else 0.0
            day[b] = 0
            for k in range(last_outcome.shape[1]):
                last_outcome[b, k] = 0.0
            observe_harvest(b, time_of_year(start[b], 0, year_length), last_outcome,
                            show_season, engine)


@kernel
def _step(actions, constants, state, events, engine):
    effects, peaks, seasonal, amplitude, year_length, _, show_season, band = constants
    day, start, last_outcome = state
    item_event, season_event = events
    intake = engine[INTAKE]
    for b in range(actions.shape[0]):
        item = actions[b]
        phase = time_of_year(start[b], day[b], year_length)
        m = yield_multiplier(phase, peaks[item], seasonal[item], amplitude)
        for k in range(intake.shape[1]):
            intake[b, k] = m * effects[item, k]
        record_last_outcome(b, last_outcome, intake, band)
        day[b] += 1
        item_event[b] = item
        season_event[b] = phase
    settle_all(engine)
    for b in range(actions.shape[0]):
        observe_harvest(b, time_of_year(start[b], day[b], year_length), last_outcome,
                        show_season, engine)


@kernel
def _observe(constants, state, engine):
    _, _, _, _, year_length, _, show_season, _ = constants
    day, start, last_outcome = state
    for b in range(day.shape[0]):
        observe_harvest(b, time_of_year(start[b], day[b], year_length), last_outcome,
                        show_season, engine)


def parse_items(items: Sequence | None, physiology: Physiology):
    """Names, (I, K) mean effects in need units, (I,) peaks and (I,) seasonal flags.

    ``None`` takes :data:`VALLEY_ITEMS` with the needs the body lacks left out.
    """
    if items is None:
        items = tuple((name, {n: v for n, v in effect.items() if n in physiology.index}, peak)
                      for name, effect, peak in VALLEY_ITEMS)
    if isinstance(items, (str, bytes)) or not isinstance(items, Sequence) or not items:
        raise ConfigError("items", items, "a non-empty sequence of (name, {need: amount}, peak)")
    names, effects, peaks = [], [], []
    for i, item in enumerate(items):
        if not isinstance(item, Sequence) or len(item) != 3:
            raise ConfigError(f"items[{i}]", item, "a triple (name, {need: amount}, peak or None)")
        name, effect, peak = item
        if not isinstance(effect, Mapping):
            raise ConfigError(f"items.{name}.effect", effect, "a mapping {need: amount}")
        for need, amount in effect.items():
            check_finite(f"items.{name}.effect.{need}", amount)
        effects.append(physiology.vector(dict(effect)) * physiology.band)
        if peak is not None:
            check_range(f"items.{name}.peak", peak, 0.0, 1.0)
        names.append(str(name))
        peaks.append(np.nan if peak is None else float(peak))
    peaks = np.array(peaks)
    seasonal = np.isfinite(peaks)
    return tuple(names), np.array(effects), np.where(seasonal, peaks, 0.0), seasonal


class DriftWorld(World):
    """Items whose yields follow a sinusoidal year; the time of year is the world state.

    State: ``day`` (B,) steps since the episode began, ``start`` (B,) time of
    year at the first step (fraction in [0, 1)), ``last_outcome`` (B, K) what
    the last item delivered, in band units. The time of year at a step is
    ``(start + day / year_length) mod 1``. Events in ``info``: ``item`` taken
    and ``season``, the time of year of that step.
    """

    default_needs = ("energy", "water")
    parameters = {"items": None, "year_length": 400, "amplitude": 0.9, "random_start": True,
                  "show_season": False}
    reset_kernel = staticmethod(_reset)
    step_kernel = staticmethod(_step)
    observe_kernel = staticmethod(_observe)

    def __init__(self, physiology: Physiology, items: Sequence | None = None,
                 year_length: int = 400, amplitude: float = 0.9, random_start: bool = True,
                 show_season: bool = False):
        super().__init__(physiology)
        if (isinstance(year_length, bool) or not isinstance(year_length, (int, np.integer))
                or year_length < 2):
            raise ConfigError("year_length", year_length, "a whole number of steps >= 2")
        self.year_length = int(year_length)
        self.amplitude = check_range("amplitude", amplitude, 0.0, 1.0)
        for key, value in (("random_start", random_start), ("show_season", show_season)):
            if not isinstance(value, (bool, np.bool_)):
                raise ConfigError(key, value, "True or False")
        self.random_start = bool(random_start)
        self.show_season = bool(show_season)
        self.item_names, self.effects, self.peaks, self.seasonal = parse_items(items, physiology)
        self.action_space = spaces.Discrete(len(self.item_names))
        names = [f"last_outcome/{n}" for n in physiology.names]
        # Largest amount an item can deliver, in band units, with a margin.
        limit = float(np.abs(self.effects / physiology.band).max(initial=0.0)
                      * (1.0 + self.amplitude)) + 1.0
        low, high = [-limit] * len(names), [limit] * len(names)
        if self.show_season:
            names += ["season/cos", "season/sin"]
            low += [-1.0, -1.0]
            high += [1.0, 1.0]
        self.feature_names = tuple(names)
        self.feature_low = np.array(low)
        self.feature_high = np.array(high)

    def constants(self) -> tuple:
        return (self.effects, self.peaks, self.seasonal, self.amplitude, self.year_length,
                self.random_start, self.show_season, self.physiology.band)

    def allocate(self, batch: int) -> dict[str, np.ndarray]:
        return {"day": np.zeros(batch, np.int64), "start": np.zeros(batch),
                "last_outcome": np.zeros((batch, self.physiology.num_needs))}

    def allocate_events(self, batch: int) -> dict[str, np.ndarray]:
        return {"item": np.zeros(batch, np.int64), "season": np.zeros(batch)}

    def season(self, state: dict[str, np.ndarray]) -> np.ndarray:
        """(B,) time of year of the coming step, a fraction in [0, 1)."""
        out = np.empty(state["start"].shape[0])
        _seasons(state["start"], state["day"], self.year_length, out)
        return out

    def yields(self, state: dict[str, np.ndarray]) -> np.ndarray:
        """(B, I, K) what each item delivers on the coming step, in need units.

        The outcome model of this world at the current time, for planners and
        controllers (it changes with the season).
        """
        batch = state["start"].shape[0]
        out = np.empty((batch,) + self.effects.shape)
        _yields(state["start"], state["day"], self.year_length, self.effects, self.peaks,
                self.seasonal, self.amplitude, out)
        return out

    def model(self) -> dict[str, Any]:
        """The annual-mean outcome model, for controllers: ``items`` names,
        ``probabilities`` (I, 1) ones and ``effects`` (I, 1, K), what each item
        delivers at its mean yield, in need units; ``seasonal`` (I,) bool,
        ``peaks`` (I,) and ``amplitude``: the year's modulation of seasonal
        items, whose yield at time of year p is the mean times 1 + amplitude
        cos(2 pi (p - peak)) (:meth:`yields` gives it for the current state).
        ``stationary`` is False: the mean model is not the step's outcome, so
        no exact finite model is built from it."""
        return {"items": self.item_names, "probabilities": np.ones((len(self.item_names), 1)),
                "effects": self.effects[:, None, :], "seasonal": self.seasonal,
                "peaks": self.peaks, "amplitude": self.amplitude, "stationary": False}

    def text(self, state, index):
        season = float(self.season(state)[index])
        year = int((state["start"][index] + state["day"][index] / self.year_length) // 1) + 1
        multiplier = season_yield(self.season(state)[index:index + 1], self.peaks,
                                  self.seasonal, self.amplitude)[0]
        rates = ", ".join(f"{name} x{m:.2f}" for name, m, s in
                          zip(self.item_names, multiplier, self.seasonal, strict=True) if s)
        last = ", ".join(f"{n} {v:+.2f}" for n, v in
                         zip(self.physiology.names, state["last_outcome"][index], strict=True))
        return (f"year {year}, time of year {season:.2f} ({rates})\n"
                f"last outcome (band units): {last}")


def allostatic_arguments(kwargs: dict[str, Any]) -> dict[str, Any]:
    """``kwargs`` with the default allostasis merged into ``need_overrides``.

    Each need of the body named in :data:`ALLOSTATIC_NEEDS` gets
    ``adaptation_rate = ALLOSTASIS_RATE`` unless the user's ``need_overrides``
    sets that need's ``adaptation_rate``; the user's other fields are kept.
    """
    needs = kwargs.get("needs")
    needs = DriftWorld.default_needs if needs is None else tuple(needs)
    user = kwargs.get("need_overrides") or {}
    if not isinstance(user, Mapping):
        raise ConfigError("need_overrides", user, "a mapping {need: {field: value}}")
    merged = {name: {"adaptation_rate": ALLOSTASIS_RATE}
              for name in ALLOSTATIC_NEEDS if name in needs}
    for name, changes in user.items():
        if not isinstance(changes, Mapping):
            raise ConfigError(f"need_overrides.{name}", changes, "a mapping {field: value}")
        merged[name] = {**merged.get(name, {}), **dict(changes)}
    return {**kwargs, "need_overrides": merged}


class DriftEnv(NeedEnv):
    """Drift: a long episode through seasons, with set points that adapt to experience.

    ## Description
    A forager in an invented upland valley lives through several years in one
    episode. Seed heads (energy) are richest at the turn of the year and
    scarce at midyear; the snowmelt brook (water) runs the other way round;
    dried apples from the cellar give a little of both in every season. An
    item's yield at time of year p in [0, 1) is its mean amount times
    1 + ``amplitude`` cos(2 pi (p - peak)), with p = (start + t /
    ``year_length``) mod 1. Two kinds of non-stationarity are probed:

    * the world's: what each choice is worth drifts slowly, so a policy tuned
      to the annual mean overeats in plenty and starves in the lean season;
    * the body's (allostasis): each set point follows the experienced level,
      s_{t+1} = s_t + a (h_{t+1} - s_t) with a = ``adaptation_rate`` (0.002 per
      step by default for energy and water), so a long lean season lowers the
      set point the drive is measured against; lethal bounds stay fixed.

    ## Action Space
    ``Discrete(len(items))``: 0 rest, 1 seed heads, 2 brook water, 3 dried
    apples (default items).

    ## Observation Space
    ``Box(float32)``: the K internal deviations (h - s_t)/band from the
    current (adapted) set points, then the K amounts the last item delivered,
    in band units; with ``show_season`` also cos and sin of 2 pi p. By
    default the season is hidden and must be inferred from what items yield.

    ## Rewards
    By default drive reduction r_t = D(h_t) - D(h_{t+1}) with the homeostatic
    drive (n = 3, m = 2) on band-scaled deviations from the current set points.

    ## Starting State
    Levels uniform within half a band of the set points; gut empty; set points
    at the preset's values; time of year uniform in [0, 1) (or 0 with
    ``random_start=False``).

    ## Episode End
    Termination when a need leaves its lethal bounds (+-6 bands); truncation
    at ``max_steps`` (2000 steps, five years).

    ## Arguments
    * ``items``: a sequence of ``(name, {need: mean amount in band units},
      peak in [0, 1] or None)``; default :data:`VALLEY_ITEMS`.
    * ``year_length``: steps per year (400); ``amplitude``: in [0, 1] (0.9).
    * ``random_start``, ``show_season``: see above.
    * ``need_overrides``: merged per need over the default allostasis; pass
      ``{"energy": {"adaptation_rate": 0.0}, ...}`` to hold a set point fixed.
    * the common task arguments (``needbench.envs.task``).

    Every step's ``info`` carries ``item`` (the action) and ``season`` (time
    of year of that step). ``env.unwrapped.core.world.yields(state)`` gives the
    current (B, I, K) outcome of every item.

    ## Vectorized environment
    ``gymnasium.make_vec("needbench/Drift-v0", num_envs=N,
    vectorization_mode="vector_entry_point")`` gives :class:`DriftVectorEnv`.

    ## Version History
    * v0: initial version.
    """

    world_cls = DriftWorld
    defaults = {"max_steps": 2000}

    def __init__(self, render_mode: str | None = None, **kwargs: Any):
        super().__init__(render_mode, **allostatic_arguments(kwargs))


class DriftVectorEnv(NeedVectorEnv):
    """Native vector version of :class:`DriftEnv` (same core, B = num_envs)."""

    world_cls = DriftWorld
    defaults = DriftEnv.defaults

    def __init__(self, num_envs: int = 1, render_mode: str | None = None, **kwargs: Any):
        super().__init__(num_envs, render_mode, **allostatic_arguments(kwargs))
