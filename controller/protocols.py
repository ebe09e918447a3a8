"""What the controller is handed: three small typed protocols, in floats, numpy arrays and SI.

The controller knows nothing of the soft sensor's types. Whoever drives it hands in

- a :class:`SaturationTemperature`: the inverse of the solubility curve,
- a :class:`MetastableLimit`: the relative supersaturation at the metastable limit,
- a :class:`SigmaPredictor`: the estimation model's forecast of sigma, from the current
  estimate, along prescribed reactor-temperature paths.

``sensor.solubility.SolubilityCurve`` and ``sensor.metastable.MetastableZone`` already have
the first two methods with these names and meanings; the predictor is adapted from the soft
sensor's model by the integration. Tests use toy callables with the same methods.
"""

from __future__ import annotations

from typing import Protocol

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]
"""A numpy array of floats."""


class SaturationTemperature(Protocol):
    """The solubility curve read backwards."""

    def temp_sat(self, conc: FloatArray) -> FloatArray:
        """Saturation temperature [K] of solutions of concentration ``conc`` [kg/kg solvent],
        elementwise; NaN where the curve cannot answer without extrapolating."""
        ...


class MetastableLimit(Protocol):
    """The edge of the metastable zone, in relative supersaturation."""

    def sigma_limit(self, temp_k: FloatArray, rate_k_per_s: FloatArray) -> FloatArray:
        """Relative supersaturation [-] at which a solution at ``temp_k`` [K], cooled at
        ``rate_k_per_s`` [K/s] (positive), nucleates; the arguments broadcast."""
        ...


class SigmaPredictor(Protocol):
    """The estimation model's forecast of sigma, bound to one current estimate.

    The integration builds one per step from the soft sensor's estimate (mean and covariance of
    the state); the controller only asks it questions.
    """

    def predict_sigma(
        self, times_s: FloatArray, temp_path_k: FloatArray
    ) -> tuple[FloatArray, FloatArray]:
        """Forecast relative supersaturation along reactor-temperature paths.

        Parameters
        ----------
        times_s : times after the estimate [s], shape (n,), positive and increasing
        temp_path_k : reactor temperature [K] at those times, one row per path, shape (m, n);
            the reactor starts from its current temperature at time 0 and moves linearly
            between the points

        Returns
        -------
        mean, std : the forecast's mean and standard deviation of sigma [-], each (m, n);
            the standard deviation includes the uncertainty of the estimate, of the model's
            parameters and of the solubility curve, as the model knows them
        """
        ...
