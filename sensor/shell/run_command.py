"""``sigmatrack run --config FILE``: the live service beside the DCS (see
:mod:`sensor.shell.service.service`).

Runs until SIGINT (Ctrl-C) or SIGTERM (systemd's stop), then checkpoints every unit, flushes
the store and exits 0. A site file, certificate, store or endpoint that cannot be used gives
one line and exit status 2.
"""

from __future__ import annotations

import argparse
import asyncio
import dataclasses
import logging
import signal
import sys
from collections.abc import Awaitable, Callable

from sensor.errors import SigmatrackError
from sensor.shell.config import SiteConfig, load_site_file
from sensor.shell.service.service import Service, ServiceStatus, StepListener

ADVISORY = (
    "sigmatrack advises only: the DCS keeps the temperature loop and the recipe, and the safety "
    "instrumented system keeps protection."
)
LOG_FORMAT = "%(asctime)s %(levelname)s %(name)s: %(message)s"


class ServiceStartError(SigmatrackError, OSError):
    """The service cannot start: an endpoint it must listen on or reach is unusable."""


def register(commands: argparse._SubParsersAction) -> None:
    """Add ``run``."""
    parser = commands.add_parser(
        "run",
        help="run the live service: read the plant, estimate, advise, publish, store",
        description=(
            "Run sigmatrack beside the DCS: subscribe to every unit's tags on the plant's OPC "
            "UA server (opcua.endpoint), step each unit's soft sensor, advisor, guard and "
            "alarms every service.tick_s, publish the results on sigmatrack's own OPC UA "
            "server (opcua.server.endpoint), write the remote setpoint and heartbeat to the "
            "DCS only with opcua.write_to_dcs = true, under the permissive and inside the "
            "guard, and keep everything in the store. Resumes each unit from its stored "
            "checkpoint. Stops cleanly on Ctrl-C or SIGTERM. " + ADVISORY
        ),
    )
    parser.add_argument("--config", required=True, metavar="FILE", help="the site file (TOML)")
    parser.add_argument(
        "--plant-clock-speed",
        type=float,
        metavar="X",
        help="for a simulated plant whose clock runs X times faster than the wall clock "
        "(sigmatrack simulate --serve --speed X): follow its clock instead of this machine's",
    )
    parser.add_argument(
        "--live-port",
        type=int,
        metavar="PORT",
        help="serve the live trend page on this port for this run (live.enabled, live.port; "
        "0: any free port)",
    )
    parser.add_argument(
        "--log-level",
        choices=("debug", "info", "warning", "error"),
        default="info",
        help="what to log on stderr (default info)",
    )
    parser.set_defaults(run=run_service)


async def serve(
    site: SiteConfig,
    *,
    plant_clock_speed: float | None = None,
    listeners: tuple[StepListener, ...] = (),
    on_live: tuple[Callable[[str], None], ...] = (),
    end_batches: bool = False,
    stop: asyncio.Event | None = None,
    ready: Callable[[], Awaitable[None]] | None = None,
) -> ServiceStatus:
    """Run the service until SIGINT or SIGTERM (or ``stop``) and return its final status.
    ``ready`` is awaited once the service is prepared (:meth:`Service.prepare`), before it
    connects (the demo starts its plant there).

    Raises
    ------
    ServiceStartError
        If an endpoint cannot be used (a port taken, an address not of this machine).
    """
    stop = asyncio.Event() if stop is None else stop
    loop = asyncio.get_running_loop()
    for signum in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(signum, stop.set)
    service = Service(
        site, plant_clock_speed=plant_clock_speed, listeners=listeners, on_live=on_live
    )
    try:
        await asyncio.to_thread(service.prepare)
        if ready is not None:
            await ready()
        return await service.run(stop, end_batches=end_batches)
    except OSError as error:
        if isinstance(error, SigmatrackError):
            raise
        raise ServiceStartError(
            f"{site.path}: opcua.server.endpoint {site.opcua.server.endpoint}: cannot listen "
            f"({error.strerror or error})"
        ) from None
    finally:
        for signum in (signal.SIGINT, signal.SIGTERM):
            loop.remove_signal_handler(signum)


def status_summary(status: ServiceStatus) -> str:
    """The final status in one line."""
    store = status.store
    written = "?" if store is None else f"{store.written_rows:,}"
    queued = 0 if store is None else store.queued_rows
    return (
        f"stopped after {status.steps:,} unit steps ({status.late_ticks} late ticks); "
        f"store: {written} rows written, {queued} queued, {status.dropped_rows} dropped"
    )


def configure_logging(level: str) -> None:
    logging.basicConfig(level=level.upper(), format=LOG_FORMAT, stream=sys.stderr)
    logging.getLogger("asyncua").setLevel(logging.ERROR)
    for handler in logging.getLogger().handlers:
        handler.addFilter(_without_link_tracebacks)


def _without_link_tracebacks(record: logging.LogRecord) -> bool:
    """Drop asyncua's tracebacks of a closed or lost connection (its publish loop logs one
    whenever the server goes away): the plant client reports a lost link itself, in one line,
    with what it does next."""
    error = record.exc_info[1] if record.exc_info else None
    lost = isinstance(error, (ConnectionError, TimeoutError))
    return not (lost and record.name.startswith("asyncua."))


def with_live_port(site: SiteConfig, port: int | None) -> SiteConfig:
    """The site with the live page turned on at ``port`` (None: as the site file says)."""
    if port is None:
        return site
    if not 0 <= port <= 65535:
        raise ServiceStartError(f"--live-port must be 0 to 65535; got {port}")
    live = dataclasses.replace(site.live, enabled=True, port=port)
    changed = dataclasses.replace(site, live=live)
    object.__setattr__(changed, "path", site.path)
    object.__setattr__(changed, "sha256", site.sha256)
    return changed


def run_service(args: argparse.Namespace) -> int:
    site = with_live_port(load_site_file(args.config), args.live_port)
    configure_logging(args.log_level)
    if args.plant_clock_speed is not None and not args.plant_clock_speed > 0:
        raise ServiceStartError(
            f"--plant-clock-speed must be positive; got {args.plant_clock_speed}"
        )
    print(f"sigmatrack run: {len(site.unit)} unit(s) of {site.path}. {ADVISORY}", flush=True)
    status = asyncio.run(serve(site, plant_clock_speed=args.plant_clock_speed))
    print(status_summary(status), flush=True)
    return 0
