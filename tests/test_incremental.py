"""Re-running only what changed, through the installed command: a second run, a run killed
with SIGKILL and started again, one arc re-run after a model change, and two corners."""

from __future__ import annotations

import difflib
import hashlib
import json
import os
import re
import shutil
import signal
import sqlite3
import subprocess
import time
from pathlib import Path

import numpy as np
import pytest
from liberty.parser import parse_liberty

from charflow.analysis import diff
from charflow.config.resources import MODEL_DIR, TEMPLATE_DIR
from charflow.execution.store import FILE_NAME
from charflow.records.names import PIN_QUANTITIES, TIMING_QUANTITIES

ROOT = Path(__file__).resolve().parents[1]
SMALL = ROOT / "tests" / "data" / "small_l1.toml"
POINTS = 90  # small_l1: (1 + 2 + 2) arcs x 2 edges x 3 slews x 3 loads
# small_l1's hidden-power toggles, stored beside the points: NAND2 and NOR2, 2 pins x 1 state
# (the other input at its controlling value) x 2 edges x 3 slews each.
TOGGLES = 24
CELLS = 3  # each with a leakage point and a function check (its first in the sweep), stored
REUSED = POINTS + TOGGLES + CELLS  # what a run served from the store reports reused
ROWS = REUSED + CELLS
KILL_POINTS = 250  # the same cells on a 5 x 5 grid
KILL_AFTER = 50  # rows stored before the kill; the run stores 25 at a time (sweep.CHUNK)


def _charflow(*args: str | Path, cwd: Path) -> subprocess.CompletedProcess[str]:
    exe = shutil.which("charflow")
    if exe is None:
        pytest.fail("the charflow command is not on PATH; install the package (pip install -e .)")
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; these tests need it")
    done = subprocess.run(
        [exe, *map(str, args)],
        capture_output=True,
        text=True,
        cwd=cwd,
        timeout=300,
        check=False,
        stdin=subprocess.DEVNULL,
    )
    assert "Traceback" not in done.stderr, done.stderr
    return done


def _config(folder: Path, *, extra: str = "", grid: str | None = None) -> Path:
    """small_l1 with its own copy of the model file (so a test may edit it) beside it."""
    models = folder / "models"
    models.mkdir(parents=True, exist_ok=True)
    shutil.copy(MODEL_DIR / "vellum90_l1.lib", models / "vellum90_l1.lib")
    text = SMALL.read_text(encoding="utf-8")
    text = text.replace("../../charflow/bundled/models/", "models/")
    text = text.replace("../../charflow/bundled/templates/", (TEMPLATE_DIR).as_posix() + "/")
    if grid is not None:
        text = re.sub(r"(?ms)^\[grid\].*?(?=^\[\[cell\]\])", grid + "\n\n", text)
    path = folder / "small.toml"
    path.write_text(text + extra, encoding="utf-8")
    return path


def _rows(db: Path, record: str | None = None) -> int:
    """Rows of the store, or those holding one kind of ``record``."""
    if not db.is_file():
        return 0
    conn = sqlite3.connect(db, timeout=5)
    try:
        if record is not None:
            query = "SELECT count(*) FROM point WHERE record = ?"
            return conn.execute(query, (record,)).fetchone()[0]
        return conn.execute("SELECT count(*) FROM point").fetchone()[0]
    except sqlite3.OperationalError:  # the run has not made the table yet
        return 0
    finally:
        conn.close()


def _outputs(out: Path, name: str = "small_l1") -> dict[str, bytes]:
    return {s: (out / f"{name}{s}").read_bytes() for s in (".lib", ".json")}


def test_a_second_run_simulates_nothing_and_writes_the_same_bytes(tmp_path: Path) -> None:
    cfg = _config(tmp_path)
    out = tmp_path / "out"
    first = _charflow("run", cfg, "--out", out, "--quiet", cwd=tmp_path)
    assert first.returncode == 0, first.stderr
    assert f"{POINTS} simulated" in first.stdout and "0 reused from the store" in first.stdout
    before = _outputs(out)
    assert _rows(out / FILE_NAME) == ROWS

    second = _charflow("run", cfg, "--out", out, "--quiet", cwd=tmp_path)
    assert second.returncode == 0, second.stderr
    assert "0 simulated (0 simulations)" in second.stdout
    assert f"{REUSED} reused from the store" in second.stdout
    assert _outputs(out) == before
    assert _rows(out / FILE_NAME) == ROWS
    # Nothing that varies between runs (wall time, dates) is in the outputs.
    assert b"sim_seconds" not in before[".json"]


