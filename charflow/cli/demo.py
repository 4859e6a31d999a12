"""``charflow demo``: characterize the bundled demo library, as ``run`` does a config."""

from __future__ import annotations

import argparse

from charflow.cli import run, shared

demo = shared.deferred("charflow.config.demo")

# Its line in charflow --help, and the first lines of its own --help.
SUMMARY = "characterize the bundled demo library"
DESCRIPTION = (
    "Characterize the bundled demo library: the invented vellum90 process and its cells "
    "(inverters, a buffer, gates, a two-output cell and two flip-flops). Writes "
    "runs/vellum90_tt (runs/vellum90_tt_quick with --quick) in the current folder."
)


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
