"""The physiology core: pure, batched functions over arrays of shape (B, K).

B copies of a body, K needs. One implementation serves the single env (B = 1)
and the native vector env (B = N); nothing here loops over needs or copies.

Within one step every passive term is linear in the level, so the step is an
exact solution of the per-need linear ODE

    dh/dt = -k (h - a) + f + u * g,       dg/dt = -u * g,

with k the Newton relaxation rate toward ambient a, f the constant forcing
(minus drain, minus activity cost, minus coupling losses, plus external
forcing, all held for the step), g the gut/store compartment and u its
first-order uptake rate. The solution over a step of length dt is

    h' = h e^{-k dt} + (k a + f) phi(k) + g u (e^{-u dt} - e^{-k dt}) / (k - u)
    g' = g e^{-u dt}

with phi(k) = (1 - e^{-k dt}) / k (-> dt as k -> 0) and the usual limit
g u dt e^{-k dt} when k = u. This is exponential (exact) discretisation: no
Euler error, whatever dt. Because k, u and dt are fixed per body, the three
coefficients are computed once, and a step costs a handful of array operations.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import NamedTuple

import numpy as np

from needbench.envs.errors import ConfigError, check_positive
from needbench.envs.needs import Coupling, Need


def _all_needs(ok: np.ndarray) -> np.ndarray:
    """(B,) rows of a (B, K) boolean array that are all true.

    A matrix-vector product counts the true entries: numpy's reductions along a
    short last axis (K is 2 to 5) cost several times more per element.
    """
    return ok.astype(np.float64) @ np.ones(ok.shape[-1]) == ok.shape[-1]


class BodyState(NamedTuple):
    """Internal state of B bodies.

    Attributes:
        level: (B, K) current level of each need, in the need's unit.
        gut: (B, K) amount still in the gut/store compartment, not yet delivered.
        set_point: (B, K) current set points (they move only under adaptation).
    """

    level: np.ndarray
    gut: np.ndarray
    set_point: np.ndarray


def _relaxation_coefficients(k: np.ndarray, u: np.ndarray, dt: float):
    """Exact-step coefficients (decay, forcing gain, gut transfer) per need."""
    decay = np.exp(-k * dt)
    # phi(k) = (1 - e^{-k dt}) / k, with its limit dt at k = 0; expm1 keeps precision.
    with np.errstate(divide="ignore", invalid="ignore"):
        phi = np.where(k > 0, -np.expm1(-k * dt) / np.where(k > 0, k, 1.0), dt)
    finite_u = np.where(np.isfinite(u), u, 0.0)
    gut_decay = np.where(np.isfinite(u), np.exp(-finite_u * dt), 0.0)
    same = np.isclose(k, finite_u, rtol=1e-12, atol=1e-15)
    with np.errstate(divide="ignore", invalid="ignore"):
        transfer = np.where(
            same,
            finite_u * dt * decay,
            finite_u * (gut_decay - decay) / np.where(same, 1.0, k - finite_u),
        )
    transfer = np.where(np.isfinite(u), transfer, 0.0)
    return decay, phi, gut_decay, transfer


class Physiology:
    """A body: a fixed list of needs and couplings, compiled to arrays.

    Args:
        needs: the needs, in the order of the K axis.
        couplings: cross-need couplings (by need name).
        dt: length of one step in the body's time unit (must be > 0).

    The object is immutable after construction; the functions
    :meth:`initial`, :meth:`transition`, :meth:`alive` and :meth:`deviation`
    are pure apart from the random generator they are given.
    """

    def __init__(self, needs: Sequence[Need], couplings: Sequence[Coupling] = (), dt: float = 1.0):
        needs = tuple(needs)
        if not needs:
            raise ConfigError("needs", needs, "at least one Need")
        names = [n.name for n in needs]
        if len(set(names)) != len(names):
            raise ConfigError("needs", names, "unique need names")
        self.needs: tuple[Need, ...] = needs
        self.couplings: tuple[Coupling, ...] = tuple(couplings)
        self.dt = check_positive("dt", dt)
        self.names: tuple[str, ...] = tuple(names)
        self.index = {name: i for i, name in enumerate(names)}

        def column(attr: str) -> np.ndarray:
            return np.array([getattr(n, attr) for n in needs], dtype=np.float64)

        self.set_point = column("set_point")
        self.band = column("band")
        self.lethal_low = column("lethal_low")
        self.lethal_high = column("lethal_high")
        self.initial_low = column("initial_low")
        self.initial_high = column("initial_high")
        self.drain = column("drain")
        self.activity_cost = column("activity_cost")
        self.ambient_rate = column("ambient_rate")
        self.ambient = column("ambient")
        self.uptake_rate = column("uptake_rate")
        self.adaptation_rate = column("adaptation_rate")
        self.noise = column("noise")
        self.delayed = np.isfinite(self.uptake_rate)
        self._delayed_share = self.delayed.astype(np.float64)
        self._instant_share = 1.0 - self._delayed_share
        self._any_delayed = bool(self.delayed.any())
        self._any_instant = not bool(self.delayed.all())
        self.adapts = bool(np.any(self.adaptation_rate > 0))
        self.noisy = bool(np.any(self.noise > 0))

        k = self.ambient_rate
        self._decay, self._phi, self._gut_decay, self._transfer = _relaxation_coefficients(
            k, self.uptake_rate, self.dt
        )
        # Step gains: phi times each forcing term (see the module docstring).
        self._step_constant = -self.drain * self._phi
        self._step_constant_default = self._step_constant + k * self.ambient * self._phi
        self._ambient_gain = k * self._phi
        self._activity_gain = self.activity_cost * self._phi
        self._noise_scale = self.noise * math.sqrt(self.dt)

        K = len(needs)
        above = np.zeros((K, K))
        below = np.zeros((K, K))
        for c in self.couplings:
            for end in (c.source, c.target):
                if end not in self.index:
                    raise ConfigError(
                        f"couplings.{c.source}->{c.target}", end,
                        "a declared need name: " + ", ".join(self.names),
                    )
            matrix = above if c.side == "above" else below
            matrix[self.index[c.source], self.index[c.target]] += c.gain
        # Coupling losses enter the step through phi of the target need.
        self._coupling = (above + below) * self._phi if (above.any() or below.any()) else None
        self._coupling_below = below * self._phi if below.any() else None
        # Per-need (K,) coefficients of the step by name, and their (B, K) tiles.
        self._vectors = {
            "delayed_share": self._delayed_share, "instant_share": self._instant_share,
            "decay": self._decay, "step_constant": self._step_constant,
            "step_constant_default": self._step_constant_default,
            "ambient_gain": self._ambient_gain, "activity_gain": self._activity_gain,
            "phi": self._phi, "transfer": self._transfer, "gut_decay": self._gut_decay,
            "noise_scale": self._noise_scale, "adaptation_rate": self.adaptation_rate,
            "lethal_low": self.lethal_low, "lethal_high": self.lethal_high, "band": self.band,
        }
        self._tile_cache: dict[int, dict[str, np.ndarray]] = {}

    def _coefficients(self, level: np.ndarray) -> dict[str, np.ndarray]:
        """The step coefficients shaped for ``level``: tiles for (B, K), rows for (K,)."""
        return self._tiles(level.shape[0]) if level.ndim == 2 else self._vectors

    def _tiles(self, batch: int) -> dict[str, np.ndarray]:
        """The per-need coefficients repeated to (batch, K), computed once per batch size.

        numpy broadcasts a (K,) row over (B, K) with an inner loop of length K; for
        K of 2 to 5 that costs several times an operation on two (B, K) arrays.
        """
        tiles = self._tile_cache.get(batch)
        if tiles is None:
            tiles = {name: np.tile(value, (batch, 1)) for name, value in self._vectors.items()}
            self._tile_cache[batch] = tiles
        return tiles

    @property
    def num_needs(self) -> int:
        return len(self.needs)

    def initial(self, rng: np.random.Generator, batch: int) -> BodyState:
        """B fresh bodies, levels uniform in each need's initial range, guts empty."""
        level = rng.uniform(self.initial_low, self.initial_high, size=(batch, self.num_needs))
        gut = np.zeros((batch, self.num_needs))
        set_point = np.broadcast_to(self.set_point, (batch, self.num_needs)).copy()
        return BodyState(level, gut, set_point)

    def transition(
        self,
        state: BodyState,
        rng: np.random.Generator | None = None,
        *,
        intake: np.ndarray | None = None,
        activity: np.ndarray | None = None,
        ambient: np.ndarray | None = None,
        forcing: np.ndarray | None = None,
    ) -> BodyState:
        """Advance B bodies by one step.

        Args:
            state: the bodies before the step.
            rng: source of noise (needed only if some need has ``noise > 0``).
            intake: (B, K) amounts consumed this step; they enter the gut (or,
                for needs with ``uptake_rate = inf``, the level at once).
            activity: (B,) activity level this step (0 = rest).
            ambient: (B, K) ambient values this step; default each need's own.
            forcing: (B, K) extra gain per unit time this step (sun, a heater).

        Returns:
            the bodies after the step (new arrays; the input is not modified).
        """
        level, gut, set_point = state
        c = self._coefficients(level)
        if intake is not None:
            if self._any_delayed:
                gut = gut + intake * c["delayed_share"]
            if self._any_instant:
                level = level + intake * c["instant_share"]
        # h' = h e^{-k dt} + phi (k a + f) + g transfer, with every forcing term
        # pre-multiplied by phi so that each costs one array operation.
        new_level = level * c["decay"]
        if ambient is None:
            new_level += c["step_constant_default"]
        else:
            new_level += c["step_constant"]
            new_level += ambient * c["ambient_gain"]
        if activity is not None:
            new_level -= np.asarray(activity)[..., None] * c["activity_gain"]
        if forcing is not None:
            new_level += forcing * c["phi"]
        if self._coupling is not None:
            # Losses: max(e, 0) @ above + max(-e, 0) @ below, e = h - h*; with
            # max(-e, 0) = max(e, 0) - e this is max(e, 0) @ (above + below) - e @ below.
            excess = level - set_point
            new_level -= np.maximum(excess, 0.0) @ self._coupling
            if self._coupling_below is not None:
                new_level += excess @ self._coupling_below
        if self._any_delayed:
            new_level += gut * c["transfer"]
        new_gut = gut * c["gut_decay"] if self._any_delayed else gut
        if self.noisy:
            if rng is None:
                raise ConfigError("rng", rng, "a numpy Generator when some need has noise > 0")
            new_level += c["noise_scale"] * rng.standard_normal(level.shape)
        if self.adapts:
            set_point = set_point + c["adaptation_rate"] * (new_level - set_point)
        return BodyState(new_level, new_gut, set_point)

    def alive(self, state: BodyState) -> np.ndarray:
        """(B,) True where every need is strictly inside its lethal bounds."""
        level = state.level
        c = self._coefficients(level)
        return _all_needs(np.minimum(level - c["lethal_low"], c["lethal_high"] - level) > 0)

    def deviation(self, state: BodyState) -> np.ndarray:
        """(B, K) signed deviation from the set point in comfort-band units."""
        level = state.level
        band = self._coefficients(level)["band"]
        return (level - state.set_point) / band

    def in_band(self, state: BodyState) -> np.ndarray:
        """(B,) True where every need is inside its comfort band."""
        level = state.level
        band = self._coefficients(level)["band"]
        return _all_needs(np.abs(level - state.set_point) <= band)

    def vector(self, values: dict[str, float], default: float = 0.0) -> np.ndarray:
        """A (K,) array from a {need name: value} mapping; unknown names raise."""
        out = np.full(self.num_needs, default, dtype=np.float64)
        for name, value in values.items():
            if name not in self.index:
                raise ConfigError("need", name, "one of " + ", ".join(self.names))
            out[self.index[name]] = value
        return out
