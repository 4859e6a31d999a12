"""``charflow diff``: compare two libraries (Liberty or JSON) table by table."""

from __future__ import annotations

import argparse
from pathlib import Path

from charflow.cli import shared
from charflow.cli.shared import EXIT_DIFFERENT, EXIT_OK
from charflow.records.errors import ConfigError

diff = shared.deferred("charflow.analysis.diff")

# Its line in charflow --help, and the first lines of its own --help.
SUMMARY = "compare two libraries (Liberty or JSON) table by table"
DESCRIPTION = "Compare two libraries (Liberty or JSON) table by table and list the largest changes."


def options(p: argparse.ArgumentParser) -> None:
    p.add_argument("old", type=Path, help="the first library (.lib or .json)")
    p.add_argument("new", type=Path, help="the second library (.lib or .json)")
    p.add_argument(
        "--top", type=int, default=10, metavar="N", help="largest changes to list (default 10)"
    )
    p.add_argument(
        "--tolerance",
        type=float,
        default=diff.TOLERANCE,
        help="relative change below which a table counts as unchanged "
        f"(default {diff.TOLERANCE:g})",
    )
    p.add_argument("--html", type=Path, metavar="FILE", help="also write an HTML report with plots")


def command(args: argparse.Namespace) -> int:
    if args.tolerance < 0:
        raise ConfigError(f"--tolerance must not be negative, got {args.tolerance}")
    old, new = diff.read(args.old), diff.read(args.new)
    comparison = diff.compare(old, new, args.tolerance)
    print(diff.report(comparison, str(args.old), str(args.new), args.top), end="")
    if args.html is not None:
        diff.write_html(args.html, comparison, old, new, str(args.old), str(args.new), args.top)
        print(f"wrote {args.html}")
    return EXIT_DIFFERENT if comparison.differs else EXIT_OK
