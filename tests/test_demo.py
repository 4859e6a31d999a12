"""The full demo, run once through the installed command (slow: every cell on a 7 x 7 grid
with the BSIM demo models)."""

from __future__ import annotations

import json
import shutil
import subprocess

import numpy as np
import pytest
from consumer_tools import (
    library_checks,
    mixed_script,
    sta,
    sta_complaints,
    synthesize,
    total_power,
    yosys_complaints,
)
from liberty.parser import parse_liberty

from charflow.tables.table import Table

pytestmark = pytest.mark.slow

# Sutherland, Sproull & Harris, "Logical Effort", 1999: input capacitance of NAND2 and NOR2
# sized for the inverter's drive, over the inverter's, is 4/3 and 5/3 (p/n mobility ratio 2).
LOGICAL_EFFORT = {"QNAND2_P1": 4 / 3, "QNOR2_P1": 5 / 3}
LE_RTOL = 0.15


@pytest.fixture(scope="module")
def demo(tmp_path_factory, valid_library_json):
    exe = shutil.which("charflow")
    if exe is None or shutil.which("ngspice") is None:
        pytest.fail("the demo needs the installed charflow command and ngspice")
    out = tmp_path_factory.mktemp("demo")
    proc = subprocess.run(
        [exe, "demo", "--out", str(out), "--quiet"], capture_output=True, text=True, timeout=900
    )
    assert proc.returncode == 0, proc.stderr
    valid_library_json(out / "vellum90_tt.json")
    return out, json.loads((out / "vellum90_tt.json").read_text())


def _tables(doc):
    for cell in doc["cells"]:
        for arc in cell["arcs"]:
            for t in arc["tables"]:
                yield cell["name"], arc["related_pin"], Table.from_dict(t)


def test_demo_tables_grow_with_load(demo):
    # Delay and transition grow with the output load in every NLDM table (common practice).
    _, doc = demo
    count = 0
    for cell, pin, table in _tables(doc):
        steps = np.diff(table.values, axis=1)
        assert (steps > 0).all(), f"{cell} {pin} {table.quantity} not increasing with load"
        count += 1
    # Four tables an arc; a clear or preset moves its output one way only, so two.
    assert count == sum(
        2 if arc.get("kind") in ("clear", "preset") else 4
        for c in doc["cells"]
        for arc in c["arcs"]
    )


def test_demo_delay_mostly_grows_with_input_slew(demo):
    # Delay grows with input slew for most arcs (common practice); at a light load a fast
    # output can reach its threshold sooner as the input slows, so only the heavy load is held.
    _, doc = demo
    for cell, pin, table in _tables(doc):
        if table.quantity.startswith("cell_"):
            heavy = table.values[:, -1, ...]  # index_2 (load) at its largest; any index_3
            assert (np.diff(heavy, axis=0) > 0).all(), f"{cell} {pin} {table.quantity}"


def test_demo_logical_effort_of_input_capacitance(demo):
    _, doc = demo
    caps = {
        c["name"]: max(max(p["rise_capacitance_F"], p["fall_capacitance_F"]) for p in c["inputs"])
        for c in doc["cells"]
    }
    for cell, ratio in LOGICAL_EFFORT.items():
        assert caps[cell] / caps["QINV_P1"] == pytest.approx(ratio, rel=LE_RTOL, abs=0), cell


def test_demo_liberty_parses_and_holds_every_cell(demo):
    out, doc = demo
    lib = parse_liberty((out / "vellum90_tt.lib").read_text())
    names = [g.args[0] for g in lib.get_groups("cell")]
    assert names == [c["name"] for c in doc["cells"]]
    assert len(names) >= 6


def test_demo_writes_the_three_axis_file_beside_the_default(demo):
    # The two-output cells' tables with the other output's load as index_3 (liberty-parser).
    out, doc = demo
    full = parse_liberty((out / "vellum90_tt.3d.lib").read_text())
    assert [g.args[0] for g in full.get_groups("cell")] == [c["name"] for c in doc["cells"]]
    assert doc["liberty"]["three_axis_file"] == "vellum90_tt.3d.lib"


def test_yosys_synthesizes_onto_the_demo_library(demo, tmp_path):
    # yosys (Debian 0.23) with ABC: the counter's flops map onto the demo's flip-flops, the
    # rest onto its gates, and nothing in the log is a complaint about the library.
    out, doc = demo
    done = synthesize(out / "vellum90_tt.lib", tmp_path)
    assert done.cells.get("QDFFR_P1") == 4 and done.cells.get("QDFF_P1") == 1, done.cells
    assert not [c for c in done.cells if c.startswith("$")], done.cells
    two_outputs = [c["name"] for c in doc["cells"] if len(c["outputs"]) == 2]
    assert yosys_complaints(done.log, two_outputs) == []


def test_opensta_times_the_demo_library(demo, tmp_path):
    # OpenSTA (Debian 0~20191111): timing with setup and hold from the library at both
    # flops, a power figure and an SDF file, without an error or warning.
    out, _ = demo
    log = sta(mixed_script(out / "vellum90_tt.lib", tmp_path / "mixed.sdf"), tmp_path)
    assert sta_complaints(log) == []
    for kind in ("setup", "hold"):
        assert sorted(pin for pin, _, _ in library_checks(log, kind)) == ["f1/D", "f2/D"]
    assert total_power(log) > 0
    assert "(COND IA == 1'b" in (tmp_path / "mixed.sdf").read_text()
