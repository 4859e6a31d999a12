"""Path correlation (``charflow paths``): the whole-path simulation against outside references,
the tables' prediction against the simulation and against OpenSTA, the Verilog reader's errors,
the seeded generator.

References: an RC ladder's node equations (Kirchhoff's current law, any circuits text, e.g.
Rabaey, Chandrakasan & Nikolic, *Digital Integrated Circuits*, 2nd ed., 2003) integrated by
scipy's ``solve_ivp`` (Virtanen et al., "SciPy 1.0", Nature Methods 17, 2020); OpenSTA
(J. Cherry, Parallax Software, "OpenSTA", Debian package opensta) timing the same netlist from
the same Liberty file.
"""

from __future__ import annotations

import json
import re
import shutil
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from fixtures.shapes import DRIVER
from scipy.integrate import solve_ivp
from scipy.optimize import brentq

from charflow.analysis import opensta, pathgen, paths
from charflow.cli.main import main
from charflow.config import library as config
from charflow.config.resources import DEMO_CONFIG, MODEL_DIR
from charflow.flow import characterize as flow
from charflow.io import liberty, verilog
from charflow.records.errors import ConfigError, NetlistError, TableError
from charflow.simulation import stimulus

DATA = Path(__file__).resolve().parent / "data"
R_OHMS = 1e3  # R1 in tests/data/rc_cell.sp
LADDER_C = 0.5e-12  # F on every node of the RC ladder
LADDER_SLEW = 0.1e-9  # s, the input ramp's table slew
# ngspice's crossings against the integrated ladder: the simulator's step and tolerances.
LADDER_RTOL = 5e-3
# The charge a receiving pin drew in the ladder against the integrated node voltages: measured
# within 1.8e-6 (December 2026; both integrate the same currents, trapezoidal against scipy's
# dense output), so 1e-4.
DRAW_RTOL = 1e-4
# The tables' path delay against the whole path simulated, small_l1 (3 x 3 grid): measured
# -3.1 % to -4.4 % on CHAIN with the test's loads (December 2026; coarse-grid interpolation, the
# input shape and the pins' load, see docs/history/2026-12-paths.md), so a tolerance of 6 %.
PATH_RTOL = 0.06
# The same with --pin-load split: measured -8.5 % and -8.7 % on CHAIN at 0.05 ns (December
# 2026; whole-edge -3.0 / -2.3 %, threshold -10.1 / -10.5 %): these linear-ramp tables make
# every stage faster than a real gate's edge does, which the whole edge's larger load hides
# (docs/history/2026-12-pathfit.md), so a tolerance of 10 %.
SPLIT_PATH_RTOL = 0.10
# OpenSTA prints -digits 6 in ns: half a unit of the last digit, 0.5 fs, per printed value.
PRINTED_S = 0.5e-15 * 1.01

CHAIN = """\
// a chain with a fan-out of two and tied side inputs
module chain (a, y);
  input a;
  output y;
  wire n1, n2, n3, n4, b1;
  QINV_P1 u1 (.A(a), .Y(n1));
  QNAND2_P1 u2 (.IA(n1), .IB(1'b1), .Y(n2));
  QNOR2_P1 u3 (.IA(1'b0), .IB(n2), .Y(n3));
  QINV_P1 u4 (.A(n3), .Y(n4));
  QINV_P1 b (.A(n3), .Y(b1));
  QNAND2_P1 u5 (.IA(n4), .IB(1'b1), .Y(y));
endmodule
"""


@pytest.fixture(scope="module", autouse=True)
def _needs_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; these tests need it")


@pytest.fixture(scope="module")
def small():
    cfg = config.load(DATA / "small_l1.toml")
    result = flow.characterize(cfg, jobs=1)
    return cfg, result, {c.cell.name: c for c in result.cells}


def _circuit(tmp: Path, text: str, cfg):
    path = tmp / "c.v"
    path.write_text(text, encoding="utf-8")
    return verilog.read(path, cfg)


def _ladder(cfg, stages: int, port: float) -> list[float]:
    """Arrival at each ladder node (after the input's 50 % crossing), integrated by scipy."""
    sol, ramp, end, _ = _ladder_solution(cfg, stages, port)
    t_in = ramp.time_at(0.5)
    vdd = cfg.process.vdd
    return [
        brentq(lambda t, k=k: sol.sol(t)[k] - vdd / 2, ramp.start, end, xtol=1e-18) - t_in
        for k in range(stages)
    ]


