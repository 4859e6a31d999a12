"""charflow diff on a constructed case: a library and a copy with known tables changed,
removed and added; Liberty read back with the independent liberty-parser."""

from __future__ import annotations

import copy
import json
import os
import shutil
import subprocess
from pathlib import Path

import pytest

from charflow.analysis import diff
from charflow.config import library as config
from charflow.flow import characterize as flow
from charflow.records.names import PIN_QUANTITIES, TIMING_QUANTITIES

ROOT = Path(__file__).resolve().parents[1]
SMALL = ROOT / "tests" / "data" / "small_l1.toml"
TABLES = 5 * 4 + 5 * 3  # 5 arcs x 4 timing tables, 5 input pins x 3 capacitances


@pytest.fixture(scope="module")
def library(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """small_l1's Liberty and JSON files, characterized once."""
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not installed; these tests need it (apt-get install ngspice)")
    out = tmp_path_factory.mktemp("diff")
    cfg = config.load(SMALL)
    result = flow.characterize(cfg, jobs=1)
    assert not result.failures
    flow.write(cfg, result, out)
    return out


def _arc(doc: dict, cell: str, related: str) -> dict:
    (c,) = [c for c in doc["cells"] if c["name"] == cell]
    (a,) = [a for a in c["arcs"] if a["related_pin"] == related]
    return a


def _table(arc: dict, quantity: str) -> dict:
    (t,) = [t for t in arc["tables"] if t["quantity"] == quantity]
    return t


@pytest.fixture(scope="module")
def constructed(library: Path) -> Path:
    """A copy of the JSON with two tables changed, one arc removed and one cell added."""
    doc = json.loads((library / "small_l1.json").read_text())
    new = copy.deepcopy(doc)
    _table(_arc(new, "QINV_P1", "A"), "cell_rise")["values"][1][2] *= 1.05
    for row in _table(_arc(new, "QNAND2_P1", "IA"), "fall_transition")["values"]:
        row[:] = [v * 0.9 for v in row]
    (nor2,) = [c for c in new["cells"] if c["name"] == "QNOR2_P1"]
    nor2["arcs"] = [a for a in nor2["arcs"] if a["related_pin"] != "IB"]
    inv2 = copy.deepcopy(next(c for c in new["cells"] if c["name"] == "QINV_P1"))
    inv2["name"] = "QINV_P2"
    new["cells"].append(inv2)
    path = library / "constructed.json"
    path.write_text(json.dumps(new), encoding="utf-8")
    return path


def test_both_formats_hold_the_same_tables(library: Path) -> None:
    # Liberty read with liberty-parser (Thomas Kramer, liberty-parser 0.0.29) against the JSON.
    lib = diff.read(library / "small_l1.lib")
    js = diff.read(library / "small_l1.json")
    assert sorted(lib) == sorted(js) and len(lib) == TABLES
    same = diff.compare(lib, js)  # the default tolerance covers Liberty's 7 digits
    assert not same.differs and len(same.unchanged) == TABLES
    exact = diff.compare(js, js, tolerance=0.0)
    assert not exact.differs


@pytest.mark.parametrize("old_name", ["small_l1.lib", "small_l1.json"])
def test_diff_finds_exactly_the_constructed_changes(
    library: Path, constructed: Path, old_name: str
) -> None:
    c = diff.compare(diff.read(library / old_name), diff.read(constructed))
    assert [ch.name for ch in c.changed] == [
        "QNAND2_P1 IA->Y fall_transition",
        "QINV_P1 A->Y cell_rise",
    ]
    assert c.changed[0].relative == pytest.approx(-0.10, rel=1e-5, abs=0)
    assert c.changed[1].relative == pytest.approx(0.05, rel=1e-5, abs=0)
    assert [v for _, v in c.changed[1].coords] == pytest.approx([5e-11, 2e-14])
    assert c.vanished == tuple(sorted(f"QNOR2_P1 IB->Y {q}" for q in TIMING_QUANTITIES))
    assert set(c.appeared) == {f"QINV_P2 A->Y {q}" for q in TIMING_QUANTITIES} | {
        f"QINV_P2 pin A {q}" for q in PIN_QUANTITIES
    }
    assert not c.reshaped
    assert len(c.unchanged) == TABLES - 4 - 2


def _charflow(*args: str | Path) -> subprocess.CompletedProcess[str]:
    exe = shutil.which("charflow")
    if exe is None:
        pytest.fail("the charflow command is not on PATH; install the package (pip install -e .)")
    return subprocess.run(
        [exe, *map(str, args)], capture_output=True, text=True, timeout=120, check=False
    )


def test_the_command_reports_and_exits_for_scripts(library: Path, constructed: Path) -> None:
    same = _charflow("diff", library / "small_l1.lib", library / "small_l1.json")
    assert same.returncode == 0, same.stderr
    assert "0 tables changed, 0 appeared, 0 vanished" in same.stdout

    html = library / "report" / "diff.html"
    done = _charflow("diff", library / "small_l1.lib", constructed, "--top", "1", "--html", html)
    assert done.returncode == 1, done.stderr
    assert "2 tables changed, 7 appeared, 4 vanished" in done.stdout
    assert "largest relative changes (1 of 2):" in done.stdout
    assert "-10 %  QNAND2_P1 IA->Y fall_transition" in done.stdout
    assert "QINV_P1 A->Y cell_rise" not in done.stdout  # --top 1
    assert "QNOR2_P1 IB->Y cell_rise" in done.stdout
    page = html.read_text(encoding="utf-8")
    assert page.count("<img ") == 2 and "data:image/png;base64," in page
    assert "QNAND2_P1 IA-&gt;Y fall_transition" in page

    missing = _charflow("diff", library / "absent.lib", constructed)
    assert missing.returncode == 2
    assert missing.stderr.startswith("charflow: file ") and "not found" in missing.stderr
    garbage = library / "garbage.lib"
    garbage.write_text("library (x) { oops", encoding="utf-8")
    bad = _charflow("diff", garbage, constructed)
    assert bad.returncode == 2 and "not a Liberty file" in bad.stderr


def test_a_reader_that_went_away_gets_no_traceback(library: Path, constructed: Path) -> None:
    """``charflow diff ... | head``: the output's reader is gone before charflow writes. The
    exit status a shell reports for a command stopped by SIGPIPE, 128 + 13 (common practice),
    and no traceback on stderr."""
    exe = shutil.which("charflow")
    if exe is None:
        pytest.fail("the charflow command is not on PATH; install the package (pip install -e .)")
    read, write = os.pipe()
    os.close(read)  # closed before the command starts: its first write fails, no race
    try:
        done = subprocess.run(
            [exe, "diff", str(library / "small_l1.json"), str(constructed)],
            stdout=write,
            stderr=subprocess.PIPE,
            text=True,
        )
    finally:
        os.close(write)
    assert done.returncode == 141
    assert "Traceback" not in done.stderr and "Exception" not in done.stderr, done.stderr
