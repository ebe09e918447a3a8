"""The per-unit soft sensor: one explicit, timestamped sample in, one typed result out.

``SoftSensor.step(sample)`` validates each reading (:mod:`sensor.validation`), steps the Kalman
filter (:mod:`sensor.kalman`) and computes the outputs (:mod:`sensor.outputs`). The live OPC UA
service, the simulator and the per-sample replay all drive this same object; the vectorised
replay kernel (:mod:`sensor.batchfilter`) applies the same rules and equations to many batches at
once and is tested to agree with it.

The model assumes a clear solution until seeding: in a phase outside ``estimating_phases``
(heating an undissolved charge, say) the filter stops and reports nothing, and it starts afresh
in the next estimating phase. A gap between two samples longer than the reactor temperature's
staleness limit (``stale_after_s``) stops it too: its forecast over the gap went unchecked, and
readings far from that forecast would be gated as outliers for good. It starts afresh from the
next sample after the gap with accepted temperature and analyzer readings (the seed, in a seeded
phase, is added again: the crystals' size distribution restarts from the seed's).

Order within a sample: readings are validated; the jacket temperature held as the model's input
is the last accepted one; the filter starts at the first sample with accepted reactor temperature,
jacket temperature and analyzer value; from then on each sample predicts to its time, adds the
seed if the batch has just entered a seeded phase, updates with the reactor temperature, and then
with the analyzer value (delayed, by re-filtering).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from controller.checkpoint import get_float, put_float
from sensor.consistency import NisWindow
from sensor.crystallizer import CONC, TEMP, ZETA3, CrystallizerModel
from sensor.errors import SigmatrackError
from sensor.kalman import CrystallizerFilter, FilterTuning, Measurements, UpdateInfo
from sensor.metastable import MetastableZone
from sensor.numerics import FloatArray, get_array, put_array
from sensor.outputs import Estimates, estimates
from sensor.samples import Reading, Sample, severity
from sensor.validation import Reason, SignalRules, check_reading, new_signal_state


class SampleOrderError(SigmatrackError, ValueError):
    """A sample's time is not after the previous sample's."""


@dataclass(frozen=True)
class UnitSetup:
    """Everything one unit's soft sensor needs, in SI (built from the site file by the shell).

    Parameters
    ----------
    model : the estimation model
    zone : the metastable zone (it holds the solubility curve)
    tuning : filter tuning
    measurements : measurement noise and the analyzer's delay
    temp_rules, jacket_rules, conc_rules : validation thresholds per signal
    seed_zeta : scaled moments of the seed charge [kg/kg solvent] (zeros: unseeded)
    solvent_mass_kg : solvent per batch [kg]
    seeded_phases : phases in which the seed is in the vessel; entering one adds the seed
    estimating_phases : phases in which the model holds (a clear solution or a seeded one); in
        any other the filter stops, and starts afresh in the next estimating phase; None: all
    all_phases : every phase name the unit knows
    nis_window : analyzer updates in the NIS window
    nis_probability : two-sided band of the windowed NIS
    """

    model: CrystallizerModel
    zone: MetastableZone
    tuning: FilterTuning
    measurements: Measurements
    temp_rules: SignalRules
    jacket_rules: SignalRules
    conc_rules: SignalRules
    seed_zeta: FloatArray
    solvent_mass_kg: float
    seeded_phases: frozenset[str] = frozenset()
    estimating_phases: frozenset[str] | None = None
    all_phases: frozenset[str] = frozenset()
    nis_window: int = 30
    nis_probability: float = 0.999


@dataclass(frozen=True)
class StepResult:
    """The soft sensor's answer for one sample.

    Attributes
    ----------
    time_s : the sample's time [s]
    started : the filter is running (False until the first sample with accepted temperature,
        jacket temperature and analyzer value; ``estimates`` is None until then)
    estimates : the outputs (:class:`~sensor.outputs.Estimates` of one sample)
    temp, jacket_temp, conc : what happened to each reading (:class:`Reason`; ``MISSING`` when
        none arrived, ``GATED`` when the filter's gate refused it, ``BEFORE_HISTORY`` for an
        analyzer value older than the filter's history)
    conc_nis : the analyzer update's NIS (NaN without one)
    nis_state : the windowed NIS state: ``filling``, ``ok``, ``high`` or ``low``
    widened : the filter widened its concentration and bias variances before this update
    temp_stale, jacket_stale, conc_stale : no accepted reading for ``stale_after_s``
    seeded : the seed has been added
    """

    time_s: float
    started: bool
    estimates: Estimates | None
    temp: Reason
    jacket_temp: Reason
    conc: Reason
    conc_nis: float
    nis_state: str
    widened: bool
    temp_stale: bool
    jacket_stale: bool
    conc_stale: bool
    seeded: bool

    @property
    def inputs_valid(self) -> bool:
        """Every input is fresh: no signal stale."""
        return not (self.temp_stale or self.jacket_stale or self.conc_stale)

    @property
    def rejected(self) -> bool:
        """A reading that arrived did not reach the filter."""
        return any(r not in (Reason.ACCEPTED, Reason.MISSING) for r in self.reasons.values())

    @property
    def reasons(self) -> dict[str, Reason]:
        return {"temp": self.temp, "jacket_temp": self.jacket_temp, "conc": self.conc}


class _Signal:
    """One signal's validation state and last accepted reading."""

    def __init__(self, rules: SignalRules) -> None:
        self.rules = rules.vector()
        self.stale_after_s = rules.stale_after_s
        self.state = new_signal_state()
        self.value = math.nan
        self.accepted_at = -math.inf

    def check(self, time_s: float, reading: Reading | None) -> Reason:
        if reading is None:
            return Reason.MISSING
        source = math.nan if reading.source_time_s is None else reading.source_time_s
        code = check_reading(
            self.state,
            time_s,
            float(reading.value),
            int(severity(reading.status_code)),
            source,
            self.rules,
        )
        if code == 0:
            self.value = float(reading.value)
            self.accepted_at = time_s
        return Reason(code)

    def stale(self, time_s: float) -> bool:
        return time_s - self.accepted_at > self.stale_after_s

    def checkpoint(self) -> dict[str, Any]:
        return {
            "state": put_array(self.state),
            "value": put_float(self.value),
            "accepted_at": put_float(self.accepted_at),
        }

    def restore(self, state: Mapping[str, Any]) -> None:
        self.state = get_array(state["state"])
        self.value = get_float(state["value"])
        self.accepted_at = get_float(state["accepted_at"])


class SoftSensor:
    """The soft sensor of one unit (module docstring). Not thread-safe: one caller steps it."""

    def __init__(self, setup: UnitSetup, *, reference_filter: bool = False) -> None:
        self.setup = setup
        self.reference_filter = reference_filter
        """Run the unmodified filterpy UKF (``CrystallizerFilter(reference=True)``): the same
        numbers, slower; for the checks and benchmarks against filterpy itself."""
        self.filter = self._new_filter()
        self._temp = _Signal(setup.temp_rules)
        self._jacket = _Signal(setup.jacket_rules)
        self._conc = _Signal(setup.conc_rules)
        self._nis = NisWindow(setup.nis_window, setup.nis_probability)
        self._last_time = -math.inf
        self._seeded = False
        self._seed_load = float(setup.seed_zeta[ZETA3 - 2])

    @property
    def jacket_temp_k(self) -> float:
        """The jacket temperature held as the model's input [K] (NaN before the first)."""
        return self._jacket.value

    def checkpoint(self) -> dict[str, Any]:
        """The soft sensor's whole state as plain JSON values (:mod:`controller.checkpoint`):
        the filter's history with means and covariances, each signal's validation state and
        last accepted reading, the NIS window, the last sample's time and whether the seed is
        in. A soft sensor on the same setup given it by :meth:`restore` steps on exactly as
        this one would."""
        return {
            "last_time_s": put_float(self._last_time),
            "seeded": self._seeded,
            "filter": self.filter.checkpoint(),
            "signals": {
                "temp": self._temp.checkpoint(),
                "jacket_temp": self._jacket.checkpoint(),
                "conc": self._conc.checkpoint(),
            },
            "nis": self._nis.checkpoint(),
        }

    def restore(self, state: Mapping[str, Any]) -> None:
        """Take the state :meth:`checkpoint` gave (from a soft sensor on the same setup)."""
        self._last_time = get_float(state["last_time_s"])
        self._seeded = bool(state["seeded"])
        self.filter.restore(state["filter"])
        signals = state["signals"]
        self._temp.restore(signals["temp"])
        self._jacket.restore(signals["jacket_temp"])
        self._conc.restore(signals["conc"])
        self._nis.restore(state["nis"])

    def step(self, sample: Sample) -> StepResult:
        """Validate, filter and report one sample.

        Raises
        ------
        SampleOrderError
            If the sample is not later than the previous one.
        """
        t = float(sample.time_s)
        if not t > self._last_time:
            raise SampleOrderError(
                f"sample at t = {t} s is not after the previous one (t = {self._last_time} s)"
            )
        gap = math.isfinite(self._last_time) and t - self._last_time > self._temp.stale_after_s
        self._last_time = t
        temp = self._temp.check(t, sample.temp)
        jacket = self._jacket.check(t, sample.jacket_temp)
        conc = self._conc.check(t, sample.conc)
        estimating = (
            not sample.phase
            or self.setup.estimating_phases is None
            or sample.phase in self.setup.estimating_phases
        )
        if (not estimating or gap) and self.filter.started:
            # a gap longer than the temperature's staleness limit also restarts the filter:
            # its forecast over the gap went unchecked, and readings far from it would be gated
            self._reset()
        entering_seed = (
            not self._seeded
            and sample.phase is not None
            and sample.phase in self.setup.seeded_phases
            and self._seed_load > 0.0
        )
        nis = math.nan
        widened = False
        started = self.filter.started
        if (
            not started
            and not gap
            and estimating
            and temp == conc == Reason.ACCEPTED
            and not math.isnan(self._jacket.value)
        ):
            self.filter.start(t, self._temp.value, self._conc.value, self._jacket.value)
            started = True
            if entering_seed:
                self.filter.advance(t, self._jacket.value, None, seed=True)
                self._seeded = True
        elif started:
            info = self.filter.advance(
                t,
                self._jacket.value,
                self._temp.value if temp == Reason.ACCEPTED else None,
                seed=entering_seed,
            )
            self._seeded = self._seeded or entering_seed
            if info is not None and info.gated:
                temp = Reason.GATED
            if conc == Reason.ACCEPTED:
                conc, nis, widened = self._analyzer(t)
        result_estimates = None
        if started:
            result_estimates = estimates(
                self.setup.model,
                self.setup.zone,
                self.filter.x[None, :],
                np.diag(self.filter.P)[None, :],
                np.array([self.filter.P[TEMP, CONC]]),
                np.array([self._jacket.value]),
                np.array([self._seed_load if self._seeded else 0.0]),
                self.setup.solvent_mass_kg,
            )
        return StepResult(
            time_s=t,
            started=started,
            estimates=result_estimates,
            temp=temp,
            jacket_temp=jacket,
            conc=conc,
            conc_nis=nis,
            nis_state=self._nis.state,
            widened=widened,
            temp_stale=self._temp.stale(t),
            jacket_stale=self._jacket.stale(t),
            conc_stale=self._conc.stale(t),
            seeded=self._seeded,
        )

    def _reset(self) -> None:
        """Stop the filter (the phase left the model's validity, or a gap in the samples);
        validation state stays."""
        setup = self.setup
        self.filter = self._new_filter()
        self._nis = NisWindow(setup.nis_window, setup.nis_probability)
        self._seeded = False

    def _new_filter(self) -> CrystallizerFilter:
        setup = self.setup
        return CrystallizerFilter(
            setup.model,
            setup.tuning,
            setup.measurements,
            setup.seed_zeta,
            reference=self.reference_filter,
        )

    def _analyzer(self, t: float) -> tuple[Reason, float, bool]:
        info: UpdateInfo | None = self.filter.analyzer(t, self._conc.value)
        if info is None:
            return Reason.BEFORE_HISTORY, math.nan, False
        if info.gated:
            return Reason.GATED, info.nis, False
        self._nis.push(info.nis)
        return Reason.ACCEPTED, info.nis, info.widened
