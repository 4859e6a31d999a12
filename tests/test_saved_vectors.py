"""What a transient keeps of its time points in the shared backend: needs ngspice (fails
without it).

ngspice stores every node voltage and source current at each accepted time point unless a
``save`` names the ones wanted (ngspice User's Manual, the ``save`` command: "save a set of
outputs, discarding the rest"; from memory). A point reads a handful of vectors, so its run
saves those and the nodes its stop condition reads; what it measures must not move by a bit.
Values are held against a run that keeps everything and against the closed form of an RC.
"""

from __future__ import annotations

import math
import re
import shutil
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from charflow.config import library as config
from charflow.measurement import combinational as timing
from charflow.measurement.combinational import backend_for
from charflow.measurement.registry import measure_chunk
from charflow.plan import arcs as planning
from charflow.records.errors import SimulatorError
from charflow.records.outcomes import Failure, Measurement
from charflow.simulation import backends, netlist
from charflow.simulation.backends import Request, saved

DATA = Path(__file__).resolve().parent / "data"
RC_CONFIG = DATA / "rc_cell.toml"
R_OHMS = 1e3  # R1 in tests/data/rc_cell.sp
RC_RTOL = 5e-3  # as tests/test_timing.py: simulated RC edges against the closed form
STEPS_PER_TAU = 50  # the first maximum step of a point, a fraction of its RC
STOP_LEVEL = 0.9  # of vdd: where the test's own stop condition ends a run
STOP_STEPS = 4  # a run stops within this many of its largest steps of its condition's time


@pytest.fixture(scope="module", autouse=True)
def _needs_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; these tests need it")


@pytest.fixture(scope="module")
def rc():
    cfg = config.load(RC_CONFIG)
    points = planning.plan(cfg).points
    rising = [p for p in points if p.input_edge == "rise" and p.slew == min(cfg.grid.slew)]
    return cfg, netlist.build_deck(cfg, cfg.cell("RCCELL")), sorted(rising, key=lambda p: p.load)


def _step(point) -> float:
    return R_OHMS * point.load / STEPS_PER_TAU


def _requests(monkeypatch, cfg, deck, point) -> list[Request]:
    """The transients ``point``'s measurement sends the backend."""
    backend = backend_for(cfg)
    sent: list[Request] = []
    run = backend.run

    def spy(request):
        sent.append(request)
        return run(request)

    monkeypatch.setattr(backend, "run", spy)
    timing.measure_point(cfg, deck, point, step=_step(point))
    monkeypatch.setattr(backend, "run", run)
    return [r for r in sent if r.analysis.startswith("tran")]


def _plot_listing(monkeypatch, backend) -> list[str]:
    """ngspice's listing of each run's plot, taken just before the plot is destroyed."""
    listings: list[str] = []
    after = backend._after

    def spy(request):
        listings.append(backend._ng.exec_command("display"))
        return after(request)

    monkeypatch.setattr(backend, "_after", spy)
    return listings


def test_saved_names_the_vectors_asked_for_and_the_stop_condition_nodes(rc):
    _, deck, _ = rc
    request = Request(
        deck,
        (),
        "tran 1e-12 1e-9 0 1e-12",
        (deck.output_node("Y"), "vin_a#branch"),
        stop_when=f"v({deck.output_node('Y')}) > 1.1 when V(CF_OUT_Z) < 0.1 when "
        "i(vin_b) > 1e-6 when I(VIN_A) < 0 when time > 1e-10",
    )
    # Once each, the time first; ngspice's names are lower case, a current is its branch.
    assert saved(request) == ("time", "cf_out_y", "vin_a#branch", "cf_out_z", "vin_b#branch")


def test_a_run_keeps_only_the_saved_vectors(rc, monkeypatch):
    cfg, deck, points = rc
    backend = backend_for(cfg)
    timing.measure_point(cfg, deck, points[0], step=_step(points[0]))  # testbench loaded
    listings = _plot_listing(monkeypatch, backend)
    request = _requests(monkeypatch, cfg, deck, points[0])[0]
    # One line per vector, "name : type, real, N long"; a branch current named as ngspice
    # does (vin_a#branch).
    listed = re.findall(r"^\s*(\S+)\s*:\s*\w+, real, \d+ long", listings[-1], flags=re.M)
    assert {n.lower() for n in listed} == set(saved(request))


