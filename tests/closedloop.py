"""The pipeline driving the plant simulator in-process: the closed loop of the advisor's checks.

Three drivers of the same plant (one seed: the same mismatch, noise and faults):

- :func:`run_closed_loop`: the pipeline advises, from the instruments alone;
- :func:`run_oracle`: a perfect sensor: the plant's true concentration and solubility, the
  same sigma target as the law (``target_fraction`` of the site's zone at the law's reference
  rate) reached by direct design, the same rate and final-temperature limits. The limit of what
  any advisor tracking that cap could do;
- :func:`run_linear`: the recipe's own linear ramp over a given duration, no advisor;
  :func:`tuned_linear` finds the fastest whose peak true sigma is no higher than a given one.

The batches are shortened where nothing happens for the advisor (idle, holds after the
dissolution, the final hold and the discharge) and scanned every ``SCAN_S``: the analyzer's
10 s interval and 30 s delay stay multiples of it, the heartbeat (10 s) still beats within the
recipe's 30 s watchdog, and the law's 30 s update is six scans. The population balance runs
on ``SIZE_CLASSES`` classes (the demo's 300 are for the report's size distribution).

The simulator's scan becomes a :class:`~sensor.samples.Sample` the way the plant client makes
one from OPC UA values (°C -> K, the analyzer's unit -> kg/kg solvent, StatusCode names ->
codes, the DCS's phase value -> our phase name); the guard's decision goes back as the remote
setpoint (only when it writes) and the heartbeat (every step), with the permissive as the test
sets it. The DCS's working setpoint (the recipe's, as a DCS would report its own setpoint) is
the guard's reference. The pipeline never sees the plant's true state.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np

from controller.guard import GuardMode
from sensor.pipeline import DcsInputs, PipelineResult, UnitPipeline
from sensor.samples import Reading, Sample
from sensor.shell.config import SiteConfig
from sensor.shell.historian import STATUS_CODES
from sensor.shell.sitesensor import analyzer_unit
from sensor.units import ZERO_CELSIUS_K
from simulators.faults import Fault
from simulators.plant import PlantSample, PlantSimulation, seeded_mismatch
from simulators.settings import SimulatorSettings, read_simulator_settings

SCAN_S = 10.0
"""The DCS scan of the closed-loop batches [s]."""

SIZE_CLASSES = 120
"""Size classes of the plant's population balance in the closed-loop batches."""


class SampleMaker:
    """Turns the simulator's scans of one unit into the soft sensor's samples."""

    def __init__(self, site: SiteConfig, index: int = 0) -> None:
        unit = site.unit[index]
        self.conc_unit = analyzer_unit(site, unit)
        self.phase_names = {value: name for name, value in unit.phase_values.items()}
        self.phase: str | None = None

    def __call__(self, scan: PlantSample) -> Sample:
        t = scan.time_s
        r = scan.readings

        def reading(signal: str, to_si) -> Reading | None:
            if signal not in r:
                return None
            value = float(r[signal].value)  # type: ignore[arg-type]
            return Reading(float(to_si(value)), STATUS_CODES.get(r[signal].status, 0), t)

        if "phase" in r:
            self.phase = self.phase_names.get(r["phase"].value, self.phase)
        return Sample(
            time_s=t,
            temp=reading("temp", lambda v: v + ZERO_CELSIUS_K),
            jacket_temp=reading("jacket_temp", lambda v: v + ZERO_CELSIUS_K),
            conc=reading("conc", self.conc_unit.to_kg_per_kg),
            phase=self.phase,
        )


@dataclass
class LoopRecord:
    """What a closed-loop batch did, per scan (SI; true values from the simulator)."""

    time_s: list[float] = field(default_factory=list)
    phase: list[str] = field(default_factory=list)
    true_sigma: list[float] = field(default_factory=list)
    true_limit: list[float] = field(default_factory=list)
    results: list[PipelineResult] = field(default_factory=list)


def run_closed_loop(
    sim: PlantSimulation,
    pipeline: UnitPipeline,
    site: SiteConfig,
    *,
    permissive: bool = True,
    permissive_until_s: float = math.inf,
    link_down_s: tuple[float, float] = (math.inf, math.inf),
    max_steps: int = 200_000,
    keep_results: bool = False,
) -> LoopRecord:
    """Run ``sim`` to its end with ``pipeline`` advising (at most ``max_steps`` scans).

    The operator's permissive is ``permissive`` until ``permissive_until_s`` [s], then off.
    Between the times of ``link_down_s`` [s] the link to the DCS is down, as the plant client
    reports it: every reading ``BadCommunicationError`` (NaN), the DCS's signals unknown,
    communication lost, and nothing written (so the heartbeat stops)."""
    make = SampleMaker(site)
    record = LoopRecord()
    sim.set_inputs(permissive=permissive)
    for _ in range(max_steps):
        if sim.finished:
            break
        scan = sim.step()
        truth = sim.truth()
        operator = permissive and scan.time_s < permissive_until_s
        if link_down_s[0] <= scan.time_s < link_down_s[1]:
            lost = Reading(math.nan, STATUS_CODES["BadCommunicationError"], None)
            sample = Sample(scan.time_s, lost, lost, lost, make.phase)
            result = pipeline.step(sample, DcsInputs(communication_lost=True))
            _keep(record, truth, result, keep_results)
            continue
        working_k = truth.setpoint_c + ZERO_CELSIUS_K
        result = pipeline.step(
            make(scan), DcsInputs(permissive=operator, active_setpoint_k=working_k)
        )
        permissive_now = operator
        decision = result.decision
        # The DCS's side of the fallback: it takes the permissive back while the advisor
        # declares one, and its recipe resumes (the simulator's recipe cannot read the mode).
        granted = permissive_now and decision.mode is not GuardMode.FALLBACK
        if decision.write and math.isfinite(decision.setpoint_k):
            sim.set_inputs(
                permissive=granted,
                remote_setpoint_c=decision.setpoint_k - ZERO_CELSIUS_K,
                heartbeat=decision.heartbeat,
            )
        else:
            sim.set_inputs(permissive=granted, heartbeat=decision.heartbeat)
        _keep(record, truth, result, keep_results)
    return record


