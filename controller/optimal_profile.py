r"""The offline optimised cooling profile: the shortest batch that keeps sigma under a cap.

Given the model's forecast from the state at the start of cooling (a :class:`SigmaPredictor`
bound to that state), find the piecewise-linear reactor-temperature profile from :math:`T_0` to
:math:`T_f` of least duration such that the forecast stays under the cap all along, and for a
hold after the end:

.. math:: \min_{d} \sum_{i=1}^{N} d_i \quad \text{subject to} \quad
          \bar\sigma(t) + k\,s_\sigma(t) \le \sigma_{max}\ \ \forall t, \qquad
          d_i \ge \frac{\Delta T}{N\,b_{max}}

The profile has :math:`N` segments of equal temperature drop :math:`\Delta T / N`; the decision
variables are their durations :math:`d_i`, so the objective is linear and the maximum cooling
rate is a bound. The constraint is evaluated at fixed times; its Jacobian by forward
differences, all perturbed profiles in one predictor call. It is solved by SLSQP [1]_
(``scipy.optimize.minimize``), starting from the shortest constant-rate ramp that meets the
cap, found first by bracketing on the duration (constant ramps assumed to peak lower when
slower). The answer is checked again on a finer time grid; if the finer grid finds the cap
crossed, the profile is stretched until it is not (or, if that is shorter, a slightly slower
constant ramp is taken). The result meets the cap on that grid, or there is no result.

It is a plan for a recipe's fallback profile, made offline on the model: the plant will differ
from the model, which is why the live advisor keeps looking.

References
----------
.. [1] D. Kraft, "A software package for sequential quadratic programming", DFVLR-FB 88-28,
   DLR German Aerospace Center, 1988 (the SLSQP method behind ``scipy.optimize``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize

from controller.errors import PlanError, SettingsError, check_fields
from controller.profiles import CoolingProfile
from controller.protocols import FloatArray, SigmaPredictor

_FINE_POINTS = 256
"""Fewest forecast times on the grids that find the starting ramp and verify the answer."""


@dataclass(frozen=True)
class PlanSettings:
    """What the optimiser may do.

    Parameters
    ----------
    sigma_max : the cap on the forecast [-]
    max_cooling_rate_k_per_s : the fastest cooling allowed [K/s]
    max_duration_s : the longest batch considered [s]; if not even this slow a ramp keeps under
        the cap, there is no plan
    confidence_k : standard deviations of the forecast kept under the cap [-] (0: the mean)
    segments : :math:`N`, segments of the profile
    points_per_segment : forecast times per segment of the starting ramp
    hold_fraction : after the end, the hold checked, as a fraction of the starting ramp [-]
    """

    sigma_max: float
    max_cooling_rate_k_per_s: float
    max_duration_s: float
    confidence_k: float = 0.0
    segments: int = 8
    points_per_segment: int = 8
    hold_fraction: float = 0.1

    def __post_init__(self) -> None:
        checks = (
            ("sigma_max", self.sigma_max > 0.0, "must be positive"),
            ("max_cooling_rate_k_per_s", self.max_cooling_rate_k_per_s > 0.0, "must be positive"),
            ("max_duration_s", self.max_duration_s > 0.0, "must be positive"),
            ("confidence_k", self.confidence_k >= 0.0, "must be 0 or more"),
            ("segments", self.segments >= 2, "must be at least 2"),
            ("points_per_segment", self.points_per_segment >= 2, "must be at least 2"),
            ("hold_fraction", self.hold_fraction >= 0.0, "must be 0 or more"),
        )
        check_fields(self, checks)


@dataclass(frozen=True)
class PlanResult:
    """The optimised profile and what it was compared with.

    Attributes
    ----------
    profile : the optimised profile
    peak : the highest forecast :math:`\\bar\\sigma + k s_\\sigma` along it, hold included [-]
    linear_duration_s : the shortest constant-rate ramp that meets the same cap [s], to about
        0.1 % (the optimiser's starting point)
    predictor_calls : calls made to the predictor
    converged : whether SLSQP reported success (the profile meets the cap either way)
    """

    profile: CoolingProfile
    peak: float
    linear_duration_s: float
    predictor_calls: int
    converged: bool


class _Forecaster:
    """Peaks and constraint values of profiles, counting predictor calls."""

    def __init__(self, predictor: SigmaPredictor, start_k: float, final_k: float, k: float):
        self.predictor = predictor
        self.start_k = start_k
        self.final_k = final_k
        self.k = k
        self.calls = 0

    def upper(self, times_s: FloatArray, paths_k: FloatArray) -> FloatArray:
        """:math:`\\bar\\sigma + k s_\\sigma` along each path, shape (m, n)."""
        self.calls += 1
        mean, std = self.predictor.predict_sigma(times_s, paths_k)
        upper = np.asarray(mean, dtype=float) + self.k * np.asarray(std, dtype=float)
        if upper.shape != paths_k.shape:
            raise PlanError(f"the predictor answered shape {upper.shape} for {paths_k.shape}")
        if not np.all(np.isfinite(upper)):
            raise PlanError("the forecast along a trial profile is not a number")
        return upper

    def segment_paths(self, durations: FloatArray, times_s: FloatArray) -> FloatArray:
        """Temperatures at ``times_s`` of profiles with segment ``durations`` (m, N)."""
        segments = durations.shape[1]
        knots_t = np.concatenate([np.zeros((len(durations), 1)), np.cumsum(durations, 1)], 1)
        knots_temp = np.linspace(self.start_k, self.final_k, segments + 1)
        return np.stack([np.interp(times_s, row, knots_temp) for row in knots_t])

    def ramp_peaks(self, durations_s: FloatArray, hold_s: float, points: int) -> FloatArray:
        """Peak of :math:`\\bar\\sigma + k s_\\sigma` of constant ramps of each duration."""
        times = np.linspace(0.0, durations_s.max() + hold_s, points + 1)[1:]
        fraction = np.minimum(times[None, :] / durations_s[:, None], 1.0)
        paths = self.start_k + (self.final_k - self.start_k) * fraction
        return self.upper(times, paths).max(axis=1)


def _shortest_ramp_s(
    forecaster: _Forecaster, settings: PlanSettings, fastest_s: float, points: int
) -> float:
    """The shortest constant ramp whose peak meets the cap: 16 durations a call, spaced
    geometrically from the fastest to the longest allowed, then twice 16 inside the bracket
    found (about 0.1 % of the duration)."""
    trial = np.geomspace(fastest_s, settings.max_duration_s, 16)
    peaks = forecaster.ramp_peaks(trial, settings.hold_fraction * trial[-1], points)
    ok = peaks <= settings.sigma_max
    if not ok.any():
        raise PlanError(
            f"not even a {settings.max_duration_s / 3600:.3g} h linear ramp keeps the forecast "
            f"under sigma_max = {settings.sigma_max:g} (its peak is {peaks[-1]:.4g})"
        )
    first = int(np.argmax(ok))
    if first == 0:
        return fastest_s
    low, high = float(trial[first - 1]), float(trial[first])
    for _ in range(2):
        trial = np.linspace(low, high, 17)[1:]
        ok = (
            forecaster.ramp_peaks(trial, settings.hold_fraction * high, points)
            <= settings.sigma_max
        )
        if not ok.any():
            break
        first = int(np.argmax(ok))
        low, high = (low if first == 0 else float(trial[first - 1])), float(trial[first])
    return high


def minimum_time_profile(
    predictor: SigmaPredictor,
    start_temp_k: float,
    final_temp_k: float,
    settings: PlanSettings,
) -> PlanResult:
    """The shortest profile from ``start_temp_k`` to ``final_temp_k`` [K] under the cap.

    Parameters
    ----------
    predictor : the model's forecast from the state at the start (reactor at ``start_temp_k``)
    start_temp_k : temperature at the start of cooling [K]
    final_temp_k : final temperature [K], below the start
    settings : the cap, the rate limit and the optimiser's resolution

    Raises
    ------
    PlanError
        If no constant ramp up to ``settings.max_duration_s`` keeps under the cap, or the
        forecast is not a number.
    """
    drop = start_temp_k - final_temp_k
    if not (math.isfinite(drop) and drop > 0.0):
        raise SettingsError(
            "minimum_time_profile", "final_temp_k", f"must be below the start; got {final_temp_k}"
        )
    n = settings.segments
    fastest = drop / settings.max_cooling_rate_k_per_s
    if fastest > settings.max_duration_s:
        raise PlanError(
            f"at the maximum cooling rate the drop of {drop:.3g} K takes longer than "
            f"max_duration_s = {settings.max_duration_s:g} s"
        )
    points = n * settings.points_per_segment
    fine_points = max(4 * points, _FINE_POINTS)
    forecaster = _Forecaster(predictor, start_temp_k, final_temp_k, settings.confidence_k)
    linear_s = _shortest_ramp_s(forecaster, settings, fastest, fine_points)
    hold_s = settings.hold_fraction * linear_s
    shortest_segment = fastest / n
    durations = np.full(n, linear_s / n)
    converged = True
    # First on times spread over the starting ramp, then on times spread over the first
    # answer, which is shorter: the constraint is then checked where the profile is.
    end_s = linear_s + hold_s
    for _ in range(2):
        times = np.linspace(0.0, end_s, points + 1)[1:]
        result = _solve(
            forecaster, durations, times, settings.sigma_max, shortest_segment, linear_s
        )
        durations = np.clip(np.asarray(result.x, dtype=float), shortest_segment, linear_s)
        converged = converged and bool(result.success)
        end_s = 1.2 * durations.sum() + hold_s
    profile, peak = _verified(
        forecaster, durations, linear_s, hold_s, settings.sigma_max, fine_points
    )
    return PlanResult(profile, peak, linear_s, forecaster.calls, converged)


def _solve(
    forecaster: _Forecaster,
    start: FloatArray,
    times_s: FloatArray,
    cap: float,
    shortest_segment_s: float,
    longest_segment_s: float,
) -> optimize.OptimizeResult:
    """SLSQP on the segment durations, the cap checked at ``times_s``."""
    n = start.size
    step = 1e-3 * start.mean()
    cache: dict[bytes, tuple[FloatArray, FloatArray]] = {}

    def slack(durations: FloatArray) -> tuple[FloatArray, FloatArray]:
        key = durations.tobytes()
        if key not in cache:
            trial = np.vstack([durations, durations + step * np.eye(n)])
            values = cap - forecaster.upper(times_s, forecaster.segment_paths(trial, times_s))
            cache.clear()
            cache[key] = (values[0], ((values[1:] - values[0]) / step).T)
        return cache[key]

    return optimize.minimize(
        lambda d: float(np.sum(d)),
        start,
        jac=lambda d: np.ones(n),
        method="SLSQP",
        bounds=[(shortest_segment_s, longest_segment_s)] * n,
        constraints=[{"type": "ineq", "fun": lambda d: slack(d)[0], "jac": lambda d: slack(d)[1]}],
        options={"maxiter": 100, "ftol": 1e-6 * start.sum()},
    )


def _verified(
    forecaster: _Forecaster,
    durations: FloatArray,
    linear_s: float,
    hold_s: float,
    cap: float,
    points: int,
) -> tuple[CoolingProfile, float]:
    """The shortest profile that meets the cap on a fine grid, among the optimised durations
    stretched by up to the ramp's length (16 factors, closer together near 1) and constant
    ramps of 1 to 1.2 times the ramp's length (4), all checked in one predictor call."""
    n = durations.size
    total = float(durations.sum())
    stretch = 1.0 + (max(1.0, linear_s / total) - 1.0) * np.linspace(0.0, 1.0, 16) ** 2
    ramps = linear_s * np.array([1.0, 1.05, 1.1, 1.2])
    trial = np.vstack([durations[None, :] * stretch[:, None], np.repeat(ramps[:, None] / n, n, 1)])
    lengths = trial.sum(axis=1)
    times = np.linspace(0.0, lengths.max() + hold_s, points + 1)[1:]
    peaks = forecaster.upper(times, forecaster.segment_paths(trial, times)).max(axis=1)
    passing = np.flatnonzero(peaks <= cap)
    if passing.size == 0:
        raise PlanError(
            f"no profile could be verified under sigma_max = {cap:g} on the fine grid (the "
            f"lowest peak was {peaks.min():.4g}); raise points_per_segment"
        )
    best = int(passing[np.argmin(lengths[passing])])
    name = "optimised" if best < stretch.size else "optimised (a constant ramp)"
    time = np.concatenate([[0.0], np.cumsum(trial[best])])
    knots_temp = np.linspace(forecaster.start_k, forecaster.final_k, n + 1)
    return CoolingProfile(name, time, knots_temp), float(peaks[best])
