"""The per-sample outputs: the supersaturation, its standard deviation with the solubility
curve's own uncertainty, the margins, solids, yield and sizes."""

from __future__ import annotations

import numpy as np
import pytest

from sensor.crystallizer import CONC, TEMP, ZETA0, ZETA3
from sensor.outputs import estimates, sigma_std
from tests.synthetic import demo_setup


@pytest.fixture(scope="module")
def setup():
    return demo_setup()


def _one(setup, temp_k=310.0, conc_over=1.1, zeta=(0.01, 0.008, 0.007, 0.006), jacket=305.0):
    curve = setup.zone.solubility
    n = setup.model.layout.size
    x = np.zeros(n)
    x[TEMP] = temp_k
    x[CONC] = conc_over * float(curve.c_sat(temp_k))
    x[ZETA0 : ZETA3 + 1] = zeta
    x[6] = 1.0
    var = np.full(n, 1e-8)
    var[TEMP] = 0.01
    var[CONC] = 1e-6
    return x, var


def test_sigma_std_against_monte_carlo(setup, rng):
    # The delta-method std (filter + curve) against sampling T, c and the curve's parameters
    # (a check of the method; 200,000 draws leave about 0.3 % sampling error on a std).
    curve = setup.zone.solubility
    temp, conc = 310.0, 1.1 * float(curve.c_sat(310.0))
    cov = np.array([[0.04, 1e-5], [1e-5, 4e-6]])
    draws = 200_000
    tc = rng.multivariate_normal([temp, conc], cov, draws)
    params = rng.multivariate_normal(curve.params, curve.covariance, draws)
    c_sat = curve.basis.to_conc(curve.model.y(tc[:, 0], params.T))
    sampled = np.std(tc[:, 1] / c_sat - 1.0)
    ours = sigma_std(
        np.array(conc),
        np.array(cov[0, 0]),
        np.array(cov[0, 1]),
        np.array(cov[1, 1]),
        curve.c_sat(temp),
        curve.dc_sat_dtemp(temp),
        curve.c_sat_std(temp),
    )
    assert float(ours) == pytest.approx(sampled, rel=0.02)


def test_curve_uncertainty_is_part_of_sigma_std(setup):
    curve = setup.zone.solubility
    temp = 320.0
    conc = 1.05 * float(curve.c_sat(temp))
    alone = sigma_std(
        np.array(conc), np.array(0.0), np.array(0.0), np.array(0.0),
        curve.c_sat(temp), curve.dc_sat_dtemp(temp), curve.c_sat_std(temp),
    )  # fmt: skip
    expected = conc / float(curve.c_sat(temp)) ** 2 * float(curve.c_sat_std(temp))
    assert float(alone) == pytest.approx(expected, rel=1e-12)
    assert float(alone) > 0.0


def test_outputs_of_a_supersaturated_sample(setup):
    x, var = _one(setup)
    seed = float(setup.seed_zeta[3])
    est = estimates(
        setup.model, setup.zone, x[None], var[None], np.array([0.0]), np.array([305.0]),
        np.array([seed]), setup.solvent_mass_kg,
    )  # fmt: skip
    assert est.sigma[0] == pytest.approx(0.1, rel=1e-12)
    assert est.supersaturation_ratio[0] == pytest.approx(1.1, rel=1e-12)
    assert est.delta_c[0] == pytest.approx(est.conc[0] - est.conc_sat[0])
    assert est.cooling_rate_k_per_min[0] == pytest.approx(setup.model.params[0] * 5.0 * 60.0)
    # margins: zone width is positive, so this solution clouds below its saturation point
    cloud = setup.zone.cloud_temp_k(x[CONC], max(5.0 * setup.model.params[0], 1 / 600))
    assert est.margin_k[0] == pytest.approx(310.0 - float(cloud), rel=1e-9)
    assert est.margin_sigma[0] == pytest.approx(est.sigma_limit[0] - est.sigma[0])
    assert est.solids[0] == pytest.approx(0.006)
    grown = 0.006 - seed
    assert est.yield_fraction[0] == pytest.approx(grown / (x[CONC] + grown))
    assert est.yield_kg[0] == pytest.approx(grown * setup.solvent_mass_kg)
    assert est.mean_size_um[0] == pytest.approx(100.0 * 0.006 / 0.007)
    assert est.number_mean_size_um[0] == pytest.approx(100.0 * 0.008 / 0.01)
    assert not est.extrapolated[0]


def test_clear_solution_has_no_sizes(setup):
    x, var = _one(setup, conc_over=0.9, zeta=(0.0, 0.0, 0.0, 0.0))
    est = estimates(
        setup.model, setup.zone, x[None], var[None], np.array([0.0]), np.array([309.0]),
        np.array([0.0]), setup.solvent_mass_kg,
    )  # fmt: skip
    assert np.isnan(est.mean_size_um[0])
    assert est.sigma[0] < 0.0
    assert est.margin_k[0] > 0.0  # undersaturated: the cloud point is further down
    assert est.yield_fraction[0] == 0.0
