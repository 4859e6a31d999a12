"""Start-up: the command-line module and its help load none of the heavy modules, and the
driver's fixed part (config, plan, testbenches) neither the measurers nor scipy.

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
from fixtures.driver_modules import NOT_IN_A_STORED_RUN, NOT_IN_DRIVER

ROOT = Path(__file__).resolve().parents[1]
CLI = ROOT / "charflow" / "cli"
SMALL = ROOT / "tests" / "data" / "small_l1.toml"
CELLS = 3  # small_l1's cells
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


def _fresh(code: str, arg: str) -> str:
    """What ``code`` prints in a fresh interpreter, given ``arg``; it must succeed."""
    done = subprocess.run(
        [sys.executable, "-c", code, arg],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
        stdin=subprocess.DEVNULL,
    )
    assert done.returncode == 0, done.stderr
    return done.stdout


def _loaded(argv: list[str] | None) -> set[str]:
    """The modules loaded in a fresh interpreter by importing charflow.cli, then main(argv)."""
    return set(json.loads(_fresh(PROBE, json.dumps(argv))))


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


# The driver's fixed part in a fresh interpreter: the command's modules (``flow.characterize``
# executed, so every import it makes at its top), the config, the plan and the testbenches;
# then each lazy binding used once, which must load what it defers.
FIXED = """\
import json, sys
from pathlib import Path
from charflow.cli import run
from charflow.execution import workers
from charflow.flow import characterize as flow
config = flow.shaped(run.config.load(Path(sys.argv[1])), store=None, jobs=1, scheduler=None)
plan = flow.planning.plan(config)
decks = [flow.build_deck(config, config.cell(c)) for c in {p.cell for p in plan.points}]
before = sorted(sys.modules)
assert callable(flow.spread_tables.tabulate) and callable(workers.registry.measure_chunk)
print(json.dumps({"before": before, "after": sorted(sys.modules), "decks": len(decks)}))
"""


def test_the_drivers_fixed_part_loads_neither_the_measurers_nor_scipy() -> None:
    found = json.loads(_fresh(FIXED, str(SMALL)).splitlines()[-1])
    assert found["decks"] == CELLS
    before, after = set(found["before"]), set(found["after"])
    assert not before & {*NOT_IN_DRIVER, *NOT_IN_A_STORED_RUN}
    # The check sees a module when it loads: the lazy bindings, used, bring in what they defer.
    assert {"scipy", "charflow.measurement.combinational"} <= after
