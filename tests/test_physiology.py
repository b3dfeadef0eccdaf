"""The physiology core against analytic solutions and scipy's ODE solver."""

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from needbench.envs.errors import ConfigError
from needbench.envs.needs import Coupling, Need
from needbench.envs.physiology import BodyState, Physiology


def need(name="x", **changes):
    fields = dict(unit="u", set_point=0.0, band=1.0, lethal_low=-100.0, lethal_high=100.0,
                  initial_low=0.0, initial_high=0.0)
    fields.update(changes)
    return Need(name, **fields)


def start(body, level, gut=None):
    level = np.atleast_2d(np.asarray(level, float))
    gut = np.zeros_like(level) if gut is None else np.atleast_2d(np.asarray(gut, float))
    return BodyState(level, gut, np.broadcast_to(body.set_point, level.shape).copy())


def run(body, state, steps, **inputs):
    path = [state.level[0].copy()]
    for _ in range(steps):
        state = body.transition(state, **inputs)
        path.append(state.level[0].copy())
    return np.array(path), state


@pytest.mark.parametrize("dt", [0.1, 1.0, 7.5])
def test_newton_cooling_matches_analytic_solution(dt):
    # Source: Newton's law of cooling dT/dt = -k (T - T_a), solution
    # T(t) = T_a + (T_0 - T_a) exp(-k t). Exact discretisation: no dependence on dt.
    k, ambient, t0 = 0.08, -3.0, 2.0
    body = Physiology([need("temperature", ambient_rate=k, ambient=ambient)], dt=dt)
    path, _ = run(body, start(body, [t0]), 40)
    t = dt * np.arange(41)
    assert np.allclose(path[:, 0], ambient + (t0 - ambient) * np.exp(-k * t), rtol=0, atol=1e-12)


def test_newton_cooling_with_heat_and_activity_agrees_with_solve_ivp():
    # Source: scipy.integrate.solve_ivp (RK45, tight tolerances) on the same ODE
    # dT/dt = -k (T - T_a) + heat - activity * cost.
    k, ambient, heat, cost, activity = 0.1, 10.0, 2.5, -0.4, 1.5
    body = Physiology([need("temperature", ambient_rate=k, ambient=ambient, drain=-heat,
                            activity_cost=cost)], dt=0.5)
    path, _ = run(body, start(body, [37.0]), 60, activity=np.array([activity]))
    sol = solve_ivp(lambda t, y: -k * (y - ambient) + heat - activity * cost, (0, 30), [37.0],
                    t_eval=0.5 * np.arange(61), rtol=1e-11, atol=1e-11)
    assert np.allclose(path[:, 0], sol.y[0], atol=1e-7)


def test_first_order_absorption_matches_bateman_function():
    # Source: Bateman (1910); the one-compartment model with first-order absorption
    # (rate ka) and elimination (rate ke): C(t) = D ka / (ka - ke) (e^{-ke t} - e^{-ka t}).
    ka, ke, dose, dt = 0.9, 0.2, 3.0, 0.25
    body = Physiology([need(uptake_rate=ka, ambient_rate=ke, ambient=0.0)], dt=dt)
    path, _ = run(body, start(body, [0.0], gut=[dose]), 80)
    t = dt * np.arange(81)
    bateman = dose * ka / (ka - ke) * (np.exp(-ke * t) - np.exp(-ka * t))
    assert np.allclose(path[:, 0], bateman, atol=1e-12)


def test_absorption_equal_rates_limit():
    # Analytic limit of the Bateman function for ka = ke = k: C(t) = D k t e^{-k t}.
    k, dose = 0.5, 2.0
    body = Physiology([need(uptake_rate=k, ambient_rate=k, ambient=0.0)], dt=1.0)
    path, _ = run(body, start(body, [0.0], gut=[dose]), 20)
    t = np.arange(21)
    assert np.allclose(path[:, 0], dose * k * t * np.exp(-k * t), atol=1e-12)


def test_delivery_curve_without_elimination():
    # Analytic: with no elimination the delivered amount is D (1 - e^{-ka t}).
    ka, dose = 0.3, 1.7
    body = Physiology([need(uptake_rate=ka)], dt=1.0)
    state = start(body, [0.0])
    path, state = run(body, state, 1, intake=np.array([[dose]]))
    path2, _ = run(body, state, 29)
    delivered = np.concatenate([path, path2[1:]])[:, 0]
    assert np.allclose(delivered, dose * (1 - np.exp(-ka * np.arange(31))), atol=1e-12)


def test_instant_uptake_and_constant_drain_closed_form():
    # Closed form: constant drain c for t steps moves the level by -c t; an instant
    # intake adds at once.
    body = Physiology([need(drain=0.05, activity_cost=0.02)], dt=2.0)
    state = start(body, [1.0])
    state = body.transition(state, intake=np.array([[0.5]]), activity=np.array([1.0]))
    assert state.level[0, 0] == pytest.approx(1.5 - 2.0 * (0.05 + 0.02))