def _ladder_solution(cfg, stages: int, port: float):
    """The ladder's node voltages integrated by scipy, its input ramp, end time and node caps."""
    vdd = cfg.process.vdd
    ramp = stimulus.ramp(LADDER_SLEW, "rise", cfg.thresholds, vdd)
    caps = np.full(stages, LADDER_C)
    caps[-1] += port

    def vin(t: float) -> float:
        return vdd * float(np.clip((t - ramp.start) / ramp.duration, 0.0, 1.0))

    def rhs(t, v):
        left = np.concatenate([[vin(t)], v[:-1]])
        right = np.concatenate([v[1:], [v[-1]]])  # the last node has no resistor onward
        return ((left - v) - (v - right)) / R_OHMS / caps

    end = ramp.end + 30 * R_OHMS * LADDER_C * stages**2
    sol = solve_ivp(
        rhs,
        (0.0, end),
        np.zeros(stages),
        method="Radau",
        rtol=1e-10,
        atol=1e-12,
        dense_output=True,
        max_step=ramp.duration / 20,
    )
    return sol, ramp, end, caps


def test_rc_ladder_against_scipy(tmp_path: Path) -> None:
    """A chain of RC cells is an RC ladder: every node's simulated arrival equals the ladder's
    node equations integrated by scipy."""
    cfg = config.load(DATA / "rc_cell.toml")
    cells = {c.cell.name: c for c in flow.characterize(cfg, jobs=1).cells}
    stages = 3
    nets = ["a", "n1", "n2", "y"]
    gates = "\n".join(
        f"  RCCELL u{k} (.A({nets[k - 1]}), .Y({nets[k]}));" for k in range(1, stages + 1)
    )
    text = f"module ladder (a, y);\n  input a;\n  output y;\n  wire n1, n2;\n{gates}\nendmodule\n"
    port = 0.2e-12
    setup = paths.Setup((LADDER_SLEW,), ("rise",), LADDER_C, port)
    corr = paths.correlate(cfg, [_circuit(tmp_path, text, cfg)], cells, setup, jobs=1)
    (run,) = corr.results
    assert run.failure is None
    expected = _ladder(cfg, stages, port)
    simulated = [s.sim_arrival for s in run.stages]
    np.testing.assert_allclose(simulated, expected, rtol=LADDER_RTOL)
    _check_ladder_draws(cfg, run, stages, port)


def _check_ladder_draws(cfg, run, stages: int, port: float) -> None:
    """What each receiving RC cell drew in the path: the charge into its pin is the charge
    on every capacitor after it (Kirchhoff's current law), so its to-threshold and
    slew-window capacitances follow from the integrated node voltages."""
    sol, ramp, end, caps = _ladder_solution(cfg, stages, port)
    vdd = cfg.process.vdd

    def crossing(k: int, level: float) -> float:
        return brentq(lambda t: sol.sol(t)[k] - level * vdd, ramp.start, end, xtol=1e-18)

    def charge(k: int, t: float) -> float:  # on the capacitors after net k
        return float(np.dot(caps[k + 1 :], sol.sol(t)[k + 1 :]))

    for k, stage in enumerate(run.stages[:-1]):  # the last stage drives the port only
        (draw,) = stage.receivers
        assert (draw.gate, draw.pin, draw.edge) == (f"u{k + 2}", "A", "rise")
        to_threshold = charge(k, crossing(k, 0.5)) / (0.5 * vdd)
        window = (charge(k, crossing(k, 0.8)) - charge(k, crossing(k, 0.2))) / (0.6 * vdd)
        _, got_threshold, got_window = draw.in_path
        assert got_threshold == pytest.approx(to_threshold, rel=DRAW_RTOL, abs=0)
        assert got_window == pytest.approx(window, rel=DRAW_RTOL, abs=0)


