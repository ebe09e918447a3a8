"""The guard: limits, the permissive, the heartbeat and the declared fallbacks.

The limits are this project's design (the issue's list, common practice for an advisory
setpoint writer); the property-based checks (hypothesis, derandomized so that no run depends on
luck) try random sequences of steps, proposals and flags and require that no setpoint ever
leaves the limits and that nothing is written without the permissive.
"""

from __future__ import annotations

import math
from dataclasses import replace

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from controller.errors import SettingsError
from controller.guard import (
    HEARTBEAT_MODULUS,
    Fallback,
    Guard,
    GuardInputs,
    GuardMode,
    setpoint_bounds,
)
from tests.controller.toys import LIMITS as SHARED_LIMITS

LIMITS = replace(SHARED_LIMITS, max_step_k=0.4)


def _inputs(time_s=0.0, setpoint_k=313.15, **changes) -> GuardInputs:
    base = GuardInputs(
        time_s=time_s,
        phase="controlled-cooling",
        active_setpoint_k=setpoint_k,
        permissive=True,
        health_good=True,
    )
    return replace(base, **changes)


def test_a_proposal_inside_the_limits_is_written_unchanged():
    decision = Guard(LIMITS).step(_inputs(), 313.0)
    assert decision.mode is GuardMode.ADVISING
    assert decision.write
    assert decision.setpoint_k == 313.0
    assert decision.limited_by == ()
    assert decision.cooling_rate_k_per_s == pytest.approx(0.15 / 30.0, rel=1e-12)


@pytest.mark.parametrize(
    ("active_k", "proposal_k", "expected_k", "limit"),
    [
        # 30 s at 1 K/min is 0.5 K, the step limit 0.4 K is tighter.
        (313.15, 300.0, 312.75, "max step"),
        # never below the final temperature
        (283.35, 280.0, 283.15, "final temperature"),
        # no heating outside the heating phases
        (313.15, 315.0, 313.15, "no heating in this phase"),
    ],
)
def test_limits_act_and_say_which(active_k, proposal_k, expected_k, limit):
    decision = Guard(LIMITS).step(_inputs(setpoint_k=active_k), proposal_k)
    assert decision.write
    assert decision.setpoint_k == pytest.approx(expected_k, abs=1e-12)
    assert decision.limited_by == (limit,)


def test_the_rate_limit_counts_the_time_since_the_last_step_capped_at_one_interval():
    guard = Guard(LIMITS)
    guard.step(_inputs(time_s=0.0), 313.15)
    # 12 s later: 12 s at 1 K/min = 0.2 K, below the 0.4 K step limit
    decision = guard.step(_inputs(time_s=12.0), 300.0)
    assert decision.setpoint_k == pytest.approx(313.15 - 0.2, abs=1e-12)
    assert decision.limited_by == ("max cooling rate",)
    # a late step (600 s) earns no more than one interval (30 s at 1 K/min = 0.5 K)
    guard = Guard(replace(LIMITS, max_step_k=5.0))
    guard.step(_inputs(time_s=0.0), 313.15)
    decision = guard.step(_inputs(time_s=600.0), 300.0)
    assert decision.setpoint_k == pytest.approx(313.15 - 0.5, abs=1e-12)
    assert decision.limited_by == ("max cooling rate",)


def test_a_dcs_setpoint_read_back_late_does_not_slow_the_written_ramp():
    """The DCS follows each written setpoint at once, but its setpoint is read back 8 s late
    while the guard steps every 1.5 s (the demo at 200x; on a real plant a readback a few scans
    late against 1 s steps is the same shape). The written setpoints descend at the maximum
    cooling rate; counted from the late readback alone they descended at 1.5/8 of it. They
    never go more than a step below what the DCS uses."""
    guard = Guard(LIMITS)
    rate, lag_s, dt_s = LIMITS.max_cooling_rate_k_per_s, 8.0, 1.5
    history = [(0.0, 313.15)]  # (time, DCS setpoint)

    def read_back(time_s):
        return (
            next(sp for t, sp in reversed(history) if t <= time_s - lag_s)
            if time_s > lag_s
            else history[0][1]
        )

    written = []
    for k in range(1, 81):
        time_s = k * dt_s
        active = read_back(time_s)
        decision = guard.step(_inputs(time_s, setpoint_k=active), proposed_setpoint_k=250.0)
        assert decision.write
        assert active - decision.setpoint_k <= LIMITS.max_step_k + 1e-9
        written.append(decision.setpoint_k)
        history.append((time_s, decision.setpoint_k))
    descent = (written[10] - written[-1]) / ((len(written) - 11) * dt_s)
    assert descent == pytest.approx(rate, rel=1e-9)


