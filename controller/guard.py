"""The guard: the last thing between a proposal and the DCS.

Every proposed reactor-temperature setpoint passes the guard, which

- keeps it inside the limits: the absolute setpoint range, never below the batch's final
  temperature, no faster than the maximum cooling rate, no heating except in a phase that
  allows it (a fines-dissolution step) and then no faster than the maximum heating rate, and no
  larger change than the maximum step, all counted from the setpoint the DCS is using now;
- lets it be written only in a phase that takes proposals, under the DCS's permissive, while
  the soft sensor's health is good and nothing is in doubt;
- on any doubt (invalid inputs, stale data, NIS alarm, lost communication, solubility
  extrapolation, no valid proposal) writes nothing and declares its fallback, with the reasons:
  hold the current cooling rate, or hand back to the recipe's profile. The DCS carries the
  fallback out: it owns the temperature loop and the recipe;
- counts a heartbeat for the DCS, so the DCS can tell a live advisor from a stuck one.

The heartbeat is not a setpoint: it is written whether or not the permissive is granted (the DCS
grants the permissive only while it sees the heartbeat move). Nothing else is written without
the permissive. The guard is not a safety function; the safety instrumented system keeps
protection, and the DCS's own limits stay in force.

The guard steps on explicit time passed in and never raises while stepping: a bad input is a
doubt it reports.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from enum import Enum
from typing import Any

from controller.checkpoint import get_float, put_float
from controller.errors import SettingsError, check_fields

HEARTBEAT_MODULUS = 32768
"""The heartbeat counts 0, 1, ..., 32767, 0, ...: the range of a signed 16-bit register, which
every DCS can hold (common practice)."""


class Fallback(Enum):
    """What the advisor asks the DCS to do when it steps aside."""

    HOLD_RATE = "hold-rate"
    """Keep ramping the setpoint at the last cooling rate the guard let through."""
    RECIPE = "recipe"
    """Hand back to the recipe's own profile."""


class GuardMode(Enum):
    ADVISING = "advising"
    """The proposal, limited, is written to the DCS."""
    STANDBY = "standby"
    """Nothing is written and nothing is in doubt: no permissive, a phase that takes no
    proposals, or no setpoint that meets every limit. The limited proposal is still shown."""
    FALLBACK = "fallback"
    """Something is in doubt: nothing is written and the declared fallback applies."""


@dataclass(frozen=True)
class GuardLimits:
    """The limits no proposal may cross, in SI.

    Parameters
    ----------
    setpoint_range_k : lowest and highest setpoint ever proposed [K]
    final_temp_k : the batch's final temperature [K]; no proposal goes below it
    max_cooling_rate_k_per_s : fastest cooling of the setpoint [K/s]
    max_step_k : largest setpoint change in one interval [K]
    interval_s : the update interval [s]; a gap between steps longer than this counts as one
        interval, so a late step never earns a larger change
    proposal_phases : batch phases in which proposals may be written
    heartbeat_period_s : the heartbeat counts up once per period [s] (at most once per step)
    max_heating_rate_k_per_s : fastest heating of the setpoint [K/s], in ``heating_phases`` only
    heating_phases : phases (a fines-dissolution step) in which heating may be proposed; a
        subset of ``proposal_phases``
    fallback : what to ask of the DCS on doubt
    """

    setpoint_range_k: tuple[float, float]
    final_temp_k: float
    max_cooling_rate_k_per_s: float
    max_step_k: float
    interval_s: float
    proposal_phases: frozenset[str]
    heartbeat_period_s: float
    max_heating_rate_k_per_s: float = 0.0
    heating_phases: frozenset[str] = frozenset()
    fallback: Fallback = Fallback.RECIPE

    def __post_init__(self) -> None:
        owner = type(self).__name__
        lo, hi = self.setpoint_range_k
        if not (math.isfinite(lo) and math.isfinite(hi) and 0.0 < lo < hi):
            raise SettingsError(
                owner, "setpoint_range_k", f"must be (low, high) with 0 < low < high; got {lo, hi}"
            )
        if not lo <= self.final_temp_k <= hi:
            raise SettingsError(
                owner, "final_temp_k", f"must lie in setpoint_range_k; got {self.final_temp_k}"
            )
        positive = "must be a positive number"
        check_fields(
            self,
            (
                ("max_cooling_rate_k_per_s", self.max_cooling_rate_k_per_s > 0.0, positive),
                ("max_step_k", self.max_step_k > 0.0, positive),
                ("interval_s", self.interval_s > 0.0, positive),
                ("heartbeat_period_s", self.heartbeat_period_s > 0.0, positive),
                ("max_heating_rate_k_per_s", self.max_heating_rate_k_per_s >= 0.0, "must be >= 0"),
            ),
        )
        if not self.heating_phases <= self.proposal_phases:
            extra = sorted(self.heating_phases - self.proposal_phases)
            raise SettingsError(
                owner, "heating_phases", f"{extra} are not among the proposal phases"
            )
        if self.heating_phases and self.max_heating_rate_k_per_s == 0.0:
            raise SettingsError(
                owner, "max_heating_rate_k_per_s", "must be positive when heating phases are set"
            )


