"""The invented vellum90 model cards and the demo cell templates, checked with ngspice -b."""

from __future__ import annotations

import itertools
import re
import shutil
import subprocess
from collections.abc import Callable
from pathlib import Path

import jinja2
import pytest

from charflow.config.resources import MODEL_DIR, TEMPLATE_DIR

ROOT = Path(__file__).resolve().parents[1]
MODELS = MODEL_DIR
CELLS = TEMPLATE_DIR / "cells"
MODEL_FILES = ("vellum90_l1.lib", "vellum90_bsim.lib")
CORNERS = ("tt", "ff", "ss")
VDD = 1.2

_W = 0.4e-6
_L = 0.1e-6
# X1 sizes from templates/cells/SIZES.md, with the logic function each cell must implement.
CELL_CASES: dict[str, tuple[dict[str, object], Callable[..., bool]]] = {
    "inv": ({"name": "QINV_P1", "wn": _W, "wp": 2 * _W, "l": _L}, lambda a: not a),
    "buf": (
        {"name": "QBUF_P1", "wn1": _W, "wp1": 2 * _W, "wn2": _W, "wp2": 2 * _W, "l": _L},
        lambda a: a,
    ),
    "nand2": (
        {"name": "QNAND2_P1", "wn": 2 * _W, "wp": 2 * _W, "l": _L},
        lambda ia, ib: not (ia and ib),
    ),
    "nor2": (
        {"name": "QNOR2_P1", "wn": _W, "wp": 4 * _W, "l": _L},
        lambda ia, ib: not (ia or ib),
    ),
    "aoi21": (
        {"name": "QAOI21_P1", "wna": 2 * _W, "wnb": _W, "wpa": 4 * _W, "wpb": 4 * _W, "l": _L},
        lambda ia, ib, ic: not ((ia and ib) or ic),
    ),
}

_PRINTED = re.compile(r"^(\S+) = (\S+)$", re.MULTILINE)
_COMPLAINT = re.compile(r"^\s*(error|warning|fatal)\b", re.IGNORECASE | re.MULTILINE)


def _run_ngspice(netlist: str, tmp_path: Path, stem: str) -> dict[str, float]:
    """Run one batch netlist and return every ``name = value`` the control block printed."""
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; these tests need it")
    path = tmp_path / f"{stem}.cir"
    path.write_text(netlist)
    done = subprocess.run(
        ["ngspice", "-b", str(path)],
        capture_output=True,
        text=True,
        cwd=tmp_path,
        timeout=60,
        check=False,
    )
    output = done.stdout + done.stderr
    # Control blocks end in quit: without it a batch run with no dot analysis exits with 1.
    assert done.returncode == 0, output
    # A model parameter ngspice ignores or rejects shows up only as a message, never as a failure.
    assert _COMPLAINT.search(output) is None, output
    return {name.lower(): float(value) for name, value in _PRINTED.findall(done.stdout)}


def _model_params(model_file: str, corner: str, model: str) -> dict[str, float]:
    """Parameters of one ``.model`` card inside ``.lib corner`` ... ``.endl corner``."""
    text = (MODELS / model_file).read_text().lower()
    section = re.search(rf"^\.lib {corner}\n(.*?)^\.endl {corner}$", text, re.DOTALL | re.MULTILINE)
    assert section is not None, f"{model_file}: no .lib {corner} section"
    lines: list[str] = []
    for line in section.group(1).splitlines():
        if line.startswith("+") and lines:
            lines[-1] += " " + line[1:]
        elif line.strip() and not line.startswith("*"):
            lines.append(line)
    for line in lines:
        words = line.split()
        if words[:2] == [".model", model]:
            return {k: float(v) for k, v in (w.split("=") for w in words[3:])}
    raise AssertionError(f"{model_file}: no .model {model} in .lib {corner}")


def _lib_line(model_file: str, corner: str) -> str:
    return f".lib {MODELS / model_file} {corner}"


def _drain_current(
    model_file: str, corner: str, model: str, vgs: float, vds: float, tmp_path: Path
) -> float:
    """|Id| of a W=1u, L=0.1u device with source and bulk grounded."""
    sign = 1.0 if model == "nch" else -1.0
    netlist = f"""* drain current of one {model}
{_lib_line(model_file, corner)}
vd d 0 {sign * vds}
vg g 0 {sign * vgs}
m1 d g 0 0 {model} w=1u l=0.1u as=0.25p ad=0.25p ps=2.5u pd=2.5u
.control
op
print @m1[id]
quit
.endc
.end
"""
    return abs(_run_ngspice(netlist, tmp_path, f"id_{model}_{corner}")["@m1[id]"])


