"""The Liberty and JSON outputs of a real characterization, read back independently.

tests/data/small_l1.toml (INV, NAND2, NOR2 on the level-1 models) and a 3-input AOI21 are
characterized with ngspice once per module; the Liberty file is parsed with the independent
parser ``liberty-parser`` from PyPI (Thomas Kramer, liberty-parser 0.0.29, 2019-2023), and
everything it reads back is held against the in-memory tables in library units.
"""

from __future__ import annotations

import itertools
import json
import shutil
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import pytest
from liberty.boolean_functions import parse_boolean_function
from liberty.parser import parse_liberty
from liberty.types import Group

from charflow.config import library as config
from charflow.config.library import LibraryConfig
from charflow.config.resources import MODEL_DIR, TEMPLATE_DIR
from charflow.flow import characterize as flow
from charflow.io import liberty as liberty_writer
from charflow.records.errors import TableError
from charflow.tables import power as power_tables
from charflow.tables.table import Table
from charflow.tables.tabulate import LOAD_AXIS, SLEW_AXIS

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "tests" / "data"
# Values are written with 7 significant digits ("{:.7g}"): a relative rounding of at most 5e-7.
RTOL = 1e-6
SAME_EVENT_RTOL = 0.01  # one event's energy from two runs with different time steps
QUANTITIES = ("cell_rise", "rise_transition", "cell_fall", "fall_transition")

AOI21_TOML = """\
[library]
name = "cfg_aoi21"
time_unit = "ps"
cap_unit = "ff"

[process]
models = [{{ file = "{model}", section = "tt" }}]
vdd = 1.2
temperature = 25

[grid]
slew = [20, 100]
load = [2, 10]

[[cell]]
name = "QAOI21_P1"
template = "{template}"
params = {{ wna = 0.8e-6, wnb = 0.4e-6, wpa = 1.6e-6, wpb = 1.6e-6, l = 0.1e-6 }}
inputs = ["IA", "IB", "IC"]
outputs = {{ Y = "!((IA&IB)|IC)" }}
area = 1.6
"""


BUFC_TOML = """\
[library]
name = "cfg_bufc"
time_unit = "ns"
cap_unit = "pf"

[process]
models = [{{ file = "{model}", section = "tt" }}]
vdd = 1.2

[grid]
slew = [0.02, 0.1]
load = [0.002, 0.01]
related_load = [0.002, 0.01]

[[cell]]
name = "QBUFC_P1"
template = "{template}"
params = {{ wn = 0.4e-6, wp = 0.8e-6, l = 0.1e-6 }}
inputs = ["A"]
outputs = {{ Y = "A", YB = "!A" }}
"""


@dataclass(frozen=True, slots=True)
class Characterized:
    config: LibraryConfig
    result: flow.RunResult
    lib: Group  # the Liberty file (the three-axis one if any) as liberty-parser reads it
    json: dict
    text: str  # that Liberty file as written


def _characterize(cfg: LibraryConfig, out: Path) -> Characterized:
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; these tests need it")
    result = flow.characterize(cfg, jobs=1)
    assert not result.failures, [f"{f.point.label}: {f.reason}" for f in result.failures]
    written = flow.write(cfg, result, out)
    lib_path, json_path = out / f"{cfg.name}.lib", out / f"{cfg.name}.json"
    # A two-output cell's tables keep the other output's load in a second file beside the
    # default one; the tests here read that full form.
    full_path = out / f"{cfg.name}.3d.lib"
    expected = [lib_path, json_path] + ([full_path] if full_path.exists() else [])
    assert sorted(written) == sorted(expected)
    text = (full_path if full_path.exists() else lib_path).read_text(encoding="utf-8")
    lib = parse_liberty(text)
    return Characterized(cfg, result, lib, json.loads(json_path.read_text(encoding="utf-8")), text)


@pytest.fixture(scope="module")
def small(tmp_path_factory: pytest.TempPathFactory) -> Characterized:
    cfg = config.load(DATA / "small_l1.toml")
    return _characterize(cfg, tmp_path_factory.mktemp("small_l1"))


