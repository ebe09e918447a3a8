r"""The setpoint law: supersaturation tracking with a chance-constrained look-ahead.

At every update the law proposes the next reactor-temperature setpoint of a seeded cooling
batch, in three moves.

1. **Target.** The target relative supersaturation sits inside the metastable zone as a fixed
   fraction :math:`f` of the zone at the current temperature, read at a configured reference
   cooling rate :math:`b_{ref}` (the rate the plant usually runs at):

   .. math:: \sigma^* = f\,\sigma_{lim}(T, b_{ref})

   Reading it at the law's own current rate instead makes the target chase the rate (faster
   cooling, wider zone, higher target, faster cooling; then the reverse): a limit cycle between
   holds and fast ramps, seen on the tests' toy crystallizer. The rate dependence of the zone is
   kept where it belongs, in the check below.

2. **Direct design** [1]_ [2]_. The setpoint that would put the solution at its target is the
   saturation temperature of the concentration the solution would have if it held exactly
   :math:`\sigma^*`, found by inverting the solubility curve:

   .. math:: T_{dd} = T_{sat}\!\left(\frac{c}{1 + \sigma^*}\right)

   Cooling toward :math:`T_{dd}` raises sigma toward its target; crystal growth draws it back
   down. When sigma is at or above its target, :math:`T_{dd}` lies at or above the setpoint:
   the law then holds, and the growing crystals consume the excess. It never heats to get
   there.

3. **Chance-constrained check.** For a small set of cooling rates :math:`b_j \in [0, b_{max}]`
   the model's predictor forecasts sigma over the horizon along the path the batch takes if
   this proposal is the last one: the ramp :math:`T(t) = \max(T_f, T_0 - b_j \min(t, t_c))`,
   kept for :math:`t_c` and then held. :math:`t_c` follows from the guard's fallback. With
   ``recipe`` it is one update interval: at the next update the law proposes again, and a
   hold is always among its choices; if it steps aside instead, the DCS's recipe (the
   site's own, validated profile) takes over. With ``hold-rate`` it is the whole horizon: on
   doubt the guard keeps ramping at the last rate it let through, so that rate must be safe
   for as long as the forecast looks. A rate passes when

   .. math:: \bar\sigma(t) + k\,s_\sigma(t) \le \sigma_{lim}(T(t), \max(b_j, b_{min}))
             \quad \text{for every } t \text{ in the horizon}

   where :math:`b_{min}` is the slowest rate the zone was measured at: Nývlt's relation says
   nothing about holds (its width goes to zero with the rate), so a hold, or a ramp that has
   stopped at the final temperature, is judged against the zone at :math:`b_{min}`.

   The largest rate such that it and every slower rate pass is kept, refined once between it
   and the first rate that fails (two predictor calls at most, each for all candidates at
   once). So a wider confidence band (larger :math:`s_\sigma`) gives gentler cooling. If not
   even a hold passes, the law holds: it cannot do better without heating.

The proposal is the slower of the two: :math:`T_{sp} = \max(T_{dd}, T_{sp,0} - b\,\Delta t,
T_f)`, never above the current setpoint :math:`T_{sp,0}`.

In a configured dissolution step (fines removal; ``GuardLimits.heating_phases``) the target is a
small undersaturation, :math:`\sigma^* < 0`, so :math:`T_{dd}` lies above the saturation
temperature and the law heats toward it, no faster than the maximum heating rate. That is the
only place it heats.

The law assumes solubility rises with temperature (a cooling crystallization). Where the
inverse says otherwise, or cannot answer (an extrapolated curve), or an input or the forecast is
not a number, the law makes no proposal and says why; the guard then falls back.

References
----------
.. [1] Z. K. Nagy, J. W. Chew, M. Fujiwara, R. D. Braatz, "Comparative performance of
   concentration and temperature controlled batch crystallizations", J. Process Control 18
   (2008) 399-407. doi:10.1016/j.jprocont.2007.10.007
.. [2] M. Fujiwara, Z. K. Nagy, J. W. Chew, R. D. Braatz, "First-principles and direct design
   approaches for the control of pharmaceutical crystallization", J. Process Control 15 (2005)
   493-504. doi:10.1016/j.jprocont.2004.08.003
.. [3] A. Charnes, W. W. Cooper, "Chance-constrained programming", Management Science 6 (1959)
   73-79 (the constraint on mean plus k standard deviations).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from enum import Enum

import numpy as np

from controller.errors import ControllerError, check_fields
from controller.guard import Fallback, GuardLimits
from controller.protocols import (
    FloatArray,
    MetastableLimit,
    SaturationTemperature,
    SigmaPredictor,
)


@dataclass(frozen=True)
class LawSettings:
    """How the law tracks and how far it looks ahead.

    Parameters
    ----------
    target_fraction : :math:`f`, the target as a fraction of the metastable zone [-], in (0, 1)
    confidence_k : :math:`k`, standard deviations of the forecast kept below the limit [-]
    horizon_s : how far ahead the forecast looks [s]
    interval_s : the update interval [s]; also the spacing of the forecast's time points
    target_zone_rate_k_per_s : :math:`b_{ref}`, the cooling rate at which the zone is read for
        the target [K/s]
    zone_min_rate_k_per_s : :math:`b_{min}`, the slowest rate the zone is read at [K/s]
        (usually the slowest rate of the cloud-point data)
    dissolution_sigma : the target in a dissolution step [-], in (-1, 0)
    rate_candidates : cooling rates tried per predictor call (besides a hold), at least 2
    """

    target_fraction: float
    confidence_k: float
    horizon_s: float
    interval_s: float
    target_zone_rate_k_per_s: float
    zone_min_rate_k_per_s: float
    dissolution_sigma: float = -0.05
    rate_candidates: int = 8

    def __post_init__(self) -> None:
        checks = (
            ("target_fraction", 0.0 < self.target_fraction < 1.0, "must be in (0, 1)"),
            ("confidence_k", self.confidence_k >= 0.0, "must be 0 or more"),
            ("horizon_s", self.horizon_s > 0.0, "must be positive"),
            ("interval_s", self.interval_s > 0.0, "must be positive"),
            ("target_zone_rate_k_per_s", self.target_zone_rate_k_per_s > 0.0, "must be positive"),
            ("zone_min_rate_k_per_s", self.zone_min_rate_k_per_s > 0.0, "must be positive"),
            ("dissolution_sigma", -1.0 < self.dissolution_sigma < 0.0, "must be in (-1, 0)"),
            ("rate_candidates", self.rate_candidates >= 2, "must be at least 2"),
        )
        check_fields(self, checks)


@dataclass(frozen=True)
class LawInputs:
    """What the law is told at one update.

    Parameters
    ----------
    time_s : time of the update [s]
    phase : the batch phase now (our phase name)
    temp_k : reactor temperature, as estimated [K]
    setpoint_k : the reactor-temperature setpoint the DCS is using now [K]
    conc : solute concentration, as estimated [kg/kg solvent]
    predictor : the model's forecast, bound to the current estimate
    """

    time_s: float
    phase: str
    temp_k: float
    setpoint_k: float
    conc: float
    predictor: SigmaPredictor


class LawMode(Enum):
    """What set the proposal."""

    TRACKING = "tracking"
    """The direct-design setpoint: sigma is approaching its target."""
    LIMITED_BY_FORECAST = "limited by forecast"
    """The chance constraint: a faster rate would take the forecast past the limit."""
    AT_MAX_RATE = "at max rate"
    """The guard's maximum cooling rate."""
    HOLD_ABOVE_TARGET = "hold above target"
    """Sigma is at or above its target: hold, and let the crystals grow."""
    HOLD_FORECAST = "hold by forecast"
    """Not even a hold keeps the forecast below the limit: hold (no heating)."""
    AT_FINAL_TEMPERATURE = "at final temperature"
    DISSOLVING = "dissolving"
    """A dissolution step: heating toward a small undersaturation."""
    UNAVAILABLE = "unavailable"
    """No proposal: see the reason."""


