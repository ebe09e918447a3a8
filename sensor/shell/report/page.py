"""The report and comparison pages: one self-contained HTML file each.

Everything is inline: the CSS, the drawings (SVG, text drawn as paths), the tables. The page
loads nothing: no font, script, stylesheet, image or link to fetch, so it opens on a plant
network with no internet, and prints (A4, black and white distinguishable). Numbers shown are
the replay summary's (:class:`~sensor.shell.replay.BatchSummary`), each also carried exactly in a
``data-value`` attribute beside its rounded text, keyed by the summary's field name in
``data-key``.
"""

from __future__ import annotations

import html
import math
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime
from importlib.metadata import version

import sensor.shell.report.style as style
from sensor.shell.config import SiteConfig
from sensor.shell.report.envelope import Envelope, EnvelopeCheck
from sensor.shell.report.view import BatchView

CAUTION = (
    "sigmatrack is an advisory tool, not a safety function. It never drives a valve, a pump or "
    "the jacket: the DCS keeps the temperature loop and the recipe, and the safety instrumented "
    "system keeps protection. These figures are estimates from a model and its data; judge "
    "them with the plant's own records, and act only through the site's procedures, its "
    "management of change, local codes and licensed practice. Crystallizers can hold "
    "flammable solvents, pressure and fast-cooling jackets."
)

CSS = """
:root { --ink: #1B1B1B; --muted: #555555; --rule: #BFBFBF; --paper: #FFFFFF; --tint: #F4F4F4; }
* { box-sizing: border-box; }
body { margin: 0 auto; max-width: 60rem; padding: 1.2rem 1.4rem 3rem; color: var(--ink);
  background: var(--paper); font: 15px/1.45 system-ui, "Segoe UI", "DejaVu Sans", sans-serif; }
header { border-bottom: 3px solid var(--ink); padding-bottom: .6rem; margin-bottom: 1rem; }
.kicker { margin: 0; font-size: .8rem; letter-spacing: .08em; text-transform: uppercase;
  color: var(--muted); }
h1 { margin: .1rem 0 .5rem; font-size: 1.6rem; }
h2 { font-size: 1.15rem; margin: 1.6rem 0 .5rem; border-bottom: 1px solid var(--rule);
  padding-bottom: .2rem; }
dl.facts { display: grid; grid-template-columns: max-content 1fr; gap: .1rem 1rem; margin: 0;
  font-size: .85rem; }
dl.facts dt { color: var(--muted); }
dl.facts dd { margin: 0; overflow-wrap: anywhere; }
.caution { border: 2px solid var(--ink); border-left-width: .5rem; padding: .5rem .8rem;
  font-size: .85rem; background: var(--tint); }
table { border-collapse: collapse; width: 100%; font-size: .88rem; }
th, td { text-align: left; padding: .25rem .5rem; border-bottom: 1px solid var(--rule);
  vertical-align: top; }
th { font-weight: 600; background: var(--tint); }
td.batch { white-space: nowrap; }
table.compare { font-size: .8rem; }
table.compare th, table.compare td { padding: .2rem .35rem; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
.kpi-grid { display: grid; grid-template-columns: 1fr 1fr; gap: 0 1.6rem; align-items: start; }
table.kpi td:first-child { width: 62%; }
.note { color: var(--muted); font-size: .8rem; }
figure { margin: .5rem 0 1rem; }
figure svg { display: block; width: 100%; height: auto; }
figcaption { font-size: .8rem; color: var(--muted); margin-top: .3rem; }
.badge { display: inline-block; min-width: 5.8rem; padding: 0 .35rem; border: 1.5px solid;
  border-left-width: .45rem; font-size: .78rem; font-weight: 600; letter-spacing: .03em; }
.flag { font-weight: 700; }
td.out { font-weight: 700; text-decoration: underline dotted; }
.error { border: 2px dashed var(--ink); padding: .5rem .8rem; }
footer { margin-top: 2rem; border-top: 1px solid var(--rule); padding-top: .5rem;
  font-size: .78rem; color: var(--muted); }
@media print {
  @page { size: A4; margin: 14mm 12mm; }
  body { max-width: none; padding: 0; font-size: 10.5pt; }
  h2 { break-after: avoid; }
  figure, table, .caution, tr { break-inside: avoid; }
  th, .caution { background: none; }
  .badge { border-color: var(--ink) !important; }
}
"""
"""The pages' style sheet (plain; greys and one ink colour, so it prints as it shows)."""


