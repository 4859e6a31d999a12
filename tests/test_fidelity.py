"""The fidelity check: its probe points, its statistics, and its simulated values.

Pure numerics first, against closed forms: the error of linear interpolation of a quadratic is
known exactly, and of any smooth function it obeys h²/8 · max|f''| per axis (Burden & Faires,
*Numerical Analysis*, 9th ed., 2010, sec. 3.1). Then ngspice runs: the report of the small
level-1 library, and on the demo arc QINV_P1 A->Y the report's simulated values against an
independent re-simulation of the same points.
"""

from __future__ import annotations

import base64
import dataclasses
import itertools
import json
import re
import shutil
from pathlib import Path

import numpy as np
import pytest
from scipy.interpolate import RegularGridInterpolator

from charflow.analysis import fidelity
from charflow.analysis.fidelity import CENTRE, RANDOM, Probe, compare, probes, statistics
from charflow.analysis.report import write_fidelity
from charflow.config import library as config
from charflow.config.library import Fidelity
from charflow.config.resources import DEMO_CONFIG
from charflow.flow import characterize as flow
from charflow.measurement import combinational as timing
from charflow.measurement import registry
from charflow.records.points import TimingPoint
from charflow.simulation import netlist
from charflow.tables.table import Axis, Table
from charflow.tables.tabulate import LOAD_AXIS, SLEW_AXIS

ROOT = Path(__file__).resolve().parents[1]
SMALL_L1 = ROOT / "tests" / "data" / "small_l1.toml"
DEMO = DEMO_CONFIG
NS, PF = 1e-9, 1e-12
RTOL = 1e-12  # closed forms against a few floating-point operations
SIM_RTOL = 1e-9  # the same simulator on the same point: deterministic up to printing
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # the PNG signature (W3C, PNG specification, 2003, sec. 5.2)

SLEW = Axis(SLEW_AXIS, (0.005 * NS, 0.012 * NS, 0.025 * NS, 0.05 * NS, 0.1 * NS, 0.4 * NS))
LOAD = Axis(LOAD_AXIS, (0.0 * PF, 0.001 * PF, 0.004 * PF, 0.02 * PF))


def _cell_of(grid: tuple[float, ...], x: float) -> int:
    return int(np.searchsorted(grid, x, side="right")) - 1


# --- probe points -----------------------------------------------------------------------------


def test_probes_are_every_cell_centre_then_the_random_points() -> None:
    found = probes((SLEW, LOAD), random_points=12, seed=7)
    centres = [p for p in found if p.kind == CENTRE]
    randoms = [p for p in found if p.kind == RANDOM]
    assert len(centres) == (len(SLEW) - 1) * (len(LOAD) - 1)
    assert len(randoms) == 12
    expected = {
        ((a + b) / 2, (c + d) / 2)
        for (a, b), (c, d) in itertools.product(
            itertools.pairwise(SLEW.values), itertools.pairwise(LOAD.values)
        )
    }
    assert {p.coords for p in centres} == expected


@pytest.mark.parametrize("seed", [0, 1, 12345])
def test_probes_are_off_the_grid_and_inside_the_range(seed: int) -> None:
    for p in probes((SLEW, LOAD), random_points=40, seed=seed):
        for axis, x in zip((SLEW, LOAD), p.coords, strict=True):
            assert axis.values[0] < x < axis.values[-1], (p, axis.name)
            assert x not in axis.values, (p, axis.name)


def test_random_probes_are_a_latin_hypercube_over_the_cells() -> None:
    # A Latin hypercube of n points puts exactly one point in each of n equal strata of every
    # axis (McKay, Beckman & Conover, Technometrics 21(2), 1979). Strata are counted in grid
    # cells, so that a geometric grid gets as many points in its small cells as in its large.
    n = 15
    randoms = [p for p in probes((SLEW, LOAD), n, seed=3) if p.kind == RANDOM]
    for k, axis in enumerate((SLEW, LOAD)):
        grid = np.asarray(axis.values)
        position = [np.interp(p.coords[k], grid, np.arange(grid.size)) for p in randoms]
        strata = sorted(int(u / (grid.size - 1) * n) for u in position)
        assert strata == list(range(n))


def test_random_probes_follow_the_seed() -> None:
    a = probes((SLEW, LOAD), 8, seed=5)
    assert a == probes((SLEW, LOAD), 8, seed=5)
    assert a != probes((SLEW, LOAD), 8, seed=6)


# --- comparison and statistics on tables whose error is known -------------------------------


