"""The replay engine: historical batches through the soft sensor, as fast as the machine allows.

Batches are grouped by unit and run in chunks through the compiled kernel
(:func:`sensor.batchfilter.run_batches`; an EKF site goes through the per-sample filterpy path),
then the outputs of each batch are computed in one vectorised call
(:func:`sensor.outputs.estimates`) and summarised. Per-sample rows go to a sink (the estimates
CSV) batch by batch, so memory stays bounded by the chunk.
"""

from __future__ import annotations

import csv
import math
import sys
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import IO, Any

import numpy as np

from controller.guard import GuardMode
from sensor.batchfilter import (
    FLAG_CONC_STALE,
    FLAG_JACKET_STALE,
    FLAG_SEEDED,
    FLAG_STARTED,
    FLAG_TEMP_STALE,
    FLAG_WIDENED,
    KernelOutput,
    run_batches,
    run_per_sample,
)
from sensor.consistency import NIS_STATES, nis_state_codes
from sensor.errors import SigmatrackError
from sensor.outputs import Estimates, estimates
from sensor.pipeline import PipelineSetup
from sensor.shell.historian import HistorianBatch
from sensor.shell.shadow import SHADOW_COLUMNS, ShadowTrack, shadow_run
from sensor.softsensor import UnitSetup
from sensor.units import ZERO_CELSIUS_K
from sensor.validation import REASON_LABELS, Reason

SIGNAL_NAMES = ("temp", "jacket_temp", "conc")


@dataclass(frozen=True)
class BatchResult:
    """One replayed batch: the kernel's record, the outputs of its started samples, and the
    advisor's shadow run (None when the advisor was not run)."""

    batch: HistorianBatch
    output: KernelOutput
    started: np.ndarray
    estimates: Estimates
    nis_state: np.ndarray
    shadow: ShadowTrack | None = None


@dataclass(frozen=True)
class BatchSummary:
    """What the ``--json`` summary says about one batch (see README, ``sigmatrack replay``)."""

    batch: str
    file: str
    unit: str
    samples: int
    rejected: int
    rejected_by_reason: dict[str, int]
    duration_s: float
    peak_sigma: float | None
    peak_sigma_timestamp: str | None
    time_above_limit_s: float
    sigma_integral_s: float
    final_sigma: float | None
    final_yield: float | None
    final_yield_kg: float | None
    final_analyzer_bias: float | None
    nis_ok_fraction: float | None
    error: str | None = None
    alarms_raised: dict[str, int] | None = None
    advised_s: float | None = None
    fallback_s: float | None = None
    proposals: int | None = None

    def as_json(self) -> dict[str, Any]:
        return dict(self.__dict__)


def _none_if_nan(value: float) -> float | None:
    return None if not math.isfinite(value) else float(value)


def summarise(result: BatchResult, unit_id: str) -> BatchSummary:
    """The summary of a replayed batch."""
    batch, out, est = result.batch, result.output, result.estimates
    reasons = out.reasons
    arrived = (reasons != Reason.ACCEPTED) & (reasons != Reason.MISSING)
    by_reason = {
        REASON_LABELS[code]: int(np.sum(reasons == code)) for code in np.unique(reasons[arrived])
    }
    times = batch.arrays.time_s
    started = result.started
    if np.any(started):
        t = times[started]
        interval = np.diff(t, append=t[-1])
        above = est.margin_sigma < 0.0
        peak = int(np.nanargmax(est.sigma)) if np.any(np.isfinite(est.sigma)) else -1
        nis_known = result.nis_state[started] != 0
        ok_fraction = (
            float(np.mean(result.nis_state[started][nis_known] == 1)) if np.any(nis_known) else None
        )
        shadow = {}
        if result.shadow is not None:
            track = result.shadow
            shadow = {
                "alarms_raised": track.alarms_raised(),
                "advised_s": track.time_in_mode_s(times, GuardMode.ADVISING),
                "fallback_s": track.time_in_mode_s(times, GuardMode.FALLBACK),
                "proposals": int(np.sum(track.proposed)),
            }
        first_started = int(np.flatnonzero(started)[0])
        started_stamps = [batch.timestamps[k] for k in np.flatnonzero(started)]
        return BatchSummary(
            batch=batch.batch,
            file=str(batch.file),
            unit=unit_id,
            samples=batch.samples,
            rejected=int(np.sum(arrived)),
            rejected_by_reason=by_reason,
            duration_s=float(times[-1] - times[first_started]),
            peak_sigma=_none_if_nan(est.sigma[peak]) if peak >= 0 else None,
            peak_sigma_timestamp=started_stamps[peak] if peak >= 0 else None,
            time_above_limit_s=float(np.sum(interval[above])),
            sigma_integral_s=float(np.sum(interval * np.maximum(np.nan_to_num(est.sigma), 0.0))),
            final_sigma=_none_if_nan(est.sigma[-1]),
            final_yield=_none_if_nan(est.yield_fraction[-1]),
            final_yield_kg=_none_if_nan(est.yield_kg[-1]),
            final_analyzer_bias=_none_if_nan(est.analyzer_bias[-1]),
            nis_ok_fraction=ok_fraction,
            **shadow,
        )
    return failed_summary(
        batch,
        unit_id,
        "the filter never started (no sample with valid temperature, jacket and analyzer)",
        rejected=int(np.sum(arrived)),
        rejected_by_reason=by_reason,
    )


