"""Cells with body (well) pins: the config keys, the testbench that ties or biases them, and a
four-supply-pin inverter (tests/data/body_inv.sp) characterized end to end; the simulation
tests need ngspice (they fail without it)."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest
from liberty.parser import parse_liberty

from charflow.config import library as config
from charflow.config.library import BodyPin
from charflow.config.resources import MODEL_DIR
from charflow.flow import characterize as flow
from charflow.records.errors import ConfigError, NetlistError
from charflow.simulation import netlist

DATA = Path(__file__).resolve().parent / "data"
BODY = DATA / "body.toml"
SAME_RTOL = 1e-9  # the four-pin inverter tied like the three-pin one: the same circuit
BIAS_SLOWER = 1.05  # the PMOS's rise delay with its n-well 0.3 V above the supply, at least


def _config(tmp_path: Path, **cell_keys) -> config.LibraryConfig:
    """tests/data/body.toml's INV_B with ``cell_keys`` in place of its body-pin keys."""
    keys = {"nwell": '"VPB"', "pwell": '"VNB"', **cell_keys}
    body = "\n".join(f"{k} = {v}" for k, v in keys.items() if v is not None)
    text = f"""
[library]
name = "body"
[process]
models = [{{ file = "{MODEL_DIR / "vellum90_l1.lib"}", section = "tt" }}]
vdd = 1.2
[grid]
slew = [0.01]
load = [0.002]
[[cell]]
name = "INV_B"
netlist = "{DATA / "body_inv.sp"}"
inputs = ["A"]
outputs = {{ Y = "!A" }}
power = "VPWR"
ground = "VGND"
{body}
"""
    path = tmp_path / "body.toml"
    path.write_text(text)
    return config.load(path)


def test_body_pins_are_read_with_their_kind_and_voltage():
    cfg = config.load(BODY)
    assert cfg.cell("INV_B").body == (BodyPin("VPB", "nwell"), BodyPin("VNB", "pwell"))
    assert cfg.cell("INV_BB").body == (BodyPin("VPB", "nwell", 1.5), BodyPin("VNB", "pwell"))
    assert cfg.cell("QINV_P1").body == ()  # none unless declared
    assert cfg.cell("INV_B").supply_pins == ("VPWR", "VGND", "VPB", "VNB")


@pytest.mark.parametrize(
    ("keys", "message"),
    [
        ({"nwell": '"A"'}, r"cell\[0\]\.nwell, cell INV_B: pin A is already an input"),
        ({"pwell": '"VPB"'}, r"cell\[0\]\.pwell, cell INV_B: pin VPB is already"),
        ({"nwell": "3"}, r"cell\[0\]\.nwell.*must be a pin name or"),
        ({"nwell": '{ pin = "VPB", volts = 1.5 }'}, r"cell\[0\]\.nwell.*volts"),
        ({"pwell": '{ pin = "VNB", voltage = "low" }'}, r"cell\[0\]\.pwell\.voltage"),
    ],
)
def test_bad_body_pins_are_named(tmp_path, keys, message):
    with pytest.raises(ConfigError, match=message):
        _config(tmp_path, **keys)


def test_an_undeclared_body_port_says_how_to_declare_it(tmp_path):
    cfg = _config(tmp_path, pwell=None)
    with pytest.raises(NetlistError, match=r'port VNB .* declared with nwell = "VNB" or pwell'):
        netlist.build_deck(cfg, cfg.cell("INV_B"))


def test_the_testbench_ties_or_biases_each_body_pin():
    cfg = config.load(BODY)
    tied = netlist.build_deck(cfg, cfg.cell("INV_B")).text
    # .subckt INV_B A VGND VNB VPB VPWR Y: p-well to ground, n-well to the supply.
    assert "xdut cf_in_a 0 0 cf_vdd cf_vdd cf_out_y INV_B" in tied
    assert "vnwell" not in tied
    biased = netlist.build_deck(cfg, cfg.cell("INV_BB")).text
    assert "xdut cf_in_a 0 0 cf_nwell cf_vdd cf_out_y INV_BB" in biased
    assert "vnwell cf_nwell 0 dc 1.5" in biased


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; this test needs it")
    cfg = config.load(BODY)
    result = flow.characterize(cfg, jobs=1)
    assert not result.failures, result.failures
    out = tmp_path_factory.mktemp("body")
    flow.write(cfg, result, out)
    return cfg, result, out


def _table(result, cell: str, quantity: str) -> np.ndarray:
    tables = next(c for c in result.cells if c.cell.name == cell)
    return tables.arcs[0].table(quantity).values


def test_a_four_pin_cell_is_characterized_like_its_three_pin_twin(run):
    # INV_B with its bulks tied to supply and ground is QINV_P1's circuit: the same tables, the
    # same leakage, and a Liberty file an independent parser reads (liberty-parser on PyPI).
    cfg, result, out = run
    for quantity in ("cell_rise", "cell_fall", "rise_transition", "fall_transition"):
        assert _table(result, "INV_B", quantity) == pytest.approx(
            _table(result, "QINV_P1", quantity), rel=SAME_RTOL, abs=0
        )
    leak = {c.cell: c.cell_leakage for c in result.cell_power}
    assert leak["INV_B"] == pytest.approx(leak["QINV_P1"], rel=SAME_RTOL, abs=0)
    lib = parse_liberty((out / f"{cfg.name}.lib").read_text())
    names = [str(g.args[0]).strip('"') for g in lib.get_groups("cell")]
    assert names == ["INV_B", "INV_BB", "QINV_P1"]


def test_a_reverse_biased_n_well_slows_the_rise_only(run):
    # Reverse body bias raises the PMOS's threshold (the body effect, Weste & Harris, CMOS VLSI
    # Design, 4th ed., 2010, ch. 2): INV_BB's n-well at 1.5 V slows its pull-up. Its pull-down
    # is no slower: the PMOS it fights during a slow input is weaker, and the PMOS drain's
    # junction, reverse-biased further, loads Y less.
    _, result, _ = run
    rise = _table(result, "INV_BB", "cell_rise") / _table(result, "INV_B", "cell_rise")
    fall = _table(result, "INV_BB", "cell_fall") / _table(result, "INV_B", "cell_fall")
    assert np.all(rise > BIAS_SLOWER), rise
    assert np.all(fall < 1.0), fall


def test_body_pins_are_pg_pins_of_their_well_type(run):
    # Liberty's pg_pin groups: pg_type nwell / pwell for body pins, voltage_name naming a
    # voltage_map entry (Liberty's power and ground pin syntax; common practice). A tied
    # well shares its supply's voltage; a biased one gets an entry of its own.
    cfg, _, out = run
    lib = parse_liberty((out / f"{cfg.name}.lib").read_text())
    cells = {str(g.args[0]).strip('"'): g for g in lib.get_groups("cell")}

    def pg(cell: str) -> dict[str, tuple[str, str]]:
        return {
            str(g.args[0]).strip('"'): (str(g["pg_type"]), str(g["voltage_name"]).strip('"'))
            for g in cells[cell].get_groups("pg_pin")
        }

    assert pg("INV_B") == {
        "VPWR": ("primary_power", "VPWR"),
        "VGND": ("primary_ground", "VGND"),
        "VPB": ("nwell", "VPWR"),
        "VNB": ("pwell", "VGND"),
    }
    assert pg("INV_BB")["VPB"] == ("nwell", "VPB_1p5V")
    text = (out / f"{cfg.name}.lib").read_text()
    assert "voltage_map (VPB_1p5V, 1.5) ;" in text
