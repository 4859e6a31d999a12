"""Simulated sweep points against closed-form circuit results; needs ngspice (fails without it)."""

from __future__ import annotations

import math
import shutil
import tomllib
from pathlib import Path

import pytest
from scipy.optimize import brentq

from charflow.config import library as config
from charflow.config.resources import MODEL_DIR, TEMPLATE_DIR
from charflow.flow import characterize as flow
from charflow.measurement import combinational as timing
from charflow.measurement import registry
from charflow.plan import arcs as planning
from charflow.records.errors import FunctionalMismatchError, MeasurementError
from charflow.records.points import TimingPoint
from charflow.simulation import netlist

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "tests" / "data"
RC_CONFIG = DATA / "rc_cell.toml"
SMALL_L1 = DATA / "small_l1.toml"
CAP_PIN_CONFIG = DATA / "cap_pin.toml"
CA, CM = 2e-15, 1e-15  # F: the input's capacitors in tests/data/cap_pin.sp
R_OHMS = 1e3  # R1 in tests/data/rc_cell.sp

RC_RTOL = 5e-3  # simulated RC edges against the closed forms
BACKEND_RTOL = 1e-3  # shared against subprocess ngspice on the same point
EFFORT_RTOL = 0.15  # pin capacitance ratios against logical effort
GATE_CAP_RTOL = 0.10  # INV pin capacitance against the level-1 card's gate capacitance
CHARGE_RTOL = 0.02  # a pin's charge over a full swing, from slew to slew
LINEAR_CAP_RTOL = 3e-3  # a known capacitor's value: the output settles to 0.1 % of its swing
# A plain capacitor's charge up to the input's delay threshold against C V_threshold: measured
# 0.2 % short at 0.1 ns slews, 0.9-2.0 % at 5 ps (December 2026): the current jumps at the
# edge's start and the trapezoidal rule counts half of the first step's charge (over the whole
# edge the jump at its end gives the half back).
THRESHOLD_CHARGE_RTOL = 0.025
# The same capacitor's charge between the slew thresholds against C (upper - lower) Vdd: the
# window lies inside the ramp, where the current is constant (no jump to miss): measured 0.2 %
# short on the pin's values, 0.33 % at worst on a point (December 2026).
SLEW_WINDOW_CHARGE_RTOL = 0.005
BRENTQ_XTOL = 1e-18  # s


@pytest.fixture(scope="module", autouse=True)
def _needs_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; these tests need it")


@pytest.fixture(scope="module")
def rc():
    cfg = config.load(RC_CONFIG)
    cell = cfg.cell("RCCELL")
    return cfg, netlist.build_deck(cfg, cell), planning.plan(cfg).points


@pytest.fixture(scope="module")
def small():
    return config.load(SMALL_L1)


def _ramp_response(t: float, duration: float, tau: float, vdd: float) -> float:
    """A first-order RC driven by a 0 -> vdd ramp of ``duration`` starting at t = 0.

    Convolving the ramp with the step response (Rabaey, Chandrakasan & Nikolic, Digital
    Integrated Circuits, 2nd ed., 2003): v = V/T (t - tau (1 - e^(-t/tau))) while the ramp
    lasts, and v = V (1 - (tau/T)(e^(T/tau) - 1) e^(-t/tau)) after it.
    """
    if t <= duration:
        return vdd / duration * (t + tau * math.expm1(-t / tau))
    return vdd * (1.0 - tau / duration * math.expm1(duration / tau) * math.exp(-t / tau))


def _closed_form(cfg: config.LibraryConfig, point: TimingPoint) -> tuple[float, float]:
    """(delay, transition) of the RC cell at ``point`` from the ramp response."""
    vdd = cfg.process.vdd
    thr = cfg.thresholds
    tau = R_OHMS * point.load
    # Full-swing ramp for a table slew (design convention, /work/shared/design.md).
    in_lower, in_upper = thr.slew_band(point.input_edge)
    duration = point.slew * thr.slew_derate / (in_upper - in_lower)
    rising = point.output_edge == "rise"

    def when(fraction: float) -> float:
        # A falling edge is vdd minus the rising one.
        level = fraction if rising else 1.0 - fraction
        return brentq(
            lambda t: _ramp_response(t, duration, tau, vdd) - level * vdd,
            0.0,
            duration + 50.0 * tau,
            xtol=BRENTQ_XTOL,
        )

    along = thr.delay_input(point.input_edge)
    t_in = (along if point.input_edge == "rise" else 1.0 - along) * duration
    lower, upper = thr.slew_band(point.output_edge)
    slew = when(upper) - when(lower) if rising else when(lower) - when(upper)
    return when(thr.delay_output(point.output_edge)) - t_in, slew / thr.slew_derate


