"""Benchmark: one 10-hour simulated batch, 1 s scans, 300 size classes, against the wall clock.

Run as a script (pytest does not collect it)::

    python tests/benchmarks/simulator.py [--check] [--classes N]

It simulates the demo scenario's batch (its final hold lengthened so the batch lasts at least
10 h), 1 s scans, with the demo's population balance of 300 size classes (at least 200 are
required), and measures, side by side in the same run:

- the whole offline run as ``sigmatrack simulate`` does it (engine, truth, historian and truth
  CSV written to a temporary folder): simulated time over wall time (target: 3,600x, one
  batch-hour per wall second);
- the engine alone (steps only);
- the population-balance kernel (one flux-limited step on the grid) against the same step
  written as a per-class Python loop, on the same counts: the speed-up of vectorising it.

Each ratio is printed as ``NNx``; with ``--check`` the script exits 1 when a target is missed.
"""

from __future__ import annotations

import argparse
import dataclasses
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from sensor.shell.config import load_site_file
from simulators.plant import PlantSimulation
from simulators.population import SizeGrid, growth_step, normal_counts
from simulators.settings import read_simulator_settings
from simulators.shell.historian import HistorianWriter, TruthWriter

DEMO_SITE = Path(__file__).resolve().parents[2] / "config" / "demo-site.toml"
REAL_TIME_TARGET = 3600.0
BATCH_S = 36000.0
MIN_CLASSES = 200


def loop_step(counts: list[float], courant: float) -> list[float]:
    """The growth step of :func:`simulators.population.growth_step` for one positive Courant
    number, one class at a time (the baseline)."""
    n = len(counts)
    padded = [0.0, *counts, 0.0]
    flux = [0.0] * n
    for i in range(n):
        backward = padded[i + 1] - padded[i]
        forward = padded[i + 2] - padded[i + 1]
        product = backward * forward
        slope = product / (backward + forward) if product > 0.0 else 0.0
        flux[i] = courant * (counts[i] + (1.0 - courant) * slope)
    flux[-1] = 0.0
    updated = [counts[i] - flux[i] for i in range(n)]
    for i in range(1, n):
        updated[i] += flux[i - 1]
    return updated


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true", help="exit 1 when a target is missed")
    parser.add_argument("--classes", type=int, default=300, help="size classes (at least 200)")
    args = parser.parse_args()
    if args.classes < MIN_CLASSES:
        parser.error(f"--classes must be at least {MIN_CLASSES}")

    site = load_site_file(DEMO_SITE)
    settings = read_simulator_settings(site)
    settings = dataclasses.replace(
        settings,
        grid=dataclasses.replace(settings.grid, size_classes=args.classes),
        recipe=dataclasses.replace(
            settings.recipe, final_hold_s=settings.recipe.final_hold_s + 600
        ),
    )

    def batch(write: bool) -> tuple[float, float]:
        sim = PlantSimulation.from_site(site, seed=1, settings=settings)
        began = time.perf_counter()
        with tempfile.TemporaryDirectory() as folder:
            if write:
                out = (Path(folder) / "batch.csv").open("w", encoding="utf-8", newline="")
                truth_out = (Path(folder) / "truth.csv").open("w", encoding="utf-8", newline="")
                historian = HistorianWriter(out, sim.unit, ["benchmark"])
                truths = TruthWriter(truth_out, ["benchmark"])
                while not sim.finished:
                    sample = sim.step()
                    moment = sim.timestamp()
                    historian.write(sample, moment)
                    truths.write(sim.truth(), moment)
                out.close()
                truth_out.close()
            else:
                while not sim.finished:
                    sim.step()
        return sim.time_s, time.perf_counter() - began

    simulated, wall = batch(write=True)
    ratio = simulated / wall
    print(f"batch: {simulated / 3600:.2f} h simulated, 1 s scans, {args.classes} size classes")
    print(
        f"offline run with both CSVs: {wall:.2f} s wall, {ratio:,.0f}x real time "
        f"(target {REAL_TIME_TARGET:,.0f}x)"
    )
    engine_simulated, engine_wall = batch(write=False)
    print(
        f"engine alone: {engine_wall:.2f} s wall, {engine_simulated / engine_wall:,.0f}x real time"
    )

    grid = SizeGrid(args.classes, settings.grid.max_size_um * 1e-6)
    counts = normal_counts(grid, 0.05, 200e-6, 50e-6, 1310.0 * 0.45)
    courant = 0.3
    faces = np.full(args.classes + 1, courant)
    repeats = 2000
    began = time.perf_counter()
    vector = counts
    for _ in range(repeats):
        vector = growth_step(vector, faces)
    vector_s = time.perf_counter() - began
    began = time.perf_counter()
    looped = counts.tolist()
    for _ in range(repeats):
        looped = loop_step(looped, courant)
    loop_s = time.perf_counter() - began
    agreement = float(np.max(np.abs(vector - np.array(looped))) / np.max(counts))
    print(
        f"population step, {repeats} steps: {vector_s / repeats * 1e6:.1f} us vectorised, "
        f"{loop_s / repeats * 1e6:.1f} us per-class loop: {loop_s / vector_s:.0f}x "
        f"(agree to {agreement:.1e} relative)"
    )

    missed = []
    if simulated < BATCH_S:
        missed.append(f"batch lasted {simulated:.0f} s < {BATCH_S:.0f} s")
    if ratio < REAL_TIME_TARGET:
        missed.append(f"real-time ratio {ratio:,.0f}x < {REAL_TIME_TARGET:,.0f}x")
    if agreement > 1e-12:
        missed.append(f"vectorised step disagrees with the loop by {agreement:.1e}")
    for line in missed:
        print(f"MISSED: {line}")
    return 1 if (args.check and missed) else 0


if __name__ == "__main__":
    sys.exit(main())
