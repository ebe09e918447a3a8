"""The demo's console view: one line per unit every so often (simulated time), with the
batch's progress, sigma against its limit, the proposal and the guard, and the alarms
annunciated (ISA-18.2: active ones, and cleared ones until an operator acknowledges them, which
say so: ``sigma-high (medium, cleared, unacknowledged)``).

::

    CR-301  2.41 h controlled-cooling  T 52.61 °C  sigma 0.0312 ± 0.0041 (limit 0.0925, 34 %)
            proposal 52.35 °C advising (written)  alarms: none

It is a step listener of :class:`~sensor.shell.service.service.Service`: it never waits.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

from controller.alarms import AlarmState
from sensor.shell.service.service import UnitStep
from sensor.units import ZERO_CELSIUS_K

ANNUNCIATED = (
    AlarmState.UNACKNOWLEDGED,
    AlarmState.ACKNOWLEDGED,
    AlarmState.RETURNED_UNACKNOWLEDGED,
)


def _number(value: float, digits: int) -> str:
    return "–" if not math.isfinite(value) else f"{value:.{digits}f}"


def status_line(step: UnitStep, elapsed_s: float) -> str:
    """One unit's state at a step, as the console shows it (module docstring)."""
    outputs = step.outputs
    phase = step.snapshot.sample.phase or "phase not known"
    parts = [f"{step.unit_id}  {elapsed_s / 3600:5.2f} h {phase}"]
    estimates = None if outputs.step is None else outputs.step.estimates
    if estimates is None:
        parts.append("  no estimate yet")
    else:
        row = estimates.row(0)
        sigma, limit = float(row["sigma"]), float(row["sigma_limit"])
        share = sigma / limit * 100.0 if math.isfinite(limit) and limit > 0 else math.nan
        parts.append(
            f"  T {_number(float(row['temp_c']), 2)} °C  sigma {_number(sigma, 4)} ± "
            f"{_number(float(row['sigma_std']), 4)} (limit {_number(limit, 4)}, "
            f"{_number(share, 0)} %)"
        )
    lines = ["".join(parts)]
    decision = outputs.decision
    if outputs.communication_lost:
        advice = "no link to the plant: proposals withdrawn, nothing written"
    elif outputs.proposal is None or decision is None:
        advice = "no proposal" + ("" if decision is None else f" ({decision.mode.value})")
    else:
        written = any(signal == "remote_setpoint" for signal, _value in step.written)
        advice = (
            f"proposal {_number(decision.setpoint_k - ZERO_CELSIUS_K, 2)} °C "
            f"{decision.mode.value}" + (" (written)" if written else "")
        )
    alarms = [
        f"{status.name} ({status.priority.value}"
        + (
            ", cleared, unacknowledged)"
            if status.state is AlarmState.RETURNED_UNACKNOWLEDGED
            else ")"
        )
        for status in outputs.alarms
        if status.state in ANNUNCIATED
    ]
    lines.append(f"        {advice}  alarms: {', '.join(alarms) or 'none'}")
    return "\n".join(lines)


@dataclass
class ConsoleView:
    """Prints each unit's :func:`status_line` every ``every_s`` of the plant's time.

    Parameters
    ----------
    write : where lines go (``print``)
    every_s : how often per unit [s of plant time]
    """

    write: Callable[[str], None]
    every_s: float
    _first_s: dict[str, float] = field(default_factory=dict)
    _shown_s: dict[str, float] = field(default_factory=dict)
    last: dict[str, UnitStep] = field(default_factory=dict)

    def __call__(self, step: UnitStep) -> None:
        time_s = step.outputs.time_s
        first = self._first_s.setdefault(step.unit_id, time_s)
        self.last[step.unit_id] = step
        shown = self._shown_s.get(step.unit_id)
        events = [e for e in step.outputs.events if e.kind.value in ("raised", "cleared")]
        for event in events:
            self.write(
                f"{step.unit_id}  {(event.time_s - first) / 3600:5.2f} h  alarm {event.alarm} "
                f"({event.priority.value}) {event.kind.value}"
            )
        if shown is None or time_s - shown >= self.every_s:
            self._shown_s[step.unit_id] = time_s
            self.write(status_line(step, time_s - first))
