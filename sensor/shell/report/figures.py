"""The report's drawings, made with matplotlib and returned as inline SVG.

- :func:`phase_diagram`: concentration against temperature: the solubility curve with its
  95 % band (dotted where the curve is extrapolated), the metastable limit at a stated cooling
  rate, each batch's estimated path with its 95 % band, the raw analyzer readings, the seed
  point and the peak; for a comparison, several paths and the envelope of good batches.
- :func:`trends`: against time, a strip of the batch phases, sigma with its band against the
  metastable limit and the sigma-high alarm level, alarm events marked, and the temperatures
  (reactor, jacket, proposed setpoint).

Every function takes what it draws as arguments and reads nothing else.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence

import numpy as np
from matplotlib import rc_context
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.patches import PathPatch
from matplotlib.path import Path as MplPath

import sensor.shell.report.style as style
from sensor.metastable import MetastableZone
from sensor.numerics import FloatArray
from sensor.shell.report.curves import CONFIDENCE, zone_curves
from sensor.shell.report.envelope import Envelope, EnvelopeCheck
from sensor.shell.report.svg import RC_PARAMS, inline_svg
from sensor.shell.report.view import BatchView
from sensor.units import ZERO_CELSIUS_K

BAND_STD = 2.0
"""The estimates' bands, in standard deviations."""

MAX_BAND_SEGMENTS = 800
"""Segments of a path's band in the phase diagram (the path itself keeps every kept sample)."""

TEMP_MARGIN_K = 2.0
"""Room left around the batches' temperatures in the phase diagram [K]."""

PHASE_SHADES = ("#EBEBEB", "#FFFFFF")
"""Alternating backgrounds of the phase strip (grey levels print as they show)."""

LABEL_WIDTH_PER_CHAR = 0.0075
"""Share of the trends' width one character of a phase label takes (6.5 pt on 7 in)."""


def _hull(points: FloatArray) -> FloatArray:
    """Convex hull of a few 2-D points, counter-clockwise (Andrew's monotone chain [1]_).

    References
    ----------
    .. [1] A. M. Andrew, "Another efficient algorithm for convex hulls in two dimensions",
       Information Processing Letters 9 (1979) 216-219.

    >>> _hull(np.array([[0.0, 0.0], [1.0, 0.0], [1.0, 1.0], [0.0, 1.0], [0.5, 0.5]])).tolist()
    [[0.0, 0.0], [1.0, 0.0], [1.0, 1.0], [0.0, 1.0]]
    """
    order = sorted({(float(x), float(y)) for x, y in points})
    if len(order) < 3:
        return np.array(order)

    def cross(o: tuple[float, float], a: tuple[float, float], b: tuple[float, float]) -> float:
        return (a[0] - o[0]) * (b[1] - o[1]) - (a[1] - o[1]) * (b[0] - o[0])

    lower: list[tuple[float, float]] = []
    for p in order:
        while len(lower) >= 2 and cross(lower[-2], lower[-1], p) <= 0:
            lower.pop()
        lower.append(p)
    upper: list[tuple[float, float]] = []
    for p in reversed(order):
        while len(upper) >= 2 and cross(upper[-2], upper[-1], p) <= 0:
            upper.pop()
        upper.append(p)
    return np.array(lower[:-1] + upper[:-1])


