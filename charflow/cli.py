"""The ``charflow`` command: parse, call the library, write, exit with a meaningful code.

Exit codes: 0 done; 1 the run finished but some points failed and were not filled
(``--allow-gaps``; no Liberty written), or ``diff`` found differences; 2 bad input (config,
netlist, function, a library diff cannot read); 3 simulator, store, cluster or output trouble.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib.util
import logging
import sys
import types
from collections.abc import Callable, Iterator
from pathlib import Path

from . import __version__
from .errors import (
    CharflowError,
    ConfigError,
    DiffError,
    FunctionalMismatchError,
    NetlistError,
    OutputError,
)


def _deferred(name: str) -> types.ModuleType:
    """The module ``name``, executed when one of its attributes is first used."""
    if name in sys.modules:
        return sys.modules[name]
    spec = importlib.util.find_spec(name)
    if spec is None or spec.loader is None:
        raise ModuleNotFoundError(f"no module named {name!r}", name=name)
    spec.loader = importlib.util.LazyLoader(spec.loader)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module


# The commands' modules pull in numpy, scipy, matplotlib, jinja2 and the simulator's bindings:
# seconds of start-up that --help, --version and a mistyped option should not pay. They are
# loaded here, in this one place, on first use by the command that needs them (not to dodge an
# import cycle). Only the version and the error types are imported as usual.
bench = _deferred("charflow.bench")
check = _deferred("charflow.check")
config = _deferred("charflow.config")
demo = _deferred("charflow.demo")
diff = _deferred("charflow.diff")
estimate = _deferred("charflow.estimate")
faults = _deferred("charflow.faults")
fidelity = _deferred("charflow.fidelity")
flow = _deferred("charflow.flow")
gaps = _deferred("charflow.gaps")
gridstudy = _deferred("charflow.gridstudy")
lock = _deferred("charflow.lock")
store_mod = _deferred("charflow.store")
sweep = _deferred("charflow.sweep")
tqdm = _deferred("tqdm")

EXIT_OK, EXIT_FAILED_POINTS, EXIT_BAD_INPUT, EXIT_TROUBLE = 0, 1, 2, 3
EXIT_DIFFERENT = 1  # charflow diff: the libraries differ
RUNS = Path("runs")  # default outputs: runs/<library name> under the current folder

DESCRIPTION = """\
charflow characterizes standard cells. For each cell of a library it simulates the cell's
transistor netlist with ngspice over a grid of input slews and output loads, and writes the
delay, transition, setup/hold and power tables as a Liberty file (.lib) and as JSON.
A library is described by a TOML config: its process (model files, supply, temperature),
grids and cells. Outputs go to runs/<library name> in the current folder unless --out is given.

Run "charflow COMMAND --help" for the options of one command."""

EPILOG = """\
examples:
  charflow demo --quick             a quick trial: the demo library on a 3 x 3 grid
  charflow demo                     the demo library as shipped (minutes)
  charflow copy-demo mylib          copy the demo's config, templates and models to edit
  charflow check mylib/demo/vellum90.toml
  charflow run mylib/demo/vellum90.toml --plan
  charflow run mylib/demo/vellum90.toml --jobs 2
  charflow diff runs/old/lib.lib runs/new/lib.lib

