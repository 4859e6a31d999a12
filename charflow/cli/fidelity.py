"""``charflow fidelity``: characterize (reusing the store), then re-simulate off the grid and
report how far each table is off."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import TYPE_CHECKING

from charflow.cli import shared
from charflow.cli.shared import EXIT_FAILED_POINTS, EXIT_OK

# For the type checker only: at run time these modules load on first use (``deferred``).
if TYPE_CHECKING:
    from charflow.config.library import LibraryConfig
    from charflow.execution.store import Store

config = shared.deferred("charflow.config.library")
fidelity = shared.deferred("charflow.analysis.fidelity")
flow = shared.deferred("charflow.flow.characterize")
html_report = shared.deferred("charflow.analysis.report")
store_mod = shared.deferred("charflow.execution.store")

# Its line in charflow --help, and the first lines of its own --help.
SUMMARY = "re-simulate off the grid and report how accurate the tables are"
DESCRIPTION = (
    "Characterize (reusing the result store), then re-simulate points between the grid's "
    "points and report each table's interpolation error."
)


def options(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", type=Path, metavar="CONFIG", help="the library's TOML config")
    shared.output_options(p)
    p.add_argument("--cell", action="append", metavar="NAME", help="only this cell (repeatable)")


def command(args: argparse.Namespace) -> int:
    """Characterize (the tables are not written again), then check the tables off the grid."""
    cfg = config.load(args.config)
    shared.check_jobs(args)
    with (
        shared.output_folder(cfg.name, args) as out,
        store_mod.Store(out / store_mod.FILE_NAME) as store,
    ):
        result = shared.tables(cfg, args, store, "to check")
        if result is None:
            return EXIT_FAILED_POINTS
        # With a store the library holds every stored cell; the check is for the chosen ones.
        cells = [c for c in result.cells if args.cell is None or c.cell.name in args.cell]
        # The probes get the input shape the tables were measured with.
        return check_tables(flow.with_shape(cfg, result), cells, out, args, store)


def check_tables(
    cfg: LibraryConfig, cells, out: Path, args: argparse.Namespace, store: Store
) -> int:
    """The fidelity check of ``cells``' tables (also ``run --fidelity``): reported, written."""
    progress = shared.Progress(args.quiet)
    try:
        report = fidelity.check(
            cfg,
            cells,
            jobs=args.jobs,
            store=store,
            **progress.hooks(),
        )
    finally:
        progress.close()
    written = html_report.write_fidelity(cfg, report, out, jobs=args.jobs)
    print("\n".join(fidelity.summary_lines(cfg, report)))
    for path in written:
        print(f"wrote {path}")
    return EXIT_FAILED_POINTS if report.failures else EXIT_OK
