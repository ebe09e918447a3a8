"""``sigmatrack check``: the commissioning check of a site file against the plant's OPC UA server.

Connects read-only (nothing is written, nothing subscribed), checks every configured tag (see
:mod:`sensor.shell.opcua.commissioning`), prints a table per unit, what sigmatrack would write
and under which conditions, and one line per problem. Exit status 0 when there is none, 1 when
there are problems, 2 when the check cannot run (the site file, the security files, the server
unreachable or refusing us).
"""

from __future__ import annotations

import argparse
import asyncio
import time

from sensor.shell.config import load_site_file
from sensor.shell.opcua.commissioning import CheckReport, check_plant, write_plan
from sensor.shell.tables import format_table

EXIT_PROBLEMS = 1
ADVISORY = (
    "sigmatrack advises only: the DCS keeps control and the safety instrumented system keeps "
    "protection. Commission it under the site's management of change."
)


def register(commands: argparse._SubParsersAction) -> None:
    """Add ``check``."""
    parser = commands.add_parser(
        "check",
        help="check the site file's tags on the plant's OPC UA server (read-only)",
        description=(
            "Connect read-only to the plant's OPC UA server (opcua.endpoint, with the site's "
            "security and user), check that every configured tag exists, has a data type, "
            "EngineeringUnits and EURange that fit the site file, and Good quality; print what "
            "sigmatrack would write and when, without writing. One line per problem; exit "
            "status 1 if there is any. " + ADVISORY
        ),
    )
    parser.add_argument("--config", required=True, metavar="FILE", help="the site file (TOML)")
    parser.set_defaults(run=run_check)


def format_report(report: CheckReport, write_to_dcs: bool, plan: list[str]) -> str:
    lines = [
        f"sigmatrack check of {report.endpoint} (read-only: nothing is written)",
        f"  connected: {report.security}"
        + (f"; server product {report.server_name!r}" if report.server_name else ""),
    ]
    units: dict[str, list] = {}
    for tag in report.tags:
        units.setdefault(tag.spec.unit_id, []).append(tag)
    for unit_id, tags in units.items():
        lines.append(f"{unit_id}")
        rows = [
            [
                t.spec.signal,
                t.spec.tag.name,
                t.data_type or "-",
                t.unit or "-",
                t.value_range or "-",
                t.quality or "-",
                t.value or "-",
                "ok" if not t.problems else f"{len(t.problems)} problem(s)",
            ]
            for t in tags
        ]
        headers = ["signal", "tag", "type", "unit", "range", "quality", "value", "check"]
        lines.append(format_table(headers, rows))
    state = "true" if write_to_dcs else "false: nothing is written until it is set to true"
    lines.append(f"What sigmatrack would write (opcua.write_to_dcs = {state}):")
    lines += [f"  {line}" for line in plan] or ["  nothing: no remote setpoint or heartbeat tag"]
    problems = report.problems
    if problems:
        lines.append(f"{len(problems)} problem(s):")
        lines += [f"  {problem}" for problem in problems]
    else:
        lines.append("No problems found.")
    lines.append(ADVISORY)
    return "\n".join(lines)


def run_check(args: argparse.Namespace) -> int:
    site = load_site_file(args.config)
    report = asyncio.run(check_plant(site, now_s=time.time()))
    print(format_report(report, site.opcua.write_to_dcs, write_plan(site, report.tags)))
    return EXIT_PROBLEMS if report.problems else 0
