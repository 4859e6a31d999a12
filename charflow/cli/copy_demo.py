"""``charflow copy-demo``: the demo's config, cell templates and models copied to edit."""

from __future__ import annotations

import argparse
from pathlib import Path

from charflow.cli import shared
from charflow.cli.shared import EXIT_OK

demo = shared.deferred("charflow.config.demo")

# Its line in charflow --help, and the first lines of its own --help.
SUMMARY = "copy the demo's config, cell templates and models into a folder, to edit and run"
DESCRIPTION = (
    "Copy the demo's config, cell templates and models into FOLDER, keeping their layout; "
    "then edit them and run charflow run FOLDER/demo/vellum90.toml."
)


def options(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "folder",
        type=Path,
        metavar="FOLDER",
        help="where to copy (made if missing; files already there are never overwritten)",
    )


def command(args: argparse.Namespace) -> int:
    config_path = demo.copy_to(args.folder)
    print(f"copied the demo's config, cell templates and models into {args.folder}")
    print(f"edit them, then: charflow run {config_path}")
    return EXIT_OK
