"""``sigmatrack compare``: several batches in one phase diagram and one table, held against
the envelope of the good ones."""

from __future__ import annotations

import argparse
from datetime import UTC, datetime
from pathlib import Path

from sensor.errors import SigmatrackError
from sensor.shell.replay_command import ADVISORY, EXIT_FAILED
from sensor.shell.report.errors import ReportError
from sensor.shell.report_command import add_source_options, print_error


def register(commands: argparse._SubParsersAction) -> None:
    """Add ``compare``."""
    parser = commands.add_parser(
        "compare",
        help="compare batches: overlaid phase diagram, key figures, envelope of good batches",
        description=(
            "Replay several batches (historian CSV files and/or --batch IDs from the store) and "
            "write one HTML page: their paths overlaid in the phase diagram, their key figures "
            "in one table, and every batch that is not a good one held against the envelope of "
            "the good ones (named with --good, or chosen by sigmatrack's criterion, which the "
            "page states). " + ADVISORY
        ),
    )
    parser.add_argument("files", nargs="*", metavar="BATCH.csv", help="historian CSV files")
    add_source_options(parser, many=True)
    parser.add_argument(
        "--good",
        metavar="ID,ID,...",
        help="the good batches that make the envelope (default: sigmatrack's criterion)",
    )
    parser.add_argument(
        "--bin-k",
        type=float,
        default=1.0,
        metavar="K",
        help="temperature bins of the envelope (default 1 K)",
    )
    parser.add_argument("--out", required=True, metavar="compare.html", help="the page to write")
    parser.set_defaults(run=run_compare)


def run_compare(args: argparse.Namespace) -> int:
    # Drawing needs matplotlib: imported here, so that other commands start without it.
    from sensor.shell.report.build import comparison_html, write_page
    from sensor.shell.report.sources import load_views

    if len(args.files) + len(args.batch) < 2:
        raise ReportError("a comparison needs at least two batches (files or --batch IDs)")
    errors: list[SigmatrackError] = []

    def report(error: SigmatrackError) -> None:
        print_error(error)
        errors.append(error)

    loaded = load_views(
        args.config,
        args.files,
        args.batch,
        on_error=report,
        unit_id=args.unit,
        store_url=args.store,
        threads=args.threads,
    )
    good = None if args.good is None else [g.strip() for g in args.good.split(",") if g.strip()]
    out = Path(args.out)
    page = comparison_html(
        loaded.site, loaded.zone, loaded.views, good, bin_k=args.bin_k, made=datetime.now(UTC)
    )
    write_page(out, page)
    for view in loaded.views:
        if view.summary.error is not None:
            print_error(SigmatrackError(f"batch {view.batch}: {view.summary.error}"))
    print(f"wrote {out} ({len(loaded.views)} batches)")
    print(ADVISORY)
    failed = len(errors) + sum(1 for v in loaded.views if v.summary.error is not None)
    return EXIT_FAILED if failed else 0
