"""Benchmark: the live page's cost per unit step, against sigmatrack's OPC UA server.

Run as a script (pytest does not collect it)::

    python tests/benchmarks/live_page.py [--check] [--units 100] [--steps 60] [--pages 4]

Both get the same steps (the synthetic scene of ``tests/shell/live/scene.py``: the real soft
sensor, guard and alarm engine over a short batch of the demo unit, published to every unit):
``LivePage.publish`` with ``--pages`` event streams open and read by clients in the same
process (so the CPU of sending every step to every page counts), and, side by side,
``AdvisorServer.publish`` (which the service runs at every step anyway) with no client. It
prints each one's process CPU per unit step and their ratio ``NNx``; and the memory a unit's
trend keeps (fixed by ``trend_points``, whatever the step rate). Target: the page with
``--pages`` pages open costs at most what the OPC UA server does (ratio <= 1). With
``--check`` it exits 1 when the target is missed.
"""

from __future__ import annotations

import argparse
import asyncio
import dataclasses
import sys
import time
from pathlib import Path

import aiohttp

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from sensor.shell.live.server import LivePage, site_diagrams
from sensor.shell.opcua.advisor_server import AdvisorServer
from tests.shell.live.scene import demo_scene
from tests.shell.opcua.conftest import loopback, with_server
from tests.synthetic import demo_site_and_zone

TARGET_RATIO = 1.0


async def _refuse(action: object) -> tuple:
    raise AssertionError("nobody acts in the benchmark")


async def _read(response: aiohttp.ClientResponse, counts: list[int], index: int) -> None:
    tail = b""
    async for chunk in response.content.iter_any():
        text = tail + chunk
        counts[index] += text.count(b"event: unit\n")
        tail = text[-len(b"event: unit\n") + 1 :]


async def live_cost(scene, units: list[str], steps: int, pages: int) -> tuple[float, int]:
    site, zone = demo_site_and_zone()
    (lines,) = site_diagrams(site, zone).values()
    live = dataclasses.replace(site.live, port=0)
    page = LivePage(live, dict.fromkeys(units, lines), scene.definitions, _refuse, title="bench")
    async with page, aiohttp.ClientSession() as http:
        streams = [await http.get(page.url + "events") for _ in range(pages)]
        counts = [0] * pages
        readers = [asyncio.create_task(_read(r, counts, i)) for i, r in enumerate(streams)]
        await asyncio.sleep(0.5)
        start = time.process_time()
        for outputs in scene.outputs[:steps]:
            for unit in units:
                page.publish(unit, outputs)
            await asyncio.sleep(0.01)  # let the streams run, as between steps of the service
        for _ in range(600):  # until every page has had every step (bounded: 60 s)
            if min(counts) >= len(units) * steps:
                break
            await asyncio.sleep(0.1)
        spent = time.process_time() - start
        if min(counts) < len(units) * steps:
            raise RuntimeError(f"the pages got {counts} of {len(units) * steps} steps")
        for task in readers:
            task.cancel()
        for response in streams:
            response.release()
        return spent, page._units[units[0]].trend._ring.nbytes


async def advisor_cost(scene, units: list[str], steps: int) -> float:
    site, _zone = demo_site_and_zone()
    site = with_server(site, endpoint=loopback("sigmatrack"))
    async with AdvisorServer(site, scene.definitions, _refuse, unit_ids=units) as server:
        start = time.process_time()
        for outputs in scene.outputs[:steps]:
            for unit in units:
                await server.publish(unit, outputs)
        return time.process_time() - start


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true", help="exit 1 when the target is missed")
    parser.add_argument("--units", type=int, default=100)
    parser.add_argument("--steps", type=int, default=60)
    parser.add_argument("--pages", type=int, default=4)
    args = parser.parse_args()
    scene = demo_scene()
    steps = min(args.steps, len(scene.outputs))
    units = [f"CR-{i:03d}" for i in range(args.units)]
    publishes = steps * len(units)
    live_s, trend_bytes = asyncio.run(live_cost(scene, units, steps, args.pages))
    advisor_s = asyncio.run(advisor_cost(scene, units, steps))
    ratio = live_s / advisor_s
    print(f"{publishes} unit steps ({len(units)} units x {steps} steps)")
    print(
        f"  live page, {args.pages} pages open: {live_s / publishes * 1e3:.3f} ms CPU per unit step"
    )
    print(f"  OPC UA advisor server:        {advisor_s / publishes * 1e3:.3f} ms CPU per unit step")
    print(f"  ratio: {ratio:.2f}x (target <= {TARGET_RATIO:g}x)")
    print(f"  trend kept per unit: {trend_bytes / 1024:.1f} KiB (fixed by trend_points)")
    return 1 if args.check and ratio > TARGET_RATIO else 0


if __name__ == "__main__":
    sys.exit(main())