def _rc_points(rc, fast: bool):
    cfg, _, points = rc
    chosen = [p for p in points if (p.slew == min(cfg.grid.slew)) == fast]
    assert {p.output_edge for p in chosen} == {"rise", "fall"}
    return chosen


def test_rc_fast_ramp_is_a_step(rc):
    # Step into an RC: 50 % delay ln2 RC, 20-80 % transition ln4 RC (Rabaey, Chandrakasan &
    # Nikolic, Digital Integrated Circuits, 2nd ed., 2003).
    cfg, deck, _ = rc
    for point in _rc_points(rc, fast=True):
        tau = R_OHMS * point.load
        assert point.slew <= tau / 100.0
        m = timing.measure_point(cfg, deck, point)
        assert m.delay == pytest.approx(math.log(2.0) * tau, rel=RC_RTOL, abs=0), point.label
        assert m.transition == pytest.approx(math.log(4.0) * tau, rel=RC_RTOL, abs=0), point.label


def test_rc_slow_ramp_follows_the_ramp_response(rc):
    cfg, deck, _ = rc
    for point in _rc_points(rc, fast=False):
        assert point.slew >= 2.0 * R_OHMS * point.load
        delay, slew = _closed_form(cfg, point)
        m = timing.measure_point(cfg, deck, point)
        assert m.delay == pytest.approx(delay, rel=RC_RTOL, abs=0), point.label
        assert m.transition == pytest.approx(slew, rel=RC_RTOL, abs=0), point.label


def test_shared_and_subprocess_backends_agree(small):
    doc = tomllib.loads(SMALL_L1.read_text(encoding="utf-8"))
    doc["simulation"] = {"backend": "subprocess"}
    batch = config.parse(doc, SMALL_L1)
    assert (small.simulation.backend, batch.simulation.backend) == ("shared", "subprocess")
    cell = small.cell("QINV_P1")
    deck = netlist.build_deck(small, cell)
    middle = (cell.grid.slew[1], cell.grid.load[1])
    points = [p for p in planning.plan(small, ["QINV_P1"]).points if (p.slew, p.load) == middle]
    assert len(points) == 2
    for point in points:
        a = timing.measure_point(small, deck, point)
        b = timing.measure_point(batch, deck, point)
        assert a.delay == pytest.approx(b.delay, rel=BACKEND_RTOL, abs=0), point.label
        assert a.transition == pytest.approx(b.transition, rel=BACKEND_RTOL, abs=0), point.label


def test_check_function_names_cell_and_vector(tmp_path):
    nand2 = TEMPLATE_DIR / "cells" / "nand2.sp.j2"
    models = MODEL_DIR / "vellum90_l1.lib"
    path = tmp_path / "wrong.toml"
    path.write_text(
        f"""[library]
name = "wrong"

[process]
models = [{{ file = "{models.as_posix()}", section = "tt" }}]
vdd = 1.2

[grid]
slew = [0.05]
load = [0.005]

[[cell]]
name = "QNAND2_P1"
template = "{nand2.as_posix()}"
params = {{ wn = 0.8e-6, wp = 0.8e-6, l = 0.1e-6 }}
inputs = ["IA", "IB"]
outputs = {{ Y = "!(IA|IB)" }}
""",
        encoding="utf-8",
    )
    cfg = config.load(path)
    deck = netlist.build_deck(cfg, cfg.cell("QNAND2_P1"))
    with pytest.raises(FunctionalMismatchError) as caught:
        registry.check_function(cfg, deck)
    # The first vector where NAND and NOR differ, in charflow's counting order.
    assert caught.value.context["cell"] == "QNAND2_P1"
    assert caught.value.context["vector"] == "IA=0 IB=1"
    assert "QNAND2_P1" in str(caught.value) and "IA=0 IB=1" in str(caught.value)


@pytest.mark.parametrize(
    ("input_edge", "output_edge", "reason"),
    [("rise", "fall", "had not settled"), ("fall", "rise", "starts at")],
)
def test_side_input_that_never_sensitizes(small, input_edge, output_edge, reason):
    # IB = 0 holds NAND2's output high whatever IA does: the output never switches.
    cell = small.cell("QNAND2_P1")
    point = TimingPoint(
        cell.name,
        "IA",
        "Y",
        (("IB", False),),
        input_edge,
        output_edge,
        cell.grid.slew[0],
        cell.grid.load[0],
    )
    with pytest.raises(MeasurementError, match=reason):
        timing.measure_point(small, netlist.build_deck(small, cell), point)


