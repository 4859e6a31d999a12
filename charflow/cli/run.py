"""``charflow run``: characterize the library a config describes, write its Liberty and JSON."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import TYPE_CHECKING

from charflow.cli import fidelity as fidelity_command
from charflow.cli import shared
from charflow.cli.shared import EXIT_FAILED_POINTS, EXIT_OK
from charflow.records.errors import ConfigError

# For the type checker only: at run time these modules load on first use (``deferred``).
if TYPE_CHECKING:
    from charflow.config.library import LibraryConfig
    from charflow.execution.store import Store
    from charflow.flow.characterize import RunResult

config = shared.deferred("charflow.config.library")
estimate = shared.deferred("charflow.analysis.estimate")
faults = shared.deferred("charflow.io.faults")
flow = shared.deferred("charflow.flow.characterize")
gaps = shared.deferred("charflow.tables.gaps")
spread_report = shared.deferred("charflow.analysis.spread")
store_mod = shared.deferred("charflow.execution.store")
workers = shared.deferred("charflow.execution.workers")

LISTED = 20  # failed or filled points listed one by one; the rest are counted

# Its line in charflow --help, and the first lines of its own --help.
SUMMARY = "characterize the library a config describes"
DESCRIPTION = (
    "Characterize the library a config describes and write runs/<library name>/<library "
    "name>.lib and .json. Points already in the folder's result store are reused."
)


def options(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", type=Path, metavar="CONFIG", help="the library's TOML config")
    shared.output_options(p)
    cluster_options(p)
    p.add_argument(
        "--cell",
        action="append",
        metavar="NAME",
        help="simulate only this cell (repeatable); the rest of the library comes from the "
        "result store of earlier runs",
    )
    p.add_argument(
        "--arc",
        metavar="FROM:TO",
        help="with one --cell: only the arc from input pin FROM to output pin TO",
    )
    p.add_argument(
        "--plan",
        action="store_true",
        help="print the simulations per cell and arc and an estimated time, then stop "
        "(runs a few sample points to time them)",
    )
    finish_options(p)


def cluster_options(p: argparse.ArgumentParser) -> None:
    """Options of run and demo for where the points run."""
    p.add_argument(
        "--backend",
        choices=("local", "dask", "joblib"),
        default="local",
        help="where the points run: local, worker processes on this machine (default; "
        "'joblib' is its former name); dask, the workers of a running Dask cluster (needs "
        "--scheduler)",
    )
    p.add_argument(
        "--scheduler",
        metavar="ADDRESS",
        help="with --backend dask: the cluster's scheduler, e.g. tcp://host:8786",
    )


def finish_options(p: argparse.ArgumentParser) -> None:
    """Options of run and demo for what follows the sweep."""
    p.add_argument(
        "--fidelity",
        action="store_true",
        help="then re-simulate points off the grid and report how far the tables are off",
    )
    p.add_argument(
        "--allow-gaps",
        metavar="METHOD",
        choices=gaps.METHODS,
        help="fill failed points from measured neighbours by METHOD ("
        + " or ".join(gaps.METHODS)
        + "); the filled values are marked in the JSON and the Liberty file, never stored",
    )


def command(args: argparse.Namespace) -> int:
    cfg = config.load(args.config)
    shared.check_jobs(args)
    return characterize(cfg, args)


def characterize(cfg: LibraryConfig, args: argparse.Namespace) -> int:
    """Run and demo: the plan only (``--plan``), or each library of ``cfg`` characterized,
    written and reported."""
    if args.backend == "dask" and not args.scheduler:
        raise ConfigError("--backend dask needs --scheduler ADDRESS (e.g. tcp://host:8786)")
    if args.scheduler and args.backend != "dask":
        raise ConfigError("--scheduler is for --backend dask")
    cells = getattr(args, "cell", None)
    if getattr(args, "plan", False):
        jobs = args.jobs or workers.default_jobs()
        print(estimate.render(estimate.estimate(cfg, cells, jobs)))
        return EXIT_OK
    arc = _arc(getattr(args, "arc", None))
    if arc is not None and (cells is None or len(cells) != 1):
        raise ConfigError("--arc needs exactly one --cell: the cell whose arc it is")
    code = EXIT_OK
    with (
        shared.output_folder(cfg.name, args) as out,
        store_mod.Store(out / store_mod.FILE_NAME) as store,
    ):
        if args.scheduler is None and store.count() == 0:
            # An empty store serves nothing: the pool the sweep needs starts now, while the
            # run's own modules load and it plans (a store with rows may serve the run whole,
            # which starts no pool: the sweep decides after its lookup).
            workers.start(cfg.simulation, args.jobs or workers.default_jobs())
        for lib in cfg.libraries():
            code = max(code, _library(lib, cells, arc, out, store, args))
    return code


def _library(
    lib: LibraryConfig,
    cells: list[str] | None,
    arc: tuple[str, str] | None,
    out: Path,
    store: Store,
    args: argparse.Namespace,
) -> int:
    """One library of the config: characterized, written, reported; its exit code."""
    progress = shared.Progress(args.quiet, lib.name)
    try:
        result = flow.characterize(
            lib,
            cells=cells,
            arc=arc,
            jobs=args.jobs,
            store=store,
            scheduler=args.scheduler,
            **progress.hooks(),
            allow_gaps=args.allow_gaps,
        )
    finally:
        progress.close()
    written = flow.write(lib, result, out)
    if result.spreads:
        written += spread_report.write(lib, result, out)
    _summary(lib.name, result, selective=cells is not None)
    _written(written, out)
    _gaps(lib.name, result, out)
    if result.failures:
        _failed(lib.name, result, out, args)
        return EXIT_FAILED_POINTS
    if args.fidelity:
        shaped = flow.with_shape(lib, result)  # the probes get the tables' input shape
        return fidelity_command.check_tables(shaped, result.cells, out, args, store)
    return EXIT_OK


def _arc(text: str | None) -> tuple[str, str] | None:
    if text is None:
        return None
    related, sep, output = text.partition(":")
    if not sep or not related or not output:
        raise ConfigError(f"--arc must be FROM:TO (input pin:output pin), got {text!r}")
    return related, output


def _written(written: list[Path], out: Path) -> None:
    """Each file written, the saved waveforms of failed points counted."""
    saved = [p for p in written if p.parent.parent == out / faults.FOLDER]
    for path in written:
        if path not in saved:
            print(f"wrote {path}")
    if saved:
        where = out / faults.FOLDER
        print(f"wrote {len(saved)} waveform file(s) of failed points under {where}")


def _failed(name: str, result: RunResult, out: Path, args: argparse.Namespace) -> None:
    print(
        f"{name}: {len(result.failures)} point(s) failed; no Liberty file written:",
        file=sys.stderr,
    )
    _list_faults(result, result.failures, out)
    # A point cut off by the window says which key to change: filling it would
    # hide a window too short, not a point the simulator could not do.
    if args.allow_gaps is None and not all(f.cut_off for f in result.failures):
        print(
            f"{name}: rerun with --allow-gaps {' or '.join(gaps.METHODS)} to fill "
            "them from measured neighbours (marked as filled)",
            file=sys.stderr,
        )


def _list_faults(result: RunResult, failures, out: Path) -> None:
    """Each failed point (the first LISTED): label, reason, why it was not filled, waveform."""
    saved = faults.paths(result.faults)
    why = {u.failure.point: u.why for u in result.gap_report.unfilled} if result.gap_report else {}
    for f in failures[:LISTED]:
        print(f"  {f.message}", file=sys.stderr)
        if f.point in why:
            print(f"    not filled: {why[f.point]}", file=sys.stderr)
        if f.point in saved:
            print(f"    waveform: {out / saved[f.point][0]}", file=sys.stderr)
    if len(failures) > LISTED:
        print(f"  ... and {len(failures) - LISTED} more (all in the JSON)", file=sys.stderr)


def _gaps(name: str, result: RunResult, out: Path) -> None:
    if result.gap_report is None or not result.filled:
        return
    method = result.gap_report.method
    print(
        f"{name}: {len(result.filled)} failed point(s) filled by {method}, not simulated "
        '(listed under "filled" in the JSON, commented in the Liberty file):'
    )
    saved = faults.paths(result.faults)
    for f in result.filled[:LISTED]:
        p = f.failure.point
        print(f"  {f.failure.message}")
        print(f"    filled along {f.along} from {len(f.sources)} measured point(s)")
        if p in saved:
            print(f"    waveform: {out / saved[p][0]}")
    if len(result.filled) > LISTED:
        print(f"  ... and {len(result.filled) - LISTED} more (all in the JSON)")


def _summary(name: str, result: RunResult, *, selective: bool) -> None:
    print(
        f"{name}: {len(result.measurements)} points measured, {len(result.failures)} failed, "
        f"{len(result.toggles)} input toggles measured: "
        f"{result.simulated} simulated ({result.simulations} simulations), "
        f"{len(result.reused)} reused from the store; simulator time {result.sim_seconds:.2f} s "
        f"(all workers), wall time {result.wall_seconds:.2f} s"
    )
    print(
        f"{name}: {result.reads} testbench reads (each parses the cell's models), "
        f"{result.read_seconds:.2f} s (all workers)"
    )
    if result.spreads:
        _spread_summary(name, result)
    for models, tables in result.stale_tables().items():
        print(f"{name}: {len(tables)} tables are {_why_stale(models)}: {_by_arc(tables)}")
    if result.stale and selective:
        print(f"{name}: run without --cell to bring every table up to date")
    for f in result.unmeasured[:20]:
        print(f"{name}: no hidden power: {f.message}")
    if result.tight or result.unbarred:
        fresh = sum(1 for m in result.tight if m.point not in result.reused)
        print(
            f"{name}: error bars on {len(result.tight)} points ({fresh} re-measured now at "
            f"tightened settings), {len(result.unbarred)} re-measure(s) failed"
        )
    for f in result.unbarred[:20]:
        print(f"{name}: no error bar: {f.message}")
    if result.left_out:
        print(
            f"{name}: left out {', '.join(result.left_out)}: the store does not hold all their "
            "points; run them once in full"
        )


def _spread_summary(name: str, result: RunResult) -> None:
    """What the sigma tables cost beside the nominal combinational points they are for."""
    tables, checks, nominal = result.spread_cost()
    sampled = all(m.point.samples for m in result.spreads)
    points = [m for m in result.spreads if bool(m.point.samples) == sampled]
    per_point = tables / len(points) if points else 0.0
    ratio = (
        f"{tables / nominal:.2f}x the nominal combinational points' {nominal}" if nominal else "-"
    )
    print(
        f"{name}: sigma tables: {len(points)} spread points, {tables} simulations "
        f"({per_point:.1f} a point; {ratio}); Monte Carlo checks: {checks} simulations; "
        f"{len(result.spread_failures)} spread point(s) failed"
    )
    for f in result.spread_failures[:LISTED]:
        print(f"  {f.message}", file=sys.stderr)


def _why_stale(models: tuple[str, ...]) -> str:
    if models:
        return f"older than the model (model file {', '.join(models)} changed)"
    return "out of date (the testbench or the settings changed)"


def _by_arc(tables: list[str]) -> str:
    """Table names counted per arc or pin: ``QINV_P1 A->Y (4), QDFF_P1 pin CLK (1)``."""
    arcs: dict[str, int] = {}
    for table in tables:
        words = table.split()
        arc = " ".join(words[:3] if words[1] == "pin" else words[:2])  # an arc, or a pin
        arcs[arc] = arcs.get(arc, 0) + 1
    return ", ".join(f"{arc} ({n})" for arc, n in arcs.items())
