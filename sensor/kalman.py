r"""The soft sensor's Kalman filter: filterpy's UKF (default) or EKF on the crystallizer model,
with the analyzer's transport delay, innovation gating and a covariance kept symmetric.

Measurements (scalar, sequential updates):

- reactor temperature, :math:`z_T = T + v_T`, :math:`v_T \sim N(0, r_T)`;
- analyzer concentration, :math:`z_c(t) = c(t - d) + b + v_c`, delayed by :math:`d`.

**Delay: a buffer with re-filtering.** The filter keeps the events (sample times, jacket input,
temperature measurements, seeding) of the last :math:`d` + ``history_margin_s`` seconds with the
posterior after each. An analyzer value arriving at :math:`t` was drawn at :math:`t_s = t - d`:
the filter returns to the last event at or before :math:`t_s`, predicts to :math:`t_s`, applies
the analyzer update there, and re-runs every later event (predict and temperature update) up to
:math:`t`. For a linear system this is the exact Bayesian answer (measurements taken in their
true order); it handles irregular sample times and any delay, and costs about :math:`d / \Delta t`
extra steps per analyzer sample. An analyzer value older than the history is refused.

**Process noise** is additive, white, per state, with a state-dependent part for the kinetics'
stated uncertainty: the nucleation rate's relative error :math:`\epsilon_B` (and the growth
rate's :math:`\epsilon_G` when :math:`\theta` is not estimated) is treated as white noise with
correlation time :math:`\tau`, so its variance per step is
:math:`(\epsilon f)^2 \tau \Delta t`, :math:`f` the rate it multiplies, evaluated at the mean.

**Gating**: an update whose normalised innovation squared (NIS)
:math:`\nu^2 = y^2 / S` exceeds the chi-square quantile at ``gate_probability`` (1 degree of
freedom) is not applied and is reported as gated. After ``max_consecutive_gated`` gated analyzer
values in a row the filter concludes that it, not the analyzer, is wrong: it widens the
concentration and bias variances back to their initial values and applies the next one.

**Covariance**: symmetrised after every predict and update; the UKF's sigma points need its
Cholesky factor, so a covariance that stops being positive-definite raises
:class:`FilterError` naming the time.

References
----------
.. [1] S. J. Julier, J. K. Uhlmann, "Unscented filtering and nonlinear estimation",
   Proc. IEEE 92 (2004) 401-422. doi:10.1109/JPROC.2003.823141
.. [2] R. van der Merwe, *Sigma-Point Kalman Filters for Probabilistic Inference in Dynamic
   State-Space Models*, PhD thesis, OGI, 2004 (scaled sigma points).
.. [3] Y. Bar-Shalom, X. R. Li, T. Kirubarajan, *Estimation with Applications to Tracking and
   Navigation*, Wiley, 2001, sections 5.4 (NIS, NEES, consistency) and 10.2 (out-of-sequence and
   delayed measurements).
.. [4] R. Labbe, *Kalman and Bayesian Filters in Python* (filterpy), 2015-2020.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Literal

import numba
import numpy as np
from filterpy.kalman import ExtendedKalmanFilter, MerweScaledSigmaPoints, UnscentedKalmanFilter
from scipy import stats

from controller.checkpoint import get_float, put_float
from sensor.crystallizer import (
    CONC,
    GROWTH_SCALE,
    TEMP,
    ZETA0,
    ZETA3,
    CrystallizerModel,
    StateLayout,
    rates,
    step,
    step_jacobian,
    stop_moments,
)
from sensor.errors import SigmatrackError
from sensor.numerics import FloatArray, get_array, put_array
from sensor.unscented import (
    bias_pair,
    linear_innovation,
    linear_update_into,
    propagate_into,
    sigma_points_into,
    unscented_moments_into,
)


class FilterError(SigmatrackError, ArithmeticError):
    """The filter's covariance stopped being positive-definite (or its state is not finite)."""


# Indices into the packed noise vector the compiled process-noise function takes.
Q_TEMP, Q_CONC, Q_MOMENT, Q_GROWTH_SCALE, Q_BIAS = 0, 1, 2, 3, 4
Q_NUCLEATION_REL, Q_GROWTH_REL, Q_ERROR_TIME = 5, 6, 7
N_NOISE = 8


_POSITIVE_TUNING = (
    "temp_process_std",
    "conc_process_std",
    "moment_process_std",
    "kinetics_error_time_s",
    "initial_temp_std",
    "initial_conc_rel_std",
    "initial_bias_std",
    "initial_moment_std",
    "sigma_alpha",
)
_NON_NEGATIVE_TUNING = (
    "growth_scale_random_walk_std",
    "bias_random_walk_std",
    "growth_rel_std",
    "nucleation_rel_std",
    "seed_rel_std",
    "history_margin_s",
)


