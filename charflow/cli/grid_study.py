"""``charflow grid-study``: the smallest grid that meets a target error for one arc."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import TYPE_CHECKING

from charflow.cli import shared
from charflow.cli.shared import EXIT_FAILED_POINTS, EXIT_OK

# For the type checker only: at run time these modules load on first use (``deferred``).
if TYPE_CHECKING:
    from charflow.config.library import LibraryConfig

config = shared.deferred("charflow.config.library")
gridstudy = shared.deferred("charflow.analysis.gridstudy")
html_report = shared.deferred("charflow.analysis.report")

# Its line in charflow --help, and the first lines of its own --help.
SUMMARY = "find the smallest grid that meets a target error for one arc"
DESCRIPTION = (
    "Try grids of several sizes and spacings for one arc against a dense reference grid "
    "and report the smallest that meets each target error."
)


def options(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", type=Path, metavar="CONFIG", help="the library's TOML config")
    shared.output_options(p)
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


def command(args: argparse.Namespace) -> int:
    cfg = config.load(args.config)
    shared.check_jobs(args)
    with shared.output_folder(cfg.name, args) as out:
        return _study(cfg, out, args)


def _study(cfg: LibraryConfig, out: Path, args: argparse.Namespace) -> int:
    progress = shared.Progress(args.quiet)

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
    written = html_report.write_study(cfg, study, out)
    print("\n".join(gridstudy.summary_lines(cfg, study)))
    for path in written:
        print(f"wrote {path}")
    return EXIT_FAILED_POINTS if any(c.failures for c in study.candidates) else EXIT_OK
