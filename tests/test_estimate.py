"""The dry-run plan (``charflow run --plan``): points and simulations counted, a time estimated,
no sweep run; needs ngspice and the installed charflow command (fails without them)."""

from __future__ import annotations

import math
import shutil
import subprocess
from pathlib import Path

import pytest

from charflow.analysis import estimate
from charflow.config import library as config
from charflow.flow import characterize as flow

ROOT = Path(__file__).resolve().parents[1]
SMALL_L1 = ROOT / "tests" / "data" / "small_l1.toml"
# The plan's count of simulations against the run's: issue 16 asks for 10 % with [mismatch] on,
# as the plan of the nominal sweep does.
PLAN_RTOL = 0.10


@pytest.fixture(scope="module", autouse=True)
def _needs_ngspice():
    if shutil.which("ngspice") is None or shutil.which("charflow") is None:
        pytest.fail("ngspice and the installed charflow command are needed here")


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


def test_plan_counts_the_spread_points_within_ten_percent_of_the_run():
    cfg = config.load(ROOT / "tests" / "data" / "spread_l1.toml")
    planned = estimate.estimate(cfg, jobs=1)
    result = flow.characterize(cfg, jobs=1)
    assert not result.failures and not result.spread_failures
    tables, checks, _ = result.spread_cost()
    # Sensitivities: 1 + 2 x transistors per point (QINV_P1 2, QNAND2_P1 4), on every point of
    # a 3 x 3 grid; one Monte Carlo check of 200 samples per arc edge and state: they outweigh
    # the nominal sweep, so a plan without them would be far off.
    assert tables >= 18 * 5 + 36 * 9 and checks >= 6 * 201
    for kind, got in ((estimate.SIGMA_TABLES, tables), (estimate.MONTE_CARLO_CHECKS, checks)):
        assert abs(planned.simulations_of(kind) - got) <= PLAN_RTOL * got, kind
    assert abs(planned.simulations - result.simulations) <= PLAN_RTOL * result.simulations
    text = estimate.render(planned)
    assert (
        f"about {planned.simulations_of(estimate.SIGMA_TABLES):,.0f} for the sigma tables" in text
    )