def test_starvation_time_matches_drain_rate():
    # Closed form: an agent that never eats crosses the lethal bound after
    # ceil((h0 - lethal_low) / drain) steps.
    body = Physiology([need("energy", drain=0.03, lethal_low=-6.0)])
    state, steps = start(body, [0.4]), 0
    while body.alive(state)[0]:
        state = body.transition(state)
        steps += 1
    assert steps == math.ceil((0.4 + 6.0) / 0.03)


def test_couplings_drain_targets_by_excess():
    # By hand: temperature 2 above its set point, gain 0.1 -> water loses 0.2 per unit time;
    # 1 below would cost energy instead (side 'below').
    needs = [need("temperature"), need("water"), need("energy")]
    couplings = [Coupling("temperature", "water", 0.1, "above"),
                 Coupling("temperature", "energy", 0.3, "below")]
    body = Physiology(needs, couplings)
    hot = body.transition(start(body, [2.0, 0.0, 0.0]))
    assert np.allclose(hot.level[0], [2.0, -0.2, 0.0])
    cold = body.transition(start(body, [-1.0, 0.0, 0.0]))
    assert np.allclose(cold.level[0], [-1.0, 0.0, -0.3])


def test_set_point_adaptation_is_an_exponential_moving_average():
    # Analytic: s_t = h + (s_0 - h)(1 - a)^t for a level held at h.
    a = 0.1
    body = Physiology([need(adaptation_rate=a)])
    state = start(body, [2.0])
    for _ in range(15):
        state = body.transition(state)
    assert state.set_point[0, 0] == pytest.approx(2.0 + (0.0 - 2.0) * (1 - a) ** 15)


def test_noise_has_the_declared_scale():
    body = Physiology([need(noise=0.2)], dt=4.0)
    rng = np.random.default_rng(1)
    state = start(body, np.zeros((20000, 1)))
    moved = body.transition(state, rng).level[:, 0]
    # Gaussian increments with standard deviation noise * sqrt(dt) = 0.4.
    assert moved.std() == pytest.approx(0.4, rel=0.03)
    with pytest.raises(ConfigError, match="rng"):
        body.transition(state)


def test_batched_equals_one_by_one():
    needs = [need("a", drain=0.1, ambient_rate=0.2, ambient=1.0, uptake_rate=0.5),
             need("b", activity_cost=0.3), need("c", adaptation_rate=0.05)]
    body = Physiology(needs, [Coupling("a", "b", 0.2), Coupling("c", "a", 0.1, "below")])
    rng = np.random.default_rng(0)
    levels = rng.normal(size=(6, 3))
    intake = rng.uniform(0, 1, size=(6, 3))
    activity = rng.uniform(0, 2, size=6)
    batched = body.transition(start(body, levels), intake=intake, activity=activity)
    for i in range(6):
        one = body.transition(start(body, levels[i]), intake=intake[i:i + 1],
                              activity=activity[i:i + 1])
        assert np.allclose(batched.level[i], one.level[0])
        assert np.allclose(batched.set_point[i], one.set_point[0])


def test_alive_deviation_and_band():
    body = Physiology([need("a", band=2.0, lethal_low=-5, lethal_high=5)])
    state = start(body, [[1.0], [-3.0], [5.0]])
    assert body.alive(state).tolist() == [True, True, False]
    assert body.deviation(state)[:, 0].tolist() == [0.5, -1.5, 2.5]
    assert body.in_band(state).tolist() == [True, False, False]


@pytest.mark.parametrize("changes, field", [
    ({"band": 0.0}, "needs.x.band"),
    ({"band": -1.0}, "needs.x.band"),
    ({"set_point": 200.0}, "needs.x.set_point"),
    ({"lethal_low": 1.0}, "needs.x.set_point"),
    ({"drain": float("nan")}, "needs.x.drain"),
    ({"uptake_rate": 0.0}, "needs.x.uptake_rate"),
    ({"noise": -0.1}, "needs.x.noise"),
    ({"adaptation_rate": 1.5}, "needs.x.adaptation_rate"),
    ({"initial_low": 1.0, "initial_high": 0.5}, "needs.x.initial_low/initial_high"),
])
def test_invalid_need_names_the_field(changes, field):
    with pytest.raises(ConfigError) as error:
        need(**changes)
    assert error.value.path == field


def test_invalid_body():
    with pytest.raises(ConfigError, match="unique"):
        Physiology([need("a"), need("a")])
    with pytest.raises(ConfigError, match="declared need"):
        Physiology([need("a")], [Coupling("a", "salt", 0.1)])
    with pytest.raises(ConfigError, match="dt"):
        Physiology([need("a")], dt=0)
    with pytest.raises(ConfigError, match="couplings"):
        Coupling("a", "b", 0.1, side="sideways")


def test_user_declared_need_needs_no_core_change():
    # A new need (salt, in mmol/L of plasma sodium) declared by a user.
    salt = Need("salt", unit="mmol/L", set_point=140.0, band=5.0, lethal_low=115.0,
                lethal_high=165.0, initial_low=138.0, initial_high=142.0, drain=0.2)
    from needbench.envs.presets import abstract
    body = abstract().physiology(["energy", "water"], extra=[salt])
    assert body.names == ("energy", "water", "salt")
    state = body.initial(np.random.default_rng(0), 4)
    after = body.transition(state)
    assert np.allclose(after.level[:, 2], state.level[:, 2] - 0.2)
