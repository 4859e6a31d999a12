"""The fast path (first step from the series' transition model, chunks on several processes,
testbenches kept loaded) against the plain one; needs ngspice (fails without it)."""

from __future__ import annotations

import dataclasses
import math
import shutil
from pathlib import Path

import pytest

from charflow.config import library as config
from charflow.flow import characterize as flow
from charflow.measurement import combinational as timing
from charflow.measurement import stepsize
from charflow.measurement.combinational import first_step, model_for
from charflow.plan import arcs as planning
from charflow.records.errors import SimulatorError
from charflow.simulation import backends as simulate
from charflow.simulation import netlist

DATA = Path(__file__).parent / "data"
SMALL_L1 = DATA / "small_l1.toml"
RC_CONFIG = DATA / "rc_cell.toml"
R_OHMS = 1e3  # R1 in tests/data/rc_cell.sp

# Both paths put at least samples_per_edge / REFINE_SLACK (about 13) samples on the output
# edge and interpolate linearly between them; on the level-1 grid they differ by 0.8 % at most.
MEASURE_RTOL = 1e-2
RC_RTOL = 1e-2  # the probes' transitions against the RC closed form


@pytest.fixture(scope="module", autouse=True)
def _needs_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; these tests need it")


@pytest.fixture(scope="module")
def small():
    return config.load(SMALL_L1)


def test_estimated_first_step_keeps_results_within_tolerance(small):
    decks = {c.name: netlist.build_deck(small, c) for c in small.cells}
    fast_runs = plain_runs = 0
    for point in planning.plan(small).points:
        deck = decks[point.cell]
        fast = timing.measure_point(small, deck, point)
        plain = timing.measure_point(small, deck, point, step=stepsize.plain_step(small, point))
        assert fast.delay == pytest.approx(plain.delay, rel=MEASURE_RTOL, abs=0), point.label
        assert fast.transition == pytest.approx(plain.transition, rel=MEASURE_RTOL, abs=0), (
            point.label
        )
        fast_runs += fast.runs
        plain_runs += plain.runs
    # The point of the estimate: fewer refinement re-runs than the ramp-sized step.
    assert fast_runs < plain_runs


def test_rc_transition_model_is_the_step_response():
    # A near-step into an RC rises 20-80 % in ln4 RC (Rabaey, Chandrakasan & Nikolic, Digital
    # Integrated Circuits, 2nd ed., 2003): the probes at the smallest slew must find a
    # transition of ln4 R C0 at the smallest load, growing by ln4 R per farad.
    cfg = config.load(RC_CONFIG)
    cell = cfg.cell("RCCELL")
    deck = netlist.build_deck(cfg, cell)
    point = planning.plan(cfg).points[0]
    model = model_for(cfg, deck, point)
    assert model is not None
    c0 = cell.grid.load[0]
    assert model.base == pytest.approx(math.log(4.0) * R_OHMS * c0, rel=RC_RTOL, abs=0)
    assert model.per_farad == pytest.approx(math.log(4.0) * R_OHMS, rel=RC_RTOL, abs=0)


def test_results_do_not_depend_on_worker_count(small):
    one = flow.characterize(small, jobs=1)
    two = flow.characterize(small, jobs=2)
    assert not one.failures and not two.failures
    for a, b in zip(one.measurements, two.measurements, strict=True):
        assert (a.point, a.delay, a.transition, a.input_charge) == (
            b.point,
            b.delay,
            b.transition,
            b.input_charge,
        )


def test_backend_switches_and_evicts_loaded_testbenches(small, monkeypatch):
    # Two cells, alternately, with room for one testbench only: every switch reads again.
    inv, nand = (small.cell(n) for n in ("QINV_P1", "QNAND2_P1"))
    decks = [netlist.build_deck(small, c) for c in (inv, nand)]
    points = [planning.plan(small, [c.name]).points[4] for c in (inv, nand)]
    want = [timing.measure_point(small, d, p) for d, p in zip(decks, points, strict=True)]
    monkeypatch.setattr(simulate, "MAX_CIRCUITS", 1)
    for _ in range(2):
        for deck, point, m in zip(decks, points, want, strict=True):
            got = timing.measure_point(small, deck, point)
            assert (got.delay, got.transition) == (m.delay, m.transition), point.label


def test_probe_failure_falls_back_to_the_plain_step(small):
    # IB = 0 holds NAND2's output high: the probes cannot measure an edge, so no model.
    cell = small.cell("QNAND2_P1")
    deck = netlist.build_deck(small, cell)
    point = dataclasses.replace(
        planning.plan(small, ["QNAND2_P1"]).points[0], side=(("IB", False),)
    )
    assert model_for(small, deck, point) is None
    assert first_step(small, deck, point) == stepsize.plain_step(small, point)


def test_a_testbench_that_cannot_be_read_leaves_the_others_in_place(small):
    cell = small.cell("QINV_P1")
    deck = netlist.build_deck(small, cell)
    point = planning.plan(small, ["QINV_P1"]).points[4]
    want = timing.measure_point(small, deck, point)
    text = deck.text.replace("xdut ", "xbroken cf_in_a cf_out_y no_such_subckt\nxdut ")
    broken = dataclasses.replace(deck, text=text, key="broken")
    backend = timing.backend_for(small)
    with pytest.raises(SimulatorError, match="cannot read the testbench"):
        backend.load(broken)
    got = timing.measure_point(small, deck, point)
    assert (got.delay, got.transition) == (want.delay, want.transition)