@dataclass(frozen=True)
class Proposal:
    """The law's proposal at one update.

    Attributes
    ----------
    time_s : time of the update [s]
    setpoint_k : proposed reactor-temperature setpoint [K]; NaN when unavailable
    cooling_rate_k_per_s : the setpoint's rate of change it implies [K/s], positive when
        cooling, negative when heating
    mode : what set it
    sigma_target : :math:`\\sigma^*` [-]
    direct_design_k : :math:`T_{dd}` [K]
    forecast_margin : least room over the horizon for the chosen rate,
        :math:`\\min_t(\\sigma_{lim} - \\bar\\sigma - k s_\\sigma)` [-]; NaN when not forecast
    reason : in plain words, why this proposal (or none)
    """

    time_s: float
    setpoint_k: float
    cooling_rate_k_per_s: float
    mode: LawMode
    sigma_target: float
    direct_design_k: float
    forecast_margin: float
    reason: str


def direct_design_setpoint_k(
    conc: FloatArray, sigma_target: FloatArray, saturation: SaturationTemperature
) -> FloatArray:
    r"""Direct design: the temperature at which ``conc`` would hold ``sigma_target``.

    .. math:: T_{dd} = T_{sat}\!\left(\frac{c}{1 + \sigma^*}\right)

    Parameters
    ----------
    conc : concentration [kg/kg solvent]
    sigma_target : target relative supersaturation [-], above -1
    saturation : the solubility curve's inverse

    Returns
    -------
    temperature [K]; NaN where the inverse cannot answer
    """
    c = np.asarray(conc, dtype=float)
    return saturation.temp_sat(c / (1.0 + np.asarray(sigma_target, dtype=float)))


