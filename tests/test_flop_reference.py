"""Flip-flop values against an independent converged reference: tests/reference/flop/, a
plain-ngspice script that imports nothing from charflow (its own stimulus, `.meas`, a 0.1 ps
step at reltol 1e-5, cross-checked at 0.4 ps and 1e-4; searches bisected to 0.05 ps), run on
tests/data/seq_l1.toml's QDFFR_P1 and checked in as seq_l1.csv. Needs ngspice (fails without).
A transient converges as its step and tolerances shrink (common practice)."""

from __future__ import annotations

import csv
import dataclasses
import shutil
from pathlib import Path

import pytest

from charflow import config, netlist, sequential, sweep

HERE = Path(__file__).resolve().parent
REFERENCE = HERE / "reference" / "flop" / "seq_l1.csv"
SEQ = HERE / "data" / "seq_l1.toml"
CELL = "QDFFR_P1"
DELAY_RTOL = 0.005  # clock->Q and clear->Q against the reference (issue 17's goal)
SEARCH_SLACK = 1e-12  # s beyond the search tolerance: setup, hold, recovery, removal (the same)
WIDEST = 1.5e-9  # s, a slew added to the grid: no value may depend on it


@pytest.fixture(scope="module", autouse=True)
def _needs_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; these tests need it")


@pytest.fixture(scope="module")
def bench():
    """seq_l1's QDFFR_P1 with a 1.5 ns slew added to its grid: before the run followed each
    point's own slews, that grid read clock->Q up to 6 % (0.1 ns) and 1.5 % (0.01 ns) off."""
    cfg = config.load(SEQ)
    cell = cfg.cell(CELL)
    grid = dataclasses.replace(cell.grid, slew=(*cell.grid.slew, WIDEST))
    cfg = dataclasses.replace(cfg, cells=(dataclasses.replace(cell, grid=grid),))
    return cfg, netlist.build_deck(cfg, cfg.cell(CELL)), sweep.plan(cfg, [CELL]).points


def _rows(kinds: tuple[str, ...]) -> list[dict[str, str]]:
    lines = [x for x in REFERENCE.read_text(encoding="utf-8").splitlines() if x[:1] != "#"]
    return [r for r in csv.DictReader(lines) if r["cell"] == CELL and r["kind"] in kinds]


def _close(a: float, b: float) -> bool:
    return abs(a - b) <= 1e-6 * abs(b)


def test_clock_and_clear_to_q_match_the_reference(bench):
    cfg, deck, points = bench
    rows = _rows(("clock", "clear"))
    assert len(rows) == 12
    for r in rows:
        (point,) = (
            p
            for p in points
            if isinstance(p, sweep.TimingPoint)
            and (p.kind, p.related, p.output, p.output_edge)
            == (r["kind"], r["related"], "Q", r["edge"])
            and _close(p.slew, float(r["slew_s"]))
            and _close(p.load, float(r["load_F"]))
            and _close(p.other_load, float(r["other_load_F"]))
        )
        got = sequential.measure_clocked(cfg, deck, point).delay
        want = float(r["value_s"])
        assert got == pytest.approx(want, rel=DELAY_RTOL), (point.label, got, want)


def test_setup_hold_recovery_removal_match_the_reference(bench):
    cfg, deck, points = bench
    rows = _rows(("setup", "hold", "recovery", "removal"))
    assert len(rows) == 6
    tol = cfg.simulation.bisect_tolerance
    for r in rows:
        (point,) = (
            p
            for p in points
            if isinstance(p, sweep.ConstraintPoint)
            and (p.kind, p.constrained, p.data_edge) == (r["kind"], r["pin"], r["edge"])
            and _close(p.data_slew, float(r["slew_s"]))
            and _close(p.clock_slew, float(r["clock_slew_s"]))
        )
        got = sequential.measure_constraint(cfg, deck, point).value
        want = float(r["value_s"])
        assert abs(got - want) <= tol + SEARCH_SLACK, (point.label, got, want)
