"""``sigmatrack run`` killed mid-batch (SIGKILL, a subprocess) and started again: it resumes
each unit from its stored checkpoint, the estimate rejoins the plant's truth, and every sample
the plant published while sigmatrack was up is in the store exactly once (SQLite and
PostgreSQL). Then SIGTERM stops it cleanly (exit 0).

The plant is the simulator's OPC UA server in this process, 50x real time, served from the
start of cooling to seed, so that the filter starts before seeding as it would live.
"""

from __future__ import annotations

import asyncio
import bisect
import os
import signal
import subprocess
import sys
from pathlib import Path
from typing import TextIO

import numpy as np

from sensor.shell.store import EstimateRow, Store
from sensor.shell.store.schema import TABLE_SPECS
from simulators.plant import PlantSimulation
from simulators.settings import read_simulator_settings
from tests.conftest import DEMO_SITE
from tests.shell.opcua.conftest import free_port, run, wait_until
from tests.shell.service.harness import Served, published_measured, stored_measured, stored_samples
from tests.simulators.conftest import shortened

SPEED = 50.0
START_S = 60.0
"""Longest wall time for a sigmatrack process to start and step [s]."""


def site_file(folder: Path, plant: str, url: str, schema: str | None) -> Path:
    """The demo site file, written into ``folder`` with the test's endpoints and store."""
    text = DEMO_SITE.read_text(encoding="utf-8")
    config = DEMO_SITE.parent
    changes = {
        'data = "demo-solubility.csv"': f'data = "{config / "demo-solubility.csv"}"',
        'data = "demo-cloud-points.csv"': f'data = "{config / "demo-cloud-points.csv"}"',
        'url = "sqlite:///sigmatrack.db"': f'url = "{url}"',
        '# schema = "sigmatrack"': "" if schema is None else f'schema = "{schema}"',
        'endpoint = "opc.tcp://127.0.0.1:4840/plant"': f'endpoint = "{plant}"',
        'endpoint = "opc.tcp://127.0.0.1:4841/sigmatrack"':
            f'endpoint = "opc.tcp://127.0.0.1:{free_port()}/sigmatrack"',
        "write_to_dcs = false": "write_to_dcs = true",
        "sampling_interval_ms = 500.0": "sampling_interval_ms = 50.0",
        "publishing_interval_ms = 100.0": "publishing_interval_ms = 50.0",
        "flush_interval_s = 1.0": "flush_interval_s = 0.2",
        # values the plant server holds per tag while a starting process is busy (on this
        # shared machine, seconds): 2,000 plant seconds, 40 s of wall time
        "monitored_queue_size = 10": "monitored_queue_size = 2000",
        "reconnect_initial_s = 1.0": "reconnect_initial_s = 0.2",
        "reconnect_max_s = 30.0": "reconnect_max_s = 0.8",
        "future_tolerance_s = 5.0": "future_tolerance_s = 10.0",
        "checkpoint_interval_s = 60.0": "checkpoint_interval_s = 20.0",
    }  # fmt: skip
    for old, new in changes.items():
        assert text.count(old) == 1, old
        text = text.replace(old, new)
    path = folder / "site.toml"
    path.write_text(text, encoding="utf-8")
    return path


def start(site: Path, log: TextIO) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "sensor.shell.cli", "run", "--config", str(site),
         "--plant-clock-speed", f"{SPEED:g}"],
        stdout=subprocess.DEVNULL,
        stderr=log,
        env={**os.environ, "PYTHONUNBUFFERED": "1"},
    )  # fmt: skip


def estimates(url: str, schema: str | None) -> list[EstimateRow]:
    spec = TABLE_SPECS[EstimateRow]
    try:
        with Store(url, schema=schema) as store, store.engine.connect() as conn:
            query = spec.table.select().order_by(spec.table.c.time_us)
            return [spec.row(tuple(v)) for v in conn.execute(query).all()]
    except Exception:  # not there yet (the process is starting)
        return []


