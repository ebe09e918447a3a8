"""What the service stores, mapped in one place from what the plant client and the unit's
pipeline give it onto the store's rows (:mod:`sensor.shell.store.rows`).

========================  =====================  =======================================
from                      row                    notes
========================  =====================  =======================================
``TagUpdate``             ``SampleRow``          every accepted value, plant units, its
                                                 StatusCode and both timestamps
``UnitOutputs.step``      ``EstimateRow``        SI: K, kg/kg solvent, m
``UnitOutputs.decision``  ``ProposalRow``        the guarded setpoint, the guard's mode;
                                                 ``written``: the DCS accepted the write;
                                                 a write skipped (the previous one still
                                                 in flight) is said in ``reason``
``UnitOutputs.events``    ``AlarmEventRow``      every event, with the operator for
                                                 acknowledge, shelve and unshelve
========================  =====================  =======================================
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from datetime import UTC, datetime

from controller.alarms import AlarmEvent, EventKind
from sensor.shell.opcua.advisor_server import UnitOutputs
from sensor.shell.opcua.plant_client import WriteResult
from sensor.shell.opcua.tags import TagUpdate
from sensor.shell.store.rows import (
    AlarmEventRow,
    EstimateRow,
    ProposalRow,
    SampleRow,
    StoreRow,
)
from sensor.units import ZERO_CELSIUS_K

MICROMETRE_M = 1e-6


def when(time_s: float) -> datetime:
    """A time [s since the Unix epoch] as the store's timezone-aware timestamp."""
    return datetime.fromtimestamp(time_s, UTC)


def sample_row(update: TagUpdate) -> SampleRow:
    """One accepted plant value: numbers and booleans as ``value``, text as ``text``."""
    value = update.value
    number: float | None = None
    text: str | None = None
    if isinstance(value, str):
        text = value
    elif isinstance(value, bool | int | float):
        number = float(value)
    return SampleRow(
        update.unit_id,
        update.signal,
        update.source_time,
        number,
        update.status_code,
        text,
        update.server_time,
    )


def _optional(value: float) -> float | None:
    return value if math.isfinite(value) else None


def estimate_flags(outputs: UnitOutputs) -> tuple[str, ...]:
    """The health conditions present at a step, by name (none when clean)."""
    step = outputs.step
    flags = []
    if outputs.communication_lost:
        flags.append("communication-lost")
    if step is not None:
        if not step.inputs_valid:
            flags.append("inputs-stale")
        if step.nis_state not in ("ok", "filling"):
            flags.append(f"nis-{step.nis_state}")
        if step.widened:
            flags.append("widened")
        if step.estimates is not None:
            row = step.estimates.row(0)
            if row["extrapolated"]:
                flags.append("extrapolated")
            if row["rate_outside_zone_data"]:
                flags.append("rate-outside-zone-data")
    return tuple(flags)


def estimate_row(unit_id: str, outputs: UnitOutputs) -> EstimateRow | None:
    """The soft sensor's outputs at a step, in SI; None before the filter has started."""
    step = outputs.step
    if step is None or step.estimates is None:
        return None
    row = step.estimates.row(0)
    return EstimateRow(
        unit_id,
        when(outputs.time_s),
        temp_k=float(row["temp_c"]) + ZERO_CELSIUS_K,
        conc=float(row["conc"]),
        conc_sat=float(row["conc_sat"]),
        delta_c=float(row["delta_c"]),
        supersaturation_ratio=float(row["supersaturation_ratio"]),
        sigma=float(row["sigma"]),
        sigma_std=float(row["sigma_std"]),
        margin_k=float(row["margin_k"]),
        margin_sigma=float(row["margin_sigma"]),
        solids=float(row["solids"]),
        yield_fraction=float(row["yield_fraction"]),
        mean_size_m=float(row["mean_size_um"]) * MICROMETRE_M,
        analyzer_bias=float(row["analyzer_bias"]),
        healthy=outputs.health_good,
        flags=estimate_flags(outputs),
        conc_std=_optional(float(row["conc_std"])),
    )


def proposal_row(
    unit_id: str, outputs: UnitOutputs, write: WriteResult | None, skipped: bool = False
) -> ProposalRow:
    """The guard's decision at a step (``outputs.decision`` must be set); ``written`` when the
    DCS accepted the remote setpoint; ``skipped``: not sent, the unit's previous write was
    still in flight."""
    decision = outputs.decision
    assert decision is not None
    written = write is not None and any(s == "remote_setpoint" for s, _v in write.written)
    reasons = list(decision.reasons)
    if write is not None:
        reasons += [f"write of {signal} failed: {why}" for signal, why in write.failed]
    if skipped and decision.write:
        reasons.append("not sent: the previous write to the DCS was still in flight")
    if not reasons and outputs.proposal is not None:
        reasons = [outputs.proposal.reason]
    return ProposalRow(
        unit_id,
        when(decision.time_s),
        guard_state=decision.mode.value,
        reason="; ".join(r for r in reasons if r),
        written=written,
        setpoint_temp_k=_optional(decision.setpoint_k),
        cooling_rate_k_per_s=_optional(decision.cooling_rate_k_per_s),
    )


OPERATOR_EVENTS = frozenset({EventKind.ACKNOWLEDGED, EventKind.SHELVED, EventKind.UNSHELVED})


def alarm_event_rows(
    unit_id: str,
    events: Iterable[AlarmEvent],
    user: str | None = None,
    shelved_until_s: float = math.nan,
) -> list[AlarmEventRow]:
    """Alarm events as rows; ``user`` is the operator behind an acknowledge, shelve or
    unshelve (None for the process's own events)."""
    rows = []
    for event in events:
        by_operator = event.kind in OPERATOR_EVENTS
        shelved = event.kind is EventKind.SHELVED and math.isfinite(shelved_until_s)
        rows.append(
            AlarmEventRow(
                unit_id,
                event.alarm,
                when(event.time_s),
                event.kind.value,
                event.after.value,
                event.priority.value,
                event.note,
                user if by_operator else None,
                when(shelved_until_s) if shelved else None,
                _optional(event.value),
            )
        )
    return rows


def step_rows(unit_id: str, outputs: UnitOutputs) -> list[StoreRow]:
    """What one step of a unit gives the store before its write is done: its estimate and the
    step's alarm events (the guard's decision follows with the write's outcome,
    :func:`proposal_row`)."""
    rows: list[StoreRow] = []
    estimate = estimate_row(unit_id, outputs)
    if estimate is not None:
        rows.append(estimate)
    rows += alarm_event_rows(unit_id, outputs.events)
    return rows
