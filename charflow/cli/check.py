"""``charflow check``: a config, every cell's netlist and function; no sweep."""

from __future__ import annotations

import argparse
from pathlib import Path

from charflow.cli import shared
from charflow.cli.shared import EXIT_BAD_INPUT, EXIT_OK

check = shared.deferred("charflow.flow.check")

# Its line in charflow --help, and the first lines of its own --help.
SUMMARY = "check a config and every cell's netlist and function; simulate no sweep"
DESCRIPTION = (
    "Check a config: every key, every cell's netlist and that it implements its declared "
    "function (a DC run per input vector). Lists every problem found."
)


def options(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", type=Path, metavar="CONFIG", help="the library's TOML config")


def command(args: argparse.Namespace) -> int:
    report = check.check(args.config)
    print(check.summary(report))
    return EXIT_OK if report.ok else EXIT_BAD_INPUT
