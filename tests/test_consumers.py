"""A library charflow wrote, read by the two open tools designers feed it to: yosys (synthesis,
with ABC) and OpenSTA (timing, power, SDF). Tools and sources: see consumer_tools.py.

tests/data/consumers.toml (an inverter, a buffer, NAND2, AOI21, the two-output buffer and both
flip-flops on tiny grids) is characterized once for the module. The Liberty files are also read
with the independent parser liberty-parser (Thomas Kramer, liberty-parser 0.0.29, 2019-2023).
"""

from __future__ import annotations

import itertools
import re
import shutil
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
from consumer_tools import (
    MIXED,
    library_checks,
    mixed_script,
    sta,
    sta_complaints,
    synthesize,
    total_power,
    yosys_complaints,
)
from liberty.boolean_functions import parse_boolean_function
from liberty.parser import parse_liberty
from liberty.types import Group
from scipy.interpolate import RegularGridInterpolator

from charflow.config import library as config
from charflow.config.library import LibraryConfig
from charflow.flow import characterize as flow
from charflow.io import liberty

ROOT = Path(__file__).resolve().parents[1]
CONFIG = ROOT / "tests" / "data" / "consumers.toml"
# OpenSTA's delay against the table's bilinear interpolation: 6 significant digits.
SIX_DIGITS = 5e-6
# A value OpenSTA prints with -digits 6 (six decimals, in ns).
PRINTED = 0.5e-6
# Off-grid, inside the tables: slew (ns) and load (pf) of the interpolation check.
OFF_GRID = (0.0731, 0.00837)


@dataclass(frozen=True, slots=True)
class Library:
    config: LibraryConfig
    path: Path  # the default file
    full: Path  # the three-axis file
    lib: Group  # the default file as liberty-parser reads it
    work: Path


@pytest.fixture(scope="module")
def library(tmp_path_factory: pytest.TempPathFactory) -> Library:
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; these tests need it")
    cfg = config.load(CONFIG)
    out = tmp_path_factory.mktemp("consumers")
    result = flow.characterize(cfg, jobs=2)
    assert not result.failures, [f"{f.point.label}: {f.reason}" for f in result.failures]
    flow.write(cfg, result, out)
    default, full = (out / name for name in liberty.file_names(cfg))
    lib = parse_liberty(default.read_text(encoding="utf-8"))
    return Library(cfg, default, full, lib, out)


@pytest.fixture(scope="module")
def synthesis(library: Library):
    return synthesize(library.path, library.work)


@pytest.fixture(scope="module")
def timing(library: Library) -> str:
    return sta(mixed_script(library.path, library.work / "mixed.sdf"), library.work)


def _text(value: object) -> str:
    return str(getattr(value, "value", value))


def _two_output_cells(cfg: LibraryConfig) -> list[str]:
    return [c.name for c in cfg.cells if len(c.outputs) == 2]


# --- yosys ----------------------------------------------------------------------------------


def test_yosys_maps_the_counter_onto_the_library(synthesis) -> None:
    # dfflibmap maps the four reset flops onto the flop with a clear and the enable register
    # onto the plain one; ABC maps the rest: no generic cell ($_...) is left.
    assert synthesis.cells.get("QDFFR_P1") == 4, synthesis.cells
    assert synthesis.cells.get("QDFF_P1") == 1, synthesis.cells
    assert not [c for c in synthesis.cells if c.startswith("$")], synthesis.cells
    assert "End of script." in synthesis.log


def test_yosys_has_no_complaint_about_the_library(library: Library, synthesis) -> None:
    assert yosys_complaints(synthesis.log, _two_output_cells(library.config)) == []


# --- OpenSTA --------------------------------------------------------------------------------


def test_opensta_reads_links_and_reports_without_complaint(timing: str) -> None:
    assert sta_complaints(timing) == []


def test_setup_and_hold_at_the_flops_come_from_the_library(library: Library, timing: str):
    # Each flop's D pin gets a setup (max) and a hold (min) check from the library's
    # constraint tables (a single constraint slew: constant tables), on the data edge's table.
    # A setup time comes off the required time: the report shows it negated.
    cells = {"f1": "QDFFR_P1", "f2": "QDFF_P1"}
    for kind in ("setup", "hold"):
        checks = library_checks(timing, kind)
        assert sorted(pin for pin, _, _ in checks) == ["f1/D", "f2/D"], (kind, timing)
        for pin, edge, value in checks:
            cell = library.lib.get_group("cell", cells[pin.split("/")[0]])
            (group,) = [
                g
                for g in cell.get_group("pin", "D").get_groups("timing")
                if _text(g["timing_type"]) == f"{kind}_rising"
            ]
            quantity = "rise_constraint" if edge == "^" else "fall_constraint"
            (table,) = group.get_group(quantity).get_array("values").reshape(-1)
            shown = -table if kind == "setup" else table
            assert value == pytest.approx(shown, abs=PRINTED), (pin, kind)