exit status:
  0  done
  1  the run finished but some points failed (no Liberty file written unless --allow-gaps
     filled them), a fidelity check found failures, or diff found differences
  2  bad input: config, netlist, cell function, or a library diff cannot read
  3  trouble with the simulator, the result store, the cluster or the output folder"""


def _parser(command: str | None = None) -> argparse.ArgumentParser:
    """The command-line parser. With ``command``, only that command gets its options ("" for
    none): the options take their defaults from the command's module, which loads it."""
    parser = argparse.ArgumentParser(
        prog="charflow",
        description=DESCRIPTION,
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument(
        "--version", action="version", version=f"charflow {__version__}", help="print the version"
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND", title="commands")
    for name, (summary, description, options) in COMMANDS.items():
        p = sub.add_parser(name, help=summary, description=description)
        if command is None or command == name:
            options(p)
    return parser


def _run_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", type=Path, metavar="CONFIG", help="the library's TOML config")
    _common(p)
    _cluster(p)
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
    _finish(p)


def _demo_options(p: argparse.ArgumentParser) -> None:
    _common(p)
    _cluster(p)
    p.add_argument(
        "--quick",
        action="store_true",
        help="a quick trial: every grid axis cut to its first, middle and last value and the "
        "level-1 demo models; the library is named vellum90_tt_quick",
    )
    _finish(p)


def _finish(p: argparse.ArgumentParser) -> None:
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


def _copy_demo_options(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "folder",
        type=Path,
        metavar="FOLDER",
        help="where to copy (made if missing; files already there are never overwritten)",
    )


def _check_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", type=Path, metavar="CONFIG", help="the library's TOML config")


def _fidelity_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", type=Path, metavar="CONFIG", help="the library's TOML config")
    _common(p)
    p.add_argument("--cell", action="append", metavar="NAME", help="only this cell (repeatable)")


def _grid_study_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", type=Path, metavar="CONFIG", help="the library's TOML config")
    _common(p)
    p.add_argument("--cell", required=True, metavar="NAME", help="the cell to study")
    p.add_argument(
        "--arc", metavar="FROM:TO", help="input pin and output pin of the arc (default: first arc)"
    )
    p.add_argument(
        "--target",
        type=_fraction,
        action="append",
        help="largest relative error allowed, e.g. 1%% or 0.01 (repeatable; default 1%%)",
    )
    p.add_argument(
        "--sizes",
        type=_sizes,
        default=gridstudy.SIZES,
        metavar="MIN:MAX",
        help=f"points per axis to try (default {gridstudy.SIZES[0]}:{gridstudy.SIZES[-1]})",
    )
    p.add_argument(
        "--reference",
        type=_reference,
        default=gridstudy.REFERENCE_POINTS,
        metavar="N",
        help=f"points per axis of the reference grid (default {gridstudy.REFERENCE_POINTS})",
    )


def _bench_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--jobs", type=int, metavar="N", help="worker processes (default: one per core)")
    p.add_argument(
        "--library",
        action="append",
        choices=bench.LIBRARIES,
        help="only this library (repeatable; default: all)",
    )
    p.add_argument(
        "--naive-points",
        type=int,
        default=bench.NAIVE_POINTS,
        metavar="N",
        help=f"points the naive way runs per library (default {bench.NAIVE_POINTS})",
    )
    p.add_argument(
        "--params",
        type=int,
        default=bench.KIT_PARAMS,
        metavar="N",
        help=f".param lines in the foundry-style model file (default {bench.KIT_PARAMS})",
    )
    p.add_argument(
        "--repeat",
        type=int,
        default=1,
        metavar="N",
        help="charflow runs per setting; the fastest is kept (default 1)",
    )


def _diff_options(p: argparse.ArgumentParser) -> None:
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


# Each command: its line in charflow --help, the first lines of its own --help, its options.
COMMANDS: dict[str, tuple[str, str, Callable[[argparse.ArgumentParser], None]]] = {
    "run": (
        "characterize the library a config describes",
        "Characterize the library a config describes and write runs/<library name>/<library "
        "name>.lib and .json. Points already in the folder's result store are reused.",
        _run_options,
    ),
    "check": (
        "check a config and every cell's netlist and function; simulate no sweep",
        "Check a config: every key, every cell's netlist and that it implements its declared "
        "function (a DC run per input vector). Lists every problem found.",
        _check_options,
    ),
    "demo": (
        "characterize the bundled demo library",
        "Characterize the bundled demo library: the invented vellum90 process and its cells "
        "(inverters, a buffer, gates, a two-output cell and two flip-flops). Writes "
        "runs/vellum90_tt (runs/vellum90_tt_quick with --quick) in the current folder.",
        _demo_options,
    ),
    "copy-demo": (
        "copy the demo's config, cell templates and models into a folder, to edit and run",
        "Copy the demo's config, cell templates and models into FOLDER, keeping their layout; "
        "then edit them and run charflow run FOLDER/demo/vellum90.toml.",
        _copy_demo_options,
    ),
    "fidelity": (
        "re-simulate off the grid and report how accurate the tables are",
        "Characterize (reusing the result store), then re-simulate points between the grid's "
        "points and report each table's interpolation error.",
        _fidelity_options,
    ),
    "grid-study": (
        "find the smallest grid that meets a target error for one arc",
        "Try grids of several sizes and spacings for one arc against a dense reference grid "
        "and report the smallest that meets each target error.",
        _grid_study_options,
    ),
    "bench": (
        "time charflow against the naive way and the simulator alone",
        "Time charflow's sweep against one simulator run per point (the naive way) and the "
        "simulator's own time: the demo's cells on both demo model sets and on a generated "
        "foundry-style model file.",
        _bench_options,
    ),
    "diff": (
        "compare two libraries (Liberty or JSON) table by table",
        "Compare two libraries (Liberty or JSON) table by table and list the largest changes.",
        _diff_options,
    ),
}


def _fraction(text: str) -> float:
    try:
        value = float(text[:-1]) / 100 if text.endswith("%") else float(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"not a fraction or a percentage: {text!r}") from exc
    if not 0 < value < 1:
        raise argparse.ArgumentTypeError(f"must be between 0 and 100 %, got {text!r}")
    return value


def _sizes(text: str) -> tuple[int, ...]:
    low, _, high = text.partition(":")
    try:
        lo, hi = int(low), int(high or low)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"must be MIN:MAX, got {text!r}") from exc
    if not 2 <= lo <= hi:
        raise argparse.ArgumentTypeError(f"must be MIN:MAX with 2 <= MIN <= MAX, got {text!r}")
    return tuple(range(lo, hi + 1))


def _reference(text: str) -> int:
    try:
        value = int(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"not a whole number: {text!r}") from exc
    # The optimizer's surrogate is a cubic spline: it needs at least 4 points per axis.
    if value < 4:
        raise argparse.ArgumentTypeError(f"must be at least 4, got {value}")
    return value


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--out",
        type=Path,
        metavar="FOLDER",
        help="output folder (default: runs/<library name> in the current folder); it also "
        "holds the result store that later runs reuse",
    )
    p.add_argument("--jobs", type=int, metavar="N", help="worker processes (default: one per core)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def _cluster(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--backend",
        choices=("joblib", "dask"),
        default="joblib",
        help="where the points run: joblib, worker processes on this machine (default); dask, "
        "the workers of a running Dask cluster (needs --scheduler)",
    )
    p.add_argument(
        "--scheduler",
        metavar="ADDRESS",
        help="with --backend dask: the cluster's scheduler, e.g. tcp://host:8786",
    )


