"""Shadow mode: what the advisor would have proposed and raised during a replayed batch.

The replay kernel estimates every sample of a batch at once; the advisor then steps through
the samples one by one, through the very :class:`sensor.pipeline.Advisor` the live service
runs (the law every update interval in a proposal phase, the guard and the alarms at every
sample). Nothing is written anywhere: the guard's decision is recorded as it would have been,
with the permissive taken as granted, the link as up, and the working setpoint as unknown (the
historian does not hold it), so the law and the guard count from the estimated reactor
temperature.

One difference from live, said plainly: the kernel keeps the variances and the
temperature-concentration covariance of each sample, not the full covariance, so the law's
forecast starts from that covariance (the other correlations taken as zero). Its standard
deviation, and so the proposals, can differ slightly from what the live service would have
shown.
"""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass

import numpy as np

from controller.alarms import AlarmEvent, EventKind
from controller.guard import GuardMode
from sensor.batchfilter import (
    FLAG_CONC_STALE,
    FLAG_JACKET_STALE,
    FLAG_TEMP_STALE,
    KernelOutput,
)
from sensor.consistency import NIS_STATES
from sensor.crystallizer import CONC, TEMP
from sensor.numerics import FloatArray
from sensor.outputs import Estimates
from sensor.pipeline import Advisor, DcsInputs, EstimateView, PipelineSetup
from sensor.predictor import SigmaPredictor
from sensor.units import ZERO_CELSIUS_K
from sensor.validation import Reason

SHADOW = DcsInputs(permissive=True)
"""What shadow mode takes the DCS to say: permissive granted, link up, working setpoint not
known."""

NIS_HIGH = NIS_STATES.index("high")
STALE = FLAG_TEMP_STALE | FLAG_JACKET_STALE | FLAG_CONC_STALE

SHADOW_COLUMNS = (
    "proposal_setpoint_c",
    "proposal_rate_k_per_min",
    "proposal_mode",
    "guard_mode",
    "guard_setpoint_c",
    "guard_write",
    "alarm_events",
)
"""The shadow run's columns of the ``--estimates`` CSV (README explains each)."""


@dataclass(frozen=True)
class ShadowTrack:
    """The advisor's shadow run over one batch, one entry per sample (N).

    Attributes
    ----------
    proposal_setpoint_k : the law's latest proposal [K]; NaN where there was none
    proposal_rate_k_per_s : the cooling rate it implied [K/s]; NaN where none
    proposal_mode : the law's mode ("" where there was no proposal)
    proposed : the law ran at this sample
    guard_mode : the guard's mode (``advising``, ``standby``, ``fallback``)
    guard_setpoint_k : the guarded setpoint [K]; NaN where none
    write : the guard would have written the setpoint
    events : the alarm events, in time order (times on the batch's time base)
    event_sample : the sample index of each event
    """

    proposal_setpoint_k: FloatArray
    proposal_rate_k_per_s: FloatArray
    proposal_mode: tuple[str, ...]
    proposed: np.ndarray
    guard_mode: tuple[str, ...]
    guard_setpoint_k: FloatArray
    write: np.ndarray
    events: tuple[AlarmEvent, ...]
    event_sample: np.ndarray

    def alarms_raised(self) -> dict[str, int]:
        """Times each alarm was raised, by name (sorted)."""
        counts = Counter(e.alarm for e in self.events if e.kind is EventKind.RAISED)
        return dict(sorted(counts.items()))

    def time_in_mode_s(self, time_s: FloatArray, mode: GuardMode) -> float:
        """Time [s] the guard spent in ``mode``: each sample counts until the next one."""
        interval = np.diff(time_s, append=time_s[-1])
        chosen = np.array([m == mode.value for m in self.guard_mode], dtype=bool)
        return float(np.sum(interval[chosen]))


def sample_covariance(var: FloatArray, cov_temp_conc: float) -> FloatArray:
    """The covariance the kernel's record allows: its variances on the diagonal and the
    temperature-concentration covariance (module docstring)."""
    P = np.diag(var)
    P[TEMP, CONC] = P[CONC, TEMP] = cov_temp_conc
    return P


def shadow_run(
    setup: PipelineSetup,
    time_s: FloatArray,
    phases: tuple[str, ...],
    out: KernelOutput,
    started: np.ndarray,
    est: Estimates,
    nis_state: np.ndarray,
) -> ShadowTrack:
    """The advisor over one replayed batch.

    Parameters
    ----------
    setup : the unit's pipeline setup
    time_s : (N,) the samples' times [s]
    phases : (N,) our phase name at each sample
    out : the kernel's record of the batch
    started : (N,) the filter was running
    est : the outputs of the started samples
    nis_state : (N,) the windowed NIS state codes
    """
    advisor = Advisor(setup)
    forecast = SigmaPredictor(
        setup.sensor.model, setup.sensor.tuning, setup.sensor.zone.solubility, setup.forecast_step_s
    )
    n = len(time_s)
    nan = math.nan
    proposal_k = np.full(n, nan)
    proposal_rate = np.full(n, nan)
    proposal_mode = [""] * n
    proposed = np.zeros(n, dtype=bool)
    guard_mode = [""] * n
    guard_k = np.full(n, nan)
    write = np.zeros(n, dtype=bool)
    events: list[AlarmEvent] = []
    event_sample: list[int] = []
    rows = np.cumsum(started) - 1
    temp_k = est.temp_c + ZERO_CELSIUS_K
    for k in range(n):
        flags = int(out.flags[k])
        common = {
            "time_s": float(time_s[k]),
            "phase": phases[k],
            "data_stale": bool(flags & STALE),
            "conc_stale": bool(flags & FLAG_CONC_STALE),
            "conc_reason": Reason(int(out.reasons[k, 2])),
            "nis_high": int(nis_state[k]) == NIS_HIGH,
        }
        if started[k]:
            j = int(rows[k])
            view = EstimateView(
                started=True,
                temp_k=float(temp_k[j]),
                conc=float(est.conc[j]),
                sigma=float(est.sigma[j]),
                sigma_limit=float(est.sigma_limit[j]),
                analyzer_bias=float(est.analyzer_bias[j]),
                extrapolated=bool(est.extrapolated[j]),
                **common,
            )
        else:
            view = EstimateView(
                started=False,
                temp_k=nan,
                conc=nan,
                sigma=nan,
                sigma_limit=nan,
                analyzer_bias=nan,
                extrapolated=False,
                **common,
            )

        def bound(k: int = k) -> object:
            return forecast.bind(out.x[k], sample_covariance(out.var[k], out.cov_temp_conc[k]))

        step = advisor.step(view, SHADOW, bound)  # type: ignore[arg-type]
        if step.proposal is not None:
            proposal_k[k] = step.proposal.setpoint_k
            proposal_rate[k] = step.proposal.cooling_rate_k_per_s
            proposal_mode[k] = step.proposal.mode.value
        proposed[k] = step.proposed
        decision = step.decision
        guard_mode[k] = decision.mode.value
        guard_k[k] = decision.setpoint_k
        write[k] = decision.write
        events.extend(step.events)
        event_sample.extend([k] * len(step.events))
    return ShadowTrack(
        proposal_setpoint_k=proposal_k,
        proposal_rate_k_per_s=proposal_rate,
        proposal_mode=tuple(proposal_mode),
        proposed=proposed,
        guard_mode=tuple(guard_mode),
        guard_setpoint_k=guard_k,
        write=write,
        events=tuple(events),
        event_sample=np.array(event_sample, dtype=int),
    )
