"""Flip-flop power: clock-event energy, hidden power of the clock and data pins, leakage per
stored value (tests/data/seq_l1.toml's QDFFR_P1 on the level-1 models, the demo's QDFF_P1 on the
BSIM cards for leakage); needs ngspice (fails without it)."""

from __future__ import annotations

import dataclasses
import shutil
from pathlib import Path

import numpy as np
import pytest
from liberty.parser import parse_liberty

from charflow.config import library as config
from charflow.config.resources import DEMO_CONFIG
from charflow.execution.store import FILE_NAME, Store
from charflow.flow import characterize as flow
from charflow.measurement import ffpower, registry, sequential
from charflow.plan.toggles import plan_toggles, vectors
from charflow.records.errors import MeasurementError
from charflow.records.outcomes import Measurement
from charflow.records.points import TimingPoint
from charflow.records.units import power_unit
from charflow.simulation import netlist
from charflow.tables import power as power_tables

ROOT = Path(__file__).resolve().parents[1]
SEQ = ROOT / "tests" / "data" / "seq_l1.toml"
DEMO = DEMO_CONFIG
CELL = "QDFFR_P1"
RTOL_READBACK = 1e-6  # 7 significant digits in the Liberty file
CV2_RTOL = 0.03  # supply energy growth with the load against C·V²
# ... and its change on a falling output, as a fraction of the same C·V²: only the short-circuit
# current of the inverter the output drives (QB's, on Q) changes with the output's slew: 3.0 %
FALL_RTOL = 0.05
STATE_SPREAD = 0.05  # leakage of the two stored values under one vector differs by more
HOLD_RTOL = 0.01  # a static level read after a 10 times longer hold
# A hidden-power toggle's energy at the usual step against an 8x finer one: a transient's
# result converges as its step shrinks (common practice). Measured on the demo's QDFF_P1
# (December 2026) from the held state: within 0.13 %; when each toggle wrote its state with
# clock and data edges first, the smallest data toggles were up to 3.8 % off.
TOGGLE_RTOL = 0.005
FINER = 8  # the finer step: sequential.RAMP_STEPS times this


@pytest.fixture(scope="module", autouse=True)
def _needs_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; these tests need it")


@pytest.fixture(scope="module")
def cfg():
    return config.load(SEQ)


@pytest.fixture(scope="module")
def runs(cfg, tmp_path_factory):
    """QDFFR_P1 characterized twice into one result store, and the first run's outputs."""
    out = tmp_path_factory.mktemp("ffpower")
    with Store(out / FILE_NAME) as store:
        first = flow.characterize(cfg, cells=[CELL], jobs=2, store=store)
        second = flow.characterize(cfg, cells=[CELL], jobs=2, store=store)
    assert not first.failures and not first.unmeasured, (first.failures, first.unmeasured)
    flow.write(cfg, first, out)
    return first, second, out


def _cell_power(result) -> power_tables.CellPower:
    return next(c for c in result.cell_power if c.cell == CELL)


def test_every_flop_arc_has_finite_positive_energy_tables(runs):
    first, _, _ = runs
    cell = _cell_power(first)
    kinds = {(a.arc.related, a.arc.output): a for a in cell.arcs}
    assert set(kinds) == {("CLK", "Q"), ("CLK", "QB"), ("RSTB", "Q"), ("RSTB", "QB")}
    for (related, _), arc in kinds.items():
        want = (
            ["rise_power", "fall_power"]
            if related == "CLK"
            else [f"{arc.arc.output_edges[0]}_power"]
        )
        assert [t.quantity for t in arc.default] == want
        for table in arc.default:
            # The third index is the other output's load, as on the timing tables.
            assert table.axis_names == (
                power_tables.SLEW_AXIS,
                power_tables.LOAD_AXIS,
                power_tables.OTHER_LOAD_AXIS,
            )
            assert np.all(np.isfinite(table.values)) and np.all(table.values > 0), arc.arc.label


def _clock_points(result, output: str, edge: str) -> dict[tuple, Measurement]:
    return {
        (m.point.slew, m.point.load, m.point.other_load): m
        for m in result.measurements
        if isinstance(m, Measurement)
        and m.point.kind == "clock"
        and (m.point.output, m.point.output_edge) == (output, edge)
    }