class _Progress:
    """A tqdm bar on a terminal; nothing when output is redirected or --quiet. The bar counts
    work, each point's ``cost`` (about its simulations), not points: a flip-flop's search
    weighs what its runs take, and the time left holds when the searches come last. Points
    from the store take no time and count for none."""

    def __init__(self, quiet: bool, name: str = "points") -> None:
        self.enabled = not quiet and sys.stderr.isatty()
        self.name = name
        self.bar = None
        self.seen = self.stored_count = self.failed = 0
        self.from_store: set = set()

    def start(self, total: int) -> None:
        """``total``: the work of every point to come (``sweep.work``)."""
        if self.enabled:
            # smoothing 0: the mean rate since the start, steadier than a recent one when
            # results come a worker's chunk at a time.
            self.bar = tqdm.tqdm(
                total=total, unit="sim", desc=self.name, dynamic_ncols=True, smoothing=0.0
            )

    def stored(self, found: tuple) -> None:
        self.stored_count = len(found)
        self.from_store = {m.point for m in found}
        if self.bar is not None:
            self.bar.total -= sum(m.point.cost for m in found)

    def result(self, outcome: object) -> None:
        self.seen += 1
        if isinstance(outcome, flow.Failure):
            self.failed += 1
        if self.bar is not None:
            simulated = max(0, self.seen - self.stored_count - self.failed)
            counts = {
                "stored": min(self.seen, self.stored_count),
                "simulated": simulated,
                "failed": self.failed,
            }
            self.bar.set_postfix(counts, refresh=False)
            point = outcome.point
            self.bar.update(0 if point in self.from_store else point.cost)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def _arc(text: str | None) -> tuple[str, str] | None:
    if text is None:
        return None
    related, sep, output = text.partition(":")
    if not sep or not related or not output:
        raise ConfigError(f"--arc must be FROM:TO (input pin:output pin), got {text!r}")
    return related, output


