"""The crystallizer's alarm set: each alarm raised and cleared by its own condition, with its
delays honoured, suppressed where it does not apply, and with help that states the advisory
nature of sigmatrack.

The inputs are plain numbers and flags, as the integration will fill them from the soft
sensor; raising them by real faults in the plant simulator is the next phase's check. The
limits are the project's design (common practice); nothing here is checked against an outside
table.
"""

from __future__ import annotations

import math
from dataclasses import replace

import pytest

from controller.alarm_set import (
    ADVISORY_NOTE,
    AlarmInputs,
    AlarmSettings,
    alarm_readings,
    crystallizer_alarm_engine,
    crystallizer_alarms,
    help_text,
)
from controller.alarms import AlarmState
from controller.errors import SettingsError
from sensor.shell.config import BATCH_PHASES

SETTINGS = AlarmSettings(heating_phases=frozenset({"dissolve"}))
NORMAL = AlarmInputs(
    phase="controlled-cooling",
    sigma=0.02,
    sigma_limit=0.1,
    temp_k=300.0,
    setpoint_k=300.5,
    conc=0.1,
    analyzer_bias=0.0,
    analyzer_stale=False,
    analyzer_frozen=False,
    analyzer_bad=False,
    estimate_inconsistent=False,
    solubility_extrapolated=False,
    communication_lost=False,
)

THE_SET = (
    "sigma-high",
    "sigma-high-high",
    "undersaturated",
    "seed-window",
    "analyzer-stale",
    "analyzer-frozen",
    "analyzer-bad",
    "analyzer-drift",
    "estimate-inconsistent",
    "temperature-not-following",
    "solubility-extrapolated",
    "communication-lost",
)


def test_the_set_is_the_one_the_issue_lists_with_help_for_each():
    definitions = crystallizer_alarms(SETTINGS)
    assert tuple(d.name for d in definitions) == THE_SET
    for definition in definitions:
        text = help_text(definition)
        assert len(definition.meaning) > 40
        assert len(definition.response) > 30
        assert text.endswith(ADVISORY_NOTE)
    assert "DCS keeps the temperature loop" in ADVISORY_NOTE
    assert "safety instrumented system keeps protection" in ADVISORY_NOTE


def test_every_phase_the_alarms_name_is_a_phase_of_the_site_file():
    for definition in crystallizer_alarms(SETTINGS):
        assert definition.applies_in is None or definition.applies_in <= set(BATCH_PHASES)


FAULTS = [
    # (what is wrong, phase of the batch, what is raised)
    ({"sigma": 0.085}, "controlled-cooling", {"sigma-high"}),
    ({"sigma": 0.12}, "controlled-cooling", {"sigma-high", "sigma-high-high"}),
    ({"sigma": -0.015}, "controlled-cooling", {"undersaturated"}),
    ({"sigma": 0.04}, "cool-to-seed", {"seed-window"}),
    ({"analyzer_stale": True}, "controlled-cooling", {"analyzer-stale"}),
    ({"analyzer_frozen": True}, "controlled-cooling", {"analyzer-frozen"}),
    ({"analyzer_bad": True}, "controlled-cooling", {"analyzer-bad"}),
    ({"analyzer_bias": -0.004}, "controlled-cooling", {"analyzer-drift"}),
    ({"estimate_inconsistent": True}, "seed-hold", {"estimate-inconsistent"}),
    ({"temp_k": 302.6}, "controlled-cooling", {"temperature-not-following"}),
    ({"solubility_extrapolated": True}, "heat", {"solubility-extrapolated"}),
    ({"communication_lost": True}, "idle", {"communication-lost"}),
]


