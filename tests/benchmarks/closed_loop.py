"""Benchmark: the advisor in closed loop on the plant simulator, 20 seeded batches (issue 5).

Run as a script (pytest does not collect it)::

    python tests/benchmarks/closed_loop.py [--check] [--seeds 20]

For each seed (a plant with kinetics +/-50 %, solubility +/-1 K, analyzer noise and drift;
``tests.closedloop``) it runs, side by side on the same plant, the pipeline advising from the
instruments, the oracle (the same sigma target with the plant's true state) and the fastest
linear ramp no higher in peak true sigma than the advisor's. It prints per batch and over all:
the peak-sigma margin (1 - peak true sigma / the plant's metastable limit; target > 0), the
advisor's seeding-to-final time over the linear ramp's (target <= 0.70) and over the oracle's
(target <= 1.15), and the law's per-update cost with the predictive check on (median, target
< 2 ms). With ``--check`` it exits 1 when any target is missed by any batch.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from sensor.shell.sitesensor import pipeline_setup
from tests.closedloop import compare
from tests.synthetic import demo_site_and_zone

LINEAR_MAX = 0.70
ORACLE_MAX = 1.15
LAW_MEDIAN_MAX_S = 2e-3


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true", help="exit 1 when a target is missed")
    parser.add_argument("--seeds", type=int, default=20, help="batches (seeds 1..N)")
    args = parser.parse_args()
    site, zone = demo_site_and_zone()
    setup = pipeline_setup(site, 0, zone)
    print("seed  advisor_h  oracle_h  linear_h  vs_linear  vs_oracle  peak_margin")
    rows = []
    costs: list[float] = []
    for seed in range(1, args.seeds + 1):
        c = compare(site, zone, setup, seed, clock=time.perf_counter)
        costs.extend(c.law_cost_s)
        rows.append(c)
        print(
            f"{seed:4d}  {c.advisor.seeding_to_final_s / 3600:9.2f}  "
            f"{c.oracle.seeding_to_final_s / 3600:8.2f}  {c.linear.seeding_to_final_s / 3600:8.2f}"
            f"  {c.linear_ratio:8.3f}x  {c.oracle_ratio:8.3f}x  "
            f"{1.0 - c.advisor.peak_fraction_of_limit:11.3f}",
            flush=True,
        )
    linear = np.array([c.linear_ratio for c in rows])
    oracle = np.array([c.oracle_ratio for c in rows])
    margin = np.array([1.0 - c.advisor.peak_fraction_of_limit for c in rows])
    median_cost = float(np.median(costs))
    print(
        f"vs linear ramp: median {np.median(linear):.3f}x, worst {linear.max():.3f}x "
        f"(target <= {LINEAR_MAX})"
    )
    print(
        f"vs oracle:      median {np.median(oracle):.3f}x, worst {oracle.max():.3f}x "
        f"(target <= {ORACLE_MAX})"
    )
    print(f"peak-sigma margin: smallest {margin.min():.3f} (target > 0)")
    print(
        f"law per update (predictive check on): median {1e3 * median_cost:.2f} ms, p90 "
        f"{1e3 * np.percentile(costs, 90):.2f} ms over {len(costs)} updates (target < 2 ms)"
    )
    missed = (
        linear.max() > LINEAR_MAX
        or oracle.max() > ORACLE_MAX
        or margin.min() <= 0.0
        or median_cost >= LAW_MEDIAN_MAX_S
    )
    if missed:
        print("target missed")
    return 1 if args.check and missed else 0


if __name__ == "__main__":
    sys.exit(main())
