"""``sigmatrack simulate``: run a simulated batch offline to CSV, or serve the plant over OPC UA.

Offline (``--out``) it writes the historian CSV (and ``--truth``) and prints a summary of the
batch. With ``--serve`` it runs the OPC UA plant server until interrupted (or ``--batches``
batches are done). Bad input gives one line and exit status 2.
"""

from __future__ import annotations

import argparse
import asyncio
import signal
import time
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime
from pathlib import Path
from typing import TextIO

from sensor.errors import DataFileError
from sensor.shell.config import SiteConfig, load_site_file
from simulators.errors import SimulatorError
from simulators.faults import Fault, parse_fault_spec
from simulators.kinetics import Mismatch
from simulators.plant import PlantSimulation, seeded_mismatch
from simulators.settings import SimulatorSettings, parse_start_time, read_simulator_settings
from simulators.shell.historian import HistorianWriter, TruthWriter
from simulators.shell.server import MAX_SPEED, MIN_SPEED, PlantServer

ADVISORY = (
    "Simulated plant, invented data: for tests and demonstrations only. sigmatrack advises; the "
    "DCS and the safety instrumented system keep control and protection."
)


def register(commands: argparse._SubParsersAction) -> None:
    """Add ``simulate``."""
    parser = commands.add_parser(
        "simulate",
        help="run the plant simulator: a batch to CSV, or an OPC UA plant server",
        description=(
            "Simulate a batch of the crystallizer the site file describes. With --out, run one "
            "batch offline and write a historian-style CSV (and, with --truth, what the plant "
            "really did); with --serve, serve the simulated plant's tags over OPC UA on "
            "127.0.0.1. " + ADVISORY
        ),
    )
    parser.add_argument("--config", required=True, metavar="FILE", help="the site file (TOML)")
    mode = parser.add_mutually_exclusive_group(required=True)
    mode.add_argument("--out", metavar="BATCH.csv", help="write the historian CSV here")
    mode.add_argument("--serve", action="store_true", help="run the OPC UA plant server")
    parser.add_argument("--truth", metavar="TRUTH.csv", help="also write the plant's truth here")
    parser.add_argument(
        "--faults",
        metavar="SPEC",
        help=(
            "instrument faults, replacing the site file's: KIND[/SIGNAL]@START+DURATION[:OPTS]; "
            "...  e.g. 'dropout@5h+10min; spikes@3h+1h:every_s=120'; 'none' for none"
        ),
    )
    parser.add_argument("--seed", type=int, default=0, metavar="N", help="fixes every random draw")
    parser.add_argument(
        "--mismatch",
        metavar="F,K",
        help=(
            "move the plant away from the site file: each kinetic constant by up to +/-F "
            "(at most 0.5) and the solubility curve by up to +/-K kelvin (at most 1), drawn "
            "with the seed; default: [simulator.mismatch]"
        ),
    )
    parser.add_argument("--unit", metavar="ID", help="which [[unit]] (default: the first)")
    parser.add_argument("--start", metavar="ISO", help="batch start, ISO 8601 with offset")
    parser.add_argument("--batch-id", metavar="ID", help="default: <unit>-<yyyymmdd-hhmm>")
    parser.add_argument(
        "--speed-test", action="store_true", help="print simulated time over wall time"
    )
    serve = parser.add_argument_group("with --serve")
    serve.add_argument(
        "--speed",
        type=float,
        default=1.0,
        metavar="X",
        help=f"simulated seconds per wall second, {MIN_SPEED:g} to {MAX_SPEED:g} (default 1)",
    )
    serve.add_argument(
        "--endpoint", metavar="URL", help="default: opcua.endpoint of the site file (loopback)"
    )
    serve.add_argument(
        "--batches", type=int, metavar="N", help="stop after N batches per unit (default: never)"
    )
    serve.add_argument(
        "--permissive",
        action="store_true",
        help="the simulated operator grants the advisor's permissive from the start "
        "(default: simulator.recipe.permissive); it stays writable over OPC UA",
    )
    parser.set_defaults(run=run_simulate)


