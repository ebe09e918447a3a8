"""What a report shows of one replayed batch, taken once from the replay's result.

:func:`batch_view` keeps, of a :class:`~sensor.shell.replay.BatchResult`, what the drawings and
tables need: the soft sensor's path (temperature, concentration, sigma and their standard
deviations, the metastable limit at each sample), the raw analyzer readings placed at the
temperature of the instant they were drawn, the seed point, the peak, the batch phases, and the
replay summary itself (the numbers of the report are the summary's, never recomputed). At most
``max_points`` samples of each series are kept: per bucket of samples the lowest and the highest
sigma, so a peak is never lost, and the first and last samples. A view holds no reference to
the full arrays, so a comparison of many batches stays small in memory.

Times are seconds since the batch's first row (as in the estimates CSV), temperatures °C,
concentrations kg/kg solvent.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np

from sensor.batchfilter import FLAG_SEEDED
from sensor.numerics import FloatArray
from sensor.shell.historian import HistorianBatch
from sensor.shell.replay import BatchResult, BatchSummary
from sensor.softsensor import UnitSetup
from sensor.units import ZERO_CELSIUS_K
from sensor.validation import Reason

MAX_POINTS = 4000
"""Samples kept per series by default (bucket extremes of sigma)."""

MAX_ANALYZER_POINTS = 1500
"""Accepted analyzer readings kept by default (evenly spaced); every rejected one is kept."""


@dataclass(frozen=True)
class AlarmMark:
    """One alarm event to mark on the trend.

    Attributes
    ----------
    time_s : since the batch's first row [s]
    alarm : the alarm's name (``sigma-high``, ...)
    event : what happened (``raised``, ``cleared``, ``acknowledged``, ...)
    priority : ``low``, ``medium``, ``high`` (or ``""`` when not known)
    """

    time_s: float
    alarm: str
    event: str
    priority: str


@dataclass(frozen=True)
class AdvisorTrack:
    """What the advisor proposed and raised during a batch.

    Attributes
    ----------
    time_s : instants of the proposals, since the batch's first row [s]
    setpoint_c : the proposed reactor-temperature setpoint [°C]; NaN where there was none
    alarms : alarm events, in time order
    origin : where they come from, in plain words (``"shadow mode (replay)"``, ``"recorded
        live"``)
    """

    time_s: FloatArray
    setpoint_c: FloatArray
    alarms: tuple[AlarmMark, ...]
    origin: str


@dataclass(frozen=True)
class PhaseSpan:
    """A batch phase from ``start_s`` to ``end_s`` [s since the first row]."""

    name: str
    start_s: float
    end_s: float


@dataclass(frozen=True)
class StatePoint:
    """The estimate at one instant: time [s since the first row], temperature [°C],
    concentration [kg/kg solvent] and sigma [-]."""

    time_s: float
    temp_c: float
    conc: float
    sigma: float


@dataclass(frozen=True)
class AnalyzerPoints:
    """Raw analyzer readings, as read (not corrected for the estimated bias).

    Attributes
    ----------
    time_s : when each reading arrived [s since the first row]
    temp_c : the measured reactor temperature when it was drawn (arrival minus the analyzer's
        delay, interpolated between accepted readings) [°C]
    conc : the reading [kg/kg solvent]
    accepted : it reached the filter (else validation or the gate rejected it)
    estimating : it arrived while the filter ran (else before it started or after it stopped,
        e.g. while the charge was heated and dissolved)
    """

    time_s: FloatArray
    temp_c: FloatArray
    conc: FloatArray
    accepted: np.ndarray
    estimating: np.ndarray


@dataclass(frozen=True)
class BatchView:
    """One batch as the report draws it (module docstring).

    The series (``time_s`` ... ``seeded``) hold the started samples kept for drawing.
    """

    batch: str
    unit: str
    source: str
    start_timestamp: str
    samples: int
    summary: BatchSummary
    time_s: FloatArray
    temp_c: FloatArray
    temp_std_k: FloatArray
    jacket_temp_c: FloatArray
    conc: FloatArray
    conc_std: FloatArray
    sigma: FloatArray
    sigma_std: FloatArray
    sigma_limit: FloatArray
    seeded: np.ndarray
    analyzer: AnalyzerPoints
    phases: tuple[PhaseSpan, ...]
    seed: StatePoint | None
    peak: StatePoint | None
    advisor: AdvisorTrack | None = None

    @property
    def ok(self) -> bool:
        """The batch gave estimates (its summary has no error)."""
        return self.summary.error is None and len(self.time_s) > 0


def keep_indices(values: FloatArray, max_points: int, always: tuple[int, ...] = ()) -> np.ndarray:
    """Indices of at most about ``max_points`` samples of ``values`` that keep its shape: in each
    of ``max_points // 2`` buckets the lowest and the highest finite value (the first sample
    where a bucket has none), the first and last samples, and the indices in ``always``.

    >>> keep_indices(np.array([0.0, 5.0, 1.0, 2.0, -3.0, 0.5, 0.0, 0.1]), 4).tolist()
    [0, 1, 4, 5, 7]
    """
    count = len(values)
    if count <= max_points:
        return np.arange(count)
    buckets = max(1, max_points // 2)
    edges = np.linspace(0, count, buckets + 1).astype(int)
    kept = [0, count - 1, *always]
    for lo, hi in itertools.pairwise(edges):
        if hi <= lo:
            continue
        part = values[lo:hi]
        finite = np.isfinite(part)
        if not np.any(finite):
            kept.append(lo)
            continue
        masked_low = np.where(finite, part, np.inf)
        masked_high = np.where(finite, part, -np.inf)
        kept.extend((lo + int(np.argmin(masked_low)), lo + int(np.argmax(masked_high))))
    return np.unique(np.asarray(kept, dtype=int))


def phase_spans(phases: tuple[str, ...], time_s: FloatArray) -> tuple[PhaseSpan, ...]:
    """Runs of equal phase names as spans (unknown phases, ``""``, are left out); a span ends
    where the next begins.

    >>> phase_spans(("", "heat", "heat", "dissolve"), np.array([0.0, 1.0, 2.0, 3.0]))
    (PhaseSpan(name='heat', start_s=1.0, end_s=3.0), PhaseSpan(name='dissolve', start_s=3.0, end_s=3.0))
    """  # noqa: E501
    spans = []
    start = 0
    for k in range(1, len(phases) + 1):
        if k == len(phases) or phases[k] != phases[start]:
            if phases[start]:
                end = time_s[k] if k < len(phases) else time_s[-1]
                spans.append(PhaseSpan(phases[start], float(time_s[start]), float(end)))
            start = k
    return tuple(spans)


def _analyzer_points(
    setup: UnitSetup, result: BatchResult, t0: float, max_points: int
) -> AnalyzerPoints:
    arrays, out = result.batch.arrays, result.output
    times = arrays.time_s
    temp_ok = arrays.present[0] & (out.reasons[:, 0] == Reason.ACCEPTED)
    arrived = np.flatnonzero(arrays.present[2] & np.isfinite(arrays.values[2]))
    accepted = out.reasons[arrived, 2] == Reason.ACCEPTED
    drawn_s = times[arrived] - setup.measurements.analyzer_delay_s
    if np.any(temp_ok):
        temp_k = np.interp(drawn_s, times[temp_ok], arrays.values[0, temp_ok])
    else:
        temp_k = np.full(len(arrived), np.nan)
    good = np.flatnonzero(accepted)
    stride = max(1, -(-len(good) // max_points))
    keep = np.sort(np.concatenate([good[::stride], np.flatnonzero(~accepted)]))
    return AnalyzerPoints(
        time_s=times[arrived][keep] - t0,
        temp_c=temp_k[keep] - ZERO_CELSIUS_K,
        conc=arrays.values[2, arrived][keep],
        accepted=accepted[keep],
        estimating=result.started[arrived][keep],
    )


def batch_view(
    setup: UnitSetup,
    result: BatchResult,
    summary: BatchSummary,
    *,
    advisor: AdvisorTrack | None = None,
    source: str | None = None,
    max_points: int = MAX_POINTS,
    max_analyzer_points: int = MAX_ANALYZER_POINTS,
) -> BatchView:
    """The view of one replayed batch and its summary (from the same replay).

    Parameters
    ----------
    setup : the unit's soft-sensor setup (the analyzer's delay)
    result : the replay's result for the batch
    summary : the replay's summary of it (:func:`sensor.shell.replay.summarise`)
    advisor : proposals and alarm events, where known
    source : where the batch came from (default: its file)
    max_points, max_analyzer_points : how much of each series to keep
    """
    batch, est = result.batch, result.estimates
    times = batch.arrays.time_s
    t0 = float(times[0])
    started = np.flatnonzero(result.started)
    seeded_all = (result.output.flags[started] & FLAG_SEEDED) != 0
    always: list[int] = []
    seed_at = int(np.argmax(seeded_all)) if np.any(seeded_all) else -1
    if seed_at >= 0:
        always.append(seed_at)
    peak_at = -1
    if summary.peak_sigma_timestamp is not None:
        stamps = [batch.timestamps[k] for k in started]
        peak_at = stamps.index(summary.peak_sigma_timestamp)
        always.append(peak_at)
    keep = keep_indices(est.sigma, max_points, tuple(always))

    def point(j: int) -> StatePoint | None:
        if j < 0:
            return None
        return StatePoint(
            float(times[started[j]] - t0),
            float(est.temp_c[j]),
            float(est.conc[j]),
            float(est.sigma[j]),
        )

    return BatchView(
        batch=batch.batch,
        unit=summary.unit,
        source=str(batch.file) if source is None else source,
        start_timestamp=batch.timestamps[0],
        samples=batch.samples,
        summary=summary,
        time_s=times[started][keep] - t0,
        temp_c=est.temp_c[keep],
        temp_std_k=est.temp_std_k[keep],
        jacket_temp_c=result.output.jacket_temp_k[started][keep] - ZERO_CELSIUS_K,
        conc=est.conc[keep],
        conc_std=est.conc_std[keep],
        sigma=est.sigma[keep],
        sigma_std=est.sigma_std[keep],
        sigma_limit=est.sigma_limit[keep],
        seeded=seeded_all[keep],
        analyzer=_analyzer_points(setup, result, t0, max_analyzer_points),
        phases=phase_spans(batch.phases, times - t0),
        seed=point(seed_at),
        peak=point(peak_at),
        advisor=advisor,
    )


def failed_view(
    batch: HistorianBatch, summary: BatchSummary, source: str | None = None
) -> BatchView:
    """The view of a batch that gave no estimates: no series, and its summary saying why."""
    empty = np.array([])
    return BatchView(
        batch=batch.batch,
        unit=summary.unit,
        source=str(batch.file) if source is None else source,
        start_timestamp=batch.timestamps[0] if batch.timestamps else "",
        samples=batch.samples,
        summary=summary,
        time_s=empty,
        temp_c=empty,
        temp_std_k=empty,
        jacket_temp_c=empty,
        conc=empty,
        conc_std=empty,
        sigma=empty,
        sigma_std=empty,
        sigma_limit=empty,
        seeded=np.array([], dtype=bool),
        analyzer=AnalyzerPoints(
            empty, empty, empty, np.array([], dtype=bool), np.array([], dtype=bool)
        ),
        phases=(),
        seed=None,
        peak=None,
    )
