"""An alarm engine with the ISA-18.2 alarm lifecycle.

Each alarm compares a reading with a limit (high or low), with a deadband and on/off delays
against chattering, and moves through the states of the ISA-18.2 alarm state transition
diagram [1]_:

==================================  =====================================================
state                               meaning
==================================  =====================================================
normal                              condition clear, nothing to acknowledge
unacknowledged                      condition active, not yet acknowledged
acknowledged                        condition active, acknowledged
returned to normal unacknowledged   condition clear again before it was acknowledged
shelved                             hidden by the operator, for at most a set time
suppressed by design                hidden by design in a phase where it does not apply
out of service                      taken out of service (maintenance)
==================================  =====================================================

Transitions: normal → unacknowledged when the condition activates; unacknowledged →
acknowledged on acknowledgement, or → returned to normal unacknowledged when the condition
clears first; acknowledged → normal when the condition clears; returned to normal unacknowledged
→ normal on acknowledgement, or → unacknowledged when the condition activates again. Shelving,
suppression by design and removal from service hide the alarm from any of those four; on
return it is evaluated afresh: unacknowledged if its condition is active, else normal.
Precedence, when several apply: out of service, then suppressed by design, then shelved. The
latched state of the diagram is not used: no alarm here latches.

The condition is tracked while the alarm is hidden, so it returns in the right state. A
reading that is not a number leaves the condition as it was and restarts the delays.

Everything steps on explicit time: readings and operator actions carry their time [s], which
never goes back. The engine keeps a bounded history of events (oldest dropped first, counted in
:attr:`AlarmEngine.dropped_events`); each call also returns the events it made, for the store.

References
----------
.. [1] ANSI/ISA-18.2-2016, *Management of Alarm Systems for the Process Industries*,
   International Society of Automation, 2016: the alarm state transition diagram (states A to
   H: normal, unacknowledged, acknowledged, returned to normal unacknowledged, latched,
   shelved, suppressed by design, out of service). The letters and the figure (Figure 5 in the
   2009 edition) are quoted from memory.
"""

from __future__ import annotations

import math
from collections import deque
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from enum import Enum
from typing import Any

from controller.checkpoint import get_float, put_float
from controller.errors import ControllerError, SettingsError, TimeOrderError


class AlarmState(Enum):
    NORMAL = "normal"
    UNACKNOWLEDGED = "unacknowledged"
    ACKNOWLEDGED = "acknowledged"
    RETURNED_UNACKNOWLEDGED = "returned to normal unacknowledged"
    SHELVED = "shelved"
    SUPPRESSED_BY_DESIGN = "suppressed by design"
    OUT_OF_SERVICE = "out of service"


class Priority(Enum):
    """Alarm priority; ``rank`` orders them (higher is more urgent)."""

    LOW = "low"
    MEDIUM = "medium"
    HIGH = "high"

    @property
    def rank(self) -> int:
        return {"low": 1, "medium": 2, "high": 3}[self.value]


class Direction(Enum):
    HIGH = "high"
    """Active when the reading is at or above the limit."""
    LOW = "low"
    """Active when the reading is at or below the limit."""


class EventKind(Enum):
    RAISED = "raised"
    CLEARED = "cleared"
    ACKNOWLEDGED = "acknowledged"
    SHELVED = "shelved"
    UNSHELVED = "unshelved"
    SHELVE_EXPIRED = "shelve expired"
    SUPPRESSED = "suppressed by design"
    UNSUPPRESSED = "no longer suppressed"
    REMOVED_FROM_SERVICE = "removed from service"
    RETURNED_TO_SERVICE = "returned to service"