def test_a_killed_run_resumes_and_ends_as_a_clean_run(tmp_path: Path) -> None:
    # One ngspice process per simulation makes the 250 points take a few seconds.
    grid = (
        '[simulation]\nbackend = "subprocess"\n\n[grid]\n'
        "slew = [0.01, 0.02, 0.05, 0.1, 0.2]\nload = [0.001, 0.002, 0.005, 0.01, 0.02]"
    )
    cfg = _config(tmp_path, grid=grid)
    clean = tmp_path / "clean"
    done = _charflow("run", cfg, "--out", clean, "--quiet", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert f"{KILL_POINTS} points measured" in done.stdout

    out = tmp_path / "killed"
    db = out / FILE_NAME
    proc = subprocess.Popen(
        [shutil.which("charflow"), "run", str(cfg), "--out", str(out), "--quiet"],
        cwd=tmp_path,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        start_new_session=True,  # its own process group: its workers and ngspice die with it
    )
    try:
        deadline = time.monotonic() + 120
        while _rows(db) < KILL_AFTER:
            assert proc.poll() is None, "the run ended before it could be killed"
            assert time.monotonic() < deadline, "the run stored too few points in time"
            time.sleep(0.01)
    finally:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
    assert proc.returncode == -signal.SIGKILL
    stored = _rows(db)
    assert KILL_AFTER <= stored < KILL_POINTS
    assert not (out / "small_l1.lib").exists()

    # The function checks stored are not among the points the run reports.
    grid = _rows(db, "Measurement")
    checks = _rows(db, "FunctionChecked")
    resumed = _charflow("run", cfg, "--out", out, "--quiet", cwd=tmp_path)
    assert resumed.returncode == 0, resumed.stderr
    assert f"{KILL_POINTS - grid} simulated" in resumed.stdout, resumed.stdout
    assert f"{stored - checks} reused from the store" in resumed.stdout, resumed.stdout
    assert _outputs(out) == _outputs(clean)
    assert not list(out.glob(".*.tmp"))  # no half-written output left behind


def _arc_of_each_line(text: str) -> list[tuple[str, str, str]]:
    """For each Liberty line, the (cell, pin, related pin) it belongs to ("" outside)."""
    cell = pin = related = ""
    depth = {"cell": -1, "pin": -1, "timing": -1}
    level = 0
    out = []
    for line in text.splitlines():
        head = re.match(r"\s*(cell|pin|timing) \(([^)]*)\) \{", line)
        if head:
            kind, name = head.groups()
            depth[kind] = level
            if kind == "cell":
                cell, pin, related = name, "", ""
            elif kind == "pin":
                pin, related = name, ""
        found = re.match(r'\s*related_pin : "([^"]*)"', line)
        if found:
            related = found.group(1)
        out.append((cell, pin, related))
        level += line.count("{") - line.count("}")
        if "}" in line:
            if level <= depth["timing"]:
                related, depth["timing"] = "", -1
            if level <= depth["pin"]:
                pin, depth["pin"] = "", -1
            if level <= depth["cell"]:
                cell, depth["cell"] = "", -1
    return out


def test_one_arc_rerun_after_a_model_change(tmp_path: Path) -> None:
    cfg = _config(tmp_path)
    out = tmp_path / "out"
    assert _charflow("run", cfg, "--out", out, "--quiet", cwd=tmp_path).returncode == 0
    old = _outputs(out)
    (tmp_path / "old.lib").write_bytes(old[".lib"])

    model = tmp_path / "models" / "vellum90_l1.lib"
    text = model.read_text(encoding="utf-8")
    assert text.count("vto=0.35 kp=200e-6") == 1  # the tt NMOS card
    model.write_text(text.replace("vto=0.35 kp=200e-6", "vto=0.35 kp=230e-6"), encoding="utf-8")

    done = _charflow(
        "run", cfg, "--out", out, "--cell", "QNAND2_P1", "--arc", "IA:Y", "--quiet", cwd=tmp_path
    )
    assert done.returncode == 0, done.stderr
    arc_points = 2 * 3 * 3  # 2 edges x 3 slews x 3 loads
    assert f"{arc_points} simulated" in done.stdout
    # The arc's cell's leakage and function check run again on the new model (two rows).
    assert f"{REUSED - arc_points - 1} reused from the store" in done.stdout
    assert _rows(out / FILE_NAME) == ROWS + arc_points + 2
    # The four other arcs' tables (4 timing and 2 internal power each), the 8 hidden-power
    # tables (toggles come with whole cells, not with one arc) and the two other cells' leakage
    # are older than the model, and the summary says so.
    stale = re.search(r"(\d+) tables are older than the model \((.*?)\): (.*)", done.stdout)
    assert stale is not None, done.stdout
    assert stale.group(1) == str(4 * 6 + 8 + 2) and "vellum90_l1.lib" in stale.group(2)
    assert "QNAND2_P1 IA->Y" not in stale.group(3)

    new_lib = (out / "small_l1.lib").read_text(encoding="utf-8")
    # The header names the model by its new digest (sha256, recomputed here) and says which
    # tables come from results older than it; no other header line changed.
    old_head, old_body = old[".lib"].decode().split("library (", 1)
    new_head, new_body = new_lib.split("library (", 1)
    digest = hashlib.sha256(model.read_bytes()).hexdigest()
    assert f"/* model vellum90_l1.lib section tt sha256 {digest} */" in new_head
    assert f"/* stale: {stale.group(1)} table(s) hold stored results from older inputs " in new_head
    moved = set(old_head.splitlines()) ^ set(new_head.splitlines())
    assert {line.split(" sha256 ")[0].split(":")[0] for line in moved} == {
        "/* model vellum90_l1.lib section tt",
        "/* stale",
    }
    doc = json.loads((out / "small_l1.json").read_text(encoding="utf-8"))
    assert [(s["changed_models"], len(s["tables"])) for s in doc["stale_tables"]] == [
        (["vellum90_l1.lib"], int(stale.group(1)))
    ]
    # Only the lines of the re-run arc and of its input pin changed, byte for byte.
    old_lines = f"library ({old_body}".splitlines()
    where = _arc_of_each_line(f"library ({old_body}")
    matcher = difflib.SequenceMatcher(
        a=old_lines, b=f"library ({new_body}".splitlines(), autojunk=False
    )
    changed = set()
    for op, i1, i2, _, _ in matcher.get_opcodes():
        assert op in ("equal", "replace"), (op, old_lines[i1:i2])
        if op == "replace":
            changed |= set(where[i1:i2])
            # Outside the timing groups: the input pin's capacitances, the output pin's
            # max_transition (the largest transition of its tables, the re-run arc's among them),
            # and the re-run cell's leakage, which is measured anew with its cell (the level-1
            # cards' junction leakage follows the changed card).
            block = zip(old_lines[i1:i2], where[i1:i2], strict=True)
            outside = [ln for ln, w in block if w[2] == ""]
            allowed = PIN_QUANTITIES + ("max_transition", "cell_leakage_power", "value")
            assert all(ln.split()[0] in allowed for ln in outside), outside
    assert changed == {
        ("QNAND2_P1", "Y", "IA"),
        ("QNAND2_P1", "IA", ""),
        ("QNAND2_P1", "Y", ""),
        ("QNAND2_P1", "", ""),  # its leakage
    }

    # charflow diff finds the same: the arc's four tables and its pin's capacitance.
    comparison = diff.compare(diff.read(tmp_path / "old.lib"), diff.read(out / "small_l1.lib"))
    names = {c.name for c in comparison.changed}
    assert {n for n in names if "->" in n} == {f"QNAND2_P1 IA->Y {q}" for q in TIMING_QUANTITIES}
    assert {n for n in names if "->" not in n} <= {f"QNAND2_P1 pin IA {q}" for q in PIN_QUANTITIES}
    assert not comparison.appeared and not comparison.vanished and not comparison.reshaped
    # A stronger NMOS (higher KP) pulls the NAND2 output down faster (square law, Shichman &
    # Hodges, IEEE JSSC, 1968): the falling delay of the re-run arc went down.
    fall = next(c for c in comparison.changed if c.name == "QNAND2_P1 IA->Y cell_fall")
    assert fall.relative < 0

    # A full run then brings every table up to date.
    full = _charflow("run", cfg, "--out", out, "--quiet", cwd=tmp_path)
    assert full.returncode == 0, full.stderr
    assert f"{POINTS - arc_points} simulated" in full.stdout and "older" not in full.stdout


CORNERS = """
[[corner]]
name = "ff"
section = "ff"
vdd = 1.32
temperature = -40

[[corner]]
name = "ss"
section = "ss"
vdd = 1.08
temperature = 125
"""


def test_two_corners_give_two_libraries_ff_faster_than_ss(tmp_path: Path) -> None:
    cfg = _config(tmp_path, extra=CORNERS)
    out = tmp_path / "out"
    done = _charflow("run", cfg, "--out", out, "--quiet", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert sorted(p.name for p in out.glob("*.lib")) == ["small_l1_ff.lib", "small_l1_ss.lib"]
    assert _rows(out / FILE_NAME) == 2 * ROWS  # one store for both corners
    # Read back with the independent liberty-parser (Thomas Kramer, liberty-parser 0.0.29).
    libs = {c: parse_liberty((out / f"small_l1_{c}.lib").read_text()) for c in ("ff", "ss")}
    assert libs["ff"].args == ["small_l1_ff"] and libs["ss"].args == ["small_l1_ss"]
    assert libs["ff"]["nom_voltage"] == pytest.approx(1.32)
    assert libs["ss"]["nom_temperature"] == pytest.approx(125)
    # The fast corner (fast devices, high supply, low temperature) has shorter delays and
    # transitions than the slow one everywhere (common practice).
    tables = {c: diff.read(out / f"small_l1_{c}.lib") for c in ("ff", "ss")}
    timing = [n for n in tables["ff"] if "->" in n]
    assert len(timing) == 5 * 4 and set(timing) == {n for n in tables["ss"] if "->" in n}
    for name in timing:
        ff, ss = tables["ff"][name].values, tables["ss"][name].values
        assert np.all(ff < ss), name

    again = _charflow("run", cfg, "--out", out, "--quiet", cwd=tmp_path)
    assert again.stdout.count(f"0 simulated (0 simulations), {REUSED} reused") == 2


def test_flip_flop_searches_are_stored_too(tmp_path: Path) -> None:
    # Setup, hold and pulse-width searches are results like any other: a second run of a
    # flip-flop library simulates nothing, and diff reads every table it has both ways.
    cfg = ROOT / "tests" / "data" / "seq_l1.toml"
    out = tmp_path / "out"
    first = _charflow("run", cfg, "--out", out, "--quiet", cwd=tmp_path)
    assert first.returncode == 0, first.stderr
    points = int(re.search(r"(\d+) points measured", first.stdout).group(1))
    toggles = int(re.search(r"(\d+) input toggles measured", first.stdout).group(1))
    # QDFFR_P1's hidden events (ffpower): CLK's edges with D equal to each stored value and its
    # falling edge with D opposite it (2 x 2 + 2) x 2 slews, D's edges under either clock level
    # and stored value 2 x 2 x 2 x 2.
    assert toggles == 28
    before = _outputs(out, "seq_l1")
    cells = 2  # QBUFC_P1 and QDFFR_P1: a leakage point and a function check each
    assert _rows(out / FILE_NAME) == points + toggles + 2 * cells

    second = _charflow("run", cfg, "--out", out, "--quiet", cwd=tmp_path)
    assert second.returncode == 0, second.stderr
    reused = f"0 simulated (0 simulations), {points + toggles + cells} reused from the store"
    assert reused in second.stdout
    assert _outputs(out, "seq_l1") == before

    # The JSON holds the two-output cells' tables with the other output's load: so does the
    # three-axis Liberty file (the default one has them reduced to two axes).
    lib, js = diff.read(out / "seq_l1.3d.lib"), diff.read(out / "seq_l1.json")
    assert sorted(lib) == sorted(js)
    kinds = {" ".join(n.split()[2:-1]) for n in lib if "->" in n}
    assert {"clock", "clear", "setup_rising", "hold_rising"} <= kinds
    assert any(n.endswith("min_pulse_width_high") for n in lib)
    assert not diff.compare(lib, js).differs
