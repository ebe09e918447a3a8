r"""Where the supersaturation will go: the model run forward from the filter's estimate along a
prescribed reactor temperature path, with its uncertainty.

For the cooling advisor. Given the filter's current mean :math:`x` and covariance :math:`P`, and a
path of reactor temperatures :math:`T(t_j)` (the setpoint profile the advisor considers; linear
between its points), :class:`SigmaPredictor` propagates the unscented sigma points of
:math:`(x, P)` through the crystallizer model with the temperature *prescribed* (the DCS's loop
is assumed to hold the reactor on the path), and returns at each path time the mean and standard
deviation of :math:`\sigma`:

.. math::

    \bar\sigma_j = \sum_i W^m_i \sigma_{ij}, \qquad
    s_j^2 = \sum_i W^c_i (\sigma_{ij} - \bar\sigma_j)^2
          + \left(\frac{\bar c_j}{c_{sat,j}^2}\right)^2 s_{c_{sat}}(T_j)^2
          + \frac{q_c^2\,t_j}{c_{sat,j}^2}

(unscented transform of the current uncertainty, kinetics through :math:`\theta` included; the
solubility curve's own uncertainty at each temperature; the concentration's process noise
accumulated over the horizon). The model is integrated by Euler steps of at most ``step_s``
(10 s by default: the forecast needs less resolution than the filter). Cost: about
:math:`(2n+1)\,t_{end}/\Delta t` model evaluations, a few hundred microseconds for 20 minutes.

It is an open-loop forecast: it ignores future measurements and assumes no nucleation burst that
the model's kinetics do not predict. Treat :math:`\bar\sigma + k s` as the supersaturation the
path may reach, not a guarantee.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np
from filterpy.kalman import MerweScaledSigmaPoints
from numpy.typing import ArrayLike

from sensor.crystallizer import (
    CONC,
    TEMP,
    CrystallizerModel,
    c_sat_from_table,
    kinetics_at_c_sat,
    rates_with,
    substeps,
)
from sensor.errors import SigmatrackError
from sensor.kalman import FilterTuning
from sensor.numerics import FloatArray
from sensor.solubility import SolubilityCurve


class ForecastError(SigmatrackError, ValueError):
    """A forecast was asked along an impossible path (times not increasing, not finite)."""


@dataclass(frozen=True)
class SigmaForecast:
    """Supersaturation along a temperature path.

    Attributes
    ----------
    time_s : the path's times [s] from now
    temp_k : the prescribed reactor temperature [K]
    sigma, sigma_std : mean and standard deviation of :math:`\\sigma` [-]
    conc : mean dissolved solute [kg/kg solvent]
    """

    time_s: FloatArray
    temp_k: FloatArray
    sigma: FloatArray
    sigma_std: FloatArray
    conc: FloatArray


@numba.njit(cache=True)
def _path_solubility(times, temps, params, table, max_step, sub_temp, sub_c_sat, out_c_sat):
    """Along one path (``temps``, one per time): the temperature and solubility at the start of
    every Euler sub-step, in order (``sub_temp``, ``sub_c_sat``; returns how many), and the
    solubility at each time (``out_c_sat``). The temperature is prescribed, so these are the
    same for every sigma point: looked up once, not once per point."""
    count = 0
    for j in range(times.shape[0]):
        if j > 0:
            span = times[j] - times[j - 1]
            steps = substeps(span, max_step)
            for k in range(steps):
                # the path is linear between its points
                temp = temps[j - 1] + (temps[j] - temps[j - 1]) * (k / steps)
                sub_temp[count] = temp
                sub_c_sat[count], _ = c_sat_from_table(temp, params, table)
                count += 1
        out_c_sat[j], _ = c_sat_from_table(temps[j], params, table)
    return count


@numba.njit(cache=True)
def _propagate(sigmas, times, temps, params, table, max_step, out_sigma, out_conc):
    """Each sigma point along each path: ``out_sigma[p, i, j]``, ``out_conc[p, i, j]`` for path
    ``p`` (a row of ``temps``), sigma point ``i``, at ``times[j]``."""
    count, n = sigmas.shape
    slope = np.zeros(n)
    x = np.empty(n)
    total = 0
    for j in range(1, times.shape[0]):
        total += substeps(times[j] - times[j - 1], max_step)
    sub_temp = np.empty(total)
    sub_c_sat = np.empty(total)
    out_c_sat = np.empty(times.shape[0])
    for p in range(temps.shape[0]):
        _path_solubility(times, temps[p], params, table, max_step, sub_temp, sub_c_sat, out_c_sat)
        for i in range(count):
            x[:] = sigmas[i]
            x[TEMP] = temps[p, 0]
            step = 0
            for j in range(times.shape[0]):
                if j > 0:
                    span = times[j] - times[j - 1]
                    steps = substeps(span, max_step)
                    h = span / steps
                    for _ in range(steps):
                        x[TEMP] = sub_temp[step]
                        _, growth, birth, growing = kinetics_at_c_sat(
                            sub_c_sat[step], x[CONC], params
                        )
                        rates_with(x, x[TEMP], growth, birth, growing, params, slope)
                        for m in range(n):
                            if m != TEMP:
                                x[m] += h * slope[m]
                        step += 1
                    x[TEMP] = temps[p, j]
                out_sigma[p, i, j] = x[CONC] / out_c_sat[j] - 1.0
                out_conc[p, i, j] = x[CONC]


class SigmaPredictor:
    """Forecasts of :math:`\\sigma` along temperature paths (module docstring).

    Parameters
    ----------
    model : the estimation model the filter runs
    tuning : the filter's tuning (sigma-point parameters, the concentration's process noise)
    curve : the solubility curve (for its uncertainty)
    step_s : longest Euler step of the forecast [s]
    """

    def __init__(
        self,
        model: CrystallizerModel,
        tuning: FilterTuning,
        curve: SolubilityCurve,
        step_s: float = 10.0,
    ) -> None:
        if not step_s > 0.0:
            raise ForecastError(f"step_s must be positive; got {step_s}")
        self.model = model
        self.curve = curve
        self.step_s = step_s
        self._conc_noise_var = tuning.conc_process_std**2
        self._points = MerweScaledSigmaPoints(
            model.layout.size, tuning.sigma_alpha, tuning.sigma_beta, tuning.sigma_kappa
        )

    def __call__(
        self,
        x: ArrayLike,
        P: ArrayLike,
        time_s: ArrayLike,
        temp_k: ArrayLike,
    ) -> SigmaForecast:
        """Forecast from mean ``x`` (n,) and covariance ``P`` (n, n) along the path ``time_s``
        [s from now, increasing, first >= 0] and ``temp_k`` [K].

        Raises
        ------
        ForecastError
            If the path's times do not increase, or a value is not finite.
        """
        times = np.asarray(time_s, dtype=float)
        temps = np.asarray(temp_k, dtype=float)
        if temps.shape != times.shape:
            raise ForecastError("the path needs 1-D times and temperatures of one length")
        _check_path(times, temps)
        sigma, std, conc = self._forecast(
            np.asarray(x, dtype=float), np.asarray(P, dtype=float), times, temps[None, :]
        )
        return SigmaForecast(times, temps, sigma[0], std[0], conc[0])

    def _forecast(
        self, mean: FloatArray, cov: FloatArray, times: FloatArray, temps: FloatArray
    ) -> tuple[FloatArray, FloatArray, FloatArray]:
        """Mean and std of sigma and mean concentration, (paths, times), for paths ``temps``
        (paths, times) from the estimate (mean, cov)."""
        sigmas = self._points.sigma_points(mean, cov)
        paths, points = temps.shape[0], sigmas.shape[0]
        if times[0] > 0.0:  # from now, at the current temperature, to the first point
            start = np.concatenate([[0.0], times])
            path_temps = np.hstack([np.full((paths, 1), mean[TEMP]), temps])
        else:
            start, path_temps = times, temps
        full_sigma = np.empty((paths, points, start.size))
        full_conc = np.empty((paths, points, start.size))
        _propagate(
            sigmas,
            start,
            path_temps,
            self.model.params,
            self.model.table,
            self.step_s,
            full_sigma,
            full_conc,
        )
        offset = start.size - times.size
        sigma = full_sigma[:, :, offset:]
        conc = full_conc[:, :, offset:]
        wm, wc = self._points.Wm, self._points.Wc
        sigma_mean = np.einsum("i,pij->pj", wm, sigma)
        conc_mean = np.einsum("i,pij->pj", wm, conc)
        spread = np.einsum("i,pij->pj", wc, (sigma - sigma_mean[:, None, :]) ** 2)
        c_sat = self.curve.c_sat(temps)
        curve_var = (conc_mean / c_sat**2 * self.curve.c_sat_std(temps)) ** 2
        noise_var = self._conc_noise_var * times / c_sat**2
        std = np.sqrt(np.maximum(spread, 0.0) + curve_var + noise_var)
        return sigma_mean, std, conc_mean

    def bind(self, x: ArrayLike, P: ArrayLike) -> BoundPredictor:
        """The forecaster of one estimate, as the controller's ``SigmaPredictor`` protocol asks:
        ``predict_sigma(times_s (n,), temp_path_k (m, n)) -> (mean, std)``, each (m, n)."""
        return BoundPredictor(self, np.array(x, dtype=float), np.array(P, dtype=float))


@dataclass(frozen=True)
class BoundPredictor:
    """:class:`SigmaPredictor` bound to one estimate (``controller.protocols.SigmaPredictor``)."""

    predictor: SigmaPredictor
    x: FloatArray
    P: FloatArray

    def predict_sigma(
        self, times_s: ArrayLike, temp_path_k: ArrayLike
    ) -> tuple[FloatArray, FloatArray]:
        """Mean and std of sigma [-], (m, n), along the m paths ``temp_path_k`` (m, n) [K] at
        ``times_s`` (n,) [s after the estimate]."""
        times = np.asarray(times_s, dtype=float)
        temps = np.atleast_2d(np.asarray(temp_path_k, dtype=float))
        _check_path(times, temps)
        mean, std, _ = self.predictor._forecast(self.x, self.P, times, temps)
        return mean, std


def _check_path(times: FloatArray, temps: FloatArray) -> None:
    if times.ndim != 1 or times.size == 0 or temps.shape[-1] != times.size:
        raise ForecastError("the path needs 1-D times and temperatures of one length")
    if not (np.all(np.isfinite(times)) and np.all(np.isfinite(temps))):
        raise ForecastError("the path holds a value that is not finite")
    if times[0] < 0.0 or np.any(np.diff(times) <= 0.0):
        raise ForecastError("the path's times must start at 0 or later and increase")
