"""Tag validation: each rule refuses what it should, says why, and lets good readings through.
The rules are common practice for screening soft-sensor inputs; the StatusCode severities are
the OPC UA encoding (OPC 10000-4, StatusCode: the two top bits)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from asyncua.ua.status_codes import StatusCodes

from sensor.samples import Reading, Sample, Severity, severity
from sensor.softsensor import SoftSensor
from sensor.validation import Reason, SignalRules, check_reading, new_signal_state
from tests.synthetic import cooling_batch, demo_setup

RULES = SignalRules(
    low=250.0,
    high=400.0,
    max_rate_per_s=10.0 / 60.0,
    spike_delta=0.5,
    stale_after_s=120.0,
    frozen_after_s=300.0,
)


def _run(readings, rules=RULES):
    """Reason per (time, value, severity, source time) reading."""
    state = new_signal_state()
    vector = rules.vector()
    return [Reason(check_reading(state, t, v, sev, src, vector)) for t, v, sev, src in readings]


def _series(values, start=0.0, step=1.0):
    return [(start + i * step, v, 0, math.nan) for i, v in enumerate(values)]


@pytest.mark.parametrize(
    ("code", "expected"),
    [
        (StatusCodes.Good, Severity.GOOD),
        (StatusCodes.UncertainLastUsableValue, Severity.UNCERTAIN),
        (StatusCodes.UncertainSensorNotAccurate, Severity.UNCERTAIN),
        (StatusCodes.BadSensorFailure, Severity.BAD),
        (StatusCodes.BadCommunicationError, Severity.BAD),
    ],
)
def test_severity_from_the_status_code(code, expected):
    assert severity(code) is expected


def test_good_noisy_readings_pass(rng):
    values = 320.0 + 0.05 * rng.standard_normal(600)
    assert set(_run(_series(values))) == {Reason.ACCEPTED}


def test_not_finite():
    assert _run(_series([320.0, math.nan, math.inf, 320.0])) == [
        Reason.ACCEPTED,
        Reason.NOT_FINITE,
        Reason.NOT_FINITE,
        Reason.ACCEPTED,
    ]


def test_quality_bad_and_uncertain():
    readings = [(0.0, 320.0, 0, math.nan), (1.0, 320.0, 2, math.nan), (2.0, 320.0, 1, math.nan)]
    assert _run(readings)[1:] == [Reason.BAD_QUALITY, Reason.UNCERTAIN]
    lenient = SignalRules(250.0, 400.0, accept_uncertain=True)
    assert _run(readings, lenient)[2] is Reason.ACCEPTED


def test_stale_by_source_time():
    readings = [(1000.0, 320.0, 0, 990.0), (1001.0, 320.1, 0, 850.0)]
    assert _run(readings) == [Reason.ACCEPTED, Reason.STALE]


def test_out_of_range():
    assert _run(_series([320.0, 401.0, 249.0]))[1:] == [Reason.OUT_OF_RANGE] * 2


def test_frozen_after_the_configured_time():
    reasons = _run(_series([320.0] * 400))
    assert reasons[299] is Reason.ACCEPTED
    assert reasons[300:] == [Reason.FROZEN] * 100
    # a change releases it
    state = new_signal_state()
    vector = RULES.vector()
    for t in range(301):
        check_reading(state, float(t), 320.0, 0, math.nan, vector)
    assert check_reading(state, 301.0, 320.01, 0, math.nan, vector) == Reason.ACCEPTED


def test_rate_of_change():
    # 10 K/min allowed, plus the 0.5 K noise allowance: a drift of 30 K/min is caught within a
    # minute, a ramp of 9 K/min never, whatever the sample interval.
    fast = _run(_series(320.0 + 0.5 * np.arange(120)))
    assert Reason.RATE_OF_CHANGE in fast[:60]
    assert set(_run(_series(390.0 - 0.15 * np.arange(600)))) == {Reason.ACCEPTED}


def test_a_spike_is_dropped_and_a_step_is_confirmed():
    no_rate = SignalRules(0.0, 1.0, spike_delta=0.01)
    assert _run(_series([0.10, 0.15, 0.10]), no_rate) == [
        Reason.ACCEPTED,
        Reason.SPIKE,
        Reason.ACCEPTED,
    ]
    assert _run(_series([0.10, 0.15, 0.151, 0.152]), no_rate) == [
        Reason.ACCEPTED,
        Reason.SPIKE,
        Reason.ACCEPTED,
        Reason.ACCEPTED,
    ]


def test_rules_refuse_an_empty_range():
    with pytest.raises(ValueError, match="range must be low < high"):
        SignalRules(1.0, 1.0)


def test_rejected_readings_never_reach_the_filter(rng):
    # The soft sensor reports every rejection and its filter never sees the value: a spike of
    # +0.05 kg/kg (50 noise std) leaves the estimate where it was.
    setup = demo_setup()
    batch = cooling_batch(setup, rng, hours=0.2, seed_at_s=10_000.0)
    sensor = SoftSensor(setup)
    samples = batch.samples
    spike_at = next(k for k in range(300, len(samples)) if samples[k].conc is not None)
    for sample in samples[:spike_at]:
        sensor.step(sample)
    before = sensor.filter.x.copy()
    s = samples[spike_at]
    spiked = Sample(s.time_s, s.temp, s.jacket_temp, Reading(s.conc.value + 0.05), s.phase)
    result = sensor.step(spiked)
    assert result.conc is Reason.SPIKE
    assert result.rejected
    assert sensor.filter.x[1] == pytest.approx(before[1], abs=5e-5)
    bad = Sample(
        s.time_s + 0.5, s.temp, s.jacket_temp, Reading(0.5, StatusCodes.BadSensorFailure), s.phase
    )
    assert sensor.step(bad).conc is Reason.BAD_QUALITY


def test_stale_signals_are_flagged(rng):
    setup = demo_setup()
    samples = cooling_batch(setup, rng, hours=0.2).samples
    sensor = SoftSensor(setup)
    for sample in samples[:200]:
        result = sensor.step(sample)
    assert result.inputs_valid
    last = samples[199]
    # the analyzer falls silent while the temperatures go on every second (a gap in the
    # samples themselves would restart the filter instead: tests/test_batchfilter.py)
    for dt in range(1, 201):
        result = sensor.step(Sample(last.time_s + dt, last.temp, last.jacket_temp, None))
    assert result.conc_stale
    assert not result.inputs_valid
    assert np.isfinite(result.estimates.sigma[0])