def _keep(record: LoopRecord, truth, result: PipelineResult, keep_results: bool) -> None:
    record.time_s.append(truth.time_s)
    record.phase.append(truth.phase)
    record.true_sigma.append(truth.sigma)
    record.true_limit.append(truth.sigma_limit)
    if keep_results:
        record.results.append(result)


@dataclass(frozen=True)
class Plant:
    """One closed-loop plant: what the simulator is built from for a seed."""

    site: SiteConfig
    settings: SimulatorSettings
    seed: int
    mismatch: object
    faults: tuple[Fault, ...]
    noise_factor: float
    drift_per_h: float

    def simulation(self, recipe_changes: dict | None = None) -> PlantSimulation:
        settings = self.settings
        if recipe_changes:
            settings = replace(settings, recipe=replace(settings.recipe, **recipe_changes))
        return PlantSimulation.from_site(
            self.site,
            seed=self.seed,
            mismatch=self.mismatch,  # type: ignore[arg-type]
            faults=self.faults,
            settings=settings,
        )


def closed_loop_plant(site: SiteConfig, seed: int) -> Plant:
    """The plant of seed ``seed``: kinetics +/-50 % and solubility +/-1 K drawn by the
    simulator's own seeded draw, the analyzer's noise 0.8 to 1.1 times what the site file
    tells the estimator (a site states its analyzer's noise from its calibration, on the
    cautious side: common practice), its bias drifting at up to 3e-4 kg/kg per hour either
    way (on top of the simulator's random walk), all from ``numpy.random.default_rng``."""
    rng = np.random.default_rng([seed, 2026])
    noise_factor = float(rng.uniform(0.8, 1.1))
    drift = float(rng.uniform(-3e-4, 3e-4))
    unit = site.unit[0]
    plant_unit = replace(
        unit, analyzer=replace(unit.analyzer, noise_std=unit.analyzer.noise_std * noise_factor)
    )
    plant_site = replace(site, unit=(plant_unit, *site.unit[1:]))
    settings = read_simulator_settings(site)
    settings = replace(
        settings,
        sample_interval_s=SCAN_S,
        grid=replace(settings.grid, size_classes=SIZE_CLASSES),
        recipe=replace(
            settings.recipe,
            idle_s=0.0,
            dissolve_hold_s=600.0,
            final_hold_s=0.0,
            discharge_s=0.0,
            permissive=True,
        ),
    )
    faults = (Fault(kind="drift", start_s=0.0, duration_s=48 * 3600.0, rate_per_h=drift),)
    return Plant(
        plant_site,
        settings,
        seed,
        seeded_mismatch(seed, 0.5, 1.0),
        faults,
        noise_factor,
        drift,
    )


@dataclass(frozen=True)
class BatchOutcome:
    """What a closed-loop batch did (true values from the simulator)."""

    seeding_to_final_s: float
    peak_sigma: float
    """in controlled cooling"""
    peak_fraction_of_limit: float
    """from seeding on"""
    record: LoopRecord


def outcome(record: LoopRecord) -> BatchOutcome:
    """Seeding (the ``seed`` phase starts) to the final temperature (``final-hold`` starts),
    the peak true sigma in controlled cooling (what the advisor or the ramp sets; the seed
    point's is the recipe's), and the peak of true sigma over the plant's limit from seeding
    on."""
    phases = record.phase
    t = np.array(record.time_s)
    start = t[phases.index("seed")]
    cooling = t >= t[phases.index("controlled-cooling")]
    end = t[phases.index("final-hold")] if "final-hold" in phases else math.inf
    sigma = np.array(record.true_sigma)
    limit = np.array(record.true_limit)
    after = t >= start
    return BatchOutcome(
        seeding_to_final_s=float(end - start),
        peak_sigma=float(np.max(sigma[cooling])),
        peak_fraction_of_limit=float(np.max(sigma[after] / limit[after])),
        record=record,
    )