@dataclass(frozen=True)
class GuardInputs:
    """What the guard is told at one step.

    Parameters
    ----------
    time_s : time of the step [s], on any fixed origin; never earlier than the step before
    phase : the batch phase now (our phase name)
    active_setpoint_k : the reactor-temperature setpoint the DCS is using now [K]: the
        reference every limit on change is counted from
    permissive : the DCS grants the advisor's setpoint
    health_good : the soft sensor's health is good (its own summary of its inputs and state)
    data_stale : the inputs the estimate rests on are older than allowed
    nis_alarm : the estimate is inconsistent with the measurements (windowed NIS test)
    communication_lost : the link to the DCS is down or not answering
    solubility_extrapolated : the solubility curve is used outside the range it is trusted in
    """

    time_s: float
    phase: str
    active_setpoint_k: float
    permissive: bool
    health_good: bool
    data_stale: bool = False
    nis_alarm: bool = False
    communication_lost: bool = False
    solubility_extrapolated: bool = False

    def doubts(self) -> tuple[str, ...]:
        """The reasons, in these inputs alone, not to trust a proposal now."""
        flags = (
            (not self.health_good, "the soft sensor's health is not good"),
            (self.data_stale, "the data are stale"),
            (self.nis_alarm, "the estimate is inconsistent with the measurements (NIS)"),
            (self.communication_lost, "communication with the DCS is lost"),
            (self.solubility_extrapolated, "the solubility curve is extrapolated"),
            (
                not math.isfinite(self.active_setpoint_k),
                f"the active setpoint is not a number ({self.active_setpoint_k})",
            ),
        )
        return tuple(reason for flagged, reason in flags if flagged)


@dataclass(frozen=True)
class GuardDecision:
    """What the guard decided at one step.

    Attributes
    ----------
    time_s : time of the step [s]
    mode : advising, standby or fallback
    write : write ``setpoint_k`` to the DCS now (only when advising)
    setpoint_k : the proposal after the limits [K]; in fallback with ``hold-rate``, the
        setpoint the held rate leads to; NaN when there is none
    cooling_rate_k_per_s : the rate ``setpoint_k`` implies [K/s] from the setpoint cooling is
        counted from (:func:`setpoint_bounds`: the one written at the previous step while the
        DCS is on its way to it, otherwise the active setpoint), positive when cooling; NaN
        when there is no setpoint
    fallback : the declared fallback, in fallback mode; otherwise None
    heartbeat : the heartbeat counter to write
    reasons : why nothing is written (standby, fallback), in plain words
    limited_by : the limits that changed the proposal
    """

    time_s: float
    mode: GuardMode
    write: bool
    setpoint_k: float
    cooling_rate_k_per_s: float
    fallback: Fallback | None
    heartbeat: int
    reasons: tuple[str, ...]
    limited_by: tuple[str, ...]


@dataclass(frozen=True)
class SetpointBounds:
    """The setpoints that meet every limit at one step: ``low <= setpoint <= high``; cooling
    counted from ``reference_k`` (:func:`setpoint_bounds`)."""

    low: float
    high: float
    low_by: str
    high_by: str
    reference_k: float

    @property
    def empty(self) -> bool:
        return not self.low <= self.high

    def clip(self, setpoint_k: float) -> tuple[float, tuple[str, ...]]:
        """The nearest setpoint inside the bounds, and the limits that moved it."""
        if setpoint_k < self.low:
            return self.low, (self.low_by,)
        if setpoint_k > self.high:
            return self.high, (self.high_by,)
        return setpoint_k, ()


def followed_setpoint_k(
    limits: GuardLimits, active_setpoint_k: float, toward_k: float | None
) -> float:
    r"""Where the DCS's setpoint is heading [K]: ``toward_k`` while the DCS is on its way down
    to it (:math:`T_a - \Delta_{max} \le` ``toward_k`` :math:`\le T_a`; above :math:`T_a`,
    :math:`T_a`), otherwise the DCS's setpoint :math:`T_a` itself (None or NaN included)."""
    if toward_k is not None and active_setpoint_k - limits.max_step_k <= toward_k:
        return min(toward_k, active_setpoint_k)
    return active_setpoint_k


