"""Fixtures for the simulator's tests: the demo site, and a short recipe that keeps tests fast."""

from __future__ import annotations

import dataclasses

import pytest

from sensor.shell.config import SiteConfig, load_site_file
from simulators.settings import SimulatorSettings, read_simulator_settings
from tests.conftest import DEMO_SITE


@pytest.fixture(scope="session")
def demo_site() -> SiteConfig:
    return load_site_file(DEMO_SITE)


@pytest.fixture(scope="session")
def demo_settings(demo_site: SiteConfig) -> SimulatorSettings:
    return read_simulator_settings(demo_site)


def shortened(settings: SimulatorSettings, **recipe_changes: object) -> SimulatorSettings:
    """The demo settings with a recipe of short holds (about 2.5 h of batch), changed further
    by ``recipe_changes``."""
    short = {
        "idle_s": 10.0,
        "dissolve_hold_s": 600.0,
        "seed_hold_s": 300.0,
        "cooling_duration_s": 3600.0,
        "cooling_max_s": 5400.0,
        "final_hold_s": 600.0,
        "discharge_s": 60.0,
    }
    recipe = dataclasses.replace(settings.recipe, **(short | recipe_changes))
    return dataclasses.replace(settings, recipe=recipe)


@pytest.fixture(scope="session")
def short_settings(demo_settings: SimulatorSettings) -> SimulatorSettings:
    return shortened(demo_settings)
