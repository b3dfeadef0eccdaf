"""Learning curves: needbench's scalar names, and the one accumulator of episode stability.

Every number that says how stable an episode was is computed here, by
:class:`EpisodeStability`, and nowhere else: agents call it to log their
training curves, and :mod:`needbench.benchmarks.metrics` calls it (through
:func:`stability_of_episode`) to score evaluation episodes. A training-curve
point and the metric of the same episode's trace are therefore the same number.

The convention
--------------
An episode of T steps visits the states h_0 (after reset) .. h_T; step t moves
the body from h_t to h_{t+1} and pays the reward r_t. With D the task's drive
(as the env reports it in ``info["drive"]``, never recomputed), band-unit
deviations d_t = (h_t - h*_t) / band and g the scoring discount:

* ``episode/return`` = sum_{t=0}^{T-1} r_t (undiscounted, reward units);
* ``episode/length`` = T;
* ``stability/discounted_drive`` = sum_{t=0}^{T-1} g^t D(h_t): the states in
  which the agent chose an action, from the reset state on (drive units;
  lower is better);
* ``stability/time_in_band`` = share of the states h_1..h_T with every need in
  its comfort band (``info["in_band"]``), in [0, 1];
* ``stability/deviation/<need>`` = mean of |d_t| over h_1..h_T for that need
  (band units). The reset state is left out of both: it was not the agent's doing.

g is the suite's scoring discount (``[suite] gamma``), not an algorithm's own
discount: the harness hands it down on the logger (``logger.discount``,
read by :func:`scoring_discount`), so a curve and the stored metrics agree
whatever discount the agent learns with. A logger without that attribute
means :data:`DEFAULT_DISCOUNT`.

Scalar names
------------
The names below are the only ones agents log; other code (reports, tests)
imports them from here. Optimiser figures go under ``update/<name>``
(:func:`update_tag`), e.g. ``update/value_loss``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from needbench.envs.errors import ConfigError

EPISODE_RETURN = "episode/return"
EPISODE_LENGTH = "episode/length"
DISCOUNTED_DRIVE = "stability/discounted_drive"
TIME_IN_BAND = "stability/time_in_band"
DEVIATION_PREFIX = "stability/deviation/"
UPDATE_PREFIX = "update/"

#: The scoring discount when none is handed down (the suite files' default too).
DEFAULT_DISCOUNT = 0.99


def deviation_tag(need: str) -> str:
    """``stability/deviation/<need>``."""
    return DEVIATION_PREFIX + str(need)


def update_tag(name: str) -> str:
    """``update/<name>``: a figure of the optimiser (a loss, the step size...)."""
    return UPDATE_PREFIX + str(name)


def check_discount(path: str, discount: Any) -> float:
    """A discount factor in (0, 1]."""
    if isinstance(discount, (bool, np.bool_)) or not isinstance(
            discount, (int, float, np.floating, np.integer)) or not 0.0 < discount <= 1.0:
        raise ConfigError(path, discount, "a discount factor in (0, 1]")
    return float(discount)


def scoring_discount(logger: Any) -> float:
    """The discount of the stability curves: ``logger.discount``, else :data:`DEFAULT_DISCOUNT`."""
    return check_discount("logger.discount", getattr(logger, "discount", DEFAULT_DISCOUNT))


@dataclass(frozen=True)
class EpisodeFigures:
    """What one finished episode scored (see the module docstring for each definition).

    ``discounted_drive``, ``time_in_band`` and ``deviation`` are None for an
    env that reports no drive (not a needbench task).
    """

    episode_return: float
    length: int
    discounted_drive: float | None = None
    time_in_band: float | None = None
    deviation: np.ndarray | None = None

    def scalars(self, need_names: Sequence[str] | None = None) -> dict[str, float]:
        """The figures under their scalar names; needs are named by index without names."""
        out = {EPISODE_RETURN: self.episode_return, EPISODE_LENGTH: float(self.length)}
        if self.discounted_drive is not None:
            out[DISCOUNTED_DRIVE] = self.discounted_drive
        if self.time_in_band is not None:
            out[TIME_IN_BAND] = self.time_in_band
        if self.deviation is not None:
            names = need_names if need_names is not None else [
                str(k) for k in range(self.deviation.shape[0])]
            for need, value in zip(names, self.deviation, strict=True):
                out[deviation_tag(need)] = float(value)
        return out


class EpisodeStability:
    """Running sums of C copies' current episodes (the module docstring's convention).

    Call :meth:`begin` with the reset info of the copies that start an episode
    (it holds D(h_0)), :meth:`step` with every step's reward and info, and
    :meth:`figures` for a copy whose episode has just ended. ``info`` is
    batched, as a vector env returns it: ``drive`` (C,), ``in_band`` (C,),
    ``deviation`` (C, K). Without a ``drive`` entry only return and length
    are kept.
    """

    def __init__(self, copies: int, discount: float):
        self.copies = int(copies)
        self.discount = check_discount("discount", discount)
        self.episode_return = np.zeros(self.copies)
        self.length = np.zeros(self.copies, dtype=np.int64)
        self.discounted_drive = np.zeros(self.copies)
        self.weight = np.ones(self.copies)  # g^t of the state the next step leaves
        self.drive_before = np.zeros(self.copies)  # D(h_t)
        self.steps_in_band = np.zeros(self.copies)
        self.absolute_deviation: np.ndarray | None = None
        self.stability = False

    def begin(self, mask: np.ndarray, info: Mapping[str, Any]) -> None:
        """Start new episodes where ``mask`` is true; ``info`` is the reset info."""
        mask = np.asarray(mask, dtype=bool)
        self.episode_return[mask] = 0.0
        self.length[mask] = 0
        self.discounted_drive[mask] = 0.0
        self.weight[mask] = 1.0
        self.steps_in_band[mask] = 0.0
        if self.absolute_deviation is not None:
            self.absolute_deviation[mask] = 0.0
        self.stability = "drive" in info
        if self.stability:
            self.drive_before[mask] = np.asarray(info["drive"], dtype=np.float64)[mask]

    def step(self, mask: np.ndarray, reward: np.ndarray, info: Mapping[str, Any]) -> None:
        """Add one step of the copies where ``mask`` is true; ``info`` is the step's info."""
        mask = np.asarray(mask, dtype=bool)
        self.episode_return += np.where(mask, np.asarray(reward, dtype=np.float64), 0.0)
        self.length += mask
        if not self.stability:
            return
        drive = np.asarray(info["drive"], dtype=np.float64)
        self.discounted_drive += np.where(mask, self.weight * self.drive_before, 0.0)
        self.weight = np.where(mask, self.weight * self.discount, self.weight)
        self.drive_before = np.where(mask, drive, self.drive_before)
        self.steps_in_band += mask & np.asarray(info["in_band"], dtype=bool)
        deviation = np.abs(np.asarray(info["deviation"], dtype=np.float64))
        if self.absolute_deviation is None:
            self.absolute_deviation = np.zeros_like(deviation)
        self.absolute_deviation += np.where(mask[:, None], deviation, 0.0)

    def figures(self, copy: int) -> EpisodeFigures:
        """The figures of copy ``copy``'s episode so far (at least one step)."""
        length = int(self.length[copy])
        if length < 1:
            raise ConfigError("episode length", length, "at least one step before figures()")
        if not self.stability:
            return EpisodeFigures(float(self.episode_return[copy]), length)
        return EpisodeFigures(float(self.episode_return[copy]), length,
                              float(self.discounted_drive[copy]),
                              float(self.steps_in_band[copy] / length),
                              self.absolute_deviation[copy] / length)


def stability_of_episode(reward: np.ndarray, drive: np.ndarray, in_band: np.ndarray,
                         deviation: np.ndarray, discount: float) -> EpisodeFigures:
    """The figures of one recorded episode, summed by :class:`EpisodeStability`.

    Args:
        reward: (T,) rewards r_0..r_{T-1}.
        drive: (T+1,) D(h_0)..D(h_T).
        in_band: (T,) every need in band at h_1..h_T.
        deviation: (T, K) band-unit deviations at h_1..h_T (signed or not).
        discount: the scoring discount g.
    """
    steps = int(np.shape(reward)[0])
    accumulator = EpisodeStability(1, discount)
    accumulator.begin(np.ones(1, dtype=bool), {"drive": np.asarray(drive[:1], dtype=np.float64)})
    mask = np.ones(1, dtype=bool)
    for t in range(steps):
        accumulator.step(mask, np.asarray(reward[t:t + 1], dtype=np.float64),
                         {"drive": drive[t + 1:t + 2], "in_band": in_band[t:t + 1],
                          "deviation": deviation[t:t + 1]})
    return accumulator.figures(0)
