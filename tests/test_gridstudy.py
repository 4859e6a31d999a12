"""The grid-density study: placements, the optimizer, the recommendation, and a small study.

The optimizer is held against analytic surfaces whose curvature is known: the error of linear
interpolation is at most h²/8 · max|f''| per axis (Burden & Faires, *Numerical Analysis*, 9th
ed., 2010, sec. 3.1), so with constant curvature equal spacing is the best there is, and where the
curvature of each axis gathers at a different end the optimized placement must beat both uniform
and geometric spacing. The small study runs ngspice on the level-1 test library.
"""

from __future__ import annotations

import dataclasses
import itertools
import json
import math
import shutil
import tomllib
from pathlib import Path

import numpy as np
import pytest

from charflow.analysis import gridstudy
from charflow.analysis import report as html_report
from charflow.analysis.gridstudy import Candidate, Study
from charflow.config import library as config
from charflow.config.library import Fidelity
from charflow.execution import sweep
from charflow.plan.arcs import arcs_of
from charflow.records.errors import ConfigError
from charflow.records.points import EDGES, TimingPoint
from charflow.tables.table import Axis, Table, interpolate
from charflow.tables.tabulate import LOAD_AXIS, SLEW_AXIS

ROOT = Path(__file__).resolve().parents[1]
SMALL_L1 = ROOT / "tests" / "data" / "small_l1.toml"
NS, PF = 1e-9, 1e-12
RTOL = 1e-12
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # the PNG signature (W3C, PNG specification, 2003, sec. 5.2)
LO, HI = 0.01, 1.0


def _axes(*grids) -> tuple[Axis, ...]:
    return tuple(Axis(name, tuple(g)) for name, g in zip(("a", "b"), grids, strict=True))


def _max_rel_error(f, nodes, at: np.ndarray, floor: float) -> float:
    values = f(*np.meshgrid(*nodes, indexing="ij"))
    got = interpolate(Table(_axes(*nodes), values, "q", "s"), at)
    truth = f(at[:, 0], at[:, 1])
    return float(np.max(np.abs(got - truth) / np.maximum(np.abs(truth), floor)))


def _reference(f, m: int = 41):
    axes = _axes(gridstudy.reference_axis(LO, HI, m), gridstudy.reference_axis(LO, HI, m))
    grid = np.meshgrid(*(np.asarray(a.values) for a in axes), indexing="ij")
    return axes, [f(*grid)]


# A fine evaluation mesh, far denser than any grid under test, plus nothing else: the truth is f.
FINE = gridstudy._mesh([gridstudy.reference_axis(LO, HI, 401)] * 2)


# --- placements -------------------------------------------------------------------------------


def test_uniform_and_geometric_spacing() -> None:
    u = gridstudy.uniform(0.005, 0.4, 7)
    g = gridstudy.geometric(0.005, 0.4, 7)
    assert (u[0], u[-1], g[0], g[-1]) == (0.005, 0.4, 0.005, 0.4)
    assert np.allclose(np.diff(u), (0.4 - 0.005) / 6, rtol=RTOL)
    assert np.allclose(g[1:] / g[:-1], (0.4 / 0.005) ** (1 / 6), rtol=RTOL)
    assert gridstudy.geometric(0.0, 0.04, 5) is None


def test_reference_axis_is_fine_for_both_spacings() -> None:
    # Equal steps in (u + g) / 2, u the linear and g the logarithmic position: every step moves
    # u and g by at most 2 / (m - 1), at most twice a uniform and a geometric grid's step.
    m, lo, hi = 21, 0.005, 0.4
    r = gridstudy.reference_axis(lo, hi, m)
    assert r.size == m and r[0] == lo and r[-1] == hi
    assert np.all(np.diff(r) > 0)
    assert np.all(np.diff(r) <= 2 * (hi - lo) / (m - 1) * (1 + 1e-9))
    assert np.all(r[1:] / r[:-1] <= (hi / lo) ** (2 / (m - 1)) * (1 + 1e-9))
    assert np.allclose(gridstudy.reference_axis(0.0, 1.0, 5), [0, 0.25, 0.5, 0.75, 1])


def test_rounded_index_values_keep_the_ends() -> None:
    values = np.array([0.005, 0.0123456, 0.0500001, 0.4]) * NS
    out = gridstudy.rounded(values, NS)
    assert out[0] == values[0] and out[-1] == values[-1]
    assert out[1:3] == pytest.approx((0.01235 * NS, 0.05 * NS), rel=RTOL, abs=0)
    # Neighbours that four digits would merge get more digits.
    close = np.array([1.0, 1.00001, 1.00002, 2.0]) * PF
    assert len(set(gridstudy.rounded(close, PF))) == 4


# --- the optimizer on analytic surfaces -------------------------------------------------------