def setpoint_bounds(
    limits: GuardLimits,
    phase: str,
    active_setpoint_k: float,
    dt_s: float,
    written_k: float | None = None,
) -> SetpointBounds:
    r"""The setpoints allowed ``dt_s`` [s] after the active setpoint :math:`T_a` [K], in
    ``phase``; cooling is counted from the reference :math:`T_r`:

    .. math:: \max(T_{lo}, T_f, T_r - \min(\Delta_{max}, b_c\,\Delta t),
                    T_a - \Delta_{max}) \le T_{sp}
              \le \min(T_{hi}, T_a + \min(\Delta_{max}, b_h\,\Delta t))

    with :math:`b_h = 0` outside the heating phases. :math:`T_r` is ``written_k``, the
    setpoint the guard wrote at its previous step, while the DCS is on its way to it
    (:math:`T_a - \Delta_{max} \le T_r \le T_a`), and :math:`T_a` otherwise. The DCS's
    setpoint is read back a transport delay :math:`L` late: counted from :math:`T_a` alone,
    a setpoint written every :math:`\Delta t` would descend at only
    :math:`b_c\,\Delta t / L` (a fifth of the allowed rate in the demo, with steps of about
    1.5 s and a readback some 8 s of plant time late). Counted from what was written, the
    written setpoints descend at :math:`b_c` at most, and never more than :math:`\Delta_{max}`
    below what the DCS uses.
    """
    cooling = limits.max_cooling_rate_k_per_s * dt_s
    cool_by = "max cooling rate"
    if limits.max_step_k < cooling:
        cooling, cool_by = limits.max_step_k, "max step"
    if phase in limits.heating_phases:
        heating = limits.max_heating_rate_k_per_s * dt_s
        heat_by = "max heating rate"
        if limits.max_step_k < heating:
            heating, heat_by = limits.max_step_k, "max step"
    else:
        heating, heat_by = 0.0, "no heating in this phase"
    reference = followed_setpoint_k(limits, active_setpoint_k, written_k)
    lo, hi = limits.setpoint_range_k
    low, low_by = max(
        (lo, "setpoint range"),
        (limits.final_temp_k, "final temperature"),
        (reference - cooling, cool_by),
        (active_setpoint_k - limits.max_step_k, "max step"),
        key=lambda pair: pair[0],
    )
    high, high_by = min(
        (hi, "setpoint range"), (active_setpoint_k + heating, heat_by), key=lambda pair: pair[0]
    )
    return SetpointBounds(low, high, low_by, high_by, reference)


