"""matplotlib figures as SVG elements to inline in an HTML page.

matplotlib writes a standalone SVG document; a page that holds several of them inline needs
them cleaned: no XML declaration or DOCTYPE (which also name the W3C's DTD by URL), no
namespace declarations (the HTML parser gives inline ``<svg>`` its namespace), SVG 2's plain
``href`` for ``xlink:href``, and element ids made unique per figure (matplotlib numbers them
afresh in each file, so two figures would both define ``#figure_1``). Text is drawn as paths
(``svg.fonttype = "path"``): the page needs no font, and prints as it shows. Figures are made
with :class:`matplotlib.figure.Figure` directly, never through pyplot, so no backend, display or
global figure state is involved.
"""

from __future__ import annotations

import html
import io
import re

from matplotlib.figure import Figure

RC_PARAMS = {
    "svg.fonttype": "path",
    "svg.hashsalt": "sigmatrack",  # stable ids, so the same batch gives the same page
    "font.family": "DejaVu Sans",  # shipped with matplotlib
    "font.size": 9.0,
    "axes.titlesize": 10.0,
    "axes.labelsize": 9.0,
    "legend.fontsize": 8.0,
    "xtick.labelsize": 8.0,
    "ytick.labelsize": 8.0,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": "#E4E4E4",
    "grid.linewidth": 0.6,
    "legend.frameon": True,
    "legend.framealpha": 0.92,
    "legend.edgecolor": "#BBBBBB",
}
"""matplotlib settings for every figure of a report (passed to ``matplotlib.rc_context``)."""

_METADATA = {"Date": None, "Creator": None, "Format": None, "Type": None}

_PROLOGUE = re.compile(r"\A.*?(?=<svg\b)", re.DOTALL)
_NAMESPACE = re.compile(r'\s+xmlns(?::\w+)?="[^"]*"')
_ID = re.compile(r'\bid="([^"]+)"')
_SIZE = re.compile(r'(<svg\b[^>]*?)\s+width="[^"]*"\s+height="[^"]*"')


def inline_svg(figure: Figure, prefix: str, label: str) -> str:
    """``figure`` as an ``<svg>`` element for inlining (module docstring).

    Parameters
    ----------
    figure : the figure (closed by the caller)
    prefix : prepended to every id, unique within the page (letters, digits, ``-``)
    label : what the figure shows, for screen readers and as its tooltip
    """
    if not re.fullmatch(r"[A-Za-z][A-Za-z0-9-]*", prefix):
        raise ValueError(f"id prefix must be letters, digits and '-'; got {prefix!r}")
    stream = io.StringIO()
    figure.savefig(stream, format="svg", metadata=_METADATA)
    text = _PROLOGUE.sub("", stream.getvalue(), count=1)
    text = _NAMESPACE.sub("", text)
    text = text.replace("xlink:href=", "href=")
    ids = set(_ID.findall(text))

    def rename(match: re.Match[str]) -> str:
        name = match.group(2)
        return f"{match.group(1)}{prefix}-{name}" if name in ids else match.group(0)

    text = _ID.sub(lambda m: f'id="{prefix}-{m.group(1)}"', text)
    text = re.sub(r'(href="#)([^"]+)', rename, text)
    text = re.sub(r"(url\(#)([^)]+)", rename, text)
    text = _SIZE.sub(r'\1 width="100%"', text, count=1)
    escaped = html.escape(label, quote=True)
    return text.replace("<svg ", f'<svg role="img" aria-label="{escaped}" ', 1).replace(
        ">", f"><title>{html.escape(label)}</title>", 1
    )