@dataclass(frozen=True)
class FilterTuning:
    """Tuning of the filter (site file ``[filter]`` and ``[model]`` uncertainty keys), in SI.

    Parameters
    ----------
    kind : ``"ukf"`` (filterpy's UnscentedKalmanFilter) or ``"ekf"`` (ExtendedKalmanFilter)
    temp_process_std : process noise on :math:`T` [K/√s]
    conc_process_std : process noise on :math:`c` [kg/kg/√s]
    moment_process_std : process noise on each scaled moment [kg/kg/√s]
    growth_scale_random_walk_std : random walk of :math:`\\theta` [1/√s]
    bias_random_walk_std : random walk of the analyzer bias [kg/kg/√s]
    growth_rel_std : relative std of :math:`k_g` [-]: the initial std of :math:`\\theta`, or
        (without :math:`\\theta`) process noise on the growth term
    nucleation_rel_std : relative std of :math:`k_b` [-], process noise on the nucleation term
    kinetics_error_time_s : correlation time :math:`\\tau` of the kinetics' errors [s]
    initial_temp_std : [K]
    initial_conc_rel_std : [-], relative to the first analyzer value
    initial_bias_std : [kg/kg]
    initial_moment_std : std of each scaled moment before seeding [kg/kg]
    seed_rel_std : relative std of the seed charge's moments [-]
    gate_probability : chi-square gate [-]
    max_consecutive_gated : gated analyzer values in a row before the filter widens itself
    sigma_alpha, sigma_beta, sigma_kappa : Merwe's scaled sigma-point parameters [2]_
    history_margin_s : history kept beyond the analyzer delay [s]
    """

    kind: Literal["ukf", "ekf"] = "ukf"
    temp_process_std: float = 2e-3
    conc_process_std: float = 2e-6
    moment_process_std: float = 1e-8
    growth_scale_random_walk_std: float = 1e-4
    bias_random_walk_std: float = 3e-6
    growth_rel_std: float = 0.3
    nucleation_rel_std: float = 0.5
    kinetics_error_time_s: float = 60.0
    initial_temp_std: float = 0.5
    initial_conc_rel_std: float = 0.05
    initial_bias_std: float = 0.005
    initial_moment_std: float = 1e-6
    seed_rel_std: float = 0.1
    gate_probability: float = 0.999
    max_consecutive_gated: int = 5
    sigma_alpha: float = 1.0
    sigma_beta: float = 2.0
    sigma_kappa: float = 0.0
    history_margin_s: float = 60.0

    def __post_init__(self) -> None:
        rules = (
            (_POSITIVE_TUNING, lambda v: v > 0.0, "must be positive"),
            (_NON_NEGATIVE_TUNING, lambda v: v >= 0.0, "cannot be negative"),
        )
        for names, fine, problem in rules:
            for name in names:
                value = getattr(self, name)
                if not (math.isfinite(value) and fine(value)):
                    raise ValueError(f"filter tuning: {name} {problem}; got {value}")
        if not 0.0 < self.gate_probability < 1.0:
            raise ValueError(f"gate_probability must be in (0, 1); got {self.gate_probability}")
        if self.max_consecutive_gated < 1:
            raise ValueError("max_consecutive_gated must be at least 1")

    @property
    def gate_nis(self) -> float:
        """The NIS beyond which a scalar update is gated [-]."""
        return float(stats.chi2.ppf(self.gate_probability, 1))


def noise_vector(tuning: FilterTuning, estimate_growth_scale: bool) -> FloatArray:
    """The packed process-noise intensities the compiled :func:`process_noise` takes."""
    q = np.zeros(N_NOISE)
    q[Q_TEMP] = tuning.temp_process_std
    q[Q_CONC] = tuning.conc_process_std
    q[Q_MOMENT] = tuning.moment_process_std
    q[Q_GROWTH_SCALE] = tuning.growth_scale_random_walk_std
    q[Q_BIAS] = tuning.bias_random_walk_std
    q[Q_NUCLEATION_REL] = tuning.nucleation_rel_std
    q[Q_GROWTH_REL] = 0.0 if estimate_growth_scale else tuning.growth_rel_std
    q[Q_ERROR_TIME] = tuning.kinetics_error_time_s
    return q


