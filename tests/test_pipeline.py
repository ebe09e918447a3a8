"""The unit pipeline: sample -> estimate -> propose -> guard -> alarms, and its checkpoint.

These tests check the wiring and the checkpoint on a synthetic batch made with the estimation
model (they test the method's plumbing, not the science; the closed loop against the simulator
is in ``tests/test_closed_loop.py``).
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from controller.errors import ControllerError
from controller.guard import GuardMode
from controller.law import LawMode
from sensor.pipeline import DcsInputs, EstimateView, PipelineResult, UnitPipeline
from sensor.shell.opcua.advisor_server import unit_outputs
from sensor.shell.sitesensor import pipeline_setup
from sensor.validation import Reason
from tests.controller.toys import ConstantForecast
from tests.synthetic import cooling_batch, demo_site_and_zone

CONTROLLED_FROM_S = 1200.0


@pytest.fixture(scope="module")
def setup():
    site, zone = demo_site_and_zone()
    return pipeline_setup(site, 0, zone)


@pytest.fixture(scope="module")
def samples(setup):
    """A one-hour seeded cooling batch in 1 s samples, in controlled cooling from 1,200 s."""
    batch = cooling_batch(setup.sensor, np.random.default_rng(11), hours=1.0, seed_at_s=600.0)
    return [
        replace(s, phase="controlled-cooling") if s.time_s >= CONTROLLED_FROM_S else s
        for s in batch.samples
    ]


DCS = DcsInputs(permissive=True)
VIEW = EstimateView(
    time_s=0.0,
    phase="controlled-cooling",
    started=True,
    temp_k=320.0,
    conc=0.1,
    sigma=0.02,
    sigma_limit=0.1,
    analyzer_bias=0.0,
    extrapolated=False,
    data_stale=False,
    conc_stale=False,
    conc_reason=Reason.ACCEPTED,
    nis_high=False,
)
"""A soft-sensor view in controlled cooling, for the advisor's tests alone."""


def _same(a: PipelineResult, b: PipelineResult) -> None:
    """Two results equal in every field (NaN equal to NaN; floats compared exactly)."""
    for name in ("time_s", "proposal", "decision", "alarms", "events", "health_good", "proposed"):
        assert repr(getattr(a, name)) == repr(getattr(b, name)), name
    sa, sb = a.step, b.step
    assert repr(replace(sa, estimates=None)) == repr(replace(sb, estimates=None))
    assert (sa.estimates is None) == (sb.estimates is None)
    if sa.estimates is not None:
        for name, value in sa.estimates.row(0).items():
            np.testing.assert_array_equal(value, sb.estimates.row(0)[name], err_msg=name)


def test_the_pipeline_proposes_writes_and_counts_the_heartbeat(setup, samples):
    pipeline = UnitPipeline(setup)
    results = [pipeline.step(s, DCS) for s in samples]
    cooling = [r for r in results if r.time_s >= CONTROLLED_FROM_S]
    before = [r for r in results if r.time_s < CONTROLLED_FROM_S]
    assert all(r.proposal is None and not r.decision.write for r in before)
    assert all(r.decision.mode is GuardMode.STANDBY for r in before)
    # the law runs every update interval in the proposal phase, the guard at every sample
    proposed = [r.time_s for r in cooling if r.proposed]
    assert np.allclose(np.diff(proposed), setup.law.interval_s)
    assert proposed[0] == CONTROLLED_FROM_S
    assert sum(r.decision.write for r in cooling) > 0.9 * len(cooling)
    beats = [r.decision.heartbeat for r in results]
    assert np.all(np.diff(beats) >= 0)
    assert beats[-1] - beats[0] == pytest.approx(
        (samples[-1].time_s - samples[0].time_s) / setup.limits.heartbeat_period_s, abs=1
    )
    # never below the active setpoint minus the guard's rate (the estimated temperature here)
    for r in cooling:
        if r.decision.write:
            assert r.decision.cooling_rate_k_per_s <= setup.limits.max_cooling_rate_k_per_s + 1e-12
    outputs = unit_outputs(results[-1])
    assert outputs.decision is results[-1].decision
    assert outputs.alarms == results[-1].alarms


def test_no_write_without_the_permissive(setup, samples):
    pipeline = UnitPipeline(setup)
    results = [pipeline.step(s, DcsInputs(permissive=False)) for s in samples[:1500]]
    assert not any(r.decision.write for r in results)
    assert any(r.proposal is not None for r in results)


def test_lost_communication_is_a_doubt_and_an_alarm(setup, samples):
    pipeline = UnitPipeline(setup)
    lost = DcsInputs(permissive=True, communication_lost=True)
    results = [pipeline.step(s, lost) for s in samples[:1500]]
    assert not any(r.decision.write for r in results)
    late = results[-1]
    assert late.decision.mode is GuardMode.FALLBACK
    assert "communication with the DCS is lost" in late.decision.reasons
    status = {s.name: s for s in late.alarms}["communication-lost"]
    assert status.condition_active
    assert status.state.value == "unacknowledged"
    raised = [e for r in results for e in r.events if e.alarm == "communication-lost"]
    # raised after the on-delay (the first sample counts from 0 s)
    assert raised[0].time_s == samples[0].time_s + setup.alarms.on_delay_s


