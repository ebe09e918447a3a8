"""Making reports: replayed batches into views, views into pages, pages into files.

- :class:`ViewCollector` is a replay sink: it keeps a :class:`~sensor.shell.report.view.BatchView`
  of each batch as the replay hands it over, and pairs it with the summary the replay returns
  (:meth:`ViewCollector.views`), so the report's numbers are the replay summary's own.
- :func:`report_html` and :func:`comparison_html` draw and lay out one page.
- :func:`write_page` writes a page whole or not at all.

This is what ``sigmatrack report``, ``sigmatrack compare``, ``sigmatrack replay --report`` and
the demo call.
"""

from __future__ import annotations

import dataclasses
import os
import re
from collections.abc import Callable, Mapping, Sequence
from datetime import datetime
from pathlib import Path

import numpy as np

import sensor.shell.report.figures as figures
from sensor.metastable import MetastableZone
from sensor.shell.config import SiteConfig
from sensor.shell.historian import HistorianBatch
from sensor.shell.replay import BatchResult, BatchSummary, summarise
from sensor.shell.report.envelope import Envelope, EnvelopeCheck, build_envelope, hold_against
from sensor.shell.report.errors import ReportError
from sensor.shell.report.page import Figure, comparison_page, report_page
from sensor.shell.report.view import (
    AdvisorTrack,
    AlarmMark,
    BatchView,
    PhaseSpan,
    batch_view,
    failed_view,
)
from sensor.shell.store.reader import BatchRecord
from sensor.shell.store.rows import epoch_us
from sensor.softsensor import UnitSetup
from sensor.units import ZERO_CELSIUS_K

MIN_NIS_OK_FRACTION = 0.9
"""A good batch's estimate was consistent over at least this share of its samples."""

GOOD_CRITERION = (
    "Good batches chosen by sigmatrack's criterion: estimates for the whole batch, never beyond "
    f"the metastable limit, the estimate consistent (NIS ok) over at least "
    f"{MIN_NIS_OK_FRACTION:.0%} of the samples, and no high-priority alarm where alarms are "
    "known."
)


def advisor_from_record(record: BatchRecord, t0_s: float) -> AdvisorTrack | None:
    """The proposals and alarm events the live service stored for a batch (``None`` if it
    stored neither); times from ``t0_s`` [Unix time, s]."""
    if not record.proposals and not record.alarm_events:
        return None
    return AdvisorTrack(
        time_s=np.array([epoch_us(p.time) / 1e6 - t0_s for p in record.proposals]),
        setpoint_c=np.array(
            [
                np.nan if p.setpoint_temp_k is None else p.setpoint_temp_k - ZERO_CELSIUS_K
                for p in record.proposals
            ]
        ),
        alarms=tuple(
            AlarmMark(epoch_us(a.time) / 1e6 - t0_s, a.alarm, a.event, a.priority)
            for a in record.alarm_events
        ),
        origin="recorded live",
    )


def advisor_from_shadow(result: BatchResult) -> AdvisorTrack | None:
    """The proposals and alarm events of a replayed batch's shadow run (``None`` without one):
    the law's proposed setpoint at each update where the guard would have written it (NaN
    where it would not), every alarm event; times from the batch's first row."""
    track = result.shadow
    if track is None:
        return None
    times = result.batch.arrays.time_s
    t0 = float(times[0])
    updates = np.flatnonzero(track.proposed)
    setpoint_c = np.where(
        track.write[updates], track.proposal_setpoint_k[updates] - ZERO_CELSIUS_K, np.nan
    )
    return AdvisorTrack(
        time_s=times[updates] - t0,
        setpoint_c=setpoint_c,
        alarms=tuple(
            AlarmMark(e.time_s - t0, e.alarm, e.kind.value, e.priority.value) for e in track.events
        ),
        origin="shadow mode (replay)",
    )