def test_killed_mid_batch_it_resumes_and_rejoins_the_truth(backend, demo_site, tmp_path):
    settings = shortened(read_simulator_settings(demo_site), permissive=True)
    port = free_port()
    endpoint = f"opc.tcp://127.0.0.1:{port}/plant"
    site = site_file(tmp_path, endpoint, backend.url, backend.schema)
    log_path = tmp_path / "sigmatrack.log"
    sim = PlantSimulation.from_site(demo_site, seed=3, settings=settings)
    while sim.phase != "cool-to-seed":
        sim.step()
    published: list = []
    truth: list[tuple[float, float]] = []

    async def watch_truth(stop: asyncio.Event) -> None:
        while not stop.is_set():
            truth.append((sim.timestamp().timestamp(), sim.truth().sigma))
            await asyncio.sleep(0.02)

    def latest_time() -> float:
        rows = estimates(backend.url, backend.schema)
        return rows[-1].time.timestamp() if rows else -np.inf

    async def exercise():
        stop = asyncio.Event()
        with log_path.open("w", encoding="utf-8") as log:
            async with Served(demo_site, sim, endpoint, SPEED, published):
                watcher = asyncio.create_task(watch_truth(stop))
                first = start(site, log)
                try:
                    await wait_until(lambda: sim.phase == "seed-hold", START_S, "seed hold")
                    await wait_until(lambda: latest_time() > sim.timestamp().timestamp() - 60.0,
                                     10.0, "estimates stored")  # fmt: skip
                    await asyncio.sleep(2.0)
                    first.send_signal(signal.SIGKILL)
                    first.wait(10)
                    killed_s = sim.timestamp().timestamp()
                    await asyncio.sleep(1.0)
                    second = start(site, log)
                    await wait_until(lambda: latest_time() > killed_s + 2 * SPEED, START_S,
                                     "the restarted process stepping")  # fmt: skip
                    restarted_s = latest_time()
                    await asyncio.sleep(6.0)
                    second.send_signal(signal.SIGTERM)
                    code = await asyncio.to_thread(second.wait, 30)
                finally:
                    for process in (first, locals().get("second")):
                        if process is not None and process.poll() is None:
                            process.kill()
                    stop.set()
                    await watcher
        return killed_s, restarted_s, code

    killed_s, restarted_s, code = run(exercise(), timeout_s=200.0)
    text = log_path.read_text(encoding="utf-8")
    assert code == 0, text[-2000:]
    assert "resumed from the checkpoint" in text
    # the estimate after the restart against the plant's truth: within its own band plus
    # the plant's kinetics mismatch tolerance of the soft sensor's tests (0.01 in sigma)
    rows = [r for r in estimates(backend.url, backend.schema) if r.time.timestamp() > restarted_s]
    assert len(rows) > 100
    times = [t for t, _s in truth]
    late = rows[len(rows) // 2 :]
    errors = []
    for row in late:
        k = min(bisect.bisect_left(times, row.time.timestamp()), len(times) - 1)
        errors.append(abs(row.sigma - truth[k][1]) / (2.0 * row.sigma_std + 0.01))
    assert np.median(errors) < 1.0, f"median error {np.median(errors):.2f} of the band"
    # every published sample stored once, except those of the kill's own stretch: from the
    # last flush before the kill (0.2 s of wall time, with a publishing interval) to the
    # restarted process's first subscription
    stored = stored_measured(stored_samples(backend.url, backend.schema))
    sent = published_measured(published)
    assert set(stored) <= set(sent)
    # the monitored items of the first subscription are made within half a second (wall)
    first_s = min(k[2].timestamp() for k in stored) + 0.5 * SPEED
    gap = (killed_s - 1.0 * SPEED, restarted_s)
    missing = [
        k for k in sent
        if first_s <= k[2].timestamp() <= restarted_s + 3 * SPEED and k not in stored
        and not gap[0] <= k[2].timestamp() <= gap[1]
    ]  # fmt: skip
    assert missing == [], (
        f"{len(missing)} missing, from {min(k[2].timestamp() for k in missing) - killed_s:.0f} "
        f"to {max(k[2].timestamp() for k in missing) - killed_s:.0f} s after the kill; "
        f"restarted {restarted_s - killed_s:.0f} s after it; first stored {first_s - killed_s:.0f}"
    )