def _mixed(x, y):
    # Curvature gathers at small x (sqrt) and at large y (exp); x y is bilinear, so exact.
    return np.sqrt(x) + np.exp(2.0 * y) + x * y


@pytest.mark.parametrize("n", [4, 6, 9])
def test_optimized_placement_beats_uniform_and_geometric(n: int) -> None:
    axes, values = _reference(_mixed)
    nodes, predicted = gridstudy.optimized_axes(axes, values, n, floor=1e-9)
    optimized = _max_rel_error(_mixed, nodes, FINE, 1e-9)
    uniform = _max_rel_error(_mixed, [gridstudy.uniform(LO, HI, n)] * 2, FINE, 1e-9)
    geometric = _max_rel_error(_mixed, [gridstudy.geometric(LO, HI, n)] * 2, FINE, 1e-9)
    assert optimized < 0.9 * uniform
    assert optimized < 0.9 * geometric
    # Its own estimate, from the 41 x 41 reference alone, is close to the truth.
    assert predicted == pytest.approx(optimized, rel=0.05, abs=0)
    assert all(g.size == n and g[0] == LO and g[-1] == HI for g in nodes)
    assert all(np.all(np.diff(g) > 0) for g in nodes)


def test_measured_error_obeys_the_bound_on_the_optimized_grid() -> None:
    # f_xx = -x^(-3/2) / 4, largest at a cell's left end; f_yy = 4 e^(2y), largest at its right.
    axes, values = _reference(_mixed)
    (gx, gy), _ = gridstudy.optimized_axes(axes, values, 6, floor=1e-9)
    table = Table(_axes(gx, gy), _mixed(*np.meshgrid(gx, gy, indexing="ij")), "q", "s")
    got = interpolate(table, FINE)
    for (x, y), v in zip(FINE, got, strict=True):
        i = min(int(np.searchsorted(gx, x, side="right")) - 1, gx.size - 2)
        j = min(int(np.searchsorted(gy, y, side="right")) - 1, gy.size - 2)
        hx, hy = gx[i + 1] - gx[i], gy[j + 1] - gy[j]
        bound = hx**2 / 8 * 0.25 * gx[i] ** -1.5 + hy**2 / 8 * 4 * math.exp(2 * gy[j + 1])
        assert abs(v - _mixed(x, y)) <= bound * (1 + 1e-9) + 1e-12


def test_constant_curvature_makes_uniform_spacing_optimal() -> None:
    # f = x² + y²: every interval errs h²/8 · 2 at its centre, so the largest error is smallest
    # when all intervals are equal. A huge floor makes the relative error a scaled absolute one.
    def f(x, y):
        return x**2 + y**2

    floor = 1e6
    n = 6
    axes, values = _reference(f)
    nodes, _ = gridstudy.optimized_axes(axes, values, n, floor)
    h = (HI - LO) / (n - 1)
    for g in nodes:
        assert np.allclose(g, gridstudy.uniform(LO, HI, n), atol=0.03 * h)
    # Exactly: (hx² + hy²) / 4 at the centre of the cell with the widest intervals, least when
    # every interval is h wide.
    exact = (max(np.diff(nodes[0])) ** 2 + max(np.diff(nodes[1])) ** 2) / 4 / floor
    best = 2 * h * h / 4 / floor
    assert best <= exact <= 1.02 * best
    assert _max_rel_error(f, nodes, FINE, floor) <= exact * (1 + 1e-9)


# --- recommendation ---------------------------------------------------------------------------


def _candidate(placement: str, size: int, max_rel: float | None) -> Candidate:
    axes = (Axis(SLEW_AXIS, tuple(range(1, size + 1))), Axis(LOAD_AXIS, tuple(range(size))))
    return Candidate(placement, size, axes, max_rel, max_rel, 0.0, "cell_rise", None, None, 0)


CANDIDATES = (
    _candidate("uniform", 3, 0.2),
    _candidate("uniform", 4, 0.15),
    _candidate("geometric", 3, 0.05),
    _candidate("geometric", 4, 0.009),
    _candidate("optimized", 3, 0.012),
    _candidate("optimized", 4, None),  # a failed point: never recommended
)


def _study(candidates) -> Study:
    return Study("QINV_P1", "A", "Y", 1e-12, (), tuple(candidates), (), 0, 0.0)


def test_recommendation_is_the_smallest_grid_that_meets_the_target() -> None:
    r = gridstudy.recommend(CANDIDATES, 0.05)
    assert dict(r.needed) == {
        "uniform": None,
        "geometric": CANDIDATES[2],
        "optimized": CANDIDATES[4],
    }
    assert r.best == CANDIDATES[4]  # 3 x 3 either way; the smaller error wins
    strict = gridstudy.recommend(CANDIDATES, 0.01)
    assert strict.best == CANDIDATES[3]
    assert gridstudy.recommend(CANDIDATES, 0.001).best is None


