"""Lure: some items are perceived otherwise than they nourish; reward follows perception."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from needbench.envs.compiled import kernel
from needbench.envs.engine import COUNTERS, INTAKE, KEYS, PERCEIVED, settle_all
from needbench.envs.errors import ConfigError, check_finite
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
    # Rich, yet light on the tongue: the senses register little of its energy.
    ("honey fudge", ((1.0, {"energy": 1.0}),)),
)

#: How the senses misjudge each lure item: {item: {need: bias}}, so that the
#: perceived outcome is k_hat = k + bias. The fudge's energy is under-registered.
FAIR_LURES: Mapping[str, Mapping[str, float]] = {"honey fudge": {"energy": -0.6}}


@kernel
def _step(actions, constants, state, events, engine):
    cumulative, effects, band, perceived_effects, is_lure = constants
    (last_outcome,) = state
    item_event, outcome_event, lure_event, perceived_event = events
    intake, perceived = engine[INTAKE], engine[PERCEIVED]
    for b in range(actions.shape[0]):
        item = actions[b]
        outcome = draw_outcome(b, item, cumulative, effects, intake, engine[KEYS],
                               engine[COUNTERS])
        for k in range(intake.shape[1]):
            perceived[b, k] = perceived_effects[item, outcome, k]
            perceived_event[b, k] = perceived_effects[item, outcome, k]
        item_event[b] = item
        outcome_event[b] = outcome
        lure_event[b] = is_lure[item]
        record_last_outcome(b, last_outcome, intake, band)
    settle_all(engine)
    for b in range(actions.shape[0]):
        observe_last_outcome(b, last_outcome, engine)


class LureWorld(MenuWorld):
    """Menu items whose perceived outcome is the true one plus a per-item bias.

    The body receives the true outcome k; the reward channel is handed the
    perceived outcome k_hat = k + bias (Effects.perceived), where ``bias`` is
    zero for honest items, so they are perceived exactly. The bias applies to
    every outcome of a lure item that delivers anything (an empty outcome is
    perceived as empty).
    """

    parameters = {"items": FAIR_STALLS, "lures": FAIR_LURES}
    default_needs = ("energy", "water")
    has_perceived = True
    step_kernel = staticmethod(_step)

    def __init__(self, physiology: Physiology, items: Sequence = FAIR_STALLS,
                 lures: Mapping[str, Mapping[str, float]] = FAIR_LURES):
        super().__init__(physiology, items)
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
        self.is_lure = np.any(self.bias != 0, axis=1)
        # Perceived outcomes of every (item, outcome): empty outcomes stay empty.
        delivers = np.any(self.effects != 0, axis=2, keepdims=True)
        self.perceived_effects = self.effects + np.where(delivers, self.bias[:, None, :], 0.0)

    def constants(self) -> tuple:
        return (*super().constants(), self.perceived_effects, self.is_lure)

    def allocate_events(self, batch: int) -> dict[str, np.ndarray]:
        return {**super().allocate_events(batch), "lure": np.zeros(batch, np.bool_),
                "perceived_intake": np.zeros((batch, self.physiology.num_needs))}

    def text(self, state, index):
        lures = ", ".join(n for n, lure in zip(self.item_names, self.is_lure, strict=True) if lure)
        return f"lures: {lures or 'none'}\n{super().text(state, index)}"

    def model(self) -> dict[str, Any]:
        """The outcome model of :meth:`MenuWorld.model` plus ``perceived_effects``
        (I, O, K), the outcomes as the reward channel perceives them, and
        ``lure`` (I,) bool."""
        return {**super().model(), "perceived_effects": self.perceived_effects,
                "lure": self.is_lure}


class LureEnv(NeedEnv):
    """Lure: one fair stall sells a sweet whose energy the senses under-register.

    ## Description
    A visitor to an invented winter fair on a frozen lake chooses each step
    between resting, a rye bun (+0.8 band of energy), a cup of well water
    (+0.8 band of water) and honey fudge (+1.0 band of energy). The body gets
    the true outcome k; the reward is computed from the perceived outcome
    k_hat = k + bias, which is exact for the honest items and, for the lure,
    carries a per-need bias (``lures``). The default fudge is perceived as
    k_hat = 0.4 (bias -0.6): near the set point it seems far more rewarding
    than it is, because the senses miss most of the overshoot it causes. The
    task probes overconsumption and a persistent deviation caused by the
    reward channel, not by the body.

    Measured with a greedy one-step agent that picks the item with the best
    expected reward under the env's own reward channel (16 seeds, 200 steps,
    mean energy deviation over the last 100 steps): on the perceived reward it
    eats fudge as soon as energy is 0.2 band below the set point and sits at
    +0.28 band (every seed between +0.27 and +0.29); the same agent on honest
    drive reduction eats buns and sits at -0.02 band. The sign matters: with
    the drive-reduction form r = D(h) - D(h + k_hat), an item perceived as
    *more* nourishing than it is (bias > 0 on the need it feeds) makes a
    greedy agent stop short of the set point, so it stays hungry (a floss of
    true energy 0.2 perceived as 0.6 in place of the fudge: -0.22 band, 0.00
    on honest drive reduction). Food acts at once here (energy ``uptake_rate`` = inf in the
    default ``need_overrides``): with the preset's gut delay the honest
    one-step greedy agent itself overshoots (+0.20 band, it does not see the
    food still in the gut), which would confound the lure's effect.

    ## Action Space
    ``Discrete(len(items))``: the index of the item taken (0 = rest).

    ## Observation Space
    ``Box(float32, (2 K,))``: the K internal deviations (h - h*)/band, then
    the K true amounts the last item delivered, in band units. With
    ``interoception=False`` only the latter. K = 2 (energy, water) by default.

    ## Rewards
    ``sensory_estimate``: r_t = D(h_t) - D(h_t + k_hat_t) with the
    homeostatic drive (n = 3, m = 2) on band-scaled deviations, where k_hat
    is the perceived outcome (``info["perceived_intake"]``). With
    ``reward="drive_reduction"`` the same task pays the honest
    D(h_t) - D(h_{t+1}).

    ## Starting State
    Levels uniform within half a band of the set points.

    ## Episode End
    Termination when a need leaves its lethal bounds (+-6 bands); truncation
    at ``max_steps`` (200).

    ## Arguments
    ``items``: a sequence of ``(name, ((probability, {need: amount}), ...))``
    as in Menu; ``lures``: ``{item name: {need: bias}}``, the perceived extra
    (negative: under-registered) of each lure item, applied to every outcome
    that delivers something; and the common task arguments
    (``needbench.envs.task``). ``info`` adds ``item``, ``outcome``, ``lure``
    (a lure item was taken) and ``perceived_intake`` (K,).

    ## Vectorized environment
    ``gymnasium.make_vec("needbench/Lure-v0", num_envs=N,
    vectorization_mode="vector_entry_point")`` gives :class:`LureVectorEnv`.

    ## Version History
    * v0: initial version.
    """

    world_cls = LureWorld
    defaults = {"max_steps": 200, "reward": "sensory_estimate",
                "need_overrides": {"energy": {"uptake_rate": math.inf}}}


class LureVectorEnv(NeedVectorEnv):
    """Native vector version of :class:`LureEnv` (same core, B = num_envs)."""

    world_cls = LureWorld
    defaults = LureEnv.defaults
