"""The envelope of good batches in the phase diagram, and a batch held against it.

The envelope is where the good batches' estimated paths went after seeding: for each
temperature bin of width ``bin_k``, the lowest and the highest supersaturation
:math:`\\sigma = c / c_{sat}(T) - 1` any good batch had there. At a given temperature sigma and
the concentration say the same thing; sigma is binned because it changes little across a bin,
where the concentration follows the solubility curve's slope (binned concentration would widen
the envelope by that slope). In the phase diagram the envelope is drawn back as
:math:`c = c_{sat}(T)(1 + \\sigma)`. It is an empirical band (common practice for holding a
batch against earlier good ones), not a statistical one: with few good batches it is narrow,
and a batch that leaves it is different, not necessarily bad.

A batch **leaves** the envelope where even its own 95 % band lies wholly above the envelope's
top (more supersaturated than any good batch was at that temperature) or below its bottom
(less supersaturated: faster growth, slower cooling, or dissolution). Its own band is the
filter's: :math:`\\pm 2\\,s_c / c_{sat}(T)` from the concentration's standard deviation
:math:`s_c`, without the solubility curve's uncertainty, which every batch shares. Temperatures
the good batches never reached are *not covered*: nothing is said there. Runs of samples
outside on the same side, less than ``merge_gap_s`` apart, count as one excursion.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from sensor.numerics import FloatArray
from sensor.shell.report.errors import ReportError
from sensor.shell.report.view import BatchView
from sensor.solubility import SolubilityCurve
from sensor.units import ZERO_CELSIUS_K

BAND_STD = 2.0
"""A batch's own band, in concentration standard deviations (about 95 %)."""

MIN_GOOD_BATCHES = 2
"""Good batches an envelope needs (one batch is a path, not a band)."""


@dataclass(frozen=True)
class Envelope:
    """The good batches' range of sigma per temperature bin.

    Attributes
    ----------
    batches : the good batches it was made from
    edges_c : bin edges [°C], increasing, shape (m + 1,)
    low, high : lowest and highest sigma there [-], shape (m,); NaN where no good batch passed
    """

    batches: tuple[str, ...]
    edges_c: FloatArray
    low: FloatArray
    high: FloatArray

    def bins(self, temp_c: FloatArray) -> np.ndarray:
        """The bin of each temperature; -1 outside the edges or in a bin no good batch passed."""
        index = np.searchsorted(self.edges_c, temp_c, side="right") - 1
        inside = (index >= 0) & (index < len(self.low)) & np.isfinite(temp_c)
        index = np.where(inside, index, -1)
        covered = np.zeros(len(index), dtype=bool)
        covered[inside] = np.isfinite(self.low[index[inside]])
        return np.where(covered, index, -1)


@dataclass(frozen=True)
class Excursion:
    """One stretch of a batch outside the envelope.

    Attributes
    ----------
    start_s, end_s : first and last sample outside [s since the batch's first row]
    start_temp_c, end_temp_c : the estimated temperature then [°C]
    side : ``"above"`` (more supersaturated than any good batch) or ``"below"``
    largest_sigma : the largest distance beyond the envelope, in sigma [-]
    """

    start_s: float
    end_s: float
    start_temp_c: float
    end_temp_c: float
    side: str
    largest_sigma: float


@dataclass(frozen=True)
class EnvelopeCheck:
    """A batch held against an envelope.

    Attributes
    ----------
    batch : the batch
    covered_fraction : share of its seeded samples at temperatures the envelope covers [-]
    outside_fraction : share of those covered samples outside the envelope [-]
    excursions : where it left, in time order
    """

    batch: str
    covered_fraction: float
    outside_fraction: float
    excursions: tuple[Excursion, ...]

    @property
    def inside(self) -> bool:
        """It never left the envelope where the envelope says anything."""
        return not self.excursions