@pytest.fixture(scope="module")
def aoi21(tmp_path_factory: pytest.TempPathFactory) -> Characterized:
    out = tmp_path_factory.mktemp("aoi21")
    path = out / "cfg_aoi21.toml"
    path.write_text(
        AOI21_TOML.format(
            model=(MODEL_DIR / "vellum90_l1.lib").as_posix(),
            template=(TEMPLATE_DIR / "cells" / "aoi21.sp.j2").as_posix(),
        ),
        encoding="utf-8",
    )
    return _characterize(config.load(path), out)


@pytest.fixture(params=["small", "aoi21"])
def run(request: pytest.FixtureRequest) -> Characterized:
    return request.getfixturevalue(request.param)


def _text(value: object) -> str:
    """An attribute as plain text: quoted strings come back from the parser wrapped."""
    return str(getattr(value, "value", value))


def _timing_groups(lib: Group, cell: str, output: str, related: str) -> dict[str, Group]:
    """The timing groups of one arc, keyed by their ``when`` ("" for the default group)."""
    pin = lib.get_group("cell", cell).get_group("pin", output)
    groups: dict[str, Group] = {}
    for g in pin.get_groups("timing"):
        if _text(g["related_pin"]) == related:
            when = _text(g.get("when", ""))
            assert when not in groups, f"{cell} {related}->{output}: two timing groups when {when}"
            groups[when] = g
    return groups


def _library_units(cfg: LibraryConfig, table: Table) -> tuple[list[np.ndarray], np.ndarray]:
    """A table's indices and values as the Liberty file should hold them."""
    per_axis = {SLEW_AXIS: cfg.time_scale, LOAD_AXIS: cfg.cap_scale}
    indices = [np.asarray(a.values) / per_axis[a.name] for a in table.axes]
    assert table.unit == "s"
    return indices, np.asarray(table.values) / cfg.time_scale


def _assert_table(cfg: LibraryConfig, group: Group, table: Table, templates: dict) -> None:
    got = group.get_group(table.quantity)
    indices, values = _library_units(cfg, table)
    np.testing.assert_allclose(got.get_array("values"), values, rtol=RTOL, atol=0)
    for k, index in enumerate(indices, 1):
        np.testing.assert_allclose(got.get_array(f"index_{k}")[0], index, rtol=RTOL, atol=0)
    # The table names a template whose variables are the table's axes.
    template = templates[got.args[0]]
    assert [template[f"variable_{k}"] for k in (1, 2)] == [a.name for a in table.axes]


def test_every_table_reads_back(run: Characterized) -> None:
    cfg, lib = run.config, run.lib
    templates = {g.args[0]: g for g in lib.get_groups("lu_table_template")}
    checked = 0
    for cell in run.result.cells:
        for arc in cell.arcs:
            groups = _timing_groups(lib, cell.cell.name, arc.arc.output, arc.arc.related)
            expected = {"": arc.default}
            if len(arc.states) > 1:
                expected |= {st.state.when: st.tables for st in arc.states}
            assert sorted(groups) == sorted(expected)
            for when, tables in expected.items():
                assert sorted(t.quantity for t in tables) == sorted(QUANTITIES)
                for table in tables:
                    _assert_table(cfg, groups[when], table, templates)
                    checked += 1
    assert checked == {"small_l1": 5 * 4, "cfg_aoi21": (3 + 3) * 4}[cfg.name]


def test_pin_capacitances_read_back(run: Characterized) -> None:
    cfg, lib = run.config, run.lib
    for cell in run.result.cells:
        group = lib.get_group("cell", cell.cell.name)
        assert group["area"] == pytest.approx(cell.cell.area, rel=RTOL, abs=0)
        assert [p.pin for p in cell.pins] == list(cell.cell.inputs)
        for cap in cell.pins:
            pin = group.get_group("pin", cap.pin)
            assert pin["direction"] == "input"
            for attr, farads in (
                ("capacitance", cap.capacitance),
                ("rise_capacitance", cap.rise),
                ("fall_capacitance", cap.fall),
            ):
                assert farads > 0
                assert pin[attr] == pytest.approx(farads / cfg.cap_scale, rel=RTOL, abs=0)