def _run(cfg: config.LibraryConfig, args: argparse.Namespace) -> int:
    if args.backend == "dask" and not args.scheduler:
        raise ConfigError("--backend dask needs --scheduler ADDRESS (e.g. tcp://host:8786)")
    if args.scheduler and args.backend != "dask":
        raise ConfigError("--scheduler is for --backend dask")
    cells = getattr(args, "cell", None)
    if getattr(args, "plan", False):
        jobs = args.jobs or sweep.default_jobs()
        print(estimate.render(estimate.estimate(cfg, cells, jobs)))
        return EXIT_OK
    arc = _arc(getattr(args, "arc", None))
    if arc is not None and (cells is None or len(cells) != 1):
        raise ConfigError("--arc needs exactly one --cell: the cell whose arc it is")
    code = EXIT_OK
    with _output_folder(cfg, args) as out, store_mod.Store(out / store_mod.FILE_NAME) as store:
        for lib in cfg.libraries():
            progress = _Progress(args.quiet, lib.name)
            try:
                result = flow.characterize(
                    lib,
                    cells=cells,
                    arc=arc,
                    jobs=args.jobs,
                    store=store,
                    scheduler=args.scheduler,
                    on_start=progress.start,
                    on_stored=progress.stored,
                    on_result=progress.result,
                    allow_gaps=args.allow_gaps,
                )
            finally:
                progress.close()
            written = flow.write(lib, result, out)
            _summary(lib.name, result, selective=cells is not None)
            saved = [p for p in written if p.parent.parent == out / faults.FOLDER]
            for path in written:
                if path not in saved:
                    print(f"wrote {path}")
            if saved:
                where = out / faults.FOLDER
                print(f"wrote {len(saved)} waveform file(s) of failed points under {where}")
            _gaps(lib.name, result, out)
            if result.failures:
                print(
                    f"{lib.name}: {len(result.failures)} point(s) failed; no Liberty file written:",
                    file=sys.stderr,
                )
                _list_faults(result, result.failures, out)
                # A point cut off by the window says which key to change: filling it would
                # hide a window too short, not a point the simulator could not do.
                if args.allow_gaps is None and not all(f.cut_off for f in result.failures):
                    print(
                        f"{lib.name}: rerun with --allow-gaps {' or '.join(gaps.METHODS)} to fill "
                        "them from measured neighbours (marked as filled)",
                        file=sys.stderr,
                    )
                code = EXIT_FAILED_POINTS
            elif args.fidelity:
                code = max(code, _check_fidelity(lib, result.cells, out, args, store))
    return code


LISTED = 20  # failed or filled points listed one by one; the rest are counted


def _list_faults(result: flow.RunResult, failures, out: Path) -> None:
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


def _gaps(name: str, result: flow.RunResult, out: Path) -> None:
    if not result.filled:
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


