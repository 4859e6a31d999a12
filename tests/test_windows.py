"""A flip-flop's settle window follows the cell, not only the grid: tests/data/seq_l1.toml's
QDFFR_P1 on a two-slew grid of sharp slews, whose grid-sized window (10 × 0.02 ns) is shorter
than the cell takes to settle; needs ngspice (fails without it). "Settled" is the
measurement's own criterion (output within `settle` of its rail and supply current quiet;
a transient must settle before it is measured: common practice)."""

from __future__ import annotations

import dataclasses
import shutil
from pathlib import Path

import pytest

from charflow.config import library as config
from charflow.measurement import registry, sequential
from charflow.plan import arcs as planning
from charflow.plan.toggles import plan_toggles
from charflow.records.errors import MeasurementError
from charflow.records.points import TimingPoint
from charflow.simulation import netlist

SEQ = Path(__file__).resolve().parent / "data" / "seq_l1.toml"
CELL = "QDFFR_P1"
SHARP = (0.01e-9, 0.02e-9)  # s: the grid's slews


@pytest.fixture(scope="module", autouse=True)
def _needs_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; these tests need it")


@pytest.fixture(scope="module")
def sharp():
    """seq_l1's config with QDFFR_P1 on the sharp two-slew grid, its deck and clocked points."""
    cfg = config.load(SEQ)
    cell = cfg.cell(CELL)
    cell = dataclasses.replace(cell, grid=dataclasses.replace(cell.grid, slew=SHARP))
    cfg = dataclasses.replace(cfg, cells=(cell,))
    points = [p for p in planning.plan(cfg).points if isinstance(p, TimingPoint)]
    return cfg, netlist.build_deck(cfg, cell), points


def _failures(cfg, deck, points) -> list[str]:
    failed = []
    for p in points:
        try:
            sequential.measure_clocked(cfg, deck, p)
        except MeasurementError as exc:
            failed.append(exc.reason)
    return failed


def test_the_grid_sized_window_cuts_the_cell_off(monkeypatch, sharp):
    # Without growing, the window is the old one, sized from the grid alone: no clocked point
    # of this grid measures (the issue this guards against), each saying why.
    cfg, deck, points = sharp
    monkeypatch.setattr(sequential, "WINDOW_DOUBLINGS", 0)
    monkeypatch.setattr(sequential, "_WINDOWS", {})
    assert sequential.settle_window(cfg, deck) == sequential.WINDOW_SLEWS * SHARP[-1]
    failed = _failures(cfg, deck, points)
    assert len(failed) == len(points)
    assert all("not settled" in reason for reason in failed), failed


def test_the_window_grows_until_the_cell_settles(monkeypatch, sharp):
    cfg, deck, points = sharp
    monkeypatch.setattr(sequential, "_WINDOWS", {})
    window = sequential.settle_window(cfg, deck)
    base = sequential.WINDOW_SLEWS * SHARP[-1]
    assert window in [base * 2**k for k in range(1, sequential.WINDOW_DOUBLINGS + 1)]
    assert _failures(cfg, deck, points) == []
    toggles = plan_toggles(cfg)
    for t in toggles:
        assert registry.measure(cfg, deck, t).energy is not None


def test_a_window_set_in_the_config_is_kept_and_named_when_too_short(monkeypatch, sharp):
    cfg, deck, points = sharp
    short = sequential.WINDOW_SLEWS * SHARP[-1]
    cfg = dataclasses.replace(cfg, simulation=dataclasses.replace(cfg.simulation, window=short))
    monkeypatch.setattr(sequential, "_WINDOWS", {})
    assert sequential.settle_window(cfg, deck) == short
    assert sequential._WINDOWS == {}  # taken as set, not probed
    failed = _failures(cfg, deck, points)
    supply = [r for r in failed if r.startswith("supply current has not settled")]
    assert supply, failed
    assert all("after the event, the end of the run ([simulation] window)" in r for r in supply)
