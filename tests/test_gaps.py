"""Failed points: their saved waveforms, and filling the gaps they leave (``--allow-gaps``).

The waveform tests make points fail for real: tests/data/small_l1.toml with a transient window
(``[simulation] window``) too short for the heaviest loads to settle, and a flip-flop clocked
faster than it can capture. The fill tests hold ``gaps.fill_gaps`` against values worked out
by hand on small grids, then run the command and read its outputs back: the result store, the
JSON, and the Liberty file through the independent parser ``liberty-parser`` (Thomas Kramer,
liberty-parser 0.0.29 on PyPI).
"""

from __future__ import annotations

import dataclasses
import json
import pickle
import re
import shutil
from pathlib import Path

import numpy as np
import pytest
from liberty.parser import parse_liberty

from charflow.cli import main as cli
from charflow.cli import run as run_command
from charflow.cli import shared as cli_shared
from charflow.config import library as config
from charflow.execution.store import FILE_NAME, Store, keyring
from charflow.flow import characterize as flow
from charflow.io import faults
from charflow.measurement import registry, sequential
from charflow.plan import arcs as planning
from charflow.records.errors import ConfigError, MeasurementError
from charflow.records.outcomes import INTERNAL, Failure, Measurement, SearchResult
from charflow.records.points import ConstraintPoint, Plan, PulsePoint, TimingPoint
from charflow.simulation.netlist import build_deck
from charflow.tables import gaps

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "tests" / "data"
WINDOW_NS = 0.05  # too short for the 0.02 pF load of small_l1 to settle; enough for the rest
# The PNG signature (W3C, Portable Network Graphics Specification, 2nd ed., 2003; from memory).
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
RTOL = 1e-6  # the Liberty file holds 7 significant digits


@pytest.fixture(scope="module", autouse=True)
def _need_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not installed; these tests need it (apt-get install ngspice)")


def _small(tmp: Path, cells: tuple[str, ...] | None = None, window: float = WINDOW_NS) -> Path:
    """tests/data/small_l1.toml with the window cut short, and only ``cells`` (all by default)."""
    text = (DATA / "small_l1.toml").read_text().replace('"../../', f'"{ROOT.as_posix()}/')
    head, *blocks = text.split("[[cell]]")
    keep = [b for b in blocks if cells is None or re.search(r'name = "(\w+)"', b)[1] in cells]
    path = tmp / "gappy.toml"
    path.write_text(
        head + f"[simulation]\nwindow = {window}\n\n" + "".join(f"[[cell]]{b}" for b in keep)
    )
    return path


# -- filling, against values worked out by hand -------------------------------------------------

SLEWS = (1e-11, 5e-11, 2e-10)  # s
LOADS = (1e-15, 2e-15, 4e-15)  # F


def _tp(slew: float, load: float) -> TimingPoint:
    return TimingPoint("X1", "A", "Y", (), "rise", "fall", slew, load)


def _m(point, delay: float, transition: float = 1e-11, charge: float = 2e-15, energy=1e-15):
    return Measurement(point, delay, transition, charge, 1, 0.0, 0.0, energy, energy)


def _grid_plan() -> Plan:
    return Plan((), tuple(_tp(s, c) for s in SLEWS for c in LOADS))


def _fill(measured: dict, failed: list, method: str) -> gaps.GapReport:
    plan = _grid_plan()
    ms = [_m(p, *v) if isinstance(v, tuple) else _m(p, v) for p, v in measured.items()]
    return gaps.fill_gaps(plan, ms, [Failure(p, "not settled") for p in failed], method)


def test_linear_interpolates_a_gap_inside_the_row_by_load():
    # Row at slew 5e-11: loads 1 and 4 fF measured, 2 fF failed. Linear in the load value:
    # delay 10 + (40 - 10) * (2 - 1) / (4 - 1) = 20 ps; transition 5 + 6/3 = 7 ps;
    # charge 2 + 0.6/3 = 2.2 fC; energy 1 + 3/3 = 2 fJ.
    s = SLEWS[1]
    measured = {
        _tp(s, LOADS[0]): (10e-12, 5e-12, 2.0e-15, 1e-15),
        _tp(s, LOADS[2]): (40e-12, 11e-12, 2.6e-15, 4e-15),
        _tp(SLEWS[0], LOADS[1]): (99e-12,),  # another row: must not be used
    }
    report = _fill(measured, [_tp(s, LOADS[1])], "linear")
    assert not report.unfilled
    (f,) = report.filled
    m = f.record
    assert m.delay == pytest.approx(20e-12, rel=1e-12, abs=0)
    assert m.transition == pytest.approx(7e-12, rel=1e-12, abs=0)
    assert m.input_charge == pytest.approx(2.2e-15, rel=1e-12, abs=0)
    assert m.supply_energy == pytest.approx(2e-15, rel=1e-12, abs=0)
    assert m.internal_energy == pytest.approx(2e-15, rel=1e-12, abs=0)
    assert m.runs == 0
    assert f.along == "load"
    assert set(f.sources) == {_tp(s, LOADS[0]), _tp(s, LOADS[2])}
    assert f.failure.reason == "not settled"