@numba.njit(cache=True)
def process_noise_into(
    x: FloatArray,
    dt: float,
    jacket_temp_k: float,
    params: FloatArray,
    table: FloatArray,
    noise: FloatArray,
    q: FloatArray,
    slope: FloatArray,
) -> None:
    """Diagonal process-noise covariance :math:`Q` over ``dt`` [s] at the mean ``x``, into
    ``q`` (n, n); ``slope`` is scratch."""
    q[:, :] = 0.0
    if dt <= 0.0:
        return
    rates(x, jacket_temp_k, params, table, slope)
    noise_from_rates(slope, dt, noise, q)


@numba.njit(cache=True)
def noise_from_rates(slope: FloatArray, dt: float, noise: FloatArray, q: FloatArray) -> None:
    """:func:`process_noise_into` given the mean's rates ``slope`` (its state-dependent part
    scales with them), into ``q``, which must be zero."""
    n = slope.shape[0]
    kinetic = noise[Q_ERROR_TIME] * dt
    q[TEMP, TEMP] = noise[Q_TEMP] ** 2 * dt
    q[CONC, CONC] = noise[Q_CONC] ** 2 * dt + (noise[Q_GROWTH_REL] * slope[CONC]) ** 2 * kinetic
    for k in range(ZETA0, ZETA3 + 1):
        q[k, k] = noise[Q_MOMENT] ** 2 * dt
    q[ZETA0, ZETA0] += (noise[Q_NUCLEATION_REL] * slope[ZETA0]) ** 2 * kinetic
    if n == 8:
        q[GROWTH_SCALE, GROWTH_SCALE] = noise[Q_GROWTH_SCALE] ** 2 * dt
    q[n - 1, n - 1] = noise[Q_BIAS] ** 2 * dt


@numba.njit(cache=True)
def process_noise(
    x: FloatArray,
    dt: float,
    jacket_temp_k: float,
    params: FloatArray,
    table: FloatArray,
    noise: FloatArray,
) -> FloatArray:
    """Diagonal process-noise covariance :math:`Q` over ``dt`` [s] at the mean ``x``."""
    n = x.shape[0]
    q = np.empty((n, n))
    process_noise_into(x, dt, jacket_temp_k, params, table, noise, q, np.empty(n))
    return q


def merwe_weights(n: int, alpha: float, beta: float, kappa: float) -> tuple[FloatArray, FloatArray]:
    r"""Weights of Merwe's scaled sigma points [2]_ (as filterpy computes them):
    :math:`\lambda = \alpha^2 (n + \kappa) - n`, :math:`W_0^m = \lambda/(n+\lambda)`,
    :math:`W_0^c = W_0^m + 1 - \alpha^2 + \beta`, :math:`W_i = 1 / (2(n+\lambda))`."""
    points = MerweScaledSigmaPoints(n, alpha, beta, kappa)
    return np.array(points.Wm, dtype=float), np.array(points.Wc, dtype=float)


def measurement_rows(layout: StateLayout) -> tuple[FloatArray, FloatArray]:
    """The measurement rows :math:`h` (n,) of the reactor temperature (:math:`T`) and of the
    analyzer (:math:`c + b`): both measurements are linear, :math:`z = h^\\top x + v`."""
    h_temp = np.zeros(layout.size)
    h_temp[TEMP] = 1.0
    h_conc = np.zeros(layout.size)
    h_conc[CONC] = 1.0
    h_conc[layout.bias] = 1.0
    return h_temp, h_conc


class CompiledSigmaPoints(MerweScaledSigmaPoints):
    """filterpy's ``MerweScaledSigmaPoints`` [2]_ (same parameters, weights and order), its
    ``sigma_points`` compiled (:func:`sensor.unscented.sigma_points_into`): one call instead of
    scipy's Cholesky and numpy's row operations."""

    def __init__(self, n: int, alpha: float, beta: float, kappa: float) -> None:
        super().__init__(n, alpha, beta, kappa)
        self._spread = float(n + alpha**2 * (n + kappa) - n)
        self._scaled = np.empty((n, n))
        self._chol = np.empty((n, n))

    def sigma_points(self, x: FloatArray, P: FloatArray) -> FloatArray:
        """The 2n+1 sigma points (rows) of mean ``x`` and covariance ``P``.

        Raises
        ------
        numpy.linalg.LinAlgError
            If ``P`` is not positive-definite (or not finite), as scipy's Cholesky would.
        """
        out = np.empty((2 * self.n + 1, self.n))
        x = np.asarray(x, dtype=float)
        P = np.ascontiguousarray(P, dtype=float)
        if not sigma_points_into(x, P, self._spread, self._scaled, self._chol, out):
            raise np.linalg.LinAlgError("the covariance is not positive-definite")
        return out


