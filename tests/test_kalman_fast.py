"""The live filter's compiled UKF (``sensor.kalman.CrystallizerUKF``) computes the same filter as
the unmodified ``filterpy.kalman.UnscentedKalmanFilter`` (reference: filterpy 2.0, R. Labbe,
*Kalman and Bayesian Filters in Python*), which steps every sigma point through ``fx`` and
``hx`` one by one: the pieces one by one, and a whole synthetic batch (seeding, delayed analyzer
values re-filtered, faults) compared at every step to 1e-10 relative."""

from __future__ import annotations

import copy

import numpy as np
import pytest
from filterpy.kalman import MerweScaledSigmaPoints, UnscentedKalmanFilter

from sensor.crystallizer import ZETA3, step
from sensor.kalman import CompiledSigmaPoints, CrystallizerFilter, CrystallizerUKF
from sensor.softsensor import SoftSensor
from tests.synthetic import cooling_batch, demo_setup, with_faults

RTOL = 1e-10


def _relative_error(x, P, x_ref, P_ref) -> tuple[float, float]:
    """Largest difference in the state, relative to each state's magnitude or its std
    (whichever is larger: moments start at zero), and in the covariance, relative to
    :math:`\\sqrt{P_{ii} P_{jj}}` (the scale of each entry)."""
    std = np.sqrt(np.diag(P_ref))
    x_err = np.max(np.abs(x - x_ref) / np.maximum(np.abs(x_ref), std))
    P_err = np.max(np.abs(P - P_ref) / np.outer(std, std))
    return float(x_err), float(P_err)


def _seeded_prior(setup, rng):
    """A prior with crystals in it, as in the middle of a batch: a mean, and a dense covariance
    with stds of the order the filter carries (0.05 K, 1e-3 kg/kg, moments a tenth of
    themselves) and random correlations."""
    n = setup.model.layout.size
    assert n == 8  # the demo estimates the growth scale
    x = np.array([318.0, 0.21, 4e-5, 3e-5, 2e-5, 1e-2, 1.0, 1e-3])
    std = np.array([0.05, 1e-3, 4e-6, 3e-6, 2e-6, 1e-3, 0.1, 1e-3])
    a = rng.normal(size=(n, n)) + 2.0 * np.eye(n)
    corr = a @ a.T
    corr /= np.sqrt(np.outer(np.diag(corr), np.diag(corr)))
    return x, corr * np.outer(std, std)


def test_sigma_points_are_filterpys(rng):
    setup = demo_setup()
    n = setup.model.layout.size
    t = setup.tuning
    x, P = _seeded_prior(setup, rng)
    ours = CompiledSigmaPoints(n, t.sigma_alpha, t.sigma_beta, t.sigma_kappa)
    theirs = MerweScaledSigmaPoints(n, t.sigma_alpha, t.sigma_beta, t.sigma_kappa)
    np.testing.assert_allclose(ours.sigma_points(x, P), theirs.sigma_points(x, P), rtol=1e-13)
    np.testing.assert_array_equal(ours.Wm, theirs.Wm)
    with pytest.raises(np.linalg.LinAlgError, match="not positive-definite"):
        ours.sigma_points(x, -P)


def test_predict_is_filterpys_point_by_point(rng):
    setup = demo_setup()
    model, t = setup.model, setup.tuning
    n = model.layout.size
    x, P = _seeded_prior(setup, rng)
    ours = CrystallizerUKF(model, t)
    reference = UnscentedKalmanFilter(
        n,
        1,
        1.0,
        hx=None,
        fx=lambda s, dt, jacket_temp_k: step(s, dt, jacket_temp_k, model.params, model.table),
        points=MerweScaledSigmaPoints(n, t.sigma_alpha, t.sigma_beta, t.sigma_kappa),
    )
    for f in (ours, reference):
        f.x, f.P, f.Q = x.copy(), P.copy(), np.diag(np.abs(x) * 1e-6 + 1e-12)
        f.predict(dt=2.5, jacket_temp_k=300.0)
    # the redrawn sigma points, to 1e-10 of each state's magnitude or its std
    scale = np.maximum(np.abs(reference.sigmas_f), np.sqrt(np.diag(reference.P)))
    assert np.max(np.abs(ours.sigmas_f - reference.sigmas_f) / scale) < RTOL
    assert max(_relative_error(ours.x, ours.P, reference.x, reference.P)) < RTOL


@pytest.mark.parametrize("channel", ["temp", "conc"])
def test_linear_update_is_the_unscented_update(channel, rng):
    # update_linear's closed form against filterpy's own update (sigma points through hx, the
    # cross_variance loop) on the same prior and the same sigma points
    setup = demo_setup()
    flt = CrystallizerFilter(setup.model, setup.tuning, setup.measurements, setup.seed_zeta)
    ours = flt._ukf
    x, P = _seeded_prior(setup, rng)
    ours.x, ours.P = x.copy(), P.copy()
    ours.sigmas_f = ours.points_fn.sigma_points(x, P)
    reference = copy.deepcopy(ours)
    h = flt._h_temp if channel == "temp" else flt._h_conc
    r = flt._r_temp if channel == "temp" else flt._r_conc
    z = float(h @ x) + 2.0 * np.sqrt(r)
    ours.update_linear(z, h, r)
    UnscentedKalmanFilter.update(
        reference, np.array([z]), R=np.array([[r]]), hx=lambda s: h[None, :] @ s
    )
    assert max(_relative_error(ours.x, ours.P, reference.x, reference.P)) < RTOL
    np.testing.assert_allclose(ours.S, reference.S, rtol=RTOL)
    np.testing.assert_allclose(ours.K, reference.K, rtol=1e-9, atol=1e-12 * np.abs(ours.K).max())
    np.testing.assert_allclose(ours.y, reference.y, rtol=RTOL)


def test_a_batch_steps_as_with_the_unmodified_filterpy_ukf(rng):
    setup = demo_setup()
    batch = cooling_batch(setup, rng, hours=0.6, start_temp_c=51.0, bias=0.002, seed_at_s=600.0)
    samples = with_faults(batch.samples, rng)
    fast, plain = SoftSensor(setup), SoftSensor(setup, reference_filter=True)
    assert type(fast.filter._ukf) is CrystallizerUKF
    assert type(plain.filter._ukf) is UnscentedKalmanFilter
    worst = [0.0, 0.0]
    compared = 0
    for sample in samples:
        a, b = fast.step(sample), plain.step(sample)
        assert (a.started, a.temp, a.conc) == (b.started, b.temp, b.conc), sample.time_s
        if a.started:
            errors = _relative_error(fast.filter.x, fast.filter.P, plain.filter.x, plain.filter.P)
            worst = [max(w, e) for w, e in zip(worst, errors, strict=True)]
            assert max(errors) < RTOL, (sample.time_s, errors)
            compared += 1
    assert type(plain.filter._ukf) is UnscentedKalmanFilter  # no restart swapped it out
    assert compared > 0.9 * len(samples)
    assert fast.filter.x[ZETA3] > 1.05 * setup.seed_zeta[3]  # the seed grew: moments took part
    print(f"worst relative difference: state {worst[0]:.1e}, covariance {worst[1]:.1e}")