@dataclass(frozen=True)
class AlarmDefinition:
    """One alarm: its condition, its delays, where it applies, and its help.

    Parameters
    ----------
    name : short identifier, e.g. ``"sigma-high"``
    priority : its priority
    direction : high or low alarm
    limit : the reading at which it activates [unit of the reading]
    deadband : how far back past the limit the reading must come to clear [same unit]
    on_delay_s : the condition must hold this long before the alarm activates [s]
    off_delay_s : the condition must be clear this long before the alarm clears [s]
    applies_in : phases in which it applies; in any other it is suppressed by design. None:
        every phase
    meaning : what it means, in plain words
    response : what to check
    """

    name: str
    priority: Priority
    direction: Direction
    limit: float
    deadband: float = 0.0
    on_delay_s: float = 0.0
    off_delay_s: float = 0.0
    applies_in: frozenset[str] | None = None
    meaning: str = ""
    response: str = ""

    def __post_init__(self) -> None:
        owner = f"AlarmDefinition({self.name!r})"
        if not self.name:
            raise SettingsError(owner, "name", "must not be empty")
        if not math.isfinite(self.limit):
            raise SettingsError(owner, "limit", f"must be a finite number; got {self.limit}")
        for field in ("deadband", "on_delay_s", "off_delay_s"):
            value = getattr(self, field)
            if not (math.isfinite(value) and value >= 0.0):
                raise SettingsError(owner, field, f"must be 0 or more; got {value}")

    def applies(self, phase: str) -> bool:
        return self.applies_in is None or phase in self.applies_in


@dataclass(frozen=True)
class AlarmEvent:
    """One entry of the alarm history.

    Attributes
    ----------
    time_s : when [s]
    alarm : the alarm's name
    kind : what happened
    before, after : the alarm's state before and after
    priority : the alarm's priority
    value : the reading at the time (NaN for operator actions)
    note : operator's note, or the shelving time
    """

    time_s: float
    alarm: str
    kind: EventKind
    before: AlarmState
    after: AlarmState
    priority: Priority
    value: float
    note: str = ""


@dataclass(frozen=True)
class AlarmStatus:
    """An alarm as it stands now."""

    name: str
    state: AlarmState
    priority: Priority
    condition_active: bool
    since_s: float
    """When it entered its current state [s] (NaN before any)."""
    shelved_until_s: float
    """When its shelving ends [s] (NaN when not shelved)."""


class _Alarm:
    """The mutable state of one alarm inside the engine."""

    def __init__(self, definition: AlarmDefinition) -> None:
        self.definition = definition
        self.active = False
        self.unacked = False
        self.on_since: float | None = None
        self.off_since: float | None = None
        self.shelved_until = math.nan
        self.suppressed = False
        self.out_of_service = False
        self.state = AlarmState.NORMAL
        self.since = math.nan
        self.value = math.nan

    def checkpoint(self) -> dict[str, Any]:
        return {
            "active": self.active,
            "unacked": self.unacked,
            "on_since": put_float(self.on_since),
            "off_since": put_float(self.off_since),
            "shelved_until": put_float(self.shelved_until),
            "suppressed": self.suppressed,
            "out_of_service": self.out_of_service,
            "state": self.state.value,
            "since": put_float(self.since),
            "value": put_float(self.value),
        }

    def restore(self, state: Mapping[str, Any]) -> None:
        self.active = bool(state["active"])
        self.unacked = bool(state["unacked"])
        self.on_since = get_float(state["on_since"])
        self.off_since = get_float(state["off_since"])
        self.shelved_until = get_float(state["shelved_until"])
        self.suppressed = bool(state["suppressed"])
        self.out_of_service = bool(state["out_of_service"])
        self.state = AlarmState(state["state"])
        self.since = get_float(state["since"])
        self.value = get_float(state["value"])

    def derived_state(self) -> AlarmState:
        if self.out_of_service:
            return AlarmState.OUT_OF_SERVICE
        if self.suppressed:
            return AlarmState.SUPPRESSED_BY_DESIGN
        if not math.isnan(self.shelved_until):
            return AlarmState.SHELVED
        if self.active:
            return AlarmState.UNACKNOWLEDGED if self.unacked else AlarmState.ACKNOWLEDGED
        return AlarmState.RETURNED_UNACKNOWLEDGED if self.unacked else AlarmState.NORMAL

    @property
    def hidden(self) -> bool:
        return self.out_of_service or self.suppressed or not math.isnan(self.shelved_until)

    def track(self, time_s: float, value: float) -> bool | None:
        """Update the condition from a reading; returns the new condition when it changed."""
        d = self.definition
        self.value = value
        if not math.isfinite(value):
            self.on_since = self.off_since = None
            return None
        if d.direction is Direction.HIGH:
            beyond, clear = value >= d.limit, value < d.limit - d.deadband
        else:
            beyond, clear = value <= d.limit, value > d.limit + d.deadband
        if not self.active:
            self.off_since = None
            self.on_since, done = _timer(self.on_since, beyond, time_s, d.on_delay_s)
            if done:
                self.active, self.on_since = True, None
                return True
            return None
        self.on_since = None
        self.off_since, done = _timer(self.off_since, clear, time_s, d.off_delay_s)
        if done:
            self.active, self.off_since = False, None
            return False
        return None


