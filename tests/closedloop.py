"""The pipeline driving the plant simulator in-process: the closed loop of the advisor's checks.

The simulator's scan becomes a :class:`~sensor.samples.Sample` the way the plant client makes
one from OPC UA values (°C -> K, the analyzer's unit -> kg/kg solvent, StatusCode names ->
codes, the DCS's phase value -> our phase name); the guard's decision goes back as the remote
setpoint (only when it writes) and the heartbeat (every step), with the permissive as the test
sets it. The DCS's working setpoint (the recipe's, as a DCS would report its own setpoint) is
the guard's reference. The pipeline never sees the plant's true state.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from sensor.pipeline import DcsInputs, PipelineResult, UnitPipeline
from sensor.samples import Reading, Sample
from sensor.shell.config import SiteConfig
from sensor.shell.historian import STATUS_CODES
from sensor.shell.sitesensor import analyzer_unit
from sensor.units import ZERO_CELSIUS_K
from simulators.plant import PlantSample, PlantSimulation


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
    max_steps: int = 200_000,
    keep_results: bool = False,
) -> LoopRecord:
    """Run ``sim`` to its end with ``pipeline`` advising (at most ``max_steps`` scans)."""
    make = SampleMaker(site)
    record = LoopRecord()
    sim.set_inputs(permissive=permissive)
    for _ in range(max_steps):
        if sim.finished:
            break
        scan = sim.step()
        truth = sim.truth()
        working_k = truth.setpoint_c + ZERO_CELSIUS_K
        result = pipeline.step(
            make(scan), DcsInputs(permissive=permissive, active_setpoint_k=working_k)
        )
        decision = result.decision
        if decision.write and math.isfinite(decision.setpoint_k):
            sim.set_inputs(
                remote_setpoint_c=decision.setpoint_k - ZERO_CELSIUS_K,
                heartbeat=decision.heartbeat,
            )
        else:
            sim.set_inputs(heartbeat=decision.heartbeat)
        record.time_s.append(truth.time_s)
        record.phase.append(truth.phase)
        record.true_sigma.append(truth.sigma)
        record.true_limit.append(truth.sigma_limit)
        if keep_results:
            record.results.append(result)
    return record