def failed_summary(
    batch: HistorianBatch,
    unit_id: str,
    error: str,
    *,
    rejected: int = 0,
    rejected_by_reason: dict[str, int] | None = None,
) -> BatchSummary:
    """The summary of a batch that gave no estimates, saying why."""
    return BatchSummary(
        batch=batch.batch,
        file=str(batch.file),
        unit=unit_id,
        samples=batch.samples,
        rejected=rejected,
        rejected_by_reason=rejected_by_reason or {},
        duration_s=0.0,
        peak_sigma=None,
        peak_sigma_timestamp=None,
        time_above_limit_s=0.0,
        sigma_integral_s=0.0,
        final_sigma=None,
        final_yield=None,
        final_yield_kg=None,
        final_analyzer_bias=None,
        nis_ok_fraction=None,
        error=error,
    )


def outputs_of(setup: UnitSetup, batch: HistorianBatch, out: KernelOutput) -> BatchResult:
    """The outputs of a batch the kernel (or the per-sample path) has run."""
    started = (out.flags & FLAG_STARTED) != 0
    seeded = (out.flags & FLAG_SEEDED) != 0
    seed_load = np.where(seeded, float(setup.seed_zeta[3]), 0.0)[started]
    est = estimates(
        setup.model,
        setup.zone,
        out.x[started],
        out.var[started],
        out.cov_temp_conc[started],
        out.jacket_temp_k[started],
        seed_load,
        setup.solvent_mass_kg,
    )
    accepted_nis = np.where(out.reasons[:, 2] == Reason.ACCEPTED, out.conc_nis, np.nan)
    nis_state = nis_state_codes(accepted_nis, setup.nis_window, setup.nis_probability)
    return BatchResult(batch, out, started, est, nis_state)


@dataclass
class Replay:
    """Replays batches of one site. ``setups`` holds each unit's soft-sensor setup by index.

    Parameters
    ----------
    setups : unit index -> setup
    unit_ids : unit index -> the unit's id
    threads : numba threads for the kernel
    chunk : batches per kernel call (bounds memory)
    advisors : unit index -> pipeline setup, for the units whose batches get the advisor's
        shadow run (:mod:`sensor.shell.shadow`); a unit not here gets none
    """

    setups: dict[int, UnitSetup]
    unit_ids: dict[int, str]
    threads: int = 1
    chunk: int = 64
    advisors: dict[int, PipelineSetup] = field(default_factory=dict)
    summaries: list[BatchSummary] = field(default_factory=list)

    def run(
        self,
        batches: Sequence[HistorianBatch],
        sink: Callable[[BatchResult], None] | None = None,
        progress: Callable[[int, int], None] | None = None,
    ) -> list[BatchSummary]:
        """Replay ``batches``; each result goes to ``sink``; ``progress(done, total)`` is called
        after each chunk. Returns the summaries in the order of ``batches``."""
        summaries: dict[int, BatchSummary] = {}
        done = 0
        for unit in sorted({b.unit for b in batches}):
            setup = self.setups[unit]
            indices = [i for i, b in enumerate(batches) if b.unit == unit]
            for lo in range(0, len(indices), self.chunk):
                part = indices[lo : lo + self.chunk]
                if setup.tuning.kind == "ukf":
                    outs = run_batches(setup, [batches[i].arrays for i in part], self.threads)
                else:
                    outs = [run_per_sample(setup, batches[i].arrays) for i in part]
                for i, out in zip(part, outs, strict=True):
                    summaries[i] = self._one(setup, batches[i], out, sink)
                done += len(part)
                if progress is not None:
                    progress(done, len(batches))
        return [summaries[i] for i in range(len(batches))]

    def _one(
        self,
        setup: UnitSetup,
        batch: HistorianBatch,
        out: KernelOutput | SigmatrackError,
        sink: Callable[[BatchResult], None] | None,
    ) -> BatchSummary:
        unit_id = self.unit_ids[batch.unit]
        if isinstance(out, SigmatrackError):
            return failed_summary(batch, unit_id, f"{batch.file}: {_located(batch, out)}")
        result = outputs_of(setup, batch, out)
        advisor = self.advisors.get(batch.unit)
        if advisor is not None:
            track = shadow_run(
                advisor,
                batch.arrays.time_s,
                batch.phases,
                out,
                result.started,
                result.estimates,
                result.nis_state,
            )
            result = replace(result, shadow=track)
        if sink is not None:
            sink(result)
        return summarise(result, unit_id)


