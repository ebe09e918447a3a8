"""The metastable zone: Nývlt's relation fitted to cloud points, and the fixed-width zone.

Outside reference: the relation as published by J. Nývlt, "Kinetics of nucleation in
solutions", J. Cryst. Growth 3-4 (1968) 377-383, b (dc*/dT) = K_N (dc_max)^m; and J. W. Mullin,
Crystallization, 4th ed., 2001, section 5.5 (the polythermal method). The recovery checks use
synthetic cloud points and test the method itself.
"""

from __future__ import annotations

import numpy as np
import pytest

from sensor.errors import FitError
from sensor.metastable import FixedWidthZone, NyvltZone, fit_nyvlt
from sensor.solubility import CompositionBasis, SolubilityCurve, VantHoff

RISING = SolubilityCurve(
    VantHoff(),
    [2.0, -1500.0],
    np.zeros((2, 2)),
    CompositionBasis.mass_fraction(),
    (278.15, 348.15),
    dof=10,
)
FALLING = SolubilityCurve(
    VantHoff(),
    [-6.0, 600.0],
    np.zeros((2, 2)),
    CompositionBasis.mass_fraction(),
    (278.15, 348.15),
    dof=10,
)
TRUE_PARAMS = np.array([0.15, 1 / 2.6])  # a0, a1 = 1/m
RATES_K_PER_S = np.array([0.1, 0.2, 0.5, 1.0]) / 60.0


def _zone(curve=RISING, params=TRUE_PARAMS):
    return NyvltZone(
        solubility=curve,
        rate_range_k_per_s=(RATES_K_PER_S[0], RATES_K_PER_S[-1]),
        params=params,
        covariance=np.zeros((2, 2)),
        dof=10,
    )


def _cloud_points(rng, noise_k=0.2):
    zone = _zone()
    temp_sat = np.repeat([308.15, 318.15, 328.15, 338.15], 4)
    rate = np.tile(RATES_K_PER_S, 4)
    conc = RISING.c_sat(temp_sat)
    cloud = temp_sat - zone.width_k(temp_sat, rate) + noise_k * rng.standard_normal(temp_sat.size)
    return conc, rate, cloud


def test_published_form_holds():
    # Nývlt (1968): b |dc*/dT| = K_N dc_max^m, with dc_max = |dc*/dT| dT_max.
    zone = _zone()
    temp_sat = np.array([305.0, 320.0, 335.0])
    for rate in RATES_K_PER_S:
        width = zone.width_k(temp_sat, rate)
        slope = RISING.dc_sat_dtemp(temp_sat)
        lhs = rate * slope
        rhs = np.exp(zone.ln_k_n) * (slope * width) ** zone.order_m
        np.testing.assert_allclose(lhs, rhs, rtol=1e-12)


def test_nyvlt_recovers_parameters(rng):
    # Synthetic data (a fact of the method): the fit finds the parameters that made them.
    conc, rate, cloud = _cloud_points(rng)
    fit = fit_nyvlt(conc, rate, cloud, RISING)
    z = (fit.zone.params - TRUE_PARAMS) / np.sqrt(np.diag(fit.zone.covariance))
    assert np.all(np.abs(z) < 4), z
    assert fit.zone.order_m == pytest.approx(2.6, rel=0.15)
    assert fit.rmse_k == pytest.approx(0.2, rel=0.5)
    lo, hi = fit.zone.width_interval_k(318.15, 0.5 / 60)
    assert lo < float(_zone().width_k(318.15, 0.5 / 60)) < hi


def test_zone_widens_with_cooling_rate():
    widths = _zone().width_k(320.0, RATES_K_PER_S)
    assert np.all(np.diff(widths) > 0)


def test_limit_and_cloud_point_are_inverse():
    # The limit at T is the concentration whose cloud point at rate b is T.
    zone = _zone()
    temps = np.linspace(300.0, 335.0, 8)
    for rate in RATES_K_PER_S:
        limit = zone.c_limit(temps, rate)
        np.testing.assert_allclose(zone.cloud_temp_k(limit, rate), temps, rtol=0, atol=1e-8)
        assert np.all(zone.sigma_limit(temps, rate) > 0)


def test_retrograde_zone_is_on_the_heating_side():
    zone = _zone(curve=FALLING)
    temp = np.array([310.0, 320.0])
    rate = 0.5 / 60
    assert np.all(FALLING.dc_sat_dtemp(temp) < 0)
    assert np.all(zone.limit_temp_sat_k(temp, rate) < temp)
    assert np.all(zone.c_limit(temp, rate) > FALLING.c_sat(temp))
    limit = zone.c_limit(temp, rate)
    np.testing.assert_allclose(zone.cloud_temp_k(limit, rate), temp, atol=1e-8)


def test_fixed_width_zone():
    zone = FixedWidthZone(
        solubility=RISING, rate_range_k_per_s=(0.0, np.inf), width=6.0, width_std=0.5
    )
    conc = RISING.c_sat(330.0)
    assert float(zone.cloud_temp_k(conc, 0.3 / 60)) == pytest.approx(324.0, abs=1e-9)
    lo, hi = zone.width_interval_k(330.0, 0.01)
    assert float(hi - lo) == pytest.approx(2 * 1.959964 * 0.5, rel=1e-6)
    with pytest.raises(ValueError, match="positive"):
        FixedWidthZone(solubility=RISING, rate_range_k_per_s=(0.0, 1.0), width=0.0)


def test_rate_extrapolation_flag():
    flags = _zone().rate_extrapolated(np.array([0.05, 0.1, 1.0, 1.5]) / 60)
    assert flags.tolist() == [True, False, False, True]


def test_refusals_name_the_point(rng):
    conc, rate, cloud = _cloud_points(rng)
    with pytest.raises(FitError, match="at least 4 points"):
        fit_nyvlt(conc[:3], rate[:3], cloud[:3], RISING)
    with pytest.raises(FitError, match="two or more cooling rates"):
        fit_nyvlt(conc[::4], rate[::4], cloud[::4], RISING)
    bad = cloud.copy()
    bad[5] = RISING.temp_sat(conc[5]) + 1.0
    with pytest.raises(FitError, match="not beyond the saturation temperature") as caught:
        fit_nyvlt(conc, rate, bad, RISING)
    assert caught.value.point == 5
    far = conc.copy()
    far[2] = 10.0
    with pytest.raises(FitError, match="outside the solubility curve's domain") as caught:
        fit_nyvlt(far, rate, cloud, RISING)
    assert caught.value.point == 2
