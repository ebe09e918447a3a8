"""The solute mass balance of cooling (common practice), checked on a handbook curve."""

from __future__ import annotations

import numpy as np
import pytest

from sensor.massbalance import cooling_yield_kg, crystallized_mass_kg, yield_fraction
from sensor.solubility import CompositionBasis, auto_candidates, choose_solubility_model
from sensor.units import mass_fraction_to_kg_per_kg
from tests.handbook import (
    CRC_AQUEOUS_SOLUBILITY_MASS_PERCENT,
    CRC_AQUEOUS_SOLUBILITY_TEMPS_C,
    WATER_MOLAR_MASS_G_PER_MOL,
)


def test_rule_of_the_trade():
    # Common practice: m_solvent (c1 - c2), unsolvated crystals, no evaporation.
    assert float(crystallized_mass_kg(1600.0, 0.17, 0.04)) == pytest.approx(208.0)
    assert float(yield_fraction(0.17, 0.04)) == pytest.approx(0.13 / 0.17)
    assert float(crystallized_mass_kg(1.0, 0.04, 0.05)) < 0  # dissolution


def test_cooling_yield_on_the_handbook_curve():
    # Potassium sulfate in water (CRC table, tests/handbook.py): 1000 kg water saturated at
    # 80 °C and cooled to 20 °C with no supersaturation left deposits 1000 (r80 - r20) kg,
    # r = w / (1 - w). The fitted curve must give the same within 2 %: a difference of two
    # solubilities doubles the relative error of each (about 0.5 % here, three figures).
    molar_mass, mass_percent = CRC_AQUEOUS_SOLUBILITY_MASS_PERCENT["K2SO4"]
    conc = mass_fraction_to_kg_per_kg(np.array(mass_percent) / 100)
    temps_k = CRC_AQUEOUS_SOLUBILITY_TEMPS_C + 273.15
    basis = CompositionBasis.mole_fraction(molar_mass / 1000, WATER_MOLAR_MASS_G_PER_MOL / 1000)
    curve = choose_solubility_model(temps_k, conc, auto_candidates(), basis).best.curve
    table = dict(zip(CRC_AQUEOUS_SOLUBILITY_TEMPS_C, conc, strict=True))
    expected = 1000.0 * (table[80.0] - table[20.0])
    got = float(cooling_yield_kg(curve, 1000.0, 353.15, 293.15))
    assert got == pytest.approx(expected, rel=0.02)
    assert got == pytest.approx(
        1000.0 * float(curve.c_sat(353.15) - curve.c_sat(293.15)), rel=1e-12
    )
