"""The rows the store keeps: one plain frozen dataclass per table.

These are the store's own types, independent of the estimator's and the controller's: the
integration maps their outputs onto them in one place. A row is checked and normalised once,
when it is built (plain ``float``, ``int`` and ``bool`` values, timezone-aware timestamps, no
empty keys), so that nothing can fail later in the writer thread; a bad value raises
:class:`~sensor.shell.store.errors.RowError` naming the row type and the field.

Conventions
-----------
- Timestamps are timezone-aware :class:`datetime.datetime` objects (UTC or any offset); the
  database holds them as integer microseconds since 1970-01-01T00:00:00Z in columns named
  ``<field>_us``, exact on every backend.
- Numbers are in SI units inside sigmatrack (K, s, kg/kg solvent, m) except raw samples, which
  keep the plant units they came in (the site file says which). A float that is NaN means "no
  value" and is stored as NULL; it reads back as NaN, or as ``None`` for an optional field
  (``float | None``), and as NaN in arrays.
- Every row has a natural key (``KEY``): writing the same row twice stores it once. That is what
  makes the store loss-free without duplicates when a batch of rows is retried after an outage
  or a crash.

=================  ===============  ==================================================
row type           table            key
=================  ===============  ==================================================
BatchRow           batches          unit_id, batch_id
SampleRow          samples          unit_id, time, signal
EstimateRow        estimates        unit_id, time
ProposalRow        proposals        unit_id, time
AlarmEventRow      alarm_events     unit_id, alarm, time, event
AuditRow           audit            time, subject
SiteFileRow        site_files       sha256
CheckpointRow      checkpoints      unit_id, time
=================  ===============  ==================================================
"""

from __future__ import annotations

import hashlib
import numbers
import operator
import types
import typing
from collections.abc import Mapping
from dataclasses import dataclass, fields
from datetime import UTC, datetime, timedelta
from importlib.metadata import version
from typing import Any, ClassVar, Literal

import numpy as np

from sensor.shell.config import SiteConfig
from sensor.shell.store.errors import RowError, StoreError

EPOCH = datetime(1970, 1, 1, tzinfo=UTC)
"""The origin of the store's timestamps (Unix time)."""

_MICROSECOND = timedelta(microseconds=1)
_INT64 = 2**63
_UINT32 = 2**32


def epoch_us(when: datetime) -> int:
    """A timezone-aware timestamp as integer microseconds since 1970-01-01T00:00:00Z [us].

    Exact: no float is involved.

    >>> epoch_us(datetime(2026, 3, 14, 6, 0, 0, 250, tzinfo=UTC))
    1773468000000250
    """
    return (when - EPOCH) // _MICROSECOND


def from_epoch_us(us: int) -> datetime:
    """The inverse of :func:`epoch_us`: a UTC timestamp.

    >>> from_epoch_us(1773468000000250).isoformat()
    '2026-03-14T06:00:00.000250+00:00'
    """
    return EPOCH + timedelta(microseconds=us)


Kind = Literal["str", "float", "int", "bool", "time", "flags"]


@dataclass(frozen=True)
class FieldPlan:
    """How one field of a row type is checked and stored."""

    name: str
    kind: Kind
    optional: bool
    key: bool


class StoreRow:
    """Base of the row types: ``TABLE`` names the table, ``KEY`` the fields of its natural key."""

    __slots__ = ()
    TABLE: ClassVar[str]
    KEY: ClassVar[tuple[str, ...]]

    def __post_init__(self) -> None:
        for plan in ROW_PLANS[type(self)]:
            value = getattr(self, plan.name)
            if value is None:
                if not plan.optional:
                    self._refuse(plan.name, "is required; got None")
                continue
            normal = _normalise(self, plan, value)
            if normal is not value:
                object.__setattr__(self, plan.name, normal)

    def _refuse(self, name: str, problem: str) -> typing.NoReturn:
        raise RowError(f"{type(self).__name__}.{name}", problem)