def test_pin_capacitance_up_to_the_threshold_reads_back(small: Characterized) -> None:
    """``[liberty] pin_capacitance = "threshold"``: every input's capacitance attributes are
    its charge up to the delay threshold (the JSON's *_capacitance_to_threshold_F), as the
    independent liberty-parser reads them; ``capacitance`` is the larger edge's (Liberty:
    the pin's one number, common practice); the header says so."""
    cfg = replace(small.config, liberty=replace(small.config.liberty, pin_capacitance="threshold"))
    result = small.result
    text = liberty_writer.render(cfg, result.cells, result.cell_power)
    assert "the charge up to the input's delay threshold" in text
    lib = parse_liberty(text)
    for cell in result.cells:
        group = lib.get_group("cell", cell.cell.name)
        for cap in cell.pins:
            pin = group.get_group("pin", cap.pin)
            assert cap.rise_to_threshold is not None and cap.fall_to_threshold is not None
            for attr, farads in (
                ("capacitance", max(cap.rise_to_threshold, cap.fall_to_threshold)),
                ("rise_capacitance", cap.rise_to_threshold),
                ("fall_capacitance", cap.fall_to_threshold),
            ):
                assert pin[attr] == pytest.approx(farads / cfg.cap_scale, rel=RTOL, abs=0)
    # A pin without the value (a flip-flop's pins are measured over the whole edge only).
    bare = replace(result.cells[0].pins[0], fall_to_threshold=None)
    with pytest.raises(TableError, match="no fall capacitance up to its delay threshold") as info:
        liberty_writer.liberty_pin_cap(cfg, "QFLOP", bare)
    assert info.value.context == {
        "file": cfg.path,
        "key": "liberty.pin_capacitance",
        "cell": "QFLOP",
        "pin": bare.pin,
    }


def test_header(small: Characterized) -> None:
    lib, cfg = small.lib, small.config
    assert lib.group_name == "library" and lib.args == ["small_l1"]
    assert lib["delay_model"] == "table_lookup"
    assert _text(lib["time_unit"]) == "1ns"
    assert _text(lib["voltage_unit"]) == "1V"
    assert lib["capacitive_load_unit"] == [1, "pf"]
    assert lib["nom_voltage"] == pytest.approx(1.2)
    assert lib["nom_temperature"] == pytest.approx(25)
    conditions = lib.get_group("operating_conditions")
    # Named after the corner: the model section the library was characterized with.
    assert conditions.args == ["tt"]
    assert lib["default_operating_conditions"] == conditions.args[0]
    assert conditions["voltage"] == pytest.approx(1.2)
    assert conditions["temperature"] == pytest.approx(25)
    t = cfg.thresholds
    for edge in ("rise", "fall"):
        lower, upper = t.slew_band(edge)
        assert lib[f"input_threshold_pct_{edge}"] == pytest.approx(100 * t.delay_input(edge))
        assert lib[f"output_threshold_pct_{edge}"] == pytest.approx(100 * t.delay_output(edge))
        assert lib[f"slew_lower_threshold_pct_{edge}"] == pytest.approx(100 * lower)
        assert lib[f"slew_upper_threshold_pct_{edge}"] == pytest.approx(100 * upper)
    assert lib["slew_derate_from_library"] == pytest.approx(t.slew_derate)
    # Every cell of small_l1 shares one 3 x 3 grid, so one template serves every table.
    (template,) = lib.get_groups("lu_table_template")
    assert template["variable_1"] == "input_net_transition"
    assert template["variable_2"] == "total_output_net_capacitance"
    np.testing.assert_allclose(template.get_array("index_1")[0], [0.01, 0.05, 0.2], rtol=RTOL)
    np.testing.assert_allclose(template.get_array("index_2")[0], [0.001, 0.005, 0.02], rtol=RTOL)


