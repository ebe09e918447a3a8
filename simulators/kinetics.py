r"""The plant's crystallization kinetics, and how far they sit from the site file's.

Rates as functions of the relative supersaturation :math:`\sigma = c/c_{sat} - 1` [1]_ [2]_:

.. math::
    G &= k_g\,\sigma^g\,(1 + L/L_g)^p & \sigma > 0 \quad\text{(growth)}\\
    G &= -k_d\,(-\sigma) & \sigma < 0 \quad\text{(dissolution)}\\
    B_{sec} &= k_b\,\sigma^b\,M_T^j & \sigma > 0\\
    B_{prim} &= k_p\,(\sigma / \sigma_{lim})^q & \sigma > 0

:math:`G` [m/s] is a size change rate, :math:`B` [crystals per kg solvent per s] a nucleation
rate, :math:`M_T` the suspension density [kg crystals per kg solvent]. The size factor is the
Abegg-Stevens-Larson form [3]_ (``p = 0``: size-independent growth). Primary nucleation is
written against the metastable limit :math:`\sigma_{lim}(T)` of the site's zone: with a large
exponent :math:`q` it is negligible inside the zone and switches on steeply beyond it.
Dissolution is first order in undersaturation (mass-transfer limited, common practice).

References
----------
.. [1] J. W. Mullin, *Crystallization*, 4th ed., Butterworth-Heinemann, 2001, ch. 5
   (nucleation) and ch. 6 (crystal growth, dissolution).
.. [2] A. D. Randolph, M. A. Larson, *Theory of Particulate Processes*, 2nd ed., Academic Press,
   1988, ch. 5 (nucleation and growth kinetics).
.. [3] C. F. Abegg, J. D. Stevens, M. A. Larson, "Crystal size distributions in continuous
   crystallizers when growth rate is size dependent", AIChE J. 14 (1968) 118-122.
   doi:10.1002/aic.690140123
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from sensor.numerics import FloatArray
from sensor.shell.config import ModelConfig
from simulators.errors import SimulatorError
from simulators.settings import KineticsSettings

MAX_KINETICS_FRACTION = 0.5
"""Largest relative change of a kinetic constant the mismatch option allows (+/-50 %)."""
MAX_SOLUBILITY_OFFSET_K = 1.0
"""Largest shift of the plant's solubility curve the mismatch option allows [K]."""


@dataclass(frozen=True)
class Mismatch:
    r"""How the plant differs from what the site file tells the estimator.

    The plant's kinetic constants are the site's times these factors, and its solubility is
    the site's curve shifted in temperature: :math:`c_{sat}^{plant}(T) = c_{sat}^{site}(T +
    \delta T)` (a positive offset makes the plant more soluble).

    Parameters
    ----------
    growth_factor : multiplies :math:`k_g` [-], 0.5 to 1.5
    nucleation_factor : multiplies :math:`k_b` (secondary nucleation) [-], 0.5 to 1.5
    primary_nucleation_factor : multiplies :math:`k_p` [-], 0.5 to 1.5
    dissolution_factor : multiplies :math:`k_d` [-], 0.5 to 1.5
    solubility_offset_k : :math:`\delta T` [K], -1 to 1
    """

    growth_factor: float = 1.0
    nucleation_factor: float = 1.0
    primary_nucleation_factor: float = 1.0
    dissolution_factor: float = 1.0
    solubility_offset_k: float = 0.0

    def __post_init__(self) -> None:
        for name in (
            "growth_factor",
            "nucleation_factor",
            "primary_nucleation_factor",
            "dissolution_factor",
        ):
            value = getattr(self, name)
            if not abs(value - 1.0) <= MAX_KINETICS_FRACTION + 1e-12:
                raise SimulatorError(f"mismatch {name}: must be 0.5 to 1.5; got {value}")
        if not abs(self.solubility_offset_k) <= MAX_SOLUBILITY_OFFSET_K:
            raise SimulatorError(
                f"mismatch solubility_offset_k: must be -1 to 1 K; got {self.solubility_offset_k}"
            )

    @classmethod
    def draw(
        cls, rng: np.random.Generator, kinetics_fraction: float, solubility_offset_k: float
    ) -> Mismatch:
        """Draw a mismatch: each factor uniform in ``1 +/- kinetics_fraction``, the offset
        uniform in ``+/- solubility_offset_k`` [K].

        Raises
        ------
        SimulatorError
            If the fraction exceeds 0.5 or the offset 1 K (or either is negative).
        """
        if not 0.0 <= kinetics_fraction <= MAX_KINETICS_FRACTION:
            raise SimulatorError(
                f"mismatch: kinetics fraction must be 0 to 0.5; got {kinetics_fraction}"
            )
        if not 0.0 <= solubility_offset_k <= MAX_SOLUBILITY_OFFSET_K:
            raise SimulatorError(
                f"mismatch: solubility offset must be 0 to 1 K; got {solubility_offset_k}"
            )
        factors = 1.0 + rng.uniform(-kinetics_fraction, kinetics_fraction, 4)
        offset = float(rng.uniform(-solubility_offset_k, solubility_offset_k))
        return cls(*(float(f) for f in factors), solubility_offset_k=offset)

    def describe(self) -> str:
        """One line for headers and summaries."""
        return (
            f"growth x{self.growth_factor:.3f}, secondary nucleation "
            f"x{self.nucleation_factor:.3f}, primary nucleation "
            f"x{self.primary_nucleation_factor:.3f}, dissolution x{self.dissolution_factor:.3f}"
            f", solubility offset {self.solubility_offset_k:+.3f} K"
        )


