"""``sigmatrack demo``: the whole system on one machine, on loopback, in a few minutes.

1. The simulated plant of the demo scenario (CR-301, MB-417 in ethanol-water; invented data)
   is served over OPC UA by a child process, ``sigmatrack simulate --serve``, one seeded batch
   on a clock ``--speed`` times faster than real time; its simulated operator grants the
   permissive.
2. The live service (:class:`~sensor.shell.service.service.Service`, exactly as ``sigmatrack
   run``) follows the plant's clock, estimates, proposes, writes its guarded setpoint and
   heartbeat to the simulated DCS (which follows them during controlled cooling), publishes on
   its own OPC UA server, and stores everything in a SQLite file.
3. A console view shows the batch as it runs; at the end the batch's report is written from
   the store and a summary printed.

Only the demo's own settings differ from ``config/demo-site.toml`` (loopback ports, the store
file, writes to the simulated DCS on, publishing, timestamp and staleness tolerances scaled to
the fast clock); the ports and the store are printed at the start. Ctrl-C stops it cleanly
(exit status 130).
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import dataclasses
import logging
import socket
import subprocess
import sys
from pathlib import Path
from typing import TextIO

import sensor
from sensor.errors import SigmatrackError
from sensor.shell.config import SiteConfig, load_site_file
from sensor.shell.opcua import plant_client
from sensor.shell.run_command import configure_logging, serve, with_live_port
from sensor.shell.service.console import ConsoleView
from sensor.shell.service.service import ServiceStatus, UnitStep
from sensor.shell.store import Store, read_batch

EXIT_INTERRUPTED = 130
DEMO_SITE = Path(sensor.__file__).resolve().parent.parent / "config" / "demo-site.toml"
"""The demo's site file, in the source tree (``pip install -e .`` keeps it there)."""
DB_NAME = "sigmatrack-demo.db"
LAST_PHASE = "discharge"
PLANT_START_S = 60.0
"""Longest wait for the plant process to say it is serving [s]."""
HICCUP_WALL_S = 3.0
"""Longest pause of a busy machine, in wall time, that the demo's staleness limit bridges [s].
At 200x the site's 120 s of plant time is 0.6 s of wall time: a machine busy with other work
pauses the processes that long, the readings turn stale, the filter restarts, and the restart
takes the crystals' uptake for analyzer bias. More than the plant clock's re-anchoring time
(:data:`~sensor.shell.service.clock.RESYNC_AFTER_S`, 2 s), which it may carry ahead."""
ADVISORY = (
    "Simulated plant, invented data. sigmatrack advises only: on a real plant the DCS keeps the "
    "temperature loop and the recipe, and the safety instrumented system keeps protection."
)


class DemoError(SigmatrackError, RuntimeError):
    """The demo cannot run (its site file, its folder, the plant process)."""


def register(commands: argparse._SubParsersAction) -> None:
    """Add ``demo``."""
    parser = commands.add_parser(
        "demo",
        help="run the demo: a simulated plant and the live service on loopback, one batch",
        description=(
            "Serve one seeded batch of the simulated demo plant over OPC UA on 127.0.0.1, run "
            "the live service against it on an accelerated clock with a console view, store "
            "everything in a SQLite file, write the batch report and print a summary. " + ADVISORY
        ),
    )
    parser.add_argument(
        "--out", default=".", metavar="DIR", help="folder for the store and the report (default .)"
    )
    parser.add_argument(
        "--speed",
        type=float,
        default=200.0,
        metavar="X",
        help="simulated seconds per wall second, 20 to 1000 (default 200: a 10 h batch in about "
        "3 min)",
    )
    parser.add_argument("--seed", type=int, default=7, metavar="N", help="the batch's seed")
    parser.add_argument(
        "--config", metavar="FILE", help=f"the site file (default: the demo's, {DEMO_SITE})"
    )
    parser.add_argument(
        "--live-port",
        type=int,
        default=0,
        metavar="PORT",
        help="port of the live trend page on 127.0.0.1 (default 0: any free port; -1: none)",
    )
    parser.set_defaults(run=run_demo)