def parse_mismatch(text: str) -> tuple[float, float]:
    """``"F,K"`` to (kinetics fraction, solubility offset [K]).

    Raises
    ------
    SimulatorError
        If it is not two numbers, or they are out of bounds.
    """
    parts = text.split(",")
    try:
        fraction, offset = (float(p) for p in parts)
    except ValueError:
        raise SimulatorError(
            f"--mismatch {text!r}: expected two numbers F,K (e.g. 0.3,0.5)"
        ) from None
    if not 0.0 <= fraction <= 0.5:
        raise SimulatorError(f"--mismatch {text!r}: F must be 0 to 0.5; got {fraction:g}")
    if not 0.0 <= offset <= 1.0:
        raise SimulatorError(f"--mismatch {text!r}: K must be 0 to 1 kelvin; got {offset:g}")
    return fraction, offset


@dataclass(frozen=True)
class _Request:
    site: SiteConfig
    seed: int
    mismatch: Mismatch | None
    faults: tuple[Fault, ...] | None
    start: datetime | None
    batch_id: str | None
    unit_ids: tuple[str | None, ...] = field(default=(None,))
    settings: SimulatorSettings | None = None


def _request(args: argparse.Namespace) -> _Request:
    site = load_site_file(args.config)
    mismatch = None
    if args.mismatch is not None:
        mismatch = seeded_mismatch(args.seed, *parse_mismatch(args.mismatch))
    start = None
    if args.start is not None:
        try:
            start = parse_start_time(args.start)
        except ValueError as error:
            raise SimulatorError(f"--start: {error}") from None
    elif args.serve:
        start = datetime.now(UTC).replace(microsecond=0)
    if args.unit is not None:
        units: tuple[str | None, ...] = (args.unit,)
    elif args.serve:
        units = tuple(u.id for u in site.unit)
    else:
        units = (None,)
    faults = None if args.faults is None else parse_fault_spec(args.faults)
    settings = None
    if args.serve and args.permissive:
        settings = read_simulator_settings(site)
        settings = replace(settings, recipe=replace(settings.recipe, permissive=True))
    return _Request(site, args.seed, mismatch, faults, start, args.batch_id, units, settings)


def _build(
    request: _Request, unit_id: str | None, seed: int, start: datetime | None, batch_id: str | None
) -> PlantSimulation:
    return PlantSimulation.from_site(
        request.site,
        unit_id=unit_id,
        seed=seed,
        mismatch=request.mismatch,
        faults=request.faults,
        batch_id=batch_id,
        start=start,
        settings=request.settings,
    )


def _comments(sim: PlantSimulation) -> list[str]:
    faults = (
        "; ".join(f"{f.kind}/{f.signal}@{f.start_s:g}s+{f.duration_s:g}s" for f in sim.faults)
        or "none"
    )
    return [
        "sigmatrack simulate: a simulated batch (invented data, not plant data)",
        f"seed: {sim.seed}",
        f"site: {sim.site.path}",
        f"site_sha256: {sim.site.sha256}",
        f"unit: {sim.unit.id}",
        f"batch_id: {sim.batch_id}",
        f"mismatch: {sim.mismatch.describe()}",
        f"faults: {faults}",
    ]


def _open(path: str) -> TextIO:
    try:
        return Path(path).open("w", encoding="utf-8", newline="")
    except OSError as error:
        raise DataFileError(path, None, f"cannot be written ({error.strerror})") from None


def run_offline(args: argparse.Namespace, request: _Request) -> int:
    sim = _build(request, request.unit_ids[0], request.seed, request.start, request.batch_id)
    comments = _comments(sim)
    began = time.perf_counter()
    phases: list[tuple[str, float]] = []
    peak_ratio = (0.0, 0.0)
    out = _open(args.out)
    truth_out = _open(args.truth) if args.truth else None
    with out:
        historian = HistorianWriter(out, sim.unit, comments)
        truth_writer = TruthWriter(truth_out, comments) if truth_out else None
        samples = analyzer_values = 0
        while not sim.finished:
            sample = sim.step()
            moment = sim.timestamp()
            historian.write(sample, moment)
            samples += 1
            analyzer_values += "conc" in sample.readings
            truth = sim.truth()
            if truth_writer is not None:
                truth_writer.write(truth, moment)
            if not phases or phases[-1][0] != truth.phase:
                phases.append((truth.phase, truth.time_s))
            if truth.sigma > 0.0 and truth.sigma / truth.sigma_limit > peak_ratio[0]:
                peak_ratio = (truth.sigma / truth.sigma_limit, truth.time_s)
        if truth_out is not None:
            truth_out.close()
    wall = time.perf_counter() - began
    _print_summary(sim, phases, peak_ratio, samples, analyzer_values, args)
    if args.speed_test:
        print(
            f"speed: {sim.time_s:,.0f} s simulated in {wall:.2f} s wall, "
            f"{sim.time_s / wall:,.0f}x real time (CSV writing included)"
        )
    return 0


