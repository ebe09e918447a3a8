"""The [simulator] table: documented key by key in the demo site file, and refused when bad."""

from __future__ import annotations

import dataclasses
import re
import typing

import pytest

from sensor.errors import SiteConfigError
from sensor.shell.config import parse_site
from simulators.faults import Fault
from simulators.plant import PlantSimulation
from simulators.settings import SimulatorSettings, read_simulator_settings
from tests.conftest import DEMO_SITE

DEMO_TEXT = DEMO_SITE.read_text(encoding="utf-8")
SIMULATOR_TEXT = DEMO_TEXT[DEMO_TEXT.index("[simulator]") : DEMO_TEXT.index("[[unit]]")]


def _classes(cls, seen):
    seen.add(cls)
    hints = typing.get_type_hints(cls)
    for hint in (hints[f.name] for f in dataclasses.fields(cls) if f.init):  # keys only
        for inner in (hint, *typing.get_args(hint)):
            if dataclasses.is_dataclass(inner) and inner not in seen:
                _classes(inner, seen)
    return seen


@pytest.mark.parametrize(
    "cls", sorted(_classes(SimulatorSettings, set()) | {Fault}, key=lambda c: c.__name__)
)
def test_every_key_is_documented_in_the_demo_site_file(cls):
    for f in (f for f in dataclasses.fields(cls) if f.init):
        key = re.search(rf"(^|[\s#]){re.escape(f.name)}\s*=", SIMULATOR_TEXT, re.MULTILINE)
        table = re.search(rf"\[\[?simulator\.{re.escape(f.name)}\]\]?", SIMULATOR_TEXT)
        assert key or table, f"{cls.__name__}.{f.name} is not documented in {DEMO_SITE.name}"


def test_the_site_file_keeps_the_table_raw_and_the_simulator_reads_it(demo_site):
    assert isinstance(demo_site.simulator, dict)
    settings = read_simulator_settings(demo_site)
    assert settings.recipe.final_temp_c == 10.0
    assert settings.start.isoformat() == "2026-03-14T06:00:00+00:00"


def _site(old, new):
    assert DEMO_TEXT.count(old) == 1, old
    return parse_site(DEMO_TEXT.replace(old, new), DEMO_SITE)


@pytest.mark.parametrize(
    ("old", "new", "message"),
    [
        (
            "seed_temp_c = 53.0",
            "seed_temp_c = 53.0\nseed_temp = 1.0",
            r"simulator\.recipe\.seed_temp: unknown key \(did you mean 'seed_temp_c'\?\)",
        ),
        (
            "seed_temp_c = 53.0",
            "seed_temp_c = 70.0",
            r"simulator\.recipe\.seed_temp_c: must be below",
        ),
        (
            'cooling_profile = "cubic"',
            'cooling_profile = "s-curve"',
            r"simulator\.recipe\.cooling_profile: must be one of 'linear', 'cubic'",
        ),
        ("size_classes = 300", "size_classes = 5", r"simulator\.grid\.size_classes: must be at"),
        (
            "courant_max = 0.4",
            "courant_max = 0.7",
            r"simulator\.grid\.courant_max: must be at most",
        ),
        (
            "kinetics_fraction = 0.0",
            "kinetics_fraction = 0.8",
            r"simulator\.mismatch\.kinetics_fraction: at most 0\.5",
        ),
        (
            'start_time = "2026-03-14T06:00:00Z"',
            'start_time = "2026-03-14T06:00:00"',
            r"simulator\.start_time: needs an explicit UTC offset",
        ),
        (
            '# [[simulator.faults]]\n# kind = "spikes"',
            '[[simulator.faults]]\nkind = "melt"\nstart_s = 1.0\nduration_s = 2.0\n#',
            r"simulator\.faults\[0\]\.kind: must be one of 'spikes'",
        ),
    ],
)
def test_bad_simulator_keys_are_refused_naming_the_key(old, new, message):
    site = _site(old, new)
    with pytest.raises(SiteConfigError, match=message):
        read_simulator_settings(site)


def test_recipe_temperatures_outside_the_solubility_data_are_refused():
    site = _site("final_temp_c = 10.0                       # controlled", "final_temp_c = -20.0 #")
    with pytest.raises(
        SiteConfigError, match=r"simulator\.recipe\.final_temp_c: -20 °C is outside"
    ):
        PlantSimulation.from_site(site)


def test_an_analyzer_interval_off_the_scan_grid_is_refused():
    site = _site("sample_interval_s = 10.0", "sample_interval_s = 2.5")
    with pytest.raises(
        SiteConfigError, match=r"unit\[0\]\.analyzer\.sample_interval_s: must be a whole number"
    ):
        PlantSimulation.from_site(site, settings=read_simulator_settings(site))
