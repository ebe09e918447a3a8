"""Shared fixtures: published tables (named after their source), seeded generators."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parent.parent
CONFIG_DIR = REPO / "config"
DEMO_SITE = CONFIG_DIR / "demo-site.toml"


@pytest.fixture
def rng() -> np.random.Generator:
    """A seeded generator: no test depends on luck."""
    return np.random.default_rng(20261201)
