"""``charflow copy-demo``: the demo's config, cell templates and models copied to edit."""

from __future__ import annotations

import argparse
from pathlib import Path

from charflow.cli import shared
from charflow.cli.shared import EXIT_OK

demo = shared.deferred("charflow.config.demo")


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
