"""Provenance: the Liberty header and the JSON name the programs, files and settings that made
a library; the same inputs give the same bytes; the simulator's version is read without
loading libngspice in the driver; each point records when its run actually stopped."""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import socket
import subprocess
import sys
from pathlib import Path

import jsonschema
import pytest
from liberty.parser import parse_liberty

from charflow import __version__
from charflow.config import library as config
from charflow.config.resources import LIBRARY_SCHEMA, MODEL_DIR, TEMPLATE_DIR
from charflow.execution import provenance
from charflow.execution.store import FILE_NAME, Store
from charflow.flow import characterize as flow

DATA = Path(__file__).parent / "data"
MODEL = MODEL_DIR / "vellum90_l1.lib"


@pytest.fixture(scope="module", autouse=True)
def _need_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not installed; these tests need it (apt-get install ngspice)")


def _config_text(extra: str = "") -> str:
    """An inverter and a flip-flop with clear on the level-1 demo models, one grid point each
    (the flip-flop's searches cost most of the run)."""
    cells = TEMPLATE_DIR / "cells"
    return f"""\
[library]
name = "prov_l1"

[process]
models = [{{ file = "{MODEL.as_posix()}", section = "tt" }}]
vdd = 1.2
temperature = 30

[thresholds]
output_rise = 45
slew_derate = 0.6

[simulation]
settle = 0.02
window = 1  # the energy window of a flip-flop's event: a few of its delays

[grid]
slew = [0.02]
load = [0.005]
related_load = [0.005]
constraint_slew = [0.02]

[[cell]]
name = "QINV_P1"
template = "{(cells / "inv.sp.j2").as_posix()}"
params = {{ wn = 0.4e-6, wp = 0.8e-6, l = 0.1e-6 }}
inputs = ["A"]
outputs = {{ Y = "!A" }}

[[cell]]
name = "QDFFR_P1"
template = "{(cells / "dff.sp.j2").as_posix()}"
params = {{ wn = 0.4e-6, wp = 0.8e-6, l = 0.1e-6, reset = true }}
inputs = ["D", "CLK", "RSTB"]
outputs = {{ Q = "IQ", QB = "IQN" }}
flop = {{ clock = "CLK", next_state = "D", clear = "!RSTB" }}
{extra}"""


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _ngspice_release() -> str:
    """The release the installed ngspice executable reports: "ngspice-39 : Circuit level..."."""
    done = subprocess.run(["ngspice", "-v"], capture_output=True, text=True, timeout=60)
    found = re.search(r"ngspice-(\d+)", done.stdout + done.stderr)
    assert found, done.stdout
    return found.group(1)


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """The library written twice: simulated into ``first``, then wholly from the store into
    ``second``; the config lies in its own folder, apart from the outputs."""
    base = tmp_path_factory.mktemp("prov")
    (base / "project").mkdir()
    cfg_path = base / "project" / "prov.toml"
    cfg_path.write_text(_config_text(), encoding="utf-8")
    cfg = config.load(cfg_path)
    with Store(base / FILE_NAME) as store:
        first = flow.characterize(cfg, jobs=2, store=store)
        assert not first.failures, first.failures[:3]
        flow.write(cfg, first, base / "first")
        second = flow.characterize(cfg, jobs=2, store=store)
        flow.write(cfg, second, base / "second")
    assert second.simulated == 0
    return cfg_path, base


