"""The benchmark's code on a tiny grid (the benchmark itself is ``charflow bench``, not part of
the suite) and the dry-run plan; needs ngspice (fails without it)."""

from __future__ import annotations

import math
import shutil
import subprocess
from pathlib import Path

import pytest

from charflow import bench
from charflow.analysis import estimate
from charflow.config import library as config
from charflow.flow import characterize as flow

ROOT = Path(__file__).resolve().parents[1]
SMALL_L1 = ROOT / "tests" / "data" / "small_l1.toml"
TINY_GRID = "slew = [0.02, 0.2]\nload = [0.002, 0.02]"
# The naive way runs one transient per point with charflow's estimated first step, and
# ngspice's `meas` interpolates linearly between samples as charflow does; charflow may have
# refined a point's step, or measured a grid corner with its probe's step. Both put at least
# samples_per_edge / REFINE_SLACK (about 13) samples on the edge: they agree within 1 %.
AGREE_RTOL = 1e-2


@pytest.fixture(scope="module", autouse=True)
def _needs_ngspice():
    if shutil.which("ngspice") is None or shutil.which("charflow") is None:
        pytest.fail("ngspice and the installed charflow command are needed here")


def _tiny(tmp_path: Path) -> Path:
    text = SMALL_L1.read_text(encoding="utf-8")
    text = text.replace("../../", ROOT.as_posix() + "/")
    head, _, rest = text.partition("[grid]")
    path = tmp_path / "tiny.toml"
    path.write_text(f"{head}[grid]\n{TINY_GRID}\n\n[[cell]]{rest.split('[[cell]]', 1)[1]}")
    return path


def test_bench_library_on_a_tiny_grid(tmp_path):
    path = _tiny(tmp_path)
    result = bench.bench_library("tiny", path, jobs=2, naive_points=3, folder=tmp_path)
    points = len(flow.sweep.plan(config.load(path)).points)
    assert result.one.points == result.full.points == points
    assert result.naive.points == 3
    assert result.agreement < AGREE_RTOL
    for stats in (result.one, result.full):
        assert stats.simulations >= stats.points
        assert 0 < stats.analysis < stats.wall * stats.workers
        assert stats.floor_ratio > 1.0
        assert stats.peak_rss > 0
    report = bench.render([result])
    assert "tiny" in report and "targets" in report


def test_foundry_kit_characterizes(tmp_path):
    path = bench.foundry_kit(tmp_path, params=200, grid=TINY_GRID)
    cfg = config.load(path)
    text = (tmp_path / "kit.lib").read_text(encoding="utf-8")
    assert text.count(".param") == 200 - 2 + 1  # two on the first line, one per line after
    assert ".model nch.4 nmos" in text
    result = flow.characterize(cfg, jobs=1)
    assert not result.failures
    assert len(result.measurements) == 3 * 2 * 4  # KINV and KNAND2's arcs x edges x grid


def test_level1_demo_is_the_demo_on_level1_models(tmp_path):
    cfg = config.load(bench.level1_demo(tmp_path))
    demo = config.load(bench.DEMO)
    assert [c.name for c in cfg.cells] == [c.name for c in demo.cells]
    assert cfg.process.models[0].path == bench.LEVEL1_MODELS


def test_plan_counts_points_and_estimates_time():
    cfg = config.load(SMALL_L1)
    est = estimate.estimate(cfg, ["QINV_P1", "QNAND2_P1"], jobs=2)
    assert est.points == 18 + 36
    assert [(a.cell, a.related, a.points) for a in est.arcs] == [
        ("QINV_P1", "A", 18),
        ("QNAND2_P1", "IA", 18),
        ("QNAND2_P1", "IB", 18),
    ]
    # Per cell: SAMPLES timing points, the 3 probes of one series (grid corners), and one
    # hidden-power toggle (QNAND2_P1 has toggles, QINV_P1 none).
    assert est.samples == 2 * (estimate.SAMPLES + 3) + 1
    assert 0 < est.seconds < math.inf
    # Every point takes one simulation at least; refinements add some.
    assert est.points + 12 <= est.simulations  # QNAND2_P1's 12 toggles
    assert f"about {est.simulations:,.0f} simulations in the sweep" in estimate.render(est)


def test_plan_option_runs_no_sweep(tmp_path):
    out = tmp_path / "out"
    done = subprocess.run(
        [shutil.which("charflow"), "run", str(SMALL_L1), "--plan", "--out", str(out)],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    assert "simulations in the sweep" in done.stdout and "the sweep takes about" in done.stdout
    assert not out.exists()


def test_plan_of_flip_flops_counts_and_times_their_searches():
    cfg = config.load(ROOT / "tests" / "data" / "seq_l1.toml")
    est = estimate.estimate(cfg, ["QDFFR_P1"], jobs=2)
    (cell,) = est.cells
    groups = {g.kind: g for g in cell.groups}
    # Slews x loads x other loads = 8 per edge: 2 clock arcs x 2 output edges, 2 clear arcs x
    # 1; at one slew pair setup and hold x 2 data edges, recovery and removal of RSTB's release;
    # pulses: CLK high, CLK low, RSTB low.
    assert groups["clock and control arcs"].points == (2 * 2 + 2) * 8
    assert groups["setup searches"].points == groups["hold searches"].points == 2
    assert groups["recovery searches"].points == groups["removal searches"].points == 1
    assert groups["pulse-width searches"].points == 3
    # A bisection to 1 ps takes many runs: more than a timing point's one or two.
    assert groups["setup searches"].simulations > 5
    assert est.searches == 9 and 0 < est.seconds < math.inf
    assert "9 searches" in estimate.render(est)
