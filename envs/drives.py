"""Drive functions: map an internal state to one scalar drive per body.

The default is the homeostatic-RL drive of Keramati & Gutkin (2014),

    D(h) = ( sum_i w_i |(h*_i - h_i) / s_i|^n )^(1/m),

with set points h*, weights w and scales s (a need's comfort band, so that
deviations count in band units). Two further families: a weighted quadratic
drive and an asymmetric drive with its own weight and exponent below and above
the set point. Every drive accepts arrays of shape (..., K) and reduces the last
axis, so the same object scores one body, a batch (B, K) or a trace (T, K).

This module is the only implementation of these formulas in needbench: tasks,
metrics and agents all call the drive object a task was built with.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, ClassVar

import numpy as np

from needbench.envs.errors import ConfigError, check_positive


def _vector(path: str, value: float | Sequence[float] | None, size: int | None,
            *, positive: bool) -> np.ndarray | float:
    """Validate a scalar or per-need vector parameter."""
    if value is None:
        return 1.0
    arr = np.asarray(value, dtype=np.float64)
    if arr.ndim > 1 or (arr.ndim == 1 and size is not None and arr.shape[0] != size):
        raise ConfigError(path, value, f"a number or a list of {size} numbers (one per need)")
    if not np.all(np.isfinite(arr)):
        raise ConfigError(path, value, "finite numbers (no NaN or inf)")
    if positive and np.any(arr <= 0):
        raise ConfigError(path, value, "numbers > 0")
    if not positive and np.any(arr < 0):
        raise ConfigError(path, value, "numbers >= 0")
    return float(arr) if arr.ndim == 0 else arr


def power(x: np.ndarray, p: float) -> np.ndarray:
    """x ** p for x >= 0, with multiplication or sqrt for the common exponents.

    The drive is computed every step of every copy; a float power costs an exp
    and a log per element, while the exponents used in practice are small.
    """
    if p == 1.0:
        return x
    if p == 2.0:
        return x * x
    if p == 3.0:
        return x * x * x
    if p == 4.0:
        y = x * x
        return y * y
    if p == 0.5:
        return np.sqrt(x)
    return np.power(x, p)


def weighted_sum(terms: np.ndarray, weights: np.ndarray | float) -> np.ndarray:
    """sum_i w_i terms_i over the last axis, as a matrix-vector product.

    numpy's reductions along a short last axis (K is 2 to 5) cost several times
    more per element than a product with the weight vector.
    """
    return terms @ np.broadcast_to(np.asarray(weights, dtype=np.float64), terms.shape[-1:])


class Drive:
    """Base class: ``drive(level, set_point) -> (...)`` array of drives."""

    family: ClassVar[str] = ""

    def __init__(self, weights=None, scale=None, num_needs: int | None = None):
        self.weights = _vector("drive.weights", weights, num_needs, positive=False)
        self.scale = _vector("drive.scale", scale, num_needs, positive=True)
        self._scale_tiles: dict[int, np.ndarray] = {}

    def _distance(self, level: np.ndarray, set_point: np.ndarray) -> np.ndarray:
        """Signed distance to the set point in scale units, h* - h (positive = deficit)."""
        gap = np.asarray(set_point) - np.asarray(level)
        if isinstance(self.scale, float):
            return gap if self.scale == 1.0 else gap / self.scale
        if gap.ndim == 2:
            # A (K,) row broadcast over (B, K) is slow for small K; divide by a tile.
            tile = self._scale_tiles.get(gap.shape[0])
            if tile is None:
                tile = self._scale_tiles.setdefault(gap.shape[0],
                                                    np.tile(self.scale, (gap.shape[0], 1)))
            return gap / tile
        return gap / self.scale

    def __call__(self, level: np.ndarray, set_point: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def params(self) -> dict[str, Any]:
        """The drive's parameters as plain Python values (for hashing and logs)."""
        out = {"family": self.family}
        for key, value in vars(self).items():
            if key.startswith("_"):
                continue
            out[key] = value.tolist() if isinstance(value, np.ndarray) else value
        return out

    def __repr__(self) -> str:
        items = ", ".join(f"{k}={v!r}" for k, v in self.params().items() if k != "family")
        return f"{type(self).__name__}({items})"