class ViewCollector:
    """A replay sink keeping a view of every batch (module docstring).

    Parameters
    ----------
    setups : the soft-sensor setup of a unit by index
    unit_ids : unit index -> the unit's id
    advisors : advisor tracks of batches, keyed by the batch object's ``id()`` (what the live
        service recorded); a batch without one shows its shadow run, if the replay made one
    sources : where batches came from, for the page, keyed the same way
    """

    def __init__(
        self,
        setups: Callable[[int], UnitSetup],
        unit_ids: Mapping[int, str],
        advisors: Mapping[int, AdvisorTrack] | None = None,
        sources: Mapping[int, str] | None = None,
    ) -> None:
        self._setups = setups
        self._unit_ids = unit_ids
        self._advisors = dict(advisors or {})
        self._sources = dict(sources or {})
        self._views: dict[int, BatchView] = {}

    def __call__(self, result: BatchResult) -> None:
        batch = result.batch
        key = id(batch)
        self._views[key] = batch_view(
            self._setups(batch.unit),
            result,
            summarise(result, self._unit_ids[batch.unit]),
            advisor=self._advisors.get(key) or advisor_from_shadow(result),
            source=self._sources.get(key),
        )

    def views(
        self, batches: Sequence[HistorianBatch], summaries: Sequence[BatchSummary]
    ) -> list[BatchView]:
        """The views of ``batches`` in their order, each holding the summary the replay
        returned for it (a batch that gave no result gets a view that says why)."""
        views = []
        for batch, summary in zip(batches, summaries, strict=True):
            view = self._views.get(id(batch))
            if view is None:
                views.append(failed_view(batch, summary, source=self._sources.get(id(batch))))
            else:
                views.append(dataclasses.replace(view, summary=summary))
        return views


def combine_sinks(
    *sinks: Callable[[BatchResult], None] | None,
) -> Callable[[BatchResult], None] | None:
    """One replay sink that hands each result to every given sink (``None`` ones skipped);
    ``None`` when none is given."""
    given = [s for s in sinks if s is not None]
    if not given:
        return None

    def every(result: BatchResult) -> None:
        for sink in given:
            sink(result)

    return every


def _limit_rate_k_per_s(site: SiteConfig) -> float:
    """The cooling rate the phase diagram's metastable limit is drawn at: the plant's usual
    rate, ``controller.target_zone_rate_k_per_min`` [K/s]."""
    return site.controller.target_zone_rate_k_per_min / 60.0


def _limit_caption(site: SiteConfig) -> str:
    rate = site.controller.target_zone_rate_k_per_min
    return (
        f"The metastable limit is drawn at {rate:g} K/min (controller.target_zone_rate_k_per_min,"
        " the plant's usual rate); the limit the batch was judged against moves with its "
        "actual cooling rate (see the supersaturation trend). Bands: 95 %."
    )


def report_html(
    site: SiteConfig, zone: MetastableZone, view: BatchView, made: datetime | None = None
) -> str:
    """The report page of one batch (``made``: when, shown if given)."""
    drawings = []
    if view.ok:
        drawings = [
            Figure(
                figures.phase_diagram(zone, [view], _limit_rate_k_per_s(site)),
                "Phase diagram. The estimated path runs from the filter's start (cooling to "
                "seed) to the end of the batch; analyzer readings are shown as read. "
                + _limit_caption(site),
            ),
            Figure(
                figures.trends(view, site.alarms.sigma_high_fraction),
                "Batch phases; supersaturation with its 95 % band against the metastable limit "
                "at the current cooling rate and the sigma-high alarm level "
                f"(alarms.sigma_high_fraction = {site.alarms.sigma_high_fraction:g}); reactor "
                "and jacket temperatures and, where the advisor ran, its proposed setpoint. "
                + phase_list(view.phases),
            ),
        ]
    return report_page(site, view, drawings, made)


def phase_list(phases: Sequence[PhaseSpan]) -> str:
    """A batch's phases with their start times, as a sentence.

    >>> phase_list((PhaseSpan("heat", 0.0, 3600.0), PhaseSpan("dissolve", 3600.0, 5400.0)))
    'Phases (start, h): heat 0.00, dissolve 1.00.'
    """
    if not phases:
        return "The records hold no batch phase."
    starts = ", ".join(f"{p.name} {p.start_s / 3600:.2f}" for p in phases)
    return f"Phases (start, h): {starts}."


def is_good(view: BatchView) -> bool:
    """Whether a batch meets :data:`GOOD_CRITERION`."""
    summary = view.summary
    alarms = view.advisor.alarms if view.advisor is not None else ()
    return (
        view.ok
        and summary.time_above_limit_s == 0.0
        and summary.nis_ok_fraction is not None
        and summary.nis_ok_fraction >= MIN_NIS_OK_FRACTION
        and not any(a.priority == "high" and a.event == "raised" for a in alarms)
    )