def test_prediction_against_simulation_and_opensta(small, tmp_path: Path) -> None:
    """The tables' path delay is within PATH_RTOL of the whole path simulated; OpenSTA, reading
    the same Liberty file, netlist and loads, gives charflow's prediction stage by stage."""
    cfg, result, cells = small
    circuit = _circuit(tmp_path, CHAIN, cfg)
    setup = paths.Setup((0.02e-9, 0.1e-9), ("rise", "fall"), 0.5e-15, 4e-15)
    corr = paths.correlate(cfg, [circuit], cells, setup, jobs=1)
    if shutil.which(opensta.PROGRAM) is None:
        pytest.fail("OpenSTA (sta) is not on PATH; this test needs it")
    lib = tmp_path / "small_l1.lib"
    lib.write_text(liberty.render(cfg, result.cells, result.cell_power), encoding="utf-8")
    net_loads = paths.loads(circuit, cells, setup.wire, setup.port)
    timed = opensta.time_circuit(cfg, lib, circuit, (net_loads.wire, net_loads.port), setup.slews)
    corr = paths.with_sta(corr, {circuit.name: timed})
    assert len(corr.results) == 4
    for run in corr.results:
        assert run.failure is None
        assert abs(run.error(run.predicted)) < PATH_RTOL
        for s in run.stages:
            assert s.sta_delay is not None and s.sta_slew is not None
            assert s.sta_delay == pytest.approx(s.predicted.delay, abs=PRINTED_S)
            assert s.sta_slew == pytest.approx(s.predicted.slew_out, abs=PRINTED_S)
            assert s.sta_arrival == pytest.approx(s.predicted.arrival, abs=2 * PRINTED_S)
    doc = paths.to_json(cfg, corr)
    assert doc["summary"]["opensta"]["paths"] == 4
    # Per input slew: two paths each, and together the whole run's spread.
    rows = doc["summary_by_input_slew"]
    assert [r["input_slew_s"] for r in rows] == list(setup.slews)
    assert [r["predicted"]["paths"] for r in rows] == [2, 2]
    worst = max(r["predicted"]["worst_abs_error"] for r in rows)
    assert worst == doc["summary"]["predicted"]["worst_abs_error"]
    lines = paths.summary_lines(cfg, corr)
    assert sum(line.strip().startswith("predicted at input slew") for line in lines) == 2
    _check_effect_spread(doc)
    assert any(line.strip().startswith("per stage, median") for line in lines)