def _outputs(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


def test_same_inputs_give_the_same_bytes(runs):
    cfg_path, base = runs
    first, second = _outputs(base / "first"), _outputs(base / "second")
    assert sorted(first) == ["prov_l1.3d.lib", "prov_l1.json", "prov_l1.lib"]
    assert first == second
    # Nothing that differs between machines or checkouts: no folder, no host name.
    for text in first.values():
        for absent in (str(base), str(MODEL_DIR), str(TEMPLATE_DIR), socket.gethostname()):
            assert absent.encode() not in text, absent


def test_liberty_header_names_programs_files_and_settings(runs):
    cfg_path, base = runs
    text = (base / "first" / "prov_l1.lib").read_text(encoding="utf-8")
    header = text[: text.index("library (")]
    assert f"/* charflow {__version__} */" in header
    assert f"/* simulator ngspice {_ngspice_release()}, built " in header
    assert f"/* config prov.toml sha256 {_sha256(cfg_path)} */" in header
    assert f"/* model vellum90_l1.lib section tt sha256 {_sha256(MODEL)} */" in header
    # The corner is named as operating_conditions names it: the model section read.
    assert "/* corner tt: vdd 1.2 V, temperature 30 C */" in header
    assert "operating_conditions (tt) {" in text
    assert "output_rise 45," in header and "slew_derate 0.6 */" in header
    assert "settle 0.02," in header and "window 1 ns," in header
    assert "bisect_tolerance 0.001 ns" in header
    # The comments leave the library readable by an independent parser (Thomas Kramer,
    # liberty-parser 0.0.29).
    parsed = parse_liberty(text)
    assert [c.args[0] for c in parsed.get_groups("cell")] == ["QINV_P1", "QDFFR_P1"]


def test_json_names_programs_files_settings_and_flip_flops(runs):
    cfg_path, base = runs
    doc = json.loads((base / "first" / "prov_l1.json").read_text(encoding="utf-8"))
    assert doc["schema_version"] == flow.JSON_SCHEMA_VERSION
    made = doc["provenance"]
    assert made["charflow_version"] == __version__
    assert made["simulator"]["program"] == "ngspice"
    assert made["simulator"]["version"] == _ngspice_release()
    assert made["simulator"]["backend"] == "shared"
    assert made["config"] == {"file": "prov.toml", "sha256": _sha256(cfg_path)}
    assert made["models"] == [
        {"file": MODEL.name, "section": "tt", "sha256": _sha256(MODEL), "included_by": None}
    ]
    assert doc["corner"] == {"name": "tt", "vdd_V": 1.2, "temperature_C": 30.0}
    assert doc["thresholds"]["output_rise"] == 0.45 and doc["thresholds"]["input_rise"] == 0.5
    assert doc["slew_derate"] == 0.6
    assert doc["simulation"]["settle"] == 0.02 and doc["simulation"]["window_s"] == 1e-9
    assert doc["library_units"]["time"] == "ns" and doc["units"]["time"] == "s"
    cells = {c["name"]: c for c in doc["cells"]}
    assert cells["QINV_P1"]["ff"] is None
    # The state variables the outputs' functions name are defined (Liberty's ff group).
    assert cells["QDFFR_P1"]["outputs"] == {"Q": "IQ", "QB": "IQN"}
    assert cells["QDFFR_P1"]["ff"] == {
        "state": "IQ",
        "inverted_state": "IQN",
        "clocked_on": "CLK",
        "next_state": "D",
        "clear": "!RSTB",
        "preset": None,
    }


def test_each_point_records_when_its_run_stopped(runs):
    _, base = runs
    doc = json.loads((base / "first" / "prov_l1.json").read_text(encoding="utf-8"))
    inverter = doc["points"]["QINV_P1"]
    assert inverter
    for p in inverter:
        # Output crossed, then the run went on until the stop condition held (ngspice's
        # `stop when`), well before the cap (1 ns past the input ramp).
        assert 0 < p["delay_s"] < p["stopped_s"] < p["stop_cap_s"] / 2
    clocked = [p for p in doc["points"]["QDFFR_P1"] if "stopped_s" in p]
    assert {p["kind"] for p in clocked} == {"clock", "clear"}
    for p in clocked:
        assert 0 < p["delay_s"] < p["stopped_s"] <= p["stop_cap_s"]


def test_model_files_named_inside_a_model_file_are_listed(tmp_path):
    for f in DATA.glob("wrapped*"):
        shutil.copy(f, tmp_path / f.name)
    cfg = config.load(tmp_path / "wrapped.toml")
    made = provenance.build(cfg, provenance.Simulator("subprocess", "ngspice-39"))
    assert made.models == (
        provenance.ModelDigest(
            "wrapped_models.lib", "tt", _sha256(tmp_path / "wrapped_models.lib")
        ),
        provenance.ModelDigest(
            "wrapped_core.inc", None, _sha256(tmp_path / "wrapped_core.inc"), "wrapped_models.lib"
        ),
    )
    header = provenance.liberty_header(made)
    assert "process: options none, compat hs, scale none" in header
    assert f"model wrapped_core.inc named in wrapped_models.lib sha256 {made.models[1].sha256}" in (
        header
    )


def test_a_corner_is_named_with_its_section_and_supply(tmp_path):
    corners = (
        '\n[[corner]]\nname = "ff"\nsection = "ff"\nvdd = 1.32\ntemperature = -40\n'
        '\n[[corner]]\nname = "ss"\nsection = "ss"\nvdd = 1.08\ntemperature = 125\n'
    )
    path = tmp_path / "corners.toml"
    path.write_text(_config_text(corners), encoding="utf-8")
    ff, ss = config.load(path).libraries()
    made = provenance.build(ss, provenance.Simulator("shared", "ngspice-39"))
    assert made.corner == "ss" and made.models[0].section == "ss"
    assert made.config.sha256 == _sha256(path)
    doc = provenance.to_json(made)
    assert doc["corner"] == {"name": "ss", "vdd_V": 1.08, "temperature_C": 125.0}
    assert "corner ss: vdd 1.08 V, temperature 125 C" in provenance.liberty_header(made)
    assert provenance.build(ff, made.simulator).corner == "ff"


def test_the_simulator_version_is_read_without_loading_libngspice_here(tmp_path):
    # A fresh interpreter: the test process may hold libngspice from other tests already.
    code = (
        "import sys\n"
        "from charflow.config import library as config\n"
        "from charflow.execution import pool, provenance\n"
        "cfg = config.load(sys.argv[1])\n"
        "sim = provenance.simulator(cfg, 1)\n"
        "maps = open('/proc/self/maps').read()\n"
        "print(sim.backend, sim.version, 'libngspice' in maps, bool(pool.worker_ids()))\n"
    )
    path = tmp_path / "prov.toml"
    path.write_text(_config_text(), encoding="utf-8")
    # A cache folder of the test's own: the first asks a worker, the second reads its answer.
    env = {**os.environ, "XDG_CACHE_HOME": str(tmp_path / "cache")}

    def ask() -> list[str]:
        done = subprocess.run(
            [sys.executable, "-c", code, str(path)],
            capture_output=True,
            text=True,
            timeout=120,
            env=env,
        )
        assert done.returncode == 0, done.stderr
        return done.stdout.split()

    # The worker that answered loaded the shared library; this process did not.
    assert ask() == ["shared", _ngspice_release(), "False", "True"]
    assert (tmp_path / "cache" / "charflow" / "simulators.json").is_file()
    # Kept with the identity of the library file: no worker is started for it again.
    assert ask() == ["shared", _ngspice_release(), "False", "False"]


def test_the_schema_is_strict_and_matches_the_writer(runs):
    # JSON Schema draft 2020-12, checked with jsonschema (Julian Berman, jsonschema 4).
    schema = json.loads(LIBRARY_SCHEMA.read_text(encoding="utf-8"))
    jsonschema.Draft202012Validator.check_schema(schema)
    assert schema["properties"]["schema_version"]["const"] == flow.JSON_SCHEMA_VERSION
    check = jsonschema.Draft202012Validator(schema)
    _, base = runs
    doc = json.loads((base / "first" / "prov_l1.json").read_text(encoding="utf-8"))
    assert check.is_valid(doc)
    flop = doc["cells"][1]
    places = (doc, doc["provenance"]["models"][0], flop, flop["ff"], doc["points"]["QINV_P1"][0])
    for place in places:
        place["unknown"] = 1  # a key the schema does not describe
        assert not check.is_valid(doc)
        del place["unknown"]
    del doc["provenance"]["simulator"]["version"]
    assert not check.is_valid(doc)
