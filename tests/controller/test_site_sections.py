"""The [controller], [guard] and [alarms] sections of the site file, and the settings the
controller gets from them (converted to SI once, here)."""

from __future__ import annotations

import dataclasses

import pytest

from controller.alarm_set import crystallizer_alarm_engine
from controller.guard import Fallback, Guard
from controller.law import LawInputs, LawMode, SetpointLaw
from sensor.errors import SiteConfigError
from sensor.shell.config import (
    AlarmsConfig,
    ControllerConfig,
    GuardConfig,
    load_site_file,
    parse_site,
)
from sensor.shell.sitemodels import fit_site_solubility, site_metastable_zone
from tests.conftest import DEMO_SITE, REPO
from tests.controller.toys import ConstantForecast, ToySolubility, ToyZone

DEMO_TEXT = DEMO_SITE.read_text(encoding="utf-8")


def _edit(old: str, new: str) -> str:
    assert DEMO_TEXT.count(old) == 1, f"the demo site file should hold {old!r} once"
    return DEMO_TEXT.replace(old, new)


def test_the_demo_sections_give_the_controller_its_settings_in_si():
    site = load_site_file(DEMO_SITE)
    law = site.controller.law_settings(zone_min_rate_k_per_s=0.1 / 60.0)
    assert law.target_fraction == 0.5
    assert law.target_zone_rate_k_per_s == pytest.approx(0.3 / 60.0, rel=1e-15)
    assert law.interval_s == 30.0
    limits = site.guard.limits(site.controller.update_interval_s)
    assert limits.setpoint_range_k == pytest.approx((273.15, 353.15), abs=1e-12)
    assert limits.final_temp_k == pytest.approx(283.15, abs=1e-12)
    assert limits.max_cooling_rate_k_per_s == pytest.approx(1.0 / 60.0, rel=1e-15)
    assert limits.proposal_phases == frozenset({"controlled-cooling"})
    assert limits.fallback is Fallback.RECIPE
    alarms = site.alarms.settings(site.guard.heating_phases)
    assert alarms.seed_window_fraction == (0.3, 0.6)
    # and the objects build from them
    SetpointLaw(law, limits, ToySolubility(), ToyZone())
    Guard(limits)
    assert len(crystallizer_alarm_engine(alarms).definitions) == 12


def test_a_heating_phase_gives_heating_limits():
    text = _edit("heating_phases = []", 'heating_phases = ["controlled-cooling"]')
    text = text.replace("max_heating_rate_k_per_min = 0.0", "max_heating_rate_k_per_min = 0.6")
    site = parse_site(text, DEMO_SITE)
    limits = site.guard.limits(30.0)
    assert limits.heating_phases == frozenset({"controlled-cooling"})
    assert limits.max_heating_rate_k_per_s == pytest.approx(0.01, rel=1e-12)
    assert site.alarms.settings(site.guard.heating_phases).heating_phases == limits.heating_phases


@pytest.mark.parametrize(
    ("old", "new", "message"),
    [
        (
            "heating_phases = []",
            'heating_phases = ["seed-hold"]',
            r"guard\.heating_phases\[0\]: 'seed-hold' is not in proposal_phases",
        ),
        (
            "heating_phases = []",
            'heating_phases = ["controlled-cooling"]',
            r"guard\.max_heating_rate_k_per_min: must be positive when heating_phases are given",
        ),
        (
            "heating_phases = []",
            'heating_phases = ["fines"]',
            r"guard\.heating_phases\[0\]: unknown phase 'fines'",
        ),
        (
            'fallback = "recipe"',
            'fallback = "hold"',
            r"guard\.fallback: must be one of 'hold-rate', 'recipe'; got 'hold'",
        ),
        (
            "dissolution_sigma = -0.05",
            "dissolution_sigma = 0.05",
            r"controller\.dissolution_sigma: must be between -1 and 0",
        ),
        (
            "target_zone_rate_k_per_min = 0.3",
            "target_zone_rate_k_per_min = 0.0",
            r"controller\.target_zone_rate_k_per_min: must be positive",
        ),
        (
            "seed_window_fraction = [0.3, 0.6]",
            "seed_window_fraction = [0.3, 1.2]",
            r"alarms\.seed_window_fraction: must lie between 0 and 1",
        ),
        (
            "tracking_error_k = 2.0",
            "tracking_error_k = -2.0",
            r"alarms\.tracking_error_k: must be positive",
        ),
        (
            "target_fraction_of_zone = 0.5",
            "low_sigma_fraction = 0.15",
            r"controller\.low_sigma_fraction: unknown key",
        ),
    ],
)
def test_bad_controller_guard_and_alarm_keys_are_refused_by_name(old, new, message):
    with pytest.raises(SiteConfigError, match=message):
        parse_site(_edit(old, new), DEMO_SITE)


@pytest.mark.parametrize(
    ("section", "cls"),
    [("controller", ControllerConfig), ("guard", GuardConfig), ("alarms", AlarmsConfig)],
)
def test_readme_explains_every_key_of_these_sections(section, cls):
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    for f in dataclasses.fields(cls):
        assert f"`{section}.{f.name}`" in readme, f"README.md does not explain {section}.{f.name}"


def test_readme_lists_every_alarm():
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    for definition in crystallizer_alarm_engine(AlarmsConfig().settings()).definitions:
        assert f"| `{definition.name}` | {definition.priority.value} |" in readme


def test_the_sites_fitted_curve_and_zone_serve_the_law_as_they_are():
    # The protocols are structural: sensor's SolubilityCurve and MetastableZone satisfy them.
    site = load_site_file(DEMO_SITE)
    fit = fit_site_solubility(site)
    zone = site_metastable_zone(site, fit)
    law = SetpointLaw(
        site.controller.law_settings(zone.rate_range_k_per_s[0]),
        site.guard.limits(site.controller.update_interval_s),
        fit.curve,
        zone,
    )
    temp_k = 313.15
    conc = float(fit.curve.c_sat(temp_k)) * 1.01
    proposal = law.propose(
        LawInputs(0.0, "controlled-cooling", temp_k, temp_k, conc, ConstantForecast(0.0))
    )
    assert proposal.mode is LawMode.AT_MAX_RATE
    target = 0.5 * float(zone.sigma_limit(temp_k, 0.3 / 60.0))
    assert proposal.sigma_target == pytest.approx(target, rel=1e-12)
    expected = float(fit.curve.temp_sat(conc / (1.0 + target)))
    assert proposal.direct_design_k == pytest.approx(expected, abs=1e-9)