def _normalise(row: StoreRow, plan: FieldPlan, value: Any) -> Any:
    """The field's value in its one stored form, or raise naming the field."""
    kind = plan.kind
    if kind == "str":
        if not isinstance(value, str):
            row._refuse(plan.name, f"must be a string; got {type(value).__name__}")
        if plan.key and not value:
            row._refuse(plan.name, "must not be empty (it is part of the row's key)")
        if "\x00" in value:
            row._refuse(plan.name, "must not hold a NUL character (PostgreSQL cannot store it)")
        return value
    if kind == "float":
        if type(value) is float:
            return value
        if isinstance(value, bool | np.bool_) or not isinstance(value, numbers.Real):
            row._refuse(plan.name, f"must be a number; got {value!r}")
        return float(value)
    if kind == "int":
        try:
            number = operator.index(value)
        except TypeError:
            row._refuse(plan.name, f"must be an integer; got {value!r}")
        if isinstance(value, bool) or not -_INT64 <= number < _INT64:
            row._refuse(plan.name, f"must be a 64-bit integer; got {value!r}")
        return number
    if kind == "bool":
        if not isinstance(value, bool | np.bool_):
            row._refuse(plan.name, f"must be true or false; got {value!r}")
        return bool(value)
    if kind == "time":
        if not isinstance(value, datetime) or value.utcoffset() is None:
            row._refuse(plan.name, f"must be a timezone-aware datetime; got {value!r}")
        return value
    # flags: a tuple of names, stored comma-separated
    if isinstance(value, str) or not all(isinstance(flag, str) and flag for flag in value):
        row._refuse(plan.name, f"must be a sequence of non-empty names; got {value!r}")
    if any("," in flag or "\x00" in flag for flag in value):
        row._refuse(plan.name, f"a flag name cannot hold a comma or NUL; got {value!r}")
    return value if type(value) is tuple else tuple(value)


@dataclass(frozen=True, slots=True)
class BatchRow(StoreRow):
    """A batch of one unit: from its start to its end (``None`` while it runs).

    Writing a batch again with an ``end`` records the end; an ``end`` of ``None`` never erases
    one already stored.

    Parameters
    ----------
    unit_id : the unit's id in the site file (``unit.id``)
    batch_id : the DCS's batch identifier
    start, end : when the batch started and ended
    site_sha256 : sha256 of the site file the batch ran with (see :class:`SiteFileRow`)
    """

    TABLE: ClassVar[str] = "batches"
    KEY: ClassVar[tuple[str, ...]] = ("unit_id", "batch_id")

    unit_id: str
    batch_id: str
    start: datetime
    end: datetime | None = None
    site_sha256: str | None = None

    def __post_init__(self) -> None:
        StoreRow.__post_init__(self)
        if self.end is not None and self.end < self.start:
            self._refuse("end", f"is before start ({self.end} < {self.start})")


@dataclass(frozen=True, slots=True)
class SampleRow(StoreRow):
    """One raw sample of one signal, as the plant delivered it.

    Parameters
    ----------
    unit_id : the unit's id
    signal : our signal name (``temp``, ``jacket_temp``, ``conc``, ``phase``, ... : the keys of
        ``unit.tags`` in the site file)
    time : the OPC UA SourceTimestamp (or the historian's timestamp)
    value : the value in the tag's plant unit (°C for temperatures, the analyzer's unit for
        ``conc``, 0/1 for the permissive), as it came, also when its status is Bad; ``None``
        for a textual value
    status_code : the OPC UA StatusCode, 32 bits (0 is Good; the top two bits give the
        severity: 00 Good, 01 Uncertain, 10 Bad)
    text : the value when it is text (a batch id, a phase name)
    server_time : the OPC UA ServerTimestamp, where known
    """

    TABLE: ClassVar[str] = "samples"
    KEY: ClassVar[tuple[str, ...]] = ("unit_id", "time", "signal")

    unit_id: str
    signal: str
    time: datetime
    value: float | None
    status_code: int = 0
    text: str | None = None
    server_time: datetime | None = None

    def __post_init__(self) -> None:
        StoreRow.__post_init__(self)
        if not 0 <= self.status_code < _UINT32:
            self._refuse("status_code", f"must fit in 32 bits unsigned; got {self.status_code}")