def build_envelope(views: list[BatchView], bin_k: float = 1.0) -> Envelope:
    """The envelope of the seeded paths of ``views`` (the good batches), bins of ``bin_k`` [K].

    Raises
    ------
    ReportError
        With fewer than :data:`MIN_GOOD_BATCHES` batches that have a seeded path, or a bin
        width that is not positive.
    """
    if not bin_k > 0.0:
        raise ReportError(f"envelope bin width must be positive; got {bin_k} K")
    paths = [(v.batch, v.temp_c[v.seeded], v.sigma[v.seeded]) for v in views]
    paths = [p for p in paths if np.any(np.isfinite(p[1]) & np.isfinite(p[2]))]
    if len(paths) < MIN_GOOD_BATCHES:
        raise ReportError(
            f"an envelope needs at least {MIN_GOOD_BATCHES} good batches with a seeded path; "
            f"got {len(paths)}"
        )
    temps = np.concatenate([p[1] for p in paths])
    sigmas = np.concatenate([p[2] for p in paths])
    finite = np.isfinite(temps) & np.isfinite(sigmas)
    temps, sigmas = temps[finite], sigmas[finite]
    lo = np.floor(temps.min() / bin_k) * bin_k
    count = max(1, int(np.ceil((temps.max() - lo) / bin_k + 1e-9)))
    edges = lo + bin_k * np.arange(count + 1)
    index = np.clip(np.searchsorted(edges, temps, side="right") - 1, 0, count - 1)
    low = np.full(count, np.inf)
    high = np.full(count, -np.inf)
    np.minimum.at(low, index, sigmas)
    np.maximum.at(high, index, sigmas)
    empty = ~np.isfinite(low)
    low[empty] = np.nan
    high[empty] = np.nan
    return Envelope(tuple(p[0] for p in paths), edges, low, high)


def hold_against(
    envelope: Envelope, view: BatchView, curve: SolubilityCurve, merge_gap_s: float = 300.0
) -> EnvelopeCheck:
    """Where ``view``'s seeded path leaves ``envelope`` (module docstring).

    Parameters
    ----------
    envelope : the good batches' envelope
    view : the batch held against it
    curve : the solubility curve (turns the concentration's std into one of sigma)
    merge_gap_s : excursions on the same side closer than this are one [s]
    """
    seeded = view.seeded & np.isfinite(view.temp_c) & np.isfinite(view.sigma)
    time_s, temp_c, sigma = view.time_s[seeded], view.temp_c[seeded], view.sigma[seeded]
    half = BAND_STD * view.conc_std[seeded] / curve.c_sat(temp_c + ZERO_CELSIUS_K)
    bins = envelope.bins(temp_c)
    covered = bins >= 0
    top = np.where(covered, envelope.high[np.maximum(bins, 0)], np.nan)
    bottom = np.where(covered, envelope.low[np.maximum(bins, 0)], np.nan)
    with np.errstate(invalid="ignore"):
        above = covered & (sigma - half > top)
        below = covered & (sigma + half < bottom)
    beyond = np.where(above, sigma - top, np.where(below, bottom - sigma, 0.0))
    excursions: list[Excursion] = []
    for side, mask in (("above", above), ("below", below)):
        excursions.extend(_runs(side, mask, time_s, temp_c, beyond, merge_gap_s))
    excursions.sort(key=lambda e: e.start_s)
    n_seeded, n_covered = len(time_s), int(np.sum(covered))
    return EnvelopeCheck(
        batch=view.batch,
        covered_fraction=n_covered / n_seeded if n_seeded else 0.0,
        outside_fraction=float(np.sum(above | below)) / n_covered if n_covered else 0.0,
        excursions=tuple(excursions),
    )


def _runs(
    side: str,
    mask: np.ndarray,
    time_s: FloatArray,
    temp_c: FloatArray,
    beyond: FloatArray,
    merge_gap_s: float,
) -> list[Excursion]:
    """Runs of ``mask``, merged across gaps shorter than ``merge_gap_s``."""
    where = np.flatnonzero(mask)
    if len(where) == 0:
        return []
    gaps = np.flatnonzero(np.diff(time_s[where]) >= merge_gap_s)
    starts = np.concatenate([[0], gaps + 1])
    ends = np.concatenate([gaps, [len(where) - 1]])
    runs = []
    for a, b in zip(starts, ends, strict=True):
        first, last = where[a], where[b]
        runs.append(
            Excursion(
                start_s=float(time_s[first]),
                end_s=float(time_s[last]),
                start_temp_c=float(temp_c[first]),
                end_temp_c=float(temp_c[last]),
                side=side,
                largest_sigma=float(np.max(beyond[where[a : b + 1]])),
            )
        )
    return runs
