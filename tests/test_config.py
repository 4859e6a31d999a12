"""Tests of charflow.config (reading and validating the TOML config) and of the netlist checks
that run before any simulation. No simulator is needed here.

Every bad input must give one error whose message names the file, the key and, for a cell's
problem, the cell; several problems come together in one error.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

from charflow.config import library as config
from charflow.config.library import ModelFile
from charflow.config.resources import MODEL_DIR, TEMPLATE_DIR
from charflow.records.errors import ConfigError, NetlistError
from charflow.simulation import netlist

ROOT = Path(__file__).resolve().parents[1]
MODEL = MODEL_DIR / "vellum90_l1.lib"
CELLS = TEMPLATE_DIR / "cells"
INV_PARAMS = {"wn": 0.4e-6, "wp": 0.8e-6, "l": 0.1e-6}
NAND2_PARAMS = {"wn": 0.8e-6, "wp": 0.8e-6, "l": 0.1e-6}


def _doc() -> dict[str, Any]:
    """A good two-cell config as a parsed TOML document, with absolute paths."""
    return {
        "library": {"name": "cfg_lib", "time_unit": "ns", "cap_unit": "pf"},
        "process": {
            "models": [{"file": str(MODEL), "section": "tt"}],
            "vdd": 1.2,
            "temperature": 25,
        },
        "grid": {"slew": [0.01, 0.1], "load": [0.001, 0.01]},
        "cell": [
            {
                "name": "QINV_P1",
                "template": str(CELLS / "inv.sp.j2"),
                "params": dict(INV_PARAMS),
                "inputs": ["A"],
                "outputs": {"Y": "!A"},
            },
            {
                "name": "QNAND2_P1",
                "template": str(CELLS / "nand2.sp.j2"),
                "params": dict(NAND2_PARAMS),
                "inputs": ["IA", "IB"],
                "outputs": {"Y": "!(IA&IB)"},
            },
        ],
    }


@pytest.fixture
def cfg_path(tmp_path: Path) -> Path:
    """Where the document notionally lives: messages name it, relative paths start beside it."""
    return tmp_path / "cfg.toml"


def _one_problem(doc: dict, path: Path, key: str, cell: str | None = None) -> ConfigError:
    """Parse ``doc`` expecting exactly one problem, located at ``key`` (and ``cell``)."""
    with pytest.raises(ConfigError) as info:
        config.parse(doc, path)
    err = info.value
    where = f"file {path}, key {key}" + (f", cell {cell}" if cell else "")
    message = str(err)
    assert message.startswith(where + ": "), message
    assert "\n" not in message
    expected = {"file": path, "key": key} | ({"cell": cell} if cell else {})
    assert err.context == expected
    return err


def _write(path: Path, text: str) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text, encoding="utf-8")
    return path


# --- a good config -------------------------------------------------------------------------------


def test_good_config_is_in_si_units(cfg_path: Path) -> None:
    doc = _doc()
    doc["thresholds"] = {
        "input_rise": 40,
        "output_fall": 60,
        "slew_lower_rise": 10,
        "slew_upper_rise": 90,
        "slew_derate": 0.5,
    }
    cfg = config.parse(doc, cfg_path)
    assert cfg.name == "cfg_lib"
    assert cfg.path == cfg_path
    assert cfg.time_scale == 1e-9 and cfg.cap_scale == 1e-12
    assert cfg.grid.slew == pytest.approx((0.01e-9, 0.1e-9), rel=1e-15, abs=0)
    assert cfg.grid.load == pytest.approx((0.001e-12, 0.01e-12), rel=1e-15, abs=0)
    assert cfg.process.vdd == 1.2
    assert cfg.process.temperature == 25.0
    t = cfg.thresholds
    assert (t.input_rise, t.input_fall, t.output_rise, t.output_fall) == pytest.approx(
        (0.4, 0.5, 0.5, 0.6)
    )
    assert t.slew_band("rise") == pytest.approx((0.1, 0.9))
    assert t.slew_band("fall") == pytest.approx((0.2, 0.8))
    assert t.slew_derate == 0.5  # a factor, not a percentage
    inv = cfg.cell("QINV_P1")
    assert inv.inputs == ("A",)
    assert [o.pin for o in inv.outputs] == ["Y"]
    assert inv.outputs[0].function.to_liberty() == "!A"
    assert inv.grid == cfg.grid
    assert inv.template == CELLS / "inv.sp.j2" and inv.netlist is None
    assert dict(inv.params) == INV_PARAMS
    assert (inv.power, inv.ground) == ("VDD", "VSS")


def test_picosecond_and_femtofarad_units(cfg_path: Path) -> None:
    doc = _doc()
    doc["library"] |= {"time_unit": "ps", "cap_unit": "ff"}
    doc["grid"] = {"slew": [10, 100], "load": [1, 10]}
    cfg = config.parse(doc, cfg_path)
    assert cfg.grid.slew == pytest.approx((10e-12, 100e-12), rel=1e-15, abs=0)
    assert cfg.grid.load == pytest.approx((1e-15, 10e-15), rel=1e-15, abs=0)


def test_model_entries_with_and_without_section(cfg_path: Path) -> None:
    doc = _doc()
    doc["process"]["models"] = [{"file": str(MODEL), "section": "ss"}, str(MODEL)]
    cfg = config.parse(doc, cfg_path)
    assert cfg.process.models == (ModelFile(MODEL, "ss"), ModelFile(MODEL, None))


def test_relative_paths_resolve_against_the_config_folder(tmp_path: Path) -> None:
    model = _write(tmp_path / "models" / "cfg_m.lib", MODEL.read_text())
    template = _write(tmp_path / "cells" / "cfg_inv.sp.j2", (CELLS / "inv.sp.j2").read_text())
    path = _write(
        tmp_path / "deck" / "cfg.toml",
        """
