"""A flip-flop clocked on the falling edge (tests/data/neg_l1.toml: the test flop behind an
inverter on its clock) through every flip-flop layout: held states, searches that start just
before their first edge, clock and clear points from just before their edge. Its values
against those the layout that wrote every state with clock edges first measured (main at
05a59fa, December 2026: a checked-in reference the code cannot move). Needs ngspice (fails
without it)."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from charflow.config import library as config
from charflow.measurement import sequential
from charflow.plan.arcs import plan
from charflow.records.points import ConstraintPoint, TimingPoint
from charflow.simulation.netlist import build_deck

CONFIG = Path(__file__).parent / "data" / "neg_l1.toml"
CELL = "QNDFFR_P1"
# The constraints (s) as the written-first layout found them: each search ends in a bracket
# within the tolerance that holds the pass/fail boundary, so two searches' answers lie within
# the tolerance of each other (measured December 2026: within 0.03 ps).
WRITTEN_FIRST = {
    "setup D rise": -14.133739e-12,
    "setup D fall": 0.010008e-12,
    "hold D rise": 30.202942e-12,
    "hold D fall": 9.106249e-12,
    "recovery RSTB rise": -23.738151e-12,
    "removal RSTB rise": 31.0e-12,
}
# CLKN -> Q at 0.1 ns, QB at 1 fF: (edge, Q load F) -> (delay, transition) s; the 2 fF points
# make every edge before the measured one, the 10 fF points start just before it. Within
# DELAY_RTOL (measured: 0.098 % at most, December 2026).
CLOCK_POINTS = {
    ("rise", 2e-15): (121.42166e-12, 24.551072e-12),
    ("rise", 10e-15): (142.86176e-12, 46.422724e-12),
    ("fall", 2e-15): (113.67597e-12, 23.345231e-12),
    ("fall", 10e-15): (135.38290e-12, 45.641124e-12),
}
DELAY_RTOL = 2e-3  # the flip-flop arcs' accuracy goal against independent references


@pytest.fixture(scope="module")
def flop():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not installed; this test needs it (apt-get install ngspice)")
    cfg = config.load(CONFIG)
    return cfg, build_deck(cfg, cfg.cell(CELL)), plan(cfg, [CELL]).points


def test_a_falling_edge_flop_s_constraints_land_where_writing_first_did(flop):
    cfg, deck, points = flop
    tol = cfg.simulation.bisect_tolerance
    searched = [p for p in points if isinstance(p, ConstraintPoint)]
    assert len(searched) == len(WRITTEN_FIRST)
    for point in searched:
        found = sequential.measure_constraint(cfg, deck, point)
        before = WRITTEN_FIRST[" ".join(point.label.split()[:3])]
        assert found.value is not None
        assert abs(found.value - before) <= tol, point.label


def test_a_falling_edge_flop_s_clock_points_measure_what_writing_first_did(flop):
    cfg, deck, points = flop
    cell = cfg.cell(CELL)
    for (edge, load), (delay, transition) in CLOCK_POINTS.items():
        point = next(
            p
            for p in points
            if isinstance(p, TimingPoint)
            and (p.kind, p.output, p.output_edge) == ("clock", "Q", edge)
            and p.slew == max(cell.grid.slew)
            and p.load == pytest.approx(load, rel=1e-9, abs=0)
            and p.other_load == min(cell.grid.related_load)
        )
        assert sequential._short(cfg, point) == (load > min(cell.grid.load))
        measured = sequential.measure_clocked(cfg, deck, point)
        assert measured.delay == pytest.approx(delay, rel=DELAY_RTOL, abs=0), point.label
        assert measured.transition == pytest.approx(transition, rel=DELAY_RTOL, abs=0), point.label
