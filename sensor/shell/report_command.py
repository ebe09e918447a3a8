"""``sigmatrack report``: one batch's report as a self-contained HTML page.

The batch comes from a historian CSV file or from the store (``--batch ID``); it is replayed
through the soft sensor exactly as ``sigmatrack replay`` does, and the page shows the replay's
summary, the phase diagram, the supersaturation and temperature trends, and the alarms.
"""

from __future__ import annotations

import argparse
import sys
from datetime import UTC, datetime
from pathlib import Path

from sensor.errors import SigmatrackError
from sensor.shell.replay_command import ADVISORY, EXIT_FAILED
from sensor.shell.report.errors import ReportError


def add_source_options(parser: argparse.ArgumentParser, many: bool) -> None:
    """The options that say where batches come from (shared with ``compare``)."""
    parser.add_argument("--config", required=True, metavar="FILE", help="the site file (TOML)")
    parser.add_argument(
        "--batch",
        action="append" if many else "store",
        default=[] if many else None,
        metavar="ID",
        help="a batch from the store (the site file's store.url, or --store)"
        + (" (repeat for more)" if many else ""),
    )
    parser.add_argument("--store", metavar="URL", help="the store to read --batch from")
    parser.add_argument(
        "--unit", metavar="ID", help="the unit the batches belong to (default: from their data)"
    )
    parser.add_argument(
        "--threads", type=int, default=1, metavar="N", help="threads for the replay (default 1)"
    )


def print_error(error: SigmatrackError) -> None:
    """One line on stderr, as the CLI prints errors."""
    print(f"sigmatrack: error: {error}", file=sys.stderr)


def register(commands: argparse._SubParsersAction) -> None:
    """Add ``report``."""
    parser = commands.add_parser(
        "report",
        help="one batch's report: phase diagram, trends, key figures (self-contained HTML)",
        description=(
            "Replay one batch (a historian CSV file, or --batch ID from the store) and write its "
            "report: one HTML file with everything inline (opens without a network, prints on "
            "A4). " + ADVISORY
        ),
    )
    parser.add_argument("file", nargs="?", metavar="BATCH.csv", help="a historian CSV file")
    add_source_options(parser, many=False)
    parser.add_argument("--out", required=True, metavar="report.html", help="the page to write")
    parser.set_defaults(run=run_report)


def run_report(args: argparse.Namespace) -> int:
    # Drawing needs matplotlib: imported here, so that other commands start without it.
    from sensor.shell.report.build import report_html, write_page
    from sensor.shell.report.sources import load_views

    if (args.file is None) == (args.batch is None):
        raise ReportError("give one batch: a historian file (BATCH.csv) or --batch ID")
    errors: list[SigmatrackError] = []
    loaded = load_views(
        args.config,
        [] if args.file is None else [args.file],
        [] if args.batch is None else [args.batch],
        on_error=errors.append,
        unit_id=args.unit,
        store_url=args.store,
        threads=args.threads,
    )
    if errors:
        raise errors[0]
    if len(loaded.views) != 1:
        ids = ", ".join(v.batch for v in loaded.views)
        raise ReportError(
            f"{args.file}: holds {len(loaded.views)} batches ({ids}); a report is of one batch "
            "(sigmatrack replay --report DIR writes one per batch)"
        )
    view = loaded.views[0]
    out = Path(args.out)
    write_page(out, report_html(loaded.site, loaded.zone, view, made=datetime.now(UTC)))
    summary = view.summary
    if summary.error is not None:
        print(f"sigmatrack: error: batch {view.batch}: {summary.error}", file=sys.stderr)
        print(f"wrote {out} (batch {view.batch}: no estimates)")
        return EXIT_FAILED
    peak = "–" if summary.peak_sigma is None else f"{summary.peak_sigma:.4f}"
    print(
        f"wrote {out} (batch {view.batch}: peak sigma {peak}, "
        f"{summary.time_above_limit_s:.0f} s above the limit)"
    )
    print(ADVISORY)
    return 0
