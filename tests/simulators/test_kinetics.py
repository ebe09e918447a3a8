"""The plant's rate laws: power laws in sigma, a steep primary switch, size-dependent growth."""

from __future__ import annotations

import numpy as np
import pytest

from simulators.kinetics import PlantKinetics

KINETICS = PlantKinetics(
    growth_rate_constant_m_per_s=2e-7,
    growth_order=1.3,
    secondary_rate_constant_per_kg_s=2e9,
    secondary_order=2.0,
    solids_exponent=1.0,
    dissolution_rate_constant_m_per_s=4e-7,
    primary_rate_at_limit_per_kg_s=1e8,
    primary_exponent=30.0,
    growth_size_exponent=0.5,
    growth_size_scale_m=100e-6,
)


def test_growth_and_dissolution():
    # G = k_g sigma^g (Mullin, Crystallization, 4th ed., ch. 6); D = k_d sigma for sigma < 0
    assert KINETICS.growth_rate(0.05) == pytest.approx(2e-7 * 0.05**1.3, rel=1e-12)
    assert KINETICS.growth_rate(-0.1) == pytest.approx(-4e-8, rel=1e-12)
    assert KINETICS.growth_rate(0.0) == 0.0


def test_size_dependent_growth_follows_the_abegg_stevens_larson_form():
    sizes = np.array([0.0, 100e-6, 300e-6])
    np.testing.assert_allclose(KINETICS.size_factor(sizes), [1.0, 2**0.5, 2.0], rtol=1e-12)


def test_primary_nucleation_switches_on_steeply_at_the_metastable_limit():
    # no crystals: only primary nucleation, k_p (sigma / sigma_lim)^q
    limit = 0.1
    inside = KINETICS.nucleation_rate(0.07, 0.0, limit)
    at = KINETICS.nucleation_rate(0.1, 0.0, limit)
    beyond = KINETICS.nucleation_rate(0.12, 0.0, limit)
    assert at == pytest.approx(1e8)
    assert inside < 1e-4 * at < at < 1e-2 * beyond
    assert KINETICS.nucleation_rate(-0.05, 0.1, limit) == 0.0
    # with crystals, secondary nucleation k_b sigma^b M_T^j adds to it
    assert KINETICS.nucleation_rate(0.05, 0.02, limit) == pytest.approx(
        2e9 * 0.05**2 * 0.02 + 1e8 * 0.5**30, rel=1e-12
    )
