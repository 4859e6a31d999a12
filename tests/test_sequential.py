"""Two-output cells and flip-flops: 3D tables, clock and clear arcs, setup/hold, pulse widths
(tests/data/seq_l1.toml, level-1 demo models, small grids)."""

from __future__ import annotations

import dataclasses
import shutil
from pathlib import Path

import numpy as np
import pytest
from liberty.parser import parse_liberty

from charflow import config, flow, logic, sequential
from charflow.errors import FunctionalMismatchError
from charflow.netlist import build_deck
from charflow.sweep import ConstraintPoint

DATA = Path(__file__).parent / "data"
RTOL_READBACK = 1e-6  # 7 significant digits in the Liberty file
COUPLED_MIN = 0.05  # an output driven through the other: index_3 moves delay by > 5 %
FLAT_MAX = 0.02  # an output not driven through the other: < 2 %


@pytest.fixture(scope="module", autouse=True)
def _need_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not installed; these tests need it (apt-get install ngspice)")


@pytest.fixture(scope="module")
def cfg():
    return config.load(DATA / "seq_l1.toml")


@pytest.fixture(scope="module")
def run(cfg, tmp_path_factory):
    result = flow.characterize(cfg, jobs=2)
    assert not result.failures, result.failures[:3]
    out = tmp_path_factory.mktemp("seq")
    flow.write(cfg, result, out)
    return result, out


def _arc(result, cell, related, output):
    c = next(c for c in result.cells if c.cell.name == cell)
    return next(a for a in c.arcs if a.arc.related == related and a.arc.output == output)


def _index3_change(table) -> np.ndarray:
    return table.values[..., -1] / table.values[..., 0] - 1.0


def test_flop_captures_every_data_value_from_either_state(cfg):
    # check_flop clocks D=0 and D=1 in from a stored 0 and a stored 1 and checks Q and QB.
    cell = cfg.cell("QDFFR_P1")
    sequential.check_flop(cfg, build_deck(cfg, cell))


def test_flop_declared_wrongly_is_caught(cfg):
    cell = cfg.cell("QDFFR_P1")
    wrong = dataclasses.replace(
        cell, flop=dataclasses.replace(cell.flop, next_state=logic.parse("!D"))
    )
    bad = dataclasses.replace(cfg, cells=(wrong,))
    with pytest.raises(FunctionalMismatchError) as err:
        sequential.check_flop(bad, build_deck(bad, wrong))
    assert "QDFFR_P1" in str(err.value) and "D=" in str(err.value)


def test_third_index_follows_the_topology(run):
    # YB is driven from Y and QB from Q: their delay rises with the other output's load;
    # Y and Q do not drive through the other, so their tables are flat along index_3.
    result, _ = run
    for cell, related, driven, through in (
        ("QBUFC_P1", "A", "Y", "YB"),
        ("QDFFR_P1", "CLK", "Q", "QB"),
    ):
        for quantity in ("cell_rise", "cell_fall"):
            coupled = _arc(result, cell, related, through).table(quantity)
            flat = _arc(result, cell, related, driven).table(quantity)
            assert (
                coupled.ndim == 3
                and coupled.axis_names[2] == "related_out_total_output_net_capacitance"
            )
            assert (_index3_change(coupled) > COUPLED_MIN).all(), (cell, through, quantity)
            assert (np.abs(_index3_change(flat)) < FLAT_MAX).all(), (cell, driven, quantity)


def test_clear_arc_only_moves_its_output_the_way_the_reset_forces(run):
    result, _ = run
    to_q = _arc(result, "QDFFR_P1", "RSTB", "Q")
    to_qn = _arc(result, "QDFFR_P1", "RSTB", "QB")
    assert [t.quantity for t in to_q.default] == ["cell_fall", "fall_transition"]
    assert [t.quantity for t in to_qn.default] == ["cell_rise", "rise_transition"]
    assert to_q.arc.sense == "positive_unate" and to_qn.arc.sense == "negative_unate"