@pytest.fixture(scope="module")
def pin_caps(small):
    result = flow.characterize(small, jobs=1)
    assert not result.failures
    return {(c.cell.name, p.pin): p.capacitance for c in result.cells for p in c.pins}


@pytest.mark.parametrize(("cell", "effort"), [("QNAND2_P1", 4.0 / 3.0), ("QNOR2_P1", 5.0 / 3.0)])
def test_pin_capacitance_follows_logical_effort(pin_caps, cell, effort):
    # Gates sized to the inverter's drive have input capacitance NAND2 : INV = 4/3 and
    # NOR2 : INV = 5/3 with a p/n mobility ratio of 2 (Sutherland, Sproull & Harris, Logical
    # Effort, 1999); the demo cells are sized that way (templates/cells/SIZES.md).
    inv = pin_caps[("QINV_P1", "A")]
    for pin in ("IA", "IB"):
        assert pin_caps[(cell, pin)] / inv == pytest.approx(effort, rel=EFFORT_RTOL, abs=0), pin


def _model_params(path: Path, section: str) -> dict[str, dict[str, float]]:
    """The numbers of each .model card in one .lib section of a SPICE model file."""
    cards: dict[str, dict[str, float]] = {}
    inside = False
    name = ""
    for raw in path.read_text(encoding="utf-8").splitlines():
        line = raw.split("*")[0].strip().lower() if not raw.startswith("*") else ""
        if line.startswith(".lib"):
            inside = line.split()[1:] == [section]
        elif line.startswith(".endl"):
            inside = False
        elif inside and line.startswith(".model"):
            name = line.split()[1]
            cards[name] = {}
        elif inside and line.startswith("+"):
            for pair in line[1:].split():
                key, value = pair.split("=")
                cards[name][key] = float(value)
    return cards


def test_pin_charge_does_not_depend_on_the_slew(small):
    # A capacitor's charge is set by its terminal voltages, not by the path between them
    # (charge conservation, any circuits text), so a pin's charge over a full swing, with the
    # output swinging too, is the same at every slew. The run must last until the input ramp
    # is over: a slow ramp leaves the output at its rail long before (its charge came out 23 %
    # short when the run stopped at the output alone).
    cell = small.cell("QINV_P1")
    deck = netlist.build_deck(small, cell)
    smallest = min(cell.grid.load)
    for edge in ("rise", "fall"):
        charges = [
            timing.measure_point(small, deck, p).input_charge
            for p in planning.plan(small, ["QINV_P1"]).points
            if p.load == smallest and p.input_edge == edge
        ]
        assert len(charges) == len(cell.grid.slew)
        assert max(charges) == pytest.approx(min(charges), rel=CHARGE_RTOL, abs=0), edge


def test_inverter_pin_capacitance_is_its_gate_capacitance(small, pin_caps):
    # Gate capacitance Cg = Cox W Leff + (CGSO + CGDO) W per device, Cox = eps_ox / TOX with
    # eps_ox = 3.9 eps_0 (Weste & Harris, CMOS VLSI Design, 4th ed., 2010); Leff = L - 2 LD as
    # ngspice's level-1 model takes it (the ngspice manual, from memory). The measured value is
    # an effective one: the Miller effect doubles the gate-drain overlap (the output swings
    # against the input, +0.3 fF here), while the level-1 Meyer charge over a full swing stays
    # below Cox W Leff V (depletion and saturation); each is under 10 % of the total.
    cell = small.cell("QINV_P1")
    params = dict(cell.params)
    cards = _model_params(small.process.models[0].path, small.process.models[0].section)
    eps_ox = 3.9 * 8.8541878128e-12  # F/m
    gate = 0.0
    for model, width in (("nch", params["wn"]), ("pch", params["wp"])):
        card = cards[model]
        leff = params["l"] - 2.0 * card["ld"]
        gate += eps_ox / card["tox"] * width * leff + (card["cgso"] + card["cgdo"]) * width
    assert pin_caps[("QINV_P1", "A")] == pytest.approx(gate, rel=GATE_CAP_RTOL, abs=0)


def test_each_edge_of_a_linear_input_capacitor_reads_its_value():
    # A linear capacitor takes Q = C dV, the same on either edge; one from the input to an
    # output that swings the other way takes C 2V, the Miller effect (Rabaey, Chandrakasan &
    # Nikolic, Digital Integrated Circuits, 2nd ed., 2003). Each edge's value is that edge's
    # own charge divided by vdd.
    cfg = config.load(CAP_PIN_CONFIG)
    result = flow.characterize(cfg, jobs=1)
    assert not result.failures
    ((pin,),) = [c.pins for c in result.cells]
    for edge in ("rise", "fall"):
        charges = [
            abs(m.input_charge)
            for m in result.measurements
            if m.point.input_edge == edge and m.point.load == min(cfg.cells[0].grid.load)
        ]
        vdd = cfg.process.vdd
        assert getattr(pin, edge) == pytest.approx(
            sum(charges) / len(charges) / vdd, rel=1e-12, abs=0
        )
        assert getattr(pin, edge) == pytest.approx(CA + 2 * CM, rel=LINEAR_CAP_RTOL, abs=0)


