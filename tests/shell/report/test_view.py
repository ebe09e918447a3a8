"""A replayed batch's view: the peak, the seed point and the analyzer readings placed where
they belong, and the summary it carries; the good-batch criterion and the alarm tables."""

from __future__ import annotations

import numpy as np
import pytest

from sensor.batchfilter import run_batches
from sensor.shell.historian import read_historian_csv
from sensor.shell.replay import Replay, outputs_of, summarise
from sensor.shell.report.build import ViewCollector, choose_good, is_good
from sensor.shell.report.errors import ReportError
from sensor.shell.report.page import alarm_counts, badge
from sensor.shell.report.view import AlarmMark, batch_view
from sensor.units import ZERO_CELSIUS_K
from sensor.validation import Reason
from tests.shell.report.views import make_view
from tests.synthetic import demo_setup, demo_site_and_zone


@pytest.fixture(scope="module")
def replayed(synthetic):
    site, _ = demo_site_and_zone()
    setup = demo_setup()
    (batch,) = read_historian_csv(synthetic.files["F"], site, lambda _: setup)
    (out,) = run_batches(setup, [batch.arrays])
    result = outputs_of(setup, batch, out)
    return setup, batch, result, summarise(result, "CR-301")


def test_the_peak_is_the_summarys(replayed):
    setup, batch, result, summary = replayed
    view = batch_view(setup, result, summary, max_points=500)
    assert view.peak.sigma == summary.peak_sigma
    k = batch.timestamps.index(summary.peak_sigma_timestamp)
    assert view.peak.time_s == batch.arrays.time_s[k] - batch.arrays.time_s[0]
    assert np.nanmax(view.sigma) == summary.peak_sigma  # decimation kept it
    assert len(view.time_s) <= 500 + 4


def test_the_seed_point_is_the_first_seeded_estimate(replayed, synthetic):
    setup, _batch, result, summary = replayed
    view = batch_view(setup, result, summary)
    seeded_at = next(s.time_s for s in synthetic.samples["F"] if s.phase == "seed")
    assert view.seed.time_s == pytest.approx(seeded_at, abs=1e-9)
    assert not view.seeded[view.time_s < seeded_at].any()
    assert view.seeded[view.time_s >= seeded_at].all()


def test_analyzer_readings_sit_at_the_temperature_they_were_drawn_at(replayed, synthetic):
    setup, _batch, result, summary = replayed
    view = batch_view(setup, result, summary, max_analyzer_points=10_000)
    samples = synthetic.samples["F"]
    delay = setup.measurements.analyzer_delay_s
    arrived = [k for k, s in enumerate(samples) if s.conc is not None]
    assert len(view.analyzer.time_s) == len(arrived)
    for j, k in enumerate(arrived[:50]):
        drawn = round((samples[k].time_s - delay) - samples[0].time_s)
        assert view.analyzer.time_s[j] == samples[k].time_s - samples[0].time_s
        # the measured reactor temperature at the draw (1 s samples: no interpolation needed)
        expected_c = samples[drawn].temp.value - ZERO_CELSIUS_K if drawn >= 0 else None
        if expected_c is not None and result.output.reasons[drawn, 0] == Reason.ACCEPTED:
            assert view.analyzer.temp_c[j] == pytest.approx(expected_c, abs=1e-9)
        assert view.analyzer.conc[j] == pytest.approx(samples[k].conc.value, rel=1e-12)
    np.testing.assert_array_equal(
        view.analyzer.accepted, result.output.reasons[arrived, 2] == Reason.ACCEPTED
    )


def test_the_collector_pairs_views_with_the_summaries_replay_returns(replayed):
    setup, batch, _, _ = replayed
    collector = ViewCollector(lambda _: setup, {0: "CR-301"})
    summaries = Replay({0: setup}, {0: "CR-301"}).run([batch], sink=collector)
    (view,) = collector.views([batch], summaries)
    assert view.summary is summaries[0]


def test_the_good_batch_criterion():
    assert is_good(make_view("A", [40.0, 39.0], [0.01, 0.02]))
    assert not is_good(make_view("B", [40.0, 39.0], [0.01, 0.02], time_above_limit_s=1.0))
    assert not is_good(make_view("C", [40.0, 39.0], [0.01, 0.02], nis_ok_fraction=0.89))
    assert not is_good(make_view("D", [40.0, 39.0], [0.01, 0.02], nis_ok_fraction=None))
    assert not is_good(make_view("E", [40.0, 39.0], [0.01, 0.02], error="no estimates"))
    high = AlarmMark(10.0, "sigma-high-high", "raised", "high")
    assert not is_good(make_view("F", [40.0, 39.0], [0.01, 0.02], alarms=(high,)))
    medium = AlarmMark(10.0, "sigma-high", "raised", "medium")
    assert is_good(make_view("G", [40.0, 39.0], [0.01, 0.02], alarms=(medium,)))


def test_named_good_batches_are_checked():
    views = [make_view("A", [40.0], [0.0]), make_view("B", [40.0], [0.0], error="broken")]
    assert choose_good(views, ["A", "A"])[0] == ["A"]
    with pytest.raises(ReportError, match=r"^--good: no batch 'Z' among those compared \(A, B\)$"):
        choose_good(views, ["Z"])
    with pytest.raises(ReportError, match=r"^--good: batch 'B' gave no estimates"):
        choose_good(views, ["B"])


def test_alarms_are_counted_by_alarm_and_shown_with_words_not_colour_alone():
    marks = (
        AlarmMark(1.0, "sigma-high", "raised", "medium"),
        AlarmMark(2.0, "sigma-high", "cleared", "medium"),
        AlarmMark(3.0, "sigma-high", "raised", "medium"),
        AlarmMark(4.0, "sigma-high-high", "raised", "high"),
        AlarmMark(5.0, "analyzer-drift", "raised", "low"),
    )
    view = make_view("A", [40.0], [0.0], alarms=marks)
    assert alarm_counts(view) == [
        ("sigma-high-high", "high", 1),
        ("sigma-high", "medium", 2),
        ("analyzer-drift", "low", 1),
    ]
    assert "▲ HIGH" in badge("high")
    assert "◆ MEDIUM" in badge("medium")
    assert "● LOW" in badge("low")
    assert "UNRANKED" in badge("whatever")