def test_opensta_reports_power(timing: str) -> None:
    total = total_power(timing)
    assert np.isfinite(total) and total > 0


def test_sdf_carries_the_library_conditions(library: Library, timing: str) -> None:
    # The IC arcs of AOI21 have three sensitizing states: one conditional IOPATH each, the
    # condition being the timing group's sdf_cond (SDF: IEEE Std 1497-2001, COND).
    sdf = (library.work / "mixed.sdf").read_text(encoding="utf-8")
    pin = library.lib.get_group("cell", "QAOI21_P1").get_group("pin", "Y")
    wanted = {_text(g["sdf_cond"]) for g in pin.get_groups("timing") if "sdf_cond" in g}
    assert len(wanted) == 3
    assert set(re.findall(r"\(COND (.+)\n\s+\(IOPATH IC Y", sdf)) == wanted


def _sdf_truth(condition: str, assign: dict[str, bool]) -> bool:
    """An SDF condition of charflow's form: ``P == 1'bV`` terms joined by ``&&``."""
    terms = [re.fullmatch(r"(\w+) == 1'b([01])", t.strip()) for t in condition.split("&&")]
    return all(assign[m[1]] == (m[2] == "1") for m in terms)


def test_every_when_has_the_same_sdf_cond(library: Library) -> None:
    # Each conditional timing group states its condition twice: Liberty's when and SDF's
    # sdf_cond; both must hold for the same input values (evaluated independently: when by
    # liberty-parser's Boolean parser, sdf_cond by the SDF equality form).
    checked = 0
    for cell in library.lib.get_groups("cell"):
        for pin in cell.get_groups("pin"):
            for group in pin.get_groups("timing"):
                if "when" not in group:
                    assert "sdf_cond" not in group
                    continue
                when = parse_boolean_function(_text(group["when"]))
                names = sorted(str(s) for s in when.free_symbols)
                for values in itertools.product((False, True), repeat=len(names)):
                    assign = dict(zip(names, values, strict=True))
                    expected = bool(when.subs(assign))
                    assert _sdf_truth(_text(group["sdf_cond"]), assign) == expected
                checked += 1
    assert checked == 3  # AOI21's IC arcs: one group per sensitizing state


def _one_gate(library: Library, cell: str, output: str, slew: float, load: float) -> str:
    """report_dcalc of one cell's arc from A, the cell alone between two ports: a pure table
    lookup at the input port's slew and the output port's load."""
    netlist = library.work / f"one_{cell}.v"
    netlist.write_text(
        f"module one (a, y);\n  input a;\n  output y;\n  {cell} u1 (.A(a), .{output}(y));\n"
        "endmodule\n",
        encoding="utf-8",
    )
    return sta(
        f"read_liberty {library.path}\nread_verilog {netlist}\nlink_design one\n"
        f"set_input_transition {slew} [get_ports a]\nset_load {load} [get_ports y]\n"
        f"report_dcalc -from u1/A -to u1/{output} -digits 10",
        library.work,
        f"one_{cell}.tcl",
    )


ARC = re.compile(r"^A [v^] -> \w+ ([v^])$.*?^Delay = (\S+)$.*?^Slew = (\S+)$", re.M | re.S)


@pytest.mark.parametrize(("cell", "output"), [("QINV_P1", "Y"), ("QBUFC_P1", "YB")])
def test_opensta_delay_is_the_tables_bilinear_interpolation(
    library: Library, cell: str, output: str
) -> None:
    # An NLDM table is read by bilinear interpolation between its grid points (common
    # practice); scipy's RegularGridInterpolator (Virtanen et al., SciPy 1.0, 2020) does it
    # on the values liberty-parser reads back. QBUFC_P1's YB: a table reduced from 3D.
    slew, load = OFF_GRID
    log = _one_gate(library, cell, output, slew, load)
    assert sta_complaints(log) == []
    (group,) = library.lib.get_group("cell", cell).get_group("pin", output).get_groups("timing")
    arcs = ARC.findall(log)
    assert sorted(edge for edge, _, _ in arcs) == ["^", "v"], log
    for out_edge, delay, transition in arcs:
        edge = "rise" if out_edge == "^" else "fall"
        for quantity, value in ((f"cell_{edge}", delay), (f"{edge}_transition", transition)):
            table = group.get_group(quantity)
            axes = (table.get_array("index_1")[0], table.get_array("index_2")[0])
            f = RegularGridInterpolator(axes, table.get_array("values"))
            expected = float(f([[slew, load]])[0])
            assert float(value) == pytest.approx(expected, rel=SIX_DIGITS, abs=0), (cell, quantity)


# --- limits ---------------------------------------------------------------------------------


def _limit_script(library: Library, load: float, slew: float) -> str:
    return (
        f"read_liberty {library.path}\nread_verilog {MIXED}\n"
        "link_design mixed\ncreate_clock -name clk -period 2 [get_ports clk]\n"
        "set_input_transition 0.03 [all_inputs]\n"
        f"set_input_transition {slew} [get_ports d]\nset_load {load} [get_ports y]\n"
        "report_check_types -max_transition -all_violators"
    )


