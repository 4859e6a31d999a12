"""Energy, leakage and toggles against circuit results; needs ngspice (fails without it)."""

from __future__ import annotations

import shutil
import tomllib
from pathlib import Path

import numpy as np
import pytest

from charflow.config import library as config
from charflow.config.resources import DEMO_CONFIG, MODEL_DIR
from charflow.flow import characterize as flow
from charflow.measurement import combinational as timing
from charflow.measurement import registry
from charflow.measurement.waves import integral, supply_energy
from charflow.plan import arcs as planning
from charflow.plan.toggles import hidden_states, plan_toggles
from charflow.records.units import power_unit
from charflow.simulation import netlist, stimulus
from charflow.simulation.backends import Request

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "tests" / "data"
CAP_CONFIG = DATA / "cap_cell.toml"
SMALL_L1 = DATA / "small_l1.toml"
DEMO = DEMO_CONFIG
C1 = 10e-15  # F, the capacitor inside tests/data/cap_cell.sp
R_ON = 1e3  # ohm, its switches' on resistance

CV2_RTOL = 0.01  # supply energy per charge cycle against C·V²
BALANCE_RTOL = 5e-3  # supply energy against stored plus dissipated, on one waveform
VEENDRICK_RTOL = 0.10  # short-circuit energy growth against the closed form


@pytest.fixture(scope="module", autouse=True)
def _needs_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; these tests need it")


@pytest.fixture(scope="module")
def cap():
    cfg = config.load(CAP_CONFIG)
    return cfg, netlist.build_deck(cfg, cfg.cell("CAPCELL")), planning.plan(cfg).points


def test_capacitor_cell_draws_cv2_per_charge_cycle(cap):
    # Charging a capacitor C from a supply V through any resistance draws C·V² from the supply;
    # discharging it to ground draws nothing (Weste & Harris, CMOS VLSI Design, 4th ed., 2010,
    # on dynamic power). CAPCELL is a bare capacitor switched to the supply, so charflow's
    # supply-energy integral over a rise and a fall must give (C1 + load)·V², and the internal
    # energy, once the external load's share is taken off, C1·V² on the rise and 0 on the fall.
    cfg, deck, points = cap
    vdd = cfg.process.vdd
    by_edge = {}
    for p in points:
        m = timing.measure_point(cfg, deck, p)
        by_edge[(p.slew, p.load, p.output_edge)] = m
    for slew in cfg.grid.slew:
        for load in cfg.grid.load:
            rise, fall = by_edge[(slew, load, "rise")], by_edge[(slew, load, "fall")]
            cycle = rise.supply_energy + fall.supply_energy
            label = f"slew {slew:.3g} s load {load:.3g} F"
            assert cycle == pytest.approx((C1 + load) * vdd**2, rel=CV2_RTOL, abs=0), label
            assert rise.internal_energy == pytest.approx(C1 * vdd**2, rel=CV2_RTOL, abs=0), label
            assert abs(fall.internal_energy) < CV2_RTOL * C1 * vdd**2, label


def test_capacitor_cell_stores_half_and_the_switch_burns_half(cap):
    # Energy balance of an RC charge (Weste & Harris, 2010): of the C·V² the supply gives, ½C·V²
    # is stored and ½C·V² is dissipated in the resistance, whatever its value. Here on one
    # simulated waveform, all three with charflow's integral.
    cfg, deck, _ = cap
    vdd = cfg.process.vdd
    load = max(cfg.grid.load)
    ramp = stimulus.ramp(min(cfg.grid.slew), "rise", cfg.thresholds, vdd)
    stop = ramp.end + 20 * R_ON * (C1 + load)
    step = ramp.duration / 20
    request = Request(
        deck,
        (f"alter @{deck.input_source('A')}[pulse] = {ramp.pulse()}", f"alter cload_y = {load}"),
        f"tran {step:.6g} {stop:.6g} 0 {step:.6g}",
        ("cf_out_y", f"{deck.supply}#branch"),
    )
    result = timing.backend_for(cfg).run(request)
    t, v = result.vectors["time"], result.vectors["cf_out_y"]
    current = -result.vectors[f"{deck.supply}#branch"]
    c = C1 + load
    supplied = supply_energy(t, current, vdd, ramp.time_at(0.5), (current[0], current[-1]))
    stored = 0.5 * c * v[-1] ** 2
    burnt = integral(t, current**2 * R_ON)
    assert supplied == pytest.approx(c * vdd**2, rel=CV2_RTOL, abs=0)
    assert stored == pytest.approx(0.5 * c * vdd**2, rel=CV2_RTOL, abs=0)
    assert burnt == pytest.approx(0.5 * c * vdd**2, rel=CV2_RTOL, abs=0)
    assert supplied == pytest.approx(stored + burnt, rel=BALANCE_RTOL, abs=0)


@pytest.fixture(scope="module")
def inverter():
    """QINV_P1 of small_l1 over slews from fast to four times the largest, loads from none."""
    doc = tomllib.loads(SMALL_L1.read_text(encoding="utf-8"))
    doc["grid"] = {"slew": [0.01, 0.1, 0.2, 0.4], "load": [0.0, 0.005, 0.02]}
    doc["cell"] = [c for c in doc["cell"] if c["name"] == "QINV_P1"]
    cfg = config.parse(doc, SMALL_L1)
    result = flow.characterize(cfg, jobs=1)
    assert not result.failures
    (cell,) = result.cell_power
    (arc,) = cell.arcs
    return cfg, {t.quantity: t for t in arc.default}


