"""The benchmark's code (benchmarks/, outside the package) on a tiny grid; the benchmark itself,
``python -m benchmarks``, is not part of the suite. Needs ngspice (fails without it)."""

from __future__ import annotations

import ast
import dataclasses
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from benchmarks import speed
from charflow.config import library as config
from charflow.plan import arcs as planning

ROOT = Path(__file__).resolve().parents[1]
SMALL_L1 = ROOT / "tests" / "data" / "small_l1.toml"
SPREAD_L1 = ROOT / "tests" / "data" / "spread_l1.toml"
TINY_GRID = "slew = [0.02, 0.2]\nload = [0.002, 0.02]"
# A two-output cell (complementary buffer) on 3D tables: its other output's load is an axis.
TWO_OUTPUTS = f"""
[[cell]]
name = "QBUFC_P1"
template = "{ROOT.as_posix()}/charflow/bundled/templates/cells/bufc.sp.j2"
params = {{ wn = 0.4e-6, wp = 0.8e-6, l = 0.1e-6 }}
inputs = ["A"]
outputs = {{ Y = "A", YB = "!A" }}
area = 2.0
grid = {{ related_load = [0.0005, 0.04] }}
"""
# The naive way runs one transient per point with charflow's estimated first step, and
# ngspice's `meas` interpolates linearly between samples as charflow does; charflow may have
# refined a point's step, or measured a grid corner with its probe's step. Both put at least
# samples_per_edge / REFINE_SLACK (about 13) samples on the edge: they agree within 1 %.
AGREE_RTOL = 1e-2
HELP_TIMEOUT = 120  # s, a bound on a shared machine, not an assertion
NOT_FOR_THE_PACKAGE = {"benchmarks", "tests", "fixtures", "conftest", "consumer_tools"}


@pytest.fixture(scope="module", autouse=True)
def _needs_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not installed; these tests need it (apt-get install ngspice)")


def _tiny(tmp_path: Path) -> Path:
    text = SMALL_L1.read_text(encoding="utf-8")
    text = text.replace("../../", ROOT.as_posix() + "/")
    head, _, rest = text.partition("[grid]")
    path = tmp_path / "tiny.toml"
    cells = rest.split("[[cell]]", 1)[1]
    path.write_text(f"{head}[grid]\n{TINY_GRID}\n\n[[cell]]{cells}{TWO_OUTPUTS}")
    return path


def test_bench_library_on_a_tiny_grid(tmp_path):
    path = _tiny(tmp_path)
    cfg = config.load(path)
    points = len(planning.plan(cfg).points)
    # The naive way on every point: the two-output cell's at each of the other output's loads.
    result = speed.bench_library("tiny", path, jobs=2, naive_points=points, folder=tmp_path)
    cells = len(cfg.cells)
    assert result.one.points == result.full.points == points
    assert result.naive.points == points
    assert result.agreement < AGREE_RTOL
    for stats in (result.one, result.full):
        assert stats.simulations >= stats.points
        assert 0 < stats.analysis < stats.wall * stats.workers
        assert stats.floor_ratio > 1.0
        assert stats.peak_rss > 0
        assert [name for name, _ in stats.stages][0] == "start and imports"
        # Every cell's testbench read (function check and sweep), none by more than each
        # worker once; the kinds of work count every point simulated.
        assert cells <= stats.reads <= cells * stats.workers
        assert 1 <= stats.most_reads <= stats.workers
        assert sum(n for _, n, _ in stats.kinds) >= stats.points
        assert sum(sims for _, _, sims in stats.kinds) == stats.simulations
    assert result.gates_only
    report = speed.render([result])
    assert "tiny" in report and "targets" in report
    assert "testbench reads" in report and "simulated (charflow, 2 workers)" in report
    assert "speed-up against the naive way" in report
    # With flip-flops the naive way's gates are no measure of the library's rate.
    mixed = speed.render([dataclasses.replace(result, gates_only=False)])
    assert "speed-up against" not in mixed and "no speed-up" in mixed


