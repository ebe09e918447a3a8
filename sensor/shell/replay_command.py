"""``sigmatrack replay``: historical batches through the soft sensor.

Reads historian CSVs (the format ``sigmatrack simulate`` writes, or a historian export whose
columns the site file's tag names name), runs the soft sensor on every batch, prints a summary per
batch (a table, or ``--json``) and with ``--estimates`` writes every sample's outputs to one CSV.
A file that cannot be read is reported on one line naming the file and the line; the other files
go on, and the exit status is 2 if any file or batch failed.
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Callable
from functools import cache, partial
from pathlib import Path

from sensor.errors import DataFileError
from sensor.shell.config import SiteConfig, load_site_file
from sensor.shell.historian import HistorianBatch, read_historian_csv
from sensor.shell.replay import BatchSummary, Progress, Replay, write_estimates
from sensor.shell.sitesensor import pipeline_setups, site_zone, unit_setup
from sensor.shell.tables import format_table
from sensor.softsensor import UnitSetup

EXIT_FAILED = 2
"""Exit status when a file or a batch failed (the others were still replayed)."""

ADVISORY = (
    "sigmatrack advises only: the DCS keeps control and the safety instrumented system keeps "
    "protection."
)


def register(commands: argparse._SubParsersAction) -> None:
    """Add ``replay``."""
    parser = commands.add_parser(
        "replay",
        help="run the soft sensor over historical batches (historian CSV files)",
        description=(
            "Run the soft sensor over historian CSV files (one batch per file, or several if the "
            "batch id column changes) and summarise each batch: samples, readings rejected, peak "
            "supersaturation, time above the metastable limit, final yield. " + ADVISORY
        ),
    )
    parser.add_argument("files", nargs="+", metavar="BATCH.csv", help="historian CSV files")
    parser.add_argument("--config", required=True, metavar="FILE", help="the site file (TOML)")
    parser.add_argument(
        "--estimates",
        metavar="OUT.csv",
        help="write every sample's outputs to this CSV (one file, with a batch column)",
    )
    parser.add_argument(
        "--report",
        metavar="DIR",
        help="also write each batch's report (an HTML page, as sigmatrack report) into DIR",
    )
    parser.add_argument("--json", action="store_true", help="print the summaries as JSON")
    parser.add_argument(
        "--unit", metavar="ID", help="the unit the files belong to (default: from their columns)"
    )
    parser.add_argument(
        "--no-advisor",
        action="store_true",
        help=(
            "skip the advisor's shadow run (the proposals and alarms that would have happened); "
            "faster over many batches"
        ),
    )
    parser.add_argument(
        "--threads",
        type=int,
        default=1,
        metavar="N",
        help="threads for the replay kernel (default: 1)",
    )
    parser.set_defaults(run=run_replay)


def _read(
    files: list[str], site: SiteConfig, setups: Callable[[int], UnitSetup], unit_id: str | None
) -> tuple[list[HistorianBatch], int]:
    batches: list[HistorianBatch] = []
    failed = 0
    for name in files:
        try:
            batches.extend(read_historian_csv(name, site, setups, unit_id))
        except DataFileError as error:
            print(f"sigmatrack: error: {error}", file=sys.stderr)
            failed += 1
    return batches, failed


def _print_table(summaries: list[BatchSummary]) -> None:
    rows = []
    for s in summaries:
        rows.append(
            [
                s.batch,
                s.samples,
                s.rejected,
                "" if s.peak_sigma is None else f"{s.peak_sigma:.4f}",
                f"{s.time_above_limit_s:.0f}",
                "" if s.final_yield is None else f"{100 * s.final_yield:.1f}",
                s.error or "",
            ]
        )
    headers = ["batch", "samples", "rejected", "peak_sigma", "above_limit_s", "yield_%", ""]
    print(format_table(headers, rows))
    print(ADVISORY)


def run_replay(args: argparse.Namespace) -> int:
    site = load_site_file(args.config)
    zone = site_zone(site)
    setups = cache(partial(unit_setup, site, zone=zone))  # one setup per unit, on demand
    batches, failed = _read(args.files, site, setups, args.unit)
    units = sorted({b.unit for b in batches})
    replay = Replay(
        setups={i: setups(i) for i in units},
        unit_ids={i: site.unit[i].id for i in units},
        threads=max(1, args.threads),
        advisors={} if args.no_advisor else pipeline_setups(site, zone, units, setups),
    )
    stream = None
    sink = None
    if args.estimates:
        stream, sink = write_estimates(Path(args.estimates))
    collector = None
    if args.report:
        # Drawing needs matplotlib: imported only when reports are asked for.
        from sensor.shell.report.build import ViewCollector, combine_sinks, write_reports

        collector = ViewCollector(setups, replay.unit_ids)
        sink = combine_sinks(sink, collector)
    try:
        summaries = replay.run(batches, sink=sink, progress=Progress())
    finally:
        if stream is not None:
            stream.close()
    if collector is not None:
        write_reports(Path(args.report), site, zone, collector.views(batches, summaries))
    for summary in summaries:
        if summary.error is not None:
            print(f"sigmatrack: error: batch {summary.batch}: {summary.error}", file=sys.stderr)
    if args.json:
        print(json.dumps([s.as_json() for s in summaries], indent=2))
    else:
        _print_table(summaries)
    bad = failed + sum(1 for s in summaries if s.error is not None)
    return EXIT_FAILED if bad else 0
