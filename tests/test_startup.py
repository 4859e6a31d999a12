"""Start-up: the command-line module and its help load none of the heavy modules.

numpy, scipy, matplotlib, jinja2, joblib and PySpice cost seconds to import; charflow/cli
loads them only when a command uses them. Each check runs in a fresh interpreter, since this
test session has imported them all already. Presence in ``sys.modules`` is the check, not a
time: a time depends on the machine.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

CLI = Path(__file__).resolve().parents[1] / "charflow" / "cli"
HEAVY = ("matplotlib", "scipy", "scipy.stats", "numpy", "jinja2", "joblib", "PySpice")

PROBE = """\
import contextlib, io, json, sys
from charflow.cli import main as cli
argv = json.loads(sys.argv[1])
if argv is not None:
    with contextlib.redirect_stdout(io.StringIO()), contextlib.suppress(SystemExit):
        cli.main(argv)
print(json.dumps(sorted(sys.modules)))
"""


def _loaded(argv: list[str] | None) -> set[str]:
    """The modules loaded in a fresh interpreter by importing charflow.cli, then main(argv)."""
    done = subprocess.run(
        [sys.executable, "-c", PROBE, json.dumps(argv)],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
        stdin=subprocess.DEVNULL,
    )
    assert done.returncode == 0, done.stderr
    return set(json.loads(done.stdout))


def test_importing_the_command_line_module_loads_no_heavy_module() -> None:
    loaded = _loaded(None)
    # Every module of the command line is imported, so the check covers each command's module.
    commands = {f"charflow.cli.{p.stem}" for p in CLI.glob("*.py") if p.stem != "__init__"}
    assert commands <= loaded, sorted(commands - loaded)
    assert not loaded & set(HEAVY), sorted(loaded & set(HEAVY))


@pytest.mark.parametrize("argv", [["--help"], ["--version"], ["no-such-command"]])
def test_help_version_and_usage_errors_load_no_heavy_module(argv: list[str]) -> None:
    loaded = _loaded(argv)
    assert not loaded & set(HEAVY), sorted(loaded & set(HEAVY))


def test_a_command_loads_what_it_uses() -> None:
    # The deferred modules do load when a command needs them: the check of the test itself.
    assert {"numpy", "charflow.tables.gaps"} <= _loaded(["demo", "--help"])
