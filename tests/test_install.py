"""The package as a user installs it: a wheel in a fresh virtual environment, run from a folder
that is neither the source tree nor the installed package.

The wheel is built from a copy of the sources (setuptools writes build/ and *.egg-info beside
the sources it builds) with this environment's setuptools, and installed with --no-deps and
--no-index: the fresh environment finds the dependencies in this one through a .pth file, so
the test needs no package index and installs nothing twice. Only charflow comes from the wheel,
which the test checks.
"""

from __future__ import annotations

import os
import shutil
import site
import subprocess
import sys
from pathlib import Path

import pytest

from charflow import __version__
from charflow.config import library as config

ROOT = Path(__file__).resolve().parents[1]
SOURCES = ("pyproject.toml", "README.md", "charflow")  # what the wheel is built from
DEV_CACHES = {".venv", ".git", "__pycache__", ".pytest_cache", ".ruff_cache", ".hypothesis"}
BUILD_TIMEOUT = 300  # s, generous bounds on a shared 2-core machine, not assertions
RUN_TIMEOUT = 600


def _call(*args: str | Path, cwd: Path, timeout: float = RUN_TIMEOUT) -> str:
    done = subprocess.run(
        [str(a) for a in args],
        cwd=cwd,
        capture_output=True,
        text=True,
        timeout=timeout,
        check=False,
        stdin=subprocess.DEVNULL,
        env={**os.environ, "PIP_NO_INPUT": "1"},
    )
    assert done.returncode == 0, f"{args}: exit {done.returncode}\n{done.stdout}\n{done.stderr}"
    assert "Traceback" not in done.stderr, done.stderr
    return done.stdout


def _snapshot(folder: Path) -> dict[str, tuple[int, int]]:
    """Every file under ``folder`` (development caches left out) with its size and mtime."""
    found = {}
    for dirpath, dirnames, filenames in os.walk(folder):
        dirnames[:] = [d for d in dirnames if d not in DEV_CACHES and not d.endswith(".egg-info")]
        for name in filenames:
            stat = (Path(dirpath) / name).stat()
            found[os.path.relpath(Path(dirpath) / name, folder)] = (stat.st_size, stat.st_mtime_ns)
    return found


@pytest.fixture(scope="module")
def installed(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The bin folder of a fresh virtual environment with charflow installed from its wheel."""
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; the installed charflow needs it")
    tmp = tmp_path_factory.mktemp("install")
    src = tmp / "src"
    src.mkdir()
    for name in SOURCES:
        if (ROOT / name).is_dir():
            shutil.copytree(ROOT / name, src / name, ignore=shutil.ignore_patterns(*DEV_CACHES))
        else:
            shutil.copy2(ROOT / name, src / name)
    wheels = tmp / "wheels"
    _call(
        sys.executable,
        *("-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "--no-index", "-q"),
        *("-w", wheels, src),
        cwd=tmp,
        timeout=BUILD_TIMEOUT,
    )
    (wheel,) = wheels.glob("charflow-*.whl")
    venv = tmp / "venv"
    _call(sys.executable, "-m", "venv", "--without-pip", venv, cwd=tmp, timeout=BUILD_TIMEOUT)
    python = venv / "bin" / "python"
    purelib = _call(python, "-c", "import sysconfig; print(sysconfig.get_path('purelib'))", cwd=tmp)
    # Path lines only: the .pth files of this environment (its editable charflow) are not run.
    Path(purelib.strip(), "dependencies.pth").write_text(
        "".join(f"{p}\n" for p in site.getsitepackages()), encoding="utf-8"
    )
    _call(
        *(sys.executable, "-m", "pip", "--python", python, "install", "-q"),
        *("--no-deps", "--no-index", wheel),
        cwd=tmp,
        timeout=BUILD_TIMEOUT,
    )
    where = _call(python, "-c", "import charflow; print(charflow.__file__)", cwd=tmp)
    assert Path(where.strip()).is_relative_to(venv), f"charflow imported from {where}"
    return venv / "bin"


def test_wheel_runs_the_quick_demo_and_a_copied_config(installed: Path, tmp_path: Path) -> None:
    charflow = installed / "charflow"
    venv = installed.parent  # the installed package and all around it (a runs/ beside it)
    before_venv, before_source = _snapshot(venv), _snapshot(ROOT)

    assert _call(charflow, "--version", cwd=tmp_path).strip() == f"charflow {__version__}"
    work = tmp_path / "work"
    work.mkdir()
    _call(charflow, "demo", "--quick", "--jobs", "2", "--quiet", cwd=work)
    quick = work / "runs" / "vellum90_tt_quick"
    assert (quick / "vellum90_tt_quick.lib").is_file()
    assert (quick / "vellum90_tt_quick.json").is_file()

    # A user's copy of the demo, run from a third folder: its relative paths must hold.
    _call(charflow, "copy-demo", tmp_path / "mine", cwd=work)
    copied = tmp_path / "mine" / "demo" / "vellum90.toml"
    first = config.load(copied).cells[0].name
    other = tmp_path / "other"
    other.mkdir()
    _call(charflow, "run", copied, "--cell", first, "--jobs", "2", "--quiet", cwd=other)
    name = config.load(copied).name
    assert (other / "runs" / name / f"{name}.lib").is_file()
    assert (other / "runs" / name / f"{name}.json").is_file()

    # Python's own bytecode caches aside (pip compiled them at install), nothing was written
    # into the environment that holds the installed package, nor into the source tree.
    assert _snapshot(venv) == before_venv
    assert _snapshot(ROOT) == before_source