@pytest.mark.parametrize("output", ["Q", "QB"])
def test_a_larger_load_on_a_rising_output_draws_its_cv2_from_the_supply(cfg, runs, output):
    # Charging a capacitor C from a supply V draws C·V² from the supply whatever the driver;
    # discharging it to ground draws nothing (Weste & Harris, CMOS VLSI Design, 4th ed., 2010,
    # on dynamic power). The same clock event into the grid's largest and smallest load on
    # the output: the supply energy differs by ΔC·V² on a rising output, by little on a falling
    # one, and the internal energy (the loads' C·V·dv taken off) barely moves.
    first, _, _ = runs
    vdd = cfg.process.vdd
    small, large = min(cfg.grid.load), max(cfg.grid.load)
    cv2 = (large - small) * vdd**2
    rising, falling = _clock_points(first, output, "rise"), _clock_points(first, output, "fall")
    for slew in cfg.grid.slew:
        for other in cfg.grid.related_load:
            lo, hi = rising[(slew, small, other)], rising[(slew, large, other)]
            label = f"{output} rise, slew {slew:.3g} s, other load {other:.3g} F"
            assert hi.supply_energy - lo.supply_energy >= (1 - CV2_RTOL) * cv2, label
            assert hi.supply_energy - lo.supply_energy == pytest.approx(cv2, rel=CV2_RTOL, abs=0), (
                label
            )
            assert abs(hi.internal_energy - lo.internal_energy) < CV2_RTOL * cv2, label
            lo, hi = falling[(slew, small, other)], falling[(slew, large, other)]
            assert abs(hi.supply_energy - lo.supply_energy) < FALL_RTOL * cv2, label


def test_clock_hidden_power_is_positive_per_stored_value(cfg, runs):
    # The clock toggling with the data equal to the stored value moves no output, but its
    # local inverters and the latches' transmission gates still switch: energy on both edges.
    first, _, _ = runs
    cell = _cell_power(first)
    clock = {h.when: h for h in cell.hidden if h.pin == "CLK"}
    assert sorted(clock) == ["!D&RSTB&!Q", "!D&RSTB&Q", "D&RSTB&!Q", "D&RSTB&Q"]
    for when, hidden in clock.items():
        # With the data opposite the stored value only the inactive (falling) edge leaves it.
        both = when in ("!D&RSTB&!Q", "D&RSTB&Q")
        want = ["rise_power", "fall_power"] if both else ["fall_power"]
        assert [t.quantity for t in hidden.tables] == want
        for table in hidden.tables:
            assert table.axis_names == (power_tables.SLEW_AXIS,)
            assert np.all(table.values > 0), (hidden.when, table.quantity)
    # The data pin under either clock level and either stored value, both edges at every slew.
    data = {h.when for h in cell.hidden if h.pin == "D"}
    assert data == {"!CLK&RSTB&!Q", "!CLK&RSTB&Q", "CLK&RSTB&!Q", "CLK&RSTB&Q"}
    assert len(first.toggles) == len(plan_toggles(cfg, [CELL])) == 28


def test_a_clock_edge_that_would_change_the_state_is_not_hidden(cfg):
    # Every hidden event is checked to leave the outputs at the stored level: with the data
    # opposite to the stored value the second clock edge captures it, and that is refused.
    cell = cfg.cell(CELL)
    deck = netlist.build_deck(cfg, cell)
    good = next(
        p for p in plan_toggles(cfg, [CELL]) if p.related == "CLK" and p.input_edge == "rise"
    )
    m = registry.measure(cfg, deck, good)
    assert m.energy > 0 and m.settled > 0
    flipped = tuple((p, not v) if p == "D" else (p, v) for p, v in good.side)
    bad = dataclasses.replace(good, side=flipped)
    with pytest.raises(MeasurementError, match="leaves its stored level"):
        registry.measure(cfg, deck, bad)


def test_flop_leakage_depends_on_the_stored_value(monkeypatch):
    # On the BSIM cards (subthreshold current modelled): every state leaks, and which devices
    # are off depends on the stored value, so under one input vector the two values differ.
    demo = config.load(DEMO)
    cell = demo.cell("QDFF_P1")
    deck = netlist.build_deck(demo, cell)
    states = registry.leakage(demo, deck)
    assert len(states) == 2 * 2**2  # stored value x (D, CLK)
    leak = {s.when: s.power for s in states}
    assert all(w > 0 for w in leak.values())
    spread = [abs(leak[f"{v}&!Q"] / leak[f"{v}&Q"] - 1) for v in ("!D&!CLK", "!D&CLK", "D&!CLK")]
    assert max(spread) > STATE_SPREAD, leak
    # The level read is settled: a hold ten times longer reads the same.
    window = sequential.settle_window(demo, deck)
    for state, vector in vectors(cell)[::3]:
        held = ffpower.state_current(demo, deck, state, vector, window)
        with monkeypatch.context() as longer:
            longer.setattr(ffpower, "_STATIC", {})
            longer.setattr(ffpower, "STATIC_HOLD", 10 * ffpower.STATIC_HOLD)
            again = ffpower.state_current(demo, deck, state, vector, window)
        assert again == pytest.approx(held, rel=HOLD_RTOL, abs=0), (state, vector)


