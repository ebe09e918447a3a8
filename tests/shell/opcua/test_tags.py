"""A tag's values as the client judges them, without a server: timestamps that go backwards,
repeat, come twice, lie in the future or are missing; the conversion to sigmatrack's units."""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta

import pytest
from asyncua import ua

from sensor.shell.config import TagRef
from sensor.shell.opcua.tags import (
    NUMERIC_TYPES,
    TagSpec,
    TagTrack,
    analog_reading,
    expected_types,
    tag_specs,
)
from sensor.shell.sitesensor import analyzer_unit
from sensor.units import concentration_unit

T0 = datetime(2026, 3, 14, 6, 0, tzinfo=UTC)


def _spec(kind="temperature", signal="temp"):
    return TagSpec(
        0, "CR-301", signal, TagRef("CR301.TT3011.PV"), ua.NodeId("CR301.TT3011.PV", 2), kind,
        NUMERIC_TYPES,
    )  # fmt: skip


def _value(value, seconds, status=ua.StatusCodes.Good, *, source=True, server=True):
    moment = T0 + timedelta(seconds=seconds)
    return ua.DataValue(
        ua.Variant(value, ua.VariantType.Double),
        StatusCode=ua.StatusCode(status),
        SourceTimestamp=moment if source else None,
        ServerTimestamp=moment + timedelta(milliseconds=5) if server else None,
    )


def test_values_in_order_are_accepted_and_delivered_once():
    track = TagTrack(_spec())
    value, problem = track.offer(_value(20.0, 0.0))
    assert problem is None
    assert value.value == 20.0
    assert value.source_time_s == T0.timestamp()
    fresh, problem = track.fresh(T0.timestamp() + 1.0, tolerance_s=5.0)
    assert fresh is value
    assert problem is None
    # nothing new at the next tick: nothing delivered, nothing invented
    assert track.fresh(T0.timestamp() + 2.0, tolerance_s=5.0) == (None, None)
    track.offer(_value(20.5, 1.0))
    track.offer(_value(21.0, 2.0))
    fresh, _ = track.fresh(T0.timestamp() + 2.5, tolerance_s=5.0)
    assert fresh.value == 21.0  # the newest; the one between goes to the store only


def test_a_timestamp_that_goes_backwards_is_refused_and_reported():
    track = TagTrack(_spec())
    track.offer(_value(20.0, 10.0))
    value, problem = track.offer(_value(19.0, 9.0))
    assert value is None
    assert problem.kind == "timestamp-backwards"
    assert "2026-03-14T06:00:09.000+00:00 goes backwards from 2026-03-14T06:00:10.000" in str(
        problem
    )
    assert track.latest.value == 20.0
    assert track.counts == {"timestamp-backwards": 1}


def test_a_repeated_timestamp_with_another_value_is_refused_a_true_duplicate_dropped_quietly():
    track = TagTrack(_spec())
    track.offer(_value(20.0, 10.0))
    value, problem = track.offer(_value(20.0, 10.0))  # a resubscribe resends the same value
    assert value is None
    assert problem is None
    value, problem = track.offer(_value(25.0, 10.0))
    assert value is None
    assert problem.kind == "timestamp-repeated"
    assert "repeats with another value or status" in problem.detail
    value, problem = track.offer(_value(20.0, 10.0, ua.StatusCodes.BadSensorFailure))
    assert problem.kind == "timestamp-repeated"
    assert track.counts == {"duplicate": 1, "timestamp-repeated": 2}


def test_a_value_from_the_future_is_refused_at_the_tick():
    track = TagTrack(_spec())
    track.offer(_value(20.0, 60.0))
    fresh, problem = track.fresh(T0.timestamp(), tolerance_s=5.0)
    assert fresh is None
    assert problem.kind == "timestamp-in-future"
    assert "is 60.0 s ahead of the sample tick (tolerance 5 s)" in problem.detail
    # reported once, never delivered later either
    assert track.fresh(T0.timestamp() + 120.0, tolerance_s=5.0) == (None, None)
    # inside the tolerance it is delivered
    track.offer(_value(21.0, 63.0))
    fresh, problem = track.fresh(T0.timestamp() + 60.0, tolerance_s=5.0)
    assert fresh.value == 21.0
    assert problem is None


def test_missing_timestamps():
    track = TagTrack(_spec())
    value, problem = track.offer(_value(20.0, 0.0, source=False))
    assert value.source_time_s == pytest.approx(T0.timestamp() + 0.005)  # the server's
    assert problem is None  # counted, not reported: some servers never send one
    assert track.counts == {"no-source-timestamp": 1}
    value, problem = track.offer(_value(20.0, 1.0, source=False, server=False))
    assert value is None
    assert problem.kind == "no-timestamp"


def test_conversion_to_kelvin_and_kg_per_kg(demo_site):
    g_per_100g = analyzer_unit(demo_site, demo_site.unit[0])
    track = TagTrack(_spec())
    value, _ = track.offer(_value(53.2, 0.0))
    reading = analog_reading(value, "temperature", None)
    # 0 °C = 273.15 K exactly (definition of the Celsius scale)
    assert reading.value == pytest.approx(326.35, abs=1e-12)
    assert reading.status_code == 0
    assert reading.source_time_s == T0.timestamp()
    value, _ = TagTrack(_spec("concentration", "conc")).offer(_value(12.5, 0.0))
    reading = analog_reading(value, "concentration", g_per_100g)
    assert reading.value == pytest.approx(0.125, rel=1e-12)  # 12.5 g per 100 g solvent
    # a value the unit cannot hold becomes NaN (validation rejects it), as in the historian
    fraction = concentration_unit("mass-fraction")
    value, _ = TagTrack(_spec("concentration", "conc")).offer(_value(1.2, 0.0))
    assert math.isnan(analog_reading(value, "concentration", fraction).value)
    # a Bad value without a value keeps its StatusCode
    bad = ua.DataValue(
        ua.Variant(None, ua.VariantType.Null),
        StatusCode=ua.StatusCode(ua.StatusCodes.BadSensorFailure),
        SourceTimestamp=T0,
    )
    value, _ = TagTrack(_spec()).offer(bad)
    reading = analog_reading(value, "temperature", None)
    assert math.isnan(reading.value)
    assert reading.status_code == ua.StatusCodes.BadSensorFailure
    # a text where a number belongs is not a reading
    text = ua.DataValue(ua.Variant("53.2", ua.VariantType.String), SourceTimestamp=T0)
    value, _ = TagTrack(_spec()).offer(text)
    assert analog_reading(value, "temperature", None) is None


def test_every_configured_tag_gets_a_spec_with_its_types(demo_site):
    specs = {spec.signal: spec for spec in tag_specs(demo_site)}
    assert set(specs) == set(demo_site.unit[0].tags)
    assert specs["temp"].node_id == ua.NodeId("CR301.TT3011.PV", 2)
    assert ua.VariantType.Double in specs["conc"].types
    assert specs["permissive"].types == {ua.VariantType.Boolean}
    assert ua.VariantType.Int32 in specs["phase"].types  # the demo's phase values are integers
    assert ua.VariantType.String not in specs["phase"].types
    assert ua.VariantType.Double not in expected_types("counter", demo_site.unit[0])