def test_heating_only_in_a_heating_phase_and_no_faster_than_its_rate():
    guard = Guard(LIMITS)
    decision = guard.step(_inputs(phase="dissolve-fines"), 330.0)
    # 30 s at 2 K/min = 1 K; the step limit 0.4 K is tighter
    assert decision.setpoint_k == pytest.approx(313.55, abs=1e-12)
    assert decision.limited_by == ("max step",)
    assert decision.cooling_rate_k_per_s < 0.0


def test_no_write_without_the_permissive_but_the_advice_is_shown():
    decision = Guard(LIMITS).step(_inputs(permissive=False), 313.0)
    assert decision.mode is GuardMode.STANDBY
    assert not decision.write
    assert decision.setpoint_k == 313.0
    assert decision.reasons == ("the DCS has not granted the permissive",)


def test_a_phase_that_takes_no_proposals_gets_none():
    decision = Guard(LIMITS).step(_inputs(phase="seed-hold"), 313.0)
    assert decision.mode is GuardMode.STANDBY
    assert not decision.write
    assert math.isnan(decision.setpoint_k)
    assert decision.reasons == ("phase 'seed-hold' takes no proposals",)


@pytest.mark.parametrize(
    ("changes", "proposal", "reason"),
    [
        ({"health_good": False}, 313.0, "the soft sensor's health is not good"),
        ({"data_stale": True}, 313.0, "the data are stale"),
        ({"nis_alarm": True}, 313.0, "the estimate is inconsistent with the measurements (NIS)"),
        ({"communication_lost": True}, 313.0, "communication with the DCS is lost"),
        ({"solubility_extrapolated": True}, 313.0, "the solubility curve is extrapolated"),
        ({}, math.nan, "no valid proposal (nan)"),
        ({}, math.inf, "no valid proposal (inf)"),
        ({"active_setpoint_k": math.nan}, 313.0, "the active setpoint is not a number (nan)"),
        ({"time_s": math.nan}, 313.0, "the step's time is not a number (nan)"),
    ],
)
def test_every_doubt_falls_back_to_the_recipe_and_says_why(changes, proposal, reason):
    decision = Guard(LIMITS).step(_inputs(**changes), proposal)
    assert decision.mode is GuardMode.FALLBACK
    assert decision.fallback is Fallback.RECIPE
    assert not decision.write
    assert math.isnan(decision.setpoint_k)
    assert decision.reasons == (reason,)


def test_time_going_backwards_is_a_doubt():
    guard = Guard(LIMITS)
    guard.step(_inputs(time_s=100.0), 313.0)
    decision = guard.step(_inputs(time_s=90.0), 313.0)
    assert decision.mode is GuardMode.FALLBACK
    assert decision.reasons == ("time went backwards, from 100.0 s to 90.0 s",)


def test_hold_rate_fallback_keeps_the_last_written_rate_and_writes_nothing():
    guard = Guard(replace(LIMITS, fallback=Fallback.HOLD_RATE))
    written = guard.step(_inputs(time_s=0.0, setpoint_k=313.15), 312.95)
    assert written.write
    decision = guard.step(_inputs(time_s=30.0, setpoint_k=312.95, data_stale=True), 300.0)
    assert decision.mode is GuardMode.FALLBACK
    assert decision.fallback is Fallback.HOLD_RATE
    assert not decision.write
    assert decision.setpoint_k == pytest.approx(312.75, abs=1e-12)
    assert decision.cooling_rate_k_per_s == pytest.approx(written.cooling_rate_k_per_s, rel=1e-9)


def test_a_setpoint_already_below_the_final_temperature_gets_no_proposal():
    decision = Guard(LIMITS).step(_inputs(setpoint_k=282.0), 282.0)
    assert decision.mode is GuardMode.STANDBY
    assert not decision.write
    assert "no setpoint meets every limit" in decision.reasons[0]


def test_the_heartbeat_counts_once_per_period_even_without_the_permissive():
    guard = Guard(LIMITS)
    beats = [
        guard.step(_inputs(time_s=t, permissive=t < 20.0), 313.0).heartbeat
        for t in (0.0, 4.0, 10.0, 15.0, 20.0, 31.0)
    ]
    assert beats == [1, 1, 2, 2, 3, 4]


def test_the_heartbeat_stops_when_time_is_invalid_and_wraps_at_its_modulus():
    guard = Guard(LIMITS)
    guard.step(_inputs(time_s=100.0), 313.0)
    assert guard.step(_inputs(time_s=50.0), 313.0).heartbeat == 1
    for i in range(HEARTBEAT_MODULUS - 1):
        guard.step(_inputs(time_s=110.0 + 10.0 * i), 313.0)
    assert guard.heartbeat == 0


