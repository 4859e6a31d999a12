"""The ``charflow`` command: its parser, the table of commands, and ``main``.

Each command lives in its own module of ``charflow.cli`` (``options`` adds its options,
``command`` runs it and returns the exit code); ``shared`` holds what they share: exit codes,
lazy module binding, the progress bar, errors turned into exit codes.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable
from dataclasses import dataclass

from charflow import __version__
from charflow.cli import check, copy_demo, demo, diff, fidelity, grid_study, run, shared


@dataclass(frozen=True, slots=True)
class Command:
    """A command: its line in charflow --help, the first lines of its own --help, the function
    adding its options, and the function running it (returning the exit code)."""

    summary: str
    description: str
    options: Callable[[argparse.ArgumentParser], None]
    run: Callable[[argparse.Namespace], int]


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


COMMANDS: dict[str, Command] = {
    "run": Command(
        summary="characterize the library a config describes",
        description=(
            "Characterize the library a config describes and write runs/<library name>/<library "
            "name>.lib and .json. Points already in the folder's result store are reused."
        ),
        options=run.options,
        run=run.command,
    ),
    "check": Command(
        summary="check a config and every cell's netlist and function; simulate no sweep",
        description=(
            "Check a config: every key, every cell's netlist and that it implements its declared "
            "function (a DC run per input vector). Lists every problem found."
        ),
        options=check.options,
        run=check.command,
    ),
    "demo": Command(
        summary="characterize the bundled demo library",
        description=(
            "Characterize the bundled demo library: the invented vellum90 process and its cells "
            "(inverters, a buffer, gates, a two-output cell and two flip-flops). Writes "
            "runs/vellum90_tt (runs/vellum90_tt_quick with --quick) in the current folder."
        ),
        options=demo.options,
        run=demo.command,
    ),
    "copy-demo": Command(
        summary="copy the demo's config, cell templates and models into a folder, to edit and run",
        description=(
            "Copy the demo's config, cell templates and models into FOLDER, keeping their layout; "
            "then edit them and run charflow run FOLDER/demo/vellum90.toml."
        ),
        options=copy_demo.options,
        run=copy_demo.command,
    ),
    "fidelity": Command(
        summary="re-simulate off the grid and report how accurate the tables are",
        description=(
            "Characterize (reusing the result store), then re-simulate points between the grid's "
            "points and report each table's interpolation error."
        ),
        options=fidelity.options,
        run=fidelity.command,
    ),
    "grid-study": Command(
        summary="find the smallest grid that meets a target error for one arc",
        description=(
            "Try grids of several sizes and spacings for one arc against a dense reference grid "
            "and report the smallest that meets each target error."
        ),
        options=grid_study.options,
        run=grid_study.command,
    ),
    "diff": Command(
        summary="compare two libraries (Liberty or JSON) table by table",
        description=(
            "Compare two libraries (Liberty or JSON) table by table and list the largest changes."
        ),
        options=diff.options,
        run=diff.command,
    ),
}


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
    for name, entry in COMMANDS.items():
        p = sub.add_parser(name, help=entry.summary, description=entry.description)
        if command is None or command == name:
            entry.options(p)
    return parser


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    # Only the chosen command's options are built (see _parser): --help executes no deferred module.
    args = _parser(argv[0] if argv and argv[0] in COMMANDS else "").parse_args(argv)
    shared.show_warnings()
    return shared.guarded(COMMANDS[args.command].run, args)


if __name__ == "__main__":
    sys.exit(main())
