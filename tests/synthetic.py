"""Small batch generators for the soft sensor's tests, built on the estimation model itself.

These test the method (the filter against data from its own model, so NEES and NIS have known
distributions); they are not a plant. Accuracy against a different plant is checked against the
simulator's truth. Every random draw takes an explicit numpy Generator.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cache

import numpy as np
from asyncua.ua.status_codes import StatusCodes

from sensor.crystallizer import CONC, GROWTH_SCALE, TEMP, ZETA0, ZETA3, step
from sensor.samples import GOOD, Reading, Sample
from sensor.softsensor import UnitSetup
from sensor.units import ZERO_CELSIUS_K

BAD_SENSOR_FAILURE = StatusCodes.BadSensorFailure  # OPC UA StatusCodes, from asyncua's table
UNCERTAIN_LAST_USABLE = StatusCodes.UncertainLastUsableValue
JACKET_NOISE_STD_K = 0.02  # the jacket transmitter's noise; the noisy value is the model input


@dataclass
class SyntheticBatch:
    """Samples and the true states behind them."""

    samples: list[Sample]
    truth: np.ndarray  # (N, n) true state at each sample time
    conc_drawn_index: dict[int, int] = field(default_factory=dict)  # sample -> drawn sample


def cooling_batch(
    setup: UnitSetup,
    rng: np.random.Generator,
    *,
    hours: float = 2.0,
    dt_s: float = 1.0,
    start_temp_c: float = 55.0,
    saturation_temp_c: float = 50.0,
    seed_at_s: float = 900.0,
    cooling_k_per_min: float = 0.3,
    bias: float = 0.0,
    growth_scale: float = 1.0,
    process_noise: bool = False,
    analyzer_every: int = 10,
) -> SyntheticBatch:
    """A seeded cooling batch sampled every ``dt_s``: the jacket is held 5 K below the start
    temperature until seeding, then ramped down; the analyzer reports every ``analyzer_every``
    samples, delayed by the setup's delay, with its noise and ``bias`` [kg/kg]."""
    model = setup.model
    n = model.layout.size
    curve = setup.zone.solubility
    x = np.zeros(n)
    x[TEMP] = start_temp_c + ZERO_CELSIUS_K
    x[CONC] = float(curve.c_sat(saturation_temp_c + ZERO_CELSIUS_K))
    if model.layout.estimate_growth_scale:
        x[GROWTH_SCALE] = growth_scale
    x[model.layout.bias] = bias
    count = int(hours * 3600 / dt_s)
    delay_steps = round(setup.measurements.analyzer_delay_s / dt_s)
    temp_std = setup.measurements.temp_noise_std_k
    conc_std = setup.measurements.conc_noise_std
    truth = np.empty((count, n))
    samples = []
    drawn = {}
    q_std = None
    if process_noise:
        q_std = np.zeros(n)
        q_std[TEMP] = setup.tuning.temp_process_std
        q_std[CONC] = setup.tuning.conc_process_std
        q_std[ZETA0 : ZETA3 + 1] = setup.tuning.moment_process_std
        q_std[-1] = setup.tuning.bias_random_walk_std
        if model.layout.estimate_growth_scale:
            q_std[GROWTH_SCALE] = setup.tuning.growth_scale_random_walk_std
    times = np.arange(count) * dt_s
    ramp = np.maximum(cooling_k_per_min * (times - seed_at_s) / 60.0, 0.0)
    jacket = np.maximum(x[TEMP] - 5.0 - ramp, 5.0 + ZERO_CELSIUS_K)
    jacket = jacket + JACKET_NOISE_STD_K * rng.standard_normal(count)  # measured, the input
    seeded = False
    for k in range(count):
        t = times[k]
        if k > 0:
            x = step(x, dt_s, jacket[k - 1], model.params, model.table)
            if q_std is not None:
                x = x + q_std * np.sqrt(dt_s) * rng.standard_normal(n)
        if not seeded and t >= seed_at_s:
            x[ZETA0 : ZETA3 + 1] += setup.seed_zeta
            seeded = True
        truth[k] = x
        conc = None
        if k % analyzer_every == 0 and k >= delay_steps:
            source = truth[k - delay_steps]
            conc = Reading(source[CONC] + source[-1] + conc_std * rng.standard_normal())
            drawn[k] = k - delay_steps
        samples.append(
            Sample(
                time_s=float(t),
                temp=Reading(x[TEMP] + temp_std * rng.standard_normal()),
                jacket_temp=Reading(float(jacket[k])),
                conc=conc,
                phase="seed" if seeded else "cool-to-seed",
            )
        )
    return SyntheticBatch(samples, truth, drawn)


