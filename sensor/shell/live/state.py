"""What the live page shows of a unit, as JSON: the pipeline's outputs mapped once.

The values are those of sigmatrack's OPC UA server (:func:`~sensor.shell.opcua.advisor_server.
unit_values`, by the same names: ``estimates.sigma``, ``guard.mode``, ...), so the page and any
OPC UA display show the same numbers. JSON has no NaN: a value that is not a number is ``null``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

import numpy as np

from controller.alarm_set import help_text
from controller.alarms import AlarmDefinition, AlarmEvent, AlarmState, AlarmStatus
from sensor.numerics import FloatArray
from sensor.shell.live.trend import TREND_FIELDS
from sensor.shell.opcua.advisor_server import UnitOutputs, unit_values
from sensor.shell.report.curves import ZoneCurves
from sensor.shell.report.style import priority_style
from sensor.units import ZERO_CELSIUS_K

JsonValue = None | bool | int | float | str | list["JsonValue"] | dict[str, "JsonValue"]


def json_safe(value: object) -> JsonValue:
    """``value`` with every float that is not finite turned into None (JSON has no NaN), numpy
    scalars and arrays into Python ones, tuples into lists."""
    if isinstance(value, np.ndarray):
        return json_safe(value.tolist())
    if isinstance(value, np.generic):
        return json_safe(value.item())
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, Mapping):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [json_safe(v) for v in value]
    if value is None or isinstance(value, bool | int | str):
        return value
    raise TypeError(f"cannot show a {type(value).__name__} on the live page")


def trend_row(outputs: UnitOutputs) -> FloatArray:
    """The step's row of the trend (:data:`~sensor.shell.live.trend.TREND_FIELDS`)."""
    values = dict.fromkeys(TREND_FIELDS, math.nan)
    values["time_s"] = outputs.time_s
    step = outputs.step
    if step is not None and step.estimates is not None:
        estimates = step.estimates
        for name in ("sigma", "sigma_std", "sigma_limit", "temp_c", "conc"):
            values[name] = float(getattr(estimates, name)[0])
    if outputs.proposal is not None:
        values["proposal_c"] = outputs.proposal.setpoint_k - ZERO_CELSIUS_K
    if outputs.decision is not None:
        values["setpoint_c"] = outputs.decision.setpoint_k - ZERO_CELSIUS_K
    return np.array([values[name] for name in TREND_FIELDS])


UNACKNOWLEDGED = (AlarmState.UNACKNOWLEDGED, AlarmState.RETURNED_UNACKNOWLEDGED)


def alarm_row(status: AlarmStatus) -> dict[str, JsonValue]:
    """One alarm as it stands, with its priority's label and symbol (never colour alone)."""
    look = priority_style(status.priority.value)
    return {
        "name": status.name,
        "state": status.state.value,
        "priority": status.priority.value,
        "label": f"{look.symbol} {look.label}",
        "active": status.condition_active,
        "unacknowledged": status.state in UNACKNOWLEDGED,
        "shelved": status.state is AlarmState.SHELVED,
        "since_s": json_safe(status.since_s),
        "shelved_until_s": json_safe(status.shelved_until_s),
    }


def alarm_rows(statuses: Sequence[AlarmStatus]) -> list[JsonValue]:
    """The alarms, most urgent first: unacknowledged, then the other annunciated ones, then
    shelved, then the rest; by priority, then the oldest first."""

    def order(status: AlarmStatus) -> tuple[int, int, float]:
        if status.state in UNACKNOWLEDGED:
            group = 0
        elif status.state is AlarmState.ACKNOWLEDGED:
            group = 1
        elif status.state is AlarmState.SHELVED:
            group = 2
        else:
            group = 3
        since = status.since_s if math.isfinite(status.since_s) else math.inf
        return group, -status.priority.rank, since

    return [alarm_row(status) for status in sorted(statuses, key=order)]


def event_row(event: AlarmEvent, user: str = "") -> dict[str, JsonValue]:
    """One alarm event (raised, cleared, acknowledged, ...) for the page's event list."""
    look = priority_style(event.priority.value)
    return {
        "time_s": json_safe(event.time_s),
        "alarm": event.alarm,
        "event": event.kind.value,
        "state": event.after.value,
        "priority": event.priority.value,
        "label": f"{look.symbol} {look.label}",
        "value": json_safe(event.value),
        "user": user,
        "note": event.note,
    }


def unit_state(outputs: UnitOutputs) -> dict[str, JsonValue]:
    """What the page shows of one unit's step: the values by name, the flags and the alarms."""
    return {
        "time_s": json_safe(outputs.time_s),
        "has_estimate": outputs.step is not None and outputs.step.estimates is not None,
        "communication_lost": outputs.communication_lost,
        "health_good": outputs.health_good,
        "inputs_valid": outputs.step is None or outputs.step.inputs_valid,
        "values": json_safe(unit_values(outputs)),
        "alarms": alarm_rows(outputs.alarms),
    }


def alarm_help(definitions: Sequence[AlarmDefinition]) -> dict[str, JsonValue]:
    """Each alarm's help (what it means, what to check, the advisory note) and priority."""
    return {d.name: {"priority": d.priority.value, "help": help_text(d)} for d in definitions}


def diagram_json(curves: ZoneCurves) -> dict[str, JsonValue]:
    """A unit's phase-diagram lines for the page (°C and kg/kg solvent; NaN as null)."""
    return {
        "temp_c": json_safe(curves.temp_c),
        "c_sat": json_safe(curves.c_sat),
        "c_sat_lo": json_safe(curves.c_sat_lo),
        "c_sat_hi": json_safe(curves.c_sat_hi),
        "trusted": [bool(t) for t in curves.trusted],
        "c_limit": json_safe(curves.c_limit),
        "rate_k_per_min": curves.rate_k_per_s * 60.0,
    }
