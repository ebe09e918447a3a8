r"""Compiled pieces of the unscented Kalman filter, shared by the live filter
(:class:`sensor.kalman.CrystallizerUKF`, a subclass of filterpy's ``UnscentedKalmanFilter``) and
the replay kernel (:mod:`sensor.batchfilter`), so that both compute the same sums.

Each function does what filterpy 2.0 [1]_ does at the same place, in the same order, with
loops instead of numpy calls on tiny arrays:

- :func:`sigma_points_into`: Merwe's scaled sigma points [2]_ as
  ``MerweScaledSigmaPoints.sigma_points`` orders them, :math:`\chi_0 = x`,
  :math:`\chi_{k+1} = x + U_k`, :math:`\chi_{n+k+1} = x - U_k`, with :math:`U` the upper
  Cholesky factor of :math:`(n + \lambda) P` (``U.T @ U``, as ``scipy.linalg.cholesky``);
- :func:`propagate_into`: the crystallizer model on every sigma point
  (``UKF.compute_process_sigmas``), in one call;
- :func:`unscented_moments_into`: the weighted mean and covariance plus :math:`Q`
  (``unscented_transform``);
- :func:`linear_innovation` and :func:`linear_update_into`: ``UKF.update`` for a scalar linear
  measurement :math:`z = h^\top x + v` in closed form (see :func:`linear_update_into` for why
  it equals the sigma-point sums).

References
----------
.. [1] R. Labbe, *Kalman and Bayesian Filters in Python* and filterpy 2.0 (``filterpy.kalman``),
   2015-2020.
.. [2] R. van der Merwe, *Sigma-Point Kalman Filters for Probabilistic Inference in Dynamic
   State-Space Models*, PhD thesis, OGI, 2004.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from sensor.crystallizer import step_points
from sensor.numerics import FloatArray


@numba.njit(cache=True)
def cholesky_upper(a: FloatArray, u: FloatArray) -> bool:
    """Upper-triangular ``u`` with ``u.T @ u = a`` (as ``scipy.linalg.cholesky``); False when
    ``a`` is not positive-definite (or holds NaN)."""
    n = a.shape[0]
    u[:, :] = 0.0
    for j in range(n):
        s = a[j, j]
        for k in range(j):
            s -= u[k, j] * u[k, j]
        if not s > 0.0:
            return False
        d = math.sqrt(s)
        u[j, j] = d
        for i in range(j + 1, n):
            t = a[j, i]
            for k in range(j):
                t -= u[k, j] * u[k, i]
            u[j, i] = t / d
    return True


@numba.njit(cache=True)
def sigma_points_into(
    x: FloatArray,
    P: FloatArray,
    spread: float,
    scaled: FloatArray,
    chol: FloatArray,
    out: FloatArray,
) -> bool:
    """Merwe's sigma points of (``x``, ``P``) into ``out`` (2n+1, n), as filterpy orders them.

    Parameters
    ----------
    spread : :math:`n + \\lambda`, :math:`\\lambda = \\alpha^2 (n + \\kappa) - n` [-]
    scaled, chol : (n, n) scratch; ``chol`` holds the Cholesky factor on return

    Returns False (``out`` undefined) when ``spread * P`` is not positive-definite.
    """
    n = x.shape[0]
    for i in range(n):
        for j in range(n):
            scaled[i, j] = spread * P[i, j]
    if not cholesky_upper(scaled, chol):
        return False
    for j in range(n):
        out[0, j] = x[j]
    for k in range(n):
        for j in range(n):
            out[k + 1, j] = x[j] + chol[k, j]
            out[n + k + 1, j] = x[j] - chol[k, j]
    return True


@numba.njit(cache=True)
def bias_pair(n: int) -> np.ndarray:
    """The ``skip`` mask of :func:`propagate_into` for ``n`` states: the two sigma points
    (``n`` and ``2n``) that differ from the mean only in the last state, the analyzer bias."""
    skip = np.zeros(2 * n + 1, dtype=np.bool_)
    skip[n] = True
    skip[2 * n] = True
    return skip


@numba.njit(cache=True)
def propagate_into(
    sig: FloatArray,
    skip: np.ndarray,
    dt: float,
    jacket_temp_k: float,
    params: FloatArray,
    table: FloatArray,
    sigf: FloatArray,
    slope: FloatArray,
    mean_slope: FloatArray,
) -> None:
    """Step every sigma point ``sig`` (2n+1, n) of the crystallizer model over ``dt`` [s] into
    ``sigf``, as filterpy's ``compute_process_sigmas`` does point by point, bit for bit.

    The pair marked in ``skip`` (:func:`bias_pair`) is not stepped: the last row of the upper
    Cholesky factor has a single entry, so those two points differ from the mean only in the
    analyzer bias, which the model neither reads nor moves; their propagation is the mean's
    with their own bias, which is what is written. ``slope`` is scratch; ``mean_slope``
    receives the rates at the mean (``sig[0]``) at the start (see
    :func:`sensor.crystallizer.step_points`).
    """
    n = sig.shape[1]
    step_points(sig, skip, dt, jacket_temp_k, params, table, sigf, slope, mean_slope)
    for i in range(sig.shape[0]):
        if skip[i]:
            sigf[i, :] = sigf[0, :]
            sigf[i, n - 1] = sig[i, n - 1]


@numba.njit(cache=True)
def unscented_moments_into(
    sigf: FloatArray, wm: FloatArray, wc: FloatArray, q: FloatArray, x: FloatArray, P: FloatArray
) -> None:
    """The unscented transform: weighted mean of ``sigf`` (2n+1, n) into ``x`` and weighted
    covariance plus ``q`` into ``P`` (symmetric by construction), as filterpy's
    ``unscented_transform`` without a mean or residual function."""
    count, n = sigf.shape
    for j in range(n):
        acc = 0.0
        for i in range(count):
            acc += wm[i] * sigf[i, j]
        x[j] = acc
    for a in range(n):
        for b in range(a, n):
            acc = 0.0
            for i in range(count):
                acc += wc[i] * (sigf[i, a] - x[a]) * (sigf[i, b] - x[b])
            P[a, b] = acc + q[a, b]
            P[b, a] = P[a, b]


@numba.njit(cache=True)
def linear_innovation(
    x: FloatArray, P: FloatArray, h: FloatArray, z: float, r: float
) -> tuple[float, float]:
    """Innovation :math:`y = z - h^\\top x` and its variance :math:`S = h^\\top P h + r` of a
    scalar linear measurement (units of ``z`` and their square)."""
    n = x.shape[0]
    predicted = 0.0
    var = r
    for a in range(n):
        if h[a] != 0.0:
            predicted += h[a] * x[a]
            for b in range(n):
                if h[b] != 0.0:
                    var += h[a] * P[a, b] * h[b]
    return z - predicted, var


@numba.njit(cache=True)
def linear_update_into(
    x: FloatArray, P: FloatArray, h: FloatArray, y: float, var: float, gain: FloatArray
) -> None:
    r"""filterpy's UKF ``update`` of ``x``, ``P`` in place for a scalar linear measurement with
    innovation ``y`` and its variance ``var`` (:func:`linear_innovation`); the gain into
    ``gain``.

    The closed form :math:`K = P h / S`, :math:`x \leftarrow x + K y`,
    :math:`P \leftarrow P - K S K^\top`. It equals filterpy's sigma-point sums up to rounding
    because the sigma points are drawn from the very :math:`(x, P)` being updated (filterpy 2.0
    redraws them after its predict), their weights sum to one and their deviations
    :math:`\pm U_k` reproduce :math:`P` exactly
    (:math:`\sum_i W^c_i (\chi_i - x)(\chi_i - x)^\top = 2 \frac{1}{2(n+\lambda)} U^\top U = P`),
    and a linear :math:`h` carries means and covariances through unchanged: the transform's
    mean is :math:`h^\top x`, its variance :math:`h^\top P h + r` and the cross-covariance
    :math:`P h`.
    """
    n = x.shape[0]
    for j in range(n):
        acc = 0.0
        for k in range(n):
            if h[k] != 0.0:
                acc += P[j, k] * h[k]
        gain[j] = acc / var
    for j in range(n):
        x[j] += gain[j] * y
    for a in range(n):
        for c in range(a, n):
            value = P[a, c] - gain[a] * var * gain[c]
            P[a, c] = value
            P[c, a] = value
