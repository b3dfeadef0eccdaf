"""The one exception type for bad parameters, and the small checks that raise it.

Every check names the field path, the bad value and what is allowed, so the
user knows what to change without reading the code.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from typing import Any


class ConfigError(ValueError):
    """A parameter is outside what needbench accepts.

    Attributes:
        path: dotted path of the offending field, e.g. ``needs.water.band``.
        value: the value that was given.
        allowed: a short description of what is allowed.
    """

    def __init__(self, path: str, value: Any, allowed: str, *, context: str | None = None):
        self.path = path
        self.value = value
        self.allowed = allowed
        self.context = context
        where = f"{context}: " if context else ""
        super().__init__(f"{where}{path} = {value!r} is not allowed; expected {allowed}")


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def check_finite(path: str, value: Any) -> float:
    """Return ``value`` as a float, or raise if it is not a finite number."""
    if not _is_number(value) or not math.isfinite(value):
        raise ConfigError(path, value, "a finite number")
    return float(value)


def check_positive(path: str, value: Any) -> float:
    """A finite number strictly above zero."""
    if not _is_number(value) or not math.isfinite(value) or value <= 0:
        raise ConfigError(path, value, "a finite number > 0")
    return float(value)


def check_non_negative(path: str, value: Any, *, allow_inf: bool = False) -> float:
    """A number at or above zero (``inf`` only when ``allow_inf``)."""
    ok = _is_number(value) and not math.isnan(value) and value >= 0
    if ok and math.isinf(value) and not allow_inf:
        ok = False
    if not ok:
        allowed = "a number >= 0 (inf allowed)" if allow_inf else "a finite number >= 0"
        raise ConfigError(path, value, allowed)
    return float(value)


def check_range(path: str, value: Any, low: float, high: float, *, closed: bool = True) -> float:
    """A finite number in [low, high] (or (low, high) when ``closed`` is false)."""
    inside = _is_number(value) and math.isfinite(value)
    if inside:
        inside = low <= value <= high if closed else low < value < high
    if not inside:
        brackets = f"[{low}, {high}]" if closed else f"({low}, {high})"
        raise ConfigError(path, value, f"a number in {brackets}")
    return float(value)


def check_choice(path: str, value: Any, choices: Iterable[str]) -> str:
    """One of a fixed set of strings."""
    choices = list(choices)
    if value not in choices:
        raise ConfigError(path, value, "one of " + ", ".join(repr(c) for c in choices))
    return value


class ActionError(ValueError):
    """An action handed to ``step`` is not in the action space (shape, type, NaN, range)."""
