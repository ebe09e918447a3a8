"""From a site file to the thermodynamics it describes: the fitted solubility curve and the
metastable zone, with lab-data problems reported against their file and line.

This is where site-file units become SI: g/mol to kg/mol, °C to K, K/min to K/s.
"""

from __future__ import annotations

from sensor.errors import DataFileError, FitError
from sensor.metastable import FixedWidthZone, MetastableZone, fit_nyvlt
from sensor.shell.config import CompoundConfig, SiteConfig
from sensor.shell.labdata import read_cloud_points_csv, read_solubility_csv
from sensor.solubility import (
    CompositionBasis,
    SolubilityFit,
    auto_candidates,
    choose_solubility_model,
    fit_solubility,
    fittable_model,
)
from sensor.units import ZERO_CELSIUS_K, ConcentrationUnit, concentration_unit


def composition_basis(compound: CompoundConfig) -> CompositionBasis:
    """Mole fraction when the site file gives both molar masses, else mass fraction."""
    if compound.molar_mass_g_per_mol is None or compound.solvent_molar_mass_g_per_mol is None:
        return CompositionBasis.mass_fraction()
    return CompositionBasis.mole_fraction(
        compound.molar_mass_g_per_mol / 1000.0, compound.solvent_molar_mass_g_per_mol / 1000.0
    )


def melt_temp_k(compound: CompoundConfig) -> float | None:
    """The solute's melting temperature [K], if the site file gives it."""
    return None if compound.melting_temp_c is None else compound.melting_temp_c + ZERO_CELSIUS_K


def site_concentration_unit(compound: CompoundConfig, name: str) -> ConcentrationUnit:
    """The converter for a unit named in the site file, with the compound's molar masses."""
    molar = compound.molar_mass_g_per_mol, compound.solvent_molar_mass_g_per_mol
    return concentration_unit(
        name,
        solute_molar_mass=None if molar[0] is None else molar[0] / 1000.0,
        solvent_molar_mass=None if molar[1] is None else molar[1] / 1000.0,
    )


def fit_site_solubility(site: SiteConfig) -> SolubilityFit:
    """Fit the site's solubility data as its ``[solubility]`` section says.

    Raises
    ------
    DataFileError
        The data file is bad, or the fit fails (the message names the file).
    """
    config = site.solubility
    data = read_solubility_csv(
        config.data, site_concentration_unit(site.compound, config.conc_unit)
    )
    basis = composition_basis(site.compound)
    melt = melt_temp_k(site.compound)
    try:
        if config.model == "auto":
            candidates = auto_candidates(
                melt_temp_k=melt, polynomial_degree=config.polynomial_degree
            )
            return choose_solubility_model(
                data.temp_k,
                data.conc,
                candidates,
                basis,
                extrapolation_margin_k=config.extrapolation_margin_k,
            ).best
        model = fittable_model(
            config.model, melt_temp_k=melt, polynomial_degree=config.polynomial_degree
        )
        return fit_solubility(
            data.temp_k,
            data.conc,
            model,
            basis,
            extrapolation_margin_k=config.extrapolation_margin_k,
        )
    except FitError as error:
        line = None if error.point is None else data.source.line_of(error.point)
        raise DataFileError(config.data, line, str(error)) from None


def site_metastable_zone(site: SiteConfig, fit: SolubilityFit) -> MetastableZone:
    """The site's metastable zone: Nývlt fitted to its cloud points, or the fixed width."""
    config = site.metastable
    curve = fit.curve
    if config.method == "fixed-width":
        assert config.fixed_width_k is not None  # the schema requires it for this method
        return FixedWidthZone(
            solubility=curve,
            rate_range_k_per_s=(0.0, float("inf")),
            width=config.fixed_width_k,
            width_std=config.fixed_width_std_k,
        )
    assert config.data is not None  # the schema requires both for nyvlt
    assert config.conc_unit is not None
    points = read_cloud_points_csv(
        config.data, site_concentration_unit(site.compound, config.conc_unit)
    )
    try:
        return fit_nyvlt(points.conc, points.rate_k_per_s, points.cloud_temp_k, curve).zone
    except FitError as error:
        line = None if error.point is None else points.source.line_of(error.point)
        raise DataFileError(config.data, line, str(error)) from None
