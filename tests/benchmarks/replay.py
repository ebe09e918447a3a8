"""Benchmark: the vectorised replay against the per-sample filterpy path, side by side.

Run as a script (pytest does not collect it)::

    python tests/benchmarks/replay.py [--check] [--batches 1000] [--hours 2] [--loop-batches 2]

It builds ``--batches`` synthetic batches of the demo unit sampled every second (templates from
the estimation model, each copy with its own measurement noise), then measures in the same run:

- the replay kernel (validation + UKF with delay re-filtering) on all of them, in chunks;
- the outputs (:func:`sensor.outputs.estimates`) of all of them;
- the per-sample filterpy path (``SoftSensor`` on the unmodified
  ``filterpy.kalman.UnscentedKalmanFilter``, every sigma point through ``fx`` one by one:
  ``run_per_sample(..., reference_filter=True)``) on ``--loop-batches`` of them, and the largest
  difference of any state between the two paths on those (target: at most 1e-9). The live
  service runs the same filter with its per-sigma-point work compiled
  (``CrystallizerUKF``); its rate on the same batches is printed beside it, for scale.

It prints samples per second of each, the ratio ``NNx`` of the kernel's and of the whole engine's
(kernel + outputs) against the per-sample path (target: at least 100x for the engine), and where
the kernel's time goes (per predict, per update, events per sample). With ``--check`` it exits 1
when a target is missed. Compile time is excluded (one warm-up batch first). With one thread both
sides are timed in this process's CPU time (``time.process_time``), so that other work on a
shared machine, which slows the two phases of the run unevenly, does not set the ratio; with
``--threads`` above 1 the kernel is timed by the wall clock (CPU time would hide the threads).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numba
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from sensor.batchfilter import (
    BatchArrays,
    _predict,
    _update,
    _workspace,
    kernel_setup,
    run_batches,
    run_per_sample,
)
from sensor.kalman import initial_state
from sensor.shell.replay import outputs_of
from tests.synthetic import JACKET_NOISE_STD_K, cooling_batch, demo_setup

SPEED_TARGET = 100.0
AGREEMENT_TARGET = 1e-9


class _Batch:
    """Enough of a HistorianBatch for :func:`outputs_of`."""

    def __init__(self, arrays: BatchArrays) -> None:
        self.arrays = arrays


def make_batches(setup, count: int, hours: float, rng: np.random.Generator) -> list[BatchArrays]:
    templates = []
    for i in range(min(count, 10)):
        batch = cooling_batch(
            setup,
            rng,
            hours=hours,
            start_temp_c=52.0 + i * 0.3,
            saturation_temp_c=50.0,
            seed_at_s=600.0,
            bias=float(rng.normal(0.0, 0.002)),
        )
        templates.append(BatchArrays.from_samples(batch.samples, setup))
    stds = np.array(
        [setup.measurements.temp_noise_std_k, JACKET_NOISE_STD_K, setup.measurements.conc_noise_std]
    )
    batches = []
    for i in range(count):
        base = templates[i % len(templates)]
        noise = stds[:, None] * rng.standard_normal(base.values.shape)
        batches.append(base._replace(values=np.where(base.present, base.values + noise, np.nan)))
    return batches


@numba.njit
def _time_calls(s, n, reps):
    w = _workspace(n)
    x0, p0 = initial_state(320.0, 0.12, s.init, n)
    x0[2:6] = (0.01, 0.008, 0.007, 0.006)
    t = 0.0
    for _ in range(reps):
        w.x[:] = x0
        w.P[:, :] = p0
        _predict(1.0, 315.0, s, w)
        _update(320.0, s.h_temp, s.r_temp, w)
        t += w.x[0]
    return t


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true", help="exit 1 when a target is missed")
    parser.add_argument("--batches", type=int, default=1000)
    parser.add_argument("--hours", type=float, default=2.0)
    parser.add_argument("--loop-batches", type=int, default=2)
    parser.add_argument("--chunk", type=int, default=100)
    parser.add_argument("--threads", type=int, default=1)
    args = parser.parse_args()

    rng = np.random.default_rng(1)
    setup = demo_setup()
    print(f"building {args.batches} batches of {args.hours:g} h at 1 s ...", flush=True)
    batches = make_batches(setup, args.batches, args.hours, rng)
    samples = sum(len(b.time_s) for b in batches)
    run_batches(setup, batches[:1], args.threads)  # compile / load the cache
    clock = time.process_time if args.threads == 1 else time.perf_counter

    kernel_s = outputs_s = 0.0
    for lo in range(0, len(batches), args.chunk):
        part = batches[lo : lo + args.chunk]
        start = clock()
        outs = run_batches(setup, part, args.threads)
        kernel_s += clock() - start
        start = clock()
        for arrays, out in zip(part, outs, strict=True):
            outputs_of(setup, _Batch(arrays), out)
        outputs_s += clock() - start

    loop = batches[: args.loop_batches]
    loop_samples = sum(len(b.time_s) for b in loop)
    start = time.process_time()
    reference = [run_per_sample(setup, b, reference_filter=True) for b in loop]
    loop_s = time.process_time() - start
    start = time.process_time()
    for b in loop:
        run_per_sample(setup, b)
    live_s = time.process_time() - start
    fused = run_batches(setup, loop, 1)
    worst = 0.0
    for ref, out in zip(reference, fused, strict=True):
        ok = ~np.isnan(ref.x[:, 0])
        worst = max(worst, float(np.max(np.abs(ref.x[ok] - out.x[ok]))))

    kernel_rate = samples / kernel_s
    engine_rate = samples / (kernel_s + outputs_s)
    loop_rate = loop_samples / loop_s
    timed = "CPU time" if args.threads == 1 else "wall clock (kernel)"
    print(f"samples: {samples:,} in {len(batches)} batches; threads: {args.threads}; {timed}")
    print(f"replay kernel: {kernel_s:.1f} s, {kernel_rate:,.0f} samples/s")
    print(f"outputs: {outputs_s:.1f} s, {samples / outputs_s:,.0f} samples/s")
    print(
        f"per-sample filterpy path: {loop_s:.1f} s for {loop_samples:,}, {loop_rate:,.0f} samples/s"
    )
    print(
        f"per-sample path with the live service's compiled UKF: {loop_samples / live_s:,.0f} "
        f"samples/s (the engine {engine_rate * live_s / loop_samples:.0f}x that)"
    )
    print(f"kernel vs per-sample path: {kernel_rate / loop_rate:.0f}x")
    print(f"replay engine (kernel + outputs) vs per-sample path: {engine_rate / loop_rate:.0f}x "
          f"(target {SPEED_TARGET:.0f}x)")  # fmt: skip
    print(
        f"largest state difference between the paths: {worst:.1e} (target {AGREEMENT_TARGET:.0e})"
    )

    s = kernel_setup(setup)
    n = setup.model.layout.size
    _time_calls(s, n, 10)
    reps = 200_000
    start = time.process_time()
    _time_calls(s, n, reps)
    per_event = (time.process_time() - start) / reps
    # each analyzer value (every 10 s) re-runs the ~delay/1 s sample events and the ~delay/10 s
    # analyzer events after its drawing time, plus its own predict
    delay = setup.measurements.analyzer_delay_s
    events = 1.0 + (delay + delay / 10.0 + 1.0) / 10.0
    print(
        f"where the kernel's time goes: one predict + update {per_event * 1e6:.2f} us "
        f"(2n-1 = {2 * n - 1} model propagations, 5 of them with the kinetics' logarithm "
        f"and powers, one Cholesky factor, the unscented transform); about {events:.1f} "
        f"events per sample with the analyzer every 10 s and {delay:g} s delay re-filtered, so "
        f"{events * per_event * 1e6:.1f} us per sample of filtering; the rest "
        f"{max(kernel_s / samples - events * per_event, 0.0) * 1e6:.1f} us is validation, "
        "history and storing the outputs"
    )
    missed = []
    if engine_rate / loop_rate < SPEED_TARGET:
        missed.append(f"engine speed-up {engine_rate / loop_rate:.0f}x < {SPEED_TARGET:.0f}x")
    if worst > AGREEMENT_TARGET:
        missed.append(f"paths differ by {worst:.1e}")
    for line in missed:
        print(f"MISSED: {line}")
    return 1 if (args.check and missed) else 0


if __name__ == "__main__":
    sys.exit(main())
