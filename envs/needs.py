"""Declarative specifications of needs and of the couplings between them.

A need is declared, not coded: a user adds one (salt, sleep pressure) by
writing a :class:`Need` and handing it to :class:`~needbench.envs.physiology.Physiology`.
Passive dynamics per need are the sum of a few terms, each one a field here:

* ``drain``: constant loss per unit time (basal metabolism). Negative for a
  constant gain, such as metabolic heat production.
* ``activity_cost``: extra loss per unit time per unit of activity (moving,
  working). Negative when activity adds to the need (working heats the body).
* ``ambient_rate`` and ``ambient``: relaxation toward an ambient value with
  Newton's law of cooling, dh/dt = -k (h - ambient), integrated exactly.
* ``uptake_rate``: an intake first enters a gut/store compartment and reaches
  the need with first-order kinetics at this rate (1/time); ``inf`` means the
  intake reaches the need at once.
* ``adaptation_rate``: the set point moves toward the experienced level at this
  rate per step (allostasis); 0 keeps it fixed.
* ``noise``: standard deviation of Gaussian noise added per unit time (scaled
  by sqrt(dt)).

Couplings between needs are declared apart, as :class:`Coupling`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

from needbench.envs.errors import (
    ConfigError,
    check_choice,
    check_finite,
    check_non_negative,
    check_positive,
    check_range,
)


@dataclass(frozen=True)
class Need:
    """One internal variable to be kept near its set point.

    Attributes:
        name: identifier, unique within a body (``energy``, ``water``...).
        unit: unit of the level, for display and docs (``degC``, ``mmol/L``...).
        set_point: the level the body regulates toward (h*).
        band: comfort tolerance, the half width of the comfort band around the
            set point; deviations are reported in units of it.
        lethal_low: the body dies at or below this level.
        lethal_high: the body dies at or above this level.
        initial_low, initial_high: the initial level is drawn uniformly here.
        drain: constant loss per unit time (negative: constant gain).
        activity_cost: loss per unit time per unit of activity.
        ambient_rate: Newton coefficient k (1/time) of relaxation to ambient.
        ambient: default ambient value the need relaxes toward.
        uptake_rate: first-order absorption rate (1/time) from the gut/store
            compartment; ``math.inf`` delivers intakes at once.
        adaptation_rate: per-step rate at which the set point follows the level.
        noise: Gaussian noise standard deviation per sqrt(unit time).
    """

    name: str
    unit: str
    set_point: float
    band: float
    lethal_low: float
    lethal_high: float
    initial_low: float
    initial_high: float
    drain: float = 0.0
    activity_cost: float = 0.0
    ambient_rate: float = 0.0
    ambient: float = 0.0
    uptake_rate: float = math.inf
    adaptation_rate: float = 0.0
    noise: float = 0.0

    def __post_init__(self) -> None:
        path = f"needs.{self.name}"
        if not isinstance(self.name, str) or not self.name.isidentifier():
            raise ConfigError("needs.name", self.name, "a Python identifier such as 'energy'")
        for name in ("set_point", "lethal_low", "lethal_high", "initial_low", "initial_high",
                     "drain", "activity_cost", "ambient"):
            check_finite(f"{path}.{name}", getattr(self, name))
        check_positive(f"{path}.band", self.band)
        check_non_negative(f"{path}.ambient_rate", self.ambient_rate)
        if check_non_negative(f"{path}.uptake_rate", self.uptake_rate, allow_inf=True) == 0:
            raise ConfigError(f"{path}.uptake_rate", self.uptake_rate, "a rate > 0 (inf: at once)")
        check_range(f"{path}.adaptation_rate", self.adaptation_rate, 0.0, 1.0)
        check_non_negative(f"{path}.noise", self.noise)
        if not self.lethal_low < self.lethal_high:
            raise ConfigError(
                f"{path}.lethal_low/lethal_high", (self.lethal_low, self.lethal_high),
                "lethal_low < lethal_high (are the two bounds swapped?)",
            )
        if not self.lethal_low < self.set_point < self.lethal_high:
            raise ConfigError(
                f"{path}.set_point", self.set_point,
                "a value strictly inside the lethal bounds "
                f"({self.lethal_low}, {self.lethal_high})",
            )
        if not self.lethal_low < self.initial_low <= self.initial_high < self.lethal_high:
            raise ConfigError(
                f"{path}.initial_low/initial_high", (self.initial_low, self.initial_high),
                f"lethal_low ({self.lethal_low}) < initial_low <= initial_high "
                f"< lethal_high ({self.lethal_high})",
            )

    @property
    def band_low(self) -> float:
        """Lower edge of the comfort band."""
        return self.set_point - self.band

    @property
    def band_high(self) -> float:
        """Upper edge of the comfort band."""
        return self.set_point + self.band

    def with_(self, **changes: object) -> Need:
        """A copy with some fields changed (validated again)."""
        return replace(self, **changes)


@dataclass(frozen=True)
class Coupling:
    """A cross-need coupling: a deviation of one need drains another.

    While ``source`` is beyond its set point on the given ``side``, ``target``
    loses ``gain * excess`` per unit time, where ``excess`` is how far the
    source is past its set point (in the source's units). A negative gain adds
    to the target instead. Examples: heat (temperature above) raises water loss;
    shivering (temperature below) spends energy and produces heat.
    """

    source: str
    target: str
    gain: float
    side: str = "above"
    meaning: str = field(default="", compare=False)

    def __post_init__(self) -> None:
        path = f"couplings.{self.source}->{self.target}"
        check_finite(f"{path}.gain", self.gain)
        check_choice(f"{path}.side", self.side, ("above", "below"))