class CrystallizerUKF(UnscentedKalmanFilter):
    r"""filterpy's ``UnscentedKalmanFilter`` on the crystallizer model, with the per-point
    Python work compiled; it computes the same filter (held to 1e-10 against the unmodified
    filterpy class by ``tests/test_kalman_fast.py``).

    - ``compute_process_sigmas`` draws the sigma points and steps all of them through the model
      in one call (:func:`sensor.unscented.propagate_into`, which skips the two points that
      differ from the mean only in the analyzer bias: their propagation is the mean's);
    - ``predict`` uses the compiled unscented transform (same sums as filterpy's) unless given
      another;
    - :meth:`update_linear` is ``update`` for a scalar linear measurement :math:`z = h^\top x +
      v` in closed form: the unscented transform of a linear function is exact, so
      :math:`\hat z = h^\top x`, :math:`S = h^\top P h + r` and :math:`P_{xz} = P h`, with no
      call of ``hx`` per sigma point and no ``cross_variance`` loop
      (:func:`sensor.unscented.linear_update_into` gives the reason in full).

    The sigma points are Merwe's (:class:`CompiledSigmaPoints`); ``fx`` is the model's
    :func:`~sensor.crystallizer.step` and ``hx`` the temperature row, kept for filterpy's own
    methods.
    """

    def __init__(self, model: CrystallizerModel, tuning: FilterTuning) -> None:
        n = model.layout.size
        points = CompiledSigmaPoints(n, tuning.sigma_alpha, tuning.sigma_beta, tuning.sigma_kappa)
        h_temp, _ = measurement_rows(model.layout)
        super().__init__(
            n,
            1,
            1.0,
            hx=lambda x: h_temp[None, :] @ x,
            fx=lambda x, dt, jacket_temp_k: step(x, dt, jacket_temp_k, model.params, model.table),
            points=points,
        )
        self._model = model
        self._skip = bias_pair(n)
        self._slope = np.empty(n)
        self._mean_slope = np.empty(n)
        self._gain = np.empty(n)

    def compute_process_sigmas(
        self, dt: float, fx: object = None, jacket_temp_k: float = math.nan
    ) -> None:
        """``sigmas_f``: the sigma points of (``x``, ``P``) stepped over ``dt`` [s] with the
        jacket at ``jacket_temp_k`` [K], all in one compiled call."""
        if fx is not None:
            raise TypeError("CrystallizerUKF propagates its own model; it takes no fx")
        sigmas = self.points_fn.sigma_points(self.x, self.P)
        out = np.empty_like(sigmas)
        model = self._model
        propagate_into(
            sigmas,
            self._skip,
            dt,
            jacket_temp_k,
            model.params,
            model.table,
            out,
            self._slope,
            self._mean_slope,
        )
        self.sigmas_f = out

    def predict(
        self, dt: float | None = None, UT: Any = None, fx: object = None, **fx_args: float
    ) -> None:
        """filterpy's ``predict``, with the compiled unscented transform by default."""
        super().predict(dt, _unscented_transform if UT is None else UT, fx, **fx_args)

    def update_linear(self, z: float, h: FloatArray, r: float) -> None:
        """``update`` with the scalar ``z`` of the linear measurement :math:`h^\\top x + v`,
        :math:`v \\sim N(0, r)` (class docstring); sets ``x``, ``P``, ``S``, ``SI``, ``K``,
        ``y``, ``z`` and the posterior copies as filterpy's ``update`` does.

        Raises
        ------
        numpy.linalg.LinAlgError
            If the innovation variance is not positive (as filterpy's inverse of a singular
            :math:`S`).
        """
        y, var = linear_innovation(self.x, self.P, h, z, r)
        if not var > 0.0:
            raise np.linalg.LinAlgError(f"innovation variance {var} is not positive")
        x = self.x.copy()
        P = self.P.copy()
        linear_update_into(x, P, h, y, var, self._gain)
        self.x, self.P = x, P
        self.S = np.array([[var]])
        self.SI = np.array([[1.0 / var]])
        self.K = self._gain[:, None].copy()
        self.y = np.array([y])
        self.z = np.array([z])
        self.x_post = x.copy()
        self.P_post = P.copy()
        self._log_likelihood = None
        self._likelihood = None
        self._mahalanobis = None


