"""The ``charflow`` command: its parser, the table of commands, and ``main``.

Each command lives in its own module of ``charflow.cli`` (``SUMMARY`` and ``DESCRIPTION`` for
its help, ``options`` adds its options, ``command`` runs it and returns the exit code);
``shared`` holds what they share: exit codes, lazy module binding, the progress bar, errors
turned into exit codes.
"""

from __future__ import annotations

import argparse
import os
import sys
import types

from charflow import __version__
from charflow.cli import check, copy_demo, demo, diff, fidelity, grid_study, paths, run, shared

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
  3  trouble with the simulator, the result store, the cluster or the output folder
  141  the reader of charflow's output closed it (e.g. "| head"); what was written stays"""


# Each command: a module with SUMMARY (its line in charflow --help), DESCRIPTION (the first
# lines of its own --help), options(parser) and command(args) -> exit code.
COMMANDS: dict[str, types.ModuleType] = {
    "run": run,
    "check": check,
    "demo": demo,
    "copy-demo": copy_demo,
    "fidelity": fidelity,
    "grid-study": grid_study,
    "paths": paths,
    "diff": diff,
}


def _parser(command: str | None = None) -> argparse.ArgumentParser:
    """The command-line parser. With ``command``, only that command gets its options ("" for
    none): the options take their defaults from the modules the command uses, which loads them."""
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
    for name, module in COMMANDS.items():
        p = sub.add_parser(name, help=module.SUMMARY, description=module.DESCRIPTION)
        if command is None or command == name:
            module.options(p)
    return parser


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    try:
        # Only the chosen command's options are built (see _parser): --help executes no
        # deferred module.
        args = _parser(argv[0] if argv and argv[0] in COMMANDS else "").parse_args(argv)
        shared.show_warnings()
        code = shared.guarded(COMMANDS[args.command].command, args)
        sys.stdout.flush()
    except BrokenPipeError:
        # The reader went away: no traceback, and none again when Python flushes stdout at
        # exit (the recipe of Python's documentation, module signal, "Note on SIGPIPE").
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return shared.EXIT_PIPE_CLOSED
    return code


if __name__ == "__main__":
    sys.exit(main())
