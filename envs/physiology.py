"""The physiology core: B bodies of K needs, arrays of shape (B, K), compiled.

B copies of a body, K needs. One implementation serves the single env (B = 1)
and the native vector env (B = N): :func:`advance_bodies` advances every copy
in compiled code (numba), called once per step by the task kernels.

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
Euler error, whatever dt. Because k, u and dt are fixed per body, the
coefficients are computed once, as the rows of one (rows, K) table.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import NamedTuple

import numpy as np

from needbench.envs.compiled import inline_kernel, kernel
from needbench.envs.errors import ConfigError, check_positive
from needbench.envs.needs import Coupling, Need
from needbench.envs.streams import as_streams, draw_normals, draw_uniform

# Rows of the coefficient table (one column per need).
DECAY, STEP_CONSTANT, STEP_CONSTANT_DEFAULT, AMBIENT_GAIN, ACTIVITY_GAIN, PHI = range(6)
TRANSFER, GUT_DECAY, NOISE_SCALE, ADAPTATION, LETHAL_LOW, LETHAL_HIGH = range(6, 12)
BAND, DELAYED, SET_POINT, INITIAL_LOW, INITIAL_HIGH = range(12, 17)
COEFFICIENT_ROWS = 17
# Entries of the flag vector of a body.
ANY_DELAYED, NOISY, ADAPTS, COUPLED, COUPLED_BELOW = range(5)


@kernel
def advance_bodies(level, gut, set_point, intake, activity, ambient, forcing, use_ambient,
                   coefficients, coupling, coupling_below, flags, keys, counters, scratch):
    """Advance every body of a batch by one step, in place.

    ``level``, ``gut``, ``set_point`` (B, K) are overwritten with the state
    after the step. Inputs of the step: ``intake`` (B, K) amounts consumed
    (into the gut, or at once for needs with instant uptake), ``activity``
    (B,), ``ambient`` (B, K) read only when ``use_ambient`` (else each need's
    own ambient), ``forcing`` (B, K) extra gain per unit time. ``scratch`` is a
    (2, K) work array: the Gaussian draws of a noisy body and the new levels.

    The loop over copies lives here, not in the caller: a compiled call per
    copy would pay reference counting on every array argument.
    """
    c = coefficients
    k_count = level.shape[1]
    noise, new_level = scratch[0], scratch[1]
    any_delayed, noisy, adapts = flags[ANY_DELAYED], flags[NOISY], flags[ADAPTS]
    coupled, coupled_below = flags[COUPLED], flags[COUPLED_BELOW]
    for b in range(level.shape[0]):
        # Coupling losses are read off the level after an instant intake.
        for k in range(k_count):
            if c[DELAYED, k] != 0.0:
                gut[b, k] = gut[b, k] + intake[b, k]
            else:
                level[b, k] = level[b, k] + intake[b, k]
        if noisy:
            draw_normals(keys, counters, b, noise)
        for k in range(k_count):
            # h' = h e^{-k dt} + phi (k a + f) + g transfer, each forcing term
            # pre-multiplied by phi.
            new = level[b, k] * c[DECAY, k]
            if use_ambient:
                new += c[STEP_CONSTANT, k]
                new += ambient[b, k] * c[AMBIENT_GAIN, k]
            else:
                new += c[STEP_CONSTANT_DEFAULT, k]
            new -= activity[b] * c[ACTIVITY_GAIN, k]
            new += forcing[b, k] * c[PHI, k]
            if coupled:
                # Losses: max(e, 0) @ above + max(-e, 0) @ below, e = h - h*; with
                # max(-e, 0) = max(e, 0) - e this is max(e, 0) @ (above + below) - e @ below.
                loss = 0.0
                for j in range(k_count):
                    loss += max(level[b, j] - set_point[b, j], 0.0) * coupling[j, k]
                new -= loss
                if coupled_below:
                    gain = 0.0
                    for j in range(k_count):
                        gain += (level[b, j] - set_point[b, j]) * coupling_below[j, k]
                    new += gain
            if any_delayed:
                new += gut[b, k] * c[TRANSFER, k]
            if noisy:
                new += c[NOISE_SCALE, k] * noise[k]
            new_level[k] = new  # held until every need has read the old levels
        for k in range(k_count):
            new = new_level[k]
            if any_delayed:
                gut[b, k] = gut[b, k] * c[GUT_DECAY, k]
            if adapts:
                set_point[b, k] = set_point[b, k] + c[ADAPTATION, k] * (new - set_point[b, k])
            level[b, k] = new


@inline_kernel
def initial_body(b, level, gut, set_point, coefficients, keys, counters):
    """Fresh body ``b``: levels uniform in each need's initial range, gut empty."""
    c = coefficients
    for k in range(level.shape[1]):
        u = draw_uniform(keys, counters, b)
        level[b, k] = c[INITIAL_LOW, k] + (c[INITIAL_HIGH, k] - c[INITIAL_LOW, k]) * u
        gut[b, k] = 0.0
        set_point[b, k] = c[SET_POINT, k]


@inline_kernel
def is_alive(b, level, coefficients):
    """True where every need of copy ``b`` is strictly inside its lethal bounds."""
    for k in range(level.shape[1]):
        if not (level[b, k] - coefficients[LETHAL_LOW, k] > 0.0
                and coefficients[LETHAL_HIGH, k] - level[b, k] > 0.0):
            return False
    return True


@kernel
def _initial(level, gut, set_point, coefficients, keys, counters):
    for b in range(level.shape[0]):
        initial_body(b, level, gut, set_point, coefficients, keys, counters)


