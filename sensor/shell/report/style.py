"""The look of sigmatrack's reports: colours, line styles, markers and the alarm palette.

Colours are taken from the colour-blind-safe palette of Okabe and Ito [1]_ (also in [2]_);
every series also differs by line style or marker, so that a page printed in black and white,
or read by someone who does not tell the colours apart, still tells them apart. Alarm
priorities have a colour, a marker shape and a text label each, and are never shown by colour
alone. The assignment of colours, shapes and labels is this project's own (README, "Reports").

References
----------
.. [1] M. Okabe, K. Ito, "Color Universal Design (CUD): how to make figures and presentations
   that are friendly to colorblind people", J*FLY, 2008.
.. [2] B. Wong, "Points of view: Color blindness", Nature Methods 8 (2011) 441.
"""

from __future__ import annotations

from dataclasses import dataclass

LineStyle = str | tuple[int, tuple[int, ...]]
"""A matplotlib line style: a name (``"-"``, ``"--"``) or a dash pattern (offset, on-off list)."""

BLACK = "#000000"
ORANGE = "#E69F00"
SKY_BLUE = "#56B4E9"
BLUISH_GREEN = "#009E73"
YELLOW = "#F0E442"
BLUE = "#0072B2"
VERMILLION = "#D55E00"
REDDISH_PURPLE = "#CC79A7"
GREY = "#6E6E6E"
LIGHT_GREY = "#D9D9D9"


@dataclass(frozen=True)
class Line:
    """How one series is drawn (matplotlib keywords)."""

    color: str
    linestyle: LineStyle = "-"
    linewidth: float = 1.2
    marker: str = ""

    def kwargs(self) -> dict[str, object]:
        return {
            "color": self.color,
            "linestyle": self.linestyle,
            "linewidth": self.linewidth,
            "marker": self.marker or "None",
        }


SOLUBILITY = Line(BLACK, "-", 1.4)
SOLUBILITY_EXTRAPOLATED = Line(BLACK, ":", 1.4)
METASTABLE_LIMIT = Line(VERMILLION, "--", 1.6)
ESTIMATE = Line(BLUE, "-", 1.8)
SIGMA_HIGH = Line(ORANGE, "-.", 1.3)
JACKET = Line(BLUISH_GREEN, ":", 1.4)
SETPOINT = Line(REDDISH_PURPLE, "--", 1.4)
GUARD_SETPOINT = Line(SKY_BLUE, "-.", 1.6)
"""The setpoint after the guard's limits (the live page; the reports show the proposal)."""
ZERO = Line(GREY, "-", 0.6)
ENVELOPE_EDGE = Line(BLACK, (0, (1, 1)), 0.8)


DASH_PATTERNS: dict[str, tuple[float, ...]] = {
    "-": (),
    "--": (3.7, 1.6),
    "-.": (6.4, 1.6, 1.0, 1.6),
    ":": (1.0, 1.65),
}
"""matplotlib's named dash patterns, in line widths: its default rcParams
``lines.dashed_pattern``, ``lines.dashdot_pattern`` and ``lines.dotted_pattern``, which it
scales by the line width (``lines.scale_dashes``); a test compares them with matplotlib's."""


def svg_dasharray(line: Line) -> str:
    """The line's dash pattern as an SVG ``stroke-dasharray`` (lengths in px at the line's
    width), so that a drawing made in a browser uses the reports' patterns; ``"none"`` for a
    solid line.

    >>> svg_dasharray(Line("#000000", "--", 2.0))
    '7.4 3.2'
    >>> svg_dasharray(Line("#000000", (0, (1, 1)), 1.0))
    '1 1'
    """
    style = line.linestyle
    pattern = DASH_PATTERNS[style] if isinstance(style, str) else style[1]
    if not pattern:
        return "none"
    return " ".join(f"{length * line.linewidth:.3g}" for length in pattern)


@dataclass(frozen=True)
class Marks:
    """How points are drawn, without a line (matplotlib keywords)."""

    marker: str
    size: float
    face: str
    edge: str
    edge_width: float = 1.0

    def kwargs(self) -> dict[str, object]:
        return {
            "linestyle": "none",
            "marker": self.marker,
            "markersize": self.size,
            "markerfacecolor": self.face,
            "markeredgecolor": self.edge,
            "markeredgewidth": self.edge_width,
        }


READINGS = Marks("o", 2.2, "none", GREY, 0.5)
READINGS_NOT_ESTIMATING = Marks("+", 3.0, SKY_BLUE, SKY_BLUE, 0.6)
READINGS_REJECTED = Marks("x", 4.0, REDDISH_PURPLE, REDDISH_PURPLE, 0.9)
SEED_POINT = Marks("D", 8.0, BLUISH_GREEN, BLACK)
PEAK_POINT = Marks("*", 11.0, YELLOW, BLACK)
LEAVES_ENVELOPE = Marks("X", 8.0, VERMILLION, BLACK)

BAND_ALPHA = 0.25
"""Opacity of the confidence bands (light enough to print as a pale grey)."""

BATCH_LINES = (
    Line(BLUE, "-", 1.5),
    Line(VERMILLION, "--", 1.5),
    Line(BLUISH_GREEN, "-.", 1.5),
    Line(REDDISH_PURPLE, ":", 1.8),
    Line(ORANGE, (0, (5, 1, 1, 1, 1, 1)), 1.5),
    Line(SKY_BLUE, (0, (8, 2)), 1.5),
    Line(BLACK, (0, (3, 1, 1, 1)), 1.2),
)
"""Lines of the batches of a comparison, in turn (colour and dash pattern both differ)."""

BATCH_MARKERS = ("o", "s", "^", "v", "D", "P", "X", "*")
"""Markers placed along each batch's path in a comparison (every batch gets its own)."""


@dataclass(frozen=True)
class PriorityStyle:
    """How an alarm priority is shown: a colour, a marker, a symbol for text and a label."""

    label: str
    color: str
    marker: str
    symbol: str


PRIORITY_STYLES = {
    "high": PriorityStyle("HIGH", VERMILLION, "^", "▲"),
    "medium": PriorityStyle("MEDIUM", ORANGE, "D", "◆"),
    "low": PriorityStyle("LOW", BLUE, "o", "●"),
    "": PriorityStyle("UNRANKED", GREY, "s", "■"),
}
"""The alarm palette (README, "Reports"): priority -> colour, marker, symbol, label."""


def priority_style(priority: str) -> PriorityStyle:
    """The style of a priority name (an unknown one is shown as unranked)."""
    return PRIORITY_STYLES.get(priority, PRIORITY_STYLES[""])
