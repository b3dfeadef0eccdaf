"""Drive functions: map an internal state to one scalar drive per body.

The default is the homeostatic-RL drive of Keramati & Gutkin (2014),

    D(h) = ( sum_i w_i |(h*_i - h_i) / s_i|^n )^(1/m),

with set points h*, weights w and scales s (a need's comfort band, so that
deviations count in band units). Two further families: a weighted quadratic
drive and an asymmetric drive with its own weight and exponent below and above
the set point. Every drive accepts arrays of shape (..., K) and reduces the last
axis, so the same object scores one body, a batch (B, K) or a trace (T, K).

All three families are one compiled form, :func:`drive_of`, fed by each drive
object's ``table`` (weights below and above the set point, scales) and
``exponents``. It is the only implementation of these formulas in needbench:
task kernels call it, and tasks, metrics and agents call the drive object a
task was built with.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, ClassVar

import numpy as np

from needbench.envs.compiled import inline_kernel, kernel
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


# Rows of a drive's (3, K) table and entries of its exponent vector.
WEIGHT_BELOW, WEIGHT_ABOVE, SCALE = range(3)
N_BELOW, N_ABOVE, ROOT = range(3)


@inline_kernel
def power(x, p):
    """x ** p for x >= 0, with multiplication or sqrt for the common exponents
    (a float power costs an exp and a log; the exponents used are small)."""
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
        return math.sqrt(x)
    return x ** p


@inline_kernel
def drive_of(level, row, set_point, set_point_row, table, exponents):
    """The drive of the body in ``level[row]`` with set points ``set_point[set_point_row]``:
    (sum_i w_i(d_i) |d_i|^n(d_i))^(1/m), d = (h* - h)/s.

    Every family is this one form: a deficit (d > 0) takes the ``below``
    weight and exponent, an excess the ``above`` ones (equal for the
    symmetric families). Rows of 2-D arrays are indexed, never sliced: a view
    per copy costs reference counting in the hot loops.
    """
    total = 0.0
    for k in range(level.shape[1]):
        d = (set_point[set_point_row, k] - level[row, k]) / table[SCALE, k]
        if d > 0.0:
            total += table[WEIGHT_BELOW, k] * power(abs(d), exponents[N_BELOW])
        else:
            total += table[WEIGHT_ABOVE, k] * power(abs(d), exponents[N_ABOVE])
    return power(total, exponents[ROOT])


@kernel
def _drives(level, set_point, table, exponents, out):
    for i in range(level.shape[0]):
        out[i] = drive_of(level, i, set_point, i, table, exponents)


class Drive:
    """Base class: ``drive(level, set_point) -> (...)`` array of drives."""

    family: ClassVar[str] = ""

    def __init__(self, weights=None, scale=None, num_needs: int | None = None):
        self.weights = _vector("drive.weights", weights, num_needs, positive=False)
        self.scale = _vector("drive.scale", scale, num_needs, positive=True)
        self._num_needs = num_needs

    def _compile(self, weight_below, weight_above, n_below: float, n_above: float,
                 m: float) -> None:
        """Set the kernel's ``table`` (3, K) and ``exponents`` (3,) of this drive."""
        size = self._num_needs
        if size is None:
            sizes = {np.size(v) for v in (weight_below, weight_above, self.scale)} - {1}
            size = sizes.pop() if sizes else 1
        table = np.empty((3, size))
        table[WEIGHT_BELOW], table[WEIGHT_ABOVE], table[SCALE] = (
            weight_below, weight_above, self.scale)
        table.setflags(write=False)
        self._table = table
        self._wide: dict[int, np.ndarray] = {}
        self._exponents = np.array([n_below, n_above, 1.0 / m])
        self._exponents.setflags(write=False)

    def table(self, num_needs: int) -> np.ndarray:
        """(3, K) weights below and above the set point and scales, for kernels.

        A drive declared with scalar parameters and no ``num_needs`` serves any K.
        """
        if self._table.shape[1] == num_needs:
            return self._table
        if self._table.shape[1] != 1:
            raise ConfigError("drive", self, f"a drive for {num_needs} needs "
                              f"(this one has {self._table.shape[1]})")
        wide = self._wide.get(num_needs)
        if wide is None:
            wide = self._wide[num_needs] = np.repeat(self._table, num_needs, axis=1)
            wide.setflags(write=False)
        return wide

    @property
    def exponents(self) -> np.ndarray:
        """(3,) exponent below, exponent above and root 1/m, for kernels."""
        return self._exponents

    def __call__(self, level: np.ndarray, set_point: np.ndarray) -> np.ndarray:
        """Drive of each body: arrays (..., K) in, (...) out."""
        level, set_point = np.broadcast_arrays(np.asarray(level, np.float64),
                                               np.asarray(set_point, np.float64))
        if level.ndim == 0:
            raise ConfigError("drive(level)", level.shape, "arrays whose last axis is the needs")
        flat = np.ascontiguousarray(level).reshape(-1, level.shape[-1])
        out = np.empty(flat.shape[0])
        _drives(flat, np.ascontiguousarray(set_point).reshape(flat.shape),
                self.table(flat.shape[1]), self._exponents, out)
        return out.reshape(level.shape[:-1])

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
        self._compile(self.weights, self.weights, self.n, self.n, self.m)


class QuadraticDrive(Drive):
    """D(h) = sum_i w_i ((h*_i - h_i)/s_i)^2, the weighted quadratic drive."""

    family = "quadratic"

    def __init__(self, weights=None, scale=None, num_needs: int | None = None):
        super().__init__(weights, scale, num_needs)
        self._compile(self.weights, self.weights, 2.0, 2.0, 1.0)


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
        self._compile(self.weight_below, self.weight_above, self.n_below, self.n_above, self.m)


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
