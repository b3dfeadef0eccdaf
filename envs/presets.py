"""Built-in needs in two systems of units: ``abstract`` and ``mammal``.

These are simplified models for benchmarking agents, not physiology to rely on
and not medical guidance. Each ``mammal`` value carries its source, or says
that it is from memory or a modelling choice.

* ``abstract``: unitless; every set point is 0 and every comfort band 1, so
  levels read directly as deviations in band units. One step is one time unit.
* ``mammal``: an adult-sized body. Time unit: hours; default step 0.25 h.
  Energy is expressed as plasma glucose (mmol/L), water as total body water in
  percent of euhydrated body mass, core temperature in degrees C.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass

from needbench.envs.errors import ConfigError, check_positive
from needbench.envs.needs import Coupling, Need
from needbench.envs.physiology import Physiology


@dataclass(frozen=True)
class Preset:
    """A named set of needs, their couplings and a time step."""

    name: str
    needs: Mapping[str, Need]
    couplings: tuple[Coupling, ...]
    dt: float
    time_unit: str

    def physiology(self, needs: Iterable[str] | None = None,
                   overrides: Mapping[str, Mapping[str, float]] | None = None,
                   dt: float | None = None, extra: Iterable[Need] = (),
                   couplings: Iterable[Coupling] | None = None) -> Physiology:
        """A body with some of this preset's needs (default: all), optionally changed.

        Args:
            needs: names of the needs to keep, in order.
            overrides: {need name: {field: value}} changes to apply.
            dt: step length (default the preset's).
            extra: further needs declared by the user (salt, sleep pressure...).
            couplings: couplings to use instead of the preset's (``()``: none).
        """
        names = list(self.needs) if needs is None else list(needs)
        for name in names:
            if name not in self.needs:
                raise ConfigError("needs", name, "one of " + ", ".join(self.needs))
        chosen = {name: self.needs[name] for name in names}
        if isinstance(extra, (str, bytes, Need)) or not isinstance(extra, Iterable) \
                or isinstance(extra, Mapping):
            raise ConfigError("extra_needs", extra, "a list of Need objects")
        for index, need in enumerate(extra):
            if not isinstance(need, Need):
                raise ConfigError(f"extra_needs[{index}]", need, "a Need object")
            if need.name in chosen:
                where = "an earlier extra need" if need.name not in self.needs else \
                    "a need of the preset (change it with need_overrides)"
                raise ConfigError(f"extra_needs[{index}].name", need.name,
                                  f"a name not taken already: {need.name!r} is {where}")
            chosen[need.name] = need
        for name, changes in (overrides or {}).items():
            if name not in chosen:
                raise ConfigError("overrides", name, "a need of this body: " + ", ".join(chosen))
            unknown = set(changes) - set(Need.__dataclass_fields__)
            if unknown:
                raise ConfigError(f"overrides.{name}", sorted(unknown),
                                  "fields of Need: " + ", ".join(Need.__dataclass_fields__))
            chosen[name] = chosen[name].with_(**changes)
        if couplings is None:
            couplings = tuple(c for c in self.couplings
                              if c.source in chosen and c.target in chosen)
        return Physiology(tuple(chosen.values()), tuple(couplings), self.dt if dt is None else dt)


def abstract() -> Preset:
    """Unitless needs: set point 0, comfort band 1, lethal at +-6 band units."""
    common = dict(unit="band", set_point=0.0, band=1.0, lethal_low=-6.0, lethal_high=6.0,
                  initial_low=-0.5, initial_high=0.5)
    needs = {
        "energy": Need("energy", drain=0.02, activity_cost=0.02, uptake_rate=0.5, **common),
        "water": Need("water", drain=0.03, activity_cost=0.01, **common),
        # Relaxes toward ambient (0 = neutral); tasks move the ambient with sun and night.
        "temperature": Need("temperature", ambient_rate=0.05, activity_cost=-0.02, **common),
    }
    couplings = (
        Coupling("temperature", "water", 0.01, "above", "heat raises water loss"),
        Coupling("temperature", "energy", 0.01, "below", "shivering spends energy"),
        Coupling("temperature", "temperature", -0.01, "below", "shivering produces heat"),
    )
    return Preset("abstract", needs, couplings, dt=1.0, time_unit="step")


# --- mammal -----------------------------------------------------------------

#: Model constant, not physiology: kcal of readily available reserve that one
#: mmol/L of the model's plasma glucose stands for. Chosen so that a 70 kg body
#: fasting at rest falls from the set point (4.75) to the hypoglycaemia threshold
#: (3.9 mmol/L) in about 24 h, the time in which liver glycogen is largely used
#: up (value from memory of physiology textbooks). Real glucose regulation
#: (gluconeogenesis) keeps plasma glucose far steadier than this.
KCAL_PER_GLUCOSE_UNIT = 2000.0

#: Ambient temperature (degrees C) at which an unclothed resting body holds 37
#: degrees C without effort (thermoneutral zone about 28-32 degrees C; value
#: from memory of physiology textbooks).
THERMONEUTRAL_C = 28.0


def kleiber_basal_kcal_per_day(body_mass_kg: float) -> float:
    """Basal metabolic rate by Kleiber's law, 70 * M^0.75 kcal/day (M in kg)."""
    return 70.0 * check_positive("body_mass_kg", body_mass_kg) ** 0.75


def mammal(body_mass_kg: float = 70.0) -> Preset:
    """An adult-sized body in physiological units (time unit: hours)."""
    basal_kcal_per_hour = kleiber_basal_kcal_per_day(body_mass_kg) / 24.0
    glucose_drain = basal_kcal_per_hour / KCAL_PER_GLUCOSE_UNIT  # mmol/L per hour
    temperature_rate = 0.1  # 1/h, Newton coefficient of an unclothed body (modelling choice)
    # Metabolic heat that holds 37 C at the thermoneutral ambient: k * (37 - T_n).
    metabolic_heat = temperature_rate * (37.0 - THERMONEUTRAL_C)
    needs = {
        # Set point and band: normal fasting plasma glucose 3.9-5.6 mmol/L and level 1
        # hypoglycaemia below 3.9 mmol/L (American Diabetes Association, Standards of
        # Care in Diabetes). Lethal low 2.0 mmol/L: severe neuroglycopenia, seizures and
        # coma (from memory). Lethal high 30 mmol/L: hyperosmolar crisis (from memory).
        "energy": Need(
            "energy", unit="mmol/L", set_point=4.75, band=0.85, lethal_low=2.0, lethal_high=30.0,
            initial_low=4.4, initial_high=5.1, drain=glucose_drain,
            # Moderate activity (about 3 METs, from memory) triples energy use.
            activity_cost=2.0 * glucose_drain,
            uptake_rate=1.0,  # 1/h, absorption half-time about 40 min (from memory)
        ),
        # Total body water as % of euhydrated body mass: about 60 % in an adult (from
        # memory). Band 2 points: performance is impaired beyond about 2 % body-mass
        # water loss (Sawka et al. 2007, ACSM position stand on exercise and fluid
        # replacement). Lethal low 45: a loss of about 15 % of body mass is usually
        # fatal (from memory). Lethal high 70: water intoxication (modelling choice).
        "water": Need(
            "water", unit="% body mass", set_point=60.0, band=2.0, lethal_low=45.0,
            lethal_high=70.0, initial_low=59.5, initial_high=60.5,
            # About 2.5 L/day turnover for 70 kg in a temperate climate (from memory).
            drain=2.5 / body_mass_kg * 100.0 / 24.0,
            activity_cost=0.5,  # % body mass per hour of moderate work, sweat (from memory)
            uptake_rate=2.0,  # 1/h (from memory: water is absorbed within about 30 min)
        ),
        # Core temperature: set point 37 C; band 0.5 C (normal core 36.5-37.5 C, from
        # memory); lethal at 32 C and 42 C, a margin of a few degrees (common practice,
        # no source). Hypothermia is below 35 C (clinical definition), inside the
        # survivable range but outside the band.
        "temperature": Need(
            "temperature", unit="degC", set_point=37.0, band=0.5, lethal_low=32.0,
            lethal_high=42.0, initial_low=36.8, initial_high=37.2,
            drain=-metabolic_heat, ambient_rate=temperature_rate, ambient=THERMONEUTRAL_C,
            activity_cost=-2.0 * metabolic_heat,
        ),
    }
    couplings = (
        Coupling("temperature", "water", 0.5, "above",
                 "sweating: % body mass per hour per degree C above the set point"),
        Coupling("temperature", "energy", 0.02, "below",
                 "shivering: mmol/L per hour per degree C below the set point"),
        Coupling("temperature", "temperature", -0.3, "below",
                 "shivering heat: degrees C per hour per degree C below the set point"),
        # Without evaporative cooling, work heat (1.8 C/h at activity 1) against the
        # Newton rate 0.1/h would push the core far above lethal. With this gain the
        # core settles about 0.9 C above the set point at activity 1 (modelling
        # choice; exercise raises core temperature by about 1 C, from memory).
        Coupling("temperature", "temperature", 2.0, "above",
                 "sweating cools: degrees C per hour per degree C above the set point"),
    )
    return Preset("mammal", needs, couplings, dt=0.25, time_unit="hour")


#: Hypothermia threshold, degrees C (clinical definition: core below 35 degrees C).
HYPOTHERMIA_C = 35.0

PRESETS = {"abstract": abstract, "mammal": mammal}


def preset(name: str, **params) -> Preset:
    """A preset by name (``abstract`` or ``mammal``)."""
    if name not in PRESETS:
        raise ConfigError("preset", name, "one of " + ", ".join(map(repr, PRESETS)))
    return PRESETS[name](**params)


__all__ = ["Preset", "abstract", "mammal", "preset", "kleiber_basal_kcal_per_day",
           "KCAL_PER_GLUCOSE_UNIT", "THERMONEUTRAL_C", "HYPOTHERMIA_C"]