@dataclass(frozen=True)
class PlantKinetics:
    """The plant's kinetic constants (module equations), in SI.

    Parameters
    ----------
    growth_rate_constant_m_per_s : :math:`k_g` [m/s]
    growth_order : :math:`g` [-]
    secondary_rate_constant_per_kg_s : :math:`k_b` [1/(kg solvent s)]
    secondary_order : :math:`b` [-]
    solids_exponent : :math:`j` [-]
    dissolution_rate_constant_m_per_s : :math:`k_d` [m/s]
    primary_rate_at_limit_per_kg_s : :math:`k_p` [1/(kg solvent s)]
    primary_exponent : :math:`q` [-]
    growth_size_exponent : :math:`p` [-], below 1
    growth_size_scale_m : :math:`L_g` [m]
    """

    growth_rate_constant_m_per_s: float
    growth_order: float
    secondary_rate_constant_per_kg_s: float
    secondary_order: float
    solids_exponent: float
    dissolution_rate_constant_m_per_s: float
    primary_rate_at_limit_per_kg_s: float
    primary_exponent: float
    growth_size_exponent: float = 0.0
    growth_size_scale_m: float = 1e-4

    @classmethod
    def from_site(
        cls, model: ModelConfig, plant: KineticsSettings, mismatch: Mismatch
    ) -> PlantKinetics:
        """The site file's ``[model]`` kinetics (nominal), moved by ``mismatch``, with the
        plant-only constants of ``[simulator.kinetics]``."""
        return cls(
            growth_rate_constant_m_per_s=model.growth_rate_constant_m_per_s
            * mismatch.growth_factor,
            growth_order=model.growth_order,
            secondary_rate_constant_per_kg_s=model.nucleation_rate_constant_per_kg_s
            * mismatch.nucleation_factor,
            secondary_order=model.nucleation_order,
            solids_exponent=model.nucleation_solids_exponent,
            dissolution_rate_constant_m_per_s=model.dissolution_rate_constant_m_per_s
            * mismatch.dissolution_factor,
            primary_rate_at_limit_per_kg_s=plant.primary_rate_at_limit_per_kg_s
            * mismatch.primary_nucleation_factor,
            primary_exponent=plant.primary_exponent,
            growth_size_exponent=plant.growth_size_exponent,
            growth_size_scale_m=plant.growth_size_scale_um * 1e-6,
        )

    def size_factor(self, size_m: FloatArray) -> FloatArray:
        """:math:`(1 + L/L_g)^p` [-] at sizes ``size_m`` [m]."""
        return (1.0 + size_m / self.growth_size_scale_m) ** self.growth_size_exponent

    def growth_rate(self, sigma: float) -> float:
        """:math:`G` at zero size [m/s]: growth for ``sigma > 0``, dissolution (negative) for
        ``sigma < 0``."""
        if sigma > 0.0:
            return self.growth_rate_constant_m_per_s * sigma**self.growth_order
        return self.dissolution_rate_constant_m_per_s * sigma

    def nucleation_rate(self, sigma: float, solids: float, sigma_limit: float) -> float:
        """:math:`B_{sec} + B_{prim}` [1/(kg solvent s)] at ``sigma`` [-], suspension density
        ``solids`` [kg/kg solvent] and metastable limit ``sigma_limit`` [-]."""
        if sigma <= 0.0:
            return 0.0
        secondary = (
            self.secondary_rate_constant_per_kg_s
            * sigma**self.secondary_order
            * solids**self.solids_exponent
            if solids > 0.0
            else 0.0
        )
        primary = (
            self.primary_rate_at_limit_per_kg_s * (sigma / sigma_limit) ** self.primary_exponent
        )
        return secondary + primary