def test_a_library_without_two_output_cells_leaves_no_three_axis_file(
    small: Characterized, tmp_path: Path
) -> None:
    # A three-axis file left by an earlier run would contradict the default file.
    stale = tmp_path / "small_l1.3d.lib"
    stale.write_text("library (small_l1) { }\n", encoding="utf-8")
    written = flow.write(small.config, small.result, tmp_path)
    assert sorted(p.name for p in written) == ["small_l1.json", "small_l1.lib"]
    assert not stale.exists()


def test_operating_conditions_without_a_section_take_the_library_name(small: Characterized):
    cfg = small.config
    plain = replace(
        cfg,
        process=replace(
            cfg.process, models=tuple(replace(m, section=None) for m in cfg.process.models)
        ),
    )
    assert plain.corner_name == "small_l1"


def test_library_units_of_the_aoi21(aoi21: Characterized) -> None:
    assert _text(aoi21.lib["time_unit"]) == "1ps"
    assert aoi21.lib["capacitive_load_unit"] == [1, "ff"]
    (template,) = aoi21.lib.get_groups("lu_table_template")
    np.testing.assert_allclose(template.get_array("index_1")[0], [20, 100], rtol=RTOL)
    np.testing.assert_allclose(template.get_array("index_2")[0], [2, 10], rtol=RTOL)


def test_functions_read_back(run: Characterized) -> None:
    for cell in run.result.cells:
        for out in cell.cell.outputs:
            pin = run.lib.get_group("cell", cell.cell.name).get_group("pin", out.pin)
            assert pin["direction"] == "output"
            expr = pin.get_boolean_function("function")
            symbols = {s.name: s for s in expr.free_symbols}
            assert set(symbols) == set(cell.cell.inputs)
            for bits in itertools.product((False, True), repeat=len(cell.cell.inputs)):
                assign = dict(zip(cell.cell.inputs, bits, strict=True))
                parsed = bool(expr.subs({symbols[p]: v for p, v in assign.items()}))
                assert parsed == out.function.evaluate(assign), (cell.cell.name, assign)


# Each input of an inverting static CMOS gate (INV, NAND, NOR, AOI) pulls the output the other
# way: every arc is negative unate (Weste & Harris, CMOS VLSI Design, 4th ed., 2010, ch. 1).
SENSES = {
    ("QINV_P1", "A"): "negative_unate",
    ("QNAND2_P1", "IA"): "negative_unate",
    ("QNAND2_P1", "IB"): "negative_unate",
    ("QNOR2_P1", "IA"): "negative_unate",
    ("QNOR2_P1", "IB"): "negative_unate",
    ("QAOI21_P1", "IA"): "negative_unate",
    ("QAOI21_P1", "IB"): "negative_unate",
    ("QAOI21_P1", "IC"): "negative_unate",
}


def test_timing_sense_per_arc(run: Characterized) -> None:
    seen = set()
    for cell in run.lib.get_groups("cell"):
        for pin in cell.get_groups("pin"):
            for g in pin.get_groups("timing"):
                key = (cell.args[0], _text(g["related_pin"]))
                assert g["timing_sense"] == SENSES[key], key
                assert g["timing_type"] == "combinational"
                seen.add(key)
    assert seen == {k for k in SENSES if k[0] in {c.cell.name for c in run.result.cells}}


def test_no_when_for_single_state_arcs(small: Characterized) -> None:
    # A NAND2 or NOR2 arc is sensitized only by the other input at its non-controlling value
    # (1 for NAND, 0 for NOR): one state, so only the default group (common practice).
    for cell in small.result.cells:
        for arc in cell.arcs:
            assert len(arc.states) == 1
            groups = _timing_groups(small.lib, cell.cell.name, arc.arc.output, arc.arc.related)
            assert list(groups) == [""]


