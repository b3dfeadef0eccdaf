"""Menu: choose one outcome a step; the best choice depends on the internal state."""

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
    observe_internal,
    reset_body,
    settle_all,
)
from needbench.envs.errors import ConfigError, check_range
from needbench.envs.physiology import Physiology
from needbench.envs.streams import draw_uniform
from needbench.envs.task import NeedEnv, NeedVectorEnv, World

#: The pantry of an invented mountain hut. Each item is a lottery over
#: outcomes: (probability, {need: amount}) in the need's units (band units in
#: the abstract preset). ``rest`` does nothing.
HUT_PANTRY: tuple[tuple[str, tuple[tuple[float, Mapping[str, float]], ...]], ...] = (
    ("rest", ((1.0, {}),)),
    ("oatcake", ((1.0, {"energy": 0.8}),)),
    ("meltwater", ((1.0, {"water": 0.8}),)),
    # Soup from the stove: filling and wet, but the stove sometimes fails.
    ("stove soup", ((0.7, {"energy": 0.6, "water": 0.6}), (0.3, {}))),
    # Salted jerky: much energy, costs water.
    ("jerky", ((1.0, {"energy": 1.2, "water": -0.3}),)),
)


def outcome_tables(items, physiology: Physiology):
    """Cumulative probabilities (I, O) and effects (I, O, K) of item lotteries.

    Items with fewer outcomes are padded with impossible outcomes (probability 0).
    """
    if not items:
        raise ConfigError("items", items, "at least one (name, outcomes) item")
    width = max(len(outcomes) for _, outcomes in items)
    cumulative = np.ones((len(items), width))
    effects = np.zeros((len(items), width, physiology.num_needs))
    for i, (name, outcomes) in enumerate(items):
        probabilities = [p for p, _ in outcomes]
        for j, p in enumerate(probabilities):
            check_range(f"items.{name}.outcomes[{j}].probability", p, 0.0, 1.0)
        if abs(sum(probabilities) - 1.0) > 1e-9:
            raise ConfigError(f"items.{name}.outcomes", probabilities, "probabilities summing to 1")
        cumulative[i, :len(outcomes)] = np.cumsum(probabilities)
        for j, (_, effect) in enumerate(outcomes):
            effects[i, j] = physiology.vector(dict(effect))
    return cumulative, effects


@inline_kernel
def draw_outcome(b, item, cumulative, effects, intake, keys, counters):
    """Draw copy ``b``'s outcome of ``item`` and write its intake; return the outcome index.

    One uniform u per step; the outcome is the number of cumulative
    probabilities at or below u (impossible padded outcomes never win).
    """
    u = draw_uniform(keys, counters, b)
    outcome = 0
    for j in range(cumulative.shape[1]):
        if u >= cumulative[item, j]:
            outcome += 1
    outcome = min(outcome, cumulative.shape[1] - 1)
    for k in range(intake.shape[1]):
        intake[b, k] = effects[item, outcome, k]
    return outcome


@inline_kernel
def observe_last_outcome(b, last_outcome, engine):
    """Copy ``b``'s observation: deviations, then what the last item delivered."""
    observe_internal(engine, b)
    observation = engine[OBSERVATION]
    offset = int(engine[OPTIONS][WORLD_OFFSET])
    for k in range(last_outcome.shape[1]):
        observation[b, offset + k] = np.float32(last_outcome[b, k])


@inline_kernel
def record_last_outcome(b, last_outcome, intake, band):
    for k in range(intake.shape[1]):
        last_outcome[b, k] = intake[b, k] / band[k]


@kernel
def _reset(mask, constants, state, engine):
    (last_outcome,) = state
    for b in range(mask.shape[0]):
        if mask[b]:
            reset_body(engine, b)
            for k in range(last_outcome.shape[1]):
                last_outcome[b, k] = 0.0
            observe_last_outcome(b, last_outcome, engine)


@kernel
def _step(actions, constants, state, events, engine):
    cumulative, effects, band = constants
    (last_outcome,) = state
    item_event, outcome_event = events
    intake = engine[INTAKE]
    for b in range(actions.shape[0]):
        item = actions[b]
        outcome_event[b] = draw_outcome(b, item, cumulative, effects, intake, engine[KEYS],
                                        engine[COUNTERS])
        item_event[b] = item
        record_last_outcome(b, last_outcome, intake, band)
    settle_all(engine)
    for b in range(actions.shape[0]):
        observe_last_outcome(b, last_outcome, engine)