def test_a_bug_of_charflow_is_never_filled():
    # The same gap as above, but the point failed by an internal error (a bug, not the cell):
    # filling it would hide the bug behind a plausible number.
    s = SLEWS[1]
    measured = {_tp(s, LOADS[0]): 10e-12, _tp(s, LOADS[2]): 40e-12}
    bug = Failure(_tp(s, LOADS[1]), "internal error in charflow (KeyError: 'x')", error=INTERNAL)
    report = gaps.fill_gaps(_grid_plan(), [_m(p, v) for p, v in measured.items()], [bug], "linear")
    assert not report.filled
    (left,) = report.unfilled
    assert left.failure is bug and "never filled" in left.why


def test_linear_extrapolates_at_the_row_end():
    # Loads 1 and 2 fF measured (10 and 16 ps), 4 fF failed: 16 + (16 - 10) / 1 * 2 = 28 ps.
    s = SLEWS[0]
    measured = {_tp(s, LOADS[0]): 10e-12, _tp(s, LOADS[1]): 16e-12}
    (f,) = _fill(measured, [_tp(s, LOADS[2])], "linear").filled
    assert f.record.delay == pytest.approx(28e-12, rel=1e-12, abs=0)
    assert f.along == "load"


def test_linear_falls_back_to_the_slew_axis():
    # Row at slew 2e-10 holds one measured load only; the column at 4 fF has slews 1e-11 and
    # 5e-11 measured (30 and 38 ps): 38 + 8 * (2e-10 - 5e-11) / (5e-11 - 1e-11) = 68 ps.
    measured = {
        _tp(SLEWS[2], LOADS[0]): 50e-12,
        _tp(SLEWS[0], LOADS[2]): 30e-12,
        _tp(SLEWS[1], LOADS[2]): 38e-12,
    }
    failed = [_tp(SLEWS[2], LOADS[1]), _tp(SLEWS[2], LOADS[2])]
    report = _fill(measured, failed, "linear")
    filled = {f.failure.point: f for f in report.filled}
    f = filled[_tp(SLEWS[2], LOADS[2])]
    assert f.record.delay == pytest.approx(68e-12, rel=1e-12, abs=0)
    assert f.along == "slew"
    # Its row neighbour has one measured load and one measured slew in its column: no fill.
    (u,) = report.unfilled
    assert u.failure.point == _tp(SLEWS[2], LOADS[1])
    assert "two measured points" in u.why


def test_nearest_breaks_ties_by_row_then_smaller_index():
    centre = _tp(SLEWS[1], LOADS[1])
    up, down = _tp(SLEWS[0], LOADS[1]), _tp(SLEWS[2], LOADS[1])  # other rows, distance 1
    left, right = _tp(SLEWS[1], LOADS[0]), _tp(SLEWS[1], LOADS[2])  # same row, distance 1
    corner = _tp(SLEWS[0], LOADS[0])  # distance 2
    values = {up: 1e-12, down: 2e-12, left: 3e-12, right: 4e-12, corner: 5e-12}
    # All four at index distance 1: the same row wins, then the smaller load index.
    (f,) = _fill(values, [centre], "nearest").filled
    assert (f.record.delay, f.sources, f.along) == (3e-12, (left,), "grid")
    del values[left]
    (f,) = _fill(values, [centre], "nearest").filled
    assert f.sources == (right,)
    del values[right]
    # Only other rows at distance 1: the smaller slew index.
    (f,) = _fill(values, [centre], "nearest").filled
    assert f.sources == (up,)