def test_aoi21_b_arc_has_a_when_per_state(aoi21: Characterized) -> None:
    lib = aoi21.lib
    # Y = !((IA&IB)|IC) follows IC whenever IA&IB = 0: three side states; IA follows only with
    # IB = 1 and B = 0, one state (and the same for IB).
    b = _timing_groups(lib, "QAOI21_P1", "Y", "IC")
    assert sorted(b) == sorted(["", "!IA&!IB", "!IA&IB", "IA&!IB"])
    assert list(_timing_groups(lib, "QAOI21_P1", "Y", "IA")) == [""]
    assert list(_timing_groups(lib, "QAOI21_P1", "Y", "IB")) == [""]
    # Each when, parsed by liberty-parser, holds at its own side state and at no other.
    (cell,) = aoi21.result.cells
    (arc,) = [a for a in cell.arcs if a.arc.related == "IC"]
    for st in arc.states:
        group = b[st.state.when]
        assert group["timing_sense"] == st.state.sense == "negative_unate"
        expr = parse_boolean_function(_text(group["when"]))
        symbols = {s.name: s for s in expr.free_symbols}
        assert set(symbols) == {"IA", "IB"}
        holds = [
            side
            for side in itertools.product((False, True), repeat=2)
            if bool(expr.subs(dict(zip((symbols["IA"], symbols["IB"]), side, strict=True))))
        ]
        assert holds == [tuple(v for _, v in st.state.side)]


def test_default_table_is_the_worst_state(aoi21: Characterized) -> None:
    (cell,) = aoi21.result.cells
    (arc,) = [a for a in cell.arcs if a.arc.related == "IC"]
    assert len(arc.states) == 3
    for table in arc.default:
        states = [t for st in arc.states for t in st.tables if t.quantity == table.quantity]
        assert len(states) == 3
        np.testing.assert_array_equal(table.values, np.max([t.values for t in states], axis=0))
        # Not all equal, or the check would be empty.
        assert any(not np.array_equal(states[0].values, t.values) for t in states[1:])
    # In the file as well: rounding to 7 digits is monotone, so the max survives it exactly.
    groups = _timing_groups(aoi21.lib, "QAOI21_P1", "Y", "IC")
    for quantity in QUANTITIES:
        written = {w: g.get_group(quantity).get_array("values") for w, g in groups.items()}
        worst = np.max([v for w, v in written.items() if w], axis=0)
        np.testing.assert_array_equal(written[""], worst)


def test_json_has_the_same_tables_and_points(run: Characterized) -> None:
    doc, cfg, result = run.json, run.config, run.result
    assert doc["library"] == cfg.name
    assert doc["units"]["time"] == "s" and doc["units"]["capacitance"] == "F"
    # Energy in the capacitance unit times 1 V^2 (1 pF V^2 = 1 pJ), power in that per time unit.
    assert doc["library_units"] == {
        "time": cfg.time_unit,
        "capacitance": cfg.cap_unit,
        "energy": {"pf": "pJ", "ff": "fJ"}[cfg.cap_unit],
        "power": {("ns", "pf"): "mW", ("ps", "ff"): "mW"}[(cfg.time_unit, cfg.cap_unit)],
    }
    assert doc["units"]["energy"] == "J" and doc["units"]["power"] == "W"
    assert doc["failures"] == []
    assert [c["name"] for c in doc["cells"]] == [c.cell.name for c in result.cells]
    for cell, jcell in zip(result.cells, doc["cells"], strict=True):
        assert jcell["outputs"] == {o.pin: o.function.to_liberty() for o in cell.cell.outputs}
        assert jcell["inputs"] == [
            {
                "pin": p.pin,
                "rise_capacitance_F": p.rise,
                "fall_capacitance_F": p.fall,
                # A combinational pin's capacitance up to its delay threshold, beside the
                # whole edge's (the JSON only; ``charflow paths --pin-load threshold``).
                **(
                    {}
                    if p.rise_to_threshold is None
                    else {"rise_capacitance_to_threshold_F": p.rise_to_threshold}
                ),
                **(
                    {}
                    if p.fall_to_threshold is None
                    else {"fall_capacitance_to_threshold_F": p.fall_to_threshold}
                ),
                # And between its input's slew thresholds (``--pin-load split``).
                **(
                    {}
                    if p.rise_slew_window is None
                    else {"rise_capacitance_slew_window_F": p.rise_slew_window}
                ),
                **(
                    {}
                    if p.fall_slew_window is None
                    else {"fall_capacitance_slew_window_F": p.fall_slew_window}
                ),
            }
            for p in cell.pins
        ]
        for arc, jarc in zip(cell.arcs, jcell["arcs"], strict=True):
            assert (jarc["related_pin"], jarc["output"]) == (arc.arc.related, arc.arc.output)
            assert jarc["timing_sense"] == arc.arc.sense
            # JSON floats round-trip exactly, so the tables compare equal, not just close.
            assert [Table.from_dict(t) for t in jarc["tables"]] == list(arc.default)
            assert [s["when"] for s in jarc["states"]] == [st.state.when for st in arc.states]
            for st, jst in zip(arc.states, jarc["states"], strict=True):
                assert [Table.from_dict(t) for t in jst["tables"]] == list(st.tables)
    assert list(doc["points"]) == [c.cell.name for c in result.cells]
    for name, records in doc["points"].items():
        measured = [m for m in result.measurements if m.point.cell == name]
        assert len(records) == len(measured) == len(result.plan.for_cell(name))
        for m, rec in zip(measured, records, strict=True):
            p = m.point
            assert (rec["related_pin"], rec["output"]) == (p.related, p.output)
            assert (rec["input_edge"], rec["output_edge"]) == (p.input_edge, p.output_edge)
            assert (rec["slew_s"], rec["load_F"]) == (p.slew, p.load)
            assert (rec["delay_s"], rec["transition_s"]) == (m.delay, m.transition)
            assert rec["input_charge_C"] == m.input_charge
            assert rec["supply_energy_J"] == m.supply_energy
            assert rec["internal_energy_J"] == m.internal_energy
            assert rec["simulations"] == m.runs >= 1


