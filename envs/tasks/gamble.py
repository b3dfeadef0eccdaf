"""Gamble: a sure small catch or a risky big one of equal mean; risk attitude under deprivation."""

from __future__ import annotations

from typing import Any

import numpy as np

from needbench.envs.compiled import kernel
from needbench.envs.drives import Drive
from needbench.envs.engine import COUNTERS, INTAKE, KEYS, settle_all
from needbench.envs.errors import ConfigError, check_positive, check_range
from needbench.envs.physiology import BodyState, Physiology
from needbench.envs.task import NeedEnv, NeedVectorEnv
from needbench.envs.tasks.menu import (
    MenuWorld,
    draw_outcome,
    observe_last_outcome,
    record_last_outcome,
)

#: Item indices of the skiff's three choices (the action values).
REST, HANDLINE, DEEP_NET = 0, 1, 2


def skiff_items(need: str, safe_amount: float, risky_probability: float) -> tuple:
    """The three lotteries of the invented fishing skiff, in the form MenuWorld reads.

    ``handline`` delivers ``safe_amount`` of ``need`` for sure; ``deep net``
    delivers ``safe_amount / risky_probability`` with probability
    ``risky_probability`` and nothing otherwise, so both have the same mean.
    """
    return (
        ("rest", ((1.0, {}),)),
        ("handline", ((1.0, {need: safe_amount}),)),
        ("deep net", ((risky_probability, {need: safe_amount / risky_probability}),
                      (1.0 - risky_probability, {}))),
    )


@kernel
def _step(actions, constants, state, events, engine):
    cumulative, effects, band, deep_net = constants
    (last_outcome,) = state
    item_event, outcome_event, risky_event = events
    intake = engine[INTAKE]
    for b in range(actions.shape[0]):
        item = actions[b]
        outcome_event[b] = draw_outcome(b, item, cumulative, effects, intake, engine[KEYS],
                                        engine[COUNTERS])
        item_event[b] = item
        risky_event[b] = item == deep_net
        record_last_outcome(b, last_outcome, intake, band)
    settle_all(engine)
    for b in range(actions.shape[0]):
        observe_last_outcome(b, last_outcome, engine)


class GambleWorld(MenuWorld):
    """Three lotteries (rest, sure, risky with the same mean) over one need.

    Reuses :class:`~needbench.envs.tasks.menu.MenuWorld` for drawing outcomes, the
    observation (what the last choice delivered) and :meth:`model`.
    """

    parameters = {"need": "energy", "safe_amount": 0.5, "risky_probability": 1.0 / 3.0}
    default_needs = ("energy",)
    step_kernel = staticmethod(_step)

    def __init__(self, physiology: Physiology, need: str = "energy", safe_amount: float = 0.5,
                 risky_probability: float = 1.0 / 3.0):
        if need not in physiology.names:
            raise ConfigError("need", need, "a need of this body: " + ", ".join(physiology.names))
        safe_amount = check_positive("safe_amount", safe_amount)
        # p = 1 would make the two options the same lottery; p = 0 an empty one.
        risky_probability = check_range("risky_probability", risky_probability, 0.0, 1.0,
                                        closed=False)
        super().__init__(physiology, skiff_items(need, safe_amount, risky_probability))
        self.need = need
        self.safe_amount = safe_amount
        self.risky_probability = risky_probability

    def constants(self) -> tuple:
        return (*super().constants(), DEEP_NET)

    def allocate_events(self, batch: int) -> dict[str, np.ndarray]:
        return {**super().allocate_events(batch), "risky": np.zeros(batch, np.bool_)}

    def expected_drive_reduction(self, drive: Drive, body: BodyState) -> np.ndarray:
        """(B, 3) expected one-step drive reduction E[D(h_t) - D(h_{t+1})] of each choice.

        The expectation is exact over the outcome lotteries: every outcome's next
        body comes from the physiology's own transition (gut delay, drain and
        couplings included) and is scored with the task's own ``drive``
        (``env.unwrapped.core.drive``). Bodies with noise are refused, since
        their expectation is not a finite sum.
        """
        if self.physiology.noisy:
            raise ConfigError("needs.noise", "> 0", "noise-free needs for an exact expectation")
        probabilities = self.model()["probabilities"]  # (I, O)
        items, outcomes = probabilities.shape
        batch, k = body.level.shape
        copies = batch * items * outcomes

        def spread(array: np.ndarray) -> np.ndarray:
            return np.broadcast_to(array[:, None, None, :], (batch, items, outcomes, k)
                                   ).reshape(copies, k)

        before = BodyState(spread(body.level), spread(body.gut), spread(body.set_point))
        intake = np.broadcast_to(self.effects[None], (batch, items, outcomes, k)).reshape(copies, k)
        after = self.physiology.transition(before, None, intake=intake,
                                           activity=np.zeros(copies))
        reduction = (drive(before.level, before.set_point)
                     - drive(after.level, after.set_point)).reshape(batch, items, outcomes)
        return np.sum(reduction * probabilities[None], axis=2)

    def text(self, state, index):
        odds = 1.0 / self.risky_probability
        return f"handline: sure; deep net: 1 in {odds:.3g}\n{super().text(state, index)}"

    def model(self) -> dict[str, Any]:
        """The outcome model (see :meth:`MenuWorld.model`) plus the item indices."""
        return {**super().model(), "safe": HANDLINE, "risky": DEEP_NET, "rest": REST}