def _located(batch: HistorianBatch, error: SigmatrackError) -> str:
    sample = getattr(error, "sample", None)
    if sample is not None and 0 <= sample < batch.samples:
        return f"line {batch.lines[sample]}: {error}"
    return str(error)


ESTIMATE_COLUMNS = (
    "batch",
    "timestamp",
    "time_s",
    "started",
    *Estimates.names(),
    "temp_reason",
    "jacket_temp_reason",
    "conc_reason",
    "conc_nis",
    "nis_state",
    "inputs_valid",
    "seeded",
    "widened",
    *SHADOW_COLUMNS,
)
"""Columns of the ``--estimates`` CSV (README explains each); the shadow run's are blank for a
batch replayed without the advisor."""


class EstimatesWriter:
    """Writes the per-sample outputs of replayed batches to one CSV (a ``batch`` column tells
    them apart). Numbers are written with 10 significant digits; a sample before the filter
    started has blank outputs."""

    def __init__(self, stream: IO[str]) -> None:
        self._writer = csv.writer(stream, lineterminator="\n")
        self._writer.writerow(ESTIMATE_COLUMNS)

    def __call__(self, result: BatchResult) -> None:
        batch, out = result.batch, result.output
        names = Estimates.names()
        columns = [getattr(result.estimates, name) for name in names]
        started_rows = np.cumsum(result.started) - 1
        t0 = batch.arrays.time_s[0]
        flags = out.flags
        events = event_cells(result.shadow)
        for k in range(batch.samples):
            row: list[object] = [
                batch.batch,
                batch.timestamps[k],
                _number(batch.arrays.time_s[k] - t0),
                int(result.started[k]),
            ]
            if result.started[k]:
                j = started_rows[k]
                row.extend(_cell(column[j]) for column in columns)
            else:
                row.extend([""] * len(names))
            row.extend(REASON_LABELS[int(code)] for code in out.reasons[k])
            row.append(_number(out.conc_nis[k]))
            row.append(NIS_STATES[int(result.nis_state[k])])
            stale = FLAG_TEMP_STALE | FLAG_JACKET_STALE | FLAG_CONC_STALE
            row.append(int(not flags[k] & stale))
            row.append(int(bool(flags[k] & FLAG_SEEDED)))
            row.append(int(bool(flags[k] & FLAG_WIDENED)))
            row.extend(shadow_cells(result.shadow, k, events.get(k, "")))
            self._writer.writerow(row)


def event_cells(track: ShadowTrack | None) -> dict[int, str]:
    """The ``alarm_events`` cell of each sample with events: ``alarm:event``, ``;``-joined."""
    cells: dict[int, list[str]] = {}
    if track is not None:
        for k, e in zip(track.event_sample, track.events, strict=True):
            cells.setdefault(int(k), []).append(f"{e.alarm}:{e.kind.value}")
    return {k: ";".join(v) for k, v in cells.items()}


def shadow_cells(track: ShadowTrack | None, k: int, events: str) -> list[str]:
    """The shadow run's cells of sample ``k`` (blank without a shadow run)."""
    if track is None:
        return [""] * len(SHADOW_COLUMNS)
    return [
        _number(track.proposal_setpoint_k[k] - ZERO_CELSIUS_K),
        _number(track.proposal_rate_k_per_s[k] * 60.0),
        track.proposal_mode[k],
        track.guard_mode[k],
        _number(track.guard_setpoint_k[k] - ZERO_CELSIUS_K),
        str(int(track.write[k])),
        events,
    ]


def _number(value: float) -> str:
    return "" if not math.isfinite(value) else f"{value:.10g}"


def _cell(value: object) -> str:
    if isinstance(value, np.bool_ | bool):
        return str(int(value))
    return _number(float(value))  # type: ignore[arg-type]


class Progress:
    """A one-line progress bar on a terminal (``stream``); silent when it is not a tty."""

    def __init__(self, stream: IO[str] = sys.stderr, width: int = 30) -> None:
        self.stream = stream
        self.width = width
        self.enabled = bool(getattr(stream, "isatty", lambda: False)())

    def __call__(self, done: int, total: int) -> None:
        if not self.enabled or total <= 0:
            return
        filled = round(self.width * done / total)
        bar = "#" * filled + "-" * (self.width - filled)
        end = "\n" if done >= total else ""
        self.stream.write(f"\rreplay [{bar}] {done}/{total} batches{end}")
        self.stream.flush()


def write_estimates(path: Path) -> tuple[IO[str], EstimatesWriter]:
    """Open ``path`` for the estimates CSV; the caller closes the stream."""
    stream = path.open("w", encoding="utf-8", newline="")
    return stream, EstimatesWriter(stream)
