"""Faults: the --faults syntax, and each fault as a historian shows it."""

from __future__ import annotations

import csv
import io
import itertools

import numpy as np
import pytest

from simulators.errors import SimulatorError
from simulators.faults import Fault, parse_fault_spec
from simulators.plant import COLD_SIDE_K, PlantSimulation
from simulators.shell.historian import HistorianWriter

CONC, TEMP = "CR301.AT3015.PV", "CR301.TT3011.PV"


def test_fault_spec_syntax():
    faults = parse_fault_spec(
        "dropout@5h+10min; spikes@3h+1h:every_s=120,size_std=5; frozen/temp@90s+20min;"
        "drift@1h+2h:rate_per_h=-0.001"
    )
    assert faults[0] == Fault("dropout", 18000.0, 600.0, "conc")
    assert faults[1] == Fault("spikes", 10800.0, 3600.0, "conc", every_s=120.0, size_std=5.0)
    assert faults[2] == Fault("frozen", 90.0, 1200.0, "temp")
    assert faults[3].rate_per_h == -0.001
    assert parse_fault_spec("none") == ()
    assert parse_fault_spec("cooling-open@2h+30min") == (
        Fault("cooling-open", 7200.0, 1800.0, "jacket_temp"),
    )
    stamps = parse_fault_spec("stuck-timestamp/temp@2h+5min; clock-behind@3h+10min:lag_s=300")
    assert stamps[0] == Fault("stuck-timestamp", 7200.0, 300.0, "temp")
    assert stamps[1] == Fault("clock-behind", 10800.0, 600.0, "conc", lag_s=300.0)


@pytest.mark.parametrize(
    ("spec", "message"),
    [
        ("melt@1h+1h", r"--faults 'melt@1h\+1h': unknown fault kind 'melt'"),
        ("bad/pressure@1h+1h", r"unknown signal 'pressure'"),
        ("bad@1h", r"expected KIND\[/SIGNAL\]@START\+DURATION"),
        ("bad@1x+1h", r"start: '1x' is not a time"),
        ("bad@1h+0s", r"duration must be positive"),
        ("bad@1h+1h:every_s=5", r"every_s: does not apply to a 'bad' fault"),
        ("drift@1h+1h", r"rate_per_h: needed by a 'drift' fault"),
        ("clock-behind@1h+1h", r"lag_s: needed by a 'clock-behind' fault"),
        ("clock-behind@1h+1h:lag_s=0", r"option lag_s must be positive"),
        ("stuck-timestamp@1h+1h:lag_s=5", r"lag_s: does not apply to a 'stuck-timestamp' fault"),
        ("spikes@1h+1h:size_std=x", r"option size_std needs a number"),
        ("cooling-open/temp@1h+1h", r"signal: a 'cooling-open' fault acts on 'jacket_temp' only"),
    ],
)
def test_bad_fault_specs_are_refused(spec, message):
    with pytest.raises(SimulatorError, match=message):
        parse_fault_spec(spec)


def _historian(site, settings, spec, seconds):
    sim = PlantSimulation.from_site(site, seed=11, settings=settings, faults=parse_fault_spec(spec))
    out = io.StringIO()
    writer = HistorianWriter(out, sim.unit, [])
    for sample in sim.advance_to(seconds):
        writer.write(sample, sim.timestamp(sample.time_s))
    rows = list(csv.DictReader(io.StringIO(out.getvalue())))
    return [(float(i + 1), row) for i, row in enumerate(rows)]


def _between(rows, start, end, column):
    return [row[column] for t, row in rows if start <= t < end]


