r"""What the soft sensor reports at each sample, computed from the filter's mean and covariance.

One vectorised function, :func:`estimates`, serves the live path (arrays of one sample) and the
replay (arrays of every sample of every batch), so both report exactly the same numbers.

The supersaturation and its standard deviation
-----------------------------------------------
.. math::

    c_{sat} = c_{sat}(T), \quad \Delta c = c - c_{sat}, \quad S = c / c_{sat}, \quad
    \sigma = S - 1

:math:`\sigma`'s variance is the filter's, carried through the gradient
:math:`g = (\partial\sigma/\partial T, \partial\sigma/\partial c) = (-c\,c_{sat}'/c_{sat}^2,\
1/c_{sat})`, plus the solubility curve's own (the filter takes the curve as exact, so the two are
independent):

.. math:: \mathrm{var}\,\sigma = g^\top P_{T,c}\,g
          + \left(\frac{c}{c_{sat}^2}\right)^2 s_{c_{sat}}(T)^2

with :math:`s_{c_{sat}}` from :meth:`sensor.solubility.SolubilityCurve.c_sat_std` (the delta
method on the fitted parameters). A band of ``sigma ± 2 sigma_std`` holds the true supersaturation
about 95 % of the time if the filter is consistent (its NIS state is ``ok``) and the curve's
errors are normal (delta method, linearised; [1]_ section 5.6).

Margins to the metastable limit
-------------------------------
At the current cooling rate :math:`b` (from the model, :math:`-dT/dt = a (T - T_j)`, taken no lower
than the slowest rate the zone was measured at, since Nývlt's width vanishes at :math:`b \to 0`;
``rate_outside_zone_data`` says when the actual rate is outside the measured range):

- ``margin_k``: how far the solution can still be cooled at that rate before it reaches its cloud
  point, :math:`T - T_{cloud}(c, b)` (signs turned for retrograde solubility), with
  :math:`T_{cloud}` from :meth:`sensor.metastable.MetastableZone.cloud_temp_k`;
- ``sigma_limit`` :math:`= c / c_{sat}(T_{cloud}) - 1`: the supersaturation at which this solution
  is expected to nucleate at that rate, and ``margin_sigma`` :math:`= \sigma_{limit} - \sigma`,
  the supersaturation still available. (Both are the solution's own limit, reached by cooling at
  constant concentration; at the limit they coincide with the zone's limit at the current
  temperature, :meth:`~sensor.metastable.MetastableZone.sigma_limit`.)

Negative margins mean the batch is beyond the expected cloud point.

References
----------
.. [1] Y. Bar-Shalom, X. R. Li, T. Kirubarajan, *Estimation with Applications to Tracking and
   Navigation*, Wiley, 2001.
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np
from numpy.typing import ArrayLike

from sensor.crystallizer import (
    CONC,
    GROWTH_SCALE,
    MOMENT_SIZE_SCALE_M,
    P_HEAT_RATE,
    TEMP,
    ZETA0,
    ZETA1,
    ZETA2,
    ZETA3,
    CrystallizerModel,
)
from sensor.metastable import MetastableZone
from sensor.numerics import FloatArray
from sensor.units import ZERO_CELSIUS_K

SOLIDS_SHOWN_ABOVE = 1e-7
"""Solids content [kg/kg solvent] below which the mean sizes are not reported (NaN)."""


@dataclass(frozen=True)
class Estimates:
    """The soft sensor's outputs, one entry per sample (arrays of one length).

    Attributes
    ----------
    temp_c, temp_std_k : reactor temperature [°C] and its std [K]
    conc, conc_std : dissolved solute [kg/kg solvent] and its std
    conc_sat : solubility at the estimated temperature [kg/kg solvent]
    conc_sat_std : the solubility curve's own std there [kg/kg solvent]
    delta_c : absolute supersaturation :math:`c - c_{sat}` [kg/kg solvent]
    supersaturation_ratio : :math:`S = c / c_{sat}` [-]
    sigma, sigma_std : relative supersaturation :math:`S - 1` [-] and its std, including the
        solubility curve's uncertainty [-]
    sigma_limit : :math:`\\sigma` at which this solution reaches its cloud point at the current
        cooling rate [-]
    margin_sigma : ``sigma_limit - sigma`` [-]
    margin_k : further cooling before the cloud point at the current rate [K]
    cooling_rate_k_per_min : the model's cooling rate :math:`-dT/dt` [K/min]
    solids, solids_std : crystals [kg per kg solvent] and std
    yield_fraction : crystallised share of the dissolved solute so far (seed excluded) [-]
    yield_kg : crystallised mass so far (seed excluded) [kg]
    mean_size_um : mass-weighted (Sauter) mean size :math:`\\mu_3/\\mu_2` [µm]
    number_mean_size_um : number mean size :math:`\\mu_1/\\mu_0` [µm]
    analyzer_bias, analyzer_bias_std : the analyzer's estimated bias [kg/kg solvent]
    growth_scale, growth_scale_std : :math:`\\theta` (1 when not estimated, std 0)
    extrapolated : the temperature is outside the solubility curve's trusted domain
    rate_outside_zone_data : the cooling rate is outside the range the zone was measured at
    """

    temp_c: FloatArray
    temp_std_k: FloatArray
    conc: FloatArray
    conc_std: FloatArray
    conc_sat: FloatArray
    conc_sat_std: FloatArray
    delta_c: FloatArray
    supersaturation_ratio: FloatArray
    sigma: FloatArray
    sigma_std: FloatArray
    sigma_limit: FloatArray
    margin_sigma: FloatArray
    margin_k: FloatArray
    cooling_rate_k_per_min: FloatArray
    solids: FloatArray
    solids_std: FloatArray
    yield_fraction: FloatArray
    yield_kg: FloatArray
    mean_size_um: FloatArray
    number_mean_size_um: FloatArray
    analyzer_bias: FloatArray
    analyzer_bias_std: FloatArray
    growth_scale: FloatArray
    growth_scale_std: FloatArray
    extrapolated: np.ndarray
    rate_outside_zone_data: np.ndarray

    @classmethod
    def names(cls) -> tuple[str, ...]:
        return tuple(f.name for f in fields(cls))

    def row(self, i: int) -> dict[str, float | bool]:
        """Sample ``i`` as a dict of Python scalars."""
        return {name: getattr(self, name)[i].item() for name in self.names()}


def sigma_std(
    conc: FloatArray,
    temp_var: FloatArray,
    cov_temp_conc: FloatArray,
    conc_var: FloatArray,
    c_sat: FloatArray,
    dc_sat_dtemp: FloatArray,
    c_sat_std: FloatArray,
) -> FloatArray:
    """Standard deviation of :math:`\\sigma` [-] (module docstring).

    Parameters
    ----------
    conc : [kg/kg]
    temp_var, cov_temp_conc, conc_var : the filter's covariance of (T, c) [K², K·kg/kg,
        (kg/kg)²]
    c_sat, dc_sat_dtemp, c_sat_std : the curve, its slope [kg/kg/K] and its std [kg/kg] at the
        temperature
    """
    g_temp = -conc * dc_sat_dtemp / c_sat**2
    g_conc = 1.0 / c_sat
    filter_var = g_temp**2 * temp_var + 2.0 * g_temp * g_conc * cov_temp_conc + g_conc**2 * conc_var
    curve_var = (conc / c_sat**2 * c_sat_std) ** 2
    return np.sqrt(np.maximum(filter_var, 0.0) + curve_var)


def estimates(
    model: CrystallizerModel,
    zone: MetastableZone,
    x: ArrayLike,
    var: ArrayLike,
    cov_temp_conc: ArrayLike,
    jacket_temp_k: ArrayLike,
    seed_load: ArrayLike,
    solvent_mass_kg: float,
) -> Estimates:
    """The outputs for filter means ``x`` (N, n), variances ``var`` (N, n) and
    temperature-concentration covariances ``cov_temp_conc`` (N,).

    Parameters
    ----------
    model : the estimation model (its layout and heat-transfer rate)
    zone : the metastable zone (and through it the solubility curve)
    jacket_temp_k : jacket temperature held at each sample [K], shape (N,)
    seed_load : seed charged so far [kg/kg solvent], shape (N,) (0 before seeding)
    solvent_mass_kg : solvent in the batch [kg]
    """
    x = np.atleast_2d(np.asarray(x, dtype=float))
    var = np.atleast_2d(np.asarray(var, dtype=float))
    cov_tc = np.asarray(cov_temp_conc, dtype=float)
    jacket = np.asarray(jacket_temp_k, dtype=float)
    seed = np.asarray(seed_load, dtype=float)
    curve = zone.solubility
    layout = model.layout
    std = np.sqrt(np.maximum(var, 0.0))
    temp = x[:, TEMP]
    conc = x[:, CONC]
    c_sat, slope, c_sat_std = curve.evaluate(temp)
    ratio = conc / c_sat
    sigma = ratio - 1.0
    cooling = model.params[P_HEAT_RATE] * (temp - jacket)  # -dT/dt [K/s]
    direction = np.sign(slope)
    supersaturating = direction * cooling  # cooling for normal, heating for retrograde curves
    rate_lo, _ = zone.rate_range_k_per_s
    rate_used = np.maximum(supersaturating, rate_lo) if rate_lo > 0.0 else supersaturating
    solids = x[:, ZETA3]
    shown = solids > SOLIDS_SHOWN_ABOVE
    grown = solids - seed
    dissolved_total = conc + grown
    with np.errstate(invalid="ignore", divide="ignore"):  # once: it costs as much as a solve
        cloud = zone.cloud_temp_k(np.maximum(conc, 0.0), rate_used)
        margin_k = direction * (temp - cloud)
        sigma_limit = conc / curve.c_sat(cloud) - 1.0
        sauter = np.where(shown, MOMENT_SIZE_SCALE_M * x[:, ZETA3] / x[:, ZETA2], np.nan)
        number = np.where(shown, MOMENT_SIZE_SCALE_M * x[:, ZETA1] / x[:, ZETA0], np.nan)
        yield_fraction = np.where(dissolved_total > 0.0, grown / dissolved_total, np.nan)
    if layout.estimate_growth_scale:
        theta, theta_std = x[:, GROWTH_SCALE], std[:, GROWTH_SCALE]
    else:
        theta, theta_std = np.ones_like(temp), np.zeros_like(temp)
    return Estimates(
        temp_c=temp - ZERO_CELSIUS_K,
        temp_std_k=std[:, TEMP],
        conc=conc,
        conc_std=std[:, CONC],
        conc_sat=c_sat,
        conc_sat_std=c_sat_std,
        delta_c=conc - c_sat,
        supersaturation_ratio=ratio,
        sigma=sigma,
        sigma_std=sigma_std(conc, var[:, TEMP], cov_tc, var[:, CONC], c_sat, slope, c_sat_std),
        sigma_limit=sigma_limit,
        margin_sigma=sigma_limit - sigma,
        margin_k=margin_k,
        cooling_rate_k_per_min=cooling * 60.0,
        solids=solids,
        solids_std=std[:, ZETA3],
        yield_fraction=yield_fraction,
        yield_kg=grown * solvent_mass_kg,
        mean_size_um=sauter * 1e6,
        number_mean_size_um=number * 1e6,
        analyzer_bias=x[:, layout.bias],
        analyzer_bias_std=std[:, layout.bias],
        growth_scale=theta,
        growth_scale_std=theta_std,
        extrapolated=np.asarray(curve.extrapolated(temp)),
        rate_outside_zone_data=np.asarray(zone.rate_extrapolated(supersaturating)),
    )