def _unscented_transform(
    sigmas: FloatArray,
    Wm: FloatArray,
    Wc: FloatArray,
    noise_cov: FloatArray,
    mean_fn: object = None,
    residual_fn: object = None,
) -> tuple[FloatArray, FloatArray]:
    """filterpy's ``unscented_transform`` (plain mean, residual ``np.subtract``), compiled
    (:func:`sensor.unscented.unscented_moments_into`)."""
    if mean_fn is not None or residual_fn not in (None, np.subtract):
        raise TypeError("the compiled unscented transform takes no mean or residual function")
    n = sigmas.shape[1]
    x = np.empty(n)
    P = np.empty((n, n))
    unscented_moments_into(sigmas, Wm, Wc, noise_cov, x, P)
    return x, P


@dataclass(frozen=True)
class UpdateInfo:
    """What one scalar update did.

    Attributes
    ----------
    innovation : measured minus predicted [K or kg/kg]
    innovation_var : its predicted variance :math:`S` [K² or (kg/kg)²]
    nis : :math:`y^2/S` [-]
    gated : True when the update was refused by the gate
    widened : True when the filter widened its concentration and bias variances first
    """

    innovation: float
    innovation_var: float
    nis: float
    gated: bool
    widened: bool = False


@dataclass
class _Event:
    time_s: float
    jacket_temp_k: float
    temp_k: float  # NaN: no temperature update at this event
    conc: float  # NaN: no analyzer update at this event
    seed: bool
    x: FloatArray
    P: FloatArray


@dataclass(frozen=True)
class Measurements:
    """Measurement noise and delay, in SI.

    Parameters
    ----------
    temp_noise_std_k : temperature transmitter noise [K]
    conc_noise_std : analyzer noise [kg/kg]
    analyzer_delay_s : transport and processing delay of the analyzer [s]
    """

    temp_noise_std_k: float
    conc_noise_std: float
    analyzer_delay_s: float = 0.0

    def __post_init__(self) -> None:
        if not (self.temp_noise_std_k > 0.0 and self.conc_noise_std > 0.0):
            raise ValueError("measurement noise std must be positive")
        if not self.analyzer_delay_s >= 0.0:
            raise ValueError(f"analyzer delay cannot be negative; got {self.analyzer_delay_s}")


# Indices into the packed initial-uncertainty vector.
I_TEMP, I_CONC_REL, I_BIAS, I_MOMENT, I_GROWTH_SCALE = range(5)
N_INITIAL = 5


def initial_vector(tuning: FilterTuning) -> FloatArray:
    """The packed initial standard deviations :func:`initial_state` and :func:`widen` take."""
    init = np.zeros(N_INITIAL)
    init[I_TEMP] = tuning.initial_temp_std
    init[I_CONC_REL] = tuning.initial_conc_rel_std
    init[I_BIAS] = tuning.initial_bias_std
    init[I_MOMENT] = tuning.initial_moment_std
    init[I_GROWTH_SCALE] = max(tuning.growth_rel_std, 1e-6)
    return init


@numba.njit(cache=True)
def initial_state(
    temp_k: float, conc_measured: float, init: FloatArray, n: int
) -> tuple[FloatArray, FloatArray]:
    """Prior mean and covariance at the first valid sample: measured temperature, the analyzer
    value as the concentration (bias 0), no crystals, :math:`\\theta = 1`; ``n`` is the state
    size (8 with :math:`\\theta`). The concentration's prior is the analyzer value less the
    (unknown) bias, so the two are correlated."""
    x = np.zeros(n)
    x[TEMP] = temp_k
    x[CONC] = conc_measured
    std = np.full(n, init[I_MOMENT])
    std[TEMP] = init[I_TEMP]
    std[CONC] = init[I_CONC_REL] * max(conc_measured, 1e-6)
    if n == 8:
        x[GROWTH_SCALE] = 1.0
        std[GROWTH_SCALE] = init[I_GROWTH_SCALE]
    std[n - 1] = init[I_BIAS]
    P = np.diag(std**2)
    # The first analyzer value measured c + b: c = z - b - e with the bias b and the error e
    # (initial_conc_rel_std) independent, so c's prior carries the bias's variance, negatively
    # correlated with it.
    P[CONC, CONC] += init[I_BIAS] ** 2
    P[CONC, n - 1] = -(init[I_BIAS] ** 2)
    P[n - 1, CONC] = -(init[I_BIAS] ** 2)
    return x, P


@numba.njit(cache=True)
def widen(P: FloatArray, x: FloatArray, init: FloatArray) -> None:
    """Raise the concentration and bias variances of ``P`` by their initial values, in place."""
    n = x.shape[0]
    P[CONC, CONC] += (init[I_CONC_REL] * max(x[CONC], 1e-6)) ** 2
    P[n - 1, n - 1] += init[I_BIAS] ** 2