def test_bench_reports_the_sigma_tables_cost_on_a_tiny_grid(tmp_path):
    text = SPREAD_L1.read_text(encoding="utf-8").replace("../../", ROOT.as_posix() + "/")
    text = re.sub(r"^slew = .*\nload = .*$", TINY_GRID, text, count=1, flags=re.M)
    path = tmp_path / "tiny_mismatch.toml"
    path.write_text(text.replace("checks = 1", "checks = 0"), encoding="utf-8")
    result = speed.bench_library("tiny mismatch", path, jobs=2, naive_points=2, folder=tmp_path)
    cfg = config.load(path)
    points = len(planning.plan(cfg).points)
    for stats in (result.one, result.full):
        cost = stats.spread
        assert cost is not None
        # Every point of a 2 x 2 grid is on the sparse sub-grid; no Monte Carlo checks.
        assert cost.points == cost.nominal_points == points and cost.checks == 0
        # A sensitivity point: the point itself and each transistor at +sigma and -sigma
        # (QINV_P1 2 transistors, QNAND2_P1 4), refinements on top.
        assert cost.simulations >= 8 * 5 + 16 * 9
        assert cost.nominal_run + cost.simulations == stats.simulations
        assert sum(sims for _, _, sims in stats.kinds) == stats.simulations
    report = speed.render([result])
    assert "sigma tables: " in report and "sigma tables / nominal run sims" in report


def test_mismatch_demo_is_the_combinational_demo_with_linear_sigma(tmp_path):
    cfg = config.load(speed.mismatch_demo(tmp_path))
    comb = config.load(speed.combinational_demo(tmp_path))
    assert [c.name for c in cfg.cells] == [c.name for c in comb.cells]
    assert (cfg.mismatch.method, cfg.mismatch.checks) == ("linear", 0)
    assert cfg.mismatch.devices == comb.mismatch.devices


def test_level1_demo_is_the_demo_on_level1_models(tmp_path):
    cfg = config.load(speed.level1_demo(tmp_path))
    demo = config.load(speed.DEMO)
    assert [c.name for c in cfg.cells] == [c.name for c in demo.cells]
    assert cfg.process.models[0].path == speed.LEVEL1_MODELS


def test_combinational_demo_is_the_demo_without_its_flip_flops(tmp_path):
    cfg = config.load(speed.combinational_demo(tmp_path))
    demo = config.load(speed.DEMO)
    assert [c.name for c in cfg.cells] == [c.name for c in demo.cells if c.flop is None]
    assert cfg.process.models == demo.process.models


def test_one_command_runs_it():
    def call(*args: str) -> subprocess.CompletedProcess:
        return subprocess.run(
            [sys.executable, "-m", "benchmarks", *args],
            cwd=ROOT,
            capture_output=True,
            text=True,
            timeout=HELP_TIMEOUT,
            check=False,
            stdin=subprocess.DEVNULL,
        )

    shown = call("--help")
    assert shown.returncode == 0, shown.stderr
    for option in ("--jobs", "--library", "--naive-points", "--params", "--repeat"):
        assert option in shown.stdout
    # argparse's usage error: exit 2, the option and what is wrong named.
    wrong = call("--params", "1")
    assert wrong.returncode == 2
    assert "--params" in wrong.stderr and "at least 2" in wrong.stderr


def test_the_package_imports_neither_the_benchmark_nor_the_tests():
    found = []
    for path in sorted((ROOT / "charflow").rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0:
                names = [node.module or ""]
            else:
                continue
            found += [f"{path.name}: {n}" for n in names if n.split(".")[0] in NOT_FOR_THE_PACKAGE]
    assert not found, found


def test_the_naive_way_skips_a_flip_flops_search_records():
    """A library with a flip-flop has search records (no related pin) beside its timing
    points in the JSON; the naive way compares timing points only."""
    point = {
        "related_pin": "A",
        "output": "Y",
        "when": "",
        "input_edge": "rise",
        "slew_s": 1e-11,
        "load_F": 1e-15,
        "other_load_F": None,
    }
    search = {"search": "setup D rise", "value_s": 1e-11, "simulations": 9}
    records = speed._records({"points": {"QDFF": [search], "QINV": [point]}})
    assert list(records.values()) == [point]


def test_the_naive_way_draws_combinational_points_only():
    """A flip-flop's clock point needs its state set before the edge; the naive way (one plain
    run per point) times gates' arcs only. seq_l1 holds flip-flops beside gates."""
    cfg = config.load(ROOT / "tests" / "data" / "seq_l1.toml")
    kinds = {getattr(p, "kind", None) for p in planning.plan(cfg).points}
    assert "clock" in kinds and "combinational" in kinds
    points = speed.gate_points(cfg, 1000)
    assert points and {p.kind for p in points} == {"combinational"}
