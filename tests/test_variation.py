"""Transistor mismatch: Pelgrom sigma from the netlist's geometry, the gate sources that shift
each threshold, the sensitivity method against the textbook square-law step response, Monte
Carlo against an analytic sigma, the sigma groups in the Liberty file read by liberty-parser,
yosys and OpenSTA, and the errors a bad mismatch config gives.
"""

from __future__ import annotations

import json
import math
import subprocess
from pathlib import Path

import numpy as np
import pytest
from consumer_tools import sta, sta_complaints, tool
from liberty.parser import parse_liberty

from charflow.analysis import spread as spread_report
from charflow.config import library as config
from charflow.flow import characterize as flow
from charflow.measurement import variation
from charflow.plan import arcs as planning
from charflow.records.errors import ConfigError, NetlistError
from charflow.records.outcomes import DeviceShift
from charflow.records.points import SpreadPoint
from charflow.simulation.mismatch import spice_number
from charflow.simulation.netlist import build_deck
from charflow.tables import spread

ROOT = Path(__file__).resolve().parents[1]
SPREAD = ROOT / "tests" / "data" / "spread_l1.toml"

SIGMA_RTOL = 1e-9  # Pelgrom's sigma is arithmetic on the card's numbers
STEP_SLOPE_RTOL = 0.02  # charflow's ∂delay/∂Vt against the derived square-law derivative
LINEAR_VS_MC = 0.10  # the linear sigma within 10 % of Monte Carlo's (the goal)
VALUE_RTOL = 1e-6  # Liberty values are written with 7 significant digits
FIRST_ORDER_RTOL = 0.10  # the first-order rule leaves out the linear region's share
SAMPLES = 500
WRAPPED_RTOL = 1e-6  # the same devices, wrapped or not, simulate alike


def test_pelgrom_sigma_from_the_netlist_geometry():
    # Pelgrom, Duinmaijer & Welbers, "Matching properties of MOS transistors", IEEE JSSC
    # 24(5), 1989: σ(ΔVt) = A_Vt / √(W·L). spread_l1's inverter: nch W 0.4 µm, pch W 0.8 µm,
    # both L 0.1 µm; A_Vt 3.5 and 4.0 mV·µm.
    cfg = config.load(SPREAD)
    deck = build_deck(cfg, cfg.cell("QINV_P1"))
    sigmas = {d.name: d.sigma for d in deck.devices}
    assert sigmas["MN"] == pytest.approx(3.5e-3 * 1e-6 / math.sqrt(0.4e-6 * 0.1e-6), SIGMA_RTOL)
    assert sigmas["MP"] == pytest.approx(4.0e-3 * 1e-6 / math.sqrt(0.8e-6 * 0.1e-6), SIGMA_RTOL)
    # Each gate reached through its own zero-volt source, a higher |Vt| either way.
    assert "vmm_mn A cf_gate_mn dc 0" in deck.text
    assert "vmm_mp cf_gate_mp A dc 0" in deck.text


def test_spice_numbers():
    # SPICE scale suffixes (the ngspice manual, "Syntax of circuit elements"; common practice).
    assert spice_number("0.4u") == pytest.approx(0.4e-6)
    assert spice_number("2meg") == pytest.approx(2e6)
    assert spice_number("100nm") == pytest.approx(100e-9)
    assert spice_number("1e-7") == pytest.approx(1e-7)
    assert spice_number("{wn*2}") is None


def _library(tmp_path: Path, netlist: str, mismatch: str, models: str, load: float) -> Path:
    tmp_path.mkdir(parents=True, exist_ok=True)
    (tmp_path / "models.sp").write_text(models, encoding="utf-8")
    (tmp_path / "cell.sp").write_text(netlist, encoding="utf-8")
    path = tmp_path / "lib.toml"
    path.write_text(
        f"""
[library]
name = "mm"
time_unit = "ns"
cap_unit = "pf"
[process]
models = ["models.sp"]
vdd = 1.2
[grid]
slew = [0.0005, 0.001]
load = [{load}, {2 * load}]
[simulation]
window = 50  # ns: the square-law discharge is slow beside the grid's step-like slews
{mismatch}
[[cell]]
name = "INVT"
netlist = "cell.sp"
inputs = ["A"]
outputs = {{ Y = "!A" }}
area = 1.0
""",
        encoding="utf-8",
    )
    return path


