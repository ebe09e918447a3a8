"""From a site file to a unit's soft sensor: the model, the filter tuning and the validation
rules, converted to SI here, once."""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable
from dataclasses import replace

import numpy as np

from sensor.crystallizer import Kinetics, build_model, seed_moments
from sensor.errors import SiteConfigError, UnitError
from sensor.kalman import FilterTuning, Measurements
from sensor.metastable import MetastableZone
from sensor.pipeline import PipelineSetup
from sensor.shell.config import BATCH_PHASES, SiteConfig, UnitConfig
from sensor.shell.sitemodels import (
    fit_site_solubility,
    site_concentration_unit,
    site_metastable_zone,
)
from sensor.softsensor import UnitSetup
from sensor.units import ZERO_CELSIUS_K, ConcentrationUnit
from sensor.validation import SignalRules

SEEDED_PHASES = frozenset(BATCH_PHASES[BATCH_PHASES.index("seed") :])
"""Phases in which the seed is in the vessel (``seed`` and every phase after it)."""

ESTIMATING_PHASES = frozenset(BATCH_PHASES[BATCH_PHASES.index("cool-to-seed") :])
"""Phases in which the estimation model holds: from cooling to the seed point (the charge has
dissolved) on. While the charge is heated and dissolved, undissolved solid that the model does
not know would be read as analyzer bias."""


def site_zone(site: SiteConfig) -> MetastableZone:
    """The site's metastable zone, holding its fitted solubility curve (fit once per site)."""
    return site_metastable_zone(site, fit_site_solubility(site))


def analyzer_unit(site: SiteConfig, unit: UnitConfig) -> ConcentrationUnit:
    """The converter of the analyzer's unit."""
    return site_concentration_unit(site.compound, unit.analyzer.conc_unit)


def _to_kg_per_kg(unit: ConcentrationUnit, value: float, site: SiteConfig, key: str) -> float:
    try:
        return float(unit.to_kg_per_kg(value))
    except UnitError as error:
        raise SiteConfigError(site.path, key, str(error)) from None


def _bound(unit: ConcentrationUnit, value: float) -> float:
    try:
        return float(unit.to_kg_per_kg(value))
    except UnitError:
        return math.inf  # a bound beyond what the unit allows does not bound anything