def _summary(name: str, result: flow.RunResult, *, selective: bool) -> None:
    print(
        f"{name}: {len(result.measurements)} points measured, {len(result.failures)} failed, "
        f"{len(result.toggles)} input toggles measured: "
        f"{result.simulated} simulated ({result.simulations} simulations), "
        f"{len(result.reused)} reused from the store; simulator time {result.sim_seconds:.2f} s "
        f"(all workers), wall time {result.wall_seconds:.2f} s"
    )
    for models, tables in result.stale_tables().items():
        arcs: dict[str, int] = {}
        for table in tables:
            words = table.split()
            arc = " ".join(words[:3] if words[1] == "pin" else words[:2])  # an arc, or a pin
            arcs[arc] = arcs.get(arc, 0) + 1
        listed = ", ".join(f"{arc} ({n})" for arc, n in arcs.items())
        why = (
            f"older than the model (model file {', '.join(models)} changed)"
            if models
            else "out of date (the testbench or the settings changed)"
        )
        print(f"{name}: {len(tables)} tables are {why}: {listed}")
    if result.stale and selective:
        print(f"{name}: run without --cell to bring every table up to date")
    for f in result.unmeasured[:20]:
        print(f"{name}: no hidden power: {f.message}")
    if result.left_out:
        print(
            f"{name}: left out {', '.join(result.left_out)}: the store does not hold all their "
            "points; run them once in full"
        )


def _diff(args: argparse.Namespace) -> int:
    if args.tolerance < 0:
        raise ConfigError(f"--tolerance must not be negative, got {args.tolerance}")
    old, new = diff.read(args.old), diff.read(args.new)
    comparison = diff.compare(old, new, args.tolerance)
    print(diff.report(comparison, str(args.old), str(args.new), args.top), end="")
    if args.html is not None:
        diff.write_html(args.html, comparison, old, new, str(args.old), str(args.new), args.top)
        print(f"wrote {args.html}")
    return EXIT_DIFFERENT if comparison.differs else EXIT_OK


def _check(args: argparse.Namespace) -> int:
    report = check.check(args.config)
    print(check.summary(report))
    return EXIT_OK if report.ok else EXIT_BAD_INPUT


def _load(cfg_path: Path | None, args: argparse.Namespace) -> config.LibraryConfig:
    """The config at ``cfg_path``; with None the demo's (its quick variant with --quick)."""
    cfg = config.load(cfg_path) if cfg_path is not None else demo.load(quick=args.quick)
    if args.jobs is not None and args.jobs < 1:
        raise ConfigError(f"--jobs must be at least 1, got {args.jobs}")
    return cfg


@contextlib.contextmanager
def _output_folder(cfg: config.LibraryConfig, args: argparse.Namespace) -> Iterator[Path]:
    """The output folder, made and held (``lock.FolderLock``) for as long as the command runs."""
    out = args.out or RUNS / cfg.name
    # Before the run, not after it: a folder that cannot be made would waste the whole sweep.
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot make the output folder: {exc.strerror}", file=out) from exc
    with lock.FolderLock(out):
        yield out


def _check_fidelity(
    cfg: config.LibraryConfig, cells, out: Path, args: argparse.Namespace, store: store_mod.Store
) -> int:
    progress = _Progress(args.quiet)
    try:
        report = fidelity.check(
            cfg,
            cells,
            jobs=args.jobs,
            store=store,
            on_start=progress.start,
            on_stored=progress.stored,
            on_result=progress.result,
        )
    finally:
        progress.close()
    written = fidelity.write(cfg, report, out, jobs=args.jobs)
    print("\n".join(fidelity.summary_lines(cfg, report)))
    for path in written:
        print(f"wrote {path}")
    return EXIT_FAILED_POINTS if report.failures else EXIT_OK


def _fidelity(args: argparse.Namespace) -> int:
    """Characterize (the tables are not written again), then check the tables off the grid."""
    cfg = _load(args.config, args)
    with _output_folder(cfg, args) as out, store_mod.Store(out / store_mod.FILE_NAME) as store:
        progress = _Progress(args.quiet)
        try:
            result = flow.characterize(
                cfg,
                cells=args.cell,
                jobs=args.jobs,
                store=store,
                on_start=progress.start,
                on_stored=progress.stored,
                on_result=progress.result,
            )
        finally:
            progress.close()
        if result.failures:
            print(
                f"{len(result.failures)} grid point(s) failed; no tables to check:",
                file=sys.stderr,
            )
            for f in result.failures[:20]:
                print(f"  {f.message}", file=sys.stderr)
            return EXIT_FAILED_POINTS
        # With a store the library holds every stored cell; the check is for the chosen ones.
        cells = [c for c in result.cells if args.cell is None or c.cell.name in args.cell]
        return _check_fidelity(cfg, cells, out, args, store)


