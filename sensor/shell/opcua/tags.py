"""The plant's tags as the OPC UA shell sees them: which node, which data type, which unit, and
how a value that arrives becomes a sigmatrack reading.

One :class:`TagSpec` per configured tag of every unit (``unit.tags`` in the site file), built
once by :func:`tag_specs`. Here, and only here, plant units become sigmatrack's: °C -> K, the
analyzer's ``conc_unit`` -> kg/kg solvent, the DCS's phase value -> our phase name. A value that
cannot be converted (a negative concentration, a mass fraction of 1.2) becomes NaN, as in the
historian reader, and validation rejects it as not finite.

:class:`TagTrack` keeps what one tag said last and judges each new DataValue's timestamps:

=====================  ============================================================  ==========
kind                   when                                                          the value
=====================  ============================================================  ==========
``no-timestamp``       neither a source nor a server timestamp                       refused
``timestamp-backwards``  its source time is earlier than the last one accepted       refused
``timestamp-repeated``   the same source time as the last one, another value/status  refused
``duplicate``          the same source time, value and status again (a server        dropped
                       resending its current value after a resubscribe)
``timestamp-in-future``  later than the sample tick by more than                     refused
                       ``opcua.future_tolerance_s`` (a clock out of step)
``wrong-type``         a value of a type the signal cannot hold                      Bad
=====================  ============================================================  ==========

A value without a source timestamp takes its server timestamp (``no-source-timestamp`` is
counted). Everything refused is counted per tag and reported once per occurrence; nothing is
invented in its place.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Literal

from asyncua import ua

from sensor.errors import SiteConfigError, UnitError
from sensor.samples import Reading
from sensor.shell.config import SiteConfig, TagRef, UnitConfig
from sensor.units import ZERO_CELSIUS_K, ConcentrationUnit

Kind = Literal["temperature", "concentration", "phase", "text", "flag", "counter"]

SIGNAL_KINDS: Mapping[str, Kind] = {
    "temp": "temperature",
    "jacket_temp": "temperature",
    "jacket_setpoint": "temperature",
    "setpoint": "temperature",
    "remote_setpoint": "temperature",
    "conc": "concentration",
    "phase": "phase",
    "batch_id": "text",
    "permissive": "flag",
    "heartbeat": "counter",
}
"""What each signal holds (every name of ``sensor.shell.config.SIGNALS``)."""

ANALOG_KINDS = ("temperature", "concentration")

INTEGER_RANGES: Mapping[ua.VariantType, tuple[int, int]] = {
    ua.VariantType.SByte: (-(2**7), 2**7 - 1),
    ua.VariantType.Byte: (0, 2**8 - 1),
    ua.VariantType.Int16: (-(2**15), 2**15 - 1),
    ua.VariantType.UInt16: (0, 2**16 - 1),
    ua.VariantType.Int32: (-(2**31), 2**31 - 1),
    ua.VariantType.UInt32: (0, 2**32 - 1),
    ua.VariantType.Int64: (-(2**63), 2**63 - 1),
    ua.VariantType.UInt64: (0, 2**64 - 1),
}
"""The OPC UA integer types and the values each holds (OPC 10000-6, 5.2.2)."""
INTEGER_TYPES = frozenset(INTEGER_RANGES)
NUMERIC_TYPES = INTEGER_TYPES | {ua.VariantType.Float, ua.VariantType.Double}

BAD_COMMUNICATION = ua.StatusCodes.BadCommunicationError
"""The StatusCode sigmatrack gives a reading while the link to the plant is down."""
BAD_TYPE = ua.StatusCodes.BadTypeMismatch
"""The StatusCode sigmatrack gives a value of a type its signal cannot hold."""

ProblemKind = Literal[
    "no-timestamp",
    "no-source-timestamp",
    "timestamp-backwards",
    "timestamp-repeated",
    "duplicate",
    "timestamp-in-future",
    "wrong-type",
    "unknown-phase",
    "no-such-node",
    "not-subscribed",
]
QUIET_KINDS = frozenset({"duplicate", "no-source-timestamp"})
"""Kinds counted but not reported as problems (normal on a resubscribe, or a server's habit)."""


def expected_types(kind: Kind, unit: UnitConfig) -> frozenset[ua.VariantType]:
    """The OPC UA built-in data types a signal of ``kind`` may have on the plant's server."""
    if kind in ANALOG_KINDS:
        return NUMERIC_TYPES
    if kind == "counter":
        return INTEGER_TYPES
    if kind == "flag":
        return frozenset({ua.VariantType.Boolean})
    if kind == "text":
        return frozenset({ua.VariantType.String})
    values = list(unit.phase_values.values())
    if values and all(isinstance(v, int) for v in values):
        return INTEGER_TYPES
    return frozenset({ua.VariantType.String})


@dataclass(frozen=True)
class TagSpec:
    """One configured tag of one unit.

    Attributes
    ----------
    unit_index, unit_id : the unit (its place in the site file, its id)
    signal : our signal name (``temp``, ``conc``, ``phase``, ...)
    tag : the tag's name and node as the site file gives them
    node_id : the parsed OPC UA node id
    kind : what the signal holds (:data:`SIGNAL_KINDS`)
    types : the data types the server may give it
    """

    unit_index: int
    unit_id: str
    signal: str
    tag: TagRef
    node_id: ua.NodeId
    kind: Kind
    types: frozenset[ua.VariantType]

    @property
    def label(self) -> str:
        """``<unit> <signal> (<tag>)``: how messages name the tag."""
        return f"{self.unit_id} {self.signal} ({self.tag.name})"


def tag_specs(site: SiteConfig) -> tuple[TagSpec, ...]:
    """Every configured tag of every unit, in the site file's order.

    Raises
    ------
    SiteConfigError
        If a node id does not parse (naming the unit and the tag).
    """
    specs = []
    for index, unit in enumerate(site.unit):
        for signal, tag in unit.tags.items():
            text = tag.node_id(site.opcua.node_id_format)
            try:
                node_id = ua.NodeId.from_string(text)
            except (ValueError, ua.UaError) as error:
                raise SiteConfigError(
                    site.path, f"unit[{index}].tags.{signal}", f"node id {text!r}: {error}"
                ) from None
            kind = SIGNAL_KINDS[signal]
            specs.append(
                TagSpec(index, unit.id, signal, tag, node_id, kind, expected_types(kind, unit))
            )
    return tuple(specs)


def epoch_s(moment: datetime | None) -> float | None:
    """An OPC UA timestamp as seconds since 1970-01-01T00:00Z [s] (a naive one is UTC)."""
    if moment is None:
        return None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    return moment.timestamp()


@dataclass(frozen=True)
class TagValue:
    """One DataValue as it arrived, in the plant's units.

    Attributes
    ----------
    value : the value (float, int, bool, str; None for a null variant)
    variant : its OPC UA type
    status_code : its StatusCode (32 bits)
    source_time_s : its SourceTimestamp [s since the Unix epoch] (the server timestamp where the
        server gave none)
    server_time_s : its ServerTimestamp [s], None where the server gave none
    """

    value: object
    variant: ua.VariantType
    status_code: int
    source_time_s: float
    server_time_s: float | None


@dataclass(frozen=True)
class TagProblem:
    """Something wrong with what a tag said (module docstring).

    Attributes
    ----------
    unit_id, signal, tag : which tag
    kind : what went wrong
    detail : in plain words
    source_time_s : the source time of the value at fault [s], where there is one
    """

    unit_id: str
    signal: str
    tag: str
    kind: ProblemKind
    detail: str
    source_time_s: float | None = None

    def __str__(self) -> str:
        return f"{self.unit_id} {self.signal} ({self.tag}): {self.detail}"


@dataclass(frozen=True)
class TagUpdate:
    """A value the plant reported and sigmatrack accepted, for the store (every one of them,
    not only the newest at a tick).

    Attributes
    ----------
    unit_id, signal : which tag
    value : in the plant's unit, as it came (float, int, bool or str; None for a null variant)
    status_code : its StatusCode
    source_time, server_time : its timestamps (timezone-aware, UTC)
    """

    unit_id: str
    signal: str
    value: object
    status_code: int
    source_time: datetime
    server_time: datetime | None


def _stamp(seconds: float) -> str:
    return datetime.fromtimestamp(seconds, UTC).isoformat(timespec="milliseconds")


class TagTrack:
    """What one tag said last, and which of it went into a sample (module docstring)."""

    def __init__(self, spec: TagSpec) -> None:
        self.spec = spec
        self.latest: TagValue | None = None
        self._accepted_s = -math.inf
        self._delivered_s = -math.inf
        self._reported: TagValue | None = None
        self.counts: dict[str, int] = {}

    def problem(
        self, kind: ProblemKind, detail: str, source_time_s: float | None = None
    ) -> TagProblem | None:
        """Count a problem of ``kind``; the problem to report (None for the quiet kinds)."""
        self.counts[kind] = self.counts.get(kind, 0) + 1
        if kind in QUIET_KINDS:
            return None
        spec = self.spec
        return TagProblem(spec.unit_id, spec.signal, spec.tag.name, kind, detail, source_time_s)

    def problem_once(self, value: TagValue, kind: ProblemKind, detail: str) -> TagProblem | None:
        """:meth:`problem`, once per value (a value read at every tick is reported once)."""
        if value is self._reported:
            return None
        self._reported = value
        return self.problem(kind, detail, value.source_time_s)

    def wrong_type(self, value: TagValue) -> TagProblem | None:
        """Report, once, a value of a type this signal cannot hold."""
        names = ", ".join(sorted(t.name for t in self.spec.types))
        detail = f"a value of type {value.variant.name} (expected {names}): not used"
        return self.problem_once(value, "wrong-type", detail)

    def offer(self, data: ua.DataValue) -> tuple[TagValue | None, TagProblem | None]:
        """Judge one DataValue from the server: the accepted value (None if refused or a
        duplicate) and the problem to report (None if none)."""
        source = epoch_s(data.SourceTimestamp)
        server = epoch_s(data.ServerTimestamp)
        problem = None
        if source is None:
            if server is None:
                return None, self.problem(
                    "no-timestamp", "a value came without a source or server timestamp: refused"
                )
            source = server
            problem = self.problem("no-source-timestamp", "no source timestamp", server)
        variant = data.Value.VariantType if data.Value is not None else ua.VariantType.Null
        raw = data.Value.Value if data.Value is not None else None
        status = data.StatusCode.value if data.StatusCode is not None else 0
        if source < self._accepted_s:
            return None, self.problem(
                "timestamp-backwards",
                f"source timestamp {_stamp(source)} goes backwards from "
                f"{_stamp(self._accepted_s)}: value refused",
                source,
            )
        latest = self.latest
        if source == self._accepted_s and latest is not None:
            if latest.value == raw and latest.status_code == status:
                return None, self.problem("duplicate", "the same value again", source)
            return None, self.problem(
                "timestamp-repeated",
                f"source timestamp {_stamp(source)} repeats with another value or status: "
                "value refused",
                source,
            )
        self._accepted_s = source
        self.latest = TagValue(raw, variant, status, source, server)
        return self.latest, problem

    def fresh(self, tick_s: float, tolerance_s: float) -> tuple[TagValue | None, TagProblem | None]:
        """The newest value not yet put into a sample, if it is not later than ``tick_s`` [s] by
        more than ``tolerance_s`` [s]; marks it as delivered (or refused)."""
        latest = self.latest
        if latest is None or latest.source_time_s <= self._delivered_s:
            return None, None
        self._delivered_s = latest.source_time_s
        if latest.source_time_s > tick_s + tolerance_s:
            ahead = latest.source_time_s - tick_s
            return None, self.problem(
                "timestamp-in-future",
                f"source timestamp {_stamp(latest.source_time_s)} is {ahead:.1f} s ahead of the "
                f"sample tick (tolerance {tolerance_s:g} s): value refused",
                latest.source_time_s,
            )
        return latest, None


def is_number(value: TagValue) -> bool:
    """The value is a number of an accepted numeric type (never a bool)."""
    return value.variant in NUMERIC_TYPES and not isinstance(value.value, bool)


def analog_reading(
    value: TagValue, kind: Kind, converter: ConcentrationUnit | None
) -> Reading | None:
    """A temperature (°C -> K) or a concentration (``converter``'s unit -> kg/kg) as a
    sigmatrack reading; None when the value's type cannot hold a number (the caller marks it).

    A null value (a Bad status often comes without one) becomes NaN with its StatusCode.
    """
    if value.value is None:
        number = math.nan
    elif not is_number(value):
        return None
    elif kind == "temperature":
        number = float(value.value) + ZERO_CELSIUS_K  # type: ignore[arg-type]
    else:
        assert converter is not None
        try:
            number = float(converter.to_kg_per_kg(float(value.value)))  # type: ignore[arg-type]
        except UnitError:
            number = math.nan
    return Reading(number, value.status_code, value.source_time_s)