def esc(text: object) -> str:
    """HTML-escaped text."""
    return html.escape(str(text), quote=True)


def number(value: float | None, digits: int) -> str:
    """A value rounded for reading ("–" for none).

    >>> number(0.0857855, 4), number(None, 2), number(158.9015, 1)
    ('0.0858', '–', '158.9')
    """
    if value is None or not math.isfinite(value):
        return "–"
    return f"{value:.{digits}f}"


def cell(key: str, value: float | None, shown: str, extra_class: str = "") -> str:
    """A table cell showing ``shown`` and carrying ``value`` exactly (``repr``) under ``key``."""
    exact = "" if value is None else repr(float(value))
    classes = " ".join(c for c in ("num", extra_class) if c)
    return (
        f'<td class="{classes}" data-key="{esc(key)}" data-value="{esc(exact)}">{esc(shown)}</td>'
    )


@dataclass(frozen=True)
class Figure:
    """A captioned drawing: its inline SVG and what to say under it."""

    svg: str
    caption: str


@dataclass(frozen=True)
class Kpi:
    """One key figure: the summary field it comes from, a scale for showing it, and how."""

    key: str
    name: str
    short: str
    unit: str
    scale: float
    digits: int
    note: str = ""
    compared: bool = True
    """shown in the comparison table too"""

    def value(self, view: BatchView) -> float | None:
        raw = getattr(view.summary, self.key)
        return None if raw is None else float(raw)

    def shown(self, view: BatchView) -> str:
        raw = self.value(view)
        return number(None if raw is None else raw * self.scale, self.digits)


KPIS = (
    Kpi("peak_sigma", "peak supersaturation σ", "peak σ", "–", 1.0, 4),
    Kpi("time_above_limit_s", "time beyond the metastable limit", "beyond limit", "min", 1 / 60,
        1, "sigma above the limit at the current cooling rate"),
    Kpi("sigma_integral_s", "integral of supersaturation ∫σ⁺dt", "∫σ⁺dt", "h", 1 / 3600, 3,
        "time integral of positive sigma: the driving force the crystals had"),
    Kpi("duration_s", "batch time estimated", "batch time", "h", 1 / 3600, 2,
        "from the filter's start to the last record"),
    Kpi("final_yield", "yield", "yield", "%", 100.0, 1,
        "crystallised share of the dissolved solute, seed excluded"),
    Kpi("final_yield_kg", "crystals grown", "crystals", "kg", 1.0, 1, "seed excluded",
        compared=False),
    Kpi("final_sigma", "final supersaturation σ", "final σ", "–", 1.0, 4, compared=False),
    Kpi("final_analyzer_bias", "analyzer bias at the end", "bias", "kg/kg", 1.0, 5,
        "estimated calibration offset of the analyzer", compared=False),
    Kpi("nis_ok_fraction", "estimate consistent (NIS ok)", "NIS ok", "%", 100.0, 1,
        "share of samples where the analyzer agreed with the model within its band"),
    Kpi("advised_s", "advisor would have written", "advised", "h", 1 / 3600, 2,
        "time the guard would have written its setpoint (shadow run; – when not run)",
        compared=False),
    Kpi("fallback_s", "advisor stepped aside", "fallback", "h", 1 / 3600, 2,
        "time the guard would have been in its fallback, in doubt", compared=False),
    Kpi("rejected", "readings rejected", "rejected", "", 1.0, 0,
        "readings that arrived and did not reach the filter", compared=False),
)  # fmt: skip
"""The key figures of a batch, in the order shown; every one is a field of the summary."""


def alarm_counts(view: BatchView) -> list[tuple[str, str, int]]:
    """(alarm, priority, times raised) of a batch's alarm events, most urgent first."""
    if view.advisor is None:
        return []
    raised = Counter((m.alarm, m.priority) for m in view.advisor.alarms if m.event == "raised")
    rank = {"high": 0, "medium": 1, "low": 2}
    return sorted(
        ((alarm, priority, n) for (alarm, priority), n in raised.items()),
        key=lambda a: (rank.get(a[1], 3), a[0]),
    )


def badge(priority: str) -> str:
    """A priority as symbol, text label and coloured border: never colour alone."""
    look = style.priority_style(priority)
    return (
        f'<span class="badge" style="border-color: {look.color}">'
        f"{esc(look.symbol)} {esc(look.label)}</span>"
    )


