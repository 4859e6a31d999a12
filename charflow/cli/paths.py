"""``charflow paths``: characterize (reusing the store), then simulate short paths of the
library's own cells whole and compare them with the tables' prediction (and OpenSTA's)."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING

from charflow.cli import shared
from charflow.cli.shared import EXIT_FAILED_POINTS, EXIT_OK
from charflow.records.errors import ConfigError

# For the type checker only: at run time these modules load on first use (``deferred``).
if TYPE_CHECKING:
    from charflow.analysis.paths import Setup
    from charflow.config.library import LibraryConfig
    from charflow.flow.characterize import RunResult
    from charflow.records.paths import Circuit
    from charflow.tables.tabulate import CellTables

config = shared.deferred("charflow.config.library")
flow = shared.deferred("charflow.flow.characterize")
liberty = shared.deferred("charflow.io.liberty")
verilog = shared.deferred("charflow.io.verilog")
atomic = shared.deferred("charflow.io.atomic")
paths = shared.deferred("charflow.analysis.paths")
pathgen = shared.deferred("charflow.analysis.pathgen")
opensta = shared.deferred("charflow.analysis.opensta")
html_report = shared.deferred("charflow.analysis.report")
store_mod = shared.deferred("charflow.execution.store")

SUMMARY = "simulate short paths of the library's cells whole and compare with the tables"
DESCRIPTION = (
    "Characterize (reusing the result store), then build short paths of the library's own "
    "cells (or read them from a gate-level Verilog file), simulate each whole at transistor "
    "level and compare its delay and slews with the tables' stage-by-stage prediction and, "
    "when OpenSTA (sta) is installed, with OpenSTA's."
)


def options(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", type=Path, metavar="CONFIG", help="the library's TOML config")
    shared.output_options(p)
    p.add_argument("--cell", action="append", metavar="NAME", help="only this cell (repeatable)")
    p.add_argument(
        "--netlist",
        type=Path,
        metavar="FILE.v",
        help="gate-level Verilog: one input port, "
        "side inputs tied to 1'b0/1'b1 (default: generated paths)",
    )
    p.add_argument(
        "--count", type=int, default=6, metavar="N", help="paths to generate (default 6)"
    )
    p.add_argument("--stages", default="5-8", metavar="LO-HI", help="stages per generated path")
    p.add_argument("--seed", type=int, default=1, metavar="N", help="generator seed (default 1)")
    p.add_argument(
        "--slew",
        type=float,
        action="append",
        metavar="T",
        help="input slew in the library's time unit (repeatable; default: the grid's "
        "smallest, middle and largest)",
    )
    p.add_argument(
        "--wire-cap",
        type=float,
        default=0.0,
        metavar="C",
        help="capacitance on every gate-driven net, in the library's unit",
    )
    p.add_argument(
        "--port-load",
        type=float,
        metavar="C",
        help="load on every output port, in the library's unit (default: the grid's smallest load)",
    )
    p.add_argument(
        "--pin-load",
        choices=("whole-edge", "threshold", "slew-window", "split"),
        help="the pin capacitance the tables' prediction sums on each net: from the charge of "
        "the whole input edge, up to the input's delay threshold (the JSON's "
        "*_capacitance_to_threshold_F), between its slew thresholds "
        "(*_capacitance_slew_window_F), or split: delays at the second, output slews at the "
        "third; default: the Liberty file's ([liberty] pin_capacitance), which OpenSTA reads",
    )
    p.add_argument("--no-sta", action="store_true", help="leave OpenSTA out even if installed")


def _stages(text: str) -> tuple[int, int]:
    lo, _, hi = text.partition("-")
    try:
        return int(lo), int(hi or lo)
    except ValueError as exc:
        raise ConfigError(f"--stages takes LO-HI (e.g. 5-8), got {text!r}") from exc


def _setup(cfg: LibraryConfig, args: argparse.Namespace) -> Setup:
    grid = cfg.grid
    slews = (
        tuple(s * cfg.time_scale for s in args.slew)
        if args.slew
        else tuple(dict.fromkeys((grid.slew[0], grid.slew[len(grid.slew) // 2], grid.slew[-1])))
    )
    port = grid.load[0] if args.port_load is None else args.port_load * cfg.cap_scale
    if min(slews) <= 0 or port < 0 or args.wire_cap < 0:
        raise ConfigError("--slew must be positive, --port-load and --wire-cap not negative")
    pin_load = args.pin_load or cfg.liberty.pin_capacitance
    return paths.Setup(slews, ("rise", "fall"), args.wire_cap * cfg.cap_scale, port, pin_load)


def command(args: argparse.Namespace) -> int:
    """Characterize, build or read the circuits, simulate, predict, report."""
    cfg = config.load(args.config)
    shared.check_jobs(args)
    setup = _setup(cfg, args)
    with (
        shared.output_folder(cfg.name, args) as out,
        store_mod.Store(out / store_mod.FILE_NAME) as store,
    ):
        result = shared.tables(cfg, args, store, "to time paths with")
        if result is None:
            return EXIT_FAILED_POINTS
        # The paths' input port gets the edge the tables were measured with (a driver's).
        cfg = flow.with_shape(cfg, result)
        cells = {
            c.cell.name: c for c in result.cells if args.cell is None or c.cell.name in args.cell
        }
        if args.netlist is not None:
            circuits = (verilog.read(args.netlist, cfg),)
        else:
            shape = pathgen.Shape(args.count, _stages(args.stages), args.seed)
            circuits = pathgen.generate(cells, shape)
        return _check(cfg, result, cells, circuits, setup, out, args)


def _check(
    cfg: LibraryConfig,
    result: RunResult,
    cells: Mapping[str, CellTables],
    circuits: Sequence[Circuit],
    setup: Setup,
    out: Path,
    args: argparse.Namespace,
) -> int:
    """Simulate and time the circuits, OpenSTA's column when it is installed, the reports."""
    progress = shared.Progress(args.quiet)
    try:
        corr = paths.correlate(
            cfg,
            circuits,
            cells,
            setup,
            jobs=args.jobs,
            on_start=progress.start,
            on_result=progress.result,
        )
    finally:
        progress.close()
    folder = out / f"{cfg.name}.paths"
    written = [folder / f"{c.name}.v" for c in circuits]
    for c, path in zip(circuits, written, strict=True):
        atomic.write_atomic(path, verilog.write(c, cfg))
    if not args.no_sta and opensta.installed():
        lib = folder / f"{cfg.name}.lib"
        atomic.write_atomic(lib, liberty.render(cfg, result.cells, result.cell_power))
        written.append(lib)
        timed = {}
        for c in circuits:
            net_loads = paths.loads(c, cells, setup.wire, setup.port)
            timed[c.name] = opensta.time_circuit(
                cfg, lib, c, (net_loads.wire, net_loads.port), setup.slews
            )
        corr = paths.with_sta(corr, timed)
    elif not args.no_sta:
        print("OpenSTA (sta) is not installed: its column is left empty", file=sys.stderr)
    written += html_report.write_paths(cfg, corr, out)
    print("\n".join(paths.summary_lines(cfg, corr)))
    for path in written:
        print(f"wrote {path}")
    return EXIT_FAILED_POINTS if any(r.failure for r in corr.results) else EXIT_OK