class Guard:
    """Limits proposals, gates writes and counts the heartbeat; one per crystallizer.

    Examples
    --------
    >>> limits = GuardLimits(
    ...     setpoint_range_k=(273.15, 353.15), final_temp_k=283.15,
    ...     max_cooling_rate_k_per_s=1 / 60, max_step_k=0.5, interval_s=30.0,
    ...     proposal_phases=frozenset({"controlled-cooling"}), heartbeat_period_s=10.0)
    >>> guard = Guard(limits)
    >>> now = GuardInputs(time_s=0.0, phase="controlled-cooling", active_setpoint_k=313.15,
    ...                   permissive=True, health_good=True)
    >>> decision = guard.step(now, proposed_setpoint_k=310.0)
    >>> decision.write, round(decision.setpoint_k, 2), decision.limited_by
    (True, 312.65, ('max cooling rate',))
    """

    def __init__(self, limits: GuardLimits) -> None:
        self.limits = limits
        self._last_time_s: float | None = None
        self._last_beat_s: float | None = None
        self._heartbeat = 0
        self._held_rate_k_per_s = 0.0
        self._written_k: float | None = None

    @property
    def heartbeat(self) -> int:
        return self._heartbeat

    def checkpoint(self) -> dict[str, Any]:
        """The guard's state as plain JSON values (:mod:`controller.checkpoint`)."""
        return {
            "last_time_s": put_float(self._last_time_s),
            "last_beat_s": put_float(self._last_beat_s),
            "heartbeat": self._heartbeat,
            "held_rate_k_per_s": put_float(self._held_rate_k_per_s),
            "written_k": put_float(self._written_k),
        }

    def restore(self, state: Mapping[str, Any]) -> None:
        """Take the state :meth:`checkpoint` gave; the guard then steps as the one saved would."""
        self._last_time_s = get_float(state["last_time_s"])
        self._last_beat_s = get_float(state["last_beat_s"])
        self._heartbeat = int(state["heartbeat"]) % HEARTBEAT_MODULUS
        self._held_rate_k_per_s = float(get_float(state["held_rate_k_per_s"]))
        self._written_k = get_float(state.get("written_k"))  # absent in older checkpoints

    def _clock(self, time_s: float) -> tuple[float | None, str | None]:
        """Elapsed time to use for the rate limits, or the reason the time is invalid."""
        if not math.isfinite(time_s):
            return None, f"the step's time is not a number ({time_s})"
        last = self._last_time_s
        if last is not None and time_s < last:
            return None, f"time went backwards, from {last} s to {time_s} s"
        self._last_time_s = time_s
        beat = self._last_beat_s
        if beat is None or time_s - beat >= self.limits.heartbeat_period_s:
            self._heartbeat = (self._heartbeat + 1) % HEARTBEAT_MODULUS
            self._last_beat_s = time_s
        elapsed = self.limits.interval_s if last is None else time_s - last
        return min(elapsed, self.limits.interval_s), None

    @property
    def written_k(self) -> float | None:
        """The setpoint written at the last step [K]; None when that step wrote nothing."""
        return self._written_k

    def step(self, inputs: GuardInputs, proposed_setpoint_k: float) -> GuardDecision:
        """Judge one proposal.

        Parameters
        ----------
        inputs : the state of the plant and of the soft sensor now
        proposed_setpoint_k : the law's proposal [K]; NaN when the law had none
        """
        dt_s, time_problem = self._clock(inputs.time_s)
        doubts = list(inputs.doubts())
        if time_problem is not None:
            doubts.insert(0, time_problem)
        if not math.isfinite(proposed_setpoint_k):
            doubts.append(f"no valid proposal ({proposed_setpoint_k})")

        def decide(
            mode: GuardMode,
            reasons: list[str],
            setpoint_k: float = math.nan,
            limited_by: tuple[str, ...] = (),
            reference_k: float = inputs.active_setpoint_k,
        ) -> GuardDecision:
            rate = math.nan
            if dt_s and math.isfinite(setpoint_k):
                rate = (reference_k - setpoint_k) / dt_s
            write = mode is GuardMode.ADVISING
            self._written_k = setpoint_k if write and math.isfinite(setpoint_k) else None
            if write and math.isfinite(rate):
                self._held_rate_k_per_s = rate
            elif mode is not GuardMode.FALLBACK:
                self._held_rate_k_per_s = 0.0
            return GuardDecision(
                time_s=inputs.time_s,
                mode=mode,
                write=write,
                setpoint_k=setpoint_k,
                cooling_rate_k_per_s=rate,
                fallback=self.limits.fallback if mode is GuardMode.FALLBACK else None,
                heartbeat=self._heartbeat,
                reasons=tuple(reasons),
                limited_by=limited_by,
            )

        if inputs.phase not in self.limits.proposal_phases:
            return decide(
                GuardMode.STANDBY, [f"phase {inputs.phase!r} takes no proposals", *doubts]
            )
        if dt_s is None or not math.isfinite(inputs.active_setpoint_k):
            return decide(GuardMode.FALLBACK, doubts)
        written = self._written_k
        bounds = setpoint_bounds(self.limits, inputs.phase, inputs.active_setpoint_k, dt_s, written)
        if bounds.empty:
            return decide(
                GuardMode.FALLBACK if doubts else GuardMode.STANDBY,
                [
                    *doubts,
                    f"no setpoint meets every limit from the active setpoint "
                    f"{inputs.active_setpoint_k:.2f} K (the {bounds.low_by} and the "
                    f"{bounds.high_by} conflict)",
                ],
            )
        if doubts:
            if self.limits.fallback is Fallback.HOLD_RATE:
                held = inputs.active_setpoint_k - self._held_rate_k_per_s * dt_s
                setpoint, limited_by = bounds.clip(held)
                return decide(GuardMode.FALLBACK, doubts, setpoint, limited_by)
            return decide(GuardMode.FALLBACK, doubts)
        setpoint, limited_by = bounds.clip(proposed_setpoint_k)
        if not inputs.permissive:
            return decide(
                GuardMode.STANDBY,
                ["the DCS has not granted the permissive"],
                setpoint,
                limited_by,
            )
        return decide(GuardMode.ADVISING, [], setpoint, limited_by, bounds.reference_k)
