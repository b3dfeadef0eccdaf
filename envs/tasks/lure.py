"""Lure: some items reward otherwise than they nourish: hyper-palatable or misperceived."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from needbench.envs.compiled import kernel
from needbench.envs.engine import COUNTERS, INTAKE, KEYS, PALATABILITY, PERCEIVED, settle_all
from needbench.envs.errors import ConfigError, check_choice, check_finite
from needbench.envs.physiology import Physiology
from needbench.envs.task import NeedEnv, NeedVectorEnv
from needbench.envs.tasks.menu import (
    MenuWorld,
    draw_outcome,
    observe_last_outcome,
    record_last_outcome,
)

#: The stalls of an invented winter fair on a frozen lake: lotteries over
#: outcomes, (probability, {need: amount}) in band units of the abstract preset.
FAIR_STALLS: tuple[tuple[str, tuple[tuple[float, Mapping[str, float]], ...]], ...] = (
    ("rest", ((1.0, {}),)),
    ("rye bun", ((1.0, {"energy": 0.8}),)),
    ("well water", ((1.0, {"water": 0.8}),)),
    # Rich and sweet: the lure of the fair (FAIR_LURE_KINDS: how it lures).
    ("honey fudge", ((1.0, {"energy": 1.0}),)),
)

#: How the senses misjudge each lure item: {item: {need: bias}}, so that the
#: perceived outcome is k_hat = k + bias. The fudge's energy is under-registered.
FAIR_LURES: Mapping[str, Mapping[str, float]] = {"honey fudge": {"energy": -0.6}}

#: How palatable each item is: {item: T}, the reward paid beyond what the item
#: does for the needs (reward units). The fudge is hyper-palatable.
FAIR_PALATABILITY: Mapping[str, float] = {"honey fudge": 0.5}

#: The two ways the fudge lures, chosen by the ``lure`` keyword: the
#: ``(lures, palatability)`` used where those keywords are not given.
#: ``"palatable"`` (the default since v1): perceived exactly, palatability 0.5;
#: ``"under_registered"`` (the v0 fudge): no palatability, energy bias -0.6.
FAIR_LURE_KINDS: Mapping[str, tuple[Mapping[str, Mapping[str, float]], Mapping[str, float]]] = {
    "palatable": ({}, FAIR_PALATABILITY),
    "under_registered": (FAIR_LURES, {}),
}


@kernel
def _step(actions, constants, state, events, engine):
    cumulative, effects, band, perceived_effects, is_lure, palatability_table = constants
    (last_outcome,) = state
    item_event, outcome_event, lure_event, perceived_event, palatability_event = events
    intake, perceived, palatability = engine[INTAKE], engine[PERCEIVED], engine[PALATABILITY]
    for b in range(actions.shape[0]):
        item = actions[b]
        outcome = draw_outcome(b, item, cumulative, effects, intake, engine[KEYS],
                               engine[COUNTERS])
        for k in range(intake.shape[1]):
            perceived[b, k] = perceived_effects[item, outcome, k]
            perceived_event[b, k] = perceived_effects[item, outcome, k]
        palatability[b] = palatability_table[item, outcome]
        palatability_event[b] = palatability_table[item, outcome]
        item_event[b] = item
        outcome_event[b] = outcome
        lure_event[b] = is_lure[item]
        record_last_outcome(b, last_outcome, intake, band)
    settle_all(engine)
    for b in range(actions.shape[0]):
        observe_last_outcome(b, last_outcome, engine)


class LureWorld(MenuWorld):
    """Menu items with a per-item palatability and a per-item perception bias.

    The body receives the true outcome k; the reward channel is handed the
    perceived outcome k_hat = k + bias, where ``bias`` is zero for honest
    items, so they are perceived exactly, and the item's palatability T
    (zero for plain items), which it adds to the reward. Bias and
    palatability apply to every outcome of an item that delivers anything (an
    empty outcome is perceived as empty and pays no palatability). An item is
    a lure when it has a bias or a palatability.

    ``lure`` picks the default ``lures`` and ``palatability`` from
    :data:`FAIR_LURE_KINDS` (for those of its items the menu has); either
    keyword given explicitly wins.
    """

    parameters = {"items": FAIR_STALLS, "lure": "palatable", "lures": None, "palatability": None}
    default_needs = ("energy", "water")
    has_perceived = True
    step_kernel = staticmethod(_step)

    def __init__(self, physiology: Physiology, items: Sequence = FAIR_STALLS,
                 lure: str = "palatable",
                 lures: Mapping[str, Mapping[str, float]] | None = None,
                 palatability: Mapping[str, float] | None = None):
        super().__init__(physiology, items)
        check_choice("lure", lure, tuple(FAIR_LURE_KINDS))
        # The kind's defaults name the fair's own fudge: with other items they
        # apply to those of the fair's items present; explicit keywords are checked.
        default_lures, default_palatability = FAIR_LURE_KINDS[lure]
        if lures is None:
            lures = {n: v for n, v in default_lures.items() if n in self.item_names}
        if palatability is None:
            palatability = {n: v for n, v in default_palatability.items()
                            if n in self.item_names}
        if not isinstance(lures, Mapping):
            raise ConfigError("lures", lures, "a mapping {item name: {need: bias}}")
        self.bias = np.zeros((len(self.item_names), physiology.num_needs))
        for name, bias in lures.items():
            if name not in self.item_names:
                raise ConfigError("lures", name, "an item name: " + ", ".join(self.item_names))
            if not isinstance(bias, Mapping):
                raise ConfigError(f"lures.{name}", bias, "a mapping {need: bias}")
            for need, value in bias.items():
                check_finite(f"lures.{name}.{need}", value)
            self.bias[self.item_names.index(name)] = physiology.vector(dict(bias))
        if not isinstance(palatability, Mapping):
            raise ConfigError("palatability", palatability, "a mapping {item name: T}")
        self.palatability = np.zeros(len(self.item_names))
        for name, value in palatability.items():
            if name not in self.item_names:
                raise ConfigError("palatability", name,
                                  "an item name: " + ", ".join(self.item_names))
            self.palatability[self.item_names.index(name)] = check_finite(
                f"palatability.{name}", value)
        self.is_lure = np.any(self.bias != 0, axis=1) | (self.palatability != 0)
        # Perceived outcomes and palatability of every (item, outcome): empty
        # outcomes stay empty and pay nothing.
        delivers = np.any(self.effects != 0, axis=2, keepdims=True)
        self.perceived_effects = self.effects + np.where(delivers, self.bias[:, None, :], 0.0)
        self.outcome_palatability = np.where(delivers[:, :, 0], self.palatability[:, None], 0.0)

    def constants(self) -> tuple:
        return (*super().constants(), self.perceived_effects, self.is_lure,
                self.outcome_palatability)

    def allocate_events(self, batch: int) -> dict[str, np.ndarray]:
        return {**super().allocate_events(batch), "lure": np.zeros(batch, np.bool_),
                "perceived_intake": np.zeros((batch, self.physiology.num_needs)),
                "palatability": np.zeros(batch)}

    def text(self, state, index):
        lures = ", ".join(n for n, lure in zip(self.item_names, self.is_lure, strict=True) if lure)
        return f"lures: {lures or 'none'}\n{super().text(state, index)}"

    def model(self) -> dict[str, Any]:
        """The outcome model of :meth:`MenuWorld.model` plus ``perceived_effects``
        (I, O, K), the outcomes as the reward channel perceives them,
        ``palatability`` (I, O), the T each outcome pays, and ``lure`` (I,) bool."""
        return {**super().model(), "perceived_effects": self.perceived_effects,
                "palatability": self.outcome_palatability, "lure": self.is_lure}


class LureEnv(NeedEnv):
    """Lure: one fair stall sells a sweet that rewards beyond what it nourishes.

    ## Description
    A visitor to an invented winter fair on a frozen lake chooses each step
    between resting, a rye bun (+0.8 band of energy), a cup of well water
    (+0.8 band of water) and honey fudge (+1.0 band of energy). The body gets
    the true outcome k; the reward is computed from the perceived outcome
    k_hat = k + bias (exact unless ``lures`` gives a bias) plus the item's
    palatability T (``palatability``, zero for plain items). By default the
    fudge is hyper-palatable: perceived exactly, with T = 0.5, so that near
    the set point it pays more than the overshoot it causes costs, the
    overconsumption of palatable food of Keramati & Gutkin (2014). With
    ``lure="under_registered"`` the fudge is the v0 lure instead: no
    palatability, its energy perceived as k_hat = 0.4 (bias -0.6), so the
    senses miss most of the overshoot it causes. Either way the task probes a
    persistent deviation caused by the reward channel, not by the body.

    Measured with a greedy one-step agent that picks the item with the best
    expected reward under the env's own reward channel (16 seeds, 200 steps,
    mean energy deviation over the last 100 steps; ``greedy_run`` in
    ``tests/test_lure.py``): with the palatable fudge it sits at +0.23 band
    (every seed between +0.21 and +0.27), and the excess grows with T
    (T = 0: -0.04, 0.25: +0.11, 1.0: +0.56 band); with the under-registered
    fudge at +0.28 band (every seed between +0.27 and +0.29); the same agent
    on honest drive reduction (``reward="drive_reduction",
    palatability_weight=0``) eats buns and sits at -0.02 band. The sign of a
    bias matters: with the drive-reduction form r = D(h) - D(h + k_hat), an
    item perceived as *more* nourishing than it is (bias > 0 on the need it
    feeds) makes a greedy agent stop short of the set point, so it stays
    hungry (a floss of true energy 0.2 perceived as 0.6 in place of the
    fudge: -0.22 band, 0.00 on honest drive reduction). Food acts at once
    here (energy ``uptake_rate`` = inf in the default ``need_overrides``):
    with the preset's gut delay the honest one-step greedy agent itself
    overshoots (+0.20 band, it does not see the food still in the gut), which
    would confound the lure's effect.

    ## Action Space
    ``Discrete(len(items))``: the index of the item taken (0 = rest).

    ## Observation Space
    ``Box(float32, (2 K,))``: the K internal deviations (h - h*)/band, then
    the K true amounts the last item delivered, in band units. With
    ``interoception=False`` only the latter. K = 2 (energy, water) by default.

    ## Rewards
    ``sensory_estimate`` with palatability: r_t = D(h_t) - D(h_t + k_hat_t)
    + T_t with the homeostatic drive (n = 3, m = 2) on band-scaled
    deviations, where k_hat is the perceived outcome
    (``info["perceived_intake"]``) and T the palatability of the item taken
    (``info["palatability"]``), weighted by ``palatability_weight`` (1). With
    ``reward="drive_reduction", palatability_weight=0`` the same task pays the
    honest D(h_t) - D(h_{t+1}).

    ## Starting State
    Levels uniform within half a band of the set points.

    ## Episode End
    Termination when a need leaves its lethal bounds (+-6 bands); truncation
    at ``max_steps`` (200).

    ## Arguments
    ``items``: a sequence of ``(name, ((probability, {need: amount}), ...))``
    as in Menu; ``lure``: ``"palatable"`` (default) or
    ``"under_registered"``, which picks the defaults of the next two;
    ``palatability``: ``{item name: T}``, the reward each item pays beyond
    its effect on the needs; ``lures``: ``{item name: {need: bias}}``, the
    perceived extra (negative: under-registered) of each item. Bias and
    palatability apply to every outcome that delivers something. And the
    common task arguments (``needbench.envs.task``). ``info`` adds ``item``,
    ``outcome``, ``lure`` (a lure item was taken), ``perceived_intake`` (K,)
    and ``palatability``.

    ## Vectorized environment
    ``gymnasium.make_vec("needbench/Lure-v1", num_envs=N,
    vectorization_mode="vector_entry_point")`` gives :class:`LureVectorEnv`.

    ## Version History
    * v1: the default fudge is hyper-palatable (palatability T = 0.5, perceived
      exactly); v0's under-registered fudge is ``lure="under_registered"``.
    * v0: initial version.
    """

    world_cls = LureWorld
    defaults = {"max_steps": 200, "reward": "sensory_estimate",
                "need_overrides": {"energy": {"uptake_rate": math.inf}}}


class LureVectorEnv(NeedVectorEnv):
    """Native vector version of :class:`LureEnv` (same core, B = num_envs)."""

    world_cls = LureWorld
    defaults = LureEnv.defaults