def test_operator_actions_reach_the_alarm_engine(setup, samples):
    pipeline = UnitPipeline(setup)
    with pytest.raises(ControllerError, match="before the first step"):
        pipeline.act("communication-lost", "acknowledge")
    lost = DcsInputs(communication_lost=True)
    for s in samples[:100]:
        pipeline.step(s, lost)
    (event,) = pipeline.act("communication-lost", "acknowledge", note="seen")
    assert event.kind.value == "acknowledged"
    assert event.time_s == samples[99].time_s
    (event,) = pipeline.act("communication-lost", "shelve", duration_s=600.0)
    assert event.after.value == "shelved"
    (event,) = pipeline.act("communication-lost", "unshelve")
    assert event.after.value == "unacknowledged"
    with pytest.raises(ControllerError, match="duration"):
        pipeline.act("communication-lost", "shelve", duration_s=1e9)


def test_the_analyzer_verdict_is_held_between_analyzer_samples(setup):
    pipeline = UnitPipeline(setup)
    advisor = pipeline.advisor
    nan = math.nan
    view = replace(
        VIEW, started=False, temp_k=nan, conc=nan, sigma=nan, sigma_limit=nan, analyzer_bias=nan
    )
    events = []
    for k in range(100):
        reason = Reason.BAD_QUALITY if k % 10 == 0 else Reason.MISSING
        step_view = replace(view, time_s=float(k), conc_reason=reason)
        events += advisor.step(step_view, DcsInputs(), lambda: None).events
    raised = [e for e in events if e.alarm == "analyzer-bad" and e.kind.value == "raised"]
    assert [e.time_s for e in raised] == [setup.alarms.on_delay_s]


def test_ramps_continue_across_law_updates_with_a_dcs_one_scan_behind(setup):
    """A DCS uses the setpoint written at its previous scan (10 s scans; the law every 30 s).
    Far below its target the law asks for the maximum rate: the written setpoints must fall at
    that rate across the law's updates, not start again from the DCS's setpoint at each (which
    wrote the same setpoint twice per update and fell at two thirds of the rate)."""
    advisor = UnitPipeline(setup).advisor
    temp_k = 320.0
    c_sat = float(setup.sensor.zone.solubility.c_sat(np.array(temp_k)))
    view = replace(VIEW, temp_k=temp_k, conc=c_sat, sigma=0.0)
    active_k, written, modes = temp_k, [], set()
    for k in range(13):  # four law updates, 2 K at 1 K/min: still far above T_dd
        result = advisor.step(
            replace(view, time_s=10.0 * k),
            DcsInputs(permissive=True, active_setpoint_k=active_k),
            lambda: ConstantForecast(0.0),
        )
        assert result.decision.write
        written.append(result.decision.setpoint_k)
        active_k = result.decision.setpoint_k
        modes.add(result.proposal.mode)
    assert modes == {LawMode.AT_MAX_RATE}
    rate = setup.limits.max_cooling_rate_k_per_s
    np.testing.assert_allclose(np.diff(written), -rate * 10.0, rtol=1e-9)


@pytest.mark.parametrize("stop_at_s", [900.0, 2017.0])
def test_a_restored_pipeline_continues_exactly(setup, samples, stop_at_s):
    """Checkpointed mid-batch (before seeding; in controlled cooling with an alarm shelved),
    passed through strict JSON, restored: every later result equals the unstopped one's."""
    never_stopped = UnitPipeline(setup)
    stopped = UnitPipeline(setup)
    lost = DcsInputs(permissive=True, communication_lost=True)
    k_stop = next(k for k, s in enumerate(samples) if s.time_s >= stop_at_s)
    for k, sample in enumerate(samples[:k_stop]):
        dcs = lost if 400 <= k < 500 else DCS
        _same(never_stopped.step(sample, dcs), stopped.step(sample, dcs))
    for pipeline in (never_stopped, stopped):
        pipeline.act("analyzer-drift", "shelve", duration_s=1800.0)
    text = json.dumps(stopped.checkpoint(), allow_nan=False)
    del stopped
    restored = UnitPipeline.restore(setup, json.loads(text))
    for sample in samples[k_stop:]:
        _same(never_stopped.step(sample, DCS), restored.step(sample, DCS))


def test_a_checkpoint_of_another_unit_or_version_is_refused(setup, samples):
    pipeline = UnitPipeline(setup)
    pipeline.step(samples[0], DCS)
    state = pipeline.checkpoint()
    with pytest.raises(ControllerError, match="unit 'CR-301', not 'CR-302'"):
        UnitPipeline.restore(replace(setup, unit_id="CR-302"), state)
    with pytest.raises(ControllerError, match="version 0"):
        UnitPipeline.restore(setup, {**state, "version": 0})


def test_a_rehearsal_compiles_every_kernel_a_closed_loop_batch_uses():
    """In a fresh interpreter, after :func:`sensor.pipeline.rehearse`, a whole closed-loop batch
    of the simulated plant (seeding, cooling under the advisor, the analyzer delayed) compiles
    no kernel more: a service that rehearses before it connects never stalls to compile."""
    child = Path(__file__).with_name("rehearsal_child.py")
    done = subprocess.run(
        [sys.executable, str(child)], capture_output=True, text=True, timeout=600, check=False
    )
    assert done.returncode == 0, done.stderr[-3000:]
    found = json.loads(done.stdout.strip().splitlines()[-1])
    assert found["new"] == {}
    rehearsed = {name for name, count in found["rehearsed"].items() if count > 0}
    live_ukf = ("sigma_points_into", "propagate_into", "linear_update_into")
    for kernel in (*live_ukf, "check_reading", "process_noise", "initial_state", "_propagate"):
        assert any(name.endswith("." + kernel) for name in rehearsed), kernel
