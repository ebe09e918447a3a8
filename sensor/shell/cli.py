"""The ``sigmatrack`` command line.

Commands are registered by the packages that own them, through the ``sigmatrack.commands``
entry-point group in ``pyproject.toml``: each entry is a ``register(subparsers)`` function that
adds its parser and sets ``run`` to a function of the parsed arguments returning an exit status.
So the CLI imports no package it does not need to, and the plant simulator's command lives with
the simulator.

Errors a user can cause and fix (:class:`~sensor.errors.SigmatrackError`) print one line on
stderr, ``sigmatrack: error: <where>: <what>``, and exit with status 2. Ctrl-C exits with 130.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from importlib.metadata import entry_points, version

from sensor.errors import SigmatrackError

EXIT_USAGE = 2
"""Exit status for bad input (the same as argparse's)."""


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="sigmatrack",
        description=(
            "Soft sensor and cooling-rate advisor for batch cooling crystallizers. "
            "Advisory only: the DCS keeps control and the safety systems keep protection."
        ),
    )
    parser.add_argument("--version", action="version", version=f"%(prog)s {version('sigmatrack')}")
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for entry in sorted(entry_points(group="sigmatrack.commands"), key=lambda e: e.name):
        entry.load()(commands)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the CLI; returns the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.run(args) or 0)
    except SigmatrackError as error:
        print(f"sigmatrack: error: {error}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print("sigmatrack: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