@kernel
def _observe(constants, state, engine):
    (last_outcome,) = state
    for b in range(last_outcome.shape[0]):
        observe_last_outcome(b, last_outcome, engine)


class MenuWorld(World):
    """Items are lotteries over outcomes; no space, no time-varying world.

    State: ``last_outcome`` (B, K) what the last item delivered, in band units.
    Events in ``info``: ``item`` taken and ``outcome`` index drawn.
    """

    parameters = {"items": HUT_PANTRY}
    default_needs = ("energy", "water")
    reset_kernel = staticmethod(_reset)
    step_kernel = staticmethod(_step)
    observe_kernel = staticmethod(_observe)

    def __init__(self, physiology: Physiology, items: Sequence = HUT_PANTRY):
        super().__init__(physiology)
        self.items = tuple(items)
        self.item_names = tuple(name for name, _ in self.items)
        self.cumulative, self.effects = outcome_tables(self.items, physiology)
        self.action_space = spaces.Discrete(len(self.items))
        # The world part of the observation: what the last item delivered, in band units.
        self.feature_names = tuple(f"last_outcome/{n}" for n in physiology.names)
        limit = float(np.abs(self.effects).max() / physiology.band.min()) + 1.0
        self.feature_low = np.full(physiology.num_needs, -limit)
        self.feature_high = np.full(physiology.num_needs, limit)

    def constants(self) -> tuple:
        return (self.cumulative, self.effects, self.physiology.band)

    def allocate(self, batch: int) -> dict[str, np.ndarray]:
        return {"last_outcome": np.zeros((batch, self.physiology.num_needs))}

    def allocate_events(self, batch: int) -> dict[str, np.ndarray]:
        return {"item": np.zeros(batch, np.int64), "outcome": np.zeros(batch, np.int64)}

    def text(self, state, index):
        effect = ", ".join(f"{n} {v:+.2f}" for n, v in
                           zip(self.physiology.names, state["last_outcome"][index], strict=True))
        return f"last outcome (band units): {effect}"

    def model(self) -> dict[str, Any]:
        """The known outcome model, for planners and controllers: names, probabilities
        (I, O) and effects (I, O, K) in need units."""
        probabilities = np.diff(self.cumulative, axis=1, prepend=0.0)
        return {"items": self.item_names, "probabilities": probabilities,
                "effects": self.effects}


class MenuEnv(NeedEnv):
    """Menu: pick one item a step; each item changes the needs (some by chance).

    ## Description
    A body with energy and water (by default) sits in an invented mountain hut
    with a small pantry. Each step the agent takes one item: rest, an oatcake,
    meltwater, stove soup (which fails three times in ten) or salted jerky
    (energy at a cost in water). Both needs drain every step; items act at
    once (no gut delay), so the internal state is the whole state and the task
    has an exact finite model on a lattice (``core.finite_model()``). The best
    item depends on the internal state: need-dependent valuation.

    ## Action Space
    ``Discrete(len(items))``: the index of the item taken (0 = rest).

    ## Observation Space
    ``Box(float32)``: the K internal deviations (h - h*)/band, then the K
    amounts the last item delivered, in band units. With
    ``interoception=False`` only the latter.

    ## Rewards
    By default drive reduction r_t = D(h_t) - D(h_{t+1}) with the homeostatic
    drive (n = 3, m = 2) on band-scaled deviations. See ``reward``.

    ## Starting State
    Levels uniform within half a band of the set points; gut empty.

    ## Episode End
    Termination when a need leaves its lethal bounds (+-6 bands); truncation at
    ``max_steps`` (200).

    ## Arguments
    ``items``: a sequence of ``(name, ((probability, {need: amount}), ...))``;
    and the common task arguments (``needbench.envs.task``).

    ## Vectorized environment
    ``gymnasium.make_vec("needbench/Menu-v0", num_envs=N,
    vectorization_mode="vector_entry_point")`` gives :class:`MenuVectorEnv`.

    ## Version History
    * v0: initial version.
    """

    world_cls = MenuWorld
    # Items act at once, so the internal state is the whole state of the task and
    # the exact planner can solve it on a lattice (needbench.envs.lattice).
    defaults = {"max_steps": 200, "need_overrides": {"energy": {"uptake_rate": math.inf}}}


class MenuVectorEnv(NeedVectorEnv):
    """Native vector version of :class:`MenuEnv` (same core, B = num_envs)."""

    world_cls = MenuWorld
    defaults = MenuEnv.defaults
