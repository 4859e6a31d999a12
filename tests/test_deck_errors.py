"""A testbench ngspice cannot read: the error carries ngspice's whole cause and names the file
and line at fault (a cell netlist naming a model no file defines, a model card ngspice cannot
take); needs ngspice (fails without it). The outside reference is the simulator itself: each
expected text is what ngspice 39 (Debian's package) prints for the fault, checked in the test
against the real program, and each file and line against the file the test wrote."""

from __future__ import annotations

import dataclasses
import shutil
from pathlib import Path

import pytest

from charflow import config, netlist
from charflow.errors import DeckReadError
from charflow.resources import MODEL_DIR
from charflow.simulate import Request, SharedBackend, SubprocessBackend, make_backend

L1 = MODEL_DIR / "vellum90_l1.lib"
INVERTER = """* an inverter whose PMOS names {model}
.subckt QINV_P1 A Y VDD VSS
MP Y A VDD VDD {model} W=0.8u L=0.1u
MN Y A VSS VSS nch W=0.4u L=0.1u
.ends QINV_P1
"""


@pytest.fixture(scope="module", autouse=True)
def _needs_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; these tests need it")


def _deck(tmp_path: Path, models: str, model: str = "pch", extra: int = 2) -> netlist.Deck:
    """A one-inverter testbench reading ``models`` (tt) and ``extra`` harmless files besides."""
    (tmp_path / "models.lib").write_text(models)
    (tmp_path / "inv.sp").write_text(INVERTER.format(model=model))
    others = []
    for i in range(extra):
        (tmp_path / f"extra{i}.inc").write_text("* nothing to read\n")
        others.append(f'"extra{i}.inc"')
    (tmp_path / "lib.toml").write_text(
        f"""[library]
name = "bad"
[process]
models = [{{ file = "models.lib", section = "tt" }}, {", ".join(others)}]
vdd = 1.2
[grid]
slew = [0.01]
load = [0.002]
[[cell]]
name = "QINV_P1"
netlist = "inv.sp"
inputs = ["A"]
outputs = {{ Y = "!A" }}
"""
    )
    cfg = config.load(tmp_path / "lib.toml")
    return netlist.build_deck(cfg, cfg.cell("QINV_P1"))


def _read(backend: SharedBackend | SubprocessBackend, deck: netlist.Deck) -> DeckReadError:
    with pytest.raises(DeckReadError) as caught:
        backend.run(Request(deck, (), "op", ("vsupply#branch",)))
    return caught.value


BACKENDS = [lambda: make_backend("shared", 60.0), lambda: SubprocessBackend(60.0)]


@pytest.mark.parametrize("backend", BACKENDS, ids=["shared", "subprocess"])
def test_a_model_no_file_defines_is_named_at_the_cell_line_that_uses_it(tmp_path, backend):
    deck = _deck(tmp_path, L1.read_text(), model="pch_missing")
    error = _read(backend(), deck)
    # ngspice's own words, whole (ngspice-39's messages for an unknown model).
    assert "can't find model 'pch_missing'" in error.reason
    assert "could not find a valid modelname" in error.reason
    assert "no file the testbench reads defines a model pch_missing" in error.reason
    # Only the file at fault, with the line of the instance: not every file the deck reads.
    assert error.context["file"] == tmp_path / "inv.sp"
    assert error.context["line"] == 3
    assert "extra0.inc" not in str(error)


def test_a_model_in_a_section_not_read_says_where_it_is(tmp_path):
    fast = ".model pch_fast pmos level=1 vto=-0.30 kp=115e-6\n"
    models = L1.read_text().replace("\n.lib ff\n", f"\n.lib ff\n{fast}", 1)
    deck = _deck(tmp_path, models, model="pch_fast")
    error = _read(make_backend("shared", 60.0), deck)
    text = (tmp_path / "models.lib").read_text().splitlines()
    line = next(i for i, ln in enumerate(text, 1) if ln.startswith(".model pch_fast"))
    assert f"model pch_fast is defined at {tmp_path / 'models.lib'} line {line}" in error.reason
    assert "in a part the testbench does not read" in error.reason


@pytest.mark.parametrize("backend", BACKENDS, ids=["shared", "subprocess"])
def test_a_model_card_of_a_level_the_simulator_lacks_is_named(tmp_path, backend):
    # ngspice supports MOS levels 1-6, 8-10, 14, 49, 54-58, 60, 68, 73 (its own message): 77
    # is none of them.
    models = L1.read_text().replace(".model pch pmos level=1", ".model pch pmos level=77", 1)
    deck = _deck(tmp_path, models)
    error = _read(backend(), deck)
    assert "Only MOS device levels" in error.reason
    assert "could not find a valid modelname" in error.reason
    text = models.splitlines()
    assert error.context["file"] == tmp_path / "models.lib"
    assert text[error.context["line"] - 1].startswith(".model pch pmos level=77")


def test_a_broken_expression_names_the_physical_line(tmp_path):
    # A fatal read error (ngspice gives up): the separate-process backend, so that the shared
    # simulator of this test process stays usable.
    models = L1.read_text().replace("lambda=0.08", "lambda=(0.08", 1)
    deck = _deck(tmp_path, models)
    error = _read(SubprocessBackend(60.0), deck)
    assert 'Closing ")" not found' in error.reason
    text = models.splitlines()
    assert error.context["file"] == tmp_path / "models.lib"
    assert "lambda=(0.08" in text[error.context["line"] - 1]


def test_a_missing_include_is_named_where_a_model_file_asks_for_it(tmp_path):
    # A missing include leaves the shared simulator unable to run any later deck: the
    # separate-process backend, so that the shared simulator of this test process stays usable.
    models = L1.read_text().replace("\n.lib tt\n", "\n.lib tt\n.include corners.inc\n", 1)
    error = _read(SubprocessBackend(60.0), _deck(tmp_path, models))
    assert "Could not find include file corners.inc" in error.reason
    line = models.splitlines().index(".include corners.inc") + 1
    assert (error.context["file"], error.context["line"]) == (tmp_path / "models.lib", line)


def test_a_cause_that_names_no_card_lists_the_files_read(tmp_path):
    # The testbench's own line is at fault here, in no file.
    deck = _deck(tmp_path, L1.read_text(), extra=1)
    text = deck.text.replace("xdut ", "xbroken cf_in_a cf_out_y no_such_subckt\nxdut ")
    error = _read(SubprocessBackend(60.0), dataclasses.replace(deck, text=text, key="broken"))
    assert "unknown subckt: xbroken cf_in_a cf_out_y no_such_subckt" in error.reason
    assert "file" not in error.context
    read = f"not located; the testbench reads {tmp_path / 'models.lib'}, {tmp_path / 'extra0.inc'}"
    assert read in error.reason
