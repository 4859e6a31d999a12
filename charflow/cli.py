"""The ``charflow`` command: parse, call the library, write, exit with a meaningful code.

Exit codes: 0 done; 1 the run finished but some points failed (no Liberty written);
2 bad input (config, netlist, function); 3 simulator or output trouble.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from . import __version__, bench, config, estimate, fidelity, flow, gridstudy, sweep
from .errors import (
    CharflowError,
    ConfigError,
    FunctionalMismatchError,
    NetlistError,
    OutputError,
)

EXIT_OK, EXIT_FAILED_POINTS, EXIT_BAD_INPUT, EXIT_TROUBLE = 0, 1, 2, 3
PROJECT = Path(__file__).resolve().parent.parent
DEMO_CONFIG = PROJECT / "demo" / "vellum90.toml"
RUNS = PROJECT / "runs"


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="charflow", description=__doc__.splitlines()[0])
    parser.add_argument("--version", action="version", version=f"charflow {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    run = sub.add_parser("run", help="characterize the library a config describes")
    run.add_argument("config", type=Path)
    _common(run)
    run.add_argument("--cell", action="append", help="only this cell (repeatable)")
    run.add_argument(
        "--plan",
        action="store_true",
        help="print the simulations per cell and arc and an estimated time; run no sweep",
    )

    demo = sub.add_parser("demo", help="characterize the bundled demo library")
    _common(demo)
    for p in (run, demo):
        p.add_argument(
            "--fidelity", action="store_true", help="then check the tables off their grid"
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


class _Progress:
    """A tqdm bar on a terminal; nothing when output is redirected or --quiet."""

    def __init__(self, quiet: bool) -> None:
        self.enabled = not quiet and sys.stderr.isatty()
        self.bar = None
        self.failed = 0

    def start(self, total: int) -> None:
        if self.enabled:
            from tqdm import tqdm

            self.bar = tqdm(total=total, unit="pt", desc="points", dynamic_ncols=True)

    def result(self, outcome: object) -> None:
        if isinstance(outcome, flow.Failure):
            self.failed += 1
        if self.bar is not None:
            self.bar.update(1)
            if self.failed:
                self.bar.set_postfix(failed=self.failed)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def _run(cfg_path: Path, args: argparse.Namespace) -> int:
    if getattr(args, "plan", False):
        cfg = _load(cfg_path, args)
        jobs = args.jobs or sweep.default_jobs()
        print(estimate.render(estimate.estimate(cfg, getattr(args, "cell", None), jobs)))
        return EXIT_OK
    cfg, out = _setup(cfg_path, args)
    progress = _Progress(args.quiet)
    try:
        result = flow.characterize(
            cfg,
            cells=getattr(args, "cell", None),
            jobs=args.jobs,
            on_start=progress.start,
            on_result=progress.result,
        )
    finally:
        progress.close()
    written = flow.write(cfg, result, out)
    per_sim = result.sim_seconds / max(result.simulations, 1)
    print(
        f"{cfg.name}: {len(result.measurements)} points measured, {len(result.failures)} failed, "
        f"{len(result.toggles)} input toggles measured, "
        f"{result.simulations} simulations in {result.wall_seconds:.1f} s wall "
        f"({per_sim * 1e3:.1f} ms simulator time each)"
    )
    for path in written:
        print(f"wrote {path}")
    for f in result.unmeasured[:20]:
        print(f"no hidden power: cell {f.point.cell}, {f.point.label}: {f.reason}")
    if result.failures:
        print(f"{len(result.failures)} point(s) failed; no Liberty file written:", file=sys.stderr)
        for f in result.failures[:20]:
            print(f"  cell {f.point.cell}, {f.point.label}: {f.reason}", file=sys.stderr)
        return EXIT_FAILED_POINTS
    if args.fidelity:
        return _check_fidelity(cfg, result.cells, out, args)
    return EXIT_OK


def _load(cfg_path: Path, args: argparse.Namespace) -> config.LibraryConfig:
    cfg = config.load(cfg_path)
    if args.jobs is not None and args.jobs < 1:
        raise ConfigError(f"--jobs must be at least 1, got {args.jobs}")
    return cfg


def _setup(cfg_path: Path, args: argparse.Namespace) -> tuple[config.LibraryConfig, Path]:
    cfg = _load(cfg_path, args)
    out = args.out or RUNS / cfg.name
    # Before the run, not after it: a folder that cannot be made would waste the whole sweep.
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot make the output folder: {exc.strerror}", file=out) from exc
    return cfg, out


def _check_fidelity(cfg: config.LibraryConfig, cells, out: Path, args: argparse.Namespace) -> int:
    progress = _Progress(args.quiet)
    try:
        report = fidelity.check(
            cfg, cells, jobs=args.jobs, on_start=progress.start, on_result=progress.result
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
    cfg, out = _setup(args.config, args)
    progress = _Progress(args.quiet)
    try:
        result = flow.characterize(
            cfg, cells=args.cell, jobs=args.jobs, on_start=progress.start, on_result=progress.result
        )
    finally:
        progress.close()
    if result.failures:
        print(f"{len(result.failures)} grid point(s) failed; no tables to check:", file=sys.stderr)
        for f in result.failures[:20]:
            print(f"  cell {f.point.cell}, {f.point.label}: {f.reason}", file=sys.stderr)
        return EXIT_FAILED_POINTS
    return _check_fidelity(cfg, result.cells, out, args)


def _grid_study(args: argparse.Namespace) -> int:
    cfg, out = _setup(args.config, args)
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


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    try:
        if args.command == "run":
            return _run(args.config, args)
        if args.command == "fidelity":
            return _fidelity(args)
        if args.command == "grid-study":
            return _grid_study(args)
        if args.command == "bench":
            return _bench(args)
        return _run(DEMO_CONFIG, args)
    except (ConfigError, NetlistError, FunctionalMismatchError) as exc:
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
