"""Benchmark: the live service on many units over loopback OPC UA, against the plant link
alone, side by side.

Run as a script (pytest does not collect it)::

    python tests/benchmarks/service.py [--check] [--units N] [--seconds S]

A child process serves ``--units`` crystallizers (``tests/benchmarks/plant_link.py``'s server:
the demo unit's tags under new names, the three measured ones new every second, the units
spread over the second). In this process, for ``--seconds`` each:

- **baseline**: the plant client alone, sampling every unit every 100 ms
  (``plant_link.plant_client``);
- **service**: :class:`~sensor.shell.service.service.Service` on the same units, wall clock,
  1 s ticks, 100 ms publishing: every unit's pipeline (soft sensor, law, guard, alarms),
  sigmatrack's own OPC UA server publishing every step, the store (SQLite in a temporary
  folder) getting every value, estimate, decision and event.

It prints the CPU share of a core of this process in each case and their ratio (``NNx``); the
latency from a temperature's source timestamp to the end of the publish of the step that used
it on sigmatrack's own server (median, p99); and, for the store (SQLite), rows/s of 200,000
sample rows batched (parcels of 1,000 rows, one transaction each, as ``StoreWriter`` writes)
and through a ``StoreWriter`` (``put`` then ``flush``) against one commit per row on 2,000.
The bench plant reports no batch phase, so the advisor stands by: the law's own cost (every
``controller.update_interval_s``) is measured by ``tests/benchmarks/closed_loop.py``.

Targets: the service under 25 % of a core, median latency under 100 ms, the store at least
100,000 rows/s batched.
"""

from __future__ import annotations

import argparse
import asyncio
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from sensor.shell.config import load_site_file
from sensor.shell.demo_command import with_changes
from sensor.shell.service.service import Service, UnitStep
from sensor.shell.store import Store
from tests.benchmarks.plant_link import _quantiles as quantiles
from tests.benchmarks.plant_link import many_units, plant_client, served_units
from tests.benchmarks.store import (
    rows_per_s,
    samples,
    through_writer,
    write_batched,
    write_one_commit_per_row,
)
from tests.conftest import DEMO_SITE
from tests.shell.opcua.conftest import free_port

CPU_TARGET = 0.25
LATENCY_TARGET_S = 0.100
STORE_TARGET = 100_000.0
WARM_STEPS = 15
"""Steps of every unit before the measurement starts: the values queued during the start are
worked off at most 0.1 tick per step (``service.MIN_GAP_TICKS``)."""
WARM_LIMIT_S = 120.0


async def service_run(site, seconds: float) -> tuple[float, list[float], int, float]:
    """Run the service; measure once every unit has taken ``WARM_STEPS`` steps (the start:
    connect, subscribe, build its own server, then work off the values that queued meanwhile).
    Returns the CPU share, the latencies [s], the steps and how long the start took [s]."""
    latencies: list[float] = []
    steps = Counter()

    def listen(step: UnitStep) -> None:
        steps[step.unit_id] += 1
        temp = step.snapshot.sample.temp
        if temp is not None and temp.source_time_s is not None:
            latencies.append(time.time() - temp.source_time_s)

    stop = asyncio.Event()
    service = Service(site, listeners=[listen])
    await asyncio.to_thread(service.prepare)  # as ``serve`` does, before anything connects
    started = time.monotonic()
    running = asyncio.create_task(service.run(stop))
    units = len(site.unit)
    for _ in range(int(WARM_LIMIT_S / 0.1)):
        if len(steps) == units and min(steps.values()) >= WARM_STEPS:
            break
        await asyncio.sleep(0.1)
    start_s = time.monotonic() - started
    latencies.clear()
    cpu, wall = time.process_time(), time.monotonic()
    await asyncio.sleep(seconds)
    share = (time.process_time() - cpu) / (time.monotonic() - wall)
    stop.set()
    status = await running
    return share, latencies, status.steps, start_s


def store_rates(folder: Path) -> tuple[float, float, float]:
    """Rows/s: batched (parcels of 1,000, one transaction each), through the writer (put,
    then flush), one commit per row."""
    store = Store(f"sqlite:///{folder / 'bench.db'}")
    store.ensure_schema()
    single = rows_per_s(write_one_commit_per_row, store, samples(2_000, first=10**7))
    batched = rows_per_s(write_batched, store, samples(200_000, first=2 * 10**7))
    through, _put_us = through_writer(store, folder / "queue", samples(200_000))
    store.dispose()
    return batched, through, single


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--check", action="store_true", help="exit 1 when a target is missed")
    parser.add_argument("--units", type=int, default=100)
    parser.add_argument("--seconds", type=float, default=30.0)
    args = parser.parse_args()
    endpoint = f"opc.tcp://127.0.0.1:{free_port()}/bench"
    folder = Path(tempfile.mkdtemp(prefix="sigmatrack-bench-"))
    demo = load_site_file(DEMO_SITE)
    base = many_units(demo, args.units)
    object.__setattr__(base, "path", demo.path)  # for the audit trail
    object.__setattr__(base, "sha256", demo.sha256)
    site = with_changes(
        base,
        opcua={"endpoint": endpoint, "sampling_interval_ms": 100.0},
        opcua_server={"endpoint": f"opc.tcp://127.0.0.1:{free_port()}/sigmatrack"},
        store={"url": f"sqlite:///{folder / 'service.db'}", "queue_dir": folder / "q"},
    )
    with served_units(endpoint, args.units):
        base_share, _count, _ages = asyncio.run(plant_client(site, args.seconds))
        share, latencies, steps, start_s = asyncio.run(service_run(site, args.seconds))
    batched, through, single = store_rates(folder)
    median, p99 = quantiles(latencies)
    print(f"{args.units} units at 1 s, 100 ms publishing, {args.seconds:g} s each")
    print(f"  plant client alone: {100 * base_share:.1f} % of a core")
    print(
        f"  service:            {100 * share:.1f} % of a core ({share / base_share:.1f}x the "
        f"plant client), {steps:,} unit steps (target < {100 * CPU_TARGET:.0f} %)"
    )
    print(f"  start (every unit {WARM_STEPS} steps, not measured): {start_s:.1f} s")
    print(
        f"  source timestamp -> published: median {1000 * median:.0f} ms, p99 "
        f"{1000 * p99:.0f} ms (target median < {1000 * LATENCY_TARGET_S:.0f} ms)"
    )
    print(
        f"  store (SQLite): {batched:,.0f} rows/s batched, {single:,.0f} rows/s one commit per "
        f"row ({batched / single:.0f}x; target >= {STORE_TARGET:,.0f}); {through:,.0f} rows/s "
        f"through the writer"
    )
    missed = share > CPU_TARGET or median > LATENCY_TARGET_S or batched < STORE_TARGET
    if missed:
        print("  TARGET MISSED")
    return 1 if args.check and missed else 0


if __name__ == "__main__":
    sys.exit(main())