def test_a_vector_that_forces_the_other_state_is_no_leakage_state(cfg):
    # With RSTB low the clear forces Q = 0: a stored 1 cannot rest under it.
    cell = cfg.cell(CELL)
    rests = vectors(cell)
    assert len(rests) == 8 + 4
    assert all(state is False for state, v in rests if not v["RSTB"])
    with pytest.raises(MeasurementError, match="cannot hold 1 under D&!CLK&!RSTB"):
        ffpower.state_current(
            cfg,
            netlist.build_deck(cfg, cell),
            True,
            {"D": True, "CLK": False, "RSTB": False},
            window=1e-9,
        )


def _text(value: object) -> str:
    return str(getattr(value, "value", value))


def test_flop_power_reads_back_from_the_liberty_file(cfg, runs):
    first, _, out = runs
    cell = _cell_power(first)
    # The three-axis file: the energies as measured, on the other output's load too.
    lib = parse_liberty((out / "seq_l1.3d.lib").read_text(encoding="utf-8"))
    group = lib.get_group("cell", CELL)
    energy = cfg.cap_scale  # 1 pF x 1 V^2 = 1 pJ: the library's energy unit
    _, watts = power_unit(cfg.time_unit, cfg.cap_unit)
    assert float(group["cell_leakage_power"]) == pytest.approx(
        cell.cell_leakage / watts, rel=RTOL_READBACK, abs=0
    )
    assert cell.cell_leakage == pytest.approx(
        np.mean([s.power for s in cell.leakage]), rel=1e-12, abs=0
    )
    written = {_text(g["when"]): float(g["value"]) for g in group.get_groups("leakage_power")}
    assert written == pytest.approx(
        {s.when: s.power / watts for s in cell.leakage}, rel=1e-6, abs=0
    )
    checked = 0
    for arc in cell.arcs:
        pin = group.get_group("pin", arc.arc.output)
        (found,) = [
            g
            for g in pin.get_groups("internal_power")
            if _text(g["related_pin"]) == arc.arc.related
        ]
        assert _text(found["equal_or_opposite_output"]) == arc.arc.other
        for table in arc.default:
            got = found.get_group(table.quantity).get_array("values")
            want = table.values / energy
            np.testing.assert_allclose(got.reshape(want.shape), want, rtol=RTOL_READBACK, atol=0)
            checked += 1
    for hidden in cell.hidden:
        pin = group.get_group("pin", hidden.pin)
        (found,) = [g for g in pin.get_groups("internal_power") if _text(g["when"]) == hidden.when]
        for table in hidden.tables:
            got = found.get_group(table.quantity).get_array("values").reshape(-1)
            np.testing.assert_allclose(got, table.values / energy, rtol=RTOL_READBACK, atol=0)
            checked += 1
    assert checked == (2 + 2 + 1 + 1) + (2 * 2 + 2 * 1) + 4 * 2


def test_the_store_keeps_flop_energies_and_hidden_power(runs):
    # A second run with the same store simulates nothing and gives the same power.
    first, second, _ = runs
    assert second.simulated == 0 and second.simulations == 0
    assert {m.point for m in second.toggles} <= second.reused
    tables = {}
    for run in (first, second):
        cell = _cell_power(run)
        arcs = [t for a in cell.arcs for t in a.default]
        tables[run is first] = [
            t.values for t in (*arcs, *(t for h in cell.hidden for t in h.tables))
        ]
    assert len(tables[True]) == len(tables[False]) == 6 + 14
    for old, new in zip(tables[True], tables[False], strict=True):
        np.testing.assert_array_equal(old, new)
    clocked = [m for m in second.measurements if isinstance(m.point, TimingPoint)]
    assert clocked and all(m.internal_energy is not None for m in clocked)
    assert all(m.static_current is not None for m in clocked)


def test_a_flop_s_hidden_energy_converges_from_the_held_state(monkeypatch):
    # The data pin's smallest hidden events (D moving while the clock holds the master
    # closed, or opens it with the slave holding) at the sharpest slew: each toggle starts
    # from the held state with every input at its level before the edge.
    demo = config.load(DEMO_CONFIG)
    cell = demo.cell("QDFF_P1")
    deck = netlist.build_deck(demo, cell)
    sharp = min(cell.grid.slew)
    toggles = [t for t in plan_toggles(demo, [cell.name]) if t.related == "D" and t.slew == sharp]
    assert len(toggles) >= 4
    usual = [registry.measure(demo, deck, t).energy for t in toggles]
    monkeypatch.setattr(sequential, "RAMP_STEPS", sequential.RAMP_STEPS * FINER)
    for toggle, energy in zip(toggles, usual, strict=True):
        finer = registry.measure(demo, deck, toggle).energy
        assert energy == pytest.approx(finer, rel=TOGGLE_RTOL, abs=0), toggle