[library]
name = "cfg_rel"
[process]
models = [{ file = "../models/cfg_m.lib", section = "tt" }]
vdd = 1.2
[grid]
slew = [0.01, 0.1]
load = [0.001, 0.01]
[[cell]]
name = "QINV_P1"
template = "../cells/cfg_inv.sp.j2"
params = { wn = 0.4e-6, wp = 0.8e-6, l = 0.1e-6 }
inputs = ["A"]
outputs = { Y = "!A" }
""",
    )
    cfg = config.load(path)
    assert cfg.process.models == (ModelFile(model, "tt"),)
    assert cfg.cell("QINV_P1").template == template
    # Defaults: ns and pF, 25 degrees C.
    assert (cfg.time_unit, cfg.cap_unit, cfg.process.temperature) == ("ns", "pf", 25.0)


def test_cell_grid_override(cfg_path: Path) -> None:
    doc = _doc()
    doc["cell"][1]["grid"] = {"slew": [0.02, 0.04, 0.08]}
    cfg = config.parse(doc, cfg_path)
    nand = cfg.cell("QNAND2_P1")
    assert nand.grid.slew == pytest.approx((0.02e-9, 0.04e-9, 0.08e-9), rel=1e-15, abs=0)
    assert nand.grid.load == cfg.grid.load  # the axis not overridden comes from [grid]
    assert cfg.cell("QINV_P1").grid == cfg.grid


def test_a_zero_load_is_a_valid_point(cfg_path: Path) -> None:
    doc = _doc()
    doc["grid"]["load"] = [0, 0.01]
    assert config.parse(doc, cfg_path).grid.load == (0.0, 0.01e-12)


# --- bad inputs: one problem each ----------------------------------------------------------------


def test_missing_library_name(cfg_path: Path) -> None:
    doc = _doc()
    del doc["library"]["name"]
    assert _one_problem(doc, cfg_path, "library.name").reason == "missing key"


def test_missing_section(cfg_path: Path) -> None:
    doc = _doc()
    del doc["grid"]
    with pytest.raises(ConfigError) as info:
        config.parse(doc, cfg_path)
    # The keys the section should have hold are reported too.
    assert f"  file {cfg_path}, key grid: missing section\n" in str(info.value)


def test_unknown_top_level_key(cfg_path: Path) -> None:
    doc = _doc()
    doc["colour"] = "blue"
    assert "unknown key" in _one_problem(doc, cfg_path, "colour").reason


def test_unknown_process_key(cfg_path: Path) -> None:
    doc = _doc()
    doc["process"]["voltage"] = 1.2
    assert "unknown key" in _one_problem(doc, cfg_path, "process.voltage").reason


def test_unknown_cell_key(cfg_path: Path) -> None:
    doc = _doc()
    doc["cell"][1]["inptus"] = ["IA", "IB"]
    err = _one_problem(doc, cfg_path, "cell[1].inptus", "QNAND2_P1")
    assert "unknown key" in err.reason and "inputs" in err.reason


def test_wrong_type(cfg_path: Path) -> None:
    doc = _doc()
    doc["process"]["vdd"] = "1.2"
    assert "must be float, got str '1.2'" in _one_problem(doc, cfg_path, "process.vdd").reason


def test_a_boolean_is_not_a_number(cfg_path: Path) -> None:
    doc = _doc()
    doc["process"]["vdd"] = True
    _one_problem(doc, cfg_path, "process.vdd")


@pytest.mark.parametrize("axis", ["slew", "load"])
def test_global_grid_not_increasing(cfg_path: Path, axis: str) -> None:
    doc = _doc()
    doc["grid"][axis] = [0.01, 0.05, 0.05]
    err = _one_problem(doc, cfg_path, f"grid.{axis}")
    assert "strictly increasing" in err.reason and "entry 2" in err.reason


def test_cell_grid_not_increasing(cfg_path: Path) -> None:
    doc = _doc()
    doc["cell"][1]["grid"] = {"load": [0.01, 0.001]}
    err = _one_problem(doc, cfg_path, "cell[1].grid.load", "QNAND2_P1")
    assert "strictly increasing" in err.reason


@pytest.mark.parametrize(
    ("axis", "values"),
    [("slew", [0.0, 0.1]), ("slew", [-0.01, 0.1]), ("load", [-0.001, 0.01])],
)
def test_grid_entry_not_positive(cfg_path: Path, axis: str, values: list[float]) -> None:
    doc = _doc()
    doc["grid"][axis] = values
    assert "entry 0" in _one_problem(doc, cfg_path, f"grid.{axis}").reason


def test_cell_grid_zero_slew(cfg_path: Path) -> None:
    doc = _doc()
    doc["cell"][0]["grid"] = {"slew": [0, 0.05]}
    err = _one_problem(doc, cfg_path, "cell[0].grid.slew", "QINV_P1")
    assert "greater than 0" in err.reason


@pytest.mark.parametrize("values", [[], "0.01", [0.01, "0.1"], [0.01, float("inf")]])
def test_grid_not_a_list_of_numbers(cfg_path: Path, values: object) -> None:
    doc = _doc()
    doc["grid"]["slew"] = values
    _one_problem(doc, cfg_path, "grid.slew")


def test_function_pin_not_among_inputs(cfg_path: Path) -> None:
    doc = _doc()
    doc["cell"][1]["outputs"] = {"Y": "!(IA&B)"}
    err = _one_problem(doc, cfg_path, "cell[1].outputs.Y", "QNAND2_P1")
    assert "B" in err.reason and "not among the inputs" in err.reason


def test_function_syntax_error(cfg_path: Path) -> None:
    doc = _doc()
    doc["cell"][0]["outputs"] = {"Y": "!(A&"}
    _one_problem(doc, cfg_path, "cell[0].outputs.Y", "QINV_P1")


def test_missing_model_file(cfg_path: Path, tmp_path: Path) -> None:
    doc = _doc()
    doc["process"]["models"] = [{"file": "cfg_nowhere.lib", "section": "tt"}]
    err = _one_problem(doc, cfg_path, "process.models[0]")
    assert str(tmp_path / "cfg_nowhere.lib") in err.reason


def test_missing_template_file(cfg_path: Path, tmp_path: Path) -> None:
    doc = _doc()
    doc["cell"][0]["template"] = "cfg_nowhere.sp.j2"
    err = _one_problem(doc, cfg_path, "cell[0].template", "QINV_P1")
    assert str(tmp_path / "cfg_nowhere.sp.j2") in err.reason


def test_template_and_netlist_both_given(cfg_path: Path) -> None:
    doc = _doc()
    doc["cell"][0]["netlist"] = str(CELLS / "inv.sp.j2")
    err = _one_problem(doc, cfg_path, "cell[0]", "QINV_P1")
    assert "template" in err.reason and "netlist" in err.reason


def test_neither_template_nor_netlist(cfg_path: Path) -> None:
    doc = _doc()
    del doc["cell"][0]["template"]
    _one_problem(doc, cfg_path, "cell[0]", "QINV_P1")


def test_unknown_time_unit(cfg_path: Path) -> None:
    doc = _doc()
    doc["library"]["time_unit"] = "us"
    err = _one_problem(doc, cfg_path, "library.time_unit")
    assert "'us'" in err.reason and "ns" in err.reason and "ps" in err.reason


def test_duplicate_cell_names(cfg_path: Path) -> None:
    doc = _doc()
    doc["cell"][1]["name"] = "QINV_P1"
    err = _one_problem(doc, cfg_path, "cell[1].name", "QINV_P1")
    assert "twice" in err.reason


@pytest.mark.parametrize(("lower", "upper"), [(80, 20), (50, 50)])
def test_slew_lower_not_below_upper(cfg_path: Path, lower: float, upper: float) -> None:
    doc = _doc()
    doc["thresholds"] = {"slew_lower_fall": lower, "slew_upper_fall": upper}
    _one_problem(doc, cfg_path, "thresholds.slew_lower_fall")


def test_several_problems_in_one_error(cfg_path: Path) -> None:
    doc = _doc()
    doc["colour"] = "blue"
    doc["process"]["vdd"] = "1.2"
    doc["grid"]["slew"] = [0.1, 0.01]
    doc["cell"][1]["outputs"] = {"Y": "!(IA&B)"}
    with pytest.raises(ConfigError) as info:
        config.parse(doc, cfg_path)
    head, *lines = str(info.value).splitlines()
    assert head == f"file {cfg_path}: 4 problems in the config:"
    located = sorted(line.strip().split(": ", 1)[0] for line in lines)
    assert located == sorted(
        [
            f"file {cfg_path}, key colour",
            f"file {cfg_path}, key process.vdd",
            f"file {cfg_path}, key grid.slew",
            f"file {cfg_path}, key cell[1].outputs.Y, cell QNAND2_P1",
        ]
    )


def test_config_file_not_found(tmp_path: Path) -> None:
    path = tmp_path / "cfg_absent.toml"
    with pytest.raises(ConfigError) as info:
        config.load(path)
    assert str(info.value) == f"file {path}: config file not found"


def test_invalid_toml(tmp_path: Path) -> None:
    path = _write(tmp_path / "cfg_bad.toml", "[library\nname = 'x'\n")
    with pytest.raises(ConfigError) as info:
        config.load(path)
    assert str(info.value).startswith(f"file {path}: not valid TOML")
    assert info.value.__cause__ is not None


# --- netlist cells (plain SPICE) and templates ---------------------------------------------------

# Ports in another order than the config lists the pins, spread over continuation lines.
CFG_INV_NETLIST = """\
* cfg_inv: an inverter as a plain SPICE netlist
.subckt CFG_INV VSS
+ Y   $ the output
+ A VDD
MP Y A VDD VDD pch W=0.8u L=0.1u
MN Y A VSS VSS nch W=0.4u L=0.1u
.ends CFG_INV
"""


def _netlist_config(tmp_path: Path, text: str, **cell: Any) -> config.LibraryConfig:
    source = _write(tmp_path / "cfg_cell.sp", text)
    doc = _doc()
    spec = {"name": "CFG_INV", "netlist": str(source), "inputs": ["A"], "outputs": {"Y": "!A"}}
    doc["cell"] = [spec | cell]
    return config.parse(doc, tmp_path / "cfg.toml")


def test_netlist_cell_with_reordered_continued_ports(tmp_path: Path) -> None:
    cfg = _netlist_config(tmp_path, CFG_INV_NETLIST)
    cell = cfg.cell("CFG_INV")
    assert cell.netlist == tmp_path / "cfg_cell.sp" and cell.template is None
    sub = netlist.find_subckt(CFG_INV_NETLIST, "cfg_inv")  # SPICE names ignore case
    assert sub == netlist.Subckt("CFG_INV", ("VSS", "Y", "A", "VDD"), 2)
    deck = netlist.build_deck(cfg, cell)
    # The instance connects the testbench nodes in the .subckt's own port order.
    assert "\nxdut 0 cf_out_y cf_in_a cf_vdd CFG_INV\n" in deck.text
    assert CFG_INV_NETLIST.rstrip("\n") in deck.text
    assert f'.lib "{MODEL}" tt' in deck.text
    assert deck.key == netlist.build_deck(cfg, cell).key  # same inputs, same deck


def test_netlist_port_not_declared(tmp_path: Path) -> None:
    text = CFG_INV_NETLIST.replace("+ A VDD", "+ A EN VDD")
    cfg = _netlist_config(tmp_path, text)
    with pytest.raises(NetlistError) as info:
        netlist.build_deck(cfg, cfg.cell("CFG_INV"))
    ctx = info.value.context
    assert (ctx["cell"], ctx["pin"], ctx["file"], ctx["line"]) == (
        "CFG_INV",
        "EN",
        tmp_path / "cfg_cell.sp",
        2,
    )
    assert "port EN" in str(info.value)


def test_netlist_declared_pin_not_a_port(tmp_path: Path) -> None:
    cfg = _netlist_config(tmp_path, CFG_INV_NETLIST, inputs=["A", "B"], outputs={"Y": "!(A&B)"})
    with pytest.raises(NetlistError) as info:
        netlist.build_deck(cfg, cfg.cell("CFG_INV"))
    ctx = info.value.context
    assert (ctx["cell"], ctx["pin"], ctx["file"]) == ("CFG_INV", "B", tmp_path / "cfg_cell.sp")
    assert "pin B" in str(info.value)


def test_netlist_without_the_cells_subckt(tmp_path: Path) -> None:
    cfg = _netlist_config(tmp_path, CFG_INV_NETLIST.replace("CFG_INV", "OTHER_INV"))
    with pytest.raises(NetlistError) as info:
        netlist.build_deck(cfg, cfg.cell("CFG_INV"))
    message = str(info.value)
    assert info.value.context == {"file": tmp_path / "cfg_cell.sp", "cell": "CFG_INV"}
    assert "no .subckt named CFG_INV" in message and "OTHER_INV" in message


def test_template_with_an_undefined_variable(tmp_path: Path) -> None:
    template = _write(tmp_path / "cfg_inv.sp.j2", (CELLS / "inv.sp.j2").read_text())
    doc = _doc()
    doc["cell"][0]["template"] = str(template)
    del doc["cell"][0]["params"]["wp"]
    cfg = config.parse(doc, tmp_path / "cfg.toml")
    with pytest.raises(NetlistError) as info:
        netlist.build_deck(cfg, cfg.cell("QINV_P1"))
    ctx = info.value.context
    assert (ctx["cell"], ctx["file"], ctx["key"]) == ("QINV_P1", template, "params")
    assert "wp" in str(info.value)


# --- [liberty] ---------------------------------------------------------------------------------


def _two_outputs(doc: dict) -> dict:
    """``doc`` with a two-output buffer whose tables take the other output's load."""
    doc["grid"]["related_load"] = [0.001, 0.01]
    doc["cell"].append(
        {
            "name": "QBUFC_P1",
            "template": str(CELLS / "bufc.sp.j2"),
            "params": dict(INV_PARAMS),
            "inputs": ["A"],
            "outputs": {"Y": "A", "YB": "!A"},
        }
    )
    return doc