@pytest.mark.parametrize(
    ("changes", "message"),
    [
        ({"setpoint_range_k": (300.0, 290.0)}, r"GuardLimits\.setpoint_range_k: must be"),
        ({"final_temp_k": 250.0}, r"GuardLimits\.final_temp_k: must lie in setpoint_range_k"),
        ({"max_step_k": 0.0}, r"GuardLimits\.max_step_k: must be a positive number; got 0\.0"),
        ({"max_cooling_rate_k_per_s": math.nan}, r"max_cooling_rate_k_per_s: must be a positive"),
        ({"heating_phases": frozenset({"seed"})}, r"heating_phases: \['seed'\] are not among"),
        ({"max_heating_rate_k_per_s": 0.0}, r"max_heating_rate_k_per_s: must be positive when"),
        ({"max_heating_rate_k_per_s": -1.0}, r"max_heating_rate_k_per_s: must be >= 0; got -1\.0"),
    ],
)
def test_impossible_limits_are_refused_by_name(changes, message):
    with pytest.raises(SettingsError, match=message):
        replace(LIMITS, **changes)


# --- properties ----------------------------------------------------------------------------

PHASES = ("controlled-cooling", "dissolve-fines", "seed-hold")
ROUND = 1e-9  # K
PROPOSALS = st.one_of(
    st.floats(min_value=200.0, max_value=400.0),
    st.sampled_from([math.nan, math.inf, -math.inf, 0.0, 1e9]),
)
STEPS = st.lists(
    st.tuples(
        st.floats(min_value=-20.0, max_value=90.0),  # time since the last step [s]; < 0: back
        st.sampled_from(PHASES),
        st.floats(min_value=260.0, max_value=360.0),  # active setpoint [K]
        st.booleans(),  # permissive
        # at most one doubt per step, none most often: health bad, stale, NIS, comm, extrap
        st.sampled_from((None, None, None, None, 0, 1, 2, 3, 4)),
        PROPOSALS,
    ),
    min_size=1,
    max_size=25,
)


@settings(derandomize=True, database=None, max_examples=300, deadline=None)
@given(
    steps=STEPS,
    fallback=st.sampled_from(list(Fallback)),
    max_step_k=st.floats(min_value=0.05, max_value=5.0),
)
def test_no_setpoint_leaves_the_limits_and_no_write_happens_without_the_permissive(
    steps, fallback, max_step_k
):
    limits = replace(LIMITS, fallback=fallback, max_step_k=max_step_k)
    guard = Guard(limits)
    time_s, last_valid, written = 0.0, None, None
    for gap, phase, active, permissive, doubt, proposal in steps:
        time_s += gap
        flags = [doubt == i for i in range(5)]
        doubtful = doubt is not None
        inputs = GuardInputs(
            time_s=time_s,
            phase=phase,
            active_setpoint_k=active,
            permissive=permissive,
            health_good=not flags[0],
            data_stale=flags[1],
            nis_alarm=flags[2],
            communication_lost=flags[3],
            solubility_extrapolated=flags[4],
        )
        decision = guard.step(inputs, proposal)
        backwards = last_valid is not None and time_s < last_valid
        if decision.write:
            assert permissive
            assert not doubtful
            assert not backwards
            assert phase in limits.proposal_phases
            assert math.isfinite(proposal)
            assert decision.mode is GuardMode.ADVISING
        if not backwards:
            dt = (
                limits.interval_s
                if last_valid is None
                else min(time_s - last_valid, limits.interval_s)
            )
            last_valid = time_s
            if math.isfinite(decision.setpoint_k):
                sp, lo, hi = decision.setpoint_k, *limits.setpoint_range_k
                assert lo <= sp <= hi
                assert sp >= limits.final_temp_k
                # ROUND: a bound computed as active - step, subtracted back from active, can
                # differ from step by a few ulp; 1e-9 K is far below any meaning.
                # Cooling counts from the setpoint written at the step before while the DCS is
                # on its way to it, and never reaches more than a step below the DCS's.
                reference = active
                if written is not None and active - limits.max_step_k <= written:
                    reference = min(written, active)
                cooling = min(limits.max_step_k, limits.max_cooling_rate_k_per_s * dt)
                assert reference - sp <= cooling + ROUND
                assert active - sp <= limits.max_step_k + ROUND
                heating = 0.0
                if phase in limits.heating_phases:
                    heating = min(limits.max_step_k, limits.max_heating_rate_k_per_s * dt)
                assert sp - active <= heating + ROUND
        else:
            assert not decision.write
        written = decision.setpoint_k if decision.write else None


@settings(derandomize=True, database=None, max_examples=200, deadline=None)
@given(
    active=st.floats(min_value=260.0, max_value=360.0),
    dt=st.floats(min_value=0.0, max_value=60.0),
    phase=st.sampled_from(PHASES),
    proposal=st.floats(min_value=200.0, max_value=400.0),
)
def test_clipping_gives_the_nearest_allowed_setpoint(active, dt, phase, proposal):
    bounds = setpoint_bounds(LIMITS, phase, active, dt)
    if bounds.empty:
        return
    clipped, limited_by = bounds.clip(proposal)
    assert bounds.low <= clipped <= bounds.high
    assert (clipped == proposal) == (limited_by == ())
