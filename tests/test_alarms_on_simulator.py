"""Every alarm raised and cleared by a real fault of the plant simulator, its delays honoured.

Three closed-loop batches of the simulated plant (``tests.closedloop``; seed 7), each with real
faults:

- **instruments**, the advisor in control: the analyzer drops out (15 min), freezes (15 min),
  reports Bad (10 min), and drifts by +0.01 kg/kg per hour for 30 min and back by as much; the
  link to the DCS is down for 5 min during the heat-up (as the plant client reports a lost
  link: every reading ``BadCommunicationError``); the seed window of an ordinary cool-down;
- **process**, the recipe alone (no permissive): seeded at 56 °C, above the charge's
  saturation temperature (about 55 °C), so the seed dissolves, then cooled linearly in one hour
  (far faster than the zone allows); early in the final hold at 10 °C the jacket's cooling
  valve fails open for an hour (``cooling-open``): the jacket runs to the coldest brine
  (-10 °C) and the reactor falls to about -4 °C, below the 0 °C down to which the site's curve
  is trusted (lab data from 5 °C, 5 K margin), until the loop brings it back (overshooting to
  about 18 °C, its output wound up at the steam limit);
- **utility**, the advisor in control: the recipe seeds at 50 °C, so late that sigma passes
  through the seed window and out of it before the seed goes in; the jacket cannot go below
  35 °C (a brine supply failure), so the reactor stops following the advisor's setpoint; after
  3 h the operator takes the permissive back.

For every raised and cleared event the alarm's own readings show the condition held for the
on-delay (off-delay) at every scan before it, and not for a scan longer (common practice for
chattering protection: ISA-18.2's on/off delays; the engine's own state machine is tested alone
in ``tests/controller/test_alarms.py``).

The plant's own solubility reaches 15 K below the site curve's trusted domain for such a fault
(``simulators.plant.COLD_SIDE_K``); its recipes stay inside it.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest

from controller.alarms import Direction, EventKind
from sensor.pipeline import UnitPipeline
from sensor.shell.sitesensor import pipeline_setup
from simulators.faults import Fault
from tests.closedloop import SCAN_S, closed_loop_plant, run_closed_loop
from tests.synthetic import demo_site_and_zone

H = 3600.0
COOLING_OPEN = Fault("cooling-open", 3.25 * H, 1.0 * H)


@pytest.fixture(scope="module")
def batches():
    site, zone = demo_site_and_zone()
    setup = pipeline_setup(site, 0, zone)
    plant = closed_loop_plant(site, 7)
    faults = (
        Fault("dropout", 2.0 * H, 900.0),
        Fault("frozen", 2.5 * H, 900.0),
        Fault("bad", 3.0 * H, 600.0),
        Fault("drift", 3.3 * H, 1800.0, rate_per_h=0.01),
        Fault("drift", 3.8 * H, 1800.0, rate_per_h=-0.01),
    )
    instruments = run_closed_loop(
        replace(plant, faults=faults).simulation(),
        UnitPipeline(setup),
        site,
        link_down_s=(1.0 * H, 1.0 * H + 300.0),
        keep_results=True,
    )
    process = run_closed_loop(
        replace(plant, faults=(COOLING_OPEN,)).simulation(
            {
                "seed_temp_c": 56.0,
                "cooling_profile": "linear",
                "cooling_duration_s": 3600.0,
                "final_hold_s": 2.5 * H,
            }
        ),
        UnitPipeline(setup),
        site,
        permissive=False,
        keep_results=True,
    )
    settings = plant.settings
    brine = replace(settings.thermal, jacket_setpoint_range_c=(35.0, 95.0))
    utility = run_closed_loop(
        replace(plant, settings=replace(settings, thermal=brine)).simulation({"seed_temp_c": 50.0}),
        UnitPipeline(setup),
        site,
        permissive_until_s=3.0 * H,
        max_steps=round(4.0 * H / SCAN_S),  # the reactor never reaches 10 °C: the batch
        keep_results=True,  # would not end
    )
    return setup, {"instruments": instruments, "process": process, "utility": utility}


def _events(record):
    return [(e, k) for k, r in enumerate(record.results) for e in r.events]


def test_every_alarm_is_raised_and_cleared_by_a_fault(batches):
    setup, records = batches
    seen: dict[str, set[str]] = {}
    for record in records.values():
        for event, _k in _events(record):
            seen.setdefault(event.alarm, set()).add(event.kind.value)
    names = {d.name for d in UnitPipeline(setup).advisor.engine.definitions}
    for name in sorted(names):
        assert {"raised", "cleared"} <= seen.get(name, set()), name


def test_the_open_cooling_valve_takes_the_batch_off_the_curve_and_back(batches):
    _setup, records = batches
    record = records["process"]
    found = [
        (record.time_s[k], record.phase[k], e.kind.value)
        for e, k in _events(record)
        if e.alarm == "solubility-extrapolated" and e.kind.value in ("raised", "cleared")
    ]
    assert [kind for _, _, kind in found] == ["raised", "cleared"], found
    (raised_s, raised_in, _), (cleared_s, _, _) = found
    assert raised_in == "final-hold"
    assert COOLING_OPEN.start_s < raised_s < COOLING_OPEN.end_s  # the valve did it
    assert cleared_s > COOLING_OPEN.end_s  # and the loop undid it once the valve closed
    for name, other in records.items():  # no other batch leaves the curve
        if name != "process":
            assert not any(
                e.alarm == "solubility-extrapolated" and e.kind is EventKind.RAISED
                for e, _ in _events(other)
            ), name


def _held_for(record, k: int, name: str, holds) -> float:
    """How long [s] before scan ``k`` (inclusive) the condition ``holds`` of alarm ``name``'s
    reading held at every scan (a NaN reading breaks it)."""
    start = k
    while start > 0:
        value = record.results[start - 1].alarm_readings[name]
        if not (math.isfinite(value) and holds(value)):
            break
        start -= 1
    return record.time_s[k] - record.time_s[start]


@pytest.mark.parametrize("batch", ["instruments", "process", "utility"])
def test_on_and_off_delays_are_honoured(batches, batch):
    setup, records = batches
    record = records[batch]
    definitions = {d.name: d for d in UnitPipeline(setup).advisor.engine.definitions}
    checked = 0
    for event, k in _events(record):
        if event.kind not in (EventKind.RAISED, EventKind.CLEARED):
            continue
        d = definitions[event.alarm]
        high = d.direction is Direction.HIGH
        if event.kind is EventKind.RAISED:
            delay = d.on_delay_s

            def holds(v, d=d, high=high):
                return v >= d.limit if high else v <= d.limit
        else:
            delay = d.off_delay_s

            def holds(v, d=d, high=high):
                return v < d.limit - d.deadband if high else v > d.limit + d.deadband

        assert holds(record.results[k].alarm_readings[event.alarm]), event
        held = _held_for(record, k, event.alarm, holds)
        assert delay <= held < delay + SCAN_S, (event, held)
        checked += 1
    assert checked >= 4


def test_the_guard_steps_aside_while_the_link_is_down(batches):
    _setup, records = batches
    record = records["instruments"]
    down = [r for t, r in zip(record.time_s, record.results, strict=True) if H <= t < H + 300.0]
    assert down
    assert not any(r.decision.write for r in down)
    assert all(r.communication_lost for r in down)
    after = np.array(record.time_s) >= H + 300.0
    assert not any(r.communication_lost for r, a in zip(record.results, after, strict=True) if a)