def test_each_fault_shows_in_the_historian_as_a_real_one_would(demo_site, short_settings):
    rows = _historian(
        demo_site,
        short_settings,
        "dropout@600s+300s; frozen@1200s+300s; bad@1800s+300s; uncertain@2400s+300s;"
        "spikes@3000s+600s:every_s=10,size_std=20; frozen/temp@600s+120s; dropout/temp@900s+60s;"
        "nan@3600s+60s",
        3700.0,
    )
    analyzer_times = [t for t, row in rows if row[CONC]]
    assert analyzer_times
    assert all(t % 10 == 0 for t in analyzer_times)
    # dropout: blank cells (value and quality), nothing recorded
    assert set(_between(rows, 600, 900, CONC)) == {""}
    assert set(_between(rows, 600, 900, CONC + ".quality")) == {""}
    # frozen: one value repeated, flagged Good
    frozen = [v for v in _between(rows, 1200, 1500, CONC) if v]
    assert len(frozen) == 30
    assert len(set(frozen)) == 1
    assert set(v for v in _between(rows, 1200, 1500, CONC + ".quality") if v) == {"Good"}
    # bad: values recorded as they came, flagged BadSensorFailure
    assert set(v for v in _between(rows, 1800, 2100, CONC + ".quality") if v) == {
        "BadSensorFailure"
    }
    assert all(v for t, row in rows if 1800 <= t < 2100 and t % 10 == 0 for v in [row[CONC]])
    assert set(v for v in _between(rows, 2400, 2700, CONC + ".quality") if v) == {
        "UncertainSensorNotAccurate"
    }
    # spikes: values 20 noise std (2 g/100g) off their neighbours, quality Good
    values = [float(v) for v in _between(rows, 3000, 3600, CONC) if v]
    jumps = [abs(b - a) for a, b in itertools.pairwise(values)]
    assert sum(j > 1.0 for j in jumps) >= 10
    normal = [float(v) for v in _between(rows, 2700, 3000, CONC) if v]
    assert max(abs(b - a) for a, b in itertools.pairwise(normal)) < 1.0
    # a frozen and a dropped-out temperature transmitter
    assert len(set(_between(rows, 600, 720, TEMP))) == 1
    assert set(_between(rows, 900, 960, TEMP)) == {""}
    assert len(set(_between(rows, 960, 1020, TEMP))) > 5
    # nan: not-a-number, flagged Good
    assert set(v for v in _between(rows, 3600, 3660, CONC) if v) == {"NaN"}
    assert set(v for v in _between(rows, 3600, 3660, CONC + ".quality") if v) == {"Good"}
    # outside every fault: Good
    assert set(v for v in _between(rows, 100, 590, CONC + ".quality") if v) == {"Good"}


def test_drift_moves_the_analyzer_bias(demo_site, short_settings):
    sim = PlantSimulation.from_site(
        demo_site,
        seed=1,
        settings=short_settings,
        faults=parse_fault_spec("drift@0s+1h:rate_per_h=0.01"),
    )
    start = sim.truth().analyzer_bias
    sim.advance_to(3600.0)
    # 0.01 kg/kg per hour for an hour, plus the bias random walk (1e-6 per sqrt s: 6e-5 std)
    assert sim.truth().analyzer_bias - start == pytest.approx(0.01, abs=5e-4)


def test_an_open_cooling_valve_overcools_the_jacket_whatever_the_loop_asks(
    demo_site, short_settings
):
    # 100 min in, early in the short recipe's cubic cooling (still near 53 °C), the valve opens
    # for 30 min
    faults = parse_fault_spec("cooling-open@6000s+1800s")
    sim = PlantSimulation.from_site(demo_site, seed=2, settings=short_settings, faults=faults)
    truths, readings = {}, {}
    while sim.time_s < 9000.0:
        sample = sim.step()
        truths[round(sample.time_s)] = sim.truth()
        readings[round(sample.time_s)] = sample.readings
    coldest_c = short_settings.thermal.jacket_setpoint_range_c[0]
    before, during, after = truths[6000], truths[7700], truths[9000]
    assert before.jacket_temp_c > 40.0
    # 60 K at its 3 K/min rate limit is 20 min, then its 2 min lag: at the coldest by 28 min
    assert during.jacket_temp_c == pytest.approx(coldest_c, abs=0.5)
    assert during.temp_c < before.temp_c - 5.0  # the reactor follows the jacket down
    assert during.jacket_setpoint_c > before.jacket_setpoint_c  # while the loop asks for heat
    assert after.jacket_temp_c > coldest_c + 20.0  # the loop has the jacket back
    # the instruments read true: the jacket transmitter reports the cold jacket
    assert readings[7700]["jacket_temp"].value == pytest.approx(during.jacket_temp_c, abs=0.5)


def test_the_plants_solubility_reaches_below_the_curves_trusted_range(demo_site):
    sim = PlantSimulation.from_site(demo_site)
    solubility = sim.plant_solubility
    lo, _hi = solubility.range_k
    trusted_lo, trusted_hi = solubility.trusted_k
    assert trusted_lo - lo == pytest.approx(COLD_SIDE_K, abs=0.01)
    assert solubility.range_k[1] == pytest.approx(trusted_hi, abs=0.01)  # not above it
    # it is the site's correlation extrapolated: still falling with temperature, positive
    temps = np.linspace(lo, trusted_lo, 50)
    c_sat = np.array([solubility.c_sat(t) for t in temps])
    assert np.all(c_sat > 0.0)
    assert np.all(np.diff(c_sat) > 0.0)