def _check_effect_spread(doc: dict) -> None:
    """The JSON's spread of each stage effect against a plain loop over its own per-stage
    delays (simulated, replica, ramp, tables)."""
    got: dict[str, list[float]] = {"load": [], "shape": [], "interpolation": [], "local": []}
    for run in doc["paths"]:
        for st in run["per_stage"]:
            d = st["delay_s"]
            sim, replica, ramp, table = (
                d["simulated"],
                d["replica_lumped_load"],
                d["ramp_lumped_load"],
                d["tables_at_simulated_slew"],
            )
            got["load"].append((replica - sim) / sim)
            got["local"].append((table - sim) / sim)
            if ramp is not None:
                got["shape"].append((ramp - replica) / sim)
                got["interpolation"].append((table - ramp) / sim)
    for name, values in got.items():
        spread = doc["stage_effects_spread"][name]
        ordered = sorted(values)
        n = len(ordered)
        median = (ordered[(n - 1) // 2] + ordered[n // 2]) / 2
        assert spread["stages"] == n
        assert spread["median"] == pytest.approx(median, rel=1e-12, abs=0)
        assert (spread["lowest"], spread["highest"]) == (ordered[0], ordered[-1])
        beyond = sum(1 for v in values if abs(v) > paths.EFFECT_FLAG)
        assert spread["beyond_flag"] == beyond
        assert doc["stage_effects"][name] == pytest.approx(sum(values) / n, rel=1e-12, abs=0)


def test_replica_of_the_last_stage_is_the_stage(small, tmp_path: Path) -> None:
    """The last stage drives only the port's capacitor, so its replica (the same input
    waveform, the same lumped load) is the same circuit: equal delays (a self-check of the
    experiment); the first stage's replica sees the ideal ramp, as the ramp point does."""
    cfg, _, cells = small
    setup = paths.Setup((0.05e-9,), ("rise",), 0.0, 4e-15)
    corr = paths.correlate(cfg, [_circuit(tmp_path, CHAIN, cfg)], cells, setup, jobs=1)
    (run,) = corr.results
    last, first = run.stages[-1], run.stages[0]
    # abs=0: pytest.approx's default absolute tolerance, 1e-12, is a tenth of these delays.
    assert last.replica_delay == pytest.approx(last.sim_delay, rel=1e-9, abs=0)
    assert first.ramp_delay == pytest.approx(first.replica_delay, rel=LADDER_RTOL, abs=0)


def test_pin_load_to_the_threshold_times_paths_faster(small, tmp_path: Path) -> None:
    """``--pin-load threshold`` sums each pin's capacitance up to its delay threshold, a part
    of the whole edge's (tests/test_timing.py): every net's load is smaller, so every stage's
    predicted delay is (a table's delay grows with its load, common practice)."""
    cfg, _, cells = small
    circuit = _circuit(tmp_path, CHAIN, cfg)
    setup = paths.Setup((0.05e-9,), ("rise", "fall"), 0.0, 4e-15, paths.TO_THRESHOLD)
    corr = paths.correlate(cfg, [circuit], cells, setup, jobs=1)
    assert paths.to_json(cfg, corr)["settings"]["pin_load"] == "threshold"
    net_loads = paths.loads(circuit, cells, setup.wire, setup.port)
    assert len(corr.results) == 2
    for run in corr.results:
        assert run.failure is None
        whole = paths.predict(run.path, cells, net_loads, run.slew, run.edge)
        for s, w in zip(run.stages, whole, strict=True):
            assert s.predicted.load <= w.load, s.stage.gate
            assert s.predicted.delay <= w.delay, s.stage.gate
        assert run.predicted < whole[-1].arrival
    with pytest.raises(ConfigError, match="unknown pin load"):
        paths.with_pin_load(cells, "half-edge")


def test_pin_load_split_looks_delay_and_slew_up_at_their_own_loads(small, tmp_path: Path) -> None:
    """``--pin-load split``: each stage's delay is looked up at the pins' capacitance up to
    their delay threshold, its output slew at their capacitance between the slew thresholds
    (a receiver's capacitance before and after its threshold, the two-capacitance receiver idea
    of the Liberty CCS receiver model; Synopsys, Liberty User Guides and Reference Manual,
    "receiver_capacitance1_rise/2_rise", open standard), each bilinearly interpolated in its
    table (common practice); the path stays within SPLIT_PATH_RTOL of the whole path
    simulated."""
    cfg, _, cells = small
    circuit = _circuit(tmp_path, CHAIN, cfg)
    setup = paths.Setup((0.05e-9,), ("rise", "fall"), 0.0, 4e-15, paths.SPLIT)
    corr = paths.correlate(cfg, [circuit], cells, setup, jobs=1)
    doc = paths.to_json(cfg, corr)
    assert doc["settings"]["pin_load"] == "split"
    pins = {(c, p.pin): p for c, t in cells.items() for p in t.pins}
    net_loads = paths.loads(circuit, cells, setup.wire, setup.port)
    assert len(corr.results) == 2
    for run, jrun in zip(corr.results, doc["paths"], strict=True):
        assert run.failure is None
        assert abs(run.error(run.predicted)) < SPLIT_PATH_RTOL
        for s, record in zip(run.stages, jrun["per_stage"], strict=True):
            t = s.predicted
            on_net = net_loads.pins.get(s.stage.net_out, ())
            port = net_loads.port.get(s.stage.net_out, 0.0)
            edge = t.output_edge
            first = sum(getattr(pins[c, p], f"{edge}_to_threshold") for _, c, p in on_net)
            second = sum(getattr(pins[c, p], f"{edge}_slew_window") for _, c, p in on_net)
            assert t.load == pytest.approx(port + first, rel=1e-12, abs=0), s.stage.gate
            assert t.slew_load == pytest.approx(port + second, rel=1e-12, abs=0), s.stage.gate
            delay_t, slew_t = paths.stage_tables(cells[s.stage.cell], s.stage, edge)
            assert t.delay == pytest.approx(_bilinear(delay_t, t.slew_in, t.load), rel=1e-9, abs=0)
            assert t.slew_out == pytest.approx(
                _bilinear(slew_t, t.slew_in, t.slew_load), rel=1e-9, abs=0
            )
            assert record["slew_load_F"] == t.slew_load


def _bilinear(table, x: float, y: float) -> float:
    """The table's value at (x, y) by bilinear interpolation in the cell around it, written
    out (Press et al., *Numerical Recipes*, 3rd ed., 2007, section 3.6)."""
    xs, ys = (np.asarray(a.values) for a in table.axes)
    values = np.asarray(table.values)
    i = int(np.clip(np.searchsorted(xs, x) - 1, 0, len(xs) - 2))
    j = int(np.clip(np.searchsorted(ys, y) - 1, 0, len(ys) - 2))
    u = (x - xs[i]) / (xs[i + 1] - xs[i])
    v = (y - ys[j]) / (ys[j + 1] - ys[j])
    return float(
        (1 - u) * (1 - v) * values[i, j]
        + u * (1 - v) * values[i + 1, j]
        + (1 - u) * v * values[i, j + 1]
        + u * v * values[i + 1, j + 1]
    )


def test_pin_load_errors_name_the_mode_cell_and_pin(small) -> None:
    """An unknown pin load, and a pin without the capacitance a mode needs (a flip-flop's are
    not measured in windows), are errors that say what to change."""
    _, _, cells = small
    with pytest.raises(ConfigError, match="unknown pin load 'half-edge'; choose one of"):
        paths.with_pin_load(cells, "half-edge", paths.SLEW)
    name = next(iter(cells))
    bare = replace(
        cells[name], pins=tuple(replace(p, rise_slew_window=None) for p in cells[name].pins)
    )
    with pytest.raises(TableError, match="between its slew thresholds") as info:
        paths.with_pin_load({name: bare}, paths.SPLIT, paths.SLEW)
    assert info.value.context["cell"] == name
    # The delay's capacitance (up to the threshold) is there: only the slew's lookup fails.
    delay_pins = paths.with_pin_load({name: bare}, paths.SPLIT)[name].pins
    assert [(p.rise, p.fall) for p in delay_pins] == [
        (p.rise_to_threshold, p.fall_to_threshold) for p in bare.pins
    ]


BAD_NETLISTS = [
    ("module m (a, y); input a; output y; QXOR u1 (.A(a), .Y(y)); endmodule", "cell QXOR is not"),
    ("module m (a, y); input a; output y; QINV_P1 u1 (.Q(a), .Y(y)); endmodule", "no signal pin Q"),
    (
        "module m (a, y); input a; output y; QNAND2_P1 u1 (.IA(a), .Y(y)); endmodule",
        "input IB is not connected",
    ),
    (
        "module m (a, b, y); input a, b; output y; QINV_P1 u1 (.A(a), .Y(y)); endmodule",
        "has 2 input ports",
    ),
    ("module m (a, y); input a; output y; QINV_P1 u1 (.A(n9), .Y(y)); endmodule", "not declared"),
    (
        "module m (a, y); input a; output y; wire n; QINV_P1 u1 (.A(n), .Y(y)); endmodule",
        "nothing drives",
    ),
    (
        "module m (a, y); input a; output y; QINV_P1 u1 (.A(a), .Y(y));\n"
        "QINV_P1 u2 (.A(a), .Y(y)); endmodule",
        "driven by u1 already",
    ),
    ("module m (a, y); input a; output y; wire n; endmodule", "output port y is driven by no"),
    ("module m (a, y); input a; output y; QINV_P1 u1 (.A(a) .Y(y)); endmodule", "expected"),
    ("module m (a, y); input a; output y; QINV_P1 u1 (.A(a[0]), .Y(y)); endmodule", "'['"),
    ("module m (a, y); input a; output y;", "the file ends"),
]


@pytest.mark.parametrize(("text", "message"), BAD_NETLISTS)
def test_verilog_errors(small, tmp_path: Path, text: str, message: str) -> None:
    cfg = small[0]
    with pytest.raises(NetlistError, match=re.escape(message)) as caught:
        _circuit(tmp_path, text, cfg)
    assert str(tmp_path / "c.v") in str(caught.value)


@pytest.mark.parametrize(
    ("gate", "message"),
    [
        ("QNAND2_P1 u2 (.IA(n1), .IB(1'b0), .Y(y));", "do not let IA switch Y"),
        ("QNAND2_P1 u2 (.IA(n1), .IB(a), .Y(y));", "2 inputs are not constants"),
    ],
)
def test_path_errors(small, tmp_path: Path, gate: str, message: str) -> None:
    cfg, _, cells = small
    text = (
        "module m (a, y); input a; output y; wire n1;\n"
        f"QINV_P1 u1 (.A(a), .Y(n1));\n{gate}\nendmodule\n"
    )
    with pytest.raises(NetlistError, match=re.escape(message)):
        paths.routes(_circuit(tmp_path, text, cfg), cells)


def test_verilog_round_trip(small, tmp_path: Path) -> None:
    cfg = small[0]
    circuit = _circuit(tmp_path, CHAIN, cfg)
    again = _circuit(tmp_path, verilog.write(circuit, cfg), cfg)
    assert again.gates == circuit.gates
    assert (again.start, again.outputs) == (circuit.start, circuit.outputs)


def test_generation_is_seeded(small) -> None:
    """The same seed gives the same circuits; another seed others; every path has the stages
    asked for and side inputs that sensitize it (``routes`` checks each against its arc)."""
    _, _, cells = small
    shape = pathgen.Shape(count=6, stages=(5, 8), seed=7)
    first, second = pathgen.generate(cells, shape), pathgen.generate(cells, shape)
    assert first == second
    assert pathgen.generate(cells, pathgen.Shape(6, (5, 8), 8)) != first
    for circuit in first:
        (path,) = paths.routes(circuit, cells)
        assert 5 <= len(path.stages) <= 8
    assert any(len(c.gates) > len(paths.routes(c, cells)[0].stages) for c in first)  # a tree


def _small_demo(tmp: Path) -> Path:
    """The shipped demo config (BSIM models) with a 3 x 3 grid."""
    text = DEMO_CONFIG.read_text(encoding="utf-8")
    text = text.replace("../models/", f"{MODEL_DIR.as_posix()}/")
    text = text.replace("../templates/", f"{(DEMO_CONFIG.parents[1] / 'templates').as_posix()}/")
    text = re.sub(r"(?m)^slew = \[.*\]$", "slew = [0.01, 0.05, 0.2]", text, count=1)
    text = re.sub(r"(?m)^load = \[.*\]$", "load = [0.001, 0.005, 0.02]", text, count=1)
    path = tmp / "demo_small.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_paths_command_on_the_demo(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    if shutil.which(opensta.PROGRAM) is None:
        pytest.fail("OpenSTA (sta) is not on PATH; this test needs it")
    out = tmp_path / "out"
    args = ["paths", str(_small_demo(tmp_path)), "--cell", "QINV_P1", "--cell", "QNAND2_P1"]
    args += ["--count", "2", "--stages", "5-5", "--slew", "0.05", "--jobs", "1", "--quiet"]
    assert main([*args, "--out", str(out)]) == 0
    said = capsys.readouterr().out
    assert "opensta: median |error|" in said
    doc = json.loads((out / "vellum90_tt.paths.json").read_text(encoding="utf-8"))
    assert len(doc["paths"]) == 4  # two circuits, both input edges
    for run in doc["paths"]:
        assert run["failure"] is None and len(run["per_stage"]) == 5
        assert run["arrival_s"]["opensta"] is not None
        # Every stage but the last drives gate pins: what each drew, beside the library's.
        for stage in run["per_stage"][:-1]:
            assert stage["receivers"]
            for pin in stage["receivers"]:
                assert pin["to_threshold_F"]["in_path"] > 0
                assert pin["to_threshold_F"]["library"] > 0
    assert doc["receivers_in_path_over_library"]["all"]["to_threshold"]["pins"] > 0
    assert "receivers: in-path charge over the library's capacitance" in said
    assert (out / "vellum90_tt.paths.html").read_text(encoding="utf-8").startswith("<!doctype")


SHORT = """\
// three stages, for the driver-shaped library
module short (a, y);
  input a;
  output y;
  wire n1, n2;
  QINV_P1 u1 (.A(a), .Y(n1));
  QNAND2_P1 u2 (.IA(n1), .IB(1'b1), .Y(n2));
  QINV_P1 u3 (.A(n2), .Y(y));
endmodule
"""
# The input port's simulated transition against the path's slew: the shaped edge's corners sit
# on the slew thresholds (tests/test_shapes.py), the crossings are interpolated between samples.
SLEW_RTOL = 2e-3


def _driver_config(tmp: Path) -> Path:
    text = (DATA / "small_l1.toml").read_text(encoding="utf-8")
    text = text.replace('"../../', f'"{DATA.parents[1].as_posix()}/')
    path = tmp / "small_l1.toml"
    path.write_text(text + DRIVER, encoding="utf-8")
    return path


def test_a_threshold_liberty_is_read_by_opensta_and_the_prediction(tmp_path: Path) -> None:
    """``[liberty] pin_capacitance = "threshold"``: the Liberty file holds each pin's
    capacitance up to its delay threshold, ``paths`` defaults to the same pin load, so OpenSTA
    (reading that file) and charflow's prediction agree stage by stage to OpenSTA's printed
    digits."""
    if shutil.which(opensta.PROGRAM) is None:
        pytest.fail("OpenSTA (sta) is not on PATH; this test needs it")
    text = (DATA / "small_l1.toml").read_text(encoding="utf-8")
    text = text.replace('"../../', f'"{DATA.parents[1].as_posix()}/')
    cfg_path = tmp_path / "small_l1.toml"
    cfg_path.write_text(text + '\n[liberty]\npin_capacitance = "threshold"\n', encoding="utf-8")
    netlist = tmp_path / "short.v"
    netlist.write_text(SHORT, encoding="utf-8")
    out = tmp_path / "out"
    args = ["paths", str(cfg_path), "--cell", "QINV_P1", "--cell", "QNAND2_P1", "--quiet"]
    args += ["--netlist", str(netlist), "--slew", "0.05", "--jobs", "1", "--out", str(out)]
    assert main(args) == 0
    doc = json.loads((out / "small_l1.paths.json").read_text(encoding="utf-8"))
    assert doc["settings"]["pin_load"] == "threshold"
    assert len(doc["paths"]) == 2
    for run in doc["paths"]:
        for stage in run["per_stage"]:
            delay = stage["delay_s"]
            assert delay["opensta"] == pytest.approx(delay["predicted"], abs=PRINTED_S)
    lib = (out / "small_l1.paths" / "small_l1.lib").read_text(encoding="utf-8")
    assert "the charge up to the input's delay threshold" in lib
    page = (out / "small_l1.paths.html").read_text(encoding="utf-8")
    assert "charge up to the input&#x27;s delay threshold" in page


def test_a_driver_shape_not_yet_measured_is_refused(tmp_path: Path) -> None:
    """Timing paths with a driver-shaped config whose edges were never measured would drive
    the paths with no edge at all: a clear error, not a failed point per path."""
    cfg = config.load(_driver_config(tmp_path))
    setup = paths.Setup((0.05e-9,), ("rise",), 0.0, 1e-15)
    with pytest.raises(ConfigError, match=r"\[input_shape\] kind = 'driver'"):
        paths.correlate(cfg, [], {}, setup, jobs=1)


def test_paths_of_a_driver_shaped_library_get_its_edge(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """With ``[input_shape] kind = "driver"`` the path's input port gets the driver's measured
    edge, as every table point does: the first stage's replica (an ideal copy of the port's
    wave, the lumped load) equals its ramp point (a table point of the shaped library) as in
    the linear case, and the report says which shape the tables used."""
    cfg_path = _driver_config(tmp_path)
    netlist = tmp_path / "short.v"
    netlist.write_text(SHORT, encoding="utf-8")
    out = tmp_path / "out"
    args = ["paths", str(cfg_path), "--cell", "QINV_P1", "--cell", "QNAND2_P1", "--no-sta"]
    args += ["--netlist", str(netlist), "--slew", "0.05", "--jobs", "1", "--quiet"]
    assert main([*args, "--out", str(out)]) == 0
    assert "input waveform: driver-shaped: output of QINV_P1 > QINV_P1" in capsys.readouterr().out
    doc = json.loads((out / "small_l1.paths.json").read_text(encoding="utf-8"))
    assert doc["settings"]["input_shape"].startswith("driver-shaped: output of QINV_P1")
    assert len(doc["paths"]) == 2  # both input edges
    for run in doc["paths"]:
        assert run["failure"] is None
        first = run["per_stage"][0]
        assert first["slew_in_s"]["simulated"] == pytest.approx(0.05e-9, rel=SLEW_RTOL, abs=0)
        delays = first["delay_s"]
        assert delays["ramp_lumped_load"] == pytest.approx(
            delays["replica_lumped_load"], rel=LADDER_RTOL, abs=0
        )
