"""Reward channels: how a change of internal state (and a task's payoff) becomes reward.

Channels (``RewardChannel.kind``):

* ``drive_reduction``: r_t = D(h_t) - D(h_{t+1}), the homeostatic reward of
  Keramati & Gutkin (2014). Its discounted sum equals minus the discounted
  drive up to boundary terms, so maximising it minimises discounted deviation.
* ``negative_drive``: r_t = -D(h_{t+1}).
* ``survival``: r_t = 1 for every step the body is alive after the step.
* ``sensory_estimate``: r_t = D(h_t) - D(h_t + k_hat_t) where the agent
  perceives an outcome k_hat = k + bias for each need it consumed (k != 0),
  while the body changes by the true k. ``bias = 0`` and instant uptake give
  the same reward as ``drive_reduction``.

Palatability: a world may say how palatable the item a copy consumed is, a
number T_t in reward units (0 for every item of a world that says nothing).
Every channel adds ``palatability_weight * T_t`` to its internal value, which
for ``sensory_estimate`` gives the hedonic reward of Keramati & Gutkin (2014),
r_t = D(h_t) - D(h_t + k_hat_t) + T_t: a hyper-palatable item (T > 0) pays
beyond what it does for the needs. ``palatability_weight = 0`` switches the
term off.

Every channel is scaled by ``drive_weight``, and a task's extrinsic reward is
mixed in with ``task_weight``: r = drive_weight * internal + task_weight * task.

The channel also owns what happens at a lethal level, so that every caller
(the task kernels, the planner's lattice model) sees the same reward:
``on_lethal="terminate"`` ends the episode; ``"penalise"`` holds the level
just inside its lethal bounds and the episode goes on; either way
``lethal_penalty`` is subtracted from the reward of every step that ends
outside the bounds. :func:`settle_batch` is that whole assembly.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np

from needbench.envs.compiled import inline_kernel, kernel
from needbench.envs.drives import Drive, drive_of
from needbench.envs.errors import ConfigError, check_choice, check_finite
from needbench.envs.physiology import BAND, LETHAL_HIGH, LETHAL_LOW, BodyState, is_alive

CHANNELS = ("drive_reduction", "negative_drive", "survival", "sensory_estimate")
ON_LETHAL = ("terminate", "penalise")
# Entries of a channel's parameter vector.
KIND, DRIVE_WEIGHT, TASK_WEIGHT, LETHAL_PENALTY, PENALISE, PALATABILITY_WEIGHT = range(6)
DRIVE_REDUCTION, NEGATIVE_DRIVE, SURVIVAL, SENSORY_ESTIMATE = range(4)


class RewardParts(NamedTuple):
    """The pieces of one step's reward, each of shape (B,)."""

    total: np.ndarray
    internal: np.ndarray  # the channel's value before weighting
    task: np.ndarray  # the task's extrinsic reward before weighting
    drive_before: np.ndarray  # D(h_t)
    drive_after: np.ndarray  # D(h_{t+1})


@inline_kernel
def reward_parts(b, level_before, set_point_before, level_after, set_point_after, intake,
                 perceived, has_perceived, alive, task, palatability, drive_before, channel,
                 bias, drive_table, drive_exponents, work):
    """(total, internal, D(h_{t+1})) of copy ``b``; the arrays are (B, K).

    ``palatability`` is the copy's T_t (a number), added to the internal
    value with the channel's weight. ``perceived`` is the outcome as the agent perceives it when
    ``has_perceived``; otherwise the sensory channel perceives ``intake``
    plus the bias of each consumed need. ``work`` is a (1, K) scratch array.
    """
    drive_after = drive_of(level_after, b, set_point_after, b, drive_table, drive_exponents)
    kind = int(channel[KIND])
    if kind == DRIVE_REDUCTION:
        internal = drive_before - drive_after
    elif kind == NEGATIVE_DRIVE:
        internal = -drive_after
    elif kind == SURVIVAL:
        internal = 1.0 if alive else 0.0
    else:
        for k in range(level_before.shape[1]):
            if has_perceived:
                work[0, k] = level_before[b, k] + perceived[b, k]
            else:
                extra = bias[k] if intake[b, k] != 0.0 else 0.0
                work[0, k] = level_before[b, k] + (intake[b, k] + extra)
        internal = drive_before - drive_of(work, 0, set_point_before, b, drive_table,
                                           drive_exponents)
    if palatability != 0.0:  # an exact no-op otherwise, so T = 0 changes no bit
        internal = internal + channel[PALATABILITY_WEIGHT] * palatability
    total = channel[DRIVE_WEIGHT] * internal + channel[TASK_WEIGHT] * task
    return total, internal, drive_after


