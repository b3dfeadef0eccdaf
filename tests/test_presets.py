"""Preset values against reference values (each source named)."""

import numpy as np
import pytest

from needbench.envs.errors import ConfigError
from needbench.envs.needs import Need
from needbench.envs.presets import (
    HYPOTHERMIA_C,
    KCAL_PER_GLUCOSE_UNIT,
    abstract,
    kleiber_basal_kcal_per_day,
    mammal,
    preset,
)


def test_core_temperature():
    temperature = mammal().needs["temperature"]
    # Common practice, no source: core set point 37 degrees C.
    assert temperature.set_point == 37.0
    # Common practice, no source: lethal a few degrees (here 2 to 8) either side.
    assert 2.0 <= 37.0 - temperature.lethal_low <= 8.0
    assert 2.0 <= temperature.lethal_high - 37.0 <= 8.0
    # Source: clinical definition of hypothermia, core temperature below 35 degrees C.
    assert HYPOTHERMIA_C == 35.0
    assert temperature.lethal_low < HYPOTHERMIA_C < temperature.band_low


def test_glucose():
    energy = mammal().needs["energy"]
    # Source: American Diabetes Association, Standards of Care in Diabetes: normal
    # fasting plasma glucose 3.9-5.6 mmol/L (70-100 mg/dL); level 1 hypoglycaemia
    # below 3.9 mmol/L (70 mg/dL).
    assert energy.band_low == pytest.approx(3.9)
    assert energy.band_high == pytest.approx(5.6)
    assert energy.unit == "mmol/L"
    # mg/dL to mmol/L for glucose: divide by 18.0 (molar mass 180 g/mol).
    assert 70 / 18.0 == pytest.approx(energy.band_low, abs=0.02)


def test_water():
    water = mammal().needs["water"]
    # Value from memory of physiology textbooks: total body water about 60 % of body
    # mass in an adult.
    assert water.set_point == 60.0
    # Source: Sawka et al. (2007), ACSM position stand "Exercise and fluid replacement":
    # performance degrades beyond about 2 % body-mass water loss.
    assert water.band_low == pytest.approx(60.0 - 2.0)


@pytest.mark.parametrize("mass", [0.02, 3.0, 70.0, 600.0])
def test_kleiber_basal_energy(mass):
    # Source: Kleiber's law, basal metabolic rate 70 * M^0.75 kcal/day (M in kg).
    assert kleiber_basal_kcal_per_day(mass) == pytest.approx(70 * mass ** 0.75)
    # The preset's resting glucose drain converts back to the same kcal/day.
    drain = mammal(body_mass_kg=mass).needs["energy"].drain  # mmol/L per hour
    assert drain * KCAL_PER_GLUCOSE_UNIT * 24 == pytest.approx(70 * mass ** 0.75)


def test_kleiber_human_by_memory():
    # Value from memory of Kleiber (1961), The Fire of Life: about 1,700 kcal/day
    # for a 70 kg human.
    assert kleiber_basal_kcal_per_day(70.0) == pytest.approx(1694, abs=2)


def test_fasting_reaches_hypoglycaemia_in_about_a_day():
    body = mammal().physiology(["energy"])
    state = body.initial(np.random.default_rng(0), 1)
    state = state._replace(level=np.array([[4.75]]))
    hours = 0.0
    while state.level[0, 0] > 3.9:
        state = body.transition(state)
        hours += body.dt
    # The documented modelling choice: about 24 h (liver glycogen, from memory).
    assert 20 <= hours <= 28


def test_thermoneutral_ambient_holds_37():
    body = mammal().physiology(["temperature"])
    state = body.initial(np.random.default_rng(0), 1)._replace(level=np.array([[37.0]]))
    for _ in range(200):
        state = body.transition(state)
    assert state.level[0, 0] == pytest.approx(37.0, abs=1e-9)


def test_abstract_preset_is_unitless():
    for need in abstract().needs.values():
        assert (need.set_point, need.band) == (0.0, 1.0)


def test_preset_errors():
    with pytest.raises(ConfigError, match="preset"):
        preset("reptile")
    with pytest.raises(ConfigError, match="needs"):
        abstract().physiology(["energy", "sleep"])
    with pytest.raises(ConfigError, match="overrides.energy"):
        abstract().physiology(overrides={"energy": {"colour": 1}})


def test_working_body_settles_near_a_degree_above_the_set_point():
    # Analytic steady state of dT/dt = -k (T - T_n) + q + a c - s (T - 37) with
    # q = k (37 - T_n): T - 37 = a c / (k + s); the modelling choice documented in
    # the preset (exercise raises core temperature by about 1 C, from memory).
    body = mammal().physiology(["temperature"])
    state = body.initial(np.random.default_rng(0), 1)._replace(level=np.array([[37.0]]))
    for _ in range(400):
        state = body.transition(state, activity=np.array([1.0]))
    heat = -body.activity_cost[0]
    assert state.level[0, 0] - 37.0 == pytest.approx(heat / (0.1 + 2.0), abs=1e-6)
    assert 0.5 < state.level[0, 0] - 37.0 < 1.5


@pytest.mark.parametrize(("extra", "path"), [
    ({"name": "salt"}, "extra_needs"),
    ("salt", "extra_needs"),
    ([{"name": "salt"}], r"extra_needs\[0\]"),
])
def test_extra_needs_must_be_a_list_of_needs(extra, path):
    with pytest.raises(ConfigError, match=path):
        abstract().physiology(["energy"], extra=extra)


def test_an_extra_need_may_not_take_a_name_already_in_the_body():
    salt = Need("salt", unit="mmol/L", set_point=140.0, band=5.0, lethal_low=115.0,
                lethal_high=165.0, initial_low=138.0, initial_high=142.0)
    with pytest.raises(ConfigError, match="earlier extra need"):
        abstract().physiology(["energy"], extra=[salt, salt])
    energy = salt.with_(name="energy")
    with pytest.raises(ConfigError, match="need_overrides"):
        abstract().physiology(["energy"], extra=[energy])


def test_swapped_lethal_bounds_are_named_as_such():
    with pytest.raises(ConfigError, match="swapped"):
        Need("x", unit="u", set_point=0.0, band=1.0, lethal_low=5.0, lethal_high=-5.0,
             initial_low=0.0, initial_high=0.0)