def test_delay_and_transition_grow_with_load(small: Characterized) -> None:
    # More load takes longer to charge through the same driver (common practice).
    checked = 0
    for cell in small.result.cells:
        for arc in cell.arcs:
            tables = [*arc.default, *(t for st in arc.states for t in st.tables)]
            for table in tables:
                assert table.axis_names[1] == LOAD_AXIS
                steps = np.diff(table.values, axis=1)
                assert np.all(steps > 0), (cell.cell.name, arc.arc.related, table.quantity)
                checked += 1
    assert checked == 5 * 4 * 2


# -- power ------------------------------------------------------------------------------------


def _energy_table(cfg: LibraryConfig, group: Group, table: Table, templates: dict) -> None:
    """One rise_power or fall_power group against its table, in library units: energy in the
    capacitance unit times 1 V^2 (1 pF V^2 = 1 pJ), slew in the time unit."""
    got = group.get_group(table.quantity)
    assert table.unit == "J"
    per_axis = {
        power_tables.SLEW_AXIS: cfg.time_scale,
        power_tables.LOAD_AXIS: cfg.cap_scale,
        power_tables.OTHER_LOAD_AXIS: cfg.cap_scale,
    }
    values = np.asarray(table.values) / cfg.cap_scale
    np.testing.assert_allclose(
        got.get_array("values").reshape(values.shape), values, rtol=RTOL, atol=0
    )
    template = templates[got.args[0]]
    for k, axis in enumerate(table.axes, 1):
        assert template[f"variable_{k}"] == axis.name
        index = np.asarray(axis.values) / per_axis[axis.name]
        np.testing.assert_allclose(got.get_array(f"index_{k}")[0], index, rtol=RTOL, atol=0)


def _power_templates(lib: Group) -> dict[str, Group]:
    return {g.args[0]: g for g in lib.get_groups("power_lut_template")}