@kernel
def settle_batch(level_before, set_point_before, level, set_point, intake, perceived,
                 has_perceived, task, palatability, drive, coefficients, channel, bias, drive_table,
                 drive_exponents, work, reward, internal, alive):
    """The outcome of every copy's step once its body has moved to ``level``.

    Decides survival, holds the level inside its bounds under ``penalise``
    (in place), scores the reward and subtracts the lethal penalty. ``drive``
    (B,) holds D(h_t) on entry and D(h_{t+1}) on return; ``reward``,
    ``internal``, ``alive`` (B,) are written; ``task`` and ``palatability``
    (B,) are the world's payoff and the T_t of what each copy consumed.
    """
    penalise = channel[PENALISE] != 0.0
    for b in range(level.shape[0]):
        lives = is_alive(b, level, coefficients)
        if not lives and penalise:
            for k in range(level.shape[1]):
                margin = 1e-6 * coefficients[BAND, k]
                level[b, k] = min(max(level[b, k], coefficients[LETHAL_LOW, k] + margin),
                                  coefficients[LETHAL_HIGH, k] - margin)
        total, value, drive_after = reward_parts(
            b, level_before, set_point_before, level, set_point, intake, perceived,
            has_perceived, lives, task[b], palatability[b], drive[b], channel, bias, drive_table,
            drive_exponents, work)
        if not lives:
            total = total - channel[LETHAL_PENALTY]
        drive[b] = drive_after
        reward[b] = total
        internal[b] = value
        alive[b] = lives


@kernel
def _compute(level_before, set_point_before, level_after, set_point_after, intake, perceived,
             has_perceived, alive, task, palatability, drive_before, channel, bias, drive_table,
             drive_exponents, work, total, internal, drive_after):
    for b in range(level_before.shape[0]):
        total[b], internal[b], drive_after[b] = reward_parts(
            b, level_before, set_point_before, level_after, set_point_after, intake, perceived,
            has_perceived, alive[b], task[b], palatability[b], drive_before[b], channel, bias,
            drive_table, drive_exponents, work)


class Outcome(NamedTuple):
    """What one step ends in, for B bodies (see :meth:`RewardChannel.outcome`)."""

    reward: np.ndarray  # (B,) the reward paid, lethal penalty included
    internal: np.ndarray  # (B,) the channel's value before weighting
    drive_before: np.ndarray  # (B,) D(h_t)
    drive_after: np.ndarray  # (B,) D(h_{t+1})
    alive: np.ndarray  # (B,) inside the lethal bounds after the step
    body: BodyState  # after the step, held inside the bounds under "penalise"