def choose_good(views: Sequence[BatchView], named: Sequence[str] | None) -> tuple[list[str], str]:
    """The good batches' ids and how they were chosen: the ``named`` ones, or by criterion.

    Raises
    ------
    ReportError
        If a named batch is not among ``views`` or gave no estimates.
    """
    if named is None:
        return [v.batch for v in views if is_good(v)], GOOD_CRITERION
    known = {v.batch: v for v in views}
    for batch in named:
        if batch not in known:
            raise ReportError(
                f"--good: no batch {batch!r} among those compared ({', '.join(known)})"
            )
        if not known[batch].ok:
            raise ReportError(f"--good: batch {batch!r} gave no estimates, it cannot be good")
    return list(dict.fromkeys(named)), "Good batches named by the engineer (--good)."


def comparison_html(
    site: SiteConfig,
    zone: MetastableZone,
    views: Sequence[BatchView],
    good: Sequence[str] | None = None,
    *,
    bin_k: float = 1.0,
    made: datetime | None = None,
) -> str:
    """The comparison page of ``views``: overlaid phase diagram, key figures, and the other
    batches held against the envelope of the good ones (named in ``good``, else chosen by
    :data:`GOOD_CRITERION`), with temperature bins of ``bin_k`` [K]."""
    good_ids, reason = choose_good(views, good)
    good_views = [v for v in views if v.batch in good_ids]
    held = [v for v in views if v.ok and v.batch not in good_ids]
    envelope: Envelope | None = None
    problem: str | None = None
    checks: list[EnvelopeCheck] = []
    try:
        envelope = build_envelope(good_views, bin_k)
    except ReportError as error:
        if good is not None:
            raise
        problem = str(error)
    else:
        checks = [hold_against(envelope, v, zone.solubility) for v in held]
    drawn = [v for v in views if v.ok]
    figure = Figure(
        figures.phase_diagram(
            zone, drawn, _limit_rate_k_per_s(site), envelope=envelope, checks=checks
        ),
        "The batches' estimated paths over the envelope of the good batches (hatched). A broad "
        "band marks every stretch of a batch outside the envelope, a cross with its name where "
        "it first leaves it (details below). Each batch's own band is in its report. "
        + _limit_caption(site),
    )
    return comparison_page(site, views, good_ids, reason, figure, envelope, problem, checks, made)


def write_page(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` whole or not at all (a temporary file, then a rename).

    Raises
    ------
    ReportError
        If it cannot be written (the message names the file and the reason).
    """
    temporary = path.with_name(f".{path.name}.partial")
    try:
        temporary.write_text(text, encoding="utf-8")
        os.replace(temporary, path)
    except OSError as error:
        temporary.unlink(missing_ok=True)
        raise ReportError(f"{path}: cannot be written ({error.strerror})") from None


def report_names(batch_ids: Sequence[str]) -> list[str]:
    """A file name per batch: its id with anything but letters, digits, ``.``, ``_`` and ``-``
    made ``_``, and ``-2``, ``-3``, ... where two batches would share one.

    >>> report_names(["CR-301/7", "B1", "B1"])
    ['CR-301_7.html', 'B1.html', 'B1-2.html']
    """
    names: list[str] = []
    for batch_id in batch_ids:
        stem = re.sub(r"[^A-Za-z0-9._-]", "_", batch_id) or "batch"
        name, n = f"{stem}.html", 1
        while name in names:
            n += 1
            name = f"{stem}-{n}.html"
        names.append(name)
    return names


def write_reports(
    directory: Path,
    site: SiteConfig,
    zone: MetastableZone,
    views: Sequence[BatchView],
    made: datetime | None = None,
) -> list[Path]:
    """One report per batch in ``directory`` (created if missing); returns the files."""
    try:
        directory.mkdir(parents=True, exist_ok=True)
    except OSError as error:
        raise ReportError(f"{directory}: cannot be created ({error.strerror})") from None
    paths = []
    for view, name in zip(views, report_names([v.batch for v in views]), strict=True):
        path = directory / name
        write_page(path, report_html(site, zone, view, made))
        paths.append(path)
    return paths