def _grid_study(args: argparse.Namespace) -> int:
    cfg = _load(args.config, args)
    with _output_folder(cfg, args) as out:
        return _study(cfg, out, args)


def _study(cfg: config.LibraryConfig, out: Path, args: argparse.Namespace) -> int:
    progress = _Progress(args.quiet)

    def phase(total: int) -> None:  # two sweeps: a bar for each
        progress.close()
        progress.start(total)

    try:
        study = gridstudy.study(
            cfg,
            args.cell,
            args.arc,
            sizes=args.sizes,
            reference_points=args.reference,
            targets=args.target or (0.01,),
            jobs=args.jobs,
            on_start=phase,
            on_result=progress.result,
        )
    finally:
        progress.close()
    written = gridstudy.write(cfg, study, out)
    print("\n".join(gridstudy.summary_lines(cfg, study)))
    for path in written:
        print(f"wrote {path}")
    return EXIT_FAILED_POINTS if any(c.failures for c in study.candidates) else EXIT_OK


def _bench(args: argparse.Namespace) -> int:
    for option, value, least in (
        ("--jobs", args.jobs, 1),
        ("--naive-points", args.naive_points, 1),
        ("--params", args.params, 2),
        ("--repeat", args.repeat, 1),
    ):
        if value is not None and value < least:
            raise ConfigError(f"{option} must be at least {least}, got {value}")
    results = bench.run(
        jobs=args.jobs,
        naive_points=args.naive_points,
        params=args.params,
        repeat=args.repeat,
        libraries=tuple(args.library or bench.LIBRARIES),
    )
    print(bench.render(results))
    return EXIT_OK


class _Stderr(logging.StreamHandler):
    """Writes to the ``sys.stderr`` of the moment: a caller (a test, an embedding program) may
    replace it after the first command set the handler up."""

    @property  # type: ignore[override]
    def stream(self):
        return sys.stderr

    @stream.setter
    def stream(self, value) -> None:
        pass


def _show_warnings() -> None:
    """charflow's warnings (a worker that died, points re-run alone) go to stderr as lines."""
    log = logging.getLogger("charflow")
    if not log.handlers:
        handler = _Stderr()
        handler.setFormatter(logging.Formatter("charflow: %(message)s"))
        log.addHandler(handler)


def _copy_demo(args: argparse.Namespace) -> int:
    config_path = demo.copy_to(args.folder)
    print(f"copied the demo's config, cell templates and models into {args.folder}")
    print(f"edit them, then: charflow run {config_path}")
    return EXIT_OK


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    # Only the chosen command's options are built (see _parser): --help loads no command module.
    args = _parser(argv[0] if argv and argv[0] in COMMANDS else "").parse_args(argv)
    _show_warnings()
    try:
        if args.command == "run":
            return _run(_load(args.config, args), args)
        if args.command == "demo":
            return _run(_load(None, args), args)
        if args.command == "copy-demo":
            return _copy_demo(args)
        if args.command == "diff":
            return _diff(args)
        if args.command == "check":
            return _check(args)
        if args.command == "fidelity":
            return _fidelity(args)
        if args.command == "grid-study":
            return _grid_study(args)
        return _bench(args)
    except (ConfigError, NetlistError, FunctionalMismatchError, DiffError) as exc:
        print(f"charflow: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except CharflowError as exc:
        print(f"charflow: {exc}", file=sys.stderr)
        return EXIT_TROUBLE
    except KeyboardInterrupt:
        print("charflow: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
