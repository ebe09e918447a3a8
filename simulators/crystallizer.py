r"""The crystallizer's physics: the size distribution, the solute balance and the temperatures.

The solute balance is exact by construction: the solute a step takes out of solution is the
change of the crystal mass of the discrete distribution,

.. math:: c^{+} = c - \left(\rho_c k_v \sum_i N_i^{+} L_i^3 - \rho_c k_v \sum_i N_i L_i^3\right)

so that dissolved plus solid solute per kg solvent stays what was charged (plus the seed) to
rounding, whatever the kinetics do. A step of the scan interval is split into substeps that
keep the Courant number at most ``courant_max`` and take at most a quarter of the supersaturation
(or undersaturation) in one substep, so the explicit coupling cannot overshoot saturation.

The temperatures (:mod:`simulators.thermal`) are stepped first, with the heat of
crystallization of the previous step; the population is then stepped at the new temperature.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sensor.metastable import MetastableZone
from sensor.numerics import FloatArray
from sensor.solubility import SolubilityCurve
from simulators.errors import SimulatorError
from simulators.kinetics import PlantKinetics
from simulators.population import COURANT_LIMIT, SizeGrid, crystal_mass, growth_step
from simulators.thermal import ThermalModel

MAX_SUBSTEPS = 20_000
"""Substeps one scan may take before the simulator gives up (a sign of impossible kinetics)."""
DISSOLVED_AWAY_PER_KG = 1e-3
"""While dissolving, a size class holding fewer crystals per kg solvent than this is dissolved
at once (its solute returned to solution): less than two crystals in a 1.6 t batch."""


@dataclass(frozen=True)
class PlantSolubility:
    r"""The plant's own solubility and metastable limit, tabulated for fast scalar look-ups.

    :math:`c_{sat}(T) = c_{sat}^{site}(T + \delta T)` and :math:`\sigma_{lim}(T) =
    \sigma_{lim}^{site}(T + \delta T)` at the reference cooling rate, tabulated every
    ``step_k`` over the site curve's trusted domain (shifted by the offset) and interpolated
    linearly: the interpolation error is below 1e-7 relative for a 0.01 K step on a smooth curve.

    Parameters
    ----------
    temp_lo_k : first temperature of the table [K]
    step_k : table step [K]
    c_sat_table : solubility [kg/kg solvent]
    sigma_limit_table : relative supersaturation at the metastable limit [-]
    trusted_k : the site curve's trusted domain, shifted by the offset [K]: where a recipe may
        run; the table reaches ``widening_k`` below it (:meth:`from_site`)
    """

    temp_lo_k: float
    step_k: float
    c_sat_table: tuple[float, ...]
    sigma_limit_table: tuple[float, ...]
    trusted_k: tuple[float, float]

    @classmethod
    def from_site(
        cls,
        curve: SolubilityCurve,
        zone: MetastableZone,
        offset_k: float,
        reference_rate_k_per_s: float,
        step_k: float = 0.01,
        widening_k: float = 0.0,
    ) -> PlantSolubility:
        """Tabulate the site's curve and zone over the curve's trusted domain and ``widening_k``
        [K] below it (the site's correlation extrapolated, for a fault that overcools)."""
        trusted_lo, hi = curve.domain_k
        lo = trusted_lo - widening_k
        count = math.floor((hi - lo) / step_k) + 1
        site_temps = lo + step_k * np.arange(count)
        c_sat = curve.c_sat(site_temps)
        sigma_limit = zone.sigma_limit(site_temps, reference_rate_k_per_s)
        if not (np.all(np.isfinite(sigma_limit)) and np.all(sigma_limit > 0.0)):
            raise SimulatorError(
                "the metastable zone gives no positive limit over the curve's domain"
            )
        if not (np.all(np.isfinite(c_sat)) and np.all(c_sat > 0.0)):
            raise SimulatorError("the solubility curve is not positive over the plant's table")
        trusted = (trusted_lo - offset_k, hi - offset_k)
        return cls(
            lo - offset_k, step_k, tuple(c_sat.tolist()), tuple(sigma_limit.tolist()), trusted
        )

    @property
    def range_k(self) -> tuple[float, float]:
        """Temperatures the table covers [K]."""
        return self.temp_lo_k, self.temp_lo_k + self.step_k * (len(self.c_sat_table) - 1)

    def _where(self, temp_k: float) -> tuple[int, float]:
        position = (temp_k - self.temp_lo_k) / self.step_k
        index = int(position)
        if not 0 <= position <= len(self.c_sat_table) - 1:
            lo, hi = self.range_k
            raise SimulatorError(
                f"reactor temperature {temp_k - 273.15:.2f} °C is outside the plant's solubility "
                f"range {lo - 273.15:.2f} to {hi - 273.15:.2f} °C"
            )
        index = min(index, len(self.c_sat_table) - 2)
        return index, position - index

    def c_sat(self, temp_k: float) -> float:
        """Solubility [kg/kg solvent] at ``temp_k`` [K]."""
        i, f = self._where(temp_k)
        table = self.c_sat_table
        return table[i] + f * (table[i + 1] - table[i])

    def sigma_limit(self, temp_k: float) -> float:
        """Relative supersaturation at the metastable limit [-] at ``temp_k`` [K]."""
        i, f = self._where(temp_k)
        table = self.sigma_limit_table
        return table[i] + f * (table[i + 1] - table[i])


class Crystallizer:
    """The vessel's contents: crystal counts, dissolved solute and the two temperatures.

    Parameters
    ----------
    grid : the size grid
    kinetics : the plant's kinetics
    solubility : the plant's solubility and metastable limit
    thermal : the energy balance
    mass_factor : :math:`\\rho_c k_v` [kg/m³]
    solvent_mass_kg : solvent in the vessel [kg]
    heat_of_crystallization_j_per_kg : heat released per kg crystallized [J/kg]
    courant_max : largest Courant number of a substep [-], at most 0.5
    conc : dissolved solute at the start [kg/kg solvent]
    counts : crystals per kg solvent in each size class at the start [1/kg]
    temp_k, jacket_k : reactor and jacket temperatures at the start [K]
    """

    def __init__(
        self,
        grid: SizeGrid,
        kinetics: PlantKinetics,
        solubility: PlantSolubility,
        thermal: ThermalModel,
        mass_factor: float,
        solvent_mass_kg: float,
        heat_of_crystallization_j_per_kg: float,
        courant_max: float,
        conc: float,
        counts: FloatArray,
        temp_k: float,
        jacket_k: float,
    ) -> None:
        if counts.shape != (grid.n_classes,) or np.any(counts < 0.0):
            raise ValueError(f"counts must be {grid.n_classes} non-negative numbers")
        if not 0.0 < courant_max <= COURANT_LIMIT:
            raise ValueError(f"courant_max must be in (0, {COURANT_LIMIT}]")
        self.grid = grid
        self.kinetics = kinetics
        self.solubility = solubility
        self.thermal = thermal
        self.mass_factor = mass_factor
        self.solvent_mass_kg = solvent_mass_kg
        self.heat_of_crystallization_j_per_kg = heat_of_crystallization_j_per_kg
        self.courant_max = courant_max
        self.conc = conc
        self.counts = np.array(counts, dtype=float)
        self.solids = crystal_mass(self.counts, grid, mass_factor)
        self.temp_k = temp_k
        self.jacket_k = jacket_k
        self.seed_added = 0.0
        self.heat_w = 0.0
        self.growth_rate_m_per_s = 0.0
        self.nucleation_rate_per_kg_s = 0.0
        self._face_factor = kinetics.size_factor(grid.edges_m)
        self._face_factor_max = float(np.max(self._face_factor))
        self._centres_squared = grid.centres_m**2

    @property
    def c_sat(self) -> float:
        """Solubility at the reactor temperature [kg/kg solvent]."""
        return self.solubility.c_sat(self.temp_k)

    @property
    def sigma(self) -> float:
        """Relative supersaturation :math:`c/c_{sat} - 1` [-]."""
        return self.conc / self.c_sat - 1.0

    def add_seed(self, counts: FloatArray) -> None:
        """Charge seed crystals (counts per kg solvent per size class); their mass is solute
        brought in from outside and is counted in :attr:`seed_added`."""
        mass = crystal_mass(counts, self.grid, self.mass_factor)
        self.counts = self.counts + counts
        self.solids += mass
        self.seed_added += mass

    def advance(self, dt_s: float, jacket_setpoint_k: float) -> None:
        """Advance the contents by ``dt_s`` [s] with the jacket setpoint held (module text).

        Raises
        ------
        SimulatorError
            If the reactor leaves the plant's solubility range, or the kinetics need more than
            :data:`MAX_SUBSTEPS` substeps.
        """
        self.temp_k, self.jacket_k = self.thermal.step(
            self.temp_k, self.jacket_k, jacket_setpoint_k, self.heat_w, dt_s
        )
        c_sat = self.solubility.c_sat(self.temp_k)
        sigma_limit = self.solubility.sigma_limit(self.temp_k)
        solids_before = self.solids
        remaining = dt_s
        kinetics = self.kinetics
        width = self.grid.width_m
        self.growth_rate_m_per_s = self.nucleation_rate_per_kg_s = 0.0
        for _ in range(MAX_SUBSTEPS):
            if remaining <= 0.0:
                break
            sigma = self.conc / c_sat - 1.0
            growth = kinetics.growth_rate(sigma) if self.solids > 0.0 else 0.0
            births = kinetics.nucleation_rate(sigma, self.solids, sigma_limit)
            self.growth_rate_m_per_s, self.nucleation_rate_per_kg_s = growth, births
            if growth == 0.0 and births == 0.0:
                break
            h = remaining
            speed = abs(growth) * self._face_factor_max
            if speed * h > self.courant_max * width:
                h = self.courant_max * width / speed
            uptake = 3.0 * self.mass_factor * speed * float(self.counts @ self._centres_squared)
            allowed = 0.25 * max(abs(self.conc - c_sat), 1e-6 * c_sat)
            if uptake * h > allowed:
                h = allowed / uptake
            counts = self.counts
            if growth != 0.0:
                counts = growth_step(counts, (growth * h / width) * self._face_factor)
            if births > 0.0:
                counts[0] += births * h
            if growth < 0.0:
                counts[counts < DISSOLVED_AWAY_PER_KG] = 0.0
            solids = crystal_mass(counts, self.grid, self.mass_factor)
            self.conc -= solids - self.solids
            self.counts, self.solids = counts, solids
            remaining -= h
        else:
            raise SimulatorError(
                f"the population balance needed more than {MAX_SUBSTEPS} substeps in one scan "
                f"at {self.temp_k - 273.15:.2f} °C, sigma {self.sigma:.3g}"
            )
        self.heat_w = (
            self.heat_of_crystallization_j_per_kg
            * self.solvent_mass_kg
            * (self.solids - solids_before)
            / dt_s
        )