def test_limits_follow_the_characterized_range(library: Library) -> None:
    # max_capacitance: the largest load every table of the output covers (QBUFC_P1's outputs:
    # their own loads reach 0.02 pf, as the other output's load only 0.01); max_transition of
    # an input: its largest table slew; of an output: its largest table transition.
    lib = library.lib
    inv = lib.get_group("cell", "QINV_P1")
    assert inv.get_group("pin", "A")["max_transition"] == pytest.approx(0.2)
    assert inv.get_group("pin", "Y")["max_capacitance"] == pytest.approx(0.02)
    (timing,) = inv.get_group("pin", "Y").get_groups("timing")
    largest = max(np.max(timing.get_group(q).get_array("values")) for q in liberty.TRANSITIONS)
    assert inv.get_group("pin", "Y")["max_transition"] == pytest.approx(largest, rel=1e-6, abs=0)
    bufc = lib.get_group("cell", "QBUFC_P1")
    for out in ("Y", "YB"):
        assert bufc.get_group("pin", out)["max_capacitance"] == pytest.approx(0.01)
    # Library defaults: a slew and a load every cell's tables cover.
    assert lib["default_max_transition"] == pytest.approx(0.1)
    assert lib["default_max_capacitance"] == pytest.approx(0.01)


def test_opensta_flags_a_load_and_a_slew_beyond_the_tables(library: Library) -> None:
    # Within the tables (QINV_P1 u5 drives y; u1 takes d) nothing is flagged; past them the
    # input slew at u1/A and the transition a load beyond max_capacitance makes at u5/Y are.
    inside = sta(_limit_script(library, 0.019, 0.15), library.work, "inside.tcl")
    assert "VIOLATED" not in inside and sta_complaints(inside) == []
    beyond = sta(_limit_script(library, 0.05, 0.3), library.work, "beyond.tcl")
    flagged = set(re.findall(r"^(\S+)\s+[\d.]+\s+[\d.]+\s+-[\d.]+ \(VIOLATED\)$", beyond, re.M))
    assert flagged == {"u1/A", "u5/Y"}, beyond


# --- the library's own statements -----------------------------------------------------------


def test_supplies_and_operating_conditions(library: Library) -> None:
    lib = library.lib
    # voltage_map: each supply and its voltage; operating conditions named after the model
    # section (the corner), and the default.
    assert lib.get_attributes("voltage_map") == [["VDD", 1.2], ["VSS", 0]]
    (conditions,) = lib.get_groups("operating_conditions")
    assert conditions.args == ["tt"] and lib["default_operating_conditions"] == "tt"
    for cell in lib.get_groups("cell"):
        pg = {g.args[0]: (g["pg_type"], g["voltage_name"]) for g in cell.get_groups("pg_pin")}
        assert pg == {"VDD": ("primary_power", "VDD"), "VSS": ("primary_ground", "VSS")}
        for pin in cell.get_groups("pin"):
            assert _text(pin["related_power_pin"]) == "VDD"
            assert _text(pin["related_ground_pin"]) == "VSS"


def _timing_and_power_groups(lib: Group):
    """((cell, pin, group kind, related pin, timing type, when), group) of every timing and
    internal_power group."""
    for cell in lib.get_groups("cell"):
        for pin in cell.get_groups("pin"):
            for kind in ("timing", "internal_power"):
                for g in pin.get_groups(kind):
                    key = (cell.args[0], pin.args[0], kind, _text(g.get("related_pin", "")))
                    which = (_text(g.get("timing_type", "")), _text(g.get("when", "")))
                    yield (*key, *which), g


def test_the_three_axis_file_reduces_to_the_default_file(library: Library) -> None:
    # The full file keeps the other output's load as index_3; its largest value along it, point
    # by point (the default rule), is the default file's table. Rounding to the written digits
    # keeps order, so the values agree exactly.
    full = parse_liberty(library.full.read_text(encoding="utf-8"))
    flat = dict(_timing_and_power_groups(library.lib))
    reduced = 0
    for key, group in _timing_and_power_groups(full):
        other = group.get("related_output_pin", group.get("equal_or_opposite_output"))
        assert ("related_output_pin" in flat[key]) is False
        for table in (g for g in group.groups if "values" in g):
            got = flat[key].get_group(table.group_name).get_array("values")
            values = table.get_array("values")
            if other is None:
                np.testing.assert_array_equal(values, got)
                continue
            shape = [len(table.get_array(f"index_{k}")[0]) for k in (1, 2, 3)]
            np.testing.assert_array_equal(values.reshape(shape).max(axis=2), got)
            reduced += 1
    # QBUFC_P1's two outputs and both flops' Q and QB: 4 timing tables and 2 energies each
    # (QDFFR_P1's clear arcs: 2 and 1).
    assert reduced == 2 * 6 + 2 * 6 + 2 * 6 + 2 * 3