def _facts(rows: Sequence[tuple[str, str]]) -> str:
    items = "".join(f"<dt>{esc(k)}</dt><dd>{esc(v)}</dd>" for k, v in rows)
    return f'<dl class="facts">{items}</dl>'


def _document(title: str, kicker: str, facts: Sequence[tuple[str, str]], body: str) -> str:
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>{esc(title)}</title>\n<style>{CSS}</style>\n</head>\n<body>\n"
        f'<header><p class="kicker">{esc(kicker)}</p><h1>{esc(title)}</h1>'
        f"{_facts(facts)}</header>\n"
        f'<aside class="caution" role="note"><strong>Advisory record.</strong> {esc(CAUTION)}'
        "</aside>\n"
        f"{body}\n"
        f"<footer>Made by sigmatrack {esc(version('sigmatrack'))}. {esc(CAUTION)}</footer>\n"
        "</body>\n</html>\n"
    )


def _site_facts(site: SiteConfig, made: datetime | None) -> list[tuple[str, str]]:
    rows = [
        ("site", site.site.name),
        ("compound", f"{site.compound.name} in {site.compound.solvent}"),
        ("site file", f"{site.path.name} (sha256 {site.sha256[:16]}…)"),
    ]
    if made is not None:
        rows.append(("made", made.isoformat(timespec="seconds")))
    return rows


def _kpi_table(view: BatchView) -> str:
    rows = []
    for kpi in KPIS:
        unit = f" [{kpi.unit}]" if kpi.unit and kpi.unit != "–" else ""
        note = f'<div class="note">{esc(kpi.note)}</div>' if kpi.note else ""
        rows.append(
            f"<tr><td>{esc(kpi.name)}{esc(unit)}{note}</td>"
            f"{cell(kpi.key, kpi.value(view), kpi.shown(view))}</tr>"
        )
    if view.peak is not None and view.summary.peak_sigma_timestamp is not None:
        rows.append(
            f'<tr><td>peak reached at</td><td class="num">'
            f'{esc(view.summary.peak_sigma_timestamp)}<div class="note">'
            f"{view.peak.time_s / 3600:.2f} h, {view.peak.temp_c:.1f} °C</div></td></tr>"
        )
    half = (len(rows) + 1) // 2
    tables = "".join(
        f'<table class="kpi"><tbody>{"".join(part)}</tbody></table>'
        for part in (rows[:half], rows[half:])
    )
    return f'<div class="kpi-grid">{tables}</div>'


def _alarm_section(view: BatchView) -> str:
    if view.advisor is None:
        return (
            "<p>No alarm events: the advisor's alarms were not run for this batch (shadow "
            "mode in replay, or the live service's record in the store, supply them).</p>"
        )
    counts = alarm_counts(view)
    origin = esc(view.advisor.origin)
    if not view.advisor.alarms:
        return f"<p>No alarm was raised ({origin}).</p>"
    summary_rows = "".join(
        f"<tr><td>{esc(alarm)}</td><td>{badge(priority)}</td>"
        f'<td class="num" data-key="alarms_raised.{esc(alarm)}" data-value="{n}">{n}</td></tr>'
        for alarm, priority, n in counts
    )
    event_rows = "".join(
        f'<tr><td class="num">{n}</td><td class="num">{m.time_s / 3600:.3f}</td>'
        f"<td>{esc(m.alarm)}</td><td>{badge(m.priority)}</td><td>{esc(m.event)}</td></tr>"
        for n, m in enumerate(view.advisor.alarms, start=1)
    )
    return (
        f"<p>Alarm events {origin}. Numbers match the marks on the supersaturation trend "
        "(filled: raised, hollow: cleared).</p>"
        "<h3>Raised, by alarm</h3>"
        f"<table><thead><tr><th>alarm</th><th>priority</th><th>times raised</th></tr></thead>"
        f"<tbody>{summary_rows}</tbody></table>"
        "<h3>Every event</h3>"
        "<table><thead><tr><th>#</th><th>time [h]</th><th>alarm</th><th>priority</th>"
        f"<th>event</th></tr></thead><tbody>{event_rows}</tbody></table>"
    )


