"""Property-based hardening: random and mutated configs and netlists end in a CharflowError.

Whatever a user writes, charflow either accepts it or says what is wrong through one of its
own errors (``charflow.errors``), never another exception: a traceback is a charflow bug.
Each test counts the inputs it tried and records them (``record_property``) and prints them.
"""

from __future__ import annotations

import contextlib
import json
import subprocess
import tomllib
from dataclasses import replace
from pathlib import Path

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from charflow.config import library as config
from charflow.config.resources import MODEL_DIR, TEMPLATE_DIR
from charflow.flow import characterize as flow
from charflow.flow import check
from charflow.records.errors import CharflowError
from charflow.simulation import netlist

ROOT = Path(__file__).resolve().parents[1]
SMALL = ROOT / "tests" / "data" / "small_l1.toml"
INV = TEMPLATE_DIR / "cells" / "inv.sp.j2"
FUZZ = settings(
    max_examples=150,
    deadline=None,
    database=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)


def _base() -> dict:
    """small_l1.toml with absolute model and template paths, so a copy loads from anywhere."""
    doc = tomllib.loads(SMALL.read_text(encoding="utf-8"))
    for m in doc["process"]["models"]:
        m["file"] = (SMALL.parent / m["file"]).resolve().as_posix()
    for c in doc["cell"]:
        c["template"] = (SMALL.parent / c["template"]).resolve().as_posix()
    return doc


