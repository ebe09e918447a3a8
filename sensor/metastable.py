r"""The metastable zone: how far a solution can be supersaturated before it nucleates.

Polythermal data (cloud points of solutions of known concentration cooled at several constant
rates; clear points give the solubility) are fitted with Nývlt's relation [1]_ [2]_: the rate at
which cooling creates supersaturation equals the nucleation rate at the limit,

.. math:: b \left|\frac{dc_{sat}}{dT}\right| = K_N\,\Delta c_{max}^{\,m},
          \qquad \Delta c_{max} = \left|\frac{dc_{sat}}{dT}\right| \Delta T_{max}

with :math:`b` the cooling rate [K/s], :math:`\Delta T_{max}` the maximum undercooling (the zone
width) [K], :math:`m` the apparent nucleation order and :math:`K_N` the nucleation constant. It is
fitted as the straight line :math:`\ln \Delta c_{max} = a_0 + a_1 \ln(b\,|dc_{sat}/dT|)`, the
cloud temperature being the measured (uncertain) quantity, so :math:`m = 1/a_1` and
:math:`\ln K_N = -a_0/a_1`.

A solution saturated at :math:`T_s` and cooled at rate :math:`b` clouds at
:math:`T_s - \Delta T_{max}(T_s, b)`. Read the other way, at the current temperature :math:`T` the
metastable limit is the concentration whose cloud point is :math:`T`: that is
:meth:`MetastableZone.c_limit`. For retrograde solubility the same holds with heating in place
of cooling; ``rate_k_per_s`` is then the heating rate.

:math:`\Delta T_{max} \to 0` as :math:`b \to 0`: Nývlt's relation says nothing about holds, where
induction time governs. Rates outside the measured range are flagged by
:meth:`MetastableZone.rate_extrapolated`; what to do with them is the caller's decision.

References
----------
.. [1] J. Nývlt, "Kinetics of nucleation in solutions", J. Cryst. Growth 3-4 (1968) 377-383.
   doi:10.1016/0022-0248(68)90179-6
.. [2] J. W. Mullin, *Crystallization*, 4th ed., Butterworth-Heinemann, 2001, section 5.5
   (metastable zone widths, the polythermal method).
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats

from sensor.errors import FitError
from sensor.numerics import FloatArray
from sensor.solubility import SolubilityCurve, aicc


@dataclass(frozen=True)
class MetastableZone(ABC):
    """Common behaviour of a metastable-zone limit; subclasses define :meth:`width_k`.

    Parameters
    ----------
    solubility : the solubility curve the zone is measured from
    rate_range_k_per_s : range of rates the zone was measured at [K/s]
    """

    solubility: SolubilityCurve
    rate_range_k_per_s: tuple[float, float]

    @abstractmethod
    def width_k(self, temp_sat_k: ArrayLike, rate_k_per_s: ArrayLike) -> FloatArray:
        """Zone width :math:`\\Delta T_{max}` [K] of a solution saturated at ``temp_sat_k`` [K]
        cooled at ``rate_k_per_s`` [K/s]."""

    @abstractmethod
    def width_interval_k(
        self, temp_sat_k: ArrayLike, rate_k_per_s: ArrayLike, level: float = 0.95
    ) -> tuple[FloatArray, FloatArray]:
        """Confidence band of :meth:`width_k` at ``level`` [K]."""

    def rate_extrapolated(self, rate_k_per_s: ArrayLike) -> np.ndarray:
        """True where a rate lies outside the measured range (or is not finite)."""
        rate = np.asarray(rate_k_per_s, dtype=float)
        lo, hi = self.rate_range_k_per_s
        return ~((rate >= lo) & (rate <= hi))

    def _direction(self, temp_k: FloatArray) -> FloatArray:
        # +1 where solubility rises with temperature (supersaturation made by cooling), -1 where
        # it falls (made by heating).
        return np.sign(self.solubility.dc_sat_dtemp(temp_k))

    def _direction_and_width(
        self, temp_sat_k: FloatArray, rate_k_per_s: FloatArray
    ) -> tuple[FloatArray, FloatArray]:
        """:meth:`_direction` and :meth:`width_k` at once (a zone whose width needs the
        solubility's slope computes it once for both)."""
        return self._direction(temp_sat_k), self.width_k(temp_sat_k, rate_k_per_s)

    def cloud_temp_k(self, conc: ArrayLike, rate_k_per_s: ArrayLike) -> FloatArray:
        """Temperature [K] at which a solution of ``conc`` [kg/kg] nucleates at this rate.
        NaN where the concentration is outside the solubility curve's domain."""
        temp_sat = self.solubility.temp_sat(conc)
        direction, width = self._direction_and_width(temp_sat, np.asarray(rate_k_per_s, float))
        return temp_sat - direction * width

    def limit_temp_sat_k(
        self, temp_k: ArrayLike, rate_k_per_s: ArrayLike, *, max_iterations: int = 60
    ) -> FloatArray:
        r"""Saturation temperature :math:`T_s` [K] of the solution at the metastable limit at
        ``temp_k``: the root of :math:`T_s = g(T_s) = T + \Delta T_{max}(T_s, b)`, a fixed
        point (the width changes slowly with :math:`T_s`), solved to :math:`|g(T_s) - T_s| \le
        10^{-10}` K.

        Each round takes two steps of the plain iteration and then Steffensen's (Aitken's
        :math:`\Delta^2`) extrapolation [1]_, :math:`T_s - (g(T_s) - T_s)^2 / (g(g(T_s)) -
        2 g(T_s) + T_s)`, which converges quadratically where the plain iteration converges
        linearly (9 to 17 steps for the demo's zone; 2 or 3 rounds with it); where the
        extrapolation is not a number (the steps already zero) the second plain step is kept.
        ``max_iterations`` counts rounds.

        References
        ----------
        .. [1] J. F. Steffensen, "Remarks on iteration", Skandinavisk Aktuarietidskrift 16
           (1933) 64-72; in R. L. Burden, J. D. Faires, *Numerical Analysis*, 9th ed., 2011,
           section 2.5 (Aitken's method and Steffensen's method; section from memory).
        """
        temp, rate = np.broadcast_arrays(
            np.asarray(temp_k, dtype=float), np.asarray(rate_k_per_s, dtype=float)
        )

        def step(temp_sat: FloatArray) -> FloatArray:
            direction, width = self._direction_and_width(temp_sat, rate)
            return temp + direction * width

        temp_sat = step(temp)
        for _ in range(max_iterations):
            once = step(temp_sat)
            if not np.any(np.abs(once - temp_sat) > 1e-10):
                return once
            twice = step(once)
            with np.errstate(divide="ignore", invalid="ignore"):
                extrapolated = temp_sat - (once - temp_sat) ** 2 / (twice - 2.0 * once + temp_sat)
            temp_sat = np.where(np.isfinite(extrapolated), extrapolated, twice)
        raise FitError(f"metastable limit did not converge in {max_iterations} iterations")

    def c_limit(self, temp_k: ArrayLike, rate_k_per_s: ArrayLike) -> FloatArray:
        """Concentration at the metastable limit [kg/kg solvent] at ``temp_k`` [K] and rate."""
        return self.solubility.c_sat(self.limit_temp_sat_k(temp_k, rate_k_per_s))

    def sigma_limit(self, temp_k: ArrayLike, rate_k_per_s: ArrayLike) -> FloatArray:
        """Relative supersaturation at the metastable limit, ``c_limit / c_sat - 1`` [-]."""
        return self.c_limit(temp_k, rate_k_per_s) / self.solubility.c_sat(temp_k) - 1.0


@dataclass(frozen=True, kw_only=True)
class FixedWidthZone(MetastableZone):
    """A zone of constant width, for when cloud-point data are thin (common practice: a width
    measured at the plant's usual cooling rate, or a cautious guess).

    Parameters
    ----------
    width : zone width :math:`\\Delta T_{max}` [K], at every temperature and rate
    width_std : its standard deviation [K] (stated, normal quantiles)
    """

    width: float
    width_std: float = 0.0

    def __post_init__(self) -> None:
        if not (self.width > 0.0 and self.width_std >= 0.0):
            raise ValueError("a fixed zone width must be positive and its std non-negative")

    def width_k(self, temp_sat_k: ArrayLike, rate_k_per_s: ArrayLike) -> FloatArray:
        shape = np.broadcast_shapes(np.shape(temp_sat_k), np.shape(rate_k_per_s))
        return np.full(shape, self.width)

    def width_interval_k(
        self, temp_sat_k: ArrayLike, rate_k_per_s: ArrayLike, level: float = 0.95
    ) -> tuple[FloatArray, FloatArray]:
        half = stats.norm.ppf(0.5 + level / 2.0) * self.width_std
        width = self.width_k(temp_sat_k, rate_k_per_s)
        return width - half, width + half


@dataclass(frozen=True, kw_only=True)
class NyvltZone(MetastableZone):
    r"""Nývlt's metastable zone, :math:`\ln\Delta c_{max} = a_0 + a_1\ln(b\,|dc_{sat}/dT|)`.

    Parameters
    ----------
    params : :math:`(a_0, a_1)`, with :math:`b` in [K/s] and :math:`c` in [kg/kg solvent]
    covariance : their covariance, 2x2
    dof : degrees of freedom for intervals (``n - 2`` for a fit)
    """

    params: FloatArray
    covariance: FloatArray
    dof: float

    def __post_init__(self) -> None:
        params = np.asarray(self.params, dtype=float)
        cov = np.asarray(self.covariance, dtype=float)
        if params.shape != (2,) or cov.shape != (2, 2) or not np.allclose(cov, cov.T):
            raise ValueError("Nývlt zone needs 2 parameters and a symmetric 2x2 covariance")
        if not params[1] > 0.0:
            raise ValueError(f"Nývlt slope a1 = 1/m must be positive; got {params[1]}")
        object.__setattr__(self, "params", params)
        object.__setattr__(self, "covariance", cov)

    @property
    def order_m(self) -> float:
        """Apparent nucleation order :math:`m = 1/a_1` [-]."""
        return float(1.0 / self.params[1])

    @property
    def ln_k_n(self) -> float:
        r""":math:`\ln K_N = -a_0/a_1`, with :math:`K_N` in SI (kg/kg, K, s)."""
        return float(-self.params[0] / self.params[1])

    def derived_covariance(self) -> FloatArray:
        r"""Covariance of :math:`(m, \ln K_N)` by the delta method."""
        a0, a1 = self.params
        jac = np.array([[0.0, -1.0 / a1**2], [-1.0 / a1, a0 / a1**2]])
        return jac @ self.covariance @ jac.T

    def _log_terms(
        self, temp_sat_k: ArrayLike, rate_k_per_s: ArrayLike
    ) -> tuple[FloatArray, FloatArray]:
        slope = np.abs(self.solubility.dc_sat_dtemp(np.asarray(temp_sat_k, dtype=float)))
        return self._log_terms_of_slope(slope, rate_k_per_s)

    @staticmethod
    def _log_terms_of_slope(
        slope: FloatArray, rate_k_per_s: ArrayLike
    ) -> tuple[FloatArray, FloatArray]:
        with np.errstate(divide="ignore"):
            log_drive = np.log(np.asarray(rate_k_per_s, dtype=float) * slope)
        return log_drive, np.log(slope)

    def _width_of_slope(self, slope: FloatArray, rate_k_per_s: ArrayLike) -> FloatArray:
        log_drive, log_slope = self._log_terms_of_slope(slope, rate_k_per_s)
        a0, a1 = self.params
        return np.exp(a0 + a1 * log_drive - log_slope)

    def width_k(self, temp_sat_k: ArrayLike, rate_k_per_s: ArrayLike) -> FloatArray:
        slope = np.abs(self.solubility.dc_sat_dtemp(np.asarray(temp_sat_k, dtype=float)))
        return self._width_of_slope(slope, rate_k_per_s)

    def _direction_and_width(
        self, temp_sat_k: FloatArray, rate_k_per_s: FloatArray
    ) -> tuple[FloatArray, FloatArray]:
        slope = self.solubility.dc_sat_dtemp(temp_sat_k)
        return np.sign(slope), self._width_of_slope(np.abs(slope), rate_k_per_s)

    def _log_width_std(self, temp_sat_k: ArrayLike, rate_k_per_s: ArrayLike) -> FloatArray:
        log_drive, _ = self._log_terms(temp_sat_k, rate_k_per_s)
        g = np.stack(np.broadcast_arrays(np.ones_like(log_drive), log_drive), axis=-1)
        return np.sqrt(np.einsum("...i,ij,...j->...", g, self.covariance, g))

    def width_interval_k(
        self, temp_sat_k: ArrayLike, rate_k_per_s: ArrayLike, level: float = 0.95
    ) -> tuple[FloatArray, FloatArray]:
        """Band of the width, symmetric in :math:`\\ln \\Delta T_{max}` (Student's t)."""
        half = stats.t.ppf(0.5 + level / 2.0, self.dof) * self._log_width_std(
            temp_sat_k, rate_k_per_s
        )
        width = self.width_k(temp_sat_k, rate_k_per_s)
        return width * np.exp(-half), width * np.exp(half)


@dataclass(frozen=True)
class NyvltFit:
    """Outcome of fitting Nývlt's relation to cloud points.

    Attributes
    ----------
    zone : the fitted zone
    temp_sat_k : saturation temperature of each point, from the solubility curve [K]
    width_k : measured zone width of each point [K]
    predicted_width_k : fitted zone width of each point [K]
    rss : residual sum of squares of :math:`\\ln \\Delta T_{max}` [-]
    aicc : corrected Akaike information criterion
    """

    zone: NyvltZone
    temp_sat_k: FloatArray
    width_k: FloatArray
    predicted_width_k: FloatArray
    rss: float
    aicc: float

    @property
    def rmse_k(self) -> float:
        """Root-mean-square error of the fitted widths [K]."""
        return float(np.sqrt(np.mean((self.predicted_width_k - self.width_k) ** 2)))


def fit_nyvlt(
    conc: ArrayLike,
    rate_k_per_s: ArrayLike,
    cloud_temp_k: ArrayLike,
    solubility: SolubilityCurve,
) -> NyvltFit:
    """Fit Nývlt's relation to polythermal cloud points.

    Parameters
    ----------
    conc : concentration of each solution [kg/kg solvent]
    rate_k_per_s : constant cooling rate of each run [K/s] (heating rate for retrograde curves)
    cloud_temp_k : temperature at which nucleation was detected [K]
    solubility : the solubility curve; it gives each solution's saturation temperature

    Raises
    ------
    FitError
        Fewer than 4 points, fewer than 2 distinct rates, a concentration outside the solubility
        curve's domain, or a cloud point on the wrong side of saturation (``point`` names it).
    """
    c = np.asarray(conc, dtype=float)
    rate = np.asarray(rate_k_per_s, dtype=float)
    cloud = np.asarray(cloud_temp_k, dtype=float)
    if not (c.ndim == 1 and c.shape == rate.shape == cloud.shape):
        raise FitError("concentrations, rates and cloud temperatures must be 1-D, of one length")
    n = len(c)
    if n < 4:
        raise FitError(f"Nývlt's relation has 2 parameters and needs at least 4 points; got {n}")
    for i in range(n):
        if not (np.isfinite(c[i]) and np.isfinite(rate[i]) and np.isfinite(cloud[i])):
            raise FitError("a value is not a finite number", point=i)
        if rate[i] <= 0.0:
            raise FitError(f"rate must be positive; got {rate[i] * 60:g} K/min", point=i)
    if len(np.unique(rate)) < 2:
        raise FitError("cloud points at two or more cooling rates are needed")
    temp_sat = solubility.temp_sat(c)
    for i in np.flatnonzero(~np.isfinite(temp_sat)):
        raise FitError(
            f"concentration {c[i]:.6g} kg/kg is outside the solubility curve's domain", point=i
        )
    direction = np.sign(solubility.dc_sat_dtemp(temp_sat))
    width = direction * (temp_sat - cloud)
    for i in np.flatnonzero(width <= 0.0):
        raise FitError(
            f"cloud point {cloud[i] - 273.15:.2f} °C is not beyond the saturation temperature "
            f"{temp_sat[i] - 273.15:.2f} °C",
            point=i,
        )
    slope = np.abs(solubility.dc_sat_dtemp(temp_sat))
    design = np.column_stack([np.ones(n), np.log(rate * slope)])
    target = np.log(width * slope)
    params, *_ = np.linalg.lstsq(design, target, rcond=None)
    residuals = target - design @ params
    rss = float(residuals @ residuals)
    covariance = rss / (n - 2) * np.linalg.inv(design.T @ design)
    if not params[1] > 0.0:
        raise FitError(
            "the zone gets narrower at faster cooling in these data; Nývlt's relation does not "
            "describe them (check the rates and cloud points)"
        )
    zone = NyvltZone(
        solubility=solubility,
        rate_range_k_per_s=(float(rate.min()), float(rate.max())),
        params=params,
        covariance=0.5 * (covariance + covariance.T),
        dof=float(n - 2),
    )
    return NyvltFit(
        zone=zone,
        temp_sat_k=temp_sat,
        width_k=width,
        predicted_width_k=zone.width_k(temp_sat, rate),
        rss=rss,
        aicc=float(aicc(rss, n, 2)),
    )
