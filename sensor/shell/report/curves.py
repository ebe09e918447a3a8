"""The thermodynamic lines of a phase diagram, computed once for every drawing of one.

The batch reports (matplotlib) and the live page (drawn in the browser) show the same lines:
the solubility curve with its confidence band, where it is extrapolated, and the metastable
limit at a stated cooling rate. :func:`zone_curves` computes them, without matplotlib.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from sensor.metastable import MetastableZone
from sensor.numerics import FloatArray
from sensor.units import ZERO_CELSIUS_K

CONFIDENCE = 0.95
"""Level of the solubility curve's band (Student's t on the fitted parameters)."""


@dataclass(frozen=True)
class ZoneCurves:
    """The lines of a phase diagram over a temperature grid.

    Attributes
    ----------
    temp_c : the grid [°C], ascending
    c_sat : the solubility curve [kg/kg solvent]
    c_sat_lo, c_sat_hi : its band at :data:`CONFIDENCE` [kg/kg solvent]
    trusted : the curve is inside its trusted domain (not extrapolated) there
    c_limit : the metastable limit at ``rate_k_per_s`` [kg/kg solvent]; NaN where the curve is
        extrapolated
    rate_k_per_s : the cooling rate of the limit [K/s]
    """

    temp_c: FloatArray
    c_sat: FloatArray
    c_sat_lo: FloatArray
    c_sat_hi: FloatArray
    trusted: np.ndarray
    c_limit: FloatArray
    rate_k_per_s: float


def zone_curves(
    zone: MetastableZone,
    temp_lo_c: float,
    temp_hi_c: float,
    rate_k_per_s: float,
    points: int = 240,
) -> ZoneCurves:
    """The solubility curve, its band and the metastable limit between two temperatures.

    Parameters
    ----------
    zone : the metastable zone, holding the solubility curve
    temp_lo_c, temp_hi_c : the temperature range [°C]
    rate_k_per_s : cooling rate at which the limit is taken [K/s]
    points : grid points
    """
    temp_c = np.linspace(temp_lo_c, temp_hi_c, points)
    temp_k = temp_c + ZERO_CELSIUS_K
    curve = zone.solubility
    lo, hi = curve.interval(temp_k, CONFIDENCE)
    trusted = ~curve.extrapolated(temp_k)
    c_limit = np.full(points, np.nan)
    if np.any(trusted):
        with np.errstate(invalid="ignore"):
            c_limit[trusted] = zone.c_limit(temp_k[trusted], rate_k_per_s)
    return ZoneCurves(temp_c, curve.c_sat(temp_k), lo, hi, trusted, c_limit, rate_k_per_s)
