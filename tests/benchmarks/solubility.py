"""Benchmark: the solubility curve on a million points, against plain Python loops.

Run as a script (pytest does not collect it)::

    python tests/benchmarks/solubility.py [--check] [--points N]

It fits the demo scenario's solubility data, then measures, side by side in the same run:

- ``c_sat`` on N temperatures, vectorised, against a Python loop calling the curve per point;
- the inverse (saturation temperature) on N concentrations, vectorised, against a Python loop
  of ``scipy.optimize.brentq`` per point (target: at least 50x, agreeing to 1e-9 K).

The loops are timed on a sample of the points (they would take minutes on all of them) and
compared per point. Each ratio is printed as ``NNx`` on a line naming what it measures; with
``--check`` the script exits 1 when a target is missed.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from scipy.optimize import brentq

from sensor.shell.config import load_site_file
from sensor.shell.sitemodels import fit_site_solubility

DEMO_SITE = Path(__file__).resolve().parents[2] / "config" / "demo-site.toml"
INVERSE_TARGET = 50.0
AGREEMENT_TARGET_K = 1e-9


def best_of(repeats: int, work) -> float:
    """Shortest wall time of ``repeats`` runs [s] (the least disturbed by the machine)."""
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        work()
        times.append(time.perf_counter() - start)
    return min(times)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true", help="exit 1 when a target is missed")
    parser.add_argument("--points", type=int, default=1_000_000, help="vectorised points")
    parser.add_argument("--loop-points", type=int, default=2_000, help="points in the loops")
    args = parser.parse_args()

    curve = fit_site_solubility(load_site_file(DEMO_SITE)).curve
    lo, hi = curve.domain_k
    rng = np.random.default_rng(1)
    temps = rng.uniform(lo + 0.01, hi - 0.01, args.points)
    conc = curve.c_sat(temps)
    sample = slice(0, args.loop_points)
    print(f"curve: {curve.model.name}, domain {lo - 273.15:.1f} to {hi - 273.15:.1f} °C")

    vector_s = best_of(3, lambda: curve.c_sat(temps))
    loop_s = best_of(1, lambda: [curve.c_sat(float(t)) for t in temps[sample]])
    ratio_eval = (loop_s / args.loop_points) / (vector_s / args.points)
    print(
        f"c_sat on {args.points:,} temperatures: {vector_s * 1e3:.1f} ms vectorised, "
        f"{loop_s / args.loop_points * 1e6:.1f} us/point in a loop"
    )
    print(f"c_sat vectorised vs per-point loop: {ratio_eval:.0f}x")

    inverse_s = best_of(3, lambda: curve.temp_sat(conc))
    table_lo, table_hi = curve.c_sat(lo), curve.c_sat(hi)
    bracket = (lo, hi) if table_lo < table_hi else (hi, lo)

    def brentq_loop() -> list[float]:
        return [
            brentq(lambda t, c=c: float(curve.c_sat(t)) - c, *sorted(bracket), xtol=1e-12)
            for c in conc[sample]
        ]

    start = time.perf_counter()
    reference = np.array(brentq_loop())
    brentq_s = time.perf_counter() - start
    ratio_inverse = (brentq_s / args.loop_points) / (inverse_s / args.points)
    agreement = float(np.max(np.abs(curve.temp_sat(conc[sample]) - reference)))
    recovered = float(np.max(np.abs(curve.temp_sat(conc) - temps)))
    print(
        f"inverse on {args.points:,} concentrations: {inverse_s * 1e3:.1f} ms vectorised, "
        f"{brentq_s / args.loop_points * 1e6:.1f} us/point with brentq"
    )
    print(f"inverse vectorised vs brentq loop: {ratio_inverse:.0f}x (target {INVERSE_TARGET:.0f}x)")
    print(
        f"inverse agreement with brentq: {agreement:.1e} K; round trip on all points: "
        f"{recovered:.1e} K (target {AGREEMENT_TARGET_K:.0e} K)"
    )
    missed = []
    if ratio_inverse < INVERSE_TARGET:
        missed.append(f"inverse speed-up {ratio_inverse:.0f}x < {INVERSE_TARGET:.0f}x")
    if max(agreement, recovered) > AGREEMENT_TARGET_K:
        missed.append(f"inverse disagrees by {max(agreement, recovered):.1e} K")
    for line in missed:
        print(f"MISSED: {line}")
    return 1 if (args.check and missed) else 0


if __name__ == "__main__":
    sys.exit(main())