class GambleEnv(NeedEnv):
    """Gamble: a sure small catch or a risky large one with the same mean.

    ## Description
    A fisher in an invented skiff chooses each step between resting, the
    handline (a small catch every time: ``safe_amount`` = 0.5 band of energy)
    and the deep net (a haul three times as big one time in three, nothing
    otherwise). Both catches have the same mean, so a risk-neutral agent is
    indifferent between them; the task probes risk attitude as a function of
    deprivation. Energy drains every step and reaches the body through the gut.

    What drive reduction predicts (computed with
    :meth:`GambleWorld.expected_drive_reduction`, i.e. the task's own physiology
    and drive, from an empty gut; ``d`` is the energy deficit in bands): the
    safe choice has the larger expected one-step reward at *every* deficit.
    The homeostatic drive with n = 3, m = 2 is convex in the level and the
    next level is affine in the dose, so by Jensen's inequality the reward is
    concave in dose. The margin E[r | safe] - E[r | risky] is 0.071 at d = 0,
    peaks at 0.141 near d = 0.19, and falls to 0.034 at d = 1, 0.017 at d = 3
    and 0.013 at d = 5.5: deprivation weakens risk aversion (far below the set
    point the margin shrinks roughly like d^(-1/2)) but never turns it into
    risk seeking. The preference does flip with a drive that is concave in the
    deviation, e.g. ``drive_params={"n": 1, "m": 2}`` (D = |d|^(1/2) for one
    need): the risky net is then preferred at every deficit above d = 0.50
    (margin -0.031 at d = 0.75, -0.002 at d = 3) and at the set point itself,
    and the sure line only for 0.03 < d < 0.50 (margin +0.36 at d = 0.2).

    ## Action Space
    ``Discrete(3)``: 0 rest, 1 handline (safe), 2 deep net (risky).

    ## Observation Space
    ``Box(float32, (2 K,))``: the K internal deviations (h - h*)/band, then
    the K amounts the last choice delivered, in band units (bounded by
    +-(safe_amount / risky_probability + 1)). With ``interoception=False``
    only the latter. K = 1 (energy) by default.

    ## Rewards
    Drive reduction r_t = D(h_t) - D(h_{t+1}) with the homeostatic drive
    (n = 3, m = 2) on band-scaled deviations. See ``reward``.

    ## Starting State
    Energy uniform in [-3, 0.5] bands, so episodes start across a range of
    deprivations; gut empty. (Set by the default ``need_overrides``; passing
    ``need_overrides`` replaces it.)

    ## Episode End
    Termination when energy leaves its lethal bounds (+-6 bands); truncation
    at ``max_steps`` (200).

    ## Arguments
    ``need`` (default ``"energy"``): the need both catches feed;
    ``safe_amount`` (> 0, default 0.5): the sure amount, in the need's unit;
    ``risky_probability`` (in (0, 1), default 1/3): chance of the big haul,
    which is ``safe_amount / risky_probability``; and the common task
    arguments (``needbench.envs.task``). ``info`` adds ``item``, ``outcome``
    (0 = the haul came in) and ``risky`` (the deep net was cast).

    ## Vectorized environment
    ``gymnasium.make_vec("needbench/Gamble-v0", num_envs=N,
    vectorization_mode="vector_entry_point")`` gives :class:`GambleVectorEnv`.

    ## Version History
    * v0: initial version.
    """

    world_cls = GambleWorld
    defaults = {"max_steps": 200,
                "need_overrides": {"energy": {"initial_low": -3.0, "initial_high": 0.5}}}


class GambleVectorEnv(NeedVectorEnv):
    """Native vector version of :class:`GambleEnv` (same core, B = num_envs)."""

    world_cls = GambleWorld
    defaults = GambleEnv.defaults