# Square-law devices without capacitances, body effect or channel-length modulation: the
# output is discharged by the NMOS alone into the load, as the textbook derivation assumes.
VT, KP, VDD = 0.4, 100e-6, 1.2
SQUARE_LAW = f"""
.model nt nmos level=1 vto={VT} kp={KP} lambda=0 gamma=0
.model pt pmos level=1 vto=-{VT} kp={KP} lambda=0 gamma=0
"""
INVERTER = """
.subckt INVT A Y VDD VSS
MP Y A VDD VDD pt W=2u L=1u
MN Y A VSS VSS nt W=1u L=1u
.ends INVT
"""
MISMATCH = """
[mismatch]
method = "linear"
device = [
  { model = "nt", polarity = "n", vt_coefficient = 5.0 },
  { model = "pt", polarity = "p", vt_coefficient = 5.0 },
]
"""


def step_delay(vt: float, load: float) -> float:
    """50 % falling delay of a square-law NMOS discharging ``load`` from VDD after a step on
    its gate: saturation until Vout = VDD − Vt, then the linear region to VDD/2:
    t = C/(k(VDD−Vt)) · [2Vt/(VDD−Vt) + ln(3 − 4Vt/VDD)], k = KP·W/L (Hodges, Jackson &
    Saleh, Analysis and Design of Digital Integrated Circuits, 3rd ed., 2004, ch. 6; derived
    here: t1 = C·Vt / (k/2·(VDD−Vt)²); t2 = ∫ C dV / (k((VDD−Vt)V − V²/2)) from VDD/2 to
    VDD−Vt)."""
    a = VDD - vt
    k = KP * 1.0  # W/L = 1
    return load / (k * a) * (2 * vt / a + math.log(3 - 4 * vt / VDD))


def test_step_delay_sensitivity_matches_the_square_law(tmp_path, ngspice):
    load = 0.05  # pF: the only capacitance (the devices have none)
    path = _library(tmp_path, INVERTER, MISMATCH, SQUARE_LAW, load)
    cfg = config.load(path)
    deck = build_deck(cfg, cfg.cell("INVT"))
    plan = planning.plan(cfg, ["INVT"])
    point = next(
        p
        for p in plan.points
        if p.output_edge == "fall" and p.slew == min(cfg.grid.slew) and p.load == load * 1e-12
    )
    m = variation.measure_spread(cfg, deck, SpreadPoint(point, len(deck.devices)))
    shift = next(s for s in m.shifts if s.device == "MN")
    slope = (shift.delay[0] - shift.delay[1]) / (2 * shift.sigma)
    h = 1e-6
    expected = (step_delay(VT + h, load * 1e-12) - step_delay(VT - h, load * 1e-12)) / (2 * h)
    assert m.delay == pytest.approx(step_delay(VT, load * 1e-12), rel=STEP_SLOPE_RTOL, abs=0)
    assert slope == pytest.approx(expected, rel=STEP_SLOPE_RTOL, abs=0)
    # To first order ∂ln t/∂Vt ≈ 2/(VDD − Vt) (the saturation current's square law; the same
    # sources): 2.5 /V here, the whole expression 2.41 /V.
    assert slope / m.delay == pytest.approx(2 / (VDD - VT), rel=FIRST_ORDER_RTOL, abs=0)


def test_wrapped_devices_get_the_same_sensitivity(tmp_path, ngspice):
    wrapped = """
.subckt nwrap d g s b w=1u l=1u
M1 d g s b nt W={w} L={l}
.ends nwrap
.subckt pwrap d g s b w=1u l=1u
M1 d g s b pt W={w} L={l}
.ends pwrap
.subckt INVT A Y VDD VSS
XP Y A VDD VDD pwrap w=2u l=1u
XN Y A VSS VSS nwrap w=1u l=1u
.ends INVT
"""
    table = (
        MISMATCH
        + """
wrapped = [
  { subckt = "nwrap", model = "nt", width = "w", length = "l", gate = 2 },
  { subckt = "pwrap", model = "pt", width = "w", length = "l", gate = 2 },
]
"""
    )
    plain = config.load(_library(tmp_path / "a", INVERTER, MISMATCH, SQUARE_LAW, 0.05))
    kit = config.load(_library(tmp_path / "b", wrapped, table, SQUARE_LAW, 0.05))
    found = []
    for cfg in (plain, kit):
        deck = build_deck(cfg, cfg.cell("INVT"))
        point = planning.plan(cfg, ["INVT"]).points[0]
        m = variation.measure_spread(cfg, deck, SpreadPoint(point, len(deck.devices)))
        found.append([(s.sigma, *s.delay, *s.transition) for s in m.shifts])
    np.testing.assert_allclose(found[1], found[0], rtol=WRAPPED_RTOL)