@pytest.mark.parametrize("corner", CORNERS)
def test_level1_saturation_current_is_square_law(corner: str, tmp_path: Path) -> None:
    # Shichman & Hodges, "Modeling and simulation of insulated-gate field-effect transistor
    # switching circuits", IEEE JSSC, 1968; the ngspice manual's level-1 MOSFET model:
    # Id = KP/2 * W/Leff * (Vgs - VTO)^2 * (1 + LAMBDA*Vds), Leff = L - 2*LD, Vbs = 0.
    p = _model_params("vellum90_l1.lib", corner, "nch")
    w, length, vgs, vds = 1e-6, 0.1e-6, 0.8, 1.2
    assert vds > vgs - p["vto"], "the bias must be in saturation"
    leff = length - 2 * p.get("ld", 0.0)
    expected = 0.5 * p["kp"] * w / leff * (vgs - p["vto"]) ** 2 * (1 + p["lambda"] * vds)
    simulated = _drain_current("vellum90_l1.lib", corner, "nch", vgs, vds, tmp_path)
    assert simulated == pytest.approx(expected, rel=0.01, abs=0)


@pytest.mark.parametrize("model", ["nch", "pch"])
@pytest.mark.parametrize("model_file", MODEL_FILES)
def test_fast_corner_drives_more_than_typical_more_than_slow(
    model_file: str, model: str, tmp_path: Path
) -> None:
    # Common practice: the fast corner has the highest and the slow corner the lowest on-current.
    ion = {c: _drain_current(model_file, c, model, VDD, VDD, tmp_path) for c in CORNERS}
    assert ion["ff"] > ion["tt"] > ion["ss"], ion


def _render(cell: str) -> str:
    env = jinja2.Environment(undefined=jinja2.StrictUndefined, keep_trailing_newline=True)
    params, _ = CELL_CASES[cell]
    return env.from_string((CELLS / f"{cell}.sp.j2").read_text()).render(**params)


# Templates whose outputs are not a DC function of the inputs alone (a flip-flop) or that
# have two outputs: their function is checked by charflow's own functional check instead.
CHECKED_IN_TEST_SEQUENTIAL = {"dff", "bufc"}


def test_every_template_has_a_case() -> None:
    templates = {p.name.removesuffix(".sp.j2") for p in CELLS.glob("*.sp.j2")}
    assert templates == set(CELL_CASES) | CHECKED_IN_TEST_SEQUENTIAL


@pytest.mark.parametrize("cell", sorted(CELL_CASES))
def test_template_renders_one_subckt(cell: str) -> None:
    text = _render(cell)
    name = CELL_CASES[cell][0]["name"]
    subckts = re.findall(r"^\.subckt (\S+) (.*)$", text, re.MULTILINE | re.IGNORECASE)
    assert len(subckts) == 1
    assert subckts[0][0] == name
    assert {"VDD", "VSS"} <= set(subckts[0][1].split())
    assert re.search(rf"^\.ends {name}$", text, re.MULTILINE)
    for card in re.findall(r"^M.*$", text, re.MULTILINE):
        assert re.search(r" (nch|pch) ", card), card
        assert all(k in card for k in ("AS=", "AD=", "PS=", "PD=")), card


@pytest.mark.parametrize("corner", CORNERS)
@pytest.mark.parametrize("model_file", MODEL_FILES)
@pytest.mark.parametrize("cell", sorted(CELL_CASES))
def test_cell_dc_logic_levels(cell: str, model_file: str, corner: str, tmp_path: Path) -> None:
    subckt = _render(cell)
    params, function = CELL_CASES[cell]
    header = re.search(r"^\.subckt \S+ (.*)$", subckt, re.MULTILINE)
    assert header is not None, subckt
    ports = header.group(1).split()
    inputs = [p for p in ports if p not in ("Y", "VDD", "VSS")]
    vectors = list(itertools.product((False, True), repeat=len(inputs)))
    instances = []
    for i, vector in enumerate(vectors):
        nodes = dict(zip(inputs, ("vdd" if v else "0" for v in vector), strict=True))
        nodes |= {"Y": f"y{i}", "VDD": "vdd", "VSS": "0"}
        instances.append(f"x{i} {' '.join(nodes[p] for p in ports)} {params['name']}")
    netlist = "\n".join(
        [
            f"* {cell} logic levels",
            _lib_line(model_file, corner),
            subckt,
            f"vsupply vdd 0 {VDD}",
            *instances,
            ".control",
            "op",
            "print " + " ".join(f"v(y{i})" for i in range(len(vectors))),
            "quit",
            ".endc",
            ".end",
            "",
        ]
    )
    printed = _run_ngspice(netlist, tmp_path, f"{cell}_{corner}")
    for i, vector in enumerate(vectors):
        out = printed[f"v(y{i})"]
        # Common practice: a static CMOS output settles within 10 % of the rail it is driven to.
        if function(*vector):
            assert out > 0.9 * VDD, f"{cell} {dict(zip(inputs, vector, strict=True))}: Y = {out}"
        else:
            assert out < 0.1 * VDD, f"{cell} {dict(zip(inputs, vector, strict=True))}: Y = {out}"