def _toml(value: object) -> str:
    """A TOML value, tables inline (the stdlib reads TOML but does not write it)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return repr(value)  # inf and nan are TOML too
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)
    if isinstance(value, list):
        return "[" + ", ".join(map(_toml, value)) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{json.dumps(k)} = {_toml(v)}" for k, v in value.items()) + "}"
    raise TypeError(f"no TOML for {value!r}")


def _document(doc: dict) -> str:
    return "".join(f"{json.dumps(k)} = {_toml(v)}\n" for k, v in doc.items())


def _paths(node: object, at: tuple = ()) -> list[tuple]:
    """Every key path (dict keys and list indexes) inside ``node``."""
    out = []
    items = node.items() if isinstance(node, dict) else enumerate(node)
    for k, v in items:
        out.append((*at, k))
        if isinstance(v, dict | list) and v:
            out.extend(_paths(v, (*at, k)))
    return out


def _parent(doc: dict, path: tuple):
    node = doc
    for k in path[:-1]:
        node = node[k]
    return node


scalars = st.one_of(
    st.none(),  # not TOML: stands for "delete"
    st.booleans(),
    st.integers(-(10**6), 10**6),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=12),
    st.lists(st.integers(-5, 5), max_size=3),
    st.dictionaries(st.text(max_size=4), st.integers(), max_size=2),
)
garbles = st.sampled_from(
    ["", "A &", "!(", "IA | | IB", "B", "A'", "(IA&IB", "IA^", "1", "0", "!!A", "A+", "é", "A)("]
)


@st.composite
def mutated_configs(draw) -> str:
    doc = _base()
    for _ in range(draw(st.integers(1, 4))):
        kind = draw(
            st.sampled_from(
                ["delete", "retype", "unknown", "function", "cells", "grid", "bytes", "text"]
            )
        )
        paths = _paths(doc)
        if kind in ("delete", "retype") and paths:
            path = draw(st.sampled_from(paths))
            parent = _parent(doc, path)
            value = draw(scalars)
            if kind == "delete" or value is None:
                del parent[path[-1]]
            else:
                parent[path[-1]] = value
        elif kind == "unknown":
            tables = [p for p in paths if isinstance(_parent(doc, (*p, 0)), dict)]
            where = _parent(doc, (*draw(st.sampled_from(tables)), 0)) if tables else doc
            where[draw(st.text(min_size=1, max_size=8))] = draw(st.integers())
        elif kind == "function" and isinstance(doc.get("cell"), list) and doc["cell"]:
            cell = draw(st.sampled_from(doc["cell"]))
            if isinstance(cell, dict):
                cell["outputs"] = {"Y": draw(garbles)}
        elif kind == "cells" and isinstance(doc.get("cell"), list) and doc["cell"]:
            cells = doc["cell"]
            doc["cell"] = draw(st.permutations(cells)) + draw(
                st.lists(st.sampled_from(cells), max_size=2)
            )
        elif kind == "grid" and isinstance(doc.get("grid"), dict):
            axis = draw(st.sampled_from(["slew", "load"]))
            doc["grid"][axis] = draw(
                st.sampled_from([[0.05, 0.01], [0.01, 0.01], [0.01], [], [-0.01, 0.1], [0, 1]])
            )
        elif kind == "bytes":
            return _splice(draw, _document(doc).encode()).decode("utf-8", errors="replace")
        elif kind == "text":
            return draw(st.text(max_size=200))
    return _document(doc)


def _splice(draw, data: bytes) -> bytes:
    """``data`` with a few random bytes written over it or put into it."""
    for _ in range(draw(st.integers(1, 5))):
        at = draw(st.integers(0, len(data)))
        junk = draw(st.binary(min_size=1, max_size=6))
        data = data[:at] + junk + data[at + (len(junk) if draw(st.booleans()) else 0) :]
    return data


def test_mutated_configs_end_in_charflow_errors(tmp_path, record_property):
    tried = []
    path = tmp_path / "fuzz.toml"

    @FUZZ
    @given(text=mutated_configs())
    def one(text: str) -> None:
        tried.append(text)
        path.write_text(text, encoding="utf-8", errors="surrogateescape")
        with contextlib.suppress(CharflowError):
            config.load(path)

    one()
    record_property("configs_tried", len(tried))
    print(f"configs tried: {len(tried)}")
    assert len(tried) >= 50


@st.composite
def mutated_templates(draw) -> str:
    lines = INV.read_text(encoding="utf-8").splitlines()
    subckt = next(i for i, ln in enumerate(lines) if ln.startswith(".subckt"))
    for _ in range(draw(st.integers(1, 3))):
        kind = draw(st.sampled_from(["port", "drop", "rename", "ends", "garbage", "bytes"]))
        tokens = lines[subckt].split()
        if kind == "port" and len(tokens) > 2:
            del tokens[draw(st.integers(2, len(tokens) - 1))]
        elif kind == "drop":
            tokens = tokens[: draw(st.integers(0, len(tokens)))]
        elif kind == "rename" and len(tokens) > 1:
            i = draw(st.integers(1, len(tokens) - 1))
            tokens[i] = draw(st.sampled_from(["B", "y", "X1", "params:", "w=1", "+", "{{", "$"]))
        elif kind == "ends":
            lines = [ln for ln in lines if not ln.startswith(".ends")]
        elif kind == "garbage":
            junk = draw(
                st.one_of(
                    st.sampled_from(
                        ["{{", "{% if %}", "{{ missing }}", "+ A", ".subckt", ".ends", "R1 A"]
                    ),
                    st.text(max_size=30),
                )
            )
            lines.insert(draw(st.integers(0, len(lines))), junk)
        elif kind == "bytes":
            raw = _splice(draw, lines[subckt].encode())
            tokens = raw.decode("utf-8", errors="replace").split(" ")
        if subckt < len(lines):
            lines[subckt] = " ".join(tokens)
    return "\n".join(lines) + "\n"


def _one_cell_config(tmp_path: Path, template: Path) -> Path:
    doc = _base()
    doc["cell"] = [dict(doc["cell"][0], template=template.as_posix())]
    # A separate ngspice per run: a deck that breaks the simulator breaks only its own run.
    doc["simulation"] = {"backend": "subprocess", "timeout": 10.0}
    path = tmp_path / "one.toml"
    path.write_text(_document(doc), encoding="utf-8")
    return path


def test_mutated_netlists_end_in_charflow_errors(tmp_path, record_property):
    tried = []
    template = tmp_path / "inv.sp.j2"
    cfg_path = _one_cell_config(tmp_path, template)
    template.write_text(INV.read_text(encoding="utf-8"), encoding="utf-8")
    cfg = config.load(cfg_path)
    kinds = {"built": 0, "refused": 0, "checked clean": 0, "check problems": 0}

    @settings(FUZZ, max_examples=60)
    @given(text=mutated_templates())
    def one(text: str) -> None:
        tried.append(text)
        template.write_text(text, encoding="utf-8", errors="surrogateescape")
        try:
            netlist.build_deck(cfg, cfg.cells[0])
            kinds["built"] += 1
        except CharflowError:
            kinds["refused"] += 1
        # The whole check, simulation included: its problems are CharflowError lines.
        report = check.check(cfg_path)
        kinds["check problems" if report.problems else "checked clean"] += 1
        if not report.problems:  # and what checks clean is characterized
            with contextlib.suppress(CharflowError):
                flow.characterize(config.load(cfg_path), jobs=1)

    one()
    record_property("netlists_tried", len(tried))
    print(f"netlists tried: {len(tried)} {kinds}")
    assert len(tried) >= 20


def test_check_command_reports_problems_of_two_cells_in_one_run(tmp_path):
    doc = _base()
    del doc["cell"][1]["params"]["wp"]  # QNAND2_P1: the template needs wp
    doc["cell"][2]["outputs"] = {"Y": "!(IA&IB)"}  # QNOR2_P1 is not a NAND
    path = tmp_path / "two.toml"
    path.write_text(_document(doc), encoding="utf-8")
    run = subprocess.run(["charflow", "check", str(path)], capture_output=True, text=True)
    assert run.returncode == 2, run.stdout + run.stderr
    lines = run.stdout.splitlines()
    assert any("cell QNAND2_P1" in ln and "wp" in ln and "key params" in ln for ln in lines)
    assert any(
        "cell QNOR2_P1" in ln and "pin Y" in ln and "key cell[2].outputs.Y" in ln for ln in lines
    )
    assert run.stdout.splitlines()[-1] == "3 cells checked: 2 problems"
    assert "Traceback" not in run.stderr


def test_check_command_names_a_model_file_ngspice_cannot_read(tmp_path):
    models = (MODEL_DIR / "vellum90_l1.lib").read_text(encoding="utf-8")
    bad = tmp_path / "broken.lib"
    bad.write_text(models.replace("kp=200e-6", "kp={200e-6", 1), encoding="utf-8")
    doc = _base()
    doc["process"]["models"] = [{"file": bad.as_posix(), "section": "tt"}]
    path = tmp_path / "models.toml"
    path.write_text(_document(doc), encoding="utf-8")
    run = subprocess.run(["charflow", "check", str(path)], capture_output=True, text=True)
    assert run.returncode == 2, run.stdout + run.stderr
    first = run.stdout.splitlines()[0]
    assert "broken.lib" in first and "cell QINV_P1" in first, first
    assert "cannot read the testbench" in first and "}" in first  # ngspice's own words
    assert "Traceback" not in run.stderr


def test_check_command_passes_a_good_config():
    run = subprocess.run(["charflow", "check", str(SMALL)], capture_output=True, text=True)
    assert run.returncode == 0, run.stdout + run.stderr
    assert run.stdout.strip() == "3 cells checked: no problems"


@st.composite
def perturbed_configs(draw) -> str:
    """small_l1 with a few numbers changed to odd but well-typed values: most still load, so
    the simulation, measurement and writing stages see them."""
    doc = _base()
    numbers = [p for p in _paths(doc) if isinstance(_parent(doc, p)[p[-1]], int | float)]
    numbers = [p for p in numbers if not isinstance(_parent(doc, p)[p[-1]], bool)]
    for _ in range(draw(st.integers(1, 3))):
        path = draw(st.sampled_from(numbers))
        parent = _parent(doc, path)
        old = parent[path[-1]]
        parent[path[-1]] = draw(
            st.sampled_from(
                [0.0, -old, old * 10, old / 10, old * 1e6, old * 1e-6, 1e-30, 1e30, 99.999]
            )
            | st.floats(allow_nan=True, allow_infinity=True)
        )
    return _document(doc)


# Configs that load are also run, on one cell and a small plan, to the written files. A
# perturbed grid can make every run crawl (a slew a million times too large): such configs
# are counted, not run, and a run may take at most RUN_TIMEOUT; the examples are the same in
# every session (derandomized), so the suite's time does not depend on the draw.
RUN_EXAMPLES = 100
RUN_POINTS = 60
RUN_SLEW = 5e-9  # s
RUN_LOAD = 1e-12  # F
RUN_TIMEOUT = 2.0  # s per simulation


def test_mutated_configs_that_load_run_or_fail_with_charflow_errors(tmp_path, record_property):
    path = tmp_path / "fuzz.toml"
    kinds = {"refused at load": 0, "too large to run": 0, "run": 0, "run refused": 0}

    @settings(FUZZ, max_examples=RUN_EXAMPLES, derandomize=True)
    @given(text=st.one_of(mutated_configs(), perturbed_configs()))
    def one(text: str) -> None:
        path.write_text(text, encoding="utf-8", errors="surrogateescape")
        try:
            cfg = config.load(path)
        except CharflowError:
            kinds["refused at load"] += 1
            return
        cell = [cfg.cells[0].name]
        grid = cfg.cells[0].grid
        too_large = max(grid.slew) > RUN_SLEW or max(grid.load) > RUN_LOAD
        if too_large or len(flow.select(cfg, cell).points) > RUN_POINTS:
            kinds["too large to run"] += 1
            return
        # A separate ngspice per run, as for the netlists below: a deck the shared simulator
        # cannot read would leave this test process's simulator unusable for later tests.
        cfg = replace(
            cfg, simulation=replace(cfg.simulation, backend="subprocess", timeout=RUN_TIMEOUT)
        )
        try:
            result = flow.characterize(cfg, cells=cell, jobs=1)
            flow.write(cfg, result, tmp_path / "out")
            kinds["run"] += 1
        except CharflowError:
            kinds["run refused"] += 1

    one()
    record_property("configs_run", kinds)
    print(f"mutated configs through run: {kinds}")
    assert sum(kinds.values()) >= 20 and kinds["run"] + kinds["run refused"] >= 1


def test_found_by_fuzzing_an_empty_template_path_is_a_config_error(tmp_path):
    doc = _base()
    doc["cell"][0]["template"] = ""
    path = tmp_path / "empty.toml"
    path.write_text(_document(doc), encoding="utf-8")
    try:
        config.load(path)
    except CharflowError as exc:
        assert "cell[0].template" in str(exc) and "empty string" in str(exc)
    else:
        raise AssertionError("an empty template path was accepted")


def test_found_by_fuzzing_a_param_the_template_cannot_use_is_a_netlist_error(tmp_path):
    doc = _base()
    doc["cell"][0]["params"]["wn"] = ""  # the template multiplies it by a float
    path = tmp_path / "text_param.toml"
    path.write_text(_document(doc), encoding="utf-8")
    cfg = config.load(path)
    try:
        netlist.build_deck(cfg, cfg.cells[0])
    except CharflowError as exc:
        assert "cell QINV_P1" in str(exc) and "wn = ''" in str(exc)
    else:
        raise AssertionError("the template rendered with a text width")
