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

Every channel is scaled by ``drive_weight``, and a task's extrinsic reward is
mixed in with ``task_weight``: r = drive_weight * internal + task_weight * task.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np

from needbench.envs.drives import Drive
from needbench.envs.errors import ConfigError, check_choice, check_finite
from needbench.envs.physiology import BodyState

CHANNELS = ("drive_reduction", "negative_drive", "survival", "sensory_estimate")


class RewardParts(NamedTuple):
    """The pieces of one step's reward, each of shape (B,)."""

    total: np.ndarray
    internal: np.ndarray  # the channel's value before weighting
    task: np.ndarray  # the task's extrinsic reward before weighting
    drive_before: np.ndarray  # D(h_t)
    drive_after: np.ndarray  # D(h_{t+1})


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
    """

    kind: str = "drive_reduction"
    drive_weight: float = 1.0
    task_weight: float = 0.0
    bias: float | Sequence[float] = field(default=0.0)

    def __post_init__(self) -> None:
        check_choice("reward.kind", self.kind, CHANNELS)
        check_finite("reward.drive_weight", self.drive_weight)
        check_finite("reward.task_weight", self.task_weight)
        bias = np.asarray(self.bias, dtype=np.float64)
        if bias.ndim > 1 or not np.all(np.isfinite(bias)):
            raise ConfigError("reward.bias", self.bias, "a finite number or one per need")
        if bias.ndim == 1:
            object.__setattr__(self, "bias", tuple(float(b) for b in bias))

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
    ) -> RewardParts:
        """One step's reward for B bodies.

        Args:
            drive: the task's drive object.
            before, after: body states at t and t+1.
            intake: (B, K) true outcome consumed this step (for sensory_estimate).
            alive: (B,) alive after the step (for survival); default all alive.
            task: (B,) extrinsic reward; default zeros.
            perceived: (B, K) outcome as the agent perceives it, for
                sensory_estimate; overrides ``intake + bias`` when a task
                decides per item what is misperceived.
            drive_before: D(h_t) when the caller already has it (the task
                engine keeps the drive of its current body).
        """
        d_before = drive(before.level, before.set_point) if drive_before is None else drive_before
        d_after = drive(after.level, after.set_point)
        if self.kind == "drive_reduction":
            internal = d_before - d_after
        elif self.kind == "negative_drive":
            internal = -d_after
        elif self.kind == "survival":
            internal = (np.ones_like(d_after) if alive is None else alive.astype(np.float64))
        else:  # sensory_estimate
            if perceived is not None:
                perceived = before.level + perceived
            elif intake is None:
                perceived = before.level
            else:
                bias = np.asarray(self.bias, dtype=np.float64)
                perceived = before.level + intake + np.where(intake != 0, bias, 0.0)
            internal = d_before - drive(perceived, before.set_point)
        task = np.zeros_like(d_after) if task is None else np.asarray(task, dtype=np.float64)
        total = self.drive_weight * internal + self.task_weight * task
        return RewardParts(total, internal, task, d_before, d_after)