def _record(record: LoopRecord, sim: PlantSimulation) -> None:
    truth = sim.truth()
    record.time_s.append(truth.time_s)
    record.phase.append(truth.phase)
    record.true_sigma.append(truth.sigma)
    record.true_limit.append(truth.sigma_limit)


def run_oracle(plant: Plant, setup_law, limits, zone, max_steps: int = 100_000) -> LoopRecord:
    """The perfect-sensor tracker (module docstring) on ``plant``."""
    sim = plant.simulation()
    offset = plant.mismatch.solubility_offset_k  # type: ignore[attr-defined]
    record = LoopRecord()
    for beat in range(1, max_steps + 1):
        if sim.finished:
            break
        sim.step()
        truth = sim.truth()
        temp_k = truth.temp_c + ZERO_CELSIUS_K
        setpoint_k = truth.setpoint_c + ZERO_CELSIUS_K
        target = setup_law.target_fraction * float(
            zone.sigma_limit(np.array(temp_k), np.array(setup_law.target_zone_rate_k_per_s))
        )
        # the plant's curve is the site's shifted by the offset: T_sat,plant = T_sat,site - d
        wanted = float(zone.solubility.temp_sat(np.array(truth.conc / (1.0 + target)))) - offset
        step = limits.max_cooling_rate_k_per_s * SCAN_S
        proposal = min(setpoint_k, max(wanted, setpoint_k - step, limits.final_temp_k))
        sim.set_inputs(remote_setpoint_c=proposal - ZERO_CELSIUS_K, heartbeat=beat)
        _record(record, sim)
    return record


def run_linear(plant: Plant, duration_s: float, max_steps: int = 100_000) -> LoopRecord:
    """The recipe's own linear ramp over ``duration_s`` [s], no advisor."""
    sim = plant.simulation(
        {
            "cooling_profile": "linear",
            "cooling_duration_s": duration_s,
            "cooling_max_s": max(duration_s, plant.settings.recipe.cooling_max_s),
            "permissive": False,
        }
    )
    sim.set_inputs(permissive=False)
    record = LoopRecord()
    for _ in range(max_steps):
        if sim.finished:
            break
        sim.step()
        _record(record, sim)
    return record


def tuned_linear(
    plant: Plant, peak_sigma: float, low_s: float, high_s: float, rtol: float = 0.01
) -> tuple[BatchOutcome, int]:
    """The fastest linear ramp whose peak true sigma stays within ``rtol`` of ``peak_sigma``:
    bisection on the log of the duration, 8 runs, between ``low_s`` and ``high_s`` [s] (the
    slow end must qualify). Returns it and the runs made."""
    best = outcome(run_linear(plant, high_s))
    runs = 1
    if best.peak_sigma > peak_sigma * (1.0 + rtol):
        raise AssertionError(f"even a {high_s:g} s ramp peaks above {peak_sigma:.4g}")
    for _ in range(7):
        duration = math.sqrt(low_s * high_s)
        result = outcome(run_linear(plant, duration))
        runs += 1
        if result.peak_sigma <= peak_sigma * (1.0 + rtol):
            high_s, best = duration, result
        else:
            low_s = duration
    return best, runs


@dataclass(frozen=True)
class Comparison:
    """One seed's three batches on the same plant."""

    seed: int
    advisor: BatchOutcome
    oracle: BatchOutcome
    linear: BatchOutcome
    law_cost_s: tuple[float, ...]
    """wall time of each law update (the predictive check on) [s]"""

    @property
    def linear_ratio(self) -> float:
        """Advisor's seeding-to-final time over the tuned linear ramp's."""
        return self.advisor.seeding_to_final_s / self.linear.seeding_to_final_s

    @property
    def oracle_ratio(self) -> float:
        """Advisor's seeding-to-final time over the oracle's."""
        return self.advisor.seeding_to_final_s / self.oracle.seeding_to_final_s


class _TimedLaw:
    """Wraps a law to time each ``propose`` with ``clock`` (for the benchmark's cost only)."""

    def __init__(self, law, clock) -> None:
        self._law = law
        self._clock = clock
        self.costs: list[float] = []

    def __getattr__(self, name):
        return getattr(self._law, name)

    def propose(self, inputs):
        start = self._clock()
        proposal = self._law.propose(inputs)
        self.costs.append(self._clock() - start)
        return proposal


def compare(site: SiteConfig, zone, setup, seed: int, clock=None) -> Comparison:
    """The advisor, the oracle and the tuned linear ramp on the plant of ``seed``; with a
    ``clock`` (e.g. ``time.process_time``) each law update is timed."""
    plant = closed_loop_plant(site, seed)
    pipeline = UnitPipeline(setup)
    timed = None
    if clock is not None:
        timed = _TimedLaw(pipeline.advisor.law, clock)
        pipeline.advisor.law = timed  # type: ignore[assignment]
    advisor = outcome(run_closed_loop(plant.simulation(), pipeline, site))
    oracle = outcome(run_oracle(plant, setup.law, setup.limits, zone))
    linear, _runs = tuned_linear(plant, advisor.peak_sigma, 2400.0, 86400.0)
    return Comparison(seed, advisor, oracle, linear, tuple(timed.costs) if timed else ())