def test_internal_power_reads_back(run: Characterized) -> None:
    cfg, lib = run.config, run.lib
    templates = _power_templates(lib)
    checked = 0
    for cell in run.result.cell_power:
        for arc in cell.arcs:
            pin = lib.get_group("cell", cell.cell).get_group("pin", arc.arc.output)
            groups = {
                _text(g.get("when", "")): g
                for g in pin.get_groups("internal_power")
                if _text(g["related_pin"]) == arc.arc.related
            }
            expected = {"": arc.default}
            if len(arc.states) > 1:
                expected |= {st.when: tables for st, tables in arc.states}
            assert sorted(groups) == sorted(expected)
            for when, tables in expected.items():
                assert [t.quantity for t in tables] == ["rise_power", "fall_power"]
                for table in tables:
                    _energy_table(cfg, groups[when], table, templates)
                    checked += 1
    assert checked == {"small_l1": 5 * 2, "cfg_aoi21": (3 + 3) * 2}[cfg.name]


def test_hidden_power_reads_back(run: Characterized) -> None:
    # An input pin's internal_power holds the energy of its toggles under its when, and under
    # that when the cell's function, as liberty-parser reads it, does not depend on the pin.
    cfg, lib = run.config, run.lib
    templates = _power_templates(lib)
    checked = 0
    for cell in run.result.cell_power:
        cell_group = lib.get_group("cell", cell.cell)
        for hidden in cell.hidden:
            pin = cell_group.get_group("pin", hidden.pin)
            (group,) = [
                g for g in pin.get_groups("internal_power") if _text(g["when"]) == hidden.when
            ]
            assert "related_pin" not in group
            for table in hidden.tables:
                _energy_table(cfg, group, table, templates)
                checked += 1
            when = parse_boolean_function(_text(group["when"]))
            for out in cell_group.get_groups("pin"):
                if out["direction"] != "output":
                    continue
                expr = out.get_boolean_function("function")
                symbols = {s.name: s for s in expr.free_symbols | when.free_symbols}
                others = [n for n in symbols if n != hidden.pin]
                for bits in itertools.product((False, True), repeat=len(others)):
                    assign = {symbols[n]: b for n, b in zip(others, bits, strict=True)}
                    if not bool(when.subs(assign)):
                        continue
                    low = bool(expr.subs({**assign, symbols[hidden.pin]: False}))
                    high = bool(expr.subs({**assign, symbols[hidden.pin]: True}))
                    assert low == high, (cell.cell, hidden.pin, hidden.when)
    # NAND2 and NOR2: each input hidden in one state (4); AOI21: IA and IB in three, IC in one.
    assert checked == {"small_l1": 4 * 2, "cfg_aoi21": 7 * 2}[cfg.name]


def test_leakage_reads_back(run: Characterized) -> None:
    cfg, lib = run.config, run.lib
    # One leakage power unit is one energy unit per time unit: 1 pJ / 1 ns = 1 fJ / 1 ps = 1 mW.
    assert _text(lib["leakage_power_unit"]) == "1mW"
    watts = 1e-3
    for cell in run.result.cell_power:
        group = lib.get_group("cell", cell.cell)
        inputs = cfg.cell(cell.cell).inputs
        assert group["cell_leakage_power"] == pytest.approx(
            cell.cell_leakage / watts, rel=RTOL, abs=0
        )
        states = {_text(g["when"]): g["value"] for g in group.get_groups("leakage_power")}
        assert len(states) == 2 ** len(inputs)
        for state in cell.leakage:
            assert state.power > 0
            assert states[state.when] == pytest.approx(state.power / watts, rel=RTOL, abs=0)
        # Each when, read by liberty-parser, holds for exactly one input vector.
        for when in states:
            expr = parse_boolean_function(when)
            symbols = {s.name: s for s in expr.free_symbols}
            assert set(symbols) == set(inputs)
            holds = [
                bits
                for bits in itertools.product((False, True), repeat=len(inputs))
                if bool(expr.subs({symbols[p]: b for p, b in zip(inputs, bits, strict=True)}))
            ]
            assert len(holds) == 1, when
        mean = np.mean([s.power for s in cell.leakage])
        assert cell.cell_leakage == pytest.approx(mean, rel=1e-12, abs=0)