def ramp_paths_k(
    start_k: float,
    floor_k: float,
    rates_k_per_s: FloatArray,
    times_s: FloatArray,
    ramp_s: float = math.inf,
) -> tuple[FloatArray, FloatArray]:
    """Cooling ramps from ``start_k`` [K], each at a constant rate for ``ramp_s`` [s] and then
    held, that stop at ``floor_k`` [K].

    Returns
    -------
    temps_k : the temperatures [K], shape ``(len(rates), len(times))``; a start below the floor
        stays where it is (no heating)
    point_rates_k_per_s : each point's cooling rate [K/s], same shape: the ramp's rate while it
        moves (``times_s < ramp_s``, above the floor), 0 once it has stopped
    """
    floor = min(floor_k, start_k)
    ramp = start_k - np.outer(rates_k_per_s, np.minimum(times_s, ramp_s))
    moving = (ramp > floor) & (times_s < ramp_s)
    return np.maximum(ramp, floor), np.where(moving, rates_k_per_s[:, None], 0.0)


def forecast_margin(
    predictor: SigmaPredictor,
    limit: MetastableLimit,
    times_s: FloatArray,
    paths_k: FloatArray,
    point_rates_k_per_s: FloatArray,
    *,
    confidence_k: float,
    zone_min_rate_k_per_s: float,
) -> FloatArray:
    r"""Least room under the metastable limit along each path, one predictor call.

    .. math:: m_j = \min_t \left[\sigma_{lim}(T_j(t), \max(b_j(t), b_{min}))
              - \bar\sigma_j(t) - k\,s_{\sigma,j}(t)\right]

    Parameters
    ----------
    predictor : the model's forecast
    limit : the metastable limit
    times_s : forecast times [s], shape (n,)
    paths_k : reactor temperatures [K], shape (m, n)
    point_rates_k_per_s : :math:`b_j(t)`, the cooling rate at each point [K/s], shape (m, n)
    confidence_k : :math:`k` [-]
    zone_min_rate_k_per_s : :math:`b_{min}` [K/s]

    Returns
    -------
    the margin of each path [-], shape (m,); NaN where the forecast or the limit is not a number

    Raises
    ------
    ControllerError
        If the predictor answers in the wrong shape.
    """
    mean, std = predictor.predict_sigma(times_s, paths_k)
    mean = np.asarray(mean, dtype=float)
    std = np.asarray(std, dtype=float)
    if mean.shape != paths_k.shape or std.shape != paths_k.shape:
        raise ControllerError(
            f"the predictor answered shapes {mean.shape} and {std.shape} for paths of shape "
            f"{paths_k.shape}"
        )
    sigma_lim = limit.sigma_limit(paths_k, np.maximum(point_rates_k_per_s, zone_min_rate_k_per_s))
    room = sigma_lim - mean - confidence_k * std
    margin = room.min(axis=1)
    return np.where(np.isfinite(room).all(axis=1), margin, np.nan)


