"""One unit's pipeline: sample -> estimate -> propose -> guard -> alarms, one result per step.

The live service, the closed loop on the simulator and the replay's shadow mode all run this
code; only the drivers differ (where samples come from, what is done with the results).

::

    sample ──> SoftSensor.step ──> Advisor.step ─────────────────────────────> PipelineResult
    (Sample)   validate, filter,   law (every update_interval_s, in a proposal   (maps onto the
               outputs             phase) -> guard (every step, with the DCS's    advisor server's
                                   signals) -> alarm engine (every step)          UnitOutputs)

Interface (stable: the service builds on it)
--------------------------------------------
- ``UnitPipeline(setup)`` with ``setup = sensor.shell.sitesensor.pipeline_setup(site, index,
  zone)`` (a :class:`PipelineSetup`: the unit's soft-sensor setup, the law's settings, the
  guard's limits, the alarms' settings, all SI).
- ``pipeline.step(sample, dcs) -> PipelineResult`` once per scan, ``sample`` a
  :class:`~sensor.samples.Sample` (times later than the previous one), ``dcs`` a
  :class:`DcsInputs` (permissive, the working setpoint the DCS uses, communication lost).
  Raises :class:`~sensor.softsensor.SampleOrderError` for a sample not after the previous one,
  and :class:`~sensor.kalman.FilterError` if the filter breaks down; nothing else is raised for
  bad data (bad values are reasons, doubts and alarms).
- ``result.decision`` is what to write: the remote setpoint ``decision.setpoint_k`` only when
  ``decision.write``, the heartbeat ``decision.heartbeat`` every step
  (``PlantClient.write_outputs(unit_id, result.decision)``).
- ``result`` has the fields of ``sensor.shell.opcua.advisor_server.UnitOutputs`` under the same
  names; ``advisor_server.unit_outputs(result)`` makes one.
- Operator actions: ``pipeline.act(alarm, action, note="", duration_s=nan)`` with ``action``
  ``"acknowledge"``, ``"shelve"`` or ``"unshelve"``, at the time of the last step, returns the
  alarm events (raises ``ControllerError`` to refuse, e.g. a shelve longer than allowed).
- ``pipeline.checkpoint() -> dict`` (strict JSON values: ``json.dumps`` of it needs no NaN) and
  ``UnitPipeline.restore(setup, state)``: a pipeline restored from a checkpoint steps on
  exactly as the one saved would have (filter mean, covariance and history, validation state,
  NIS window, guard, alarm engine, law schedule, last analyzer verdict). The alarm history is
  not in it (the store has the events).

Policies, in one place
----------------------
- The law runs only in the guard's proposal phases, every ``LawSettings.interval_s`` from the
  first step there, once the filter has started; elsewhere there is no proposal. The guard and
  the alarms step at every sample with the latest proposal.
- The working setpoint the law and the guard count from is the DCS's (``DcsInputs
  .active_setpoint_k``); where it is not known (NaN: not tagged, not Good) they count from the
  estimated reactor temperature. The replay's shadow mode always passes NaN (the historian
  does not hold the working setpoint), so its proposals say "from where the batch was".
- The guard is told: health good = the filter has started and its sigma, limit, temperature and
  concentration are numbers; data stale = a signal has had no accepted reading for
  ``stale_after_s``; NIS alarm = the windowed NIS is high; solubility extrapolated = the
  estimate's temperature is outside the curve's trusted range; communication lost from the
  driver.
- The analyzer's alarms (frozen, bad) hold the verdict on the last analyzer value that arrived
  (between analyzer samples nothing arrives, which is no verdict).
- "Temperature not following" compares the reactor temperature with the working setpoint while
  the guard is writing (advising), and is quiet otherwise.

Pure: no clock reads, no sockets, no globals; time is the samples'.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, fields
from typing import Any, Literal

import numpy as np

from controller.alarm_set import AlarmInputs, AlarmSettings, alarm_readings, crystallizer_alarms
from controller.alarms import AlarmEngine, AlarmEvent, AlarmStatus
from controller.checkpoint import get_float, put_float
from controller.errors import ControllerError
from controller.guard import (
    Guard,
    GuardDecision,
    GuardInputs,
    GuardLimits,
    followed_setpoint_k,
)
from controller.law import LawInputs, LawMode, LawSettings, Proposal, SetpointLaw
from controller.protocols import SigmaPredictor
from sensor.predictor import SigmaPredictor as ModelPredictor
from sensor.samples import Reading, Sample
from sensor.softsensor import SoftSensor, StepResult, UnitSetup
from sensor.units import ZERO_CELSIUS_K
from sensor.validation import Reason

Action = Literal["acknowledge", "shelve", "unshelve"]

BAD_ANALYZER_REASONS = frozenset(
    {Reason.NOT_FINITE, Reason.BAD_QUALITY, Reason.UNCERTAIN, Reason.OUT_OF_RANGE}
)
"""Verdicts on an analyzer value that raise "analyzer bad" (bad or uncertain quality, not a
number, outside the analyzer's range)."""


@dataclass(frozen=True)
class PipelineSetup:
    """Everything one unit's pipeline needs, in SI (``sensor.shell.sitesensor.pipeline_setup``
    builds it from the site file).

    Parameters
    ----------
    unit_id : the unit's id
    sensor : the soft sensor's setup
    law : the setpoint law's settings
    limits : the guard's limits
    alarms : the alarms' settings
    forecast_step_s : longest Euler step of the law's forecast [s]; 30 s, the spacing of the
        forecast's points at the demo's update interval: the forecast then costs about a third
        of what 10 s steps cost (the law's 2 ms budget), and the desupersaturation it follows
        takes tens of minutes
    """

    unit_id: str
    sensor: UnitSetup
    law: LawSettings
    limits: GuardLimits
    alarms: AlarmSettings
    forecast_step_s: float = 30.0


@dataclass(frozen=True)
class DcsInputs:
    """What the DCS says at one step, beyond the soft sensor's readings.

    Parameters
    ----------
    permissive : the DCS grants the advisor's setpoint (only True is a grant)
    active_setpoint_k : the reactor-temperature setpoint the DCS's loop uses now [K]; NaN when
        not known (the law and the guard then count from the estimated reactor temperature)
    communication_lost : the link to the DCS is down or not answering
    """

    permissive: bool = False
    active_setpoint_k: float = math.nan
    communication_lost: bool = False


@dataclass(frozen=True)
class EstimateView:
    """What the advisor reads of one soft-sensor step (the live step or a replayed sample).

    Parameters
    ----------
    time_s : the sample's time [s]
    phase : the batch phase (our name; "" when not known)
    started : the filter is running
    temp_k : estimated reactor temperature [K] (NaN before the start)
    conc : estimated concentration [kg/kg solvent]
    sigma : estimated relative supersaturation [-]
    sigma_limit : sigma at the metastable limit at the current temperature and rate [-]
    analyzer_bias : estimated analyzer bias [kg/kg solvent]
    extrapolated : the solubility curve is used outside its trusted range
    data_stale : a signal has had no accepted reading for too long
    conc_stale : the analyzer has had no accepted reading for too long
    conc_reason : what happened to the analyzer value of this sample (``MISSING``: none came)
    nis_high : the windowed NIS test says the estimate is inconsistent
    """

    time_s: float
    phase: str
    started: bool
    temp_k: float
    conc: float
    sigma: float
    sigma_limit: float
    analyzer_bias: float
    extrapolated: bool
    data_stale: bool
    conc_stale: bool
    conc_reason: Reason
    nis_high: bool

    @classmethod
    def of_step(cls, step: StepResult, phase: str | None) -> EstimateView:
        """The view of a live soft-sensor step."""
        nan = math.nan
        temp_k = conc = sigma = limit = bias = nan
        extrapolated = False
        if step.estimates is not None:
            e = step.estimates
            temp_k = float(e.temp_c[0]) + ZERO_CELSIUS_K
            conc, sigma = float(e.conc[0]), float(e.sigma[0])
            limit, bias = float(e.sigma_limit[0]), float(e.analyzer_bias[0])
            extrapolated = bool(e.extrapolated[0])
        return cls(
            time_s=step.time_s,
            phase=phase or "",
            started=step.started,
            temp_k=temp_k,
            conc=conc,
            sigma=sigma,
            sigma_limit=limit,
            analyzer_bias=bias,
            extrapolated=extrapolated,
            data_stale=not step.inputs_valid,
            conc_stale=step.conc_stale,
            conc_reason=step.conc,
            nis_high=step.nis_state == "high",
        )

    @property
    def health_good(self) -> bool:
        """The filter runs and its outputs are numbers."""
        values = (self.temp_k, self.conc, self.sigma, self.sigma_limit)
        return self.started and all(math.isfinite(v) for v in values)


@dataclass(frozen=True)
class AdvisorResult:
    """The advisor's part of one step.

    Attributes
    ----------
    proposal : the law's latest proposal (None outside the proposal phases and before the law
        has run)
    proposed : the law ran at this step
    decision : the guard's decision at this step
    alarms : every alarm's status after this step
    events : the alarm events of this step
    health_good : the soft sensor's health, as the guard was told
    communication_lost : as the driver said
    alarm_readings : what each alarm read at this step (``controller.alarm_set``)
    """

    proposal: Proposal | None
    proposed: bool
    decision: GuardDecision
    alarms: tuple[AlarmStatus, ...]
    events: tuple[AlarmEvent, ...]
    health_good: bool
    communication_lost: bool
    alarm_readings: Mapping[str, float]


@dataclass(frozen=True)
class PipelineResult:
    """One step of a unit's pipeline; the fields of the advisor server's ``UnitOutputs``
    (``time_s``, ``step``, ``proposal``, ``decision``, ``alarms``, ``events``, ``health_good``,
    ``communication_lost``), ``proposed`` (the law ran at this step) and ``alarm_readings``
    (what each alarm read)."""

    time_s: float
    step: StepResult
    proposal: Proposal | None
    decision: GuardDecision
    alarms: tuple[AlarmStatus, ...]
    events: tuple[AlarmEvent, ...]
    health_good: bool
    communication_lost: bool
    proposed: bool
    alarm_readings: Mapping[str, float]


class Advisor:
    """Propose, guard and judge for one unit, from soft-sensor views (module docstring).

    Parameters
    ----------
    setup : the pipeline's setup (the law's curve and zone are its soft sensor's)
    """

    def __init__(self, setup: PipelineSetup) -> None:
        self.setup = setup
        zone = setup.sensor.zone
        self.law = SetpointLaw(setup.law, setup.limits, zone.solubility, zone)
        self.guard = Guard(setup.limits)
        self.engine = AlarmEngine(
            crystallizer_alarms(setup.alarms), shelve_max_s=setup.alarms.shelve_max_s
        )
        self._proposal: Proposal | None = None
        self._next_law_s = -math.inf
        self._analyzer_verdict = Reason.MISSING
        self._time_s = math.nan

    @property
    def time_s(self) -> float:
        """The time of the last step [s] (NaN before the first)."""
        return self._time_s

    def step(
        self,
        view: EstimateView,
        dcs: DcsInputs,
        predictor: Callable[[], SigmaPredictor],
    ) -> AdvisorResult:
        """One step. ``predictor()`` gives the model's forecast bound to this step's estimate;
        it is called only when the law runs.

        Raises
        ------
        TimeOrderError
            If ``view.time_s`` is earlier than the previous step's.
        """
        t = view.time_s
        health = view.health_good
        setpoint_k = dcs.active_setpoint_k
        if not math.isfinite(setpoint_k):
            setpoint_k = view.temp_k
        proposed = False
        if view.phase not in self.setup.limits.proposal_phases or not view.started:
            self._proposal, self._next_law_s = None, -math.inf
        elif t >= self._next_law_s:
            temp_k = view.temp_k if health else math.nan  # the law then says why it cannot
            # A very uncertain estimate can send a sigma point of the forecast off to
            # overflow: the forecast is then inf or NaN, which the law treats as no room
            # (hold) or no forecast (no proposal); numpy need not warn about it.
            start_k = self._law_start_k(setpoint_k, t)
            with np.errstate(over="ignore", invalid="ignore"):
                self._proposal = self.law.propose(
                    LawInputs(t, view.phase, temp_k, start_k, view.conc, predictor())
                )
            self._next_law_s = t + self.setup.law.interval_s
            proposed = True
        proposal_k = math.nan if self._proposal is None else self._ramp_k(self._proposal, t)
        decision = self.guard.step(
            GuardInputs(
                time_s=t,
                phase=view.phase,
                active_setpoint_k=setpoint_k,
                permissive=dcs.permissive is True,
                health_good=health,
                data_stale=view.data_stale,
                nis_alarm=view.nis_high,
                communication_lost=dcs.communication_lost,
                solubility_extrapolated=view.extrapolated,
            ),
            proposal_k,
        )
        if view.conc_reason is not Reason.MISSING:
            self._analyzer_verdict = view.conc_reason
        verdict = self._analyzer_verdict
        readings = alarm_readings(
            AlarmInputs(
                phase=view.phase,
                sigma=view.sigma,
                sigma_limit=view.sigma_limit,
                temp_k=view.temp_k,
                setpoint_k=setpoint_k if decision.write else math.nan,
                conc=view.conc,
                analyzer_bias=view.analyzer_bias,
                analyzer_stale=view.conc_stale,
                analyzer_frozen=verdict is Reason.FROZEN,
                analyzer_bad=verdict in BAD_ANALYZER_REASONS,
                estimate_inconsistent=view.nis_high,
                solubility_extrapolated=view.extrapolated,
                communication_lost=dcs.communication_lost,
            ),
            self.setup.alarms,
        )
        events = self.engine.update(t, view.phase, readings)
        self._time_s = t
        return AdvisorResult(
            proposal=self._proposal,
            proposed=proposed,
            decision=decision,
            alarms=self.statuses(),
            events=events,
            health_good=health,
            communication_lost=dcs.communication_lost,
            alarm_readings=readings,
        )

    def _law_start_k(self, active_k: float, time_s: float) -> float:
        """The setpoint [K] a new proposal counts from: where the previous proposal's ramp has
        reached by ``time_s``, while the DCS follows it (the guard wrote at its last step, and
        the ramp lies at most ``max_step_k`` below the DCS's setpoint ``active_k``); otherwise
        ``active_k``.

        Counted from the DCS's setpoint alone, every update would start again from a setpoint
        at least one scan behind its own ramp (the DCS uses what was written at the scan
        before, and reads it back later still): on 10 s scans the ramps fell at two thirds of
        the law's rate, and the last ones only approached the final temperature geometrically,
        so the recipe's final hold waited for them."""
        if self._proposal is None or self.guard.written_k is None:
            return active_k
        reached = self._ramp_k(self._proposal, time_s)
        return followed_setpoint_k(self.setup.limits, active_k, reached)

    def _ramp_k(self, proposal: Proposal, time_s: float) -> float:
        """The setpoint [K] a proposal asks for at ``time_s``: the law's rate from the update,
        reaching its setpoint one interval later (the DCS's loop follows a ramp better than a
        step per interval)."""
        rate = proposal.cooling_rate_k_per_s
        if not math.isfinite(rate):
            return proposal.setpoint_k
        left = max(0.0, self.setup.law.interval_s - (time_s - proposal.time_s))
        return proposal.setpoint_k + rate * left

    def statuses(self) -> tuple[AlarmStatus, ...]:
        """Every alarm's status, in the order of the set."""
        return tuple(self.engine.status(d.name) for d in self.engine.definitions)

    def act(
        self,
        alarm: str,
        action: Action,
        note: str = "",
        duration_s: float = math.nan,
        time_s: float | None = None,
    ) -> tuple[AlarmEvent, ...]:
        """An operator's action on an alarm, at ``time_s`` [s] (default: the last step's).

        Raises
        ------
        ControllerError
            If the action is unknown, no step has been made, or the engine refuses it.
        """
        t = self._time_s if time_s is None else time_s
        if not math.isfinite(t):
            raise ControllerError("no operator action before the first step")
        if action == "acknowledge":
            return self.engine.acknowledge(alarm, t, note)
        if action == "shelve":
            return self.engine.shelve(alarm, t, duration_s, note)
        if action == "unshelve":
            return self.engine.unshelve(alarm, t, note)
        raise ControllerError(f"unknown operator action {action!r}")

    def checkpoint(self) -> dict[str, Any]:
        """The advisor's state as plain JSON values."""
        return {
            "time_s": put_float(self._time_s),
            "next_law_s": put_float(self._next_law_s),
            "analyzer_verdict": int(self._analyzer_verdict),
            "proposal": None if self._proposal is None else _put_proposal(self._proposal),
            "guard": self.guard.checkpoint(),
            "alarms": self.engine.checkpoint(),
        }

    def restore(self, state: Mapping[str, Any]) -> None:
        """Take the state :meth:`checkpoint` gave (an advisor on the same setup)."""
        self._time_s = get_float(state["time_s"])
        self._next_law_s = get_float(state["next_law_s"])
        self._analyzer_verdict = Reason(int(state["analyzer_verdict"]))
        proposal = state["proposal"]
        self._proposal = None if proposal is None else _get_proposal(proposal)
        self.guard.restore(state["guard"])
        self.engine.restore(state["alarms"])


def _put_proposal(proposal: Proposal) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for f in fields(Proposal):
        value = getattr(proposal, f.name)
        if isinstance(value, LawMode):
            out[f.name] = value.value
        elif isinstance(value, str):
            out[f.name] = value
        else:
            out[f.name] = put_float(value)
    return out


def _get_proposal(state: Mapping[str, Any]) -> Proposal:
    values: dict[str, Any] = {}
    for f in fields(Proposal):
        value = state[f.name]
        if f.name == "mode":
            values[f.name] = LawMode(value)
        elif f.name == "reason":
            values[f.name] = value
        else:
            values[f.name] = get_float(value)
    return Proposal(**values)


CHECKPOINT_VERSION = 1
"""Raised when the checkpoint's layout changes; a checkpoint of another version is refused."""


class UnitPipeline:
    """One unit's soft sensor and advisor, stepped together (module docstring)."""

    def __init__(self, setup: PipelineSetup) -> None:
        self.setup = setup
        self.sensor = SoftSensor(setup.sensor)
        self.advisor = Advisor(setup)
        self.forecast = ModelPredictor(
            setup.sensor.model,
            setup.sensor.tuning,
            setup.sensor.zone.solubility,
            setup.forecast_step_s,
        )

    @property
    def unit_id(self) -> str:
        return self.setup.unit_id

    def _bound(self) -> SigmaPredictor:
        return self.forecast.bind(self.sensor.filter.x, self.sensor.filter.P)

    def step(self, sample: Sample, dcs: DcsInputs) -> PipelineResult:
        """Validate and estimate, propose, guard and judge one sample (module docstring)."""
        step = self.sensor.step(sample)
        view = EstimateView.of_step(step, sample.phase)
        advice = self.advisor.step(view, dcs, self._bound)
        return PipelineResult(
            time_s=step.time_s,
            step=step,
            proposal=advice.proposal,
            decision=advice.decision,
            alarms=advice.alarms,
            events=advice.events,
            health_good=advice.health_good,
            communication_lost=advice.communication_lost,
            proposed=advice.proposed,
            alarm_readings=advice.alarm_readings,
        )

    def act(
        self, alarm: str, action: Action, note: str = "", duration_s: float = math.nan
    ) -> tuple[AlarmEvent, ...]:
        """An operator's action on an alarm at the time of the last step (see
        :meth:`Advisor.act`)."""
        return self.advisor.act(alarm, action, note, duration_s)

    def checkpoint(self) -> dict[str, Any]:
        """The unit's whole state as plain JSON values (module docstring)."""
        return {
            "version": CHECKPOINT_VERSION,
            "unit_id": self.unit_id,
            "sensor": self.sensor.checkpoint(),
            "advisor": self.advisor.checkpoint(),
        }

    @classmethod
    def restore(cls, setup: PipelineSetup, state: Mapping[str, Any]) -> UnitPipeline:
        """A pipeline on ``setup`` in the state :meth:`checkpoint` gave.

        Raises
        ------
        ControllerError
            If the checkpoint is of another version or unit, or its alarms are not the setup's.
        """
        if state.get("version") != CHECKPOINT_VERSION:
            raise ControllerError(
                f"checkpoint version {state.get('version')!r}; this sigmatrack reads "
                f"{CHECKPOINT_VERSION}"
            )
        if state.get("unit_id") != setup.unit_id:
            raise ControllerError(
                f"the checkpoint is of unit {state.get('unit_id')!r}, not {setup.unit_id!r}"
            )
        pipeline = cls(setup)
        pipeline.sensor.restore(state["sensor"])
        pipeline.advisor.restore(state["advisor"])
        return pipeline


REHEARSAL_S = 900
"""Length of :func:`rehearse`'s synthetic stretch [s at 1 s samples]."""


def rehearse(setup: PipelineSetup) -> int:
    """Step a throwaway pipeline of ``setup`` through a short synthetic stretch, so that every
    compiled kernel of the live path is compiled (or loaded from numba's cache) before a
    service's clock runs: a first call of a kernel compiles it, seconds of work that inside a
    running service would stall every unit while the plant's values go on arriving.

    The stretch, at 1 s: a clear, slightly supersaturated solution cooling in an estimating
    phase without seed, then (where the unit seeds) a seeded phase in which proposals are
    allowed, under the permissive, with the analyzer's values arriving delayed as configured,
    one of them far off (gated) and a gap longer than the staleness limit (a restart). Its
    results are thrown away.

    Returns
    -------
    the number of steps taken
    """
    pipeline = UnitPipeline(setup)
    sensor = setup.sensor
    phases = sensor.estimating_phases or sensor.all_phases or frozenset({"controlled-cooling"})
    clear = sorted(phases - sensor.seeded_phases) or sorted(phases)
    seeded = sorted(setup.limits.proposal_phases & phases & sensor.seeded_phases) or clear
    lo, hi = sensor.zone.solubility.temp_range_k
    temp0 = min(max(setup.limits.final_temp_k + 20.0, lo + 1.0), hi - 1.0)
    conc0 = 1.02 * float(sensor.zone.solubility.c_sat(temp0))
    delay = sensor.measurements.analyzer_delay_s
    gap_s = sensor.temp_rules.stale_after_s + 1.0
    steps, t = 0, 0.0
    for i in range(REHEARSAL_S):
        t += gap_s if i == REHEARSAL_S - 10 else 1.0
        temp = temp0 - 2.0e-3 * t
        conc = conc0 * (1.0 + (0.2 if i == 600 else 0.0)) - 1.0e-5 * t
        analyzer = Reading(conc, source_time_s=t - delay) if i % 10 == 0 else None
        phase = clear[0] if i < 300 else seeded[0]
        sample = Sample(
            time_s=t,
            temp=Reading(temp + 1.0e-3 * math.sin(i), source_time_s=t),
            jacket_temp=Reading(temp - 3.0 + 1.0e-3 * math.cos(i), source_time_s=t),
            conc=analyzer,
            phase=phase,
        )
        pipeline.step(sample, DcsInputs(permissive=True, active_setpoint_k=temp))
        steps += 1
    return steps
