"""Constraint tables with their own clock-slew axis (``[grid] clock_slew``).

Liberty's setup, hold, recovery and removal tables are indexed by the constrained pin's
transition and the related (clock) pin's transition (``constrained_pin_transition``,
``related_pin_transition``; the Liberty reference's table template variables, from memory):
the two axes need not hold the same values. These tests plan and tabulate without simulating;
the pulse-width table is characterized and read back.
"""

from __future__ import annotations

import itertools
from pathlib import Path

import pytest
from consumer_tools import sta, sta_complaints
from liberty.parser import parse_liberty

from charflow.config import library as config
from charflow.flow import characterize as flow
from charflow.plan import arcs as planning
from charflow.records.outcomes import SearchResult
from charflow.records.points import ConstraintPoint, PulsePoint
from charflow.tables import tabulate

ROOT = Path(__file__).resolve().parents[1]
SEQ = ROOT / "tests" / "data" / "seq_l1.toml"
DATA_NS = (0.02,)  # seq_l1's constraint_slew
CLOCK_NS = (0.01, 0.05, 0.3)
RTOL = 1e-6  # the Liberty file holds 7 significant digits


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


# -- minimum pulse width over the pin's slew (``[grid] pulse_slew``) ----------------------------

# ns: at 0.1 ns seq_l1's narrowest full-swing clock pulse already works (no minimum to table).
PULSE_NS = (0.01, 0.02)


def _pulse_config(tmp_path: Path) -> config.LibraryConfig:
    text = SEQ.read_text(encoding="utf-8").replace('"../../', f'"{ROOT.as_posix()}/')
    text = text.replace(
        "constraint_slew = [0.02]\n", f"constraint_slew = [0.02]\npulse_slew = {list(PULSE_NS)}\n"
    )
    path = tmp_path / "pulse.toml"
    path.write_text(text, encoding="utf-8")
    return config.load(path)


def test_pulse_widths_are_searched_at_every_pulse_slew(tmp_path: Path) -> None:
    cfg = _pulse_config(tmp_path)
    pulses = [p for p in planning.plan(cfg).points if isinstance(p, PulsePoint)]
    # CLK high and low, RSTB low (its active level), each at both pulse slews.
    assert {(p.pin, p.level, p.slew) for p in pulses} == {
        (pin, level, s * 1e-9)
        for pin, level in (("CLK", "high"), ("CLK", "low"), ("RSTB", "low"))
        for s in PULSE_NS
    }


def test_a_pulse_width_table_reads_back_and_opensta_takes_it(ngspice, tmp_path: Path) -> None:
    # Liberty's min_pulse_width timing type (rise_constraint: the high pulse, fall_constraint:
    # the low one; from memory) beside the pin's min_pulse_width_high/low at the sharpest slew;
    # read back with the independent liberty-parser (Thomas Kramer, 0.0.29 on PyPI) and by
    # OpenSTA (read_liberty must neither warn nor fail).
    cfg = _pulse_config(tmp_path)
    result = flow.characterize(cfg, cells=["QDFFR_P1"], jobs=2)
    assert not result.failures, result.failures[:2]
    written = flow.write(cfg, result, tmp_path / "out")
    lib_path = next(p for p in written if p.name == "seq_l1.lib")
    (cell,) = result.cells
    widths = {(p.pin, p.level, p.slew): p.width for p in cell.pulses}
    lib = parse_liberty(lib_path.read_text(encoding="utf-8"))
    (group,) = [c for c in lib.get_groups("cell") if c.args[0] == "QDFFR_P1"]
    clk = next(p for p in group.get_groups("pin") if p.args[0] == "CLK")
    sharpest = PULSE_NS[0] * 1e-9
    assert float(clk["min_pulse_width_high"]) * cfg.time_scale == pytest.approx(
        widths[("CLK", "high", sharpest)], rel=RTOL, abs=0
    )
    (timing,) = [t for t in clk.get_groups("timing") if str(t["timing_type"]) == "min_pulse_width"]
    for quantity, level in (("rise_constraint", "high"), ("fall_constraint", "low")):
        (table,) = timing.get_groups(quantity)
        read = [float(v) * cfg.time_scale for v in table.get_array("values").flatten()]
        want = [widths[("CLK", level, s * 1e-9)] for s in PULSE_NS]
        assert read == pytest.approx(want, rel=RTOL, abs=0), quantity
    log = sta(f"read_liberty {lib_path}\nputs done", tmp_path)
    assert "done" in log and sta_complaints(log) == []