def _unavailable(
    time_s: float, reason: str, sigma_target: float = math.nan, temp_dd: float = math.nan
) -> Proposal:
    return Proposal(
        time_s, math.nan, math.nan, LawMode.UNAVAILABLE, sigma_target, temp_dd, math.nan, reason
    )


class SetpointLaw:
    """Proposes the next reactor-temperature setpoint; stateless between updates.

    Parameters
    ----------
    settings : how it tracks and looks ahead
    limits : the guard's limits; the law proposes inside the rate and final-temperature limits
        (the guard checks again)
    saturation : the solubility curve's inverse
    limit : the metastable limit
    """

    def __init__(
        self,
        settings: LawSettings,
        limits: GuardLimits,
        saturation: SaturationTemperature,
        limit: MetastableLimit,
    ) -> None:
        self.settings = settings
        self.limits = limits
        self.saturation = saturation
        self.limit = limit
        steps = max(1, math.ceil(settings.horizon_s / settings.interval_s - 1e-9))
        self._times_s = settings.interval_s * np.arange(1.0, steps + 1.0)
        self._grid = limits.max_cooling_rate_k_per_s * np.linspace(
            0.0, 1.0, settings.rate_candidates + 1
        )
        self.ramp_s = math.inf if limits.fallback is Fallback.HOLD_RATE else settings.interval_s
        """How long the check keeps a candidate rate before holding [s] (module docstring)."""

    def propose(self, inputs: LawInputs) -> Proposal:
        """The proposal for one update (see the module's description)."""
        settings = self.settings

        def unavailable(reason: str, sigma_target: float = math.nan) -> Proposal:
            return _unavailable(inputs.time_s, reason, sigma_target)

        values = (inputs.temp_k, inputs.setpoint_k, inputs.conc)
        if not all(math.isfinite(v) for v in values) or inputs.conc <= 0.0:
            return unavailable(
                f"an input is not usable (temp {inputs.temp_k} K, setpoint "
                f"{inputs.setpoint_k} K, conc {inputs.conc} kg/kg)"
            )
        dissolving = inputs.phase in self.limits.heating_phases
        if dissolving:
            sigma_target = settings.dissolution_sigma
        else:
            sigma_lim = float(
                self.limit.sigma_limit(
                    np.array(inputs.temp_k), np.array(settings.target_zone_rate_k_per_s)
                )
            )
            if not (math.isfinite(sigma_lim) and sigma_lim > 0.0):
                return unavailable(f"the metastable limit is not usable ({sigma_lim})")
            sigma_target = settings.target_fraction * sigma_lim
        temp_dd, temp_sat = direct_design_setpoint_k(
            np.array([inputs.conc, inputs.conc]), np.array([sigma_target, 0.0]), self.saturation
        )
        if not (math.isfinite(temp_dd) and math.isfinite(temp_sat)):
            return unavailable(
                f"the solubility curve cannot place {inputs.conc:.6g} kg/kg without extrapolating",
                sigma_target,
            )
        if (temp_dd - temp_sat) * sigma_target > 0.0:
            return unavailable(
                "solubility falls with temperature here; a cooling law does not apply",
                sigma_target,
            )
        if dissolving:
            return self._dissolve(inputs, sigma_target, float(temp_dd))
        return self._cool(inputs, sigma_target, float(temp_dd))

    def _dissolve(self, inputs: LawInputs, sigma_target: float, temp_dd: float) -> Proposal:
        step = self.limits.max_heating_rate_k_per_s * self.settings.interval_s
        top = self.limits.setpoint_range_k[1]
        setpoint = max(inputs.setpoint_k, min(temp_dd, inputs.setpoint_k + step, top))
        return Proposal(
            inputs.time_s,
            setpoint,
            (inputs.setpoint_k - setpoint) / self.settings.interval_s,
            LawMode.DISSOLVING,
            sigma_target,
            temp_dd,
            math.nan,
            f"dissolution step: heating toward sigma {sigma_target:+.3f}",
        )

    def _cool(self, inputs: LawInputs, sigma_target: float, temp_dd: float) -> Proposal:
        settings, limits = self.settings, self.limits
        interval, final = settings.interval_s, limits.final_temp_k
        setpoint0 = inputs.setpoint_k

        def proposal(rate: float, mode: LawMode, margin: float, reason: str) -> Proposal:
            setpoint = min(setpoint0, max(final, setpoint0 - rate * interval))
            return Proposal(
                inputs.time_s,
                setpoint,
                (setpoint0 - setpoint) / interval,
                mode,
                sigma_target,
                temp_dd,
                margin,
                reason,
            )

        if setpoint0 <= final:
            return proposal(0.0, LawMode.AT_FINAL_TEMPERATURE, math.nan, "at the final temperature")
        # The rate that reaches the direct-design setpoint (or the final temperature) in one
        # interval, tried alongside the fixed candidates.
        wanted = max(0.0, (setpoint0 - max(temp_dd, final)) / interval)
        rates = np.union1d(self._grid, [min(wanted, limits.max_cooling_rate_k_per_s)])
        margins = self._margins(inputs, rates)
        if np.isnan(margins).any():
            return _unavailable(
                inputs.time_s,
                "the forecast or the metastable limit along it is not a number",
                sigma_target,
                temp_dd,
            )
        passing = np.logical_and.accumulate(margins >= 0.0)
        if not passing[0]:
            return proposal(
                0.0,
                LawMode.HOLD_FORECAST,
                float(margins[0]),
                "not even a hold keeps the forecast below the metastable limit: holding",
            )
        last = int(np.flatnonzero(passing)[-1])
        if wanted <= rates[last]:
            index = int(np.searchsorted(rates, wanted))
            margin = float(margins[index])
            if wanted == 0.0:
                return proposal(
                    0.0,
                    LawMode.HOLD_ABOVE_TARGET,
                    margin,
                    "sigma is at or above its target: holding while the crystals grow",
                )
            if temp_dd <= final:
                return proposal(
                    wanted, LawMode.AT_FINAL_TEMPERATURE, margin, "reaching the final temperature"
                )
            return proposal(wanted, LawMode.TRACKING, margin, "tracking the sigma target")
        if last + 1 == len(rates):
            return proposal(
                float(rates[last]),
                LawMode.AT_MAX_RATE,
                float(margins[last]),
                "cooling at the maximum rate the guard allows",
            )
        chosen, margin = float(rates[last]), float(margins[last])
        finer = np.linspace(chosen, rates[last + 1], settings.rate_candidates + 2)[1:-1]
        finer_margins = self._margins(inputs, finer)
        finer_passing = np.logical_and.accumulate(finer_margins >= 0.0)
        if finer_passing.any():
            best = int(np.flatnonzero(finer_passing)[-1])
            chosen, margin = float(finer[best]), float(finer_margins[best])
        return proposal(
            chosen,
            LawMode.LIMITED_BY_FORECAST,
            margin,
            f"a faster rate would take sigma + {settings.confidence_k:g} std past the limit",
        )

    def _margins(self, inputs: LawInputs, rates: FloatArray) -> FloatArray:
        times = self._times_s
        start = min(inputs.temp_k, inputs.setpoint_k)
        paths, point_rates = ramp_paths_k(
            start, self.limits.final_temp_k, rates, times, self.ramp_s
        )
        return forecast_margin(
            inputs.predictor,
            self.limit,
            times,
            paths,
            point_rates,
            confidence_k=self.settings.confidence_k,
            zone_min_rate_k_per_s=self.settings.zone_min_rate_k_per_s,
        )
