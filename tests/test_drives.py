"""Drive functions: published properties of homeostatic reward, and validation."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from needbench.envs.drives import AsymmetricDrive, HomeostaticDrive, QuadraticDrive, make_drive
from needbench.envs.errors import ConfigError

SET_POINT = np.zeros(2)


def reward(drive, level, dose):
    """r(h, k) = D(h) - D(h + k), the homeostatic reward of an outcome k."""
    level = np.asarray(level, float)
    return drive(level, SET_POINT) - drive(level + np.asarray(dose, float), SET_POINT)


# n > m > 1: the region where Keramati & Gutkin (2014) derive the properties below.
exponents = st.tuples(st.floats(1.1, 4.0), st.floats(0.05, 0.95)).map(
    lambda nm: (nm[0], 1.0 + (nm[0] - 1.0) * nm[1]))  # 1 < m < n
deficit = st.floats(0.5, 5.0)
other = st.floats(0.0, 4.0)


@settings(max_examples=60, deadline=None)
@given(exponents, deficit, st.floats(0.05, 0.9), st.floats(0.05, 0.9))
def test_reward_grows_with_dose(nm, d, a, b):
    # Source: Keramati & Gutkin (2014), eLife 3:e04811 — reward increases with dose
    # as long as the outcome does not overshoot the set point.
    drive = HomeostaticDrive(*nm)
    small, large = sorted((a * d, b * d))
    if large - small < 1e-3:
        return
    assert reward(drive, [-d, 0], [large, 0]) > reward(drive, [-d, 0], [small, 0])


@settings(max_examples=60, deadline=None)
@given(exponents, deficit, st.floats(0.1, 3.0), st.floats(0.05, 0.5))
def test_same_dose_worth_more_under_deprivation(nm, d, extra, dose_share):
    # Source: Keramati & Gutkin (2014) — the same outcome is more rewarding when the
    # deprivation is larger (n > m makes D convex in the deviation).
    drive = HomeostaticDrive(*nm)
    dose = dose_share * d
    assert reward(drive, [-(d + extra), 0], [dose, 0]) > reward(drive, [-d, 0], [dose, 0])


@settings(max_examples=60, deadline=None)
@given(exponents, deficit, st.floats(0.05, 0.9), other, st.floats(0.2, 3.0))
def test_irrelevant_drive_inhibition(nm, d, dose_share, base, extra):
    # Source: Keramati & Gutkin (2014) — a deviation in an unrelated need lowers the
    # reward of an outcome (requires m > 1).
    drive = HomeostaticDrive(*nm)
    dose = [dose_share * d, 0]
    assert reward(drive, [-d, base + extra], dose) < reward(drive, [-d, base], dose)


@settings(max_examples=60, deadline=None)
@given(exponents, st.floats(0.0, 4.0), st.floats(0.05, 2.0))
def test_loss_aversion(nm, d, k):
    # Source: Keramati & Gutkin (2014) — a loss of size k costs more than a gain of
    # size k brings, at any state below the set point.
    drive = HomeostaticDrive(*nm)
    h = np.array([-d - k, 0.0])  # a gain of k stays at or below the set point
    gain = drive(h, SET_POINT) - drive(h + [k, 0], SET_POINT)
    loss = drive(h - [k, 0], SET_POINT) - drive(h, SET_POINT)
    assert loss > gain


@settings(max_examples=60, deadline=None)
@given(exponents, deficit, st.floats(0.05, 0.45))
def test_risk_aversion_concave_in_dose(nm, d, spread_share):
    # Source: Keramati & Gutkin (2014) — reward is concave in dose, so a sure dose
    # beats a fair lottery over doses with the same mean (Jensen's inequality).
    drive = HomeostaticDrive(*nm)
    mean, spread = 0.5 * d, spread_share * d
    sure = reward(drive, [-d, 0], [mean, 0])
    lottery = 0.5 * (reward(drive, [-d, 0], [mean - spread, 0])
                     + reward(drive, [-d, 0], [mean + spread, 0]))
    assert sure > lottery


def test_counterexamples_outside_the_region():
    # Analytic: with n < m the drive is concave in the deviation and the properties
    # reverse; with m < 1 an unrelated deviation raises the reward instead.
    concave = HomeostaticDrive(n=1.0, m=2.0)  # D = sqrt(|d|) in one need
    dose = [0.5, 0]
    assert reward(concave, [-4, 0], dose) < reward(concave, [-1, 0], dose)  # worth less
    sure = reward(concave, [-2, 0], [1.0, 0])
    lottery = 0.5 * (reward(concave, [-2, 0], [0.2, 0]) + reward(concave, [-2, 0], [1.8, 0]))
    assert sure < lottery  # risk seeking
    low_m = HomeostaticDrive(n=2.0, m=0.5)
    assert reward(low_m, [-2, 2], [1, 0]) > reward(low_m, [-2, 0], [1, 0])  # no inhibition


def test_homeostatic_drive_value_by_hand():
    # Worked by hand: d = (3, 4) band units, n = 2, m = 2 gives the Euclidean norm 5.
    drive = HomeostaticDrive(n=2, m=2)
    assert drive(np.array([-3.0, 4.0]), SET_POINT) == pytest.approx(5.0)
    # Weights and scales: w = (1, 4), s = (2, 1), d = (2, 1) -> (1*1 + 4*1)^(1/1) = 5.
    weighted = HomeostaticDrive(n=2, m=1, weights=[1, 4], scale=[2, 1], num_needs=2)
    assert weighted(np.array([-2.0, 1.0]), SET_POINT) == pytest.approx(5.0)


def test_quadratic_and_asymmetric_by_hand():
    quadratic = QuadraticDrive(weights=[1, 2])
    assert quadratic(np.array([1.0, -3.0]), SET_POINT) == pytest.approx(1 + 18)
    asym = AsymmetricDrive(weight_below=2.0, weight_above=0.5, n_below=2, n_above=1, m=1)
    # Need 0 is 3 below (deficit): 2 * 3^2 = 18; need 1 is 4 above: 0.5 * 4 = 2.
    assert asym(np.array([-3.0, 4.0]), SET_POINT) == pytest.approx(20.0)


def test_batched_shapes():
    drive = HomeostaticDrive()
    batch = np.random.default_rng(0).normal(size=(7, 5, 2))
    out = drive(batch, SET_POINT)
    assert out.shape == (7, 5)
    assert np.allclose(out[3, 2], drive(batch[3, 2], SET_POINT))


@pytest.mark.parametrize("params, field", [
    ({"n": 0}, "drive.n"), ({"m": -1}, "drive.m"), ({"m": float("nan")}, "drive.m"),
    ({"n": float("inf")}, "drive.n"), ({"weights": [1, -1]}, "drive.weights"),
    ({"weights": [1, float("nan")]}, "drive.weights"),
])
def test_invalid_parameters_name_the_field(params, field):
    with pytest.raises(ConfigError) as error:
        make_drive("homeostatic", num_needs=2, **params)
    assert error.value.path == field
    assert field in str(error.value)


def test_unknown_family_and_parameter():
    with pytest.raises(ConfigError, match="drive.family"):
        make_drive("cubic")
    with pytest.raises(ConfigError, match="parameters among"):
        make_drive("quadratic", n=3)
    with pytest.raises(ConfigError, match="drive.scale"):
        make_drive("homeostatic", scale=[1.0, 0.0], num_needs=2)
