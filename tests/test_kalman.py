"""The filter: filterpy's UKF and EKF on the crystallizer model, against a linear Kalman filter,
the Riccati equation, and its own consistency."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from filterpy.kalman import KalmanFilter
from scipy import linalg, stats

from sensor.crystallizer import CONC, TEMP, Kinetics, build_model
from sensor.kalman import CrystallizerFilter, FilterTuning, Measurements, process_noise
from sensor.numerics import get_array, put_array
from tests.synthetic import demo_setup, demo_site_and_zone

JACKET_K = 300.0


def _clear_solution_filter(kind: str, delay_s: float = 0.0) -> CrystallizerFilter:
    # No crystals and no dissolution: every rate but the heat balance is zero, so the model is
    # linear and the UKF and EKF must give exactly the Kalman filter's answer.
    _, zone = demo_site_and_zone()
    model = build_model(
        zone.solubility,
        Kinetics(2e-7, 1.3, 2e9, 2.0, 1.0, 0.0),
        heat_transfer_w_per_k=2200.0,
        heat_capacity_j_per_k=6.0e6,
        crystal_density_kg_per_m3=1310.0,
        volume_shape_factor=0.45,
    )
    tuning = FilterTuning(kind=kind, gate_probability=1 - 1e-12)
    return CrystallizerFilter(model, tuning, Measurements(0.05, 0.001, delay_s), np.zeros(4))


def _reference_kf(flt: CrystallizerFilter, x0, p0) -> KalmanFilter:
    n = flt.model.layout.size
    a = flt.model.params[0]
    kf = KalmanFilter(dim_x=n, dim_z=1)
    kf.x = x0.copy()
    kf.P = p0.copy()
    kf.F = np.eye(n)
    kf.F[TEMP, TEMP] = 1.0 - a  # Euler, 1 s
    kf.B = np.zeros((n, 1))
    kf.B[TEMP, 0] = a
    kf.Q = process_noise(x0, 1.0, JACKET_K, flt.model.params, flt.model.table, flt._noise)
    return kf


@pytest.mark.parametrize("kind", ["ukf", "ekf"])
def test_agrees_with_the_linear_kalman_filter(kind, rng):
    # filterpy's KalmanFilter (the reference implementation) on the same linear system.
    flt = _clear_solution_filter(kind)
    conc0 = 0.05  # well below saturation at 300-330 K: sigma < 0, no growth, no dissolution
    flt.start(0.0, 330.0, conc0, JACKET_K)
    kf = _reference_kf(flt, flt.x, flt.P)
    h_temp = np.zeros((1, flt.model.layout.size))
    h_temp[0, TEMP] = 1.0
    h_conc = np.zeros_like(h_temp)
    h_conc[0, CONC] = h_conc[0, -1] = 1.0
    for k in range(1, 301):
        z_temp = 330.0 - 0.01 * k + 0.05 * rng.standard_normal()
        flt.advance(float(k), JACKET_K, z_temp)
        kf.predict(u=np.array([JACKET_K]))
        kf.update(np.array([z_temp]), R=np.array([[0.05**2]]), H=h_temp)
        if k % 10 == 0:
            z_conc = conc0 + 0.002 + 0.001 * rng.standard_normal()
            flt.analyzer(float(k), z_conc)
            kf.update(np.array([z_conc]), R=np.array([[0.001**2]]), H=h_conc)
        np.testing.assert_allclose(flt.x, kf.x, rtol=1e-10, atol=1e-13)
        np.testing.assert_allclose(flt.P, kf.P, rtol=1e-7, atol=1e-17)


def test_steady_state_gain_solves_the_riccati_equation():
    # Temperature only, every second: the gain converges to the stationary one, from
    # scipy.linalg.solve_discrete_are and from the scalar Riccati equation's closed form,
    # P = f^2 (P - P^2/(P + r)) + q, i.e. P^2 + P (r (1 - f^2) - q) - q r = 0.
    flt = _clear_solution_filter("ukf")
    flt.start(0.0, 330.0, 0.05, JACKET_K)
    for k in range(1, 2001):
        flt.advance(float(k), JACKET_K, 330.0)
    f = 1.0 - flt.model.params[0]
    q = flt.tuning.temp_process_std**2
    r = 0.05**2
    prior = linalg.solve_discrete_are(np.array([[f]]), np.array([[1.0]]), [[q]], [[r]])[0, 0]
    b = r * (1.0 - f**2) - q
    closed_form = (-b + math.sqrt(b * b + 4.0 * q * r)) / 2.0
    assert prior == pytest.approx(closed_form, rel=1e-10)
    posterior = prior - prior**2 / (prior + r)
    assert flt.P[TEMP, TEMP] == pytest.approx(posterior, rel=1e-9)
    gain = prior / (prior + r)
    assert flt.P[TEMP, TEMP] / r == pytest.approx(gain, rel=1e-9)  # K = P+ / r for H = 1


def test_delayed_analyzer_is_filtered_as_if_it_had_come_on_time(rng):
    # Re-filtering: the delayed filter, once it has the values, holds the estimate a filter
    # given them on time holds (same operations, in the measurements' true order).
    setup = demo_setup()
    delayed = CrystallizerFilter(setup.model, setup.tuning, setup.measurements, setup.seed_zeta)
    on_time = CrystallizerFilter(
        setup.model,
        setup.tuning,
        replace(setup.measurements, analyzer_delay_s=0.0),
        setup.seed_zeta,
    )
    delay = round(setup.measurements.analyzer_delay_s)
    c_sat = float(setup.zone.solubility.c_sat(323.15))
    for flt in (delayed, on_time):
        flt.start(0.0, 325.0, c_sat, 320.0)
    end = 900
    drawn_values = {}
    for k in range(1, end):
        temp = 325.0 - 0.002 * k + 0.05 * rng.standard_normal()
        jacket = 320.0 - 0.005 * k
        seed = k == 120
        if k % 10 == 0:
            drawn_values[k] = c_sat - 2e-6 * k + 0.001 * rng.standard_normal()
        for flt in (delayed, on_time):
            flt.advance(float(k), jacket, temp, seed=seed)
        # the on-time filter gets only the values that reach the delayed one before the end
        if k in drawn_values and k + delay < end:
            on_time.analyzer(float(k), drawn_values[k])
        if k - delay in drawn_values:
            delayed.analyzer(float(k), drawn_values[k - delay])
    assert delayed.time_s == on_time.time_s
    np.testing.assert_allclose(delayed.x, on_time.x, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(delayed.P, on_time.P, rtol=1e-9, atol=1e-20)


def test_gate_refuses_an_outlier_then_widens_after_a_run_of_them():
    setup = demo_setup()
    flt = CrystallizerFilter(
        setup.model, setup.tuning, replace(setup.measurements, analyzer_delay_s=0.0), np.zeros(4)
    )
    flt.start(0.0, 330.0, 0.1, 330.0)
    for k in range(1, 11):
        flt.advance(float(k), 330.0, 330.0)
        info = flt.analyzer(float(k), 0.1)
        assert not info.gated
    outcomes = []
    for k in range(11, 11 + setup.tuning.max_consecutive_gated + 1):
        flt.advance(float(k), 330.0, 330.0)
        outcomes.append(flt.analyzer(float(k), 0.2))  # 100 noise std away
    assert all(o.gated for o in outcomes[:-1])
    assert not outcomes[-1].gated
    assert outcomes[-1].widened
    assert outcomes[0].nis > stats.chi2.ppf(setup.tuning.gate_probability, 1)
    assert flt.x[CONC] + flt.x[-1] > 0.15  # the filter followed the new level


def test_gap_is_bridged_by_prediction_alone():
    setup = demo_setup()
    flt = CrystallizerFilter(setup.model, setup.tuning, setup.measurements, np.zeros(4))
    flt.start(0.0, 330.0, 0.1, 320.0)
    for k in range(1, 100):
        flt.advance(float(k), 320.0, 330.0 - 0.03 * k)
    settled = flt.P[TEMP, TEMP]
    flt.advance(400.0, 320.0, None)  # 5 min with nothing: predict only
    q_gap = setup.tuning.temp_process_std**2 * 301
    assert flt.P[TEMP, TEMP] > settled + 0.9 * q_gap
    expected = 320.0 + (flt._events[-2].x[TEMP] - 320.0) * (1 - setup.model.params[0]) ** 301
    assert flt.x[TEMP] == pytest.approx(expected, rel=1e-12)


def test_analyzer_value_older_than_the_history_is_refused():
    setup = demo_setup()
    flt = CrystallizerFilter(setup.model, setup.tuning, setup.measurements, np.zeros(4))
    flt.start(100.0, 330.0, 0.1, 320.0)
    flt.advance(101.0, 320.0, 330.0)
    assert flt.analyzer(110.0, 0.1) is None  # drawn at 80 s, before the filter started


def test_tuning_refuses_bad_values():
    with pytest.raises(ValueError, match="temp_process_std must be positive"):
        FilterTuning(temp_process_std=0.0)
    with pytest.raises(ValueError, match="gate_probability must be in"):
        FilterTuning(gate_probability=1.0)


@pytest.mark.parametrize("kind", ["ukf", "ekf"])
def test_a_covariance_gone_non_finite_is_a_filter_error_naming_the_time(kind):
    # A breakdown must reach the caller as FilterError (the service restarts the unit on it),
    # never as scipy's plain ValueError about NaN in a Cholesky factorisation.
    from sensor.kalman import FilterError

    f = _clear_solution_filter(kind)
    f.start(0.0, 320.0, 0.30, JACKET_K)
    state = f.checkpoint()
    n = get_array(state["events"][-1]["P"]).shape[0]
    state["events"][-1]["P"] = put_array(np.full((n, n), np.nan))
    f.restore(state)
    with pytest.raises(FilterError, match=r"t = 10\.0 s"):
        f.advance(10.0, JACKET_K, 320.0)