def test_liberty_defaults(cfg_path: Path) -> None:
    cfg = config.parse(_doc(), cfg_path)
    assert cfg.liberty == config.LibertyOptions("largest", 1.0, 1.0)


def test_liberty_other_load_in_library_units(cfg_path: Path) -> None:
    doc = _two_outputs(_doc())
    doc["liberty"] = {"other_load": 0.005, "load_limit_factor": 1.5, "slew_limit_factor": 2}
    cfg = config.parse(doc, cfg_path)
    assert cfg.liberty.other_load == pytest.approx(0.005e-12, rel=1e-12, abs=0)
    assert (cfg.liberty.load_limit_factor, cfg.liberty.slew_limit_factor) == (1.5, 2.0)
    doc["liberty"] = {"other_load": "smallest"}
    assert config.parse(doc, cfg_path).liberty.other_load == "smallest"


def test_liberty_other_load_unknown_rule(cfg_path: Path) -> None:
    doc = _doc()
    doc["liberty"] = {"other_load": "middle"}
    err = _one_problem(doc, cfg_path, "liberty.other_load")
    assert "'largest' or 'smallest' or a load in cap_unit" in err.reason


def test_liberty_other_load_outside_a_cells_related_load(cfg_path: Path) -> None:
    # The default file's tables are read within the characterized loads, never extrapolated.
    doc = _two_outputs(_doc())
    doc["liberty"] = {"other_load": 0.02}
    err = _one_problem(doc, cfg_path, "liberty.other_load", "QBUFC_P1")
    assert "0.02 pf is outside the cell's related_load [0.001, 0.01] pf" in err.reason


