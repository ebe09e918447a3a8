"""The live page itself: one HTML document with its style sheet and script inline.

It loads nothing else: no font (the system's sans-serif), no image, no library; the drawings
are SVG elements the script makes. The Content-Security-Policy sent with it allows exactly its
one script and one style sheet (by their SHA-256 hashes, CSP Level 3) and connections back to
this server, so the browser itself refuses anything else.

What it shows, per unit: a line of status words (no data yet, communication lost, not
updating, inputs stale, health), the current values (sigma with its 95 % band, the metastable
limit, the margins, temperature, the proposal and the guard's decision with its reasons), the
trends of the last hours (sigma, its band and limit; temperature, proposal and guard setpoint),
the phase diagram (the site's solubility curve with its band, the metastable limit, the recent
path and the live point), the alarms (priority as a symbol and a word, state in words, help
text) with acknowledge, shelve and unshelve for a logged-in operator, and the latest alarm
events. Colours and dash patterns are the reports' (:mod:`sensor.shell.report.style`).
"""

from __future__ import annotations

import base64
import hashlib
import json
from dataclasses import dataclass
from html import escape
from importlib import resources

from controller.alarm_set import ADVISORY_NOTE
from sensor.shell.report import style

SHELVE_CHOICES_S = (900, 3600, 4 * 3600, 8 * 3600)
"""The shelving times the page offers [s]."""


@dataclass(frozen=True)
class PageSetup:
    """What the page is told once, when it is served.

    Attributes
    ----------
    title : the heading (the site's name)
    units : the unit ids, in the order shown
    window_s : the trends' window [s]
    stale_after_s : a unit with nothing new for this long is marked "not updating" [s]
    trend_fields : the columns of a trend row
    max_rows : trend rows a unit's buffer holds (the page keeps no more)
    events_kept : alarm events kept per unit
    login : someone can log in (a users file is set)
    """

    title: str
    units: tuple[str, ...]
    window_s: float
    stale_after_s: float
    trend_fields: tuple[str, ...]
    max_rows: int
    events_kept: int
    login: bool


@dataclass(frozen=True)
class PageParts:
    """The page's HTML and the Content-Security-Policy that goes with it."""

    html: str
    policy: str


def _line(line: style.Line) -> dict[str, object]:
    return {"color": line.color, "dash": style.svg_dasharray(line), "width": line.linewidth}


def palette() -> dict[str, object]:
    """The reports' colours, dash patterns and alarm palette, for the page's script."""
    return {
        "estimate": _line(style.ESTIMATE),
        "limit": _line(style.METASTABLE_LIMIT),
        "solubility": _line(style.SOLUBILITY),
        "solubility_extrapolated": _line(style.SOLUBILITY_EXTRAPOLATED),
        "proposal": _line(style.SETPOINT),
        "guard_setpoint": _line(style.GUARD_SETPOINT),
        "zero": _line(style.ZERO),
        "band_alpha": style.BAND_ALPHA,
        "band_grey": style.GREY,
        "now": {"face": style.YELLOW, "edge": style.BLACK},
        "priorities": {
            name or "unranked": {"color": p.color, "label": p.label, "symbol": p.symbol}
            for name, p in style.PRIORITY_STYLES.items()
        },
    }


ASSETS = resources.files("sensor.shell.live")
CSS_TEMPLATE = ASSETS.joinpath("page.css").read_text(encoding="utf-8")
"""The style sheet; ``--high: HIGH;`` and its siblings get the alarm palette's colours."""
SCRIPT = ASSETS.joinpath("page.js").read_text(encoding="utf-8")
"""The script: draws the charts, keeps the trends, logs in, acts on alarms."""


def _hash(text: str) -> str:
    return (
        "'sha256-" + base64.b64encode(hashlib.sha256(text.encode("utf-8")).digest()).decode() + "'"
    )


def _css() -> str:
    looks = {p.label: p.color for p in style.PRIORITY_STYLES.values()}
    css = CSS_TEMPLATE
    for label, color in looks.items():
        css = css.replace(f"--{label.lower()}: {label};", f"--{label.lower()}: {color};")
    return css


def page_response_parts(setup: PageSetup) -> PageParts:
    """The page for ``setup`` and its Content-Security-Policy."""
    config = {
        "units": list(setup.units),
        "window_s": setup.window_s,
        "stale_after_s": setup.stale_after_s,
        "trend_fields": list(setup.trend_fields),
        "login": setup.login,
        "palette": palette(),
        "shelve_choices_s": list(SHELVE_CHOICES_S),
        "max_rows": setup.max_rows,
        "events_kept": setup.events_kept,
    }
    data = json.dumps(config, allow_nan=False).replace("<", "\\u003c")
    css = _css()
    title = escape(setup.title)
    html = f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{title}: sigmatrack live</title>
<style>{css}</style>
</head>
<body>
<header>
<h1>{title}: sigmatrack live</h1>
<span id="link" role="status">CONNECTING</span>
<div id="login"></div>
</header>
<main></main>
<footer>
<p>{escape(ADVISORY_NOTE)}</p>
<p>Priorities are shown by a symbol and a word as well as a colour: ▲ HIGH, ◆ MEDIUM, ● LOW,
■ UNRANKED. Times are this computer's local time. Bands are 95 %.</p>
</footer>
<script type="application/json" id="setup">{data}</script>
<script>{SCRIPT}</script>
</body>
</html>
"""
    policy = (
        "default-src 'none'; "
        f"script-src {_hash(SCRIPT)}; "
        f"style-src {_hash(css)}; "
        "connect-src 'self'; "
        "img-src 'self'; "
        "base-uri 'none'; form-action 'self'; frame-ancestors 'none'"
    )
    return PageParts(html, policy)