class HomeostaticDrive(Drive):
    """D(h) = (sum_i w_i |(h*_i - h_i)/s_i|^n)^(1/m)  (Keramati & Gutkin 2014).

    Args:
        n: exponent inside the sum (> 0).
        m: root taken of the sum (> 0).
        weights: w_i >= 0, a number or one per need (default 1).
        scale: s_i > 0, a number or one per need (default 1; tasks pass the
            comfort bands so that deviations count in band units).

    For n > m > 1 the drive yields the published properties of homeostatic
    reward: reward grows with dose, is worth more under deprivation, is
    inhibited by deviations of unrelated needs, is loss averse and risk averse.
    """

    family = "homeostatic"

    def __init__(self, n: float = 3.0, m: float = 2.0, weights=None, scale=None,
                 num_needs: int | None = None):
        super().__init__(weights, scale, num_needs)
        self.n = check_positive("drive.n", n)
        self.m = check_positive("drive.m", m)

    def __call__(self, level, set_point):
        d = np.abs(self._distance(level, set_point))
        return power(weighted_sum(power(d, self.n), self.weights), 1.0 / self.m)


class QuadraticDrive(Drive):
    """D(h) = sum_i w_i ((h*_i - h_i)/s_i)^2, the weighted quadratic drive."""

    family = "quadratic"

    def __call__(self, level, set_point):
        d = self._distance(level, set_point)
        return weighted_sum(d * d, self.weights)


class AsymmetricDrive(Drive):
    """A deficit and an excess weigh differently.

    D(h) = ( sum_i [w_below_i |d_i|^n_below if d_i > 0 else w_above_i |d_i|^n_above] )^(1/m),

    with d = (h* - h)/s, so d > 0 is a level below the set point (a deficit).
    """

    family = "asymmetric"

    def __init__(self, weight_below=1.0, weight_above=1.0, n_below: float = 2.0,
                 n_above: float = 2.0, m: float = 1.0, scale=None, num_needs: int | None = None):
        super().__init__(None, scale, num_needs)
        del self.weights
        self.weight_below = _vector("drive.weight_below", weight_below, num_needs, positive=False)
        self.weight_above = _vector("drive.weight_above", weight_above, num_needs, positive=False)
        self.n_below = check_positive("drive.n_below", n_below)
        self.n_above = check_positive("drive.n_above", n_above)
        self.m = check_positive("drive.m", m)

    def __call__(self, level, set_point):
        d = self._distance(level, set_point)
        a = np.abs(d)
        terms = np.where(d > 0, self.weight_below * power(a, self.n_below),
                         self.weight_above * power(a, self.n_above))
        return power(weighted_sum(terms, 1.0), 1.0 / self.m)


DRIVE_FAMILIES: dict[str, type[Drive]] = {
    cls.family: cls for cls in (HomeostaticDrive, QuadraticDrive, AsymmetricDrive)
}


def make_drive(family: str = "homeostatic", *, scale=None, num_needs: int | None = None,
               **params: Any) -> Drive:
    """Build a drive by family name; unknown families or parameters raise ConfigError."""
    if family not in DRIVE_FAMILIES:
        raise ConfigError("drive.family", family, "one of " + ", ".join(map(repr, DRIVE_FAMILIES)))
    cls = DRIVE_FAMILIES[family]
    try:
        return cls(scale=scale, num_needs=num_needs, **params)
    except TypeError as error:
        import inspect

        allowed = [p for p in inspect.signature(cls).parameters if p not in ("scale", "num_needs")]
        raise ConfigError(f"drive ({family})", sorted(params),
                          "parameters among " + ", ".join(allowed)) from error