def unit_setup(site: SiteConfig, index: int, zone: MetastableZone) -> UnitSetup:
    """The soft sensor setup of ``site.unit[index]``.

    The analyzer's noise, given in its own unit, is converted to kg/kg solvent at the solubility
    in the middle of the curve's data range (exact for the linear units kg/kg and g/100g).
    """
    unit = site.unit[index]
    key = f"unit[{index}]"
    curve = zone.solubility
    model_config, filter_config, rules = site.model, site.filter, site.validation
    model = build_model(
        curve,
        Kinetics(
            growth_rate_constant_m_per_s=model_config.growth_rate_constant_m_per_s,
            growth_order=model_config.growth_order,
            nucleation_rate_constant_per_kg_s=model_config.nucleation_rate_constant_per_kg_s,
            nucleation_order=model_config.nucleation_order,
            nucleation_solids_exponent=model_config.nucleation_solids_exponent,
            dissolution_rate_constant_m_per_s=model_config.dissolution_rate_constant_m_per_s,
        ),
        heat_transfer_w_per_k=unit.heat_transfer_w_per_k,
        heat_capacity_j_per_k=unit.heat_capacity_j_per_k,
        crystal_density_kg_per_m3=site.compound.crystal_density_kg_per_m3,
        volume_shape_factor=site.compound.volume_shape_factor,
        estimate_growth_scale=model_config.estimate_growth_scale,
        max_step_s=model_config.max_step_s,
    )
    tuning = FilterTuning(
        kind=filter_config.kind,
        temp_process_std=filter_config.temp_process_std_k_per_sqrt_s,
        conc_process_std=filter_config.conc_process_std_per_sqrt_s,
        moment_process_std=filter_config.moment_process_std_per_sqrt_s,
        growth_scale_random_walk_std=filter_config.growth_scale_random_walk_std_per_sqrt_s,
        bias_random_walk_std=filter_config.bias_random_walk_std_per_sqrt_s,
        growth_rel_std=model_config.growth_rel_std,
        nucleation_rel_std=model_config.nucleation_rel_std,
        kinetics_error_time_s=model_config.kinetics_error_time_s,
        initial_temp_std=filter_config.initial_temp_std_k,
        initial_conc_rel_std=filter_config.initial_conc_rel_std,
        initial_bias_std=filter_config.initial_bias_std,
        initial_moment_std=filter_config.initial_moment_std,
        seed_rel_std=model_config.seed_rel_std,
        gate_probability=filter_config.gate_probability,
        max_consecutive_gated=filter_config.max_consecutive_gated,
        sigma_alpha=filter_config.sigma_alpha,
        sigma_beta=filter_config.sigma_beta,
        sigma_kappa=filter_config.sigma_kappa,
        history_margin_s=filter_config.history_margin_s,
    )
    conc_unit = analyzer_unit(site, unit)
    lo_k, hi_k = curve.temp_range_k
    typical = float(conc_unit.from_kg_per_kg(curve.c_sat(0.5 * (lo_k + hi_k))))
    noise = unit.analyzer.noise_std
    if noise >= typical:
        raise SiteConfigError(
            site.path, f"{key}.analyzer.noise_std", f"{noise} is not below a typical reading"
        )
    conc_noise = 0.5 * abs(
        _to_kg_per_kg(conc_unit, typical + noise, site, f"{key}.analyzer.noise_std")
        - _to_kg_per_kg(conc_unit, typical - noise, site, f"{key}.analyzer.noise_std")
    )
    spike = rules.spike_threshold_std * math.sqrt(2.0)
    temp_lo, temp_hi = (v + ZERO_CELSIUS_K for v in rules.temp_range_c)
    common = {"stale_after_s": rules.stale_after_s, "frozen_after_s": rules.frozen_after_s}
    common["accept_uncertain"] = rules.accept_uncertain
    common["rate_window_s"] = rules.rate_window_s
    conc_lo, conc_hi = unit.analyzer.range
    seed = (
        seed_moments(
            unit.seed_mass_kg,
            unit.solvent_mass_kg,
            unit.seed_mean_size_um * 1e-6,
            unit.seed_size_std_um * 1e-6,
        )
        if unit.seed_mass_kg > 0.0
        else np.zeros(4)
    )
    return UnitSetup(
        model=model,
        zone=zone,
        tuning=tuning,
        measurements=Measurements(
            temp_noise_std_k=unit.temp_noise_std_k,
            conc_noise_std=conc_noise,
            analyzer_delay_s=unit.analyzer.delay_s,
        ),
        temp_rules=SignalRules(
            temp_lo,
            temp_hi,
            max_rate_per_s=rules.max_temp_rate_k_per_min / 60.0,
            spike_delta=spike * unit.temp_noise_std_k,
            **common,
        ),
        jacket_rules=SignalRules(temp_lo, temp_hi, **common),
        conc_rules=SignalRules(
            -math.inf if conc_lo < 0.0 else _bound(conc_unit, conc_lo),
            _bound(conc_unit, conc_hi),
            spike_delta=spike * conc_noise,
            **common,
        ),
        seed_zeta=seed,
        solvent_mass_kg=unit.solvent_mass_kg,
        seeded_phases=SEEDED_PHASES,
        estimating_phases=ESTIMATING_PHASES,
        all_phases=frozenset(BATCH_PHASES),
        nis_window=filter_config.nis_window,
        nis_probability=filter_config.nis_probability,
    )


def pipeline_setup(site: SiteConfig, index: int, zone: MetastableZone) -> PipelineSetup:
    """The pipeline setup of ``site.unit[index]``: its soft sensor (:func:`unit_setup`), the
    law (``[controller]``, the zone read no slower than its slowest measured rate), the guard
    (``[guard]``, updates every ``controller.update_interval_s``) and the alarms (``[alarms]``,
    undersaturation intended in ``guard.heating_phases``)."""
    interval_s = site.controller.update_interval_s
    return PipelineSetup(
        unit_id=site.unit[index].id,
        sensor=unit_setup(site, index, zone),
        law=site.controller.law_settings(zone.rate_range_k_per_s[0]),
        limits=site.guard.limits(interval_s),
        alarms=site.alarms.settings(site.guard.heating_phases),
    )


def pipeline_setups(
    site: SiteConfig,
    zone: MetastableZone,
    units: Iterable[int],
    setups: Callable[[int], UnitSetup],
) -> dict[int, PipelineSetup]:
    """The pipeline setup of each of ``units``, reusing their soft-sensor setups
    (``setups(index)``, e.g. a cached :func:`unit_setup`): what replay's shadow run needs."""
    return {i: replace(pipeline_setup(site, i, zone), sensor=setups(i)) for i in units}