def test_inverter_energy_is_positive_and_grows_with_slew(inverter):
    # A slower input keeps both devices on longer: short-circuit energy grows with the input
    # transition (common practice). Per edge the supply can also take charge back (the input
    # pushing the PMOS gate charge into VDD on a rising input makes fall_power negative at fast
    # slews); over a cycle that cancels, and the cycle's energy is positive everywhere.
    cfg, tables = inverter
    cycle = tables["rise_power"].values + tables["fall_power"].values
    assert np.all(cycle > 0)
    slow = [i for i, s in enumerate(cfg.grid.slew) if s >= 0.1e-9]
    assert len(slow) == 3
    for values in (cycle, tables["rise_power"].values, tables["fall_power"].values):
        assert np.all(np.diff(values[slow], axis=0) > 0)
    # With no load the cycle's energy grows at every slew of the grid.
    assert np.all(np.diff(cycle[:, 0]) > 0)


def _level1_card(model: str, section: str = "tt") -> dict[str, float]:
    """The numbers of one .model card inside ``.lib section`` of the level-1 model file."""
    card: dict[str, float] = {}
    inside = mine = False
    for raw in (MODEL_DIR / "vellum90_l1.lib").read_text(encoding="utf-8").splitlines():
        line = raw.strip().lower()
        if line.startswith("*") or not line:
            continue
        words = line.split()
        if words[0] == ".lib":
            inside = words[1:] == [section]
        elif words[0] == ".endl":
            inside = False
        elif inside and words[0] == ".model":
            mine = words[1] == model
        elif inside and mine and words[0] == "+":
            card |= {k: float(v) for k, v in (w.split("=") for w in words[1:])}
    return card


def test_inverter_short_circuit_energy_follows_veendrick(inverter):
    # Unloaded symmetric inverter with square-law devices, linear input ramps of duration tau:
    # short-circuit energy per cycle = beta/12 · (V − 2 Vt)³ · tau (Veendrick, IEEE JSSC 19(4),
    # 1984; from memory). QINV_P1 is symmetric on the level-1 card: KP(p) W(p) = KP(n) W(n) and
    # Vt(p) = −Vt(n). Only the growth between the slowest slews is compared: the rest of the
    # cycle's energy (junction and gate charge) does not depend on the slew.
    cfg, tables = inverter
    nch = _level1_card("nch")
    params = dict(cfg.cell("QINV_P1").params)
    beta = nch["kp"] * params["wn"] / (params["l"] - 2 * nch["ld"])
    vdd = cfg.process.vdd
    per_second = beta / 12 * (vdd - 2 * nch["vto"]) ** 3
    cycle = tables["rise_power"].values[:, 0] + tables["fall_power"].values[:, 0]
    taus = [stimulus.ramp(s, "rise", cfg.thresholds, vdd).duration for s in cfg.grid.slew]
    for i in (-3, -2):
        want = per_second * (taus[i + 1] - taus[i])
        assert cycle[i + 1] - cycle[i] == pytest.approx(want, rel=VEENDRICK_RTOL, abs=0)


def test_nand2_leakage_is_least_with_both_nmos_off():
    # Two off transistors in series leak far less than one (the stack effect; common practice):
    # NAND2 with both inputs low leaks least. On the BSIM cards, which model subthreshold current.
    cfg = config.load(DEMO)
    deck = netlist.build_deck(cfg, cfg.cell("QNAND2_P1"))
    leak = {s.when: s.power for s in registry.leakage(cfg, deck)}
    assert list(leak) == ["!IA&!IB", "!IA&IB", "IA&!IB", "IA&IB"]
    assert all(w > 0 for w in leak.values())
    assert leak["!IA&!IB"] < min(leak["!IA&IB"], leak["IA&!IB"]) / 2
    # The values themselves are checked against a plain ngspice operating point in
    # tests/test_leakage.py.


def test_hidden_toggles_are_the_controlling_side_values():
    # A 0 on either NAND input (a 1 on either NOR input) fixes the output whatever the other
    # does (the controlling value; Weste & Harris, 2010, ch. 1): those are the toggles of no
    # output edge, and an AOI21's IA is hidden by IB = 0 or by IC = 1.
    cfg = config.load(DEMO)
    assert hidden_states(cfg.cell("QNAND2_P1"), "IA") == ((("IB", False),),)
    assert hidden_states(cfg.cell("QNOR2_P1"), "IB") == ((("IA", True),),)
    assert hidden_states(cfg.cell("QINV_P1"), "A") == ()
    assert hidden_states(cfg.cell("QAOI21_P1"), "IA") == (
        (("IB", False), ("IC", False)),
        (("IB", False), ("IC", True)),
        (("IB", True), ("IC", True)),
    )
    toggles = plan_toggles(cfg, ["QNAND2_P1"])
    grid = cfg.cell("QNAND2_P1").grid
    assert len(toggles) == 2 * 1 * 2 * len(grid.slew)
    assert {t.load for t in toggles} == {min(grid.load)}


@pytest.mark.parametrize(
    ("time_unit", "cap_unit", "unit"),
    [("ns", "pf", "1mW"), ("ps", "ff", "1mW"), ("ns", "ff", "1uW"), ("ps", "pf", "1W")],
)
def test_power_unit_is_energy_unit_per_time_unit(time_unit, cap_unit, unit):
    # 1 pF·V² = 1 pJ, and 1 pJ / 1 ns = 1e-3 W: plain arithmetic of SI prefixes.
    name, watts = power_unit(time_unit, cap_unit)
    assert name == unit
    farads = {"pf": 1e-12, "ff": 1e-15}[cap_unit]
    seconds = {"ns": 1e-9, "ps": 1e-12}[time_unit]
    assert watts == pytest.approx(farads / seconds, rel=1e-12, abs=0)