def test_setup_hold_fill_along_the_clock_slew():
    # rise_constraint at data slew 2e-11: clock slews 1e-11 and 4e-11 measured (30, 60 ps),
    # 2e-11 failed: 30 + 30 * (2e-11 - 1e-11) / (4e-11 - 1e-11) = 40 ps.
    def cp(ds: float, cs: float) -> ConstraintPoint:
        return ConstraintPoint("DFF", "D", "CLK", "setup", "rise", "rise", ds, cs)

    points = tuple(cp(ds, cs) for ds in (2e-11, 8e-11) for cs in (1e-11, 2e-11, 4e-11))
    measured = [
        SearchResult(cp(2e-11, 1e-11), 30e-12, 9, 0.0),
        SearchResult(cp(2e-11, 4e-11), 60e-12, 9, 0.0),
    ]
    report = gaps.fill_gaps(Plan((), points), measured, [Failure(cp(2e-11, 2e-11), "x")], "linear")
    (f,) = report.filled
    assert f.record.value == pytest.approx(40e-12, rel=1e-12, abs=0)
    assert f.along == "clock slew"


def test_pulse_widths_and_lone_points_are_not_filled():
    pulse = PulsePoint("DFF", "CLK", "high", 1e-11)
    lone = _tp(SLEWS[0], LOADS[0])
    plan = Plan((), (pulse, lone))
    for method in gaps.METHODS:
        report = gaps.fill_gaps(plan, [], [Failure(pulse, "x"), Failure(lone, "y")], method)
        assert not report.filled
        assert [u.failure.point for u in report.unfilled] == [pulse, lone]
        assert "pulse" in report.unfilled[0].why


def test_flop_records_keep_their_missing_energies_and_fill_side_charges():
    def clocked(load: float, delay: float, q: float) -> Measurement:
        p = TimingPoint(
            "DFF", "CLK", "Q", (("D", True),), "rise", "rise", 1e-11, load, None, "clock"
        )
        return Measurement(p, delay, 1e-11, 1e-15, 1, 0.0, 0.0, side_charges=(("D", "rise", q),))

    a, b, c = (
        clocked(LOADS[0], 10e-12, 1e-15),
        clocked(LOADS[1], 20e-12, 3e-15),
        clocked(LOADS[2], 0, 0),
    )
    report = gaps.fill_gaps(
        Plan((), (a.point, b.point, c.point)), [a, b], [Failure(c.point, "x")], "linear"
    )
    (f,) = report.filled
    # 20 + 10 * (4 - 2) / (2 - 1) = 40 ps; the D charge 3 + 2 * 2 = 7 fC.
    assert f.record.delay == pytest.approx(40e-12, rel=1e-12, abs=0)
    assert f.record.side_charges == (("D", "rise", pytest.approx(7e-15, rel=1e-12, abs=0)),)
    assert f.record.supply_energy is None and f.record.internal_energy is None


def test_side_charges_come_from_the_sources_that_measured_them():
    # A flop's clock points above the smallest load measure no side charges (only the
    # smallest load's give pin capacitance): a filled point mixes those of its sources that
    # have them, their weights renormalised; with none, it has none.
    def clocked(load: float, q: float | None) -> Measurement:
        p = TimingPoint(
            "DFF", "CLK", "Q", (("D", True),), "rise", "rise", 1e-11, load, None, "clock"
        )
        side = () if q is None else (("D", "rise", q),)
        return Measurement(p, 10e-12, 1e-11, 1e-15, 1, 0.0, 0.0, side_charges=side)

    a, b, c = clocked(LOADS[0], 2e-15), clocked(LOADS[1], 0.0), clocked(LOADS[2], None)
    points = Plan((), (a.point, b.point, c.point))
    (f,) = gaps.fill_gaps(points, [a, c], [Failure(b.point, "x")], "linear").filled
    assert f.record.side_charges == (("D", "rise", pytest.approx(2e-15, rel=1e-12, abs=0)),)
    d = clocked(LOADS[0], None)
    (g,) = gaps.fill_gaps(points, [d, c], [Failure(b.point, "x")], "linear").filled
    assert g.record.side_charges == ()


def test_an_unknown_method_is_refused_before_any_sweep():
    with pytest.raises(ConfigError, match="linear, nearest"):
        gaps.fill_gaps(_grid_plan(), [], [], "spline")
    cfg = config.load(DATA / "small_l1.toml")
    with pytest.raises(ConfigError, match="spline"):
        flow.characterize(cfg, cells=["QINV_P1"], jobs=1, allow_gaps="spline")


# -- real failing points and their waveforms -----------------------------------------------------


@pytest.fixture(scope="module")
def inverter(tmp_path_factory):
    """QINV_P1 with a window its 0.02 pF load cannot settle in: 6 failed points."""
    tmp = tmp_path_factory.mktemp("inv")
    cfg = config.load(_small(tmp, ("QINV_P1",)))
    result = flow.characterize(cfg, jobs=1)
    out = tmp / "out"
    written = flow.write(cfg, result, out)
    return cfg, result, out, written


