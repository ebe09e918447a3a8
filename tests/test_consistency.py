"""Filter consistency on data from the filter's own model (this tests the method, not the
plant): Monte Carlo NEES and NIS inside their 95 % chi-square bands for at least 90 % of the
check times (Bar-Shalom, Li & Kirubarajan, *Estimation with Applications to Tracking and
Navigation*, 2001, section 5.4.2: the average over M runs of a d-dimensional NEES is
chi-square with M d degrees of freedom, divided by M).

The truth's uncertain quantities (analyzer bias, growth scale) come from the filter's prior and
the truth carries the process noise the filter assumes, so a consistent filter passes. They are
drawn as a Latin hypercube sample of the prior (each of the M runs takes one of the M
equal-probability strata of each quantity, Φ⁻¹((i + ½)/M), paired at random; McKay, Beckman &
Conover, Technometrics 21, 1979): until the seed is in, nothing observes the bias, so the bias
NEES of those check times *is* the drawn bias over its prior std, and with independent draws
these checks would test the random generator instead of the filter (an earlier version drew 20
biases whose mean square was 1.98, outside the band [0.48, 1.71] with no filter involved:
chi-square p of about 0.006). The strata cover the prior's body to ±1.96 std; the far tails
are not drawn.

What these batches exercise: the seed goes into a solution still 9 % undersaturated and
partly dissolves before cooling makes it supersaturated, so the filter crosses from
dissolution to growth kinetics while the bias is still uncertain.

Measured with these tests' draws and 15 generator seeds (20261202 and 1 to 14): temperature,
temperature-concentration and NIS pass on all; the concentration and bias NEES pass on 12, and
the three misses (74 to 89 % of the check times inside) are on the cautious side, while the
seed dissolves (the sigma points straddle the switch from dissolution to growth).

Known limit, marked xfail (strict): in batches seeded supersaturated (``seeded_supersaturated``)
the growth scale's NEES leaves the band late in the batch on the high side (60 to 86 % of the
check times inside, on six generator seeds), and so, on four of those six seeds, does the
bias NEES (35 to 87 %; it passes on this file's seed): growth rate and analyzer bias are told
apart only through the shape of the desupersaturation, that split is weakly observable, and the
UKF's Gaussian posterior becomes overconfident about it (README, "Known limits").

A lead, measured on 2026-12-04 with six generator seeds (20261202 and 1 to 5), both fixtures,
five NEES/NIS checks each (60 fractions): narrower sigma points miss fewer. ``sigma_alpha``
1.0 (the site file's) missed 16, 0.7 missed 7, 0.5 missed 8, 0.3 missed 12; the growth scale's
NEES here passed on 0 of 6 seeds at 1.0 and on 4 of 6 at 0.5. Not adopted: at 0.5 the demo's
estimate overshoots at seeding (peak sigma 0.093 against 0.086, 20 s above the limit, in two
runs), and the closed loop moved little (vs the oracle median 1.28x -> 1.30x, worst 1.82x ->
1.74x)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from sensor.batchfilter import BatchArrays, run_batches
from sensor.consistency import NIS_STATES, NisWindow, nis_band, nis_state_codes
from sensor.crystallizer import GROWTH_SCALE, TEMP
from tests.synthetic import cooling_batch, demo_setup

RUNS = 20


def _monte_carlo(start_temp_c: float):
    rng = np.random.default_rng(20261202)
    setup = demo_setup()
    tuning = setup.tuning
    strata = stats.norm.ppf((np.arange(RUNS) + 0.5) / RUNS)
    biases = tuning.initial_bias_std * rng.permutation(strata)
    scales = 1.0 + tuning.growth_rel_std * rng.permutation(strata)
    batches = [
        cooling_batch(
            setup,
            rng,
            hours=1.5,
            start_temp_c=start_temp_c,
            process_noise=True,
            seed_at_s=900.0,
            bias=float(bias),
            growth_scale=float(scale),
        )
        for bias, scale in zip(biases, scales, strict=True)
    ]
    arrays = [BatchArrays.from_samples(b.samples, setup) for b in batches]
    return batches, run_batches(setup, arrays)


@pytest.fixture(scope="module")
def monte_carlo():
    """Seeded at 53.7 °C into a solution saturated at 50 °C (module docstring)."""
    return _monte_carlo(55.0)


@pytest.fixture(scope="module")
def seeded_supersaturated():
    """Seeded at 49.7 °C, about 1 % supersaturated."""
    return _monte_carlo(51.0)


def _nees_of(index: int, batches, outs) -> np.ndarray:
    checks = np.arange(300, len(batches[0].samples), 60)
    return np.array(
        [
            ((out.x[:, index] - batch.truth[:, index]) ** 2 / out.var[:, index])[checks]
            for batch, out in zip(batches, outs, strict=True)
        ]
    )


def _inside(values, dof):
    lo, hi = stats.chi2.ppf([0.025, 0.975], dof * RUNS) / RUNS
    return np.mean((values > lo) & (values < hi))


def test_nees_of_temperature(monte_carlo):
    batches, outs = monte_carlo
    fraction = _inside(np.mean(_nees_of(TEMP, batches, outs), axis=0), 1)
    assert fraction >= 0.9, fraction


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


def test_nees_of_the_analyzer_bias(monte_carlo):
    batches, outs = monte_carlo
    fraction = _inside(np.mean(_nees_of(-1, batches, outs), axis=0), 1)
    assert fraction >= 0.9, fraction


KNOWN_LIMIT = "growth scale and bias weakly observable late in the batch (module docstring)"


@pytest.mark.xfail(reason=KNOWN_LIMIT, strict=True)
def test_nees_of_the_growth_scale_when_seeded_supersaturated(seeded_supersaturated):
    batches, outs = seeded_supersaturated
    fraction = _inside(np.mean(_nees_of(GROWTH_SCALE, batches, outs), axis=0), 1)
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