@pytest.mark.parametrize("kind", ["setup", "hold", "recovery", "removal"])
def test_constraint_is_the_edge_between_pass_and_fail(cfg, run, kind):
    # The bisection's answer passes, and one tolerance step tighter fails, each re-simulated
    # from scratch (the pass test: right value, clock-to-Q at most 10 % over relaxed;
    # common practice).
    result, _ = run
    found = next(
        m
        for m in result.measurements
        if isinstance(m.point, ConstraintPoint)
        and m.point.kind == kind
        and m.point.data_edge == "rise"
    )
    tol = cfg.simulation.bisect_tolerance
    deck = build_deck(cfg, cfg.cell("QDFFR_P1"))
    probe = sequential.constraint_probe(cfg, deck, found.point)
    assert probe(found.value)
    assert not probe(found.value - tol)
    assert 2 < found.runs < 40


def test_liberty_with_3d_and_sequential_groups_reads_back(cfg, run):
    result, out = run
    lib = parse_liberty((out / "seq_l1.lib").read_text())
    cells = {c.args[0]: c for c in lib.get_groups("cell")}
    ff = cells["QDFFR_P1"].get_groups("ff")[0]
    assert ff["clocked_on"] == "CLK" and ff["next_state"] == "D" and ff["clear"] == "!RSTB"
    pins = {p.args[0]: p for p in cells["QDFFR_P1"].get_groups("pin")}
    assert pins["CLK"]["clock"] == "true"
    qn = [t for t in pins["QB"].get_groups("timing") if t["related_pin"] == "CLK"][0]
    assert qn["related_output_pin"] == "Q" and qn["timing_type"] == "rising_edge"
    table = qn.get_groups("cell_rise")[0]
    got = np.array(table.get_array("values")).reshape(-1)
    want = (
        _arc(result, "QDFFR_P1", "CLK", "QB").table("cell_rise").values.reshape(-1) / cfg.time_scale
    )
    assert got == pytest.approx(want, rel=RTOL_READBACK)
    setups = [t for t in pins["D"].get_groups("timing") if t["timing_type"] == "setup_rising"]
    assert len(setups) == 1 and setups[0].get_groups("rise_constraint")
    # The reset's release (RSTB rising) against the clock: one table each, for that edge only.
    for kind in ("recovery_rising", "removal_rising"):
        (group,) = [t for t in pins["RSTB"].get_groups("timing") if t["timing_type"] == kind]
        assert group["related_pin"] == "CLK"
        assert group.get_groups("rise_constraint") and not group.get_groups("fall_constraint")
    assert float(pins["CLK"]["min_pulse_width_high"]) > 0


def test_flop_pin_capacitance_follows_the_gates_behind_each_pin(run):
    # CLK drives one inverter of the QINV_P1 size (wn 0.4 um, wp 0.8 um), RSTB the gates of two
    # NAND2s (4 x 0.8 um of gate): against the demo QINV_P1's measured 2.39 fF (gate
    # capacitance scales with gate area; Weste & Harris, CMOS VLSI Design, 4th ed., 2010).
    result, _ = run
    pins = {p.pin: p for c in result.cells if c.cell.name == "QDFFR_P1" for p in c.pins}
    inv_x1 = 2.39e-15  # F, tests/test_timing.py's measured QINV_P1 input on these models
    assert pins["CLK"].capacitance == pytest.approx(inv_x1, rel=0.15, abs=0)
    assert pins["RSTB"].capacitance == pytest.approx(inv_x1 * 3.2 / 1.2, rel=0.25, abs=0)
    assert pins["D"].capacitance > pins["CLK"].capacitance


def test_recovery_and_removal_leave_a_window_between_them(run):
    # Released later than recovery allows, the edge no longer captures in time; released
    # earlier than removal allows, it captures: recovery + removal >= 0 brackets the release
    # times that do neither cleanly (as setup + hold >= 0 does for data; common practice).
    result, _ = run
    found = {
        m.point.kind: m.value
        for m in result.measurements
        if isinstance(m.point, ConstraintPoint) and m.point.constrained == "RSTB"
    }
    assert set(found) == {"recovery", "removal"}
    assert found["recovery"] + found["removal"] >= 0
