"""``python -m benchmarks``: the speed benchmark's command line (see benchmarks/speed.py).

Exit codes: 0 done; 2 bad arguments (argparse); 3 charflow or the simulator failed.
"""

from __future__ import annotations

import argparse
import sys

from charflow.records.errors import CharflowError

from . import speed

EXIT_OK, EXIT_TROUBLE = 0, 3

DESCRIPTION = """\
Time charflow's sweep against one simulator run per point (the naive way) and against the
simulator's own time: the demo's cells on both demo model sets and on a generated
foundry-style model file. Absolute times drift with the machine's load: read the ratios.
Run from the repository's root folder; see docs/speed.md."""


def _at_least(least: int):
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError as exc:
            raise argparse.ArgumentTypeError(f"not a whole number: {text!r}") from exc
        if value < least:
            raise argparse.ArgumentTypeError(f"must be at least {least}, got {value}")
        return value

    return parse


def parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="python -m benchmarks", description=DESCRIPTION)
    p.add_argument(
        "--jobs", type=_at_least(1), metavar="N", help="worker processes (default: one per core)"
    )
    p.add_argument(
        "--library",
        action="append",
        choices=speed.LIBRARIES,
        help="only this library (repeatable; default: all)",
    )
    p.add_argument(
        "--naive-points",
        type=_at_least(1),
        default=speed.NAIVE_POINTS,
        metavar="N",
        help=f"points the naive way runs per library (default {speed.NAIVE_POINTS})",
    )
    p.add_argument(
        "--params",
        type=_at_least(2),
        default=speed.KIT_PARAMS,
        metavar="N",
        help=f".param lines in the foundry-style model file (default {speed.KIT_PARAMS})",
    )
    p.add_argument(
        "--repeat",
        type=_at_least(1),
        default=1,
        metavar="N",
        help="charflow runs per setting; the fastest is kept (default 1)",
    )
    return p


def main(argv: list[str] | None = None) -> int:
    args = parser().parse_args(argv)
    try:
        results = speed.run(
            jobs=args.jobs,
            naive_points=args.naive_points,
            params=args.params,
            repeat=args.repeat,
            libraries=tuple(args.library or speed.LIBRARIES),
        )
    except CharflowError as exc:
        print(f"benchmarks: {exc}", file=sys.stderr)
        return EXIT_TROUBLE
    except KeyboardInterrupt:
        print("benchmarks: interrupted", file=sys.stderr)
        return 130
    print(speed.render(results))
    return EXIT_OK


if __name__ == "__main__":
    sys.exit(main())