def test_monte_carlo_sigma_of_a_linear_function():
    # The standard deviation of Σ a_i x_i with independent normal x_i is √Σ(a_i σ_i)²
    # (any probability text); a sample's s lies within s·(1 ± z/√(2(n−1))) of σ about 95 %
    # of the time (large-sample standard error of s, from memory).
    cfg = config.load(SPREAD)
    deck = build_deck(cfg, cfg.cell("QNAND2_P1"))
    point = planning.plan(cfg, ["QNAND2_P1"]).points[0]
    x = variation.draws(deck, SpreadPoint(point, 4, SAMPLES, 7))
    a = np.array([1e-9, -2e-9, 0.5e-9, 3e-9])  # s per V
    exact = math.sqrt(sum((ai * d.sigma) ** 2 for ai, d in zip(a, deck.devices, strict=True)))
    found = spread.sampled(x @ a)
    low, high = spread.interval(found.sigma, SAMPLES)
    assert low <= exact <= high
    # The sensitivity formula on the same function is exact: ±σ_i moves it by ±a_i σ_i.
    shifts = [
        DeviceShift(d.name, d.sigma, (ai * d.sigma, -ai * d.sigma), (0.0, 0.0))
        for ai, d in zip(a, deck.devices, strict=True)
    ]
    linear = spread.linear(shifts, "delay")
    assert linear.sigma == pytest.approx(exact, rel=1e-12, abs=0)
    assert linear.early == pytest.approx(exact, rel=1e-12, abs=0)
    assert linear.late == pytest.approx(exact, rel=1e-12, abs=0)


@pytest.fixture(scope="module")
def characterized(tmp_path_factory, ngspice):
    cfg = config.load(SPREAD)
    result = flow.characterize(cfg, cells=["QINV_P1"], jobs=1)
    out = tmp_path_factory.mktemp("spread")
    flow.write(cfg, result, out)
    return cfg, result, out


def test_linear_sigma_against_monte_carlo(characterized):
    cfg, result, out = characterized
    linear = {m.point.timing: m for m in result.spreads if not m.point.samples}
    checked = 0
    for m in (m for m in result.spreads if m.point.samples):
        mc = spread.sampled(m.sampled_delays)
        low, high = spread.interval(mc.sigma, len(m.sampled_delays))
        lin = spread.linear(linear[m.point.timing].shifts, "delay").sigma
        assert low * (1 - LINEAR_VS_MC) <= lin <= high * (1 + LINEAR_VS_MC)
        checked += 1
    assert checked == 2  # one check per output edge
    # The report: each check's delay and transition, the tables' sigma beside Monte Carlo's.
    paths = spread_report.write(cfg, result, out)
    rows = json.loads(paths[0].read_text(encoding="utf-8"))["checks"]
    assert len(rows) == 4
    assert all(r["table_sigma_s"] is not None for r in rows)
    assert "tables vs MC" in paths[1].read_text(encoding="utf-8")


def test_sigma_groups_in_liberty_and_consumers(characterized):
    cfg, result, out = characterized
    lib_path = out / "spread_l1.lib"
    # Liberty parser: liberty-parser 0.0.29 (Thomas Kramer, PyPI), independent of charflow.
    lib = parse_liberty(lib_path.read_text(encoding="utf-8"))
    pin = next(p for p in lib.get_groups("cell")[0].get_groups("pin") if p.args[0] == "Y")
    timing = pin.get_groups("timing")[0]
    groups = [(g.group_name, g["sigma_type"]) for g in timing.groups if g["sigma_type"]]
    expected = {
        (f"ocv_sigma_{q}", kind)
        for q in ("cell_rise", "cell_fall", "rise_transition", "fall_transition")
        for kind in ("early", "late")
    }
    assert set(groups) == expected
    arc = next(a for a in result.spread if a.when is None)
    first = arc.tables[0]
    read = next(
        g
        for g in timing.groups
        if g.group_name == first.table.quantity and g["sigma_type"] == first.sigma_type
    )
    values = np.array(read.get_array("values")) * cfg.time_scale
    np.testing.assert_allclose(values, first.table.values, rtol=VALUE_RTOL)
    # yosys (read_liberty -lib) and OpenSTA (read_liberty) read it without a complaint.
    script = out / "read.ys"
    script.write_text(f"read_liberty -lib {lib_path}\n", encoding="utf-8")
    log = subprocess.run(
        [tool("yosys"), "-s", str(script)], capture_output=True, text=True, check=True
    ).stdout
    assert not [line for line in log.splitlines() if "warning" in line.lower()]
    assert not sta_complaints(sta(f"read_liberty {lib_path}", out))