def test_failed_points_are_the_heaviest_load_and_carry_their_run(inverter):
    _, result, _, _ = inverter
    assert len(result.failures) == 6  # 3 slews x 2 edges at 0.02 pF
    for f in result.failures:
        assert f.point.load == pytest.approx(0.02e-12, rel=1e-12, abs=0)
        assert "had not settled" in f.reason and f.cut_off
        # The key that cut it off, its value and a longer one, in the library's units.
        assert "[simulation] window = 0.05 ns" in f.reason and "window = 0.5, in ns" in f.reason
        assert [name for name, _ in f.waveform.nodes] == ["Y", "A"]
        assert np.all(np.diff(f.waveform.time) > 0)


def test_saved_csv_parses_back_and_names_the_point(inverter):
    cfg, result, out, written = inverter
    doc = json.loads((out / f"{cfg.name}.json").read_text())
    assert not (out / f"{cfg.name}.lib").exists()
    assert len(doc["failures"]) == 6
    for f, entry in zip(result.failures, doc["failures"], strict=True):
        csv, png = out / entry["waveform_csv"], out / entry["waveform_png"]
        assert csv in written and png in written
        assert csv.parent == out / faults.FOLDER / "QINV_P1"
        lines = csv.read_text().splitlines()
        comments = [line for line in lines if line.startswith("#")]
        header = " ".join(comments)
        for text in ("QINV_P1", "A->Y", f.point.label, f.reason, "input edge: ", "load: 2e-14 F"):
            assert text in header
        columns = lines[len(comments)].split(",")
        assert columns == ["time_s", "Y_V", "A_V"]
        data = np.loadtxt(csv, delimiter=",", skiprows=len(comments) + 1)
        assert data.shape[1] == 3
        # Written with 9 significant digits.
        np.testing.assert_allclose(data[:, 0], f.waveform.time, rtol=5e-9, atol=0)
        np.testing.assert_allclose(data[:, 1], dict(f.waveform.nodes)["Y"], rtol=5e-9, atol=1e-12)
        # The reason quotes the output's last voltage to 4 digits: the CSV's last sample agrees.
        quoted = float(re.search(r"ends at (-?[0-9.e+-]+) V", f.reason)[1])
        assert float(f"{data[-1, 1]:.4g}") == quoted
        assert png.read_bytes().startswith(PNG_MAGIC)


def test_a_flop_that_cannot_capture_saves_clock_data_and_output():
    # Clocked with a half period of barely two edges the flop never stores: Q does not switch,
    # the setup search fails on the held state its trials start from, the pulse-width search
    # on its relaxed trial.
    cfg = config.load(DATA / "seq_l1.toml")
    cfg = dataclasses.replace(cfg, simulation=dataclasses.replace(cfg.simulation, window=2e-11))
    deck = build_deck(cfg, cfg.cell("QDFFR_P1"))
    points = planning.plan(cfg, ["QDFFR_P1"]).points
    clocked = next(p for p in points if isinstance(p, TimingPoint) and p.kind == "clock")
    setup = next(p for p in points if isinstance(p, ConstraintPoint) and p.kind == "setup")
    pulse = next(p for p in points if isinstance(p, PulsePoint))
    with pytest.raises(MeasurementError) as caught:
        sequential.measure_clocked(cfg, deck, clocked)
    names = [name for name, _ in caught.value.waveform.nodes]
    assert names[0] == clocked.output and {"CLK", "D", "RSTB"} <= set(names)
    # Through the worker's chunk, as a sweep runs it: the Failure holds the run, and survives
    # the trip back from a worker process (pickled).
    outcomes = pickle.loads(pickle.dumps(registry.measure_chunk(cfg, deck, [setup, pulse])))
    for point, f in zip((setup, pulse), outcomes, strict=True):
        assert isinstance(f, Failure) and f.point == point
        why = "could not be established" if point == setup else "fails even with relaxed timing"
        assert why in f.reason
        assert {"Q", "CLK", "D", "RSTB"} <= {name for name, _ in f.waveform.nodes}
        assert len(f.waveform.time) == len(f.waveform.nodes[0][1]) > 10


# -- the command: exit codes, the store, the Liberty comments -------------------------------------


