"""What the service's end-to-end tests share: a plant server that records what it published,
the site file pointed at loopback servers and the test's store, and checks on the store.

Nothing of asyncua or the database is mocked: the plant is ``simulators.shell.server
.PlantServer`` on a free loopback port, sigmatrack's own server listens on another, and the
store is the test's SQLite file or PostgreSQL schema (``tests/shell/store/conftest.py``).
"""

from __future__ import annotations

import asyncio
from collections import Counter
from datetime import datetime

from sqlalchemy import select

from sensor.shell.config import SiteConfig
from sensor.shell.demo_command import with_changes
from sensor.shell.store import SampleRow, Store
from sensor.shell.store.schema import TABLE_SPECS
from simulators.instruments import Reading
from simulators.plant import PlantSimulation
from simulators.shell.server import PlantServer
from tests.shell.opcua.conftest import free_port

MEASURED = ("temp", "jacket_temp", "conc")
FAST = {"reconnect_initial_s": 0.2, "reconnect_max_s": 0.8}
"""Backoff for these tests: 0.2, 0.4, 0.8, 0.8, ... s (wall)."""


class NotingPlant(PlantServer):
    """The simulated plant's OPC UA server, noting every value it publishes in ``published``
    (shared between a server and the one restarted after it)."""

    def __init__(self, *args, published: list, **kwargs) -> None:
        super().__init__(*args, **kwargs)
        self.published = published

    async def _write(self, served, signal: str, reading: Reading | None, source: datetime) -> None:
        # noted first (a server stopped mid-write may have sent it); None: no value yet
        # (BadWaitingForInitialData, as a restarted server says before its first scan)
        value = None if reading is None else reading.value
        self.published.append((served.unit.id, signal, source, value))
        await super()._write(served, signal, reading, source)


class Served:
    """A noting plant (every published value kept) served on loopback, its update loop running."""

    def __init__(self, site: SiteConfig, sim: PlantSimulation, endpoint: str, speed: float,
                 published: list) -> None:  # fmt: skip
        self.server = NotingPlant(
            site, [sim], endpoint=endpoint, speed=speed, tick_s=0.01, published=published
        )
        self.stop = asyncio.Event()
        self.task: asyncio.Task | None = None

    async def __aenter__(self) -> Served:
        await self.server.start()
        self.task = asyncio.create_task(self.server.run(self.stop))
        return self

    async def __aexit__(self, *exc: object) -> None:
        self.stop.set()
        await self.task
        await self.server.stop()


def service_site(
    site: SiteConfig, plant_endpoint: str, store_url: str, schema: str | None, folder
) -> SiteConfig:
    """The demo site pointed at the test's plant endpoint and store, writing to the DCS, with
    its own server and the live page on free loopback ports. The plant server's queue per
    tag is scaled to the accelerated clock: the site's 10 values hold 10 s of a 1 s scan at
    real time, 0.2 s at 50x, less than this shared machine's stalls (the writer's thread
    drains the durable queue beside the event loop); 2,000 values hold 40 s of wall time."""
    return with_changes(
        site,
        store={"url": store_url, "schema": schema, "queue_dir": folder / "queue",
               "flush_interval_s": 0.2, "retry_max_s": 0.5},
        opcua={"endpoint": plant_endpoint, "write_to_dcs": True, "publishing_interval_ms": 50.0,
               "sampling_interval_ms": 50.0, "monitored_queue_size": 2000,
               "future_tolerance_s": 10.0, **FAST},
        opcua_server={"endpoint": f"opc.tcp://127.0.0.1:{free_port()}/sigmatrack"},
        service={"checkpoint_interval_s": 30.0},
        live={"enabled": True, "port": 0},
    )  # fmt: skip


def stored_samples(url: str, schema: str | None) -> list[SampleRow]:
    """Every sample in the store."""
    spec = TABLE_SPECS[SampleRow]
    with Store(url, schema=schema) as store, store.engine.connect() as conn:
        found = conn.execute(select(*(spec.table.c[c] for c in spec.columns))).all()
    return [spec.row(tuple(values)) for values in found]


def published_measured(published: list) -> Counter:
    """The measured values the plant published, by (unit, signal, source time)."""
    return Counter((u, s, t) for u, s, t, _v in published if s in MEASURED)


def stored_measured(samples: list[SampleRow]) -> Counter:
    return Counter((r.unit_id, r.signal, r.time) for r in samples if r.signal in MEASURED)
