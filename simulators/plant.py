"""One simulated batch of one crystallizer: physics, instruments, recipe and DCS loops, stepped
on one simulated clock.

This is the stepping API that ``sigmatrack simulate``, the OPC UA plant server and closed-loop
tests all drive::

    sim = PlantSimulation.from_site(site, seed=7)
    while not sim.finished:
        sample = sim.step()                   # what the instruments and the DCS report
        truth = sim.truth()                   # what really happened (tests only)
        sim.set_inputs(permissive=True, remote_setpoint_c=41.5, heartbeat=n)

Each :meth:`~PlantSimulation.step` is one DCS scan (``simulator.sample_interval_s``): the
contents advance with the jacket setpoint of the last scan, the instruments read, then the
recipe and the reactor-temperature loop decide the next jacket setpoint from the readings and
the inputs last written. Nothing here reads a clock: time is ``step_index * sample_interval_s``
seconds since the start of the batch; :meth:`~PlantSimulation.timestamp` maps it to UTC.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, replace
from datetime import datetime, timedelta

import numpy as np

from sensor.errors import SiteConfigError
from sensor.shell.config import SiteConfig, UnitConfig
from sensor.shell.sitemodels import (
    fit_site_solubility,
    site_concentration_unit,
    site_metastable_zone,
)
from sensor.units import ZERO_CELSIUS_K
from simulators.crystallizer import Crystallizer, PlantSolubility
from simulators.errors import SimulatorError
from simulators.faults import Fault, faults_of, process_faults
from simulators.instruments import Analyzer, Channel, NormalStream, Reading, TemperatureTransmitter
from simulators.kinetics import Mismatch, PlantKinetics
from simulators.population import SizeGrid, mean_size_m, normal_counts
from simulators.recipe import DcsInputs, Recipe
from simulators.settings import SimulatorSettings, read_simulator_settings
from simulators.thermal import ReactorTemperatureController, ThermalModel

COLD_SIDE_K = 15.0
"""How far below the site curve's trusted domain the plant's solubility reaches [K]: the site's
correlation extrapolated, so that a fault that overcools the reactor (``cooling-open``, towards
the coldest utility: -10 °C in the demo, 10 K below its curve's domain) can be simulated. Not
above the domain: there the demo's solvent nears its boiling point. Recipes stay inside the
trusted domain."""

_STREAMS = (
    "mismatch",
    "temp",
    "jacket_temp",
    "conc",
    "bias",
    "temp_faults",
    "jacket_faults",
    "conc_faults",
)


@dataclass(frozen=True)
class PlantSample:
    """What the plant's instruments and the DCS report at one scan.

    Attributes
    ----------
    time_s : since the start of the batch [s]
    readings : by signal name (``temp``, ``jacket_temp``, ``jacket_setpoint``, ``setpoint``
        (the recipe's working reactor setpoint, °C), ``conc``, ``phase``, ``batch_id``,
        ``permissive``, ``remote_setpoint``, ``heartbeat``); a signal
        missing here reported nothing at this scan (between analyzer samples, a dropout). Only
        the signals the unit has tags for are present.
    """

    time_s: float
    readings: Mapping[str, Reading]


@dataclass(frozen=True)
class PlantTruth:
    """What the simulated plant really did at one instant (for accuracy checks only).

    Attributes
    ----------
    time_s : since the start of the batch [s]
    temp_c, jacket_temp_c : reactor and jacket temperatures [°C]
    setpoint_c : the recipe's working reactor setpoint [°C]
    jacket_setpoint_c : the jacket setpoint the reactor loop asks for [°C]
    conc, conc_sat : dissolved solute and solubility [kg/kg solvent]
    sigma : relative supersaturation [-]
    sigma_limit : the plant's metastable limit at the reference rate [-]
    solids_kg_per_kg_solvent : crystal mass [kg/kg solvent]
    seed_added_kg_per_kg_solvent : seed charged so far [kg/kg solvent]
    mean_size_um : volume-weighted mean size L43 [µm]
    count_per_kg_solvent : number of crystals [1/kg solvent]
    growth_rate_m_per_s : growth (negative: dissolution) rate at zero size [m/s]
    nucleation_rate_per_kg_s : primary plus secondary nucleation [1/(kg solvent s)]
    phase : our phase name
    remote_active : the remote setpoint was in control
    analyzer_bias : the analyzer's calibration bias [kg/kg solvent]
    """

    time_s: float
    temp_c: float
    jacket_temp_c: float
    setpoint_c: float
    jacket_setpoint_c: float
    conc: float
    conc_sat: float
    sigma: float
    sigma_limit: float
    solids_kg_per_kg_solvent: float
    seed_added_kg_per_kg_solvent: float
    mean_size_um: float
    count_per_kg_solvent: float
    growth_rate_m_per_s: float
    nucleation_rate_per_kg_s: float
    phase: str
    remote_active: bool
    analyzer_bias: float


def _generators(seed: int) -> dict[str, np.random.Generator]:
    """One independent generator per random thing, all fixed by ``seed``."""
    children = np.random.default_rng(seed).spawn(len(_STREAMS))
    return dict(zip(_STREAMS, children, strict=True))


def seeded_mismatch(seed: int, kinetics_fraction: float, solubility_offset_k: float) -> Mismatch:
    """The mismatch a batch with ``seed`` draws for these bounds (:meth:`Mismatch.draw`)."""
    return Mismatch.draw(_generators(seed)["mismatch"], kinetics_fraction, solubility_offset_k)


def _steps(value_s: float, dt_s: float, key: str, site: SiteConfig) -> int:
    steps = value_s / dt_s
    if abs(steps - round(steps)) > 1e-9 * max(1.0, steps):
        raise SiteConfigError(
            site.path,
            key,
            f"must be a whole number of simulator.sample_interval_s ({dt_s:g} s); "
            f"got {value_s:g} s",
        )
    return round(steps)


class PlantSimulation:
    """One batch of one unit (module text). Build with :meth:`from_site`."""

    def __init__(
        self,
        site: SiteConfig,
        unit: UnitConfig,
        settings: SimulatorSettings,
        seed: int,
        mismatch: Mismatch,
        faults: tuple[Fault, ...],
        batch_id: str,
        start: datetime,
    ) -> None:
        self.site = site
        self.unit = unit
        self.settings = settings
        self.seed = seed
        self.mismatch = mismatch
        self.faults = faults
        self.batch_id = batch_id
        self.start = start
        self.dt_s = settings.sample_interval_s
        self.step_index = 0
        streams = _generators(seed)

        fit = fit_site_solubility(site)
        zone = site_metastable_zone(site, fit)
        reference_rate = settings.kinetics.primary_reference_rate_k_per_min / 60.0
        self.plant_solubility = PlantSolubility.from_site(
            fit.curve, zone, mismatch.solubility_offset_k, reference_rate, widening_k=COLD_SIDE_K
        )
        self._check_temperatures()
        compound = site.compound
        mass_factor = compound.crystal_density_kg_per_m3 * compound.volume_shape_factor
        grid = SizeGrid(settings.grid.size_classes, settings.grid.max_size_um * 1e-6)
        self.grid = grid
        charge = settings.charge
        start_k = charge.start_temp_c + ZERO_CELSIUS_K
        total = charge.solute_kg_per_kg_solvent
        conc = min(total, self.plant_solubility.c_sat(start_k))
        solids = total - conc
        counts = (
            normal_counts(
                grid,
                solids,
                charge.solid_mean_size_um * 1e-6,
                charge.solid_size_std_um * 1e-6,
                mass_factor,
            )
            if solids > 0.0
            else np.zeros(grid.n_classes)
        )
        self._seed_counts = (
            normal_counts(
                grid,
                unit.seed_mass_kg / unit.solvent_mass_kg,
                unit.seed_mean_size_um * 1e-6,
                unit.seed_size_std_um * 1e-6,
                mass_factor,
            )
            if unit.seed_mass_kg > 0.0
            else None
        )
        thermal = settings.thermal
        model = ThermalModel(
            unit.heat_transfer_w_per_k,
            unit.heat_capacity_j_per_k,
            thermal.jacket_time_constant_s,
            thermal.jacket_max_rate_k_per_min / 60.0,
        )
        self.crystallizer = Crystallizer(
            grid=grid,
            kinetics=PlantKinetics.from_site(site.model, settings.kinetics, mismatch),
            solubility=self.plant_solubility,
            thermal=model,
            mass_factor=mass_factor,
            solvent_mass_kg=unit.solvent_mass_kg,
            heat_of_crystallization_j_per_kg=settings.kinetics.heat_of_crystallization_j_per_kg,
            courant_max=settings.grid.courant_max,
            conc=conc,
            counts=counts,
            temp_k=start_k,
            jacket_k=start_k,
        )
        # Conservation is counted from the charge as the crystallizer holds it (rounding of
        # the initial distribution included).
        self.charged = self.crystallizer.conc + self.crystallizer.solids
        low, high = thermal.jacket_setpoint_range_c
        self.controller = ReactorTemperatureController(
            thermal.controller_gain,
            thermal.controller_integral_time_s,
            (low + ZERO_CELSIUS_K, high + ZERO_CELSIUS_K),
            model.reactor_time_constant_s if thermal.rate_feedforward else 0.0,
        )
        self.jacket_setpoint_k = start_k
        self.recipe = Recipe(settings.recipe, start_k)
        self.inputs = DcsInputs(
            permissive=settings.recipe.permissive, remote_setpoint_c=charge.start_temp_c
        )
        self.finished = False
        self._cooling_open = process_faults(faults, "cooling-open")
        self._build_instruments(streams)

    def _check_temperatures(self) -> None:
        lo, hi = self.plant_solubility.trusted_k
        recipe = self.settings.recipe
        for key, temp_c in (
            ("charge.start_temp_c", self.settings.charge.start_temp_c),
            ("recipe.dissolve_temp_c", recipe.dissolve_temp_c),
            ("recipe.seed_temp_c", recipe.seed_temp_c),
            ("recipe.final_temp_c", recipe.final_temp_c),
        ):
            margin = recipe.temp_tolerance_k + 1.0
            if not lo + margin <= temp_c + ZERO_CELSIUS_K <= hi - margin:
                raise SiteConfigError(
                    self.site.path,
                    f"simulator.{key}",
                    f"{temp_c:g} °C is outside where the plant's solubility is known "
                    f"({lo - ZERO_CELSIUS_K + margin:.1f} to {hi - ZERO_CELSIUS_K - margin:.1f} °C "
                    "with the recipe's tolerance)",
                )

    def _build_instruments(self, streams: dict[str, np.random.Generator]) -> None:
        site, unit, settings = self.site, self.unit, self.settings
        instruments = settings.instruments
        dt = self.dt_s
        self.transmitters = {
            signal: TemperatureTransmitter(
                Channel(
                    faults_of(self.faults, signal),
                    streams[fault_stream],
                    unit.temp_noise_std_k,
                    instruments.temp_resolution_k,
                    instruments.temp_range_c,
                    dt,
                ),
                NormalStream(streams[signal]),
                unit.temp_noise_std_k,
            )
            for signal, fault_stream in (("temp", "temp_faults"), ("jacket_temp", "jacket_faults"))
        }
        analyzer = unit.analyzer
        if analyzer.conc_unit == "g/L":
            raise SiteConfigError(
                site.path,
                f"unit[{site.unit.index(unit)}].analyzer.conc_unit",
                "the simulator cannot report g/L: the site file gives no solution density",
            )
        index = site.unit.index(unit)
        self.analyzer = Analyzer(
            Channel(
                faults_of(self.faults, "conc"),
                streams["conc_faults"],
                analyzer.noise_std,
                instruments.analyzer_resolution,
                analyzer.range,
                analyzer.sample_interval_s,
            ),
            site_concentration_unit(site.compound, analyzer.conc_unit),
            NormalStream(streams["conc"]),
            analyzer.noise_std,
            _steps(
                analyzer.sample_interval_s, dt, f"unit[{index}].analyzer.sample_interval_s", site
            ),
            _steps(analyzer.delay_s, dt, f"unit[{index}].analyzer.delay_s", site),
            dt,
            instruments.analyzer_initial_bias,
            instruments.analyzer_bias_random_walk_per_sqrt_s,
            NormalStream(streams["bias"]),
        )

    @classmethod
    def from_site(
        cls,
        site: SiteConfig,
        *,
        unit_id: str | None = None,
        seed: int = 0,
        mismatch: Mismatch | None = None,
        faults: tuple[Fault, ...] | None = None,
        settings: SimulatorSettings | None = None,
        batch_id: str | None = None,
        start: datetime | None = None,
    ) -> PlantSimulation:
        """A batch of ``unit_id`` (default: the site's first unit) as the site file describes.

        Parameters
        ----------
        site : the site file
        unit_id : which ``[[unit]]``
        seed : fixes every random draw (noise, drift, spikes, and the mismatch when drawn)
        mismatch : the plant's departure from the site's kinetics and solubility; default:
            drawn from ``[simulator.mismatch]`` with the seed (no mismatch when it is zero)
        faults : the instrument faults; default: ``[[simulator.faults]]``
        settings : the ``[simulator]`` table; default: read from the site file
        batch_id : default ``<unit id>-<start, yyyymmdd-hhmm>``
        start : when the batch starts (aware); default ``simulator.start_time``

        Raises
        ------
        SiteConfigError
            If the ``[simulator]`` table is missing or bad, or does not fit the unit.
        SimulatorError
            If the mismatch is out of bounds.
        """
        settings = read_simulator_settings(site) if settings is None else settings
        if unit_id is None:
            unit = site.unit[0]
        else:
            try:
                unit = site.unit_by_id(unit_id)
            except KeyError:
                known = ", ".join(u.id for u in site.unit)
                raise SimulatorError(
                    f"no unit {unit_id!r} in {site.path} (units: {known})"
                ) from None
        if mismatch is None:
            mismatch = seeded_mismatch(
                seed, settings.mismatch.kinetics_fraction, settings.mismatch.solubility_offset_k
            )
        start = settings.start if start is None else start
        if start.tzinfo is None:
            raise SimulatorError("the batch start needs a time zone (UTC)")
        batch_id = f"{unit.id}-{start:%Y%m%d-%H%M}" if batch_id is None else batch_id
        faults = settings.faults if faults is None else faults
        return cls(site, unit, settings, seed, mismatch, faults, batch_id, start)

    # --- the stepping API ------------------------------------------------------------------

    @property
    def time_s(self) -> float:
        """Simulated time since the start of the batch [s]."""
        return self.step_index * self.dt_s

    @property
    def phase(self) -> str:
        """The recipe's phase (our name)."""
        return self.recipe.phase

    def timestamp(self, time_s: float | None = None) -> datetime:
        """UTC time of ``time_s`` [s] since the start (default: now in the simulation)."""
        return self.start + timedelta(seconds=self.time_s if time_s is None else time_s)

    def set_inputs(
        self,
        *,
        permissive: bool | None = None,
        remote_setpoint_c: float | None = None,
        heartbeat: int | None = None,
    ) -> None:
        """Write the DCS inputs (those given); the recipe sees them at the next scan. A remote
        setpoint that is not a finite number is kept but never followed."""
        self.inputs = replace(
            self.inputs,
            **{
                key: value
                for key, value in (
                    ("permissive", None if permissive is None else bool(permissive)),
                    (
                        "remote_setpoint_c",
                        None if remote_setpoint_c is None else float(remote_setpoint_c),
                    ),
                    ("heartbeat", None if heartbeat is None else int(heartbeat)),
                )
                if value is not None
            },
        )

    def step(self) -> PlantSample:
        """Advance one scan and return what was reported at its end.

        Raises
        ------
        SimulatorError
            If the batch has finished, or the plant left the range it can be simulated in.
        """
        if self.finished:
            raise SimulatorError(f"batch {self.batch_id} finished at {self.time_s:g} s")
        dt = self.dt_s
        crystallizer = self.crystallizer
        jacket_target_k = self.jacket_setpoint_k
        if self._cooling_open.kinds_at(self.time_s):
            jacket_target_k = self.controller.output_range_k[0]  # the valve failed open
        crystallizer.advance(dt, jacket_target_k)
        self.step_index += 1
        time_s = self.time_s
        temp = self.transmitters["temp"].read(time_s, dt, crystallizer.temp_k - ZERO_CELSIUS_K)
        jacket = self.transmitters["jacket_temp"].read(
            time_s, dt, crystallizer.jacket_k - ZERO_CELSIUS_K
        )
        conc = self.analyzer.step(self.step_index, crystallizer.conc)
        usable = (  # the DCS's own check: a Bad or not-a-number reading is not used
            temp is not None and not temp.status.startswith("Bad") and math.isfinite(temp.value)
        )
        measured_k = float(temp.value) + ZERO_CELSIUS_K if usable else None  # type: ignore[union-attr,arg-type]
        decided = self.recipe.update(time_s, dt, measured_k, self.inputs)
        if decided.charge_seed and self._seed_counts is not None:
            crystallizer.add_seed(self._seed_counts)
        output = self.controller.update(
            decided.setpoint_k, decided.setpoint_rate_k_per_s, measured_k, dt
        )
        if output is not None:
            self.jacket_setpoint_k = output
        self.finished = decided.finished
        readings = {
            "temp": temp,
            "jacket_temp": jacket,
            "jacket_setpoint": Reading(round(self.jacket_setpoint_k - ZERO_CELSIUS_K, 3)),
            "setpoint": Reading(round(self.recipe.setpoint_k - ZERO_CELSIUS_K, 3)),
            "conc": conc,
            "phase": Reading(self.unit.phase_values.get(decided.phase, decided.phase)),
            "batch_id": Reading(self.batch_id),
            "permissive": Reading(self.inputs.permissive),
            "remote_setpoint": Reading(self.inputs.remote_setpoint_c),
            "heartbeat": Reading(self.inputs.heartbeat),
        }
        tags = self.unit.tags
        return PlantSample(
            time_s, {k: v for k, v in readings.items() if v is not None and k in tags}
        )

    def advance_to(self, time_s: float) -> list[PlantSample]:
        """Step until the simulated time reaches ``time_s`` [s] or the batch finishes; the
        samples produced on the way, in order."""
        samples = []
        while not self.finished and self.time_s + 0.5 * self.dt_s <= time_s:
            samples.append(self.step())
        return samples

    def truth(self) -> PlantTruth:
        """The plant's true state now."""
        c = self.crystallizer
        c_sat = c.c_sat
        return PlantTruth(
            time_s=self.time_s,
            temp_c=c.temp_k - ZERO_CELSIUS_K,
            jacket_temp_c=c.jacket_k - ZERO_CELSIUS_K,
            setpoint_c=self.recipe.setpoint_k - ZERO_CELSIUS_K,
            jacket_setpoint_c=self.jacket_setpoint_k - ZERO_CELSIUS_K,
            conc=c.conc,
            conc_sat=c_sat,
            sigma=c.conc / c_sat - 1.0,
            sigma_limit=self.plant_solubility.sigma_limit(c.temp_k),
            solids_kg_per_kg_solvent=c.solids,
            seed_added_kg_per_kg_solvent=c.seed_added,
            mean_size_um=mean_size_m(c.counts, c.grid) * 1e6,
            count_per_kg_solvent=float(np.sum(c.counts)),
            growth_rate_m_per_s=c.growth_rate_m_per_s,
            nucleation_rate_per_kg_s=c.nucleation_rate_per_kg_s,
            phase=self.recipe.phase,
            remote_active=self.recipe.remote_active,
            analyzer_bias=self.analyzer.bias,
        )

    def size_distribution(self) -> tuple[np.ndarray, np.ndarray]:
        """Cell centres [µm] and crystals per kg solvent in each size class now."""
        return self.grid.centres_m * 1e6, self.crystallizer.counts.copy()

    def mass_balance_error(self) -> float:
        """Relative departure of dissolved + solid - seed from the charge [-] (rounding only)."""
        c = self.crystallizer
        return abs(c.conc + c.solids - c.seed_added - self.charged) / self.charged