def test_json_names_the_dominant_transistor(characterized):
    cfg, result, _ = characterized
    doc = flow.to_json(cfg, result)["spread"]
    # A falling output is pulled down by the NMOS, a rising one up by the PMOS (common
    # practice: the transistor that conducts the edge carries its spread).
    dominant = {d["output_edge"]: d["transistor"] for d in doc["dominant"]}
    assert dominant == {"fall": "MN", "rise": "MP"}
    assert doc["simulations"]["sigma_tables"] > 0


def _config(tmp_path: Path, mismatch: str) -> Path:
    text = SPREAD.read_text(encoding="utf-8")
    start = text.index("[mismatch]")
    end = text.index("[[cell]]")
    path = tmp_path / "bad.toml"
    body = text[:start] + mismatch + "\n" + text[end:]
    path.write_text(body.replace("../../", str(ROOT) + "/"), encoding="utf-8")
    return path


def test_errors_name_the_key_and_what_to_change(tmp_path):
    with pytest.raises(ConfigError, match=r"mismatch.device.*needs at least one"):
        config.load(_config(tmp_path, '[mismatch]\nmethod = "linear"'))
    with pytest.raises(ConfigError, match=r"mismatch.device\[0\].polarity.*\"n\" or \"p\""):
        config.load(
            _config(
                tmp_path,
                '[mismatch]\nmethod = "linear"\n'
                'device = [{ model = "nch", polarity = "x", vt_coefficient = 3 }]',
            )
        )
    with pytest.raises(ConfigError, match=r"mismatch.method.*off, linear, sampled"):
        config.load(_config(tmp_path, '[mismatch]\nmethod = "fast"'))


def test_a_model_without_a_coefficient_names_the_transistor(tmp_path):
    cfg = config.load(
        _config(
            tmp_path,
            '[mismatch]\nmethod = "linear"\n'
            'device = [{ model = "nch", polarity = "n", vt_coefficient = 3 }]',
        )
    )
    with pytest.raises(NetlistError, match=r"cell QINV_P1, device MP.*model pch.*vt_coefficient"):
        build_deck(cfg, cfg.cell("QINV_P1"))


def test_sampled_method_tabulates_the_monte_carlo_sigma(tmp_path, ngspice):
    # method = "sampled": every table point is a Monte Carlo run, its tables the samples'
    # one-sigma percentiles about the median (a normal distribution's ±1σ: common practice).
    path = _config(
        tmp_path,
        '[mismatch]\nmethod = "sampled"\nsamples = 20\n'
        'device = [{ model = "nch", polarity = "n", vt_coefficient = 3.5 },'
        ' { model = "pch", polarity = "p", vt_coefficient = 4.0 }]',
    )
    cfg = config.load(path)
    result = flow.characterize(cfg, cells=["QINV_P1"], jobs=1)
    assert all(m.point.samples == 20 for m in result.spreads)
    assert len(result.spreads) == len(result.measurements)
    arc = result.spread[0]
    table = next(t for t in arc.tables if t.table.quantity == "ocv_sigma_cell_fall")
    m = next(
        m
        for m in result.spreads
        if m.point.timing.output_edge == "fall"
        and m.point.coordinates == (table.table.axes[0].values[1], table.table.axes[1].values[2])
    )
    expected = spread.sampled(m.sampled_delays).of(table.sigma_type)
    assert table.table.values[1, 2] == pytest.approx(expected, rel=1e-12, abs=0)


def test_a_cell_of_unnamed_subcircuits_says_what_to_declare(tmp_path):
    wrapped_only = """
.subckt nwrap d g s b
M1 d g s b nt W=1u L=1u
.ends nwrap
.subckt pwrap d g s b
M1 d g s b pt W=2u L=1u
.ends pwrap
.subckt INVT A Y VDD VSS
XP Y A VDD VDD pwrap
XN Y A VSS VSS nwrap
.ends INVT
"""
    cfg = config.load(_library(tmp_path, wrapped_only, MISMATCH, SQUARE_LAW, 0.05))
    with pytest.raises(NetlistError, match=r"cell INVT.*no M card.*\[\[mismatch.wrapped\]\]"):
        build_deck(cfg, cfg.cell("INVT"))