def _timer(
    since_s: float | None, holds: bool, time_s: float, delay_s: float
) -> tuple[float | None, bool]:
    """Start, keep or drop the timer of a condition: (its start, whether it has held for
    ``delay_s``)."""
    if not holds:
        return None, False
    since_s = time_s if since_s is None else since_s
    return since_s, time_s - since_s >= delay_s


class AlarmEngine:
    """Alarms with the ISA-18.2 lifecycle, stepped on explicit time.

    Parameters
    ----------
    definitions : the alarms, with distinct names
    shelve_max_s : longest an operator may shelve an alarm [s]
    history_size : events kept in :attr:`history`

    Examples
    --------
    >>> engine = AlarmEngine(
    ...     [AlarmDefinition("level-high", Priority.MEDIUM, Direction.HIGH, limit=0.8)],
    ...     shelve_max_s=3600.0)
    >>> [e.kind.value for e in engine.update(0.0, "any", {"level-high": 0.9})]
    ['raised']
    >>> engine.status("level-high").state.value
    'unacknowledged'
    """

    def __init__(
        self,
        definitions: Iterable[AlarmDefinition],
        *,
        shelve_max_s: float,
        history_size: int = 10_000,
    ) -> None:
        self._alarms: dict[str, _Alarm] = {}
        for definition in definitions:
            if definition.name in self._alarms:
                raise SettingsError("AlarmEngine", "definitions", f"{definition.name!r} twice")
            self._alarms[definition.name] = _Alarm(definition)
        if not (math.isfinite(shelve_max_s) and shelve_max_s > 0.0):
            raise SettingsError(
                "AlarmEngine", "shelve_max_s", f"must be positive; got {shelve_max_s}"
            )
        if history_size < 1:
            raise SettingsError(
                "AlarmEngine", "history_size", f"must be at least 1; got {history_size}"
            )
        self.shelve_max_s = shelve_max_s
        self._history: deque[AlarmEvent] = deque(maxlen=history_size)
        self.dropped_events = 0
        self._time_s: float | None = None

    # --- time, history ---------------------------------------------------------------------

    @property
    def history(self) -> tuple[AlarmEvent, ...]:
        """The events kept, oldest first."""
        return tuple(self._history)

    @property
    def definitions(self) -> tuple[AlarmDefinition, ...]:
        return tuple(a.definition for a in self._alarms.values())

    def _record(
        self,
        events: list[AlarmEvent],
        alarm: _Alarm,
        time_s: float,
        kind: EventKind,
        note: str = "",
    ) -> None:
        before = alarm.state
        alarm.state = alarm.derived_state()
        if alarm.state is not before:
            alarm.since = time_s
        event = AlarmEvent(
            time_s,
            alarm.definition.name,
            kind,
            before,
            alarm.state,
            alarm.definition.priority,
            alarm.value if kind in (EventKind.RAISED, EventKind.CLEARED) else math.nan,
            note,
        )
        if len(self._history) == self._history.maxlen:
            self.dropped_events += 1
        self._history.append(event)
        events.append(event)

    def _advance(self, time_s: float, events: list[AlarmEvent]) -> None:
        """Move the clock to ``time_s``, ending the shelvings due by then."""
        if not math.isfinite(time_s):
            raise TimeOrderError(f"alarm engine: time is not a number ({time_s})")
        if self._time_s is not None and time_s < self._time_s:
            raise TimeOrderError(
                f"alarm engine: time went backwards, from {self._time_s} s to {time_s} s"
            )
        self._time_s = time_s
        due = [a for a in self._alarms.values() if a.shelved_until <= time_s]
        for alarm in sorted(due, key=lambda a: a.shelved_until):
            expired_at = alarm.shelved_until
            alarm.shelved_until = math.nan
            self._reveal(alarm)
            self._record(events, alarm, expired_at, EventKind.SHELVE_EXPIRED)

    @staticmethod
    def _reveal(alarm: _Alarm) -> None:
        """Evaluate afresh an alarm that stops being hidden."""
        if not alarm.hidden:
            alarm.unacked = alarm.active

    def _alarm(self, name: str) -> _Alarm:
        try:
            return self._alarms[name]
        except KeyError:
            raise ControllerError(f"alarm engine: no alarm named {name!r}") from None

    # --- the process -----------------------------------------------------------------------

    def update(
        self, time_s: float, phase: str, readings: Mapping[str, float]
    ) -> tuple[AlarmEvent, ...]:
        """Step every alarm on its reading at ``time_s`` [s] in ``phase``.

        Raises
        ------
        ControllerError
            If a reading is missing or names no alarm.
        TimeOrderError
            If ``time_s`` is earlier than the last step or action.
        """
        missing = self._alarms.keys() - readings.keys()
        extra = readings.keys() - self._alarms.keys()
        if missing or extra:
            raise ControllerError(
                f"alarm engine: readings must name every alarm; missing {sorted(missing)}, "
                f"unknown {sorted(extra)}"
            )
        events: list[AlarmEvent] = []
        self._advance(time_s, events)
        for name, alarm in self._alarms.items():
            suppressed = not alarm.definition.applies(phase)
            if suppressed != alarm.suppressed:
                alarm.suppressed = suppressed
                if suppressed:
                    alarm.unacked = False
                else:
                    self._reveal(alarm)
                kind = EventKind.SUPPRESSED if suppressed else EventKind.UNSUPPRESSED
                self._record(events, alarm, time_s, kind, f"phase {phase!r}")
            changed = alarm.track(time_s, float(readings[name]))
            if changed is None:
                continue
            if alarm.hidden:
                continue
            if changed:
                alarm.unacked = True
            self._record(events, alarm, time_s, EventKind.RAISED if changed else EventKind.CLEARED)
        return tuple(events)

    # --- operator actions ------------------------------------------------------------------

    def acknowledge(self, name: str, time_s: float, note: str = "") -> tuple[AlarmEvent, ...]:
        """Acknowledge an alarm; nothing happens unless it awaits acknowledgement."""
        events: list[AlarmEvent] = []
        self._advance(time_s, events)
        alarm = self._alarm(name)
        if alarm.unacked and not alarm.hidden:
            alarm.unacked = False
            self._record(events, alarm, time_s, EventKind.ACKNOWLEDGED, note)
        return tuple(events)

    def shelve(
        self, name: str, time_s: float, duration_s: float, note: str = ""
    ) -> tuple[AlarmEvent, ...]:
        """Shelve an alarm for ``duration_s`` [s], at most :attr:`shelve_max_s`.

        Raises
        ------
        ControllerError
            If the duration is not positive or too long, or the alarm is suppressed by design
            or out of service (nothing to shelve).
        """
        alarm = self._alarm(name)
        if not (math.isfinite(duration_s) and 0.0 < duration_s <= self.shelve_max_s):
            raise ControllerError(
                f"alarm engine: shelve {name!r}: the duration must be positive and at most "
                f"{self.shelve_max_s:g} s; got {duration_s}"
            )
        if alarm.out_of_service or alarm.suppressed:
            raise ControllerError(
                f"alarm engine: shelve {name!r}: it is {alarm.state.value}, not annunciating"
            )
        events: list[AlarmEvent] = []
        self._advance(time_s, events)
        alarm.shelved_until = time_s + duration_s
        alarm.unacked = False
        self._record(
            events, alarm, time_s, EventKind.SHELVED, note or f"until {alarm.shelved_until:g} s"
        )
        return tuple(events)

    def unshelve(self, name: str, time_s: float, note: str = "") -> tuple[AlarmEvent, ...]:
        """End a shelving early; nothing happens if the alarm is not shelved."""
        events: list[AlarmEvent] = []
        self._advance(time_s, events)
        alarm = self._alarm(name)
        if not math.isnan(alarm.shelved_until):
            alarm.shelved_until = math.nan
            self._reveal(alarm)
            self._record(events, alarm, time_s, EventKind.UNSHELVED, note)
        return tuple(events)

    def remove_from_service(
        self, name: str, time_s: float, note: str = ""
    ) -> tuple[AlarmEvent, ...]:
        """Take an alarm out of service (maintenance); its shelving, if any, ends."""
        events: list[AlarmEvent] = []
        self._advance(time_s, events)
        alarm = self._alarm(name)
        if not alarm.out_of_service:
            alarm.out_of_service = True
            alarm.shelved_until = math.nan
            alarm.unacked = False
            self._record(events, alarm, time_s, EventKind.REMOVED_FROM_SERVICE, note)
        return tuple(events)

    def return_to_service(self, name: str, time_s: float, note: str = "") -> tuple[AlarmEvent, ...]:
        """Put an alarm back in service; it is evaluated afresh."""
        events: list[AlarmEvent] = []
        self._advance(time_s, events)
        alarm = self._alarm(name)
        if alarm.out_of_service:
            alarm.out_of_service = False
            self._reveal(alarm)
            self._record(events, alarm, time_s, EventKind.RETURNED_TO_SERVICE, note)
        return tuple(events)

    # --- checkpoint ---------------------------------------------------------------------------

    def checkpoint(self) -> dict[str, Any]:
        """The engine's state as plain JSON values (:mod:`controller.checkpoint`): every
        alarm's condition, timers, shelving and state, and the engine's clock. The history is
        not kept (the store keeps the events): a restored engine starts an empty one."""
        return {
            "time_s": put_float(self._time_s),
            "dropped_events": self.dropped_events,
            "alarms": {name: alarm.checkpoint() for name, alarm in self._alarms.items()},
        }

    def restore(self, state: Mapping[str, Any]) -> None:
        """Take the state :meth:`checkpoint` gave, from an engine with the same alarms.

        Raises
        ------
        ControllerError
            If the checkpoint's alarms are not this engine's.
        """
        alarms = state["alarms"]
        if set(alarms) != set(self._alarms):
            raise ControllerError(
                f"alarm engine: the checkpoint holds the alarms {sorted(alarms)}, not "
                f"{sorted(self._alarms)}"
            )
        for name, alarm in self._alarms.items():
            alarm.restore(alarms[name])
        self._time_s = get_float(state["time_s"])
        self.dropped_events = int(state["dropped_events"])
        self._history.clear()

    # --- what stands now -------------------------------------------------------------------

    def status(self, name: str) -> AlarmStatus:
        alarm = self._alarm(name)
        return AlarmStatus(
            name,
            alarm.state,
            alarm.definition.priority,
            alarm.active,
            alarm.since,
            alarm.shelved_until,
        )

    def annunciated(self) -> tuple[AlarmStatus, ...]:
        """Alarms an operator should see now (unacknowledged, acknowledged, returned to normal
        unacknowledged), most urgent first, then oldest first."""
        shown = (
            AlarmState.UNACKNOWLEDGED,
            AlarmState.ACKNOWLEDGED,
            AlarmState.RETURNED_UNACKNOWLEDGED,
        )
        statuses = [self.status(name) for name, a in self._alarms.items() if a.state in shown]
        return tuple(sorted(statuses, key=lambda s: (-s.priority.rank, s.since_s)))