def _print_summary(
    sim: PlantSimulation,
    phases: list[tuple[str, float]],
    peak: tuple[float, float],
    samples: int,
    analyzer_values: int,
    args: argparse.Namespace,
) -> None:
    truth = sim.truth()
    solvent = sim.unit.solvent_mass_kg
    crystals = truth.solids_kg_per_kg_solvent * solvent
    print(f"Simulated batch {sim.batch_id} of {sim.unit.id} ({sim.site.site.name})")
    print(f"  seed {sim.seed}; mismatch: {sim.mismatch.describe()}")
    print(
        f"  {samples:,} scans of {sim.dt_s:g} s, {analyzer_values:,} analyzer values; "
        f"historian {args.out}" + (f", truth {args.truth}" if args.truth else "")
    )
    print("  phases (start, h):  " + ", ".join(f"{p} {t / 3600:.2f}" for p, t in phases))
    print(f"  batch time {truth.time_s / 3600:.2f} h, final {truth.temp_c:.2f} °C")
    print(
        f"  crystals {crystals:.1f} kg ({truth.solids_kg_per_kg_solvent:.4f} kg/kg solvent, "
        f"seed {truth.seed_added_kg_per_kg_solvent * solvent:.1f} kg), mean size L43 "
        f"{truth.mean_size_um:.0f} um, {truth.count_per_kg_solvent:.3g} crystals per kg solvent"
    )
    print(
        f"  dissolved {truth.conc:.4f} kg/kg vs solubility {truth.conc_sat:.4f} (sigma "
        f"{truth.sigma:+.4f}); peak sigma {peak[0]:.0%} of the metastable limit at "
        f"{peak[1] / 3600:.2f} h"
    )
    print(f"  solute balance closes to {sim.mass_balance_error():.1e} (relative)")
    print(f"  {ADVISORY}")


def serve_tick_s(scan_s: float, speed: float) -> float:
    """Wall time between the server's updates [s]: one scan's worth of simulated time, so that
    every scan is published, but at most 50 ms and at least 5 ms (faster than that the server
    publishes only the latest of several scans).

    >>> serve_tick_s(1.0, 1.0), serve_tick_s(1.0, 100.0), serve_tick_s(1.0, 1000.0)
    (0.05, 0.01, 0.005)
    """
    return min(0.05, max(0.005, scan_s / speed))


async def _serve(args: argparse.Namespace, request: _Request) -> int:
    sims = [
        _build(
            request,
            unit_id,
            request.seed + 1000 * i,
            request.start,
            request.batch_id if len(request.unit_ids) == 1 else None,
        )
        for i, unit_id in enumerate(request.unit_ids)
    ]
    counters = {sim.unit.id: 0 for sim in sims}

    def next_batch(done: PlantSimulation) -> PlantSimulation:
        counters[done.unit.id] += 1
        return _build(request, done.unit.id, done.seed + 1, done.timestamp(), None)

    endpoint = args.endpoint or request.site.opcua.endpoint
    server = PlantServer(
        request.site,
        sims,
        endpoint=endpoint,
        speed=args.speed,
        next_batch=next_batch,
        batches=args.batches,
        tick_s=serve_tick_s(min(sim.dt_s for sim in sims), args.speed),
    )
    stop = asyncio.Event()
    loop = asyncio.get_running_loop()
    for signum in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(signum, stop.set)
    async with server:
        units = ", ".join(s.unit.id for s in sims)
        print(f"serving {units} at {endpoint}, {args.speed:g}x real time; Ctrl-C stops", flush=True)
        print(f"  {ADVISORY}", flush=True)
        await server.run(stop)
    print("stopped", flush=True)
    return 0


def run_simulate(args: argparse.Namespace) -> int:
    request = _request(args)
    if args.serve:
        if args.truth:
            raise SimulatorError("--truth needs --out (the server writes no files)")
        if args.batches is not None and args.batches < 1:
            raise SimulatorError(f"--batches must be at least 1; got {args.batches}")
        return asyncio.run(_serve(args, request))
    return run_offline(args, request)
