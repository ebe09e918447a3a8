"""Concentration units: round trips, refusals, and the handbook's own conversion formulas."""

from __future__ import annotations

import numpy as np
import pytest

from sensor.errors import UnitError
from sensor.units import (
    LinearDensity,
    celsius_to_kelvin,
    concentration_unit,
    g_per_100g_to_kg_per_kg,
    g_per_l_to_kg_per_kg,
    kelvin_to_celsius,
    kg_per_kg_to_g_per_100g,
    kg_per_kg_to_g_per_l,
    kg_per_kg_to_mass_fraction,
    kg_per_kg_to_mole_fraction,
    mass_fraction_to_kg_per_kg,
    mole_fraction_to_kg_per_kg,
)

CONC = np.array([0.0, 1e-6, 0.0123, 0.25, 1.0, 3.7, 40.0])
DENSITY = LinearDensity(
    reference_kg_per_m3=870.0,
    reference_temp_k=293.15,
    temp_coef_kg_per_m3_k=-0.85,
    mass_fraction_coef_kg_per_m3=420.0,
)


def test_celsius_kelvin_round_trip():
    temps = np.array([-40.0, 0.0, 25.0, 99.99])
    np.testing.assert_allclose(
        kelvin_to_celsius(celsius_to_kelvin(temps)), temps, rtol=0, atol=1e-12
    )
    assert float(celsius_to_kelvin(0.0)) == 273.15  # definition of the Celsius scale (SI brochure)


@pytest.mark.parametrize(
    ("forward", "backward"),
    [
        (kg_per_kg_to_g_per_100g, g_per_100g_to_kg_per_kg),
        (kg_per_kg_to_mass_fraction, mass_fraction_to_kg_per_kg),
        (
            lambda c: kg_per_kg_to_mole_fraction(c, 0.2863, 0.0314),
            lambda x: mole_fraction_to_kg_per_kg(x, 0.2863, 0.0314),
        ),
        (
            lambda c: kg_per_kg_to_g_per_l(c, 310.0, DENSITY),
            lambda v: g_per_l_to_kg_per_kg(v, 310.0, DENSITY),
        ),
    ],
    ids=["g/100g", "mass-fraction", "mole-fraction", "g/L"],
)
def test_round_trips_exact(forward, backward):
    np.testing.assert_allclose(backward(forward(CONC)), CONC, rtol=1e-12, atol=1e-15)


def test_crc_composition_formulas():
    # CRC Handbook, "Aqueous Solubility of Inorganic Compounds", introduction: mole fraction
    # x2 = (w2/M2) / {(w2/M2) + (1 - w2)/M1} and r2 = 100 w2 / (1 - w2) g per 100 g water.
    w2, m2, m1 = 0.107, 174.26, 18.015
    c = mass_fraction_to_kg_per_kg(w2)
    assert float(kg_per_kg_to_g_per_100g(c)) == pytest.approx(100 * w2 / (1 - w2), rel=1e-14)
    expected_x = (w2 / m2) / ((w2 / m2) + (1 - w2) / m1)
    assert float(kg_per_kg_to_mole_fraction(c, m2, m1)) == pytest.approx(expected_x, rel=1e-14)


def test_g_per_l_matches_definition():
    # Mass concentration = density x mass fraction (1 kg/m3 = 1 g/L), at a density that
    # depends on both temperature and concentration.
    c, temp = 0.3, 320.0
    w = c / (1 + c)
    rho = 870.0 - 0.85 * (temp - 293.15) + 420.0 * w
    assert float(kg_per_kg_to_g_per_l(c, temp, DENSITY)) == pytest.approx(rho * w, rel=1e-14)


@pytest.mark.parametrize(
    ("call", "message"),
    [
        (lambda: mass_fraction_to_kg_per_kg(1.0), "below 1"),
        (lambda: mass_fraction_to_kg_per_kg(-0.1), "negative"),
        (lambda: g_per_100g_to_kg_per_kg(np.nan), "finite"),
        (lambda: mole_fraction_to_kg_per_kg(0.1, 0.0, 0.018), "molar mass"),
        (lambda: g_per_l_to_kg_per_kg(2000.0, 300.0, DENSITY), "below the solution density"),
        (lambda: concentration_unit("ppm"), "unknown concentration unit 'ppm'"),
        (lambda: concentration_unit("mole-fraction"), "molar masses"),
        (lambda: concentration_unit("g/L"), "density"),
    ],
)
def test_refuses_what_a_unit_does_not_allow(call, message):
    with pytest.raises(UnitError, match=message):
        call()


def test_named_units_agree_with_functions():
    unit = concentration_unit("mole-fraction", solute_molar_mass=0.2863, solvent_molar_mass=0.0314)
    np.testing.assert_array_equal(
        unit.from_kg_per_kg(CONC), kg_per_kg_to_mole_fraction(CONC, 0.2863, 0.0314)
    )
    g_per_l = concentration_unit("g/L", density=DENSITY)
    np.testing.assert_allclose(
        g_per_l.to_kg_per_kg(g_per_l.from_kg_per_kg(CONC, 300.0), 300.0),
        CONC,
        rtol=1e-12,
        atol=1e-15,
    )