def free_loopback_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def with_changes(site: SiteConfig, **sections: dict[str, object]) -> SiteConfig:
    """The site with keys of some sections changed (``opcua={"endpoint": ...}``;
    ``opcua_server`` for ``[opcua.server]``), still naming its file for the audit trail."""
    changes: dict[str, object] = {}
    server = sections.pop("opcua_server", None)
    for name, keys in sections.items():
        changes[name] = dataclasses.replace(getattr(site, name), **keys)
    if server is not None:
        opcua = changes.get("opcua", site.opcua)
        changes["opcua"] = dataclasses.replace(
            opcua,  # type: ignore[arg-type]
            server=dataclasses.replace(site.opcua.server, **server),
        )
    changed = dataclasses.replace(site, **changes)  # type: ignore[arg-type]
    object.__setattr__(changed, "path", site.path)
    object.__setattr__(changed, "sha256", site.sha256)
    return changed


def demo_site(site: SiteConfig, out: Path, speed: float) -> SiteConfig:
    """The demo's settings on top of the site file (module docstring)."""
    publish_ms = max(10.0, 4000.0 / speed)  # about 4 s of plant time per publish
    return with_changes(
        site,
        validation={"stale_after_s": max(site.validation.stale_after_s, HICCUP_WALL_S * speed)},
        store={"url": f"sqlite:///{(out / DB_NAME).resolve()}", "queue_dir": None, "schema": None},
        opcua={
            "endpoint": f"opc.tcp://127.0.0.1:{free_loopback_port()}/plant",
            "security_policy": "none",
            "security_mode": "none",
            "username": None,
            "password_env": None,
            "password_file": None,
            "publishing_interval_ms": publish_ms,
            "sampling_interval_ms": publish_ms,
            "monitored_queue_size": 50,
            "reconnect_initial_s": 0.2,
            "reconnect_max_s": 2.0,
            "future_tolerance_s": max(site.opcua.future_tolerance_s, 0.1 * speed),
            "write_to_dcs": True,
        },
        opcua_server={
            "endpoint": f"opc.tcp://127.0.0.1:{free_loopback_port()}/sigmatrack",
            "security_modes": ("none",),
            "users_file": None,
            "trust_dir": None,
        },
    )


@dataclasses.dataclass
class BatchWatch:
    """Stops the demo when the batch is over: the plant reached its last phase and then
    stopped serving (or the plant process ended).

    From the last phase on, the plant client's log (``link_log``) is held to errors: the plant
    process stops serving at the end of its batch, and the lost link that follows is the end
    of the demo, not a fault to warn a new user about (``_run`` gives the level back)."""

    stop: asyncio.Event
    last_phase_seen: bool = False
    batch_id: str | None = None
    link_log: logging.Logger = dataclasses.field(
        default_factory=lambda: logging.getLogger(plant_client.__name__)
    )

    def __call__(self, step: UnitStep) -> None:
        if step.batch_id is not None:
            self.batch_id = step.batch_id
        if step.snapshot.sample.phase == LAST_PHASE and not self.last_phase_seen:
            self.last_phase_seen = True
            self.link_log.setLevel(logging.ERROR)
        if self.last_phase_seen and step.snapshot.communication_lost:
            self.stop.set()


async def _until_serving(plant: asyncio.subprocess.Process, log: TextIO) -> bool:
    """Copy the plant's output into its log until it says it is serving (True) or ends."""
    assert plant.stdout is not None
    async for line in plant.stdout:
        log.write(line.decode(errors="replace"))
        log.flush()
        if line.startswith(b"serving"):
            return True
    return False


async def _copy(plant: asyncio.subprocess.Process, log: TextIO) -> None:
    """Copy the rest of the plant's output into its log."""
    assert plant.stdout is not None
    async for line in plant.stdout:
        log.write(line.decode(errors="replace"))
        log.flush()


async def _run(
    site: SiteConfig, args: argparse.Namespace, out: Path
) -> tuple[ServiceStatus, BatchWatch, bool]:
    stop = asyncio.Event()
    watch = BatchWatch(stop)
    view = ConsoleView(lambda line: print(line, flush=True), every_s=1800.0)
    log = (out / "sigmatrack-demo-plant.log").open("w", encoding="utf-8")
    started: list[asyncio.subprocess.Process] = []
    tasks: list[asyncio.Task[None]] = []

    async def start_plant() -> None:
        """Start the plant process once the service is ready (its kernels compiled), so that
        the plant's accelerated clock does not run ahead of it."""
        plant = await asyncio.create_subprocess_exec(
            sys.executable,
            "-m",
            "sensor.shell.cli",
            "simulate",
            "--config",
            str(site.path),
            "--serve",
            "--endpoint",
            site.opcua.endpoint,
            "--speed",
            f"{args.speed:g}",
            "--batches",
            "1",
            "--seed",
            str(args.seed),
            "--permissive",
            stdout=subprocess.PIPE,
            stderr=subprocess.STDOUT,
        )
        started.append(plant)
        try:
            serving = await asyncio.wait_for(_until_serving(plant, log), PLANT_START_S)
        except TimeoutError:
            serving = False
        if not serving:
            raise DemoError(f"the simulated plant did not start; see {log.name}")
        tasks.append(asyncio.create_task(_copy(plant, log)))

        async def plant_ended() -> None:
            await plant.wait()
            stop.set()

        tasks.append(asyncio.create_task(plant_ended()))

    try:
        status = await serve(
            site,
            plant_clock_speed=args.speed,
            listeners=(view, watch),
            on_live=(lambda url: print(f"  live trend page: {url}", flush=True),),
            end_batches=True,
            stop=stop,
            ready=start_plant,
        )
    finally:
        watch.link_log.setLevel(logging.NOTSET)
        for plant in started:
            if plant.returncode is None:
                plant.terminate()
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(plant.wait(), 10.0)
        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(asyncio.gather(*tasks, return_exceptions=True), 5.0)
        log.close()
    return status, watch, not watch.last_phase_seen