@dataclass(frozen=True)
class RewardChannel:
    """How reward is made from the internal state and the task's payoff.

    Attributes:
        kind: one of ``drive_reduction``, ``negative_drive``, ``survival``,
            ``sensory_estimate``.
        drive_weight: weight of the internal (drive-derived) part.
        task_weight: weight of the task's extrinsic reward.
        bias: for ``sensory_estimate``, the perceived extra per consumed need,
            one number per need (or a single number for all needs).
        on_lethal: ``"terminate"`` or ``"penalise"`` (see the module docstring).
        lethal_penalty: subtracted from the reward of a step that ends at a
            lethal level (finite, >= 0).
        palatability_weight: weight of the palatability T_t of the item
            consumed, added to the internal value (finite; 0 switches it off).
    """

    kind: str = "drive_reduction"
    drive_weight: float = 1.0
    task_weight: float = 0.0
    bias: float | Sequence[float] = field(default=0.0)
    on_lethal: str = "terminate"
    lethal_penalty: float = 0.0
    palatability_weight: float = 1.0

    def __post_init__(self) -> None:
        check_choice("reward.kind", self.kind, CHANNELS)
        check_choice("on_lethal", self.on_lethal, ON_LETHAL)
        check_finite("reward.drive_weight", self.drive_weight)
        check_finite("reward.task_weight", self.task_weight)
        check_finite("reward.palatability_weight", self.palatability_weight)
        if check_finite("lethal_penalty", self.lethal_penalty) < 0:
            raise ConfigError("lethal_penalty", self.lethal_penalty, "a finite number >= 0")
        try:
            bias = np.asarray(self.bias, dtype=np.float64)
        except (TypeError, ValueError):
            bias = np.array([math.nan])
        if bias.ndim > 1 or not np.all(np.isfinite(bias)):
            raise ConfigError("reward.bias", self.bias, "a finite number or one per need")
        if bias.ndim == 1:
            object.__setattr__(self, "bias", tuple(float(b) for b in bias))

    def parameters(self, num_needs: int) -> tuple[np.ndarray, np.ndarray]:
        """The kernel's (6,) parameter vector and (K,) bias row of this channel."""
        bias = np.asarray(self.bias, dtype=np.float64)
        if bias.ndim == 1 and bias.shape[0] != num_needs:
            raise ConfigError("sensory_bias", self.bias,
                              f"one number, or a list of {num_needs} numbers (one per need)")
        vector = np.array([CHANNELS.index(self.kind), self.drive_weight, self.task_weight,
                           self.lethal_penalty, self.on_lethal == "penalise",
                           self.palatability_weight], dtype=np.float64)
        return vector, np.ascontiguousarray(np.broadcast_to(bias, (num_needs,)))

    def _inputs(self, before: BodyState, after_level, intake, task, perceived, palatability):
        level = np.asarray(before.level, dtype=np.float64)
        batch, k = level.shape
        zeros = np.zeros((batch, k))
        intake = zeros if intake is None else np.asarray(intake, dtype=np.float64)
        has_perceived = perceived is not None
        perceived = zeros if perceived is None else np.asarray(perceived, dtype=np.float64)
        task = np.zeros(batch) if task is None else np.asarray(task, dtype=np.float64)
        palatability = np.zeros(batch) if palatability is None else np.asarray(
            palatability, dtype=np.float64)
        return (level, np.asarray(before.set_point, np.float64), intake, perceived,
                has_perceived, np.broadcast_to(task, (batch,)).copy(),
                np.broadcast_to(palatability, (batch,)).copy())

    def compute(
        self,
        drive: Drive,
        before: BodyState,
        after: BodyState,
        *,
        intake: np.ndarray | None = None,
        alive: np.ndarray | None = None,
        task: np.ndarray | None = None,
        perceived: np.ndarray | None = None,
        drive_before: np.ndarray | None = None,
        palatability: np.ndarray | None = None,
    ) -> RewardParts:
        """One step's reward for B bodies, before any lethal penalty.

        Args:
            drive: the task's drive object.
            before, after: body states at t and t+1.
            intake: (B, K) true outcome consumed this step (for sensory_estimate).
            alive: (B,) alive after the step (for survival); default all alive.
            task: (B,) extrinsic reward; default zeros.
            perceived: (B, K) outcome as the agent perceives it, for
                sensory_estimate; overrides ``intake + bias`` when a task
                decides per item what is misperceived.
            drive_before: D(h_t) when the caller already has it.
            palatability: (B,) T_t of what each body consumed; default zeros.
        """
        level, set_point, intake, perceived, has_perceived, task, palatability = self._inputs(
            before, after.level, intake, task, perceived, palatability)
        batch, k = level.shape
        d_before = drive(level, set_point) if drive_before is None else np.asarray(
            drive_before, np.float64)
        alive = np.ones(batch, np.bool_) if alive is None else np.asarray(alive, np.bool_)
        channel, bias = self.parameters(k)
        total, internal, d_after = np.empty(batch), np.empty(batch), np.empty(batch)
        _compute(level, set_point, np.asarray(after.level, np.float64),
                 np.asarray(np.broadcast_to(after.set_point, (batch, k)), np.float64), intake,
                 perceived, has_perceived, alive, task, palatability, d_before, channel, bias,
                 drive.table(k), drive.exponents, np.empty((1, k)), total, internal, d_after)
        return RewardParts(total, internal, task, d_before, d_after)

    def outcome(self, physiology, drive: Drive, before: BodyState, after: BodyState, *,
                intake: np.ndarray | None = None, task: np.ndarray | None = None,
                perceived: np.ndarray | None = None,
                palatability: np.ndarray | None = None) -> Outcome:
        """The whole outcome of a step for B bodies, as a task step assembles it:
        survival, holding at the bounds under ``penalise``, reward and penalty.

        ``after`` is the body as the physiology moved it (not yet held)."""
        level, set_point, intake, perceived, has_perceived, task, palatability = self._inputs(
            before, after.level, intake, task, perceived, palatability)
        batch, k = level.shape
        held = np.array(after.level, dtype=np.float64)
        after_set_point = np.array(np.broadcast_to(after.set_point, (batch, k)), np.float64)
        channel, bias = self.parameters(k)
        total, internal, alive = np.empty(batch), np.empty(batch), np.empty(batch, np.bool_)
        d_before = drive(level, set_point)
        d_after = d_before.copy()
        settle_batch(level, set_point, held, after_set_point, intake, perceived, has_perceived,
                     task, palatability, d_after, physiology.coefficients, channel, bias,
                     drive.table(k), drive.exponents, np.empty((1, k)), total, internal, alive)
        return Outcome(total, internal, d_before, d_after, alive,
                       BodyState(held, np.asarray(after.gut), after_set_point))