def test_savings_against_each_spacing() -> None:
    s = _study(CANDIDATES)
    r = gridstudy.recommend(CANDIDATES, 0.05)
    # Geometric needs 3 x 3 as well; uniform never got there by 4 x 4: at least 5 x 5 - 3 x 3.
    assert gridstudy.savings(s, r) == {"uniform": (25 - 9, False), "geometric": (0, True)}
    assert gridstudy.savings(s, gridstudy.recommend(CANDIDATES, 0.01)) == {}


# --- a small study with the simulator ---------------------------------------------------------


@pytest.fixture(scope="module")
def ngspice() -> None:
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; these tests need it")


@pytest.fixture(scope="module")
def small_study(ngspice):
    cfg = dataclasses.replace(config.load(SMALL_L1), fidelity=Fidelity(rel_floor=1e-12))
    requested: list[TimingPoint] = []
    real_run = sweep.run

    def recording_run(config_, points, **kwargs):
        points = list(points)
        requested.extend(points)
        return real_run(config_, points, **kwargs)

    mp = pytest.MonkeyPatch()
    mp.setattr(sweep, "run", recording_run)
    try:
        study = gridstudy.study(
            cfg, "QNAND2_P1", "IB:Y", sizes=(3, 4), reference_points=7, targets=(0.05, 0.2), jobs=2
        )
    finally:
        mp.undo()
    return cfg, study, requested


def test_every_candidate_grid_is_simulated(small_study) -> None:
    cfg, study, requested = small_study
    asked = set(requested)
    assert len(asked) == len(requested)  # nothing simulated twice within the study
    assert study.points == len(asked)
    (state,) = arcs_of(cfg.cell("QNAND2_P1"))[1].states
    assert {(c.placement, c.size) for c in study.candidates} == {
        (p, n) for p in gridstudy.PLACEMENTS for n in (3, 4)
    }
    for c in study.candidates:
        assert c.failures == 0 and c.max_rel is not None
        nodes = itertools.product(EDGES, *(a.values for a in c.axes))
        middles = itertools.product(EDGES, *(a.values for a in gridstudy.centres(c.axes)))
        for edge, slew, load in itertools.chain(nodes, middles):
            point = TimingPoint(
                "QNAND2_P1", "IB", "Y", state.side, edge, state.output_edge(edge), slew, load
            )
            assert point in asked, (c.placement, c.size, point)
        lo_hi = [(a.values[0], a.values[-1]) for a in c.axes]
        assert lo_hi == [(min(g), max(g)) for g in (cfg.grid.slew, cfg.grid.load)]


def test_errors_fall_with_more_points(small_study) -> None:
    _, study, _ = small_study
    for placement in gridstudy.PLACEMENTS:
        three, four = study.curve(placement)
        assert four.max_rel < three.max_rel
        assert 0 < four.rms_rel <= four.max_rel


def test_outputs_and_the_paste_line(small_study, tmp_path: Path) -> None:
    cfg, study, _ = small_study
    json_path, png_path = html_report.write_study(cfg, study, tmp_path)
    assert json_path.name == "small_l1.QNAND2_P1.IB-Y.gridstudy.json"
    assert png_path.read_bytes().startswith(PNG_MAGIC)
    data = json.loads(json_path.read_text(encoding="utf-8"))
    assert len(data["candidates"]) == len(study.candidates)
    for record, r in zip(data["recommendations"], study.recommendations, strict=True):
        if r.best is None:
            assert record["paste"] is None
            continue
        grid = tomllib.loads(record["paste"])["grid"]
        assert [v * NS for v in grid["slew"]] == pytest.approx(
            r.best.axes[0].values, rel=RTOL, abs=0
        )
        assert [v * PF for v in grid["load"]] == pytest.approx(
            r.best.axes[1].values, rel=RTOL, abs=0
        )
    lines = gridstudy.summary_lines(cfg, study)
    assert lines[0].startswith("grid study of QNAND2_P1 IB->Y: reference 7x7")


def test_an_unknown_arc_is_named(ngspice) -> None:
    cfg = config.load(SMALL_L1)
    with pytest.raises(ConfigError, match="no arc 'B:Y'.*IA:Y, IB:Y"):
        gridstudy.study(cfg, "QNAND2_P1", "B:Y", sizes=(3,), reference_points=5)


def test_a_clock_arc_is_studied_with_its_flip_flop_experiment(ngspice) -> None:
    cfg = dataclasses.replace(
        config.load(ROOT / "tests" / "data" / "seq_l1.toml"), fidelity=Fidelity(rel_floor=1e-12)
    )
    study = gridstudy.study(cfg, "QDFFR_P1", "CLK:Q", sizes=(2, 3), reference_points=4, jobs=2)
    assert (study.related, study.output) == ("CLK", "Q")
    assert study.candidates and all(c.failures == 0 for c in study.candidates)
    assert all(c.max_rel is not None and c.max_rel < 1 for c in study.candidates)
