"""``charflow demo``: characterize the bundled demo library, as ``run`` does a config."""

from __future__ import annotations

import argparse

from charflow.cli import run, shared

demo = shared.deferred("charflow.config.demo")


def options(p: argparse.ArgumentParser) -> None:
    shared.output_options(p)
    run.cluster_options(p)
    p.add_argument(
        "--quick",
        action="store_true",
        help="a quick trial: every grid axis cut to its first, middle and last value and the "
        "level-1 demo models; the library is named vellum90_tt_quick",
    )
    run.finish_options(p)


def command(args: argparse.Namespace) -> int:
    cfg = demo.load(quick=args.quick)
    shared.check_jobs(args)
    return run.characterize(cfg, args)