@kernel
def _alive(level, coefficients, out):
    for b in range(level.shape[0]):
        out[b] = is_alive(b, level, coefficients)


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

    The object is immutable after construction. :attr:`coefficients` (rows,
    K), :attr:`coupling`, :attr:`coupling_below` (K, K) and :attr:`flags` are
    what the kernels read; :meth:`initial`, :meth:`transition`, :meth:`alive`,
    :meth:`deviation` and :meth:`in_band` call those kernels on whole batches.
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
        self.adapts = bool(np.any(self.adaptation_rate > 0))
        self.noisy = bool(np.any(self.noise > 0))

        k = self.ambient_rate
        decay, phi, gut_decay, transfer = _relaxation_coefficients(k, self.uptake_rate, self.dt)
        table = np.zeros((COEFFICIENT_ROWS, len(needs)))
        table[DECAY], table[PHI] = decay, phi
        table[GUT_DECAY], table[TRANSFER] = gut_decay, transfer
        # Step gains: phi times each forcing term (see the module docstring).
        table[STEP_CONSTANT] = -self.drain * phi
        table[STEP_CONSTANT_DEFAULT] = table[STEP_CONSTANT] + k * self.ambient * phi
        table[AMBIENT_GAIN] = k * phi
        table[ACTIVITY_GAIN] = self.activity_cost * phi
        table[NOISE_SCALE] = self.noise * math.sqrt(self.dt)
        table[ADAPTATION] = self.adaptation_rate
        table[LETHAL_LOW], table[LETHAL_HIGH] = self.lethal_low, self.lethal_high
        table[BAND] = self.band
        table[DELAYED] = self.delayed
        table[SET_POINT] = self.set_point
        table[INITIAL_LOW], table[INITIAL_HIGH] = self.initial_low, self.initial_high
        table.setflags(write=False)
        self.coefficients = table

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
        self.coupling = (above + below) * phi
        self.coupling_below = below * phi
        self.flags = np.array([self.delayed.any(), self.noisy, self.adapts,
                               above.any() or below.any(), below.any()], dtype=np.bool_)

    @property
    def num_needs(self) -> int:
        return len(self.needs)

    def initial(self, rng, batch: int) -> BodyState:
        """B fresh bodies, levels uniform in each need's initial range, guts empty.

        ``rng``: the copies' :class:`~needbench.envs.streams.CopyStreams`, or a
        numpy Generator to draw fresh stream keys from.
        """
        streams = as_streams(rng, batch)
        state = BodyState(*(np.empty((batch, self.num_needs)) for _ in range(3)))
        _initial(*state, self.coefficients, streams.keys, streams.counter)
        return state

    def transition(
        self,
        state: BodyState,
        rng=None,
        *,
        intake: np.ndarray | None = None,
        activity: np.ndarray | None = None,
        ambient: np.ndarray | None = None,
        forcing: np.ndarray | None = None,
    ) -> BodyState:
        """Advance B bodies by one step (the compiled :func:`advance_bodies`).

        Args:
            state: the bodies before the step.
            rng: source of noise (needed only if some need has ``noise > 0``):
                the copies' CopyStreams, or a numpy Generator to key them from.
            intake: (B, K) amounts consumed this step; they enter the gut (or,
                for needs with ``uptake_rate = inf``, the level at once).
            activity: (B,) activity level this step (0 = rest).
            ambient: (B, K) ambient values this step; default each need's own.
            forcing: (B, K) extra gain per unit time this step (sun, a heater).

        Returns:
            the bodies after the step (new arrays; the input is not modified).
        """
        level = np.array(state.level, dtype=np.float64, ndmin=2)
        batch, k = level.shape
        if self.noisy and rng is None:
            raise ConfigError("rng", rng, "CopyStreams or a numpy Generator when some need "
                              "has noise > 0")
        streams = as_streams(rng, batch) if rng is not None else as_streams(
            np.random.default_rng(0), batch)

        def batch_of(values, shape) -> np.ndarray:
            if values is None:
                return np.zeros(shape)
            return np.ascontiguousarray(np.broadcast_to(np.asarray(values, np.float64), shape))

        gut = np.array(state.gut, dtype=np.float64, ndmin=2)
        set_point = np.array(np.broadcast_to(state.set_point, (batch, k)), dtype=np.float64)
        advance_bodies(level, gut, set_point, batch_of(intake, (batch, k)),
                       batch_of(activity, (batch,)), batch_of(ambient, (batch, k)),
                       batch_of(forcing, (batch, k)), ambient is not None, self.coefficients,
                       self.coupling, self.coupling_below, self.flags, streams.keys,
                       streams.counter, np.empty((2, k)))
        return BodyState(level, gut, set_point)

    def alive(self, state: BodyState) -> np.ndarray:
        """(B,) True where every need is strictly inside its lethal bounds."""
        level = np.array(state.level, dtype=np.float64, ndmin=2)
        out = np.empty(level.shape[0], dtype=np.bool_)
        _alive(level, self.coefficients, out)
        return out

    def deviation(self, state: BodyState) -> np.ndarray:
        """(B, K) signed deviation from the set point in comfort-band units."""
        return (state.level - state.set_point) / self.band

    def in_band(self, state: BodyState) -> np.ndarray:
        """(B,) True where every need is inside its comfort band."""
        return np.all(np.abs(state.level - state.set_point) <= self.band, axis=-1)

    def vector(self, values: dict[str, float], default: float = 0.0) -> np.ndarray:
        """A (K,) array from a {need name: value} mapping; unknown names raise."""
        out = np.full(self.num_needs, default, dtype=np.float64)
        for name, value in values.items():
            if name not in self.index:
                raise ConfigError("need", name, "one of " + ", ".join(self.names))
            out[self.index[name]] = value
        return out