def test_power_units_stated_in_the_file(run: Characterized) -> None:
    # The parser drops comments, so the header's statement of units is read from the text.
    energy = {"pf": "1pJ", "ff": "1fJ"}[run.config.cap_unit]
    header = run.text.split("library (")[0]
    assert f"energy per transition in {energy}" in header
    assert "leakage in 1mW" in header


def test_json_has_the_same_power(run: Characterized) -> None:
    doc = run.json
    cells = {c["name"]: c for c in doc["cells"]}
    for cell in run.result.cell_power:
        jcell = cells[cell.cell]
        assert jcell["cell_leakage_power_W"] == cell.cell_leakage
        assert jcell["leakage_power"] == [
            {"when": s.when, "value_W": s.power} for s in cell.leakage
        ]
        assert [(h["pin"], h["when"]) for h in jcell["hidden_power"]] == [
            (h.pin, h.when) for h in cell.hidden
        ]
        for h, jh in zip(cell.hidden, jcell["hidden_power"], strict=True):
            assert [Table.from_dict(t) for t in jh["tables"]] == list(h.tables)
        for jarc in jcell["arcs"]:
            arc = cell.arc(jarc["related_pin"], jarc["output"])
            assert [Table.from_dict(t) for t in jarc["internal_power"]["tables"]] == list(
                arc.default
            )
            for (_, tables), jst in zip(arc.states, jarc["internal_power"]["states"], strict=True):
                assert [Table.from_dict(t) for t in jst["tables"]] == list(tables)
    toggles = [rec for recs in doc["toggles"].values() for rec in recs]
    assert len(toggles) == len(run.result.toggles) > 0
    assert doc["unmeasured_toggles"] == []
    for m, rec in zip(run.result.toggles, toggles, strict=True):
        assert (rec["related_pin"], rec["input_edge"], rec["slew_s"]) == (
            m.point.related,
            m.point.input_edge,
            m.point.slew,
        )
        assert rec["energy_J"] == m.energy


@pytest.fixture(scope="module")
def bufc(tmp_path_factory: pytest.TempPathFactory) -> Characterized:
    out = tmp_path_factory.mktemp("bufc")
    path = out / "cfg_bufc.toml"
    path.write_text(
        BUFC_TOML.format(
            model=(MODEL_DIR / "vellum90_l1.lib").as_posix(),
            template=(TEMPLATE_DIR / "cells" / "bufc.sp.j2").as_posix(),
        ),
        encoding="utf-8",
    )
    return _characterize(config.load(path), out)


def test_two_output_cell_has_3d_internal_power(bufc: Characterized) -> None:
    # A cell with Y and YB: each output's internal_power names the other as
    # equal_or_opposite_output, and its tables take that output's load as index_3.
    cfg, lib = bufc.config, bufc.lib
    templates = _power_templates(lib)
    (cell,) = bufc.result.cell_power
    pins = lib.get_group("cell", "QBUFC_P1")
    by_output = {}
    for arc in cell.arcs:
        (group,) = pins.get_group("pin", arc.arc.output).get_groups("internal_power")
        assert _text(group["related_pin"]) == "A"
        assert _text(group["equal_or_opposite_output"]) == arc.arc.other
        for table in arc.default:
            assert table.axis_names[2] == power_tables.OTHER_LOAD_AXIS
            _energy_table(cfg, group, table, templates)
        by_output[arc.arc.output] = {t.quantity: t.values for t in arc.default}
    assert sorted(by_output) == ["Y", "YB"]
    # One edge of A switches both outputs; each output's table holds half of that event, so a
    # power tool adding the internal power of every output that toggles counts it once. Y's
    # rise at (slew, load of Y, load of YB) is the event of YB's fall at (slew, load of YB,
    # load of Y): the two runs differ only in whose edge refines the time step.
    for y_edge, yn_edge in (("rise", "fall"), ("fall", "rise")):
        y = by_output["Y"][f"{y_edge}_power"]
        yn = by_output["YB"][f"{yn_edge}_power"]
        np.testing.assert_allclose(y, np.swapaxes(yn, 1, 2), rtol=SAME_EVENT_RTOL, atol=0)
