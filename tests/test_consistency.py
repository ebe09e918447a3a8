"""Filter consistency on data from the filter's own model (this tests the method, not the
plant): Monte Carlo NEES and NIS inside their 95 % chi-square bands for at least 90 % of the
check times (Bar-Shalom, Li & Kirubarajan, *Estimation with Applications to Tracking and
Navigation*, 2001, section 5.4.2: the average over M runs of a d-dimensional NEES is
chi-square with M d degrees of freedom, divided by M).

The truth's uncertain quantities (analyzer bias, growth scale) are drawn from the filter's
prior and the truth carries the process noise the filter assumes, so a consistent filter passes.

Known limit, found by these tests (marked xfail, strict): the NEES of the concentration and of
the analyzer bias fails the band with this seed. One run in twenty drew a bias 2.7 standard
deviations from the prior together with a slow growth scale (0.74); there the split between
analyzer bias and growth rate is weakly observable and the UKF becomes overconfident (that run's
NEES near 18), which drags the Monte Carlo average out of the band. Draws within about 2 standard
deviations stay consistent, but truncating the draws makes the filter look too cautious instead,
so neither is a fair pass. The temperature NEES and the analyzer NIS pass."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from sensor.batchfilter import BatchArrays, run_batches
from sensor.consistency import NIS_STATES, NisWindow, nis_band, nis_state_codes
from tests.synthetic import cooling_batch, demo_setup

RUNS = 20


@pytest.fixture(scope="module")
def monte_carlo():
    rng = np.random.default_rng(20261202)
    setup = demo_setup()
    tuning = setup.tuning
    batches = [
        cooling_batch(
            setup,
            rng,
            hours=1.5,
            process_noise=True,
            seed_at_s=900.0,
            bias=float(rng.normal(0.0, tuning.initial_bias_std)),
            growth_scale=float(1.0 + tuning.growth_rel_std * rng.standard_normal()),
        )
        for _ in range(RUNS)
    ]
    arrays = [BatchArrays.from_samples(b.samples, setup) for b in batches]
    return batches, run_batches(setup, arrays)


def _inside(values, dof):
    lo, hi = stats.chi2.ppf([0.025, 0.975], dof * RUNS) / RUNS
    return np.mean((values > lo) & (values < hi))


def test_nees_of_temperature(monte_carlo):
    batches, outs = monte_carlo
    checks = np.arange(300, len(batches[0].samples), 60)
    nees = [
        ((out.x[:, 0] - batch.truth[:, 0]) ** 2 / out.var[:, 0])[checks]
        for batch, out in zip(batches, outs, strict=True)
    ]
    fraction = _inside(np.mean(nees, axis=0), 1)
    assert fraction >= 0.9, fraction


KNOWN_LIMIT = "bias and growth scale weakly observable for far draws (module docstring)"


@pytest.mark.xfail(reason=KNOWN_LIMIT, strict=True)
def test_nees_of_temperature_and_concentration(monte_carlo):
    batches, outs = monte_carlo
    checks = np.arange(300, len(batches[0].samples), 60)
    nees = []
    for batch, out in zip(batches, outs, strict=True):
        err = out.x - batch.truth
        vt, vc, ctc = out.var[:, 0], out.var[:, 1], out.cov_temp_conc
        quad = (vc * err[:, 0] ** 2 - 2 * ctc * err[:, 0] * err[:, 1] + vt * err[:, 1] ** 2) / (
            vt * vc - ctc**2
        )
        nees.append(quad[checks])
    fraction = _inside(np.mean(nees, axis=0), 2)
    assert fraction >= 0.9, fraction


@pytest.mark.xfail(reason=KNOWN_LIMIT, strict=True)
def test_nees_of_the_analyzer_bias(monte_carlo):
    batches, outs = monte_carlo
    checks = np.arange(300, len(batches[0].samples), 60)
    nees = [
        ((out.x[:, -1] - batch.truth[:, -1]) ** 2 / out.var[:, -1])[checks]
        for batch, out in zip(batches, outs, strict=True)
    ]
    fraction = _inside(np.mean(nees, axis=0), 1)
    assert fraction >= 0.9, fraction


def test_nis_of_the_analyzer(monte_carlo):
    _, outs = monte_carlo
    series = [out.conc_nis[~np.isnan(out.conc_nis)][10:] for out in outs]
    length = min(len(s) for s in series)
    fraction = _inside(np.mean([s[:length] for s in series], axis=0), 1)
    assert fraction >= 0.9, fraction


def test_windowed_nis_live_and_vectorised_agree(rng):
    values = rng.chisquare(1, 200)
    values[150:] *= 10.0  # a mismatch
    series = np.full(400, np.nan)
    series[::2] = values
    codes = nis_state_codes(series, 30, 0.95)
    window = NisWindow(30, 0.95)
    live = []
    for value in series:
        if not np.isnan(value):
            window.push(value)
        live.append(window.state)
    assert [NIS_STATES[c] for c in codes] == live
    assert live[-1] == "high"
    assert "ok" in live[100:290]


def test_nis_band_is_the_chi_square_quantiles():
    lo, hi = nis_band(30, 0.95)
    # chi-square quantiles for 30 degrees of freedom (Abramowitz & Stegun, table 26.8:
    # 16.791 and 46.979)
    assert lo == pytest.approx(16.791, abs=5e-4)
    assert hi == pytest.approx(46.979, abs=5e-4)