def _run(capsys, *args) -> tuple[int, str, str]:
    code = cli.main(["run", *map(str, args), "--jobs", "1", "--quiet"])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def test_command_fails_without_allow_gaps_and_when_gaps_remain(tmp_path, capsys):
    cfg_path, out = _small(tmp_path, ("QINV_P1", "QNAND2_P1")), tmp_path / "out"
    code, _, err = _run(capsys, cfg_path, "--out", out)
    assert code == cli_shared.EXIT_FAILED_POINTS
    assert "22 point(s) failed" in err
    assert err.count("    waveform: ") == run_command.LISTED
    assert "... and 2 more" in err
    # Every point was cut off by the window: the message names it, and filling is not offered.
    assert err.count("[simulation] window = 0.05 ns") == run_command.LISTED
    assert "--allow-gaps" not in err
    # NAND2's sharpest slew at 0.02 pF has one measured load in its row (0.001 pF) and none in
    # its column: linear cannot fill it, for either input and edge.
    code, out_text, err = _run(capsys, cfg_path, "--out", out, "--allow-gaps", "linear")
    assert code == cli_shared.EXIT_FAILED_POINTS
    assert "18 failed point(s) filled by linear" in out_text
    assert "4 point(s) failed" in err and "not filled: cannot be filled by linear" in err
    assert not (out / "small_l1.lib").exists()


@pytest.fixture(scope="module")
def filled_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("filled")
    cfg_path, out = _small(tmp, ("QINV_P1",)), tmp / "out"
    code = cli.main(
        [
            "run",
            str(cfg_path),
            "--out",
            str(out),
            "--jobs",
            "1",
            "--quiet",
            "--allow-gaps",
            "linear",
        ]
    )
    return code, config.load(cfg_path), out


def test_command_succeeds_when_every_gap_is_filled(filled_run):
    code, cfg, out = filled_run
    assert code == cli_shared.EXIT_OK
    doc = json.loads((out / f"{cfg.name}.json").read_text())
    assert doc["failures"] == [] and len(doc["filled"]) == 6
    entry = doc["filled"][0]
    assert entry["method"] == "linear" and entry["along"] == "load" and len(entry["from"]) == 2
    assert "had not settled" in entry["reason"]
    assert (out / entry["waveform_csv"]).is_file()


def test_filled_points_never_enter_the_store(filled_run):
    _, cfg, out = filled_run
    doc = json.loads((out / f"{cfg.name}.json").read_text())
    plan = planning.plan(cfg)
    filled = {e["point"] for e in doc["filled"]}
    failed = [p for p in plan.points if p.label in filled]
    assert len(failed) == 6
    ring = keyring(cfg, {"QINV_P1": build_deck(cfg, cfg.cell("QINV_P1"))})
    with Store(out / FILE_NAME) as store:
        found, _ = store.latest(ring, plan.points)
    assert set(found) == set(plan.points) - set(failed)


def test_liberty_parses_and_marks_the_filled_tables(filled_run):
    _, cfg, out = filled_run
    text = (out / f"{cfg.name}.lib").read_text()
    assert "/* gaps: the values of 6 failed point(s) were filled by linear" in text
    notes = re.findall(r"/\* (3 value\(s\) filled by linear, not simulated, at [^*]*) \*/", text)
    assert len(notes) == 6  # cell_rise, rise_transition, cell_fall, fall_transition, 2 powers
    lib = parse_liberty(text)
    doc = json.loads((out / f"{cfg.name}.json").read_text())
    measured = {(p["input_edge"], p["slew_s"], p["load_F"]): p for p in doc["points"]["QINV_P1"]}
    slews, loads = cfg.cell("QINV_P1").grid.slew, cfg.cell("QINV_P1").grid.load
    (timing,) = lib.get_groups("cell")[0].get_groups("pin", "Y")[0].get_groups("timing")
    for in_edge, quantity in (("fall", "cell_rise"), ("rise", "cell_fall")):
        table = timing.get_groups(quantity)[0].get_array("values")
        for i, slew in enumerate(slews):
            d1, d2 = (measured[(in_edge, slew, c)]["delay_s"] for c in loads[:2])
            # The last load is extrapolated linearly from the two before it, in the load value.
            expected = d2 + (d2 - d1) * (loads[2] - loads[1]) / (loads[1] - loads[0])
            assert table[i, 2] * 1e-9 == pytest.approx(expected, rel=RTOL, abs=0)


def test_demo_takes_allow_gaps_too():
    args = cli._parser().parse_args(["demo", "--allow-gaps", "nearest"])
    assert args.allow_gaps == "nearest"
    with pytest.raises(SystemExit):
        cli._parser().parse_args(["demo", "--allow-gaps", "spline"])