@pytest.mark.parametrize(("fault", "phase", "raised"), FAULTS, ids=[min(f[2]) for f in FAULTS])
def test_each_alarm_is_raised_and_cleared_by_its_condition_after_its_delays(fault, phase, raised):
    engine = crystallizer_alarm_engine(SETTINGS)
    normal = replace(NORMAL, phase=phase)
    faulty = replace(normal, **fault)

    def step(time_s, inputs):
        events = engine.update(time_s, inputs.phase, alarm_readings(inputs, SETTINGS))
        return {(e.alarm, e.kind.value) for e in events if e.kind.value in ("raised", "cleared")}

    on, off = SETTINGS.on_delay_s, SETTINGS.off_delay_s
    assert step(0.0, normal) == set()
    assert step(10.0, faulty) == set()
    assert step(10.0 + on - 1.0, faulty) == set()
    assert step(10.0 + on, faulty) == {(name, "raised") for name in raised}
    for name in raised:
        assert engine.status(name).state is AlarmState.UNACKNOWLEDGED
    assert step(100.0, normal) == set()
    assert step(100.0 + off - 1.0, normal) == set()
    assert step(100.0 + off, normal) == {(name, "cleared") for name in raised}
    for name in raised:
        assert engine.status(name).state is AlarmState.RETURNED_UNACKNOWLEDGED


def test_a_solution_near_equilibrium_is_not_undersaturated():
    """Late in a batch the estimate dithers about saturation: a few per cent of the zone
    below it is not a dissolving seed (the alarm's limit is -10 % of the metastable limit,
    0.1 here, with the 5 % deadband)."""
    limit = SETTINGS.undersaturated_fraction * NORMAL.sigma_limit
    engine = crystallizer_alarm_engine(SETTINGS)
    for k, sigma in enumerate([0.002, -0.003, -0.6 * limit, -0.9 * limit, -0.99 * limit] * 4):
        inputs = replace(NORMAL, phase="final-hold", sigma=sigma)
        events = engine.update(30.0 * k, inputs.phase, alarm_readings(inputs, SETTINGS))
        assert not [e for e in events if e.alarm == "undersaturated"], sigma
    low = replace(NORMAL, phase="final-hold", sigma=-1.01 * limit)
    raised = engine.update(1000.0, low.phase, alarm_readings(low, SETTINGS))
    raised += engine.update(1000.0 + SETTINGS.on_delay_s, low.phase, alarm_readings(low, SETTINGS))
    assert [e.kind.value for e in raised if e.alarm == "undersaturated"] == ["raised"]


def test_alarms_are_suppressed_by_design_where_they_do_not_apply():
    engine = crystallizer_alarm_engine(SETTINGS)

    def states(time_s, inputs):
        engine.update(time_s, inputs.phase, alarm_readings(inputs, SETTINGS))
        return {name: engine.status(name).state for name in THE_SET}

    # Undersaturation is the point of a dissolution step; the seed window only matters before
    # seeding; in idle only the link to the DCS is watched.
    dissolving = states(0.0, replace(NORMAL, phase="dissolve", sigma=-0.05))
    assert dissolving["undersaturated"] is AlarmState.SUPPRESSED_BY_DESIGN
    assert dissolving["seed-window"] is AlarmState.SUPPRESSED_BY_DESIGN
    assert dissolving["analyzer-bad"] is AlarmState.NORMAL
    idle = states(1.0, replace(NORMAL, phase="idle"))
    assert {n for n, s in idle.items() if s is not AlarmState.SUPPRESSED_BY_DESIGN} == {
        "communication-lost"
    }


def test_readings_are_unknown_where_the_limit_is_not_usable():
    for limit in (0.0, -0.1, math.nan):
        readings = alarm_readings(replace(NORMAL, sigma_limit=limit), SETTINGS)
        assert all(math.isnan(readings[n]) for n in ("sigma-high", "undersaturated"))
        assert math.isnan(readings["seed-window"])
    no_setpoint = alarm_readings(replace(NORMAL, setpoint_k=math.nan), SETTINGS)
    assert no_setpoint["temperature-not-following"] == 0.0
    assert math.isnan(alarm_readings(replace(NORMAL, conc=0.0), SETTINGS)["analyzer-drift"])


@pytest.mark.parametrize(
    ("changes", "message"),
    [
        ({"sigma_high_fraction": 1.0}, r"AlarmSettings\.sigma_high_fraction: must be in \(0, 1\)"),
        ({"tracking_error_k": 0.0}, r"AlarmSettings\.tracking_error_k: must be positive"),
        ({"seed_window_fraction": (0.5, 0.4)}, r"seed_window_fraction: must be 0 < low < high"),
    ],
)
def test_impossible_alarm_settings_are_refused_by_name(changes, message):
    with pytest.raises(SettingsError, match=message):
        replace(SETTINGS, **changes)