def with_faults(samples: list[Sample], rng: np.random.Generator) -> list[Sample]:
    """The same samples with a few of every fault the validation rules catch, and gaps."""
    out = list(samples)
    count = len(out)

    def replace(k: int, **changes: Reading | None) -> None:
        s = out[k]
        out[k] = Sample(
            s.time_s,
            changes.get("temp", s.temp),
            changes.get("jacket_temp", s.jacket_temp),
            changes.get("conc", s.conc),
            s.phase,
        )

    analyzer = [k for k, s in enumerate(out) if s.conc is not None]
    for k in rng.choice(analyzer[5:], size=4, replace=False):
        replace(int(k), conc=Reading(out[k].conc.value + 0.05))  # spike
    for k in rng.choice(analyzer[5:], size=3, replace=False):
        replace(int(k), conc=Reading(out[k].conc.value, BAD_SENSOR_FAILURE))
    for k in rng.choice(np.arange(100, count), size=3, replace=False):
        replace(int(k), temp=Reading(out[k].temp.value, UNCERTAIN_LAST_USABLE))
    for k in rng.choice(np.arange(100, count), size=3, replace=False):
        replace(int(k), temp=Reading(float("nan")))
    for k in rng.choice(np.arange(100, count), size=3, replace=False):
        replace(int(k), temp=Reading(out[k].temp.value + 3.0))  # spike and rate
    gap = int(rng.integers(200, count - 400))
    for k in range(gap, gap + 150):
        replace(k, conc=None, temp=None)
    return out


__all__ = ["GOOD", "SyntheticBatch", "cooling_batch", "with_faults"]


def write_historian_csv(
    path, samples: list[Sample], unit, conc_per_kg_per_kg: float = 100.0, batch_id: str = "B1"
) -> None:
    """Write samples as a historian CSV with the unit's tag names (temperatures in °C, the
    analyzer in g/100g by default: ``conc_per_kg_per_kg`` is the factor from kg/kg)."""
    from datetime import UTC, datetime

    from asyncua.ua.status_codes import code_to_name_doc

    tags = unit.tags
    analog = [("temp", 0), ("jacket_temp", 1), ("conc", 2)]
    header = ["timestamp"]
    for signal, _ in analog:
        header += [tags[signal].name, f"{tags[signal].name}.quality"]
    header += [tags["phase"].name, tags["batch_id"].name]
    phase_values = unit.phase_values
    lines = ["# synthetic batch for tests", ",".join(header)]
    for sample in samples:
        stamp = datetime.fromtimestamp(1.7e9 + sample.time_s, UTC).isoformat(
            timespec="milliseconds"
        )
        cells = [stamp.replace("+00:00", "Z")]
        for reading in (sample.temp, sample.jacket_temp, sample.conc):
            if reading is None:
                cells += ["", ""]
                continue
            is_conc = reading is sample.conc
            value = reading.value * conc_per_kg_per_kg if is_conc else reading.value - 273.15
            cells += [repr(float(value)), code_to_name_doc[reading.status_code][0]]
        cells += [str(phase_values[sample.phase]) if sample.phase else "", batch_id]
        lines.append(",".join(cells))
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")


@cache
def demo_site_and_zone():
    """The demo site file and its fitted metastable zone (fitted once per test session)."""
    from sensor.shell.config import load_site_file
    from sensor.shell.sitesensor import site_zone
    from tests.conftest import DEMO_SITE

    site = load_site_file(DEMO_SITE)
    return site, site_zone(site)


def demo_setup(**tuning_changes) -> UnitSetup:
    """The demo unit's soft-sensor setup, with filter tuning changed as given."""
    from dataclasses import replace

    from sensor.shell.sitesensor import unit_setup

    site, zone = demo_site_and_zone()
    setup = unit_setup(site, 0, zone)
    if tuning_changes:
        setup = replace(setup, tuning=replace(setup.tuning, **tuning_changes))
    return setup