@dataclass(frozen=True, slots=True)
class EstimateRow(StoreRow):
    """The soft sensor's outputs at one instant.

    Parameters
    ----------
    unit_id : the unit's id
    time : the instant the estimate is for
    temp_k : estimated reactor temperature [K]
    conc : estimated dissolved solute concentration c [kg/kg solvent]
    conc_sat : solubility c_sat at the estimated temperature [kg/kg solvent]
    delta_c : absolute supersaturation c - c_sat [kg/kg solvent]
    supersaturation_ratio : S = c / c_sat [-]
    sigma : relative supersaturation S - 1 [-]
    sigma_std : standard deviation of sigma, solubility curve included [-]
    margin_k : margin to the metastable limit as a temperature [K]; positive inside the zone
    margin_sigma : margin to the metastable limit in relative supersaturation,
        sigma_limit - sigma [-]; positive inside the zone
    solids : suspended crystals [kg crystals/kg solvent]
    yield_fraction : fraction of the dissolved solute crystallised so far [-]
    mean_size_m : mean crystal size [m]
    analyzer_bias : estimated bias of the concentration analyzer [kg/kg solvent]
    healthy : the estimate is fit to act on (no health flag that stops proposals)
    flags : names of the health conditions present (e.g. ``analyzer-stale``), none when clean
    conc_std : standard deviation of conc [kg/kg solvent], where known
    """

    TABLE: ClassVar[str] = "estimates"
    KEY: ClassVar[tuple[str, ...]] = ("unit_id", "time")

    unit_id: str
    time: datetime
    temp_k: float
    conc: float
    conc_sat: float
    delta_c: float
    supersaturation_ratio: float
    sigma: float
    sigma_std: float
    margin_k: float
    margin_sigma: float
    solids: float
    yield_fraction: float
    mean_size_m: float
    analyzer_bias: float
    healthy: bool
    flags: tuple[str, ...] = ()
    conc_std: float | None = None


@dataclass(frozen=True, slots=True)
class ProposalRow(StoreRow):
    """One decision of the cooling-rate advisor and its guard.

    Parameters
    ----------
    unit_id : the unit's id
    time : the instant of the decision
    guard_state : the guard's state (its own names, e.g. ``proposing``, ``fallback``)
    reason : why, in plain words ("" when there is nothing to say)
    written : the setpoint was written to the DCS (under the permissive)
    setpoint_temp_k : the proposed reactor temperature setpoint [K]; ``None`` when none
    cooling_rate_k_per_s : the cooling rate behind it [K/s], positive when cooling
    """

    TABLE: ClassVar[str] = "proposals"
    KEY: ClassVar[tuple[str, ...]] = ("unit_id", "time")

    unit_id: str
    time: datetime
    guard_state: str
    reason: str
    written: bool
    setpoint_temp_k: float | None = None
    cooling_rate_k_per_s: float | None = None


@dataclass(frozen=True, slots=True)
class AlarmEventRow(StoreRow):
    """One event in an alarm's life: raised, cleared, acknowledged, shelved, unshelved, ...

    Acknowledgement and shelving are events with the operator who did it (``user_name``) and
    the time (``time``); shelving also says until when.

    Parameters
    ----------
    unit_id : the unit's id
    alarm : the alarm's name
    time : when the event happened
    event : what happened (the alarm engine's event names)
    state : the alarm's state after the event (ISA-18.2 alarm states, the engine's names)
    priority : the alarm's priority name
    message : the text shown to the operator
    user_name : who acknowledged, shelved or unshelved; ``None`` for events of the process
    shelved_until : end of the shelving, for a shelve event
    value : the process value behind the event, where there is one
    """

    TABLE: ClassVar[str] = "alarm_events"
    KEY: ClassVar[tuple[str, ...]] = ("unit_id", "alarm", "time", "event")

    unit_id: str
    alarm: str
    time: datetime
    event: str
    state: str
    priority: str = ""
    message: str = ""
    user_name: str | None = None
    shelved_until: datetime | None = None
    value: float | None = None


@dataclass(frozen=True, slots=True)
class AuditRow(StoreRow):
    """What ran: a version of sigmatrack or of a fitted model, under which site file.

    Parameters
    ----------
    time : when it came into use
    subject : ``sigmatrack`` or ``model:<name>`` (e.g. ``model:solubility``)
    version : a release version, or for a fitted model a digest of its parameters
    site_sha256 : the site file in force (see :class:`SiteFileRow`)
    detail : anything else worth keeping (e.g. the fitted parameters as JSON)
    """

    TABLE: ClassVar[str] = "audit"
    KEY: ClassVar[tuple[str, ...]] = ("time", "subject")

    time: datetime
    subject: str
    version: str
    site_sha256: str | None = None
    detail: str = ""


