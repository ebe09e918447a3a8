"""Run as a child process by ``tests/test_pipeline.py``: in a fresh interpreter (no kernel
compiled yet in memory), rehearse the demo unit's pipeline, note every compiled kernel's
signatures, then run a whole closed-loop batch of the simulated plant and print, as JSON, the
kernels the rehearsal had compiled and those the batch compiled on top."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numba

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import sensor.consistency
import sensor.crystallizer
import sensor.kalman
import sensor.outputs
import sensor.predictor
import sensor.solubility
import sensor.unscented
import sensor.validation
from sensor.pipeline import UnitPipeline, rehearse
from sensor.shell.sitesensor import pipeline_setup
from tests.closedloop import closed_loop_plant, run_closed_loop
from tests.synthetic import demo_site_and_zone

MODULES = (
    sensor.consistency,
    sensor.crystallizer,
    sensor.kalman,
    sensor.outputs,
    sensor.predictor,
    sensor.solubility,
    sensor.unscented,
    sensor.validation,
)


def compiled() -> dict[str, int]:
    """Signatures compiled so far, per numba kernel of the live path's modules."""
    return {
        f"{module.__name__}.{name}": len(kernel.signatures)
        for module in MODULES
        for name, kernel in vars(module).items()
        if isinstance(kernel, numba.core.registry.CPUDispatcher)
    }


def main() -> None:
    site, zone = demo_site_and_zone()
    setup = pipeline_setup(site, 0, zone)
    rehearse(setup)
    before = compiled()
    plant = closed_loop_plant(site, 3)
    run_closed_loop(plant.simulation(), UnitPipeline(setup), plant.site)
    after = compiled()
    new = {name: count for name, count in after.items() if count != before[name]}
    print(json.dumps({"rehearsed": before, "new": new}))


if __name__ == "__main__":
    main()