def _quadratic(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    return 2.0 + x**2 + 3.0 * y**2


def _quadratic_error(grid_x, grid_y, x: float, y: float) -> float:
    """Bilinear interpolation of 2 + x² + 3y² minus the function, exactly.

    Linear interpolation of x² between x0 and x1 exceeds it by (x − x0)(x1 − x): the difference
    is a quadratic that vanishes at both nodes with leading coefficient −1 (Burden & Faires,
    sec. 3.1, the error term with f'' = 2). The tensor-product interpolant of a sum of one-axis
    functions is the sum of their one-axis interpolants.
    """
    i, j = _cell_of(grid_x, x), _cell_of(grid_y, y)
    x0, x1, y0, y1 = grid_x[i], grid_x[i + 1], grid_y[j], grid_y[j + 1]
    return (x - x0) * (x1 - x) + 3.0 * (y - y0) * (y1 - y)


def _table(f, gx: tuple[float, ...], gy: tuple[float, ...]) -> Table:
    values = f(*np.meshgrid(np.array(gx), np.array(gy), indexing="ij"))
    return Table((Axis(SLEW_AXIS, gx), Axis(LOAD_AXIS, gy)), values, "cell_rise", "s")


GX = (0.0, 0.5, 1.5, 2.0, 4.0)
GY = (0.0, 1.0, 1.25, 3.0)


def test_compared_errors_equal_the_closed_form() -> None:
    table = _table(_quadratic, GX, GY)
    at = probes(table.axes, 30, seed=11)
    sim = [float(_quadratic(np.array(p.coords[0]), np.array(p.coords[1]))) for p in at]
    for c in compare(table, at, sim, floor=1e-3):
        want = _quadratic_error(GX, GY, *c.coords)
        assert c.error == pytest.approx(want, rel=RTOL, abs=1e-12)
        assert c.rel_error == pytest.approx(abs(want) / c.simulated, rel=RTOL, abs=0)


def test_statistics_on_the_known_error() -> None:
    table = _table(_quadratic, GX, GY)
    at = probes(table.axes, 21, seed=2)
    sim = [float(_quadratic(np.array(p.coords[0]), np.array(p.coords[1]))) for p in at]
    compared = compare(table, at, sim, floor=1e-3)
    stats = statistics(compared)
    # The known errors, reduced by hand rather than by the statistics code.
    errors = [_quadratic_error(GX, GY, *p.coords) for p in at]
    rel = [abs(e) / s for e, s in zip(errors, sim, strict=True)]
    n = len(rel)
    ordered = sorted(rel)
    # The 95th percentile by linear interpolation between order statistics at rank 0.95 (n − 1)
    # (Hyndman & Fan, The American Statistician 50(4), 1996, definition 7).
    rank = 0.95 * (n - 1)
    lo = int(rank)
    p95 = ordered[lo] + (rank - lo) * (ordered[min(lo + 1, n - 1)] - ordered[lo])
    assert stats.count == n
    assert stats.max_rel == pytest.approx(max(rel), rel=RTOL, abs=0)
    assert stats.rms_rel == pytest.approx((sum(r * r for r in rel) / n) ** 0.5, rel=RTOL, abs=0)
    assert stats.p95_rel == pytest.approx(p95, rel=RTOL, abs=0)
    assert stats.max_abs == pytest.approx(max(abs(e) for e in errors), rel=RTOL, abs=0)
    assert stats.worst == rel.index(max(rel))


def test_cell_centre_error_of_a_quadratic_is_h_squared_over_8_times_f2() -> None:
    # f = x²: f'' = 2, so the bound h²/8 · 2 is reached exactly at every cell centre.
    table = _table(lambda x, y: x**2 + 0 * y, GX, GY)
    centres = [p for p in probes(table.axes, 0, seed=0)]
    sim = [p.coords[0] ** 2 for p in centres]
    for c in compare(table, centres, sim, floor=1.0):
        i = _cell_of(GX, c.coords[0])
        h = GX[i + 1] - GX[i]
        assert c.error == pytest.approx(h * h / 8 * 2, rel=RTOL, abs=0)


def _smooth(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    return np.exp(x) + np.sin(2.0 * y)


def test_interpolation_error_obeys_the_bound_per_axis() -> None:
    # f = e^x + sin 2y: |f_xx| = e^x ≤ e^x1 on a cell, |f_yy| = 4 |sin 2y| ≤ 4. The bilinear
    # error is at most hx²/8 · max|f_xx| + hy²/8 · max|f_yy| (the one-axis bound per axis).
    gx = (0.0, 0.3, 0.5, 1.2, 2.0)
    gy = (0.0, 0.4, 1.0, 1.3, 2.5)
    table = _table(_smooth, gx, gy)
    at = probes(table.axes, 400, seed=9)
    sim = [float(_smooth(np.array(p.coords[0]), np.array(p.coords[1]))) for p in at]
    worst_share = 0.0
    for c in compare(table, at, sim, floor=1.0):
        i, j = _cell_of(gx, c.coords[0]), _cell_of(gy, c.coords[1])
        hx, hy = gx[i + 1] - gx[i], gy[j + 1] - gy[j]
        bound = hx**2 / 8 * np.exp(gx[i + 1]) + hy**2 / 8 * 4.0
        assert abs(c.error) <= bound * (1 + 1e-12), c
        worst_share = max(worst_share, abs(c.error) / bound)
    # The bound is not slack by orders of magnitude: centres come close to it.
    assert worst_share > 0.5


def test_the_floor_caps_relative_errors_near_zero() -> None:
    table = _table(lambda x, y: 0 * x + 0 * y, (0.0, 1.0), (0.0, 1.0))
    at = [Probe((0.5, 0.5), CENTRE)]
    (c,) = compare(table, at, [2e-13], floor=1e-12)
    assert c.rel_error == pytest.approx(2e-13 / 1e-12, rel=RTOL, abs=0)


def test_interpolated_values_equal_scipy() -> None:
    # scipy.interpolate.RegularGridInterpolator(method="linear") as the independent reference.
    table = _table(_smooth, GX, GY)
    at = probes(table.axes, 25, seed=4)
    reference = RegularGridInterpolator((np.array(GX), np.array(GY)), table.values)
    for c in compare(table, at, [0.0] * len(at), floor=1.0):
        assert c.interpolated == pytest.approx(float(reference([c.coords])[0]), rel=RTOL, abs=0)


# --- with the simulator ------------------------------------------------------------------------


@pytest.fixture(scope="module")
def ngspice() -> None:
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; these tests need it")


@pytest.fixture(scope="module")
def small(ngspice, tmp_path_factory):
    cfg = dataclasses.replace(
        config.load(SMALL_L1), fidelity=Fidelity(random_points=4, seed=3, rel_floor=1e-12)
    )
    result = flow.characterize(cfg, jobs=2)
    report = fidelity.check(cfg, result.cells, jobs=2)
    out = tmp_path_factory.mktemp("fidelity")
    paths = write_fidelity(cfg, report, out, jobs=1)
    return cfg, result, report, paths


def test_every_table_of_every_state_is_checked(small) -> None:
    cfg, result, report, _ = small
    expected = [
        (c.cell.name, a.arc.related, st.state.when, t.quantity)
        for c in result.cells
        for a in c.arcs
        for st in a.states
        for t in st.tables
    ]
    assert [(c.cell, c.related, c.when, c.table.quantity) for c in report.checks] == expected
    assert not report.failures
    for c in report.checks:
        assert c.stats is not None and c.stats.count == 4 + 4  # 2 x 2 cells, 4 random points
        for p in c.points:
            for axis, x in zip(c.table.axes, p.coords, strict=True):
                assert axis.values[0] < x < axis.values[-1]
                assert x not in axis.values


def test_json_holds_statistics_and_every_point(small) -> None:
    cfg, _, report, paths = small
    data = json.loads(paths[0].read_text(encoding="utf-8"))
    assert paths[0].name == "small_l1.fidelity.json"
    assert data["settings"]["rel_floor_s"] == cfg.fidelity.rel_floor
    tables = [
        (cell["name"], arc["related_pin"], state["when"], table)
        for cell in data["cells"]
        for arc in cell["arcs"]
        for state in arc["states"]
        for table in state["tables"]
    ]
    assert len(tables) == len(report.checks)
    for (name, related, when, table), check in zip(tables, report.checks, strict=True):
        assert (name, related, when) == (check.cell, check.related, check.when)
        assert table["statistics"]["max_rel_error"] == check.stats.max_rel
        assert len(table["compared"]) == len(check.points)
        for record, point in zip(table["compared"], check.points, strict=True):
            assert record["index"] == list(point.coords)
            assert record["simulated"] == point.simulated
            assert record["interpolated"] == point.interpolated


def test_html_is_self_contained_with_a_map_per_table(small) -> None:
    _, _, report, paths = small
    page = paths[1].read_text(encoding="utf-8")
    assert paths[1].name == "small_l1.fidelity.html"
    assert "http://" not in page and "https://" not in page and "<link" not in page
    images = re.findall(r'<img alt="[^"]*" src="data:image/png;base64,([^"]+)">', page)
    assert len(images) == len(report.checks)
    for data in images:
        assert base64.b64decode(data).startswith(PNG_MAGIC)
    assert page.count('<tr><td><a href="#t') == len(report.checks)
    assert "0.001 ns" in page  # the floor is stated


def test_summary_names_the_worst_table_first(small) -> None:
    cfg, _, report, _ = small
    lines = fidelity.summary_lines(cfg, report, count=3)
    worst = max(report.checks, key=lambda c: c.stats.max_rel)
    assert "relative error floor 0.001 ns" in lines[0]
    assert worst.label in lines[3]


def test_demo_arc_values_equal_an_independent_re_simulation(ngspice) -> None:
    """QINV_P1 A->Y at the demo's 7 x 7 grid: the report's simulated values, read back from the
    JSON, against measure_point called directly in this process (no sweep, no workers), and its
    interpolated values against scipy on the tables of the characterization's own JSON."""
    cfg = dataclasses.replace(
        config.load(DEMO), fidelity=Fidelity(random_points=3, seed=8, rel_floor=1e-12)
    )
    result = flow.characterize(cfg, cells=["QINV_P1"], jobs=2)
    report = fidelity.check(cfg, result.cells, jobs=2)
    data = json.loads(json.dumps(fidelity.to_json(cfg, report)))
    tables = flow.to_json(cfg, result)["cells"][0]["arcs"][0]["tables"]
    deck = netlist.build_deck(cfg, cfg.cell("QINV_P1"))
    (arc,) = data["cells"][0]["arcs"]
    (state,) = arc["states"]
    checked = 0
    for table in state["tables"]:
        quantity = table["quantity"]
        out_edge = fidelity.output_edge(quantity)
        in_edge = "fall" if out_edge == "rise" else "rise"  # the inverter is negative unate
        grid = next(t for t in tables if t["quantity"] == quantity)
        reference = RegularGridInterpolator(
            [np.array(a["values"]) for a in grid["axes"]], np.array(grid["values"])
        )
        assert len(table["compared"]) == 36 + 3
        for record in table["compared"][::6]:
            slew, load = record["index"]
            point = TimingPoint("QINV_P1", "A", "Y", (), in_edge, out_edge, slew, load)
            m = timing.measure_point(cfg, deck, point)
            direct = m.delay if quantity.startswith("cell_") else m.transition
            assert record["simulated"] == pytest.approx(direct, rel=SIM_RTOL, abs=0)
            assert record["interpolated"] == pytest.approx(
                float(reference([record["index"]])[0]), rel=RTOL, abs=0
            )
            checked += 1
    assert checked == 4 * 7


def test_three_axis_and_flip_flop_tables_are_checked_too(ngspice, tmp_path) -> None:
    """seq_l1: a two-output buffer (3D tables) and a flop with clock and clear arcs (3D too).
    Probes lie off the grid on all three axes; a clock-arc probe re-simulated here, without
    the sweep, gives the report's value; every table gets its map."""
    cfg = dataclasses.replace(
        config.load(ROOT / "tests" / "data" / "seq_l1.toml"),
        fidelity=Fidelity(random_points=2, seed=5, rel_floor=1e-12),
    )
    result = flow.characterize(cfg, jobs=2)
    report = fidelity.check(cfg, result.cells, jobs=2)
    assert not report.failures
    assert {c.related for c in report.checks} == {"A", "CLK", "RSTB"}
    for c in report.checks:
        assert c.table.ndim == 3 and c.stats is not None
        for p in c.points:
            for axis, x in zip(c.table.axes, p.coords, strict=True):
                assert axis.values[0] < x < axis.values[-1]
    check = next(c for c in report.checks if c.related == "CLK")
    probe = check.points[0]
    series = fidelity.row_points(cfg, check.cell)
    arc = next(a.arc for a in result.cells[1].arcs if (a.arc.related, a.arc.output) == ("CLK", "Q"))
    row = fidelity.row_point_of(series, arc, arc.states[0], check.table.quantity)
    point = fidelity.timing_point(row, check.table.axes, probe.coords)
    assert point.kind == "clock" and point.other_load == probe.coords[2]
    deck = netlist.build_deck(cfg, cfg.cell(check.cell))
    (again,) = registry.measure_chunk(cfg, deck, (point,))
    assert fidelity.measured(again, check.table.quantity) == pytest.approx(
        probe.simulated, rel=SIM_RTOL, abs=0
    )
    # Maps drawn in parallel after the sweep's worker pool: the two share joblib's pool.
    paths = write_fidelity(cfg, report, tmp_path, jobs=2)
    page = paths[1].read_text(encoding="utf-8")
    images = re.findall(r'<img alt="[^"]*" src="data:image/png;base64,([^"]+)">', page)
    assert len(images) == len(report.checks)
