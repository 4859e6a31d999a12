"""Constraint tables with their own clock-slew axis (``[grid] clock_slew``).

Liberty's setup, hold, recovery and removal tables are indexed by the constrained pin's
transition and the related (clock) pin's transition (``constrained_pin_transition``,
``related_pin_transition``; the Liberty reference's table template variables, from memory):
the two axes need not hold the same values. These tests plan and tabulate without simulating.
"""

from __future__ import annotations

import itertools
from pathlib import Path

from charflow.config import library as config
from charflow.plan import arcs as planning
from charflow.records.outcomes import SearchResult
from charflow.records.points import ConstraintPoint
from charflow.tables import tabulate

ROOT = Path(__file__).resolve().parents[1]
SEQ = ROOT / "tests" / "data" / "seq_l1.toml"
DATA_NS = (0.02,)  # seq_l1's constraint_slew
CLOCK_NS = (0.01, 0.05, 0.3)


def _config(tmp_path: Path, clock: bool = True) -> config.LibraryConfig:
    text = SEQ.read_text(encoding="utf-8").replace('"../../', f'"{ROOT.as_posix()}/')
    if clock:
        extra = f"clock_slew = {list(CLOCK_NS)}\n"
        text = text.replace("constraint_slew = [0.02]\n", f"constraint_slew = [0.02]\n{extra}")
    path = tmp_path / "seq.toml"
    path.write_text(text, encoding="utf-8")
    return config.load(path)


def _searches(cfg: config.LibraryConfig) -> list[ConstraintPoint]:
    return [p for p in planning.plan(cfg).points if isinstance(p, ConstraintPoint)]


def test_the_plan_crosses_data_slews_with_clock_slews(tmp_path: Path) -> None:
    cfg = _config(tmp_path)
    grid = cfg.cell("QDFFR_P1").grid
    assert grid.data_slews == tuple(s * 1e-9 for s in DATA_NS)
    assert grid.clock_slews == tuple(s * 1e-9 for s in CLOCK_NS)
    points = _searches(cfg)
    for kind in ("setup", "hold", "recovery", "removal"):
        pairs = {(p.data_slew, p.clock_slew) for p in points if p.kind == kind}
        assert pairs == set(itertools.product(grid.data_slews, grid.clock_slews)), kind


def test_without_clock_slews_both_axes_take_the_data_slews(tmp_path: Path) -> None:
    grid = _config(tmp_path, clock=False).cell("QDFFR_P1").grid
    assert grid.clock_slews == grid.data_slews == tuple(s * 1e-9 for s in DATA_NS)


def test_the_tables_have_the_two_axes(tmp_path: Path) -> None:
    cfg = _config(tmp_path)
    cell = cfg.cell("QDFFR_P1")
    # A made-up value per point that tells the two axes apart: data slew + 10 x clock slew.
    results = [SearchResult(p, p.data_slew + 10 * p.clock_slew, 1, 0.0) for p in _searches(cfg)]
    tables = tabulate._constraints(cell, results)
    assert {(t.pin, t.kind) for t in tables} == {
        ("D", "setup"),
        ("D", "hold"),
        ("RSTB", "recovery"),
        ("RSTB", "removal"),
    }
    for group in tables:
        for table in group.tables:
            data_axis, clock_axis = table.axes
            assert data_axis.name == tabulate.CONSTRAINED_AXIS
            assert clock_axis.name == tabulate.RELATED_AXIS
            assert tuple(data_axis.values) == cell.grid.data_slews
            assert tuple(clock_axis.values) == cell.grid.clock_slews
            for (i, ds), (j, cs) in itertools.product(
                enumerate(data_axis.values), enumerate(clock_axis.values)
            ):
                assert table.values[i, j] == ds + 10 * cs
