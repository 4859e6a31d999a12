"""The ``charflow`` command: parse, call the library, write, exit with a meaningful code.

Exit codes: 0 done; 1 the run finished but some points failed and were not filled
(``--allow-gaps``; no Liberty written), or ``diff`` found differences; 2 bad input (config,
netlist, function, a library diff cannot read); 3 simulator, store, cluster or output trouble.
"""

from __future__ import annotations

import argparse
import contextlib
import logging
import sys
from collections.abc import Iterator
from pathlib import Path

from . import (
    __version__,
    bench,
    check,
    config,
    diff,
    estimate,
    faults,
    fidelity,
    flow,
    gaps,
    gridstudy,
    sweep,
)
from .errors import (
    CharflowError,
    ConfigError,
    DiffError,
    FunctionalMismatchError,
    NetlistError,
    OutputError,
)
from .lock import FolderLock
from .resources import DEMO_CONFIG
from .store import FILE_NAME, Store

EXIT_OK, EXIT_FAILED_POINTS, EXIT_BAD_INPUT, EXIT_TROUBLE = 0, 1, 2, 3
EXIT_DIFFERENT = 1  # charflow diff: the libraries differ
RUNS = Path("runs")  # default outputs: runs/<library name> under the current folder


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="charflow", description=__doc__.splitlines()[0])
    parser.add_argument("--version", action="version", version=f"charflow {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    run = sub.add_parser("run", help="characterize the library a config describes")
    run.add_argument("config", type=Path)
    _common(run)
    _cluster(run)
    run.add_argument(
        "--cell",
        action="append",
        help="simulate only this cell (repeatable); the rest of the library comes from the store",
    )
    run.add_argument(
        "--arc",
        metavar="FROM:TO",
        help="with one --cell: only the arc from input FROM to output TO",
    )
    run.add_argument(
        "--plan",
        action="store_true",
        help="print the simulations per cell and arc and an estimated time; run no sweep",
    )

    check_cmd = sub.add_parser(
        "check", help="check the config and every cell's netlist and function; run no sweep"
    )
    check_cmd.add_argument("config", type=Path)

    demo = sub.add_parser("demo", help="characterize the bundled demo library")
    _common(demo)
    _cluster(demo)
    for p in (run, demo):
        p.add_argument(
            "--fidelity", action="store_true", help="then check the tables off their grid"
        )
        p.add_argument(
            "--allow-gaps",
            metavar="METHOD",
            choices=gaps.METHODS,
            help="fill failed points from measured neighbours by METHOD ("
            + " or ".join(gaps.METHODS)
            + "); the filled values are marked in the JSON and the Liberty file, never stored",
        )

    fid = sub.add_parser(
        "fidelity", help="re-simulate off the grid and report how accurate the tables are"
    )
    fid.add_argument("config", type=Path)
    _common(fid)
    fid.add_argument("--cell", action="append", help="only this cell (repeatable)")

    study = sub.add_parser(
        "grid-study", help="find the smallest grid that meets a target error for one arc"
    )
    study.add_argument("config", type=Path)
    _common(study)
    study.add_argument("--cell", required=True, help="the cell to study")
    study.add_argument("--arc", help="FROM:TO, related input and output (default: first arc)")
    study.add_argument(
        "--target",
        type=_fraction,
        action="append",
        help="largest relative error allowed, e.g. 1%% or 0.01 (repeatable; default 1%%)",
    )
    study.add_argument(
        "--sizes",
        type=_sizes,
        default=gridstudy.SIZES,
        help="points per axis to try, MIN:MAX (default 3:12)",
    )
    study.add_argument(
        "--reference",
        type=_reference,
        default=gridstudy.REFERENCE_POINTS,
        help=f"points per axis of the reference grid (default {gridstudy.REFERENCE_POINTS})",
    )

    bench_cmd = sub.add_parser(
        "bench", help="time charflow against the naive way and the simulator"
    )
    bench_cmd.add_argument("--jobs", type=int, help="worker processes (default: all cores)")
    bench_cmd.add_argument(
        "--library",
        action="append",
        choices=bench.LIBRARIES,
        help="only this library (repeatable; default: all)",
    )
    bench_cmd.add_argument(
        "--naive-points",
        type=int,
        default=bench.NAIVE_POINTS,
        help="points the naive way runs per library",
    )
    bench_cmd.add_argument(
        "--params",
        type=int,
        default=bench.KIT_PARAMS,
        help=".param lines in the foundry-style model file",
    )
    bench_cmd.add_argument(
        "--repeat", type=int, default=1, help="charflow runs per setting; fastest kept"
    )

    compare = sub.add_parser("diff", help="compare two libraries (Liberty or JSON) table by table")
    compare.add_argument("old", type=Path)
    compare.add_argument("new", type=Path)
    compare.add_argument("--top", type=int, default=10, help="largest changes to list (10)")
    compare.add_argument(
        "--tolerance",
        type=float,
        default=diff.TOLERANCE,
        help=f"relative change below which a table counts as unchanged ({diff.TOLERANCE:g})",
    )
    compare.add_argument("--html", type=Path, help="also write an HTML report with plots here")
    return parser


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
    p.add_argument("--out", type=Path, help="output folder (default: runs/<library name>)")
    p.add_argument("--jobs", type=int, help="worker processes (default: all cores)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def _cluster(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--backend",
        choices=("joblib", "dask"),
        default="joblib",
        help="joblib: worker processes on this machine (default); dask: an existing Dask cluster",
    )
    p.add_argument(
        "--scheduler", metavar="ADDRESS", help="the Dask scheduler, e.g. tcp://host:8786"
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
            from tqdm import tqdm

            # smoothing 0: the mean rate since the start, steadier than a recent one when
            # results come a worker's chunk at a time.
            self.bar = tqdm(
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


def _run(cfg_path: Path, args: argparse.Namespace) -> int:
    cfg = _load(cfg_path, args)
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
    with _output_folder(cfg, args) as out, Store(out / FILE_NAME) as store:
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


def _load(cfg_path: Path, args: argparse.Namespace) -> config.LibraryConfig:
    cfg = config.load(cfg_path)
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
    with FolderLock(out):
        yield out


def _check_fidelity(
    cfg: config.LibraryConfig, cells, out: Path, args: argparse.Namespace, store: Store
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
    with _output_folder(cfg, args) as out, Store(out / FILE_NAME) as store:
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


def _show_warnings() -> None:
    """charflow's warnings (a worker that died, points re-run alone) go to stderr as lines."""
    log = logging.getLogger("charflow")
    if not log.handlers:
        handler = logging.StreamHandler(sys.stderr)
        handler.setFormatter(logging.Formatter("charflow: %(message)s"))
        log.addHandler(handler)


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    _show_warnings()
    try:
        if args.command == "run":
            return _run(args.config, args)
        if args.command == "diff":
            return _diff(args)
        if args.command == "check":
            return _check(args)
        if args.command == "fidelity":
            return _fidelity(args)
        if args.command == "grid-study":
            return _grid_study(args)
        if args.command == "bench":
            return _bench(args)
        return _run(DEMO_CONFIG, args)
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