def test_saved_vectors_are_bit_for_bit_those_of_a_run_that_keeps_everything(rc, monkeypatch):
    cfg, deck, points = rc
    backend = backend_for(cfg)
    for point in points:
        request = _requests(monkeypatch, cfg, deck, point)[-1]
        kept = backend.run(request).vectors
        monkeypatch.setattr(backends, "saved", lambda _: ("all",))  # ngspice's every vector
        everything = backend.run(request).vectors
        monkeypatch.undo()
        assert kept.keys() == everything.keys()
        for name in kept:
            assert np.array_equal(kept[name], everything[name]), (point.label, name)
        # Step into an RC: 50 % delay ln2 RC (Rabaey, Chandrakasan & Nikolic, Digital
        # Integrated Circuits, 2nd ed., 2003).
        m = timing.measure_point(cfg, deck, point, step=_step(point))
        tau = R_OHMS * point.load
        assert m.delay == pytest.approx(math.log(2.0) * tau, rel=RC_RTOL, abs=0), point.label


def test_a_stop_condition_on_a_node_not_asked_for_still_ends_the_run(rc, monkeypatch):
    cfg, deck, points = rc
    point = points[-1]
    request = _requests(monkeypatch, cfg, deck, point)[-1]
    out = deck.output_node("Y")
    vdd = cfg.process.vdd
    only_input = replace(
        request,
        vectors=(deck.input_node("A"),),
        stop_when=f"v({out}) > {STOP_LEVEL * vdd:.6g} when time > 0",
    )
    t = backend_for(cfg).run(only_input).vectors["time"]
    # A near-step into an RC reaches 90 % at ln10 RC (Rabaey et al., 2003, as above): the run
    # stops there, within a few of its steps, not at its cap.
    tau = R_OHMS * point.load
    start = timing.stimulus.ramp(point.slew, "rise", cfg.thresholds, vdd).start
    reach = start + math.log(1 / (1 - STOP_LEVEL)) * tau
    assert t[-1] == pytest.approx(reach, abs=STOP_STEPS * _step(point))


def test_a_run_that_fails_leaves_nothing_saved_for_the_next(rc, monkeypatch):
    cfg, deck, points = rc
    backend = backend_for(cfg)
    request = _requests(monkeypatch, cfg, deck, points[0])[-1]
    before = backend.run(request).vectors
    missing = replace(request, vectors=(*request.vectors, "cf_no_such_node"))
    with pytest.raises(SimulatorError, match="cf_no_such_node"):
        backend.run(missing)
    after = backend.run(request).vectors
    for name in before:
        assert np.array_equal(before[name], after[name]), name


def test_a_transient_asking_for_nothing_the_testbench_has_says_so(rc, monkeypatch):
    cfg, deck, points = rc
    backend = backend_for(cfg)
    request = _requests(monkeypatch, cfg, deck, points[0])[-1]
    # The pin's name, not its node (cf_out_y); no stop condition whose node would be saved.
    nothing = replace(request, vectors=("y",), stop_when=None)
    with pytest.raises(
        SimulatorError,
        match=r"cell RCCELL: .*did not run: the testbench has "
        r"none of y",
    ):
        backend.run(nothing)
    assert backend.run(request).vectors.keys() == set(saved(request))


def test_a_failed_point_in_a_chunk_names_itself_and_the_others_are_measured(rc, monkeypatch):
    cfg, deck, points = rc
    # No series probes (they would run the bad load too): each point at the plain first step.
    monkeypatch.setattr(timing, "_series", lambda config, deck, point: (None, {}))
    alone = [timing.measure_point(cfg, deck, p) for p in points]
    backend = backend_for(cfg)
    run = backend.run
    bad = points[1]

    def failing(request):
        # The second point's run asks for a node the testbench lacks.
        if f"= {bad.load:.12g}" in " ".join(request.alters) and "tran" in request.analysis:
            request = replace(request, vectors=(*request.vectors, "cf_no_such_node"))
        return run(request)

    monkeypatch.setattr(backend, "run", failing)
    outcomes = measure_chunk(cfg, deck, points)
    assert [o.point for o in outcomes] == points
    failed = outcomes[1]
    assert isinstance(failed, Failure)
    assert "cf_no_such_node" in failed.reason
    # Where it failed, in the library's units: cell, arc (pins and edges) and point.
    context = dict(failed.context)
    assert context["cell"] == "RCCELL"
    assert context["arc"].startswith("A->Y")
    assert context["point"] == "slew 0.005 ns, load 1 pf", context
    assert failed.where.startswith("cell RCCELL, arc A->Y")
    for got, want in zip(outcomes, alone, strict=True):
        if got is failed:
            continue
        assert isinstance(got, Measurement)
        assert (got.delay, got.transition, got.input_charge) == (
            want.delay,
            want.transition,
            want.input_charge,
        )