@dataclass(frozen=True, slots=True)
class SiteFileRow(StoreRow):
    """The full text of a site file, kept once per content (its sha256).

    ``sha256`` must be the SHA-256 of ``text`` encoded as UTF-8 (what
    :func:`~sensor.shell.config.parse_site` computes); build it with :meth:`of_text`.
    """

    TABLE: ClassVar[str] = "site_files"
    KEY: ClassVar[tuple[str, ...]] = ("sha256",)

    sha256: str
    path: str
    text: str

    def __post_init__(self) -> None:
        StoreRow.__post_init__(self)
        if hashlib.sha256(self.text.encode()).hexdigest() != self.sha256:
            self._refuse("sha256", "is not the SHA-256 of the text")

    @classmethod
    def of_text(cls, path: str, text: str) -> SiteFileRow:
        return cls(hashlib.sha256(text.encode()).hexdigest(), path, text)


@dataclass(frozen=True, slots=True)
class CheckpointRow(StoreRow):
    """A unit's whole state at one step, from which the service resumes after a restart.

    Parameters
    ----------
    unit_id : the unit's id
    time : the step the state is of
    state : the unit pipeline's checkpoint, as JSON text
    batch_id : the DCS's batch identifier at that step, where known
    """

    TABLE: ClassVar[str] = "checkpoints"
    KEY: ClassVar[tuple[str, ...]] = ("unit_id", "time")

    unit_id: str
    time: datetime
    state: str
    batch_id: str | None = None


ROW_TYPES: tuple[type[StoreRow], ...] = (
    BatchRow,
    SampleRow,
    EstimateRow,
    ProposalRow,
    AlarmEventRow,
    AuditRow,
    SiteFileRow,
    CheckpointRow,
)
"""Every row type, in the order their tables are created."""


def _plan(cls: type[StoreRow]) -> tuple[FieldPlan, ...]:
    hints = typing.get_type_hints(cls)
    kinds: dict[Any, Kind] = {
        str: "str",
        float: "float",
        int: "int",
        bool: "bool",
        datetime: "time",
        tuple[str, ...]: "flags",
    }
    names = [f.name for f in fields(cls)]
    for name in cls.KEY:
        if name not in names:
            raise TypeError(f"{cls.__name__}.KEY names {name!r}, which is not a field")
    plans = []
    for name in names:
        hint = hints[name]
        options = [a for a in typing.get_args(hint) if a is not type(None)]
        optional = typing.get_origin(hint) is types.UnionType and len(options) == 1
        kind = kinds[options[0] if optional else hint]
        plans.append(FieldPlan(name, kind, optional, name in cls.KEY))
    return tuple(plans)


ROW_PLANS: Mapping[type[StoreRow], tuple[FieldPlan, ...]] = {cls: _plan(cls) for cls in ROW_TYPES}
"""Per row type, how each field is checked and stored (read-only)."""


def site_file_row(site: SiteConfig) -> SiteFileRow:
    """The text of the site file ``site`` was loaded from, for the audit trail.

    Raises
    ------
    StoreError
        If the file cannot be read again, or its content changed since it was loaded.
    """
    try:
        text = site.path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as error:
        raise StoreError(
            str(site.path), f"cannot be read again for the audit trail ({error})"
        ) from None
    row = SiteFileRow.of_text(str(site.path), text)
    if row.sha256 != site.sha256:
        raise StoreError(
            str(site.path),
            f"changed since it was loaded (sha256 {row.sha256[:12]}... is not "
            f"{site.sha256[:12]}...): restart sigmatrack to use the new file",
        )
    return row


def audit_rows(site: SiteConfig, time: datetime, models: Mapping[str, str]) -> list[StoreRow]:
    """The audit trail of one start of sigmatrack: the site file's text, sigmatrack's version
    and the version of each fitted model (``models`` maps a name such as ``solubility`` to its
    version or parameter digest)."""
    site_row = site_file_row(site)
    rows: list[StoreRow] = [
        site_row,
        AuditRow(time, "sigmatrack", version("sigmatrack"), site_row.sha256),
    ]
    rows += [
        AuditRow(time, f"model:{name}", model_version, site_row.sha256)
        for name, model_version in models.items()
    ]
    return rows
