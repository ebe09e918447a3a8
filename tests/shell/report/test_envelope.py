"""The envelope of good batches and a batch held against it, on hand-made paths (these test
the method: every number is set so the answer is known)."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from sensor.shell.report.envelope import build_envelope, hold_against
from sensor.shell.report.errors import ReportError
from sensor.units import ZERO_CELSIUS_K
from tests.shell.report.views import make_view
from tests.synthetic import demo_site_and_zone

TEMPS = np.linspace(50.0, 20.0, 301)  # cooling from 50 to 20 °C, 0.1 K a sample


@pytest.fixture(scope="module")
def curve():
    return demo_site_and_zone()[1].solubility


def test_the_envelope_is_the_good_batches_range_of_sigma_per_bin():
    low = make_view("A", TEMPS, np.full(301, 0.02))
    high = make_view("B", TEMPS, np.full(301, 0.05))
    envelope = build_envelope([low, high], bin_k=2.0)
    assert envelope.batches == ("A", "B")
    assert envelope.edges_c[0] == 20.0
    assert envelope.edges_c[-1] >= 50.0
    np.testing.assert_array_equal(np.diff(envelope.edges_c), 2.0)
    np.testing.assert_array_equal(envelope.low, 0.02)
    np.testing.assert_array_equal(envelope.high, 0.05)


def test_bins_no_good_batch_passed_are_not_covered():
    a = make_view("A", np.r_[np.linspace(50, 40, 101), np.linspace(30, 20, 101)], np.zeros(202))
    b = make_view("B", np.r_[np.linspace(50, 40, 101), np.linspace(30, 20, 101)], np.zeros(202))
    envelope = build_envelope([a, b], bin_k=1.0)
    bins = envelope.bins(np.array([45.5, 35.5, 25.5, 10.0, np.nan]))
    assert bins[0] >= 0
    assert bins[2] >= 0
    assert list(bins[[1, 3, 4]]) == [-1, -1, -1]


def test_a_batch_inside_the_envelope_never_leaves(curve):
    envelope = build_envelope(
        [make_view("A", TEMPS, np.full(301, 0.02)), make_view("B", TEMPS, np.full(301, 0.05))]
    )
    check = hold_against(envelope, make_view("C", TEMPS, np.full(301, 0.035)), curve)
    assert check.inside
    assert check.covered_fraction == 1.0
    assert check.outside_fraction == 0.0


def test_a_batch_above_the_envelope_leaves_it_where_and_by_how_much(curve):
    envelope = build_envelope(
        [make_view("A", TEMPS, np.full(301, 0.02)), make_view("B", TEMPS, np.full(301, 0.05))]
    )
    sigma = np.full(301, 0.035)
    sigma[100:151] = 0.09  # 40 to 35 °C: 0.04 above the top
    check = hold_against(envelope, make_view("C", TEMPS, sigma, conc_std=1e-5), curve)
    (excursion,) = check.excursions
    assert excursion.side == "above"
    assert excursion.start_s == 1000.0
    assert excursion.end_s == 1500.0
    assert excursion.start_temp_c == pytest.approx(40.0, abs=1e-9)
    assert excursion.end_temp_c == pytest.approx(35.0, abs=1e-9)
    assert excursion.largest_sigma == pytest.approx(0.04, abs=1e-12)
    assert check.outside_fraction == pytest.approx(51 / 301, abs=1e-12)


def test_a_batch_whose_own_band_reaches_into_the_envelope_has_not_left_it(curve):
    envelope = build_envelope(
        [make_view("A", TEMPS, np.full(301, 0.02)), make_view("B", TEMPS, np.full(301, 0.05))]
    )
    # 0.01 above the top, with a band of 2 conc_std / c_sat a little wider than that
    c_sat = curve.c_sat(TEMPS + ZERO_CELSIUS_K)
    view = replace(make_view("C", TEMPS, np.full(301, 0.06)), conc_std=0.0051 * c_sat)
    assert hold_against(envelope, view, curve).inside
    narrower = replace(view, conc_std=0.0049 * c_sat)
    assert not hold_against(envelope, narrower, curve).inside


def test_a_batch_below_and_runs_closer_than_the_gap_merge(curve):
    envelope = build_envelope(
        [make_view("A", TEMPS, np.full(301, 0.02)), make_view("B", TEMPS, np.full(301, 0.05))]
    )
    sigma = np.full(301, 0.035)
    sigma[50:60] = -0.01
    sigma[80:90] = -0.01  # 200 s after the first run ends
    view = make_view("C", TEMPS, sigma)
    merged = hold_against(envelope, view, curve, merge_gap_s=300.0)
    assert [(e.side, e.start_s, e.end_s) for e in merged.excursions] == [("below", 500.0, 890.0)]
    apart = hold_against(envelope, view, curve, merge_gap_s=100.0)
    assert [(e.start_s, e.end_s) for e in apart.excursions] == [(500.0, 590.0), (800.0, 890.0)]


def test_only_the_seeded_path_counts(curve):
    envelope = build_envelope(
        [make_view("A", TEMPS, np.full(301, 0.02)), make_view("B", TEMPS, np.full(301, 0.05))]
    )
    unseeded = make_view("C", TEMPS, np.full(301, 0.5), seeded=False)
    check = hold_against(envelope, unseeded, curve)
    assert check.inside
    assert check.covered_fraction == 0.0


def test_an_envelope_needs_two_good_batches():
    with pytest.raises(ReportError, match=r"at least 2 good batches with a seeded path; got 1$"):
        build_envelope([make_view("A", TEMPS, np.zeros(301))])
    unseeded = make_view("B", TEMPS, np.zeros(301), seeded=False)
    with pytest.raises(ReportError, match=r"got 1$"):
        build_envelope([make_view("A", TEMPS, np.zeros(301)), unseeded])
    with pytest.raises(ReportError, match=r"bin width must be positive; got 0.0 K"):
        build_envelope([make_view("A", TEMPS, np.zeros(301))] * 2, bin_k=0.0)
