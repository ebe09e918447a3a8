"""Benchmark: the plant client's cost for many units, against asyncua alone, side by side.

Run as a script (pytest does not collect it)::

    python tests/benchmarks/plant_link.py [--check] [--units N] [--seconds S]

A child process serves ``--units`` crystallizers (the demo unit's nine tags each, under new
names) on a loopback OPC UA server; every second it writes new values with fresh source
timestamps to each unit's three measured tags, the units spread evenly over the second (as
plant scans are). In this process, for ``--seconds`` each:

- **baseline**: a bare asyncua client, one subscription in iterator mode over the same tags,
  reading the notifications and doing nothing with them;
- **PlantClient**: the same tags through the plant client (timestamp checks, the store's
  buffer), plus a sample of every unit every 100 ms (the conversion to K and kg/kg).

It prints the CPU share of a core of this process in each case, their ratio (``NNx``), the
notifications received per second, and the age of a value when it reaches a sample (source
timestamp to tick: median, p99; it includes up to one 100 ms tick). Targets: the client at most
5x the CPU of asyncua alone, and a median age under 250 ms (100 ms publishing interval plus a
100 ms tick, with room for this shared machine).
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import dataclasses
import multiprocessing
import statistics
import sys
import time
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path

from asyncua import Client, Server, ua
from asyncua.common.subscription import DataChangeEvent

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from sensor.shell.config import SiteConfig, TagRef, load_site_file
from sensor.shell.opcua.plant_client import ConnectionState, PlantClient
from tests.conftest import DEMO_SITE
from tests.shell.opcua.conftest import free_port, with_opcua

CPU_RATIO_TARGET = 5.0
AGE_TARGET_S = 0.25
MEASURED = ("temp", "jacket_temp", "conc")
TYPES = {
    "phase": ua.VariantType.Int32,
    "batch_id": ua.VariantType.String,
    "permissive": ua.VariantType.Boolean,
    "heartbeat": ua.VariantType.Int32,
}


def many_units(site: SiteConfig, count: int) -> SiteConfig:
    """The demo site with ``count`` copies of its unit, each with its own tag names."""
    unit = site.unit[0]
    units = tuple(
        dataclasses.replace(
            unit,
            id=f"CR-{k:03d}",
            tags={signal: TagRef(f"U{k:03d}.{tag.name}") for signal, tag in unit.tags.items()},
        )
        for k in range(count)
    )
    return dataclasses.replace(site, unit=units)


async def _serve(endpoint: str, count: int, ready, stop) -> None:
    site = many_units(load_site_file(DEMO_SITE), count)
    server = Server()
    await server.init()
    server.set_endpoint(endpoint)
    server.set_security_policy([ua.SecurityPolicyType.NoSecurity])
    await server.register_namespace("urn:sigmatrack:bench")
    measured = []
    for unit in site.unit:
        folder = await server.nodes.objects.add_object(ua.NodeId(unit.id, 2), unit.id)
        for signal, tag in unit.tags.items():
            vtype = TYPES.get(signal, ua.VariantType.Double)
            node = await folder.add_variable(
                ua.NodeId(tag.name, 2), tag.name, ua.get_default_value(vtype), vtype
            )
            if signal in MEASURED:
                measured.append((node.nodeid, 40.0 if signal != "conc" else 11.0))
    async with server:
        ready.set()
        per_unit = len(MEASURED)
        tick = 1.0 / count
        k = 0
        start = time.monotonic()
        while not stop.is_set():
            unit = k % count
            now = datetime.now(UTC)
            for node_id, base in measured[unit * per_unit : (unit + 1) * per_unit]:
                value = base + 0.01 * ((k // count) % 100)  # a new value every second
                await server.write_attribute_value(
                    node_id,
                    ua.DataValue(ua.Variant(value, ua.VariantType.Double), SourceTimestamp=now),
                )
            k += 1
            await asyncio.sleep(max(0.0, start + k * tick - time.monotonic()))


def serve(endpoint: str, count: int, ready, stop) -> None:
    asyncio.run(_serve(endpoint, count, ready, stop))


@contextlib.contextmanager
def served_units(endpoint: str, count: int) -> Iterator[None]:
    """``count`` units served at ``endpoint`` by a child process, for the block's duration."""
    context = multiprocessing.get_context("spawn")
    ready, stop = context.Event(), context.Event()
    child = context.Process(target=serve, args=(endpoint, count, ready, stop), daemon=True)
    child.start()
    try:
        if not ready.wait(120.0):
            raise RuntimeError("the bench server did not start")
        yield
    finally:
        stop.set()
        child.join(30.0)