def seed_covariance(seed_zeta: FloatArray, tuning: FilterTuning, size: int) -> FloatArray:
    """Covariance added to the moments at seeding: the seed's moments scale together with the
    seed charge (relative std ``seed_rel_std``), plus the moment floor."""
    added = np.zeros((size, size))
    block = slice(ZETA0, ZETA3 + 1)
    added[block, block] = tuning.seed_rel_std**2 * np.outer(seed_zeta, seed_zeta)
    return added


class CrystallizerFilter:
    """The per-unit Kalman filter: filterpy's UKF or EKF on :class:`CrystallizerModel`, with the
    delayed analyzer handled by re-filtering (module docstring).

    Call :meth:`start` once, then for each sample in time order :meth:`advance` (predict to the
    sample's time, seed if the batch was seeded, update with the temperature) and, when the
    sample holds an analyzer value, :meth:`analyzer`. Times are the samples' own [s]; nothing
    here reads a clock.

    The UKF is :class:`CrystallizerUKF` (filterpy's, with its per-sigma-point work compiled);
    ``reference=True`` takes the unmodified ``filterpy.kalman.UnscentedKalmanFilter`` instead,
    every sigma point through ``fx`` and ``hx`` one by one: the same filter, slower, against
    which the compiled one is tested and benchmarked.
    """

    def __init__(
        self,
        model: CrystallizerModel,
        tuning: FilterTuning,
        measurements: Measurements,
        seed_zeta: FloatArray,
        reference: bool = False,
    ) -> None:
        self.model = model
        self.tuning = tuning
        self.measurements = measurements
        self.seed_zeta = np.asarray(seed_zeta, dtype=float)
        if self.seed_zeta.shape != (4,):
            raise ValueError("seed moments must be 4 numbers (zeta0..zeta3)")
        n = model.layout.size
        self._noise = noise_vector(tuning, model.layout.estimate_growth_scale)
        self._init = initial_vector(tuning)
        self._seed_cov = seed_covariance(self.seed_zeta, tuning, n)
        self._gate = tuning.gate_nis
        self._h_temp, self._h_conc = measurement_rows(model.layout)
        self._r_temp = measurements.temp_noise_std_k**2
        self._r_conc = measurements.conc_noise_std**2
        self._ukf: UnscentedKalmanFilter | None
        if tuning.kind == "ukf" and reference:
            points = MerweScaledSigmaPoints(
                n, tuning.sigma_alpha, tuning.sigma_beta, tuning.sigma_kappa
            )
            self._ukf = UnscentedKalmanFilter(
                n, 1, 1.0, hx=self._hx_temp, fx=self._fx, points=points
            )
            self._ekf = None
        elif tuning.kind == "ukf":
            self._ukf = CrystallizerUKF(model, tuning)
            self._ekf = None
        else:
            self._ekf = _ModelEKF(n, model)
            self._ukf = None
        self._events: list[_Event] = []
        self._gated_run = 0

    # --- filterpy callbacks ------------------------------------------------------------------

    def _fx(self, x: FloatArray, dt: float, jacket_temp_k: float) -> FloatArray:
        return step(x, dt, jacket_temp_k, self.model.params, self.model.table)

    def _hx_temp(self, x: FloatArray) -> FloatArray:
        return self._h_temp[None, :] @ x

    def _hx_conc(self, x: FloatArray) -> FloatArray:
        return self._h_conc[None, :] @ x

    # --- state ---------------------------------------------------------------------------------

    @property
    def started(self) -> bool:
        return bool(self._events)

    @property
    def time_s(self) -> float:
        return self._events[-1].time_s

    @property
    def x(self) -> FloatArray:
        """Posterior mean at the latest sample."""
        return self._events[-1].x

    @property
    def P(self) -> FloatArray:
        """Posterior covariance at the latest sample."""
        return self._events[-1].P

    def _get(self) -> tuple[FloatArray, FloatArray]:
        f = self._ukf if self._ukf is not None else self._ekf
        return f.x, f.P

    def _set(self, x: FloatArray, P: FloatArray) -> None:
        f = self._ukf if self._ukf is not None else self._ekf
        f.x = x.copy()
        f.P = P.copy()

    def checkpoint(self) -> dict[str, Any]:
        """The filter's state as plain JSON values: its history of events (each with the
        posterior mean and covariance) and the run of gated analyzer values. Nothing else
        carries over between events: every event starts from the one before it."""
        return {
            "gated_run": self._gated_run,
            "events": [
                {
                    "time_s": put_float(e.time_s),
                    "jacket_temp_k": put_float(e.jacket_temp_k),
                    "temp_k": put_float(e.temp_k),
                    "conc": put_float(e.conc),
                    "seed": e.seed,
                    "x": put_array(e.x),
                    "P": put_array(e.P),
                }
                for e in self._events
            ],
        }

    def restore(self, state: Mapping[str, Any]) -> None:
        """Take the state :meth:`checkpoint` gave, from a filter on the same setup."""
        n = self.model.layout.size
        events = []
        for e in state["events"]:
            x, P = get_array(e["x"]), get_array(e["P"])
            if x.shape != (n,) or P.shape != (n, n):
                raise ValueError(f"checkpoint: a state of shape {x.shape} for a model of {n}")
            events.append(
                _Event(
                    get_float(e["time_s"]),
                    get_float(e["jacket_temp_k"]),
                    get_float(e["temp_k"]),
                    get_float(e["conc"]),
                    bool(e["seed"]),
                    x,
                    P,
                )
            )
        self._events = events
        self._gated_run = int(state["gated_run"])
        if events:
            self._set(events[-1].x, events[-1].P)

    def start(
        self, time_s: float, temp_k: float, conc_measured: float, jacket_temp_k: float
    ) -> None:
        """Initialise at the first sample with valid temperature, jacket and analyzer values."""
        x, P = initial_state(temp_k, conc_measured, self._init, self.model.layout.size)
        self._events = [_Event(time_s, jacket_temp_k, math.nan, math.nan, False, x, P)]
        self._gated_run = 0

    # --- one event -----------------------------------------------------------------------------

    def _predict(self, dt: float, jacket_temp_k: float, time_s: float) -> None:
        x, P = self._get()
        q = process_noise(x, dt, jacket_temp_k, self.model.params, self.model.table, self._noise)
        try:
            if self._ukf is not None:
                self._ukf.Q = q
                self._ukf.predict(dt=dt, jacket_temp_k=jacket_temp_k)
            else:
                self._ekf.Q = q
                self._ekf.predict_model(dt, jacket_temp_k)
        except (np.linalg.LinAlgError, ValueError):
            # ValueError: scipy's Cholesky refuses a covariance holding NaN or infinity
            raise FilterError(
                f"t = {time_s:.1f} s: the covariance is not positive-definite or not finite"
            ) from None
        x, P = self._get()
        x = x.copy()
        stopped = stop_moments(x)
        self._set(x, 0.5 * (P + P.T))
        if stopped:
            self._redraw()  # filterpy drew the sigma points around the mean before the stop

    def _seed(self) -> None:
        x, P = self._get()
        x = x.copy()
        x[ZETA0 : ZETA3 + 1] += self.seed_zeta
        self._set(x, P + self._seed_cov)
        self._redraw()

    def _redraw(self) -> None:
        if self._ukf is not None:
            self._ukf.sigmas_f = self._ukf.points_fn.sigma_points(self._ukf.x, self._ukf.P)

    def _update(
        self, z: float, channel: Literal["temp", "conc"], force: bool, time_s: float
    ) -> UpdateInfo:
        x, P = self._get()
        h = self._h_temp if channel == "temp" else self._h_conc
        r = self._r_temp if channel == "temp" else self._r_conc
        innovation, var = linear_innovation(x, P, h, z, r)
        nis = innovation * innovation / var
        if nis > self._gate and not force:
            return UpdateInfo(innovation, var, nis, gated=True)
        try:
            if isinstance(self._ukf, CrystallizerUKF):
                self._ukf.update_linear(z, h, r)
            elif self._ukf is not None:
                hx = self._hx_temp if channel == "temp" else self._hx_conc
                self._ukf.update(np.array([z]), R=np.array([[r]]), hx=hx)
            else:
                hm = h[None, :]
                self._ekf.update(
                    np.array([z]), HJacobian=lambda _x: hm, Hx=lambda s: hm @ s, R=np.array([[r]])
                )
        except (np.linalg.LinAlgError, ValueError):
            # ValueError: scipy's inverse refuses an innovation covariance holding NaN
            raise FilterError(
                f"t = {time_s:.1f} s: the {channel} update met a singular or non-finite covariance"
            ) from None
        x, P = self._get()
        x = x.copy()
        stop_moments(x)
        self._set(x, 0.5 * (P + P.T))
        return UpdateInfo(innovation, var, nis, gated=False)

    def _run(self, event: _Event, previous: _Event) -> UpdateInfo | None:
        """Process ``event`` from ``previous``'s posterior; store and return the temperature
        update's info."""
        self._set(previous.x, previous.P)
        self._predict(event.time_s - previous.time_s, previous.jacket_temp_k, event.time_s)
        if event.seed:
            self._seed()
        info = None
        if not math.isnan(event.temp_k):
            info = self._update(event.temp_k, "temp", force=False, time_s=event.time_s)
        if not math.isnan(event.conc):
            self._update(event.conc, "conc", force=True, time_s=event.time_s)
        x, P = self._get()
        # a NaN or infinity anywhere makes the sum one (a finite state's sums stay far from
        # overflow); two sums cost a quarter of numpy's isfinite-and-all on these small arrays
        if not (math.isfinite(x.sum()) and math.isfinite(P.sum())):
            raise FilterError(f"t = {event.time_s:.1f} s: the state is not finite")
        event.x, event.P = x.copy(), P.copy()
        return info

    # --- public steps --------------------------------------------------------------------------

    def advance(
        self, time_s: float, jacket_temp_k: float, temp_k: float | None, seed: bool = False
    ) -> UpdateInfo | None:
        """Predict to ``time_s`` [s], seed if ``seed``, update with ``temp_k`` [K] (None: no
        valid temperature). ``jacket_temp_k`` [K] is the input from this sample on.

        Returns the temperature update's :class:`UpdateInfo`, or None without one.
        """
        previous = self._events[-1]
        if not time_s >= previous.time_s:
            raise ValueError(f"t = {time_s} s is before the last sample {previous.time_s} s")
        temp = math.nan if temp_k is None else float(temp_k)
        event = _Event(time_s, jacket_temp_k, temp, math.nan, seed, previous.x, previous.P)
        info = self._run(event, previous)
        self._events.append(event)
        self._prune()
        return info

    def analyzer(self, time_s: float, conc_measured: float) -> UpdateInfo | None:
        """Apply an analyzer value that arrived at ``time_s`` [s] (drawn at ``time_s`` minus the
        delay) and re-filter to the latest sample. Returns None when the value is older than the
        filter's history (it is then not used)."""
        drawn = time_s - self.measurements.analyzer_delay_s
        index = self._anchor(drawn)
        if index is None:
            return None
        anchor = self._events[index]
        self._set(anchor.x, anchor.P)
        self._predict(drawn - anchor.time_s, anchor.jacket_temp_k, drawn)
        force = self._gated_run >= self.tuning.max_consecutive_gated
        widened = False
        if force:
            x, P = self._get()
            P = P.copy()
            widen(P, x, self._init)
            self._set(x, P)
            self._redraw()
            widened = True
        info = self._update(conc_measured, "conc", force=force, time_s=time_s)
        self._gated_run = self._gated_run + 1 if info.gated else 0
        if info.gated:
            return info
        x, P = self._get()
        inserted = _Event(drawn, anchor.jacket_temp_k, math.nan, conc_measured, False, x, P)
        inserted.x, inserted.P = x.copy(), P.copy()
        self._events.insert(index + 1, inserted)
        for i in range(index + 2, len(self._events)):
            self._run(self._events[i], self._events[i - 1])
        return UpdateInfo(info.innovation, info.innovation_var, info.nis, False, widened)

    def _anchor(self, time_s: float) -> int | None:
        for i in range(len(self._events) - 1, -1, -1):
            if self._events[i].time_s <= time_s:
                return i
        return None

    def _prune(self) -> None:
        keep_from = self.time_s - self.measurements.analyzer_delay_s - self.tuning.history_margin_s
        first = 0
        while first + 1 < len(self._events) and self._events[first + 1].time_s <= keep_from:
            first += 1
        if first:
            del self._events[:first]


class _ModelEKF(ExtendedKalmanFilter):
    """filterpy's EKF with the crystallizer model as its state transition (``predict_x``)."""

    def __init__(self, n: int, model: CrystallizerModel) -> None:
        super().__init__(dim_x=n, dim_z=1)
        self._model = model
        self._dt = 0.0
        self._jacket = 0.0

    def predict_model(self, dt: float, jacket_temp_k: float) -> None:
        self._dt = dt
        self._jacket = jacket_temp_k
        self.F = step_jacobian(self.x, dt, jacket_temp_k, self._model.params, self._model.table)
        self.predict()

    def predict_x(self, u: object = 0) -> None:
        self.x = step(self.x, self._dt, self._jacket, self._model.params, self._model.table)