def path_band(
    x: FloatArray, y: FloatArray, half_x: FloatArray, half_y: FloatArray, segments: int
) -> MplPath | None:
    """The band around a path in a plane: the union of the convex hulls of the confidence
    rectangles (``x ± half_x``, ``y ± half_y``) of consecutive points, as one compound path.

    Works where the path turns back or runs vertical (a hold at constant temperature), where a
    band filled between two curves of ``x`` would not. Every hull is counter-clockwise, so the
    union fills under the non-zero rule without holes. ``None`` when fewer than 2 points are
    finite.
    """
    finite = np.isfinite(x) & np.isfinite(y) & np.isfinite(half_x) & np.isfinite(half_y)
    idx = np.flatnonzero(finite)
    if len(idx) < 2:
        return None
    idx = idx[:: max(1, -(-len(idx) // segments))]
    if idx[-1] != np.flatnonzero(finite)[-1]:
        idx = np.append(idx, np.flatnonzero(finite)[-1])
    corners = np.array([[-1, -1], [1, -1], [1, 1], [-1, 1]], dtype=float)
    vertices, codes = [], []
    for a, b in itertools.pairwise(idx):
        pts = np.concatenate(
            [
                np.array([x[a], y[a]]) + corners * np.array([half_x[a], half_y[a]]),
                np.array([x[b], y[b]]) + corners * np.array([half_x[b], half_y[b]]),
            ]
        )
        hull = _hull(pts)
        if len(hull) < 3:
            continue
        vertices.extend([*hull, hull[0]])
        codes.extend([MplPath.MOVETO] + [MplPath.LINETO] * (len(hull) - 1) + [MplPath.CLOSEPOLY])
    if not vertices:
        return None
    return MplPath(np.array(vertices), codes)


def _temp_range(views: Sequence[BatchView], envelope: Envelope | None) -> tuple[float, float]:
    parts = [v.temp_c for v in views] + [v.analyzer.temp_c for v in views]
    if envelope is not None:
        parts.append(envelope.edges_c)
    values = np.concatenate([np.asarray(p, dtype=float) for p in parts]) if parts else np.array([])
    values = values[np.isfinite(values)]
    if len(values) == 0:
        return 0.0, 100.0
    return float(values.min()) - TEMP_MARGIN_K, float(values.max()) + TEMP_MARGIN_K


def _draw_thermodynamics(
    ax: Axes, zone: MetastableZone, temp_lo_c: float, temp_hi_c: float, rate_k_per_s: float
) -> None:
    lines = zone_curves(zone, temp_lo_c, temp_hi_c, rate_k_per_s)
    temp_c, trusted = lines.temp_c, lines.trusted
    ax.fill_between(
        temp_c,
        lines.c_sat_lo,
        lines.c_sat_hi,
        color=style.GREY,
        alpha=style.BAND_ALPHA,
        linewidth=0,
        label=f"solubility, {CONFIDENCE:.0%} band",
    )
    ax.plot(
        temp_c,
        np.where(trusted, lines.c_sat, np.nan),
        label="solubility curve",
        **style.SOLUBILITY.kwargs(),
    )
    if np.any(~trusted):
        ax.plot(
            temp_c,
            np.where(trusted, np.nan, lines.c_sat),
            label="solubility, extrapolated",
            **style.SOLUBILITY_EXTRAPOLATED.kwargs(),
        )
    if np.any(trusted):
        ax.plot(
            temp_c[trusted],
            lines.c_limit[trusted],
            label=f"metastable limit at {rate_k_per_s * 60.0:.2g} K/min",
            **style.METASTABLE_LIMIT.kwargs(),
        )


def _draw_path(
    ax: Axes, view: BatchView, line: style.Line, label: str, marker: str = "", band: bool = True
) -> None:
    outline = None
    if band:
        outline = path_band(
            view.temp_c,
            view.conc,
            BAND_STD * view.temp_std_k,
            BAND_STD * view.conc_std,
            MAX_BAND_SEGMENTS,
        )
    if outline is not None:
        ax.add_patch(
            PathPatch(outline, facecolor=line.color, alpha=style.BAND_ALPHA, edgecolor="none")
        )
    kwargs = line.kwargs()
    if marker:
        kwargs.update(
            marker=marker,
            markevery=max(1, len(view.temp_c) // 12),
            markersize=5,
            markerfacecolor="white",
        )
    ax.plot(view.temp_c, view.conc, label=label, **kwargs)


def phase_diagram(
    zone: MetastableZone,
    views: Sequence[BatchView],
    rate_k_per_s: float,
    *,
    envelope: Envelope | None = None,
    checks: Sequence[EnvelopeCheck] = (),
    prefix: str = "phase",
) -> str:
    """The phase diagram (module docstring) as inline SVG.

    One view: its path, band, analyzer readings, seed point and peak. Several: their paths
    (each its own colour, dash and marker; no bands, which would hide one another), the
    envelope if given, and where each checked batch left it.

    Parameters
    ----------
    zone : the metastable zone, holding the solubility curve
    views : the batches
    rate_k_per_s : cooling rate at which the metastable limit is drawn [K/s]
    envelope : the good batches' envelope
    checks : batches held against it (their excursions are marked)
    prefix : id prefix of the SVG (unique in the page)
    """
    single = len(views) == 1
    with rc_context(RC_PARAMS):
        figure = Figure(figsize=(7.6, 5.0), layout="constrained")
        ax = figure.add_subplot()
        temp_lo, temp_hi = _temp_range(views, envelope)
        _draw_thermodynamics(ax, zone, temp_lo, temp_hi, rate_k_per_s)
        if envelope is not None:
            _draw_envelope(ax, envelope, zone)
        for i, view in enumerate(views):
            if single:
                _draw_single(ax, view)
            else:
                line = style.BATCH_LINES[i % len(style.BATCH_LINES)]
                marker = style.BATCH_MARKERS[i % len(style.BATCH_MARKERS)]
                _draw_path(ax, view, line, view.batch, marker, band=False)
        _mark_excursions(ax, views, checks)
        ax.set_xlim(temp_lo, temp_hi)
        _fit_conc_axis(ax, views)
        ax.set_xlabel("temperature [°C]")
        ax.set_ylabel("dissolved solute c [kg/kg solvent]")
        ax.set_title("Phase diagram: concentration against temperature", loc="left")
        ax.legend(loc="lower right", ncols=1 if single else 2)
        label = "Phase diagram of " + ", ".join(v.batch for v in views)
        return inline_svg(figure, prefix, label)


ENVELOPE_POINTS_PER_BIN = 6
"""Temperatures per bin at which the envelope's edges are drawn (they follow the curve)."""


def _draw_envelope(ax: Axes, envelope: Envelope, zone: MetastableZone) -> None:
    """The envelope's sigma range per bin, drawn back as concentrations along the curve."""
    edges = envelope.edges_c
    fractions = np.linspace(0.0, 1.0, ENVELOPE_POINTS_PER_BIN)
    temp_c = (edges[:-1, None] + np.diff(edges)[:, None] * fractions).ravel()
    c_sat = zone.solubility.c_sat(temp_c + ZERO_CELSIUS_K)
    low = c_sat * (1.0 + np.repeat(envelope.low, ENVELOPE_POINTS_PER_BIN))
    high = c_sat * (1.0 + np.repeat(envelope.high, ENVELOPE_POINTS_PER_BIN))
    ax.fill_between(
        temp_c,
        low,
        high,
        facecolor="none",
        edgecolor=style.GREY,
        hatch="////",
        linewidth=0.0,
        label=f"envelope of good batches ({len(envelope.batches)})",
    )
    for edge in (low, high):
        ax.plot(temp_c, edge, **style.ENVELOPE_EDGE.kwargs())


def _draw_single(ax: Axes, view: BatchView) -> None:
    points = view.analyzer
    for shown, look, label in (
        (points.accepted & points.estimating, style.READINGS, "analyzer readings (as read)"),
        (
            ~points.estimating,
            style.READINGS_NOT_ESTIMATING,
            "analyzer, filter not running (heating, dissolving)",
        ),
        (
            points.estimating & ~points.accepted,
            style.READINGS_REJECTED,
            "analyzer readings rejected",
        ),
    ):
        if np.any(shown):
            ax.plot(points.temp_c[shown], points.conc[shown], label=label, **look.kwargs())
    _draw_path(ax, view, style.ESTIMATE, f"estimated path, {CONFIDENCE:.0%} band")
    for point, look, label, text, offset in (
        (view.seed, style.SEED_POINT, "seed point", "seed", (9, 7)),
        (view.peak, style.PEAK_POINT, "peak sigma", "peak σ {:.4f}", (-10, -16)),
    ):
        if point is None:
            continue
        ax.plot(point.temp_c, point.conc, label=label, **look.kwargs())
        ax.annotate(
            text.format(point.sigma),
            (point.temp_c, point.conc),
            xytext=offset,
            textcoords="offset points",
            ha="left" if offset[0] > 0 else "right",
        )


def _fit_conc_axis(ax: Axes, views: Sequence[BatchView]) -> None:
    """Concentration axis from the batches' paths and readings (not the curve's far ends)."""
    parts = [v.conc for v in views] + [v.analyzer.conc for v in views]
    values = np.concatenate(parts) if parts else np.array([])
    values = values[np.isfinite(values)]
    if len(values):
        lo, hi = float(values.min()), float(values.max())
        pad = 0.08 * (hi - lo or abs(hi) or 1.0)
        ax.set_ylim(lo - pad, hi + pad)


def _mark_excursions(ax: Axes, views: Sequence[BatchView], checks: Sequence[EnvelopeCheck]) -> None:
    """Each stretch outside the envelope as a broad band under the batch's path, and a cross
    with the batch's name where it first leaves."""
    by_batch = {v.batch: v for v in views}
    labelled = False
    for check in checks:
        view = by_batch.get(check.batch)
        if view is None or not check.excursions:
            continue
        for excursion in check.excursions:
            inside = (view.time_s >= excursion.start_s) & (view.time_s <= excursion.end_s)
            ax.plot(
                np.where(inside, view.temp_c, np.nan),
                np.where(inside, view.conc, np.nan),
                color=style.VERMILLION,
                linewidth=6.0,
                alpha=0.45,
                solid_capstyle="round",
                zorder=1.5,
                label=None if labelled else "outside the envelope",
            )
            labelled = True
        first = check.excursions[0]
        at = int(np.argmin(np.abs(view.time_s - first.start_s)))
        ax.plot(view.temp_c[at], view.conc[at], **style.LEAVES_ENVELOPE.kwargs())
        ax.annotate(
            check.batch,
            (view.temp_c[at], view.conc[at]),
            xytext=(6, 6),
            textcoords="offset points",
            fontsize=7,
        )


def trends(view: BatchView, sigma_high_fraction: float, *, prefix: str = "trend") -> str:
    """Phases, sigma and temperatures of one batch against time (module docstring), as SVG.

    Parameters
    ----------
    view : the batch
    sigma_high_fraction : the sigma-high alarm's level, as a fraction of the limit [-]
    prefix : id prefix of the SVG
    """
    with rc_context(RC_PARAMS):
        figure = Figure(figsize=(7.6, 6.4), layout="constrained")
        strip, ax_sigma, ax_temp = figure.subplots(
            3, 1, sharex=True, gridspec_kw={"height_ratios": [0.5, 4.0, 3.0]}
        )
        hours = view.time_s / 3600.0
        _phase_strip(strip, view)
        _sigma_panel(ax_sigma, view, hours, sigma_high_fraction)
        _temperature_panel(ax_temp, view, hours)
        ax_temp.set_xlabel("time since the batch's first record [h]")
        return inline_svg(figure, prefix, f"Supersaturation and temperatures of {view.batch}")


def _phase_strip(ax: Axes, view: BatchView) -> None:
    ax.set_yticks([])
    ax.grid(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_visible(False)
    ax.tick_params(axis="x", which="both", length=0)
    total = max((p.end_s for p in view.phases), default=1.0) / 3600.0 or 1.0
    for i, span in enumerate(view.phases):
        start, end = span.start_s / 3600.0, span.end_s / 3600.0
        ax.axvspan(start, end, color=PHASE_SHADES[i % 2], linewidth=0)
        ax.axvline(start, color=style.GREY, linewidth=0.5)
        if (end - start) / total > LABEL_WIDTH_PER_CHAR * len(span.name) + 0.006:
            ax.text(0.5 * (start + end), 0.5, span.name, ha="center", va="center", fontsize=6.5)
    ax.set_title("Batch phases, supersaturation and temperatures", loc="left")


def _sigma_panel(ax: Axes, view: BatchView, hours: FloatArray, sigma_high_fraction: float) -> None:
    sigma, std, limit = view.sigma, view.sigma_std, view.sigma_limit
    ax.fill_between(
        hours,
        sigma - BAND_STD * std,
        sigma + BAND_STD * std,
        color=style.ESTIMATE.color,
        alpha=style.BAND_ALPHA,
        linewidth=0,
        label=f"{CONFIDENCE:.0%} band",
    )
    ax.plot(hours, sigma, label="sigma (estimated)", **style.ESTIMATE.kwargs())
    ax.plot(hours, limit, label="metastable limit", **style.METASTABLE_LIMIT.kwargs())
    ax.plot(
        hours,
        sigma_high_fraction * limit,
        label=f"sigma-high alarm ({sigma_high_fraction:.0%} of limit)",
        **style.SIGMA_HIGH.kwargs(),
    )
    ax.axhline(0.0, **style.ZERO.kwargs())
    with np.errstate(invalid="ignore"):
        above = sigma > limit
    if np.any(above):
        # a pale region (prints as pale grey) and a solid bar along the bottom (prints black)
        ax.fill_between(
            hours,
            0,
            1,
            where=above,
            transform=ax.get_xaxis_transform(),
            color=style.VERMILLION,
            alpha=0.12,
            linewidth=0,
        )
        ax.fill_between(
            hours,
            0,
            0.035,
            where=above,
            transform=ax.get_xaxis_transform(),
            color=style.VERMILLION,
            linewidth=0,
            label="above the limit (bar)",
        )
    if view.peak is not None:
        ax.plot(
            view.peak.time_s / 3600.0,
            view.peak.sigma,
            label=f"peak {view.peak.sigma:.4f}",
            **style.PEAK_POINT.kwargs(),
        )
    _alarm_marks(ax, view)
    finite = np.concatenate([sigma[np.isfinite(sigma)], limit[np.isfinite(limit)]])
    if len(finite):
        top = min(float(np.max(finite)), 2.0 * float(np.nanmax(np.abs(sigma))) + 0.05)
        ax.set_ylim(min(float(np.min(finite)), 0.0) - 0.02, top * 1.18 + 0.01)
    ax.set_ylabel("relative supersaturation σ [-]")
    ax.legend(loc="lower left", bbox_to_anchor=(0.0, 1.0), ncols=3, borderaxespad=0.2)


def _alarm_marks(ax: Axes, view: BatchView) -> None:
    """Raised alarms as filled markers along the top of the panel, cleared ones hollow, each
    numbered as in the alarm table."""
    if view.advisor is None:
        return
    seen: set[str] = set()
    for n, mark in enumerate(view.advisor.alarms, start=1):
        if mark.event not in ("raised", "cleared"):
            continue
        look = style.priority_style(mark.priority)
        hours = mark.time_s / 3600.0
        raised = mark.event == "raised"
        ax.axvline(hours, color=look.color, linewidth=0.6, linestyle="-" if raised else ":")
        key = f"{look.label} {mark.event}"
        ax.plot(
            hours,
            0.97,
            transform=ax.get_xaxis_transform(),
            linestyle="none",
            marker=look.marker,
            markersize=7,
            markeredgecolor=look.color,
            markerfacecolor=look.color if raised else "white",
            clip_on=False,
            label=None if key in seen else f"alarm {look.label.lower()}: {mark.event}",
        )
        seen.add(key)
        ax.annotate(
            str(n),
            (hours, 0.97),
            xycoords=ax.get_xaxis_transform(),
            xytext=(0, -12),
            textcoords="offset points",
            ha="center",
            fontsize=6.5,
        )


def _temperature_panel(ax: Axes, view: BatchView, hours: FloatArray) -> None:
    ax.plot(hours, view.temp_c, label="reactor (estimated)", **style.ESTIMATE.kwargs())
    ax.plot(hours, view.jacket_temp_c, label="jacket (measured)", **style.JACKET.kwargs())
    advisor = view.advisor
    if advisor is not None and np.any(np.isfinite(advisor.setpoint_c)):
        ax.step(
            advisor.time_s / 3600.0,
            advisor.setpoint_c,
            where="post",
            label=f"proposed setpoint ({advisor.origin})",
            **style.SETPOINT.kwargs(),
        )
    else:
        ax.plot([], [], label="proposed setpoint: advisor not run", **style.SETPOINT.kwargs())
    ax.set_ylabel("temperature [°C]")
    ax.legend(loc="upper right")
