"""The installed ``charflow`` command, run as a user runs it: its exit codes and its messages.

A bad input must end in a non-zero exit (2 for bad input, 3 for output trouble, as the cli
module documents) and one ``charflow: ...`` line on stderr that locates the problem, never a
Python traceback.
"""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest
from liberty.parser import parse_liberty

from charflow import __version__
from charflow.cli import main as cli
from charflow.config import demo
from charflow.config.resources import DEMO_CONFIG, MODEL_DIR, TEMPLATE_DIR

ROOT = Path(__file__).resolve().parents[1]
SMALL = ROOT / "tests" / "data" / "small_l1.toml"
MODEL = (MODEL_DIR / "vellum90_l1.lib").as_posix()
INV = (TEMPLATE_DIR / "cells" / "inv.sp.j2").as_posix()
EXIT_BAD_INPUT, EXIT_TROUBLE = 2, 3


def _config(function: str = "!A", grid: str = "slew = [0.01, 0.1]\nload = [0.001, 0.01]") -> str:
    return f"""\
[library]
name = "cfg_cli"

[process]
models = [{{ file = "{MODEL}", section = "tt" }}]
vdd = 1.2

[grid]
{grid}

[[cell]]
name = "QINV_P1"
template = "{INV}"
params = {{ wn = 0.4e-6, wp = 0.8e-6, l = 0.1e-6 }}
inputs = ["A"]
outputs = {{ Y = "{function}" }}
"""


def _charflow(*args: str | Path, cwd: Path) -> subprocess.CompletedProcess[str]:
    exe = shutil.which("charflow")
    if exe is None:
        pytest.fail("the charflow command is not on PATH; install the package (pip install -e .)")
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; these tests need it")
    return subprocess.run(
        [exe, *map(str, args)],
        capture_output=True,
        text=True,
        cwd=cwd,
        timeout=120,
        check=False,
        stdin=subprocess.DEVNULL,
    )


def _bad(done: subprocess.CompletedProcess[str], code: int, *names: str | Path) -> str:
    """Assert a clean failure with exit ``code``; return its one message line."""
    assert "Traceback" not in done.stderr, done.stderr
    assert done.returncode == code, done.stderr
    lines = done.stderr.splitlines()
    assert len(lines) == 1, done.stderr
    (line,) = lines
    assert line.startswith("charflow: "), line
    for name in names:
        assert str(name) in line, (name, line)
    return line


