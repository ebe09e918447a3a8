"""Fixtures of the report tests: small synthetic batches written as historian files.

The batches come from the estimation model itself (:mod:`tests.synthetic`): they test the
reports' method and plumbing, not the science. Three "good" batches cool at the same rate and
differ only in their noise; a fourth cools three times faster, so that it is more supersaturated
than any of them at the same temperature.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest

from sensor.samples import Sample
from tests.synthetic import cooling_batch, demo_setup, demo_site_and_zone, write_historian_csv

GOOD_IDS = ("B0", "B1", "B2")
FAST_ID = "F"


@dataclass(frozen=True)
class SyntheticFiles:
    """Historian files of the synthetic batches, and their samples."""

    folder: Path
    files: dict[str, Path]
    samples: dict[str, list[Sample]]


@pytest.fixture(scope="session")
def synthetic(tmp_path_factory) -> SyntheticFiles:
    rng = np.random.default_rng(417)
    site, _ = demo_site_and_zone()
    setup = demo_setup()
    folder = tmp_path_factory.mktemp("report")
    files, samples = {}, {}
    for batch_id, rate in (*((g, 0.3) for g in GOOD_IDS), (FAST_ID, 0.9)):
        batch = cooling_batch(
            setup, rng, hours=1.5, start_temp_c=51.0, seed_at_s=300.0, cooling_k_per_min=rate
        )
        path = folder / f"{batch_id}.csv"
        write_historian_csv(path, batch.samples, site.unit[0], batch_id=batch_id)
        files[batch_id], samples[batch_id] = path, batch.samples
    return SyntheticFiles(folder, files, samples)