def run_demo(args: argparse.Namespace) -> int:
    if not 20.0 <= args.speed <= 1000.0:
        raise DemoError(f"--speed must be 20 to 1000; got {args.speed:g}")
    config = Path(args.config) if args.config else DEMO_SITE
    if not config.is_file():
        raise DemoError(
            f"{config}: the demo's site file is not there (run from a source checkout installed "
            "with pip install -e ., or give --config FILE)"
        )
    out = Path(args.out)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as error:
        raise DemoError(f"{out}: cannot make the folder ({error.strerror})") from None
    site = demo_site(load_site_file(config), out, args.speed)
    if args.live_port >= 0:
        site = with_live_port(with_changes(site, live={"host": "127.0.0.1"}), args.live_port)
    configure_logging("warning")
    print(f"sigmatrack demo: {site.site.name}, unit(s) {', '.join(u.id for u in site.unit)}")
    print(f"  plant (simulated, seed {args.seed}, {args.speed:g}x): {site.opcua.endpoint}")
    print(f"  sigmatrack's own OPC UA server: {site.opcua.server.endpoint}")
    print(f"  store: {site.store.url}")
    print(f"  {ADVISORY}", flush=True)
    status, watch, interrupted = asyncio.run(_run(site, args, out))
    return finish(site, out, status, watch.batch_id, interrupted)


def finish(
    site: SiteConfig, out: Path, status: ServiceStatus, batch_id: str | None, interrupted: bool
) -> int:
    """Write the batch's report from the store and print the summary."""
    # Drawing needs matplotlib: imported here, as the report commands do.
    from sensor.shell.report.build import report_html, write_page
    from sensor.shell.report.sources import load_views

    store = status.store
    print(
        f"{'stopped before the batch ended' if interrupted else 'batch done'}: "
        f"{status.steps:,} steps; store {store.written_rows if store else 0:,} rows written, "
        f"{store.dropped_rows if store else 0} dropped; {status.late_ticks} late ticks"
    )
    if batch_id is None:
        print("no batch was seen: no report")
        return EXIT_INTERRUPTED if interrupted else 1
    errors: list[SigmatrackError] = []
    print("writing the report (the first time, the replay kernel compiles: about a minute)")
    loaded = load_views(
        str(site.path), [], [batch_id], on_error=errors.append, store_url=site.store.url
    )
    if errors:
        raise errors[0]
    view = loaded.views[0]
    report = out / f"{batch_id}.html"
    write_page(report, report_html(loaded.site, loaded.zone, view))
    summary = view.summary
    with Store(site.store.url) as database:
        record = read_batch(database, batch_id)
    written = sum(p.written for p in record.proposals)
    raised = sorted({e.alarm for e in record.alarm_events if e.event == "raised"})
    peak = "–" if summary.peak_sigma is None else f"{summary.peak_sigma:.4f}"
    final_yield = "–" if summary.final_yield is None else f"{summary.final_yield * 100:.1f} %"
    print(
        f"batch {batch_id}: {len(record.samples):,} plant values, {len(record.estimates):,} "
        f"estimates, {written:,} setpoints written to the DCS, alarms raised: "
        f"{', '.join(raised) or 'none'}"
    )
    print(
        f"  peak sigma {peak}, {summary.time_above_limit_s:.0f} s above the metastable limit, "
        f"yield {final_yield}"
    )
    print(f"report: {report}")
    print(f"store:  {out / DB_NAME}")
    print(ADVISORY)
    return EXIT_INTERRUPTED if interrupted else 0