def test_run_writes_the_library(tmp_path: Path) -> None:
    out = tmp_path / "out"
    done = _charflow("run", SMALL, "--out", out, "--jobs", "2", "--quiet", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr
    lib, js = out / "small_l1.lib", out / "small_l1.json"
    assert lib.is_file() and js.is_file()
    assert f"wrote {lib}" in done.stdout and f"wrote {js}" in done.stdout
    assert "90 points measured, 0 failed" in done.stdout
    # Read with the independent liberty-parser (Thomas Kramer, liberty-parser 0.0.29).
    parsed = parse_liberty(lib.read_text(encoding="utf-8"))
    assert [c.args[0] for c in parsed.get_groups("cell")] == ["QINV_P1", "QNAND2_P1", "QNOR2_P1"]


def test_missing_config_file(tmp_path: Path) -> None:
    path = tmp_path / "cfg_absent.toml"
    done = _charflow("run", path, "--out", tmp_path / "out", cwd=tmp_path)
    _bad(done, EXIT_BAD_INPUT, path, "not found")


def test_invalid_toml(tmp_path: Path) -> None:
    path = tmp_path / "cfg_bad.toml"
    path.write_text(_config().replace("[grid]", "[grid"), encoding="utf-8")
    done = _charflow("run", path, "--out", tmp_path / "out", cwd=tmp_path)
    _bad(done, EXIT_BAD_INPUT, path, "not valid TOML", "line 8")


def test_unknown_key(tmp_path: Path) -> None:
    path = tmp_path / "cfg_key.toml"
    text = _config().replace('inputs = ["A"]', 'inputs = ["A"]\ncolour = 1')
    path.write_text(text, encoding="utf-8")
    done = _charflow("run", path, "--out", tmp_path / "out", cwd=tmp_path)
    _bad(done, EXIT_BAD_INPUT, f"file {path}, key cell[0].colour, cell QINV_P1:", "unknown key")


def test_bad_grid(tmp_path: Path) -> None:
    path = tmp_path / "cfg_grid.toml"
    path.write_text(_config(grid="slew = [0.1, 0.01]\nload = [0.001, 0.01]"), encoding="utf-8")
    done = _charflow("run", path, "--out", tmp_path / "out", cwd=tmp_path)
    _bad(done, EXIT_BAD_INPUT, f"file {path}, key grid.slew:", "strictly increasing")


def test_functional_mismatch(tmp_path: Path) -> None:
    # The inverter's netlist against a buffer's function: its DC levels give it away.
    path = tmp_path / "cfg_func.toml"
    path.write_text(_config(function="A"), encoding="utf-8")
    out = tmp_path / "out"
    done = _charflow("run", path, "--out", out, cwd=tmp_path)
    _bad(done, EXIT_BAD_INPUT, "cell QINV_P1", "pin Y", "vector A=0")
    assert not any(out.glob("*.lib"))


def test_unwritable_out(tmp_path: Path) -> None:
    # A folder below a plain file cannot be made, even by root, whom permissions do not stop.
    blocker = tmp_path / "cfg_file"
    blocker.write_text("not a folder\n", encoding="utf-8")
    out = blocker / "out"
    done = _charflow("run", SMALL, "--out", out, "--quiet", cwd=tmp_path)
    _bad(done, EXIT_TROUBLE, out, "output folder")


def test_zero_jobs(tmp_path: Path) -> None:
    done = _charflow("run", SMALL, "--out", tmp_path / "out", "--jobs", "0", cwd=tmp_path)
    _bad(done, EXIT_BAD_INPUT, "--jobs", "got 0")
    assert not (tmp_path / "out").exists()


def test_version(tmp_path: Path) -> None:
    done = _charflow("--version", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == f"charflow {__version__}"


def test_demo_help(tmp_path: Path) -> None:
    done = _charflow("demo", "--help", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith("usage: charflow demo")
    for option in ("--out", "--jobs", "--quiet"):
        assert option in done.stdout


def test_help_lists_every_command_with_examples(tmp_path: Path) -> None:
    done = _charflow("--help", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    for name in cli.COMMANDS:
        assert f"    {name}" in done.stdout, name
    assert "examples:" in done.stdout and "exit status:" in done.stdout


def test_every_option_of_every_command_has_a_help_text() -> None:
    (commands,) = (a for a in cli._parser()._actions if a.choices and a.dest == "command")
    assert set(commands.choices) == set(cli.COMMANDS)
    for name, parser in commands.choices.items():
        assert parser.description, name
        for action in parser._actions:
            assert action.help, (name, action.dest)


def test_copy_demo_then_check_the_copy(tmp_path: Path) -> None:
    done = _charflow("copy-demo", "mine", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    copied = tmp_path / "mine" / "demo" / "vellum90.toml"
    assert copied.read_bytes() == DEMO_CONFIG.read_bytes()
    assert f"charflow run {Path('mine') / 'demo' / 'vellum90.toml'}" in done.stdout
    # A second copy would overwrite the user's edits: refused before anything is written.
    _bad(_charflow("copy-demo", "mine", cwd=tmp_path), EXIT_TROUBLE, "vellum90.toml", "exists")
    # The copy's relative paths to its templates and models hold.
    checked = _charflow("check", copied, cwd=tmp_path)
    assert checked.returncode == 0, checked.stdout + checked.stderr


def test_quick_demo_is_the_demo_on_thinned_grids_and_level1_models() -> None:
    full, quick = demo.load(), demo.load(quick=True)
    assert quick.name == full.name + demo.QUICK_SUFFIX
    assert [c.name for c in quick.cells] == [c.name for c in full.cells]
    assert {m.path for m in quick.process.models} == {demo.QUICK_MODELS}
    for small, big in zip(quick.cells, full.cells, strict=True):
        for axis in ("slew", "load", "related_load", "constraint_slew", "clock_slew"):
            kept, shipped = getattr(small.grid, axis), getattr(big.grid, axis)
            assert len(kept) <= 3 and set(kept) <= set(shipped), (small.name, axis)
            if shipped:  # the table's range is the shipped one: its ends are kept
                assert (kept[0], kept[-1]) == (shipped[0], shipped[-1]), (small.name, axis)