def _quality_section(view: BatchView) -> str:
    by_reason = view.summary.rejected_by_reason
    if by_reason:
        rows = "".join(
            f"<tr><td>{esc(reason)}</td>"
            f'<td class="num" data-key="rejected_by_reason.{esc(reason)}" data-value="{n}">'
            f"{n}</td></tr>"
            for reason, n in sorted(by_reason.items(), key=lambda r: -r[1])
        )
        table = (
            "<table><thead><tr><th>reason a reading was rejected</th><th>readings</th></tr>"
            f"</thead><tbody>{rows}</tbody></table>"
        )
    else:
        table = "<p>No reading was rejected.</p>"
    return (
        f'{table}<p class="note">Bands are ±2 standard deviations (about 95 %) and hold that '
        "share of the time only while the estimate is consistent (NIS ok) and the model's "
        "assumptions hold; sigma's band includes the solubility curve's own uncertainty. "
        "Analyzer readings are drawn as read, at the reactor temperature of the instant they "
        "were sampled (their arrival minus the analyzer's delay), not corrected for the "
        "estimated bias.</p>"
    )


def report_page(
    site: SiteConfig, view: BatchView, figures: Sequence[Figure], made: datetime | None = None
) -> str:
    """The HTML of one batch's report.

    Parameters
    ----------
    site : the site file the batch was replayed with
    view : the batch
    figures : its drawings, in order (phase diagram, trends)
    made : when the report was made (shown; ``None`` leaves it out, for a reproducible page)
    """
    facts = [
        ("unit", view.unit),
        ("source", view.source),
        ("first record", view.start_timestamp),
        ("records", f"{view.samples:,}"),
        *_site_facts(site, made),
    ]
    if not view.ok:
        body = (
            f'<section id="error"><h2>No estimates</h2><p class="error">'
            f"{esc(view.summary.error or 'the filter never started')}</p></section>"
        )
        return _document(f"Batch {view.batch}", "sigmatrack batch report", facts, body)
    sections = [
        f'<section id="key-figures"><h2>Key figures</h2>{_kpi_table(view)}</section>',
        *(
            f'<section class="drawing"><figure>{f.svg}<figcaption>{esc(f.caption)}'
            "</figcaption></figure></section>"
            for f in figures
        ),
        f'<section id="alarms"><h2>Alarms</h2>{_alarm_section(view)}</section>',
        f'<section id="data-quality"><h2>Data quality</h2>{_quality_section(view)}</section>',
    ]
    return _document(f"Batch {view.batch}", "sigmatrack batch report", facts, "\n".join(sections))


def _range(values: Sequence[float]) -> tuple[float, float] | None:
    finite = [v for v in values if math.isfinite(v)]
    return (min(finite), max(finite)) if finite else None


COMPARED = tuple(k for k in KPIS if k.compared)
"""The key figures of the comparison table."""


def _comparison_table(views: Sequence[BatchView], good: Sequence[str]) -> str:
    good_views = [v for v in views if v.batch in good and v.ok]
    ranges = {}
    for kpi in COMPARED:
        found = [kpi.value(v) for v in good_views]
        ranges[kpi.key] = _range([f for f in found if f is not None])
    head = "".join(
        f'<th title="{esc(k.name)}">{esc(k.short)}'
        f"{'' if k.unit in ('', '–') else f'<br>[{esc(k.unit)}]'}</th>"
        for k in COMPARED
    )
    key = "; ".join(f"{k.short}: {k.name}" for k in COMPARED)
    rows = []
    for view in views:
        cells = []
        for kpi in COMPARED:
            value, shown, mark = kpi.value(view), kpi.shown(view), ""
            bounds = ranges[kpi.key]
            if bounds is not None and value is not None and view.batch not in good:
                if value > bounds[1]:
                    mark, shown = "out", f"▲ {shown}"
                elif value < bounds[0]:
                    mark, shown = "out", f"▼ {shown}"
            cells.append(cell(kpi.key, value, shown, mark))
        role = "good" if view.batch in good else ("no estimates" if not view.ok else "checked")
        rows.append(
            f'<tr data-batch="{esc(view.batch)}"><td class="batch">{esc(view.batch)}</td>'
            f"<td>{role}</td>"
            f"{''.join(cells)}</tr>"
        )
    range_cells = []
    for kpi in COMPARED:
        bounds = ranges[kpi.key]
        text = (
            "–"
            if bounds is None
            else f"{number(bounds[0] * kpi.scale, kpi.digits)} – "
            f"{number(bounds[1] * kpi.scale, kpi.digits)}"
        )
        range_cells.append(f'<td class="num">{esc(text)}</td>')
    rows.append(f"<tr><th>good batches' range</th><th></th>{''.join(range_cells)}</tr>")
    return (
        '<div style="overflow-x: auto"><table class="compare">'
        f"<thead><tr><th>batch</th><th>role</th>{head}</tr></thead>"
        f"<tbody>{''.join(rows)}</tbody></table></div>"
        '<p class="note">▲ above / ▼ below the range of the good batches (bold, underlined '
        f"dotted). Columns: {esc(key)}.</p>"
    )


