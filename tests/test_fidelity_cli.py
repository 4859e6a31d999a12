"""The ``[fidelity]`` config section and the commands ``charflow fidelity``, ``charflow run
--fidelity`` and ``charflow grid-study``, run as a user runs them."""

from __future__ import annotations

import argparse
import shutil
import subprocess
import tomllib
import types
from pathlib import Path

import pytest

from charflow.cli import shared
from charflow.config import library as config
from charflow.config.library import Fidelity
from charflow.records.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]
SMALL = ROOT / "tests" / "data" / "small_l1.toml"
EXIT_BAD_INPUT = 2


def _doc(fidelity: dict | None = None) -> dict:
    doc = tomllib.loads(SMALL.read_text(encoding="utf-8"))
    if fidelity is not None:
        doc["fidelity"] = fidelity
    return doc


def test_fidelity_defaults() -> None:
    assert config.parse(_doc(), SMALL).fidelity == Fidelity()


def test_fidelity_keys_in_library_units() -> None:
    doc = _doc({"random_points": 5, "seed": 9, "rel_floor": 0.002})
    got = config.parse(doc, SMALL).fidelity
    assert (got.random_points, got.seed) == (5, 9)
    assert got.rel_floor == pytest.approx(0.002e-9, rel=1e-15, abs=0)


@pytest.mark.parametrize(
    ("key", "value", "message"),
    [
        ("random_points", -1, "must not be negative"),
        ("random_points", 2.5, "must be int"),
        ("seed", -3, "must not be negative"),
        ("rel_floor", 0, "must be greater than 0"),
        ("rel_floor", True, "must be float"),
        ("colour", 1, "unknown key"),
    ],
)
def test_bad_fidelity_key(key: str, value: object, message: str) -> None:
    with pytest.raises(ConfigError, match=message) as info:
        config.parse(_doc({key: value}), SMALL)
    assert info.value.context["key"] == f"fidelity.{key}"


# --- the commands -----------------------------------------------------------------------------


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
        timeout=300,
        check=False,
        stdin=subprocess.DEVNULL,
    )


def _ok(done: subprocess.CompletedProcess[str]) -> None:
    assert "Traceback" not in done.stderr, done.stderr
    assert done.returncode == 0, done.stderr


def test_fidelity_command(tmp_path: Path) -> None:
    out = tmp_path / "out"
    done = _charflow("fidelity", SMALL, "--out", out, "--jobs", "1", "--quiet", cwd=tmp_path)
    _ok(done)
    for name in ("small_l1.fidelity.json", "small_l1.fidelity.html"):
        assert (out / name).is_file()
        assert f"wrote {out / name}" in done.stdout
    assert not (out / "small_l1.lib").exists()  # it checks the tables, it does not write them
    assert "fidelity of small_l1: 20 tables" in done.stdout
    assert "relative error floor 0.001 ns" in done.stdout


def test_run_with_fidelity(tmp_path: Path) -> None:
    out = tmp_path / "out"
    done = _charflow(
        "run",
        SMALL,
        "--cell",
        "QINV_P1",
        "--fidelity",
        "--out",
        out,
        "--jobs",
        "1",
        "--quiet",
        cwd=tmp_path,
    )
    _ok(done)
    for name in ("small_l1.lib", "small_l1.json", "small_l1.fidelity.json"):
        assert (out / name).is_file()
    assert "fidelity of small_l1: 4 tables" in done.stdout


def test_grid_study_command(tmp_path: Path) -> None:
    out = tmp_path / "out"
    done = _charflow(
        "grid-study",
        SMALL,
        "--cell",
        "QINV_P1",
        "--arc",
        "A:Y",
        "--sizes",
        "3:4",
        "--reference",
        "6",
        "--target",
        "20%",
        "--target",
        "0.1",
        "--out",
        out,
        "--jobs",
        "1",
        "--quiet",
        cwd=tmp_path,
    )
    _ok(done)
    stem = out / "small_l1.QINV_P1.A-Y.gridstudy"
    assert Path(f"{stem}.json").is_file() and Path(f"{stem}.png").is_file()
    assert "target 20 %:" in done.stdout and "target 10 %:" in done.stdout


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (("--target", "0"), "--target"),
        (("--target", "ten"), "--target"),
        (("--sizes", "5:3"), "--sizes"),
        (("--reference", "3"), "--reference"),
        (("--arc", "B:Y"), "no arc 'B:Y'"),
    ],
)
def test_grid_study_bad_options(tmp_path: Path, args: tuple[str, ...], message: str) -> None:
    done = _charflow("grid-study", SMALL, "--cell", "QINV_P1", *args, cwd=tmp_path)
    assert "Traceback" not in done.stderr
    assert done.returncode == EXIT_BAD_INPUT, done.stderr
    assert message in done.stderr


def test_failed_grid_points_leave_no_tables_to_check(monkeypatch, capsys) -> None:
    """fidelity and paths read the tables: a failed grid point means none, listed on stderr
    (the same ``shared.tables`` serves both commands)."""
    failure = types.SimpleNamespace(message="cell QINV_P1, arc A->Y: no crossing")
    result = types.SimpleNamespace(failures=(failure,))
    fake = types.SimpleNamespace(characterize=lambda cfg, **kw: result)
    monkeypatch.setattr(shared, "flow", fake)
    args = argparse.Namespace(quiet=True, cell=None, jobs=1)
    assert shared.tables(config.load(SMALL), args, None, "to check") is None
    err = capsys.readouterr().err
    assert "1 grid point(s) failed; no tables to check:" in err and "QINV_P1" in err