def _plain_capacitor_config(tmp: Path) -> Path:
    """tests/data/cap_pin.toml with CM removed: the input carries CA to VSS alone."""
    sp = (DATA / "cap_pin.sp").read_text(encoding="utf-8")
    (tmp / "cap_pin.sp").write_text(sp.replace("CM A Y 1f\n", ""), encoding="utf-8")
    text = CAP_PIN_CONFIG.read_text(encoding="utf-8").replace('"../../', f'"{ROOT.as_posix()}/')
    path = tmp / "cap_pin.toml"
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def plain_capacitor(tmp_path_factory):
    cfg = config.load(_plain_capacitor_config(tmp_path_factory.mktemp("plain_cap")))
    result = flow.characterize(cfg, jobs=1)
    assert not result.failures
    return cfg, result


def test_charge_to_the_delay_threshold_of_a_plain_capacitor(plain_capacitor):
    # A linear capacitor holds Q = C V (Rabaey, Chandrakasan & Nikolic, Digital Integrated
    # Circuits, 2nd ed., 2003): from the edge's start to the input's delay threshold it takes
    # CA V_threshold, so the capacitance up to the threshold is CA on either edge.
    cfg, result = plain_capacitor
    vdd = cfg.process.vdd
    for m in result.measurements:
        level = cfg.thresholds.delay_input(m.point.input_edge)
        swing = (level if m.point.input_edge == "rise" else 1.0 - level) * vdd
        assert m.input_charge_to_threshold is not None
        expected = CA * swing * (1 if m.point.input_edge == "rise" else -1)
        assert m.input_charge_to_threshold == pytest.approx(
            expected, rel=THRESHOLD_CHARGE_RTOL, abs=0
        ), m.point.label
    ((pin,),) = [c.pins for c in result.cells]
    assert pin.rise_to_threshold == pytest.approx(CA, rel=THRESHOLD_CHARGE_RTOL, abs=0)
    assert pin.fall_to_threshold == pytest.approx(CA, rel=THRESHOLD_CHARGE_RTOL, abs=0)


def test_charge_between_the_slew_thresholds_of_a_plain_capacitor(plain_capacitor):
    # Q = C V again (Rabaey et al., 2003): between the input's two slew-threshold crossings a
    # plain capacitor takes CA (upper - lower) Vdd on either edge, so its slew-window
    # capacitance is CA.
    cfg, result = plain_capacitor
    vdd = cfg.process.vdd
    for m in result.measurements:
        lower, upper = cfg.thresholds.slew_band(m.point.input_edge)
        sign = 1 if m.point.input_edge == "rise" else -1
        assert m.input_charge_slew_window is not None
        assert m.input_charge_slew_window == pytest.approx(
            sign * CA * (upper - lower) * vdd, rel=SLEW_WINDOW_CHARGE_RTOL, abs=0
        ), m.point.label
    ((pin,),) = [c.pins for c in result.cells]
    assert pin.rise_slew_window == pytest.approx(CA, rel=SLEW_WINDOW_CHARGE_RTOL, abs=0)
    assert pin.fall_slew_window == pytest.approx(CA, rel=SLEW_WINDOW_CHARGE_RTOL, abs=0)


def test_charge_to_the_delay_threshold_is_part_of_the_edge(small):
    # Charge flows into a level-1 inverter's gate all through its input edge (its gate
    # capacitance and the Miller charge of the output swinging the other way, Weste & Harris,
    # CMOS VLSI Design, 4th ed., 2010): up to the 50 % point it has drawn some, not all, of it.
    cell = small.cell("QINV_P1")
    deck = netlist.build_deck(small, cell)
    smallest = min(cell.grid.load)
    for p in planning.plan(small, ["QINV_P1"]).points:
        if p.load != smallest or p.slew != cell.grid.slew[len(cell.grid.slew) // 2]:
            continue
        m = timing.measure_point(small, deck, p)
        assert m.input_charge_to_threshold is not None
        assert 0 < abs(m.input_charge_to_threshold) < abs(m.input_charge), p.label
        assert (m.input_charge_to_threshold > 0) == (p.input_edge == "rise"), p.label