def _checks_section(
    envelope: Envelope | None, problem: str | None, checks: Sequence[EnvelopeCheck], why: str
) -> str:
    if envelope is None:
        return f"<p>{esc(why)} No envelope: {esc(problem or '')}.</p>"
    rows = []
    for check in checks:
        if check.inside:
            rows.append(
                f'<tr data-batch="{esc(check.batch)}"><td>{esc(check.batch)}</td>'
                f'<td class="num">{check.covered_fraction:.0%}</td>'
                f"<td>inside the envelope wherever it covers the path</td></tr>"
            )
            continue
        legs = "".join(
            f"<li>#{n}: {e.start_s / 3600:.2f}–{e.end_s / 3600:.2f} h, "
            f'{e.start_temp_c:.1f} → {e.end_temp_c:.1f} °C, <span class="flag">{esc(e.side)}'
            f"</span> the envelope by up to σ {e.largest_sigma:.4f}</li>"
            for n, e in enumerate(check.excursions, start=1)
        )
        rows.append(
            f'<tr data-batch="{esc(check.batch)}"><td>{esc(check.batch)}</td>'
            f'<td class="num">{check.covered_fraction:.0%}</td>'
            f"<td>leaves it {len(check.excursions)} time(s), {check.outside_fraction:.1%} of "
            f"the covered path:<ul>{legs}</ul></td></tr>"
        )
    table = (
        "<table><thead><tr><th>batch</th><th>path covered</th><th>against the envelope</th>"
        f"</tr></thead><tbody>{''.join(rows)}</tbody></table>"
        if rows
        else "<p>Every batch is a good one: none is held against the envelope.</p>"
    )
    return (
        f"<p>Envelope of {len(envelope.batches)} good batches ({esc(', '.join(envelope.batches))})"
        f'. {esc(why)}</p>{table}<p class="note">A batch leaves the envelope where its own '
        "95 % band lies wholly above (more supersaturated than any good batch at that "
        "temperature) or below it, after seeding. Temperatures no good batch reached are not "
        "covered. Leaving it makes a batch different, not necessarily bad.</p>"
    )


def comparison_page(
    site: SiteConfig,
    views: Sequence[BatchView],
    good: Sequence[str],
    good_reason: str,
    figure: Figure,
    envelope: Envelope | None,
    problem: str | None,
    checks: Sequence[EnvelopeCheck],
    made: datetime | None = None,
) -> str:
    """The HTML of a comparison of batches.

    Parameters
    ----------
    site : the site file
    views : the batches, in the order given
    good : the good batches' ids
    good_reason : how they were chosen, in plain words
    figure : the overlaid phase diagram
    envelope : the good batches' envelope (``None`` when there is none)
    problem : why there is none
    checks : the other batches held against it
    made : when the page was made (``None`` leaves it out)
    """
    facts = [("batches", str(len(views))), *_site_facts(site, made)]
    failed = [v for v in views if not v.ok]
    failed_note = (
        '<p class="error">No estimates for: '
        + esc("; ".join(f"{v.batch} ({v.summary.error})" for v in failed))
        + "</p>"
        if failed
        else ""
    )
    body = "\n".join(
        [
            f'<section id="key-figures"><h2>Key figures</h2>{failed_note}'
            f"{_comparison_table(views, good)}</section>",
            f'<section class="drawing"><figure>{figure.svg}<figcaption>{esc(figure.caption)}'
            "</figcaption></figure></section>",
            f'<section id="envelope"><h2>Against the good batches</h2>'
            f"{_checks_section(envelope, problem, checks, good_reason)}</section>",
        ]
    )
    return _document(
        f"Comparison of {len(views)} batches", "sigmatrack batch comparison", facts, body
    )