def test_liberty_pin_capacitance_rule(cfg_path: Path) -> None:
    doc = _doc()
    doc["liberty"] = {"pin_capacitance": "threshold"}
    assert config.parse(doc, cfg_path).liberty.pin_capacitance == "threshold"
    doc["liberty"] = {"pin_capacitance": "half-edge"}
    err = _one_problem(doc, cfg_path, "liberty.pin_capacitance")
    assert "must be 'whole-edge' or 'threshold', got 'half-edge'" in err.reason


def test_liberty_limit_factor_not_positive(cfg_path: Path) -> None:
    doc = _doc()
    doc["liberty"] = {"slew_limit_factor": 0}
    _one_problem(doc, cfg_path, "liberty.slew_limit_factor")


def test_spice_cards_join_continuations_and_cut_comments():
    # SPICE card syntax as the ngspice manual states it (ngspice User's Manual, "Input file
    # format"): a line starting with "+" continues the card before it, a line starting with "*"
    # is a comment, and "$" starts a comment at the end of a line.
    text = "* a cell\n.subckt C A\n+ Y VDD  VSS $ ports\nM1 Y A VSS VSS nch\n+ w=1u l=0.1u\n.ends\n"
    cards = netlist.spice_cards(text)
    assert [c.text for c in cards] == [
        ".subckt C A Y VDD VSS",
        "M1 Y A VSS VSS nch w=1u l=0.1u",
        ".ends",
    ]
    assert [c.line for c in cards] == [2, 4, 6]
    assert cards[1].line_at(cards[1].text.index("w=1u")) == 5
    assert netlist.find_subckt(text, "c").ports == ("A", "Y", "VDD", "VSS")


@pytest.mark.parametrize(
    ("section", "value", "key"),
    [
        ("corner", {"name": "ss"}, "corner"),
        ("corner", ["ss"], "corner[0]"),
        ("mismatch", {"device": {"model": "nmos"}}, "mismatch.device"),
        ("mismatch", {"wrapped": [{"subckt": "x", "colour": 1}]}, "mismatch.wrapped[0].colour"),
    ],
)
def test_an_array_of_tables_that_is_not_one_names_its_key(
    cfg_path: Path, section: str, value: Any, key: str
) -> None:
    """``[[corner]]``, ``[[mismatch.device]]``, ``[[mismatch.wrapped]]``: not an array, an
    entry not a table, an unknown key: each a problem at its own key."""
    doc = _doc()
    doc[section] = value
    with pytest.raises(ConfigError) as info:
        config.parse(doc, cfg_path)
    assert f"key {key}:" in str(info.value), str(info.value)