async def baseline(site: SiteConfig, seconds: float) -> tuple[float, int, list[float]]:
    nodes = [
        ua.NodeId.from_string(tag.node_id(site.opcua.node_id_format))
        for unit in site.unit
        for tag in unit.tags.values()
    ]
    async with Client(site.opcua.endpoint) as client:
        subscription = await client.create_subscription(site.opcua.publishing_interval_ms)
        await subscription.subscribe_data_change(
            [client.get_node(n) for n in nodes],
            sampling_interval=site.opcua.sampling_interval_ms,
        )
        await asyncio.sleep(1.0)  # the initial values
        ages, received = [], 0
        cpu, wall = time.process_time(), time.monotonic()
        while time.monotonic() - wall < seconds:
            event = await subscription.next_event(timeout=0.25)
            if isinstance(event, DataChangeEvent):
                received += 1
                source = event.data.monitored_item.Value.SourceTimestamp
                if source is not None:
                    ages.append(time.time() - source.timestamp())
        share = (time.process_time() - cpu) / (time.monotonic() - wall)
        await subscription.delete()
    return share, received, ages


async def plant_client(site: SiteConfig, seconds: float) -> tuple[float, int, list[float]]:
    async with PlantClient(site) as client:
        await client.wait_for(ConnectionState.CONNECTED, 30.0)
        await asyncio.sleep(1.0)
        client.take_updates()
        ages = []
        cpu, wall = time.process_time(), time.monotonic()
        while time.monotonic() - wall < seconds:
            await asyncio.sleep(0.1)
            now = time.time()
            for unit in site.unit:
                temp = client.sample(unit.id, now).sample.temp
                if temp is not None and temp.source_time_s is not None:
                    ages.append(now - temp.source_time_s)
        share = (time.process_time() - cpu) / (time.monotonic() - wall)
        received = len(client.take_updates())
    return share, received, ages


def _quantiles(ages: list[float]) -> tuple[float, float]:
    ordered = sorted(ages)
    return statistics.median(ordered), ordered[int(0.99 * (len(ordered) - 1))]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--check", action="store_true", help="exit 1 when a target is missed")
    parser.add_argument("--units", type=int, default=100)
    parser.add_argument("--seconds", type=float, default=20.0)
    args = parser.parse_args()
    endpoint = f"opc.tcp://127.0.0.1:{free_port()}/bench"
    site = with_opcua(many_units(load_site_file(DEMO_SITE), args.units), endpoint=endpoint)
    with served_units(endpoint, args.units):
        base_share, base_count, base_ages = asyncio.run(baseline(site, args.seconds))
        share, count, ages = asyncio.run(plant_client(site, args.seconds))
    ratio = share / base_share
    median, p99 = _quantiles(ages)
    base_median, base_p99 = _quantiles(base_ages)
    print(f"{args.units} units x {len(MEASURED)} measured tags at 1 s, {args.seconds:g} s each")
    print(
        f"  asyncua alone: {100 * base_share:.1f} % of a core, {base_count / args.seconds:.0f} "
        f"values/s, age at receipt median {1000 * base_median:.0f} ms, p99 {1000 * base_p99:.0f}"
    )
    print(
        f"  PlantClient:   {100 * share:.1f} % of a core, {count / args.seconds:.0f} values/s, "
        f"age at the sample median {1000 * median:.0f} ms, p99 {1000 * p99:.0f} ms"
    )
    print(f"  CPU ratio {ratio:.1f}x (target <= {CPU_RATIO_TARGET:g}x)")
    missed = ratio > CPU_RATIO_TARGET or median > AGE_TARGET_S
    if missed:
        print("  TARGET MISSED")
    return 1 if args.check and missed else 0


if __name__ == "__main__":
    sys.exit(main())
