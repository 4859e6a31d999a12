"""Tests of charflow.tables: validation, JSON round trip and interpolation.

Interpolation is held against scipy (general-purpose reference library), a textbook worked
example, the plain-loop twin and exact properties (grid points, multilinear functions).
"""

from __future__ import annotations

import itertools
import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.interpolate import RegularGridInterpolator

from charflow.records.errors import TableError
from charflow.tables.table import Axis, Table, drop_axis, interpolate, interpolate_loop

# Both kernels and scipy sum at most 8 weighted corner values; their rounding differs by a few
# ulp of sum |weight * value|, so tolerances are relative to that (see _rounding_scale).
RTOL = 1e-12
# Bhasker & Chadha print 4 significant digits: a printed 0.6043 stands for [0.60425, 0.60435].
BOOK_ROUNDING_NS = 0.5e-4

NS = 1e-9
PF = 1e-12

AXIS_NAMES = (
    "input_net_transition",
    "total_output_net_capacitance",
    "related_out_total_output_net_capacitance",
)

N_POINTS = 200


def _random_axis(rng: np.random.Generator, name: str, n: int, scale: float) -> Axis:
    gaps = rng.uniform(0.05, 1.0, size=n - 1)
    start = rng.uniform(0.0, 1.0)
    return Axis(name, tuple(scale * np.concatenate([[start], start + np.cumsum(gaps)])))


def _random_table(rng: np.random.Generator, lengths: tuple[int, ...]) -> Table:
    # SI-sized axes (s, F, F) so that the tests see the magnitudes charflow stores.
    scales = (1e-10, 1e-14, 1e-14)
    axes = tuple(
        _random_axis(rng, name, n, scale)
        for name, n, scale in zip(AXIS_NAMES, lengths, scales, strict=False)
    )
    return Table(axes, rng.uniform(1e-12, 1e-9, size=lengths), "cell_rise", "s")


def _inside_points(rng: np.random.Generator, table: Table, n: int) -> np.ndarray:
    return np.column_stack(
        [rng.uniform(axis.values[0], axis.values[-1], size=n) for axis in table.axes]
    )


def _outside_points(rng: np.random.Generator, table: Table, n: int) -> np.ndarray:
    """Points up to one grid span beyond the grid, each outside along at least one axis."""
    columns = []
    for axis in table.axes:
        lo, hi = axis.values[0], axis.values[-1]
        span = hi - lo
        columns.append(rng.uniform(lo - span, hi + span, size=n))
    pts = np.column_stack(columns)
    axis_out = rng.integers(0, table.ndim, size=n)
    below = rng.random(n) < 0.5
    for i, (k, low_side) in enumerate(zip(axis_out, below, strict=True)):
        lo, hi = table.axes[k].values[0], table.axes[k].values[-1]
        span = hi - lo
        pts[i, k] = rng.uniform(lo - span, lo) if low_side else rng.uniform(hi, hi + span)
    return pts


def _rounding_scale(table: Table, point: np.ndarray) -> float:
    """An upper bound of sum |weight * value| over the corners used at ``point``.

    Per axis the weights are 1 - t and t, whose absolute values sum to max(1, |2t - 1|).
    """
    scale = float(np.max(np.abs(table.values)))
    for axis, x in zip(table.axes, point, strict=True):
        grid = np.asarray(axis.values)
        if grid.size == 1:
            continue
        lo = int(np.clip(np.searchsorted(grid, x, side="right") - 1, 0, grid.size - 2))
        t = (x - grid[lo]) / (grid[lo + 1] - grid[lo])
        scale *= max(1.0, abs(2.0 * t - 1.0))
    return scale


def _assert_close(table: Table, points: np.ndarray, got: np.ndarray, want: np.ndarray) -> None:
    for point, g, w in zip(points, got, want, strict=True):
        assert abs(g - w) <= RTOL * _rounding_scale(table, point), (point, g, w)


# --- against scipy ----------------------------------------------------------------------------


@pytest.mark.parametrize("lengths", [(2, 2), (4, 7), (7, 3), (2, 2, 2), (5, 4, 3), (3, 6, 2)])
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_inside_grid_equals_scipy_linear(lengths: tuple[int, ...], seed: int) -> None:
    rng = np.random.default_rng(seed)
    table = _random_table(rng, lengths)
    points = _inside_points(rng, table, N_POINTS)
    # scipy.interpolate.RegularGridInterpolator, method="linear" (scipy reference library).
    reference = RegularGridInterpolator(
        [np.asarray(a.values) for a in table.axes], table.values, method="linear"
    )
    _assert_close(table, points, interpolate(table, points), reference(points))


@pytest.mark.parametrize("lengths", [(2, 2), (4, 7), (7, 3), (2, 2, 2), (5, 4, 3), (3, 6, 2)])
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_outside_grid_equals_scipy_linear_extrapolation(
    lengths: tuple[int, ...], seed: int
) -> None:
    rng = np.random.default_rng(seed)
    table = _random_table(rng, lengths)
    points = _outside_points(rng, table, N_POINTS)
    # scipy documents for RegularGridInterpolator: "fill_value: ... If None, values outside the
    # domain are extrapolated" (docs.scipy.org, scipy.interpolate.RegularGridInterpolator,
    # scipy 1.x); with method="linear" that extends the edge cell, as NLDM readers do.
    reference = RegularGridInterpolator(
        [np.asarray(a.values) for a in table.axes],
        table.values,
        method="linear",
        bounds_error=False,
        fill_value=None,
    )
    _assert_close(table, points, interpolate(table, points), reference(points))


# --- textbook worked example --------------------------------------------------------------------


def test_bhasker_chadha_worked_example() -> None:
    # Bhasker & Chadha, "Static Timing Analysis for Nanometer Designs", Springer, 2009, ch. 3:
    # bilinear interpolation in a cell delay table (slew in ns, load in pF). Values from memory.
    # By hand: load fraction 0.75, rows give 0.594425 and 0.633875, slew fraction 0.25 gives
    # 0.6042875 ns, which the book prints as 0.6043.
    table = Table(
        axes=(
            Axis("input_net_transition", (0.1 * NS, 0.3 * NS)),
            Axis("total_output_net_capacitance", (0.35 * PF, 1.43 * PF)),
        ),
        values=np.array([[0.1937, 0.7280], [0.2327, 0.7676]]) * NS,
        quantity="cell_rise",
        unit="s",
    )
    got_ns = table.interpolate(0.15 * NS, 1.16 * PF) / NS
    assert abs(got_ns - 0.6043) <= BOOK_ROUNDING_NS


# --- against the plain-loop twin ----------------------------------------------------------------


@st.composite
def tables_and_points(draw: st.DrawFn) -> tuple[Table, np.ndarray]:
    ndim = draw(st.integers(1, 3))
    scale = draw(st.sampled_from([1e-15, 1e-12, 1e-9, 1.0]))
    axes = []
    for name in AXIS_NAMES[:ndim]:
        start = draw(st.floats(-10.0, 10.0))
        gaps = draw(st.lists(st.floats(0.01, 10.0), min_size=0, max_size=4))
        values = [start]
        for gap in gaps:
            values.append(values[-1] + gap)
        axes.append(Axis(name, tuple(scale * v for v in values)))
    shape = tuple(len(a) for a in axes)
    flat = draw(
        st.lists(st.floats(-1e3, 1e3), min_size=math.prod(shape), max_size=math.prod(shape))
    )
    table = Table(tuple(axes), np.reshape(flat, shape), "fall_transition", "s")
    # Coordinates from well below to well above each axis: inside, on and outside the grid.
    n = draw(st.integers(1, 8))
    points = []
    for _ in range(n):
        point = []
        for axis in axes:
            lo, hi = axis.values[0], axis.values[-1]
            span = max(hi - lo, scale)
            point.append(draw(st.floats(lo - 2 * span, hi + 2 * span)))
        points.append(point)
    return table, np.array(points)


@settings(max_examples=300, deadline=None, database=None)
@given(tables_and_points())
def test_vectorised_equals_loop_twin(case: tuple[Table, np.ndarray]) -> None:
    table, points = case
    twin = np.array([interpolate_loop(table, p) for p in points])
    _assert_close(table, points, interpolate(table, points), twin)


# --- exact properties ---------------------------------------------------------------------------


def _multilinear(coefs: dict[tuple[int, ...], float], x: np.ndarray) -> np.ndarray:
    """sum over axis subsets S of coef_S * prod_{k in S} x_k, e.g. a + b x + c y + d x y."""
    return sum(c * np.prod(x[..., list(s)], axis=-1) for s, c in coefs.items())


@pytest.mark.parametrize("lengths", [(2,), (5,), (2, 2), (4, 3), (2, 2, 2), (3, 4, 5)])
@pytest.mark.parametrize("seed", [4, 5])
def test_multilinear_function_is_reproduced_everywhere(lengths: tuple[int, ...], seed: int) -> None:
    # A function linear in each axis separately equals its multilinear interpolant on every cell,
    # and the edge cell's extension is that same function, so extrapolation reproduces it too.
    # Exactly up to rounding: terms as large as the function's are summed.
    rng = np.random.default_rng(seed)
    ndim = len(lengths)
    axes = tuple(
        _random_axis(rng, name, n, 1.0) for name, n in zip(AXIS_NAMES, lengths, strict=False)
    )
    subsets = [s for r in range(ndim + 1) for s in itertools.combinations(range(ndim), r)]
    coefs = {s: float(rng.uniform(-1.0, 1.0)) for s in subsets}
    grid = np.stack(np.meshgrid(*[np.asarray(a.values) for a in axes], indexing="ij"), axis=-1)
    table = Table(axes, _multilinear(coefs, grid), "rise_power", "J")
    points = np.vstack(
        [_inside_points(rng, table, N_POINTS), _outside_points(rng, table, N_POINTS)]
    )
    want = _multilinear(coefs, points)
    got = interpolate(table, points)
    for point, g, w in zip(points, got, want, strict=True):
        terms = sum(abs(c) * float(np.prod(np.abs(point[list(s)]))) for s, c in coefs.items())
        assert abs(g - w) <= RTOL * (_rounding_scale(table, point) + terms), (point, g, w)


@pytest.mark.parametrize("lengths", [(1,), (4,), (1, 3), (3, 1), (4, 5), (1, 1, 1), (3, 1, 4)])
def test_grid_points_return_table_values_exactly(lengths: tuple[int, ...]) -> None:
    rng = np.random.default_rng(6)
    table = _random_table(rng, lengths)
    indices = list(itertools.product(*[range(n) for n in lengths]))
    points = np.array(
        [[a.values[i] for a, i in zip(table.axes, idx, strict=True)] for idx in indices]
    )
    want = np.array([table.values[idx] for idx in indices])
    np.testing.assert_array_equal(interpolate(table, points), want)
    np.testing.assert_array_equal([interpolate_loop(table, p) for p in points], want)
    np.testing.assert_array_equal([table.interpolate(*p) for p in points], want)


def test_one_dimensional_extrapolation_by_hand() -> None:
    table = Table((Axis("input_net_transition", (1.0, 2.0, 4.0)),), [10.0, 20.0, 30.0], "q", "s")
    # Below: slope 10 of the first cell; above: slope 5 of the last cell.
    np.testing.assert_array_equal(
        interpolate(table, [[0.0], [1.5], [3.0], [6.0]]), [0.0, 15.0, 25.0, 40.0]
    )


def test_single_value_axis_is_constant_along_it() -> None:
    row = [1.0, 3.0, 2.0]
    loads = (1e-15, 2e-15, 4e-15)
    flat = Table((Axis("total_output_net_capacitance", loads),), row, "cell_fall", "s")
    table = Table(
        (Axis("input_net_transition", (5e-11,)), Axis("total_output_net_capacitance", loads)),
        [row],
        "cell_fall",
        "s",
    )
    for slew in (0.0, 5e-11, 1e-9):
        for load in (0.0, 1.5e-15, 3e-15, 9e-15):
            assert table.interpolate(slew, load) == flat.interpolate(load)
            assert interpolate_loop(table, (slew, load)) == flat.interpolate(load)


# --- records, validation, JSON ------------------------------------------------------------------


def _table_2x3() -> Table:
    return Table(
        (
            Axis("input_net_transition", (1e-11, 5e-11)),
            Axis("total_output_net_capacitance", (1e-15, 2e-15, 8e-15)),
        ),
        [[1e-11, 2e-11, 5e-11], [2e-11, 3e-11, 7e-11]],
        "cell_rise",
        "s",
    )


def test_properties() -> None:
    table = _table_2x3()
    assert table.shape == (2, 3)
    assert table.ndim == 2
    assert table.axis_names == ("input_net_transition", "total_output_net_capacitance")
    assert table.values.dtype == np.float64


def test_json_round_trip_is_exact() -> None:
    table = _random_table(np.random.default_rng(7), (3, 4, 2))
    text = json.dumps(table.to_dict())
    assert Table.from_dict(json.loads(text)) == table


def test_equality_is_exact_and_tables_are_unhashable() -> None:
    table = _table_2x3()
    assert table == _table_2x3()
    nudged = table.values.copy()
    nudged[1, 2] = np.nextafter(nudged[1, 2], 1.0)
    assert table != Table(table.axes, nudged, table.quantity, table.unit)
    assert table != Table(table.axes, table.values, "cell_fall", table.unit)
    with pytest.raises(TypeError):
        hash(table)


def test_values_are_a_read_only_copy() -> None:
    given_values = np.array([[1.0, 2.0], [3.0, 4.0]])
    table = Table(
        (
            Axis("related_pin_transition", (1e-11, 2e-11)),
            Axis("constrained_pin_transition", (1e-11, 3e-11)),
        ),
        given_values,
        "rise_constraint",
        "s",
    )
    given_values[0, 0] = 99.0
    assert table.values[0, 0] == 1.0
    with pytest.raises(ValueError):
        table.values[0, 0] = 5.0
    with pytest.raises(ValueError):
        table.values.flags.writeable = True


@pytest.mark.parametrize(
    ("values", "match"),
    [
        ((1e-11, 1e-11), r"axis 'input_net_transition': value at index 1 .*strictly increase"),
        ((2e-11, 3e-11, 1e-11), r"axis 'input_net_transition': value at index 2"),
        ((1e-11, float("nan")), r"axis 'input_net_transition': value at index 1 \(nan\)"),
        ((float("-inf"), 1e-11), r"axis 'input_net_transition': value at index 0 \(-inf\)"),
        ((), r"axis 'input_net_transition': needs at least one value"),
        (("1e-11",), r"axis 'input_net_transition': value at index 0 .* not a number"),
    ],
)
def test_bad_axis_raises(values: tuple[object, ...], match: str) -> None:
    with pytest.raises(TableError, match=match):
        Axis("input_net_transition", values)  # type: ignore[arg-type]


def test_nan_value_raises_naming_quantity() -> None:
    table = _table_2x3()
    bad = table.values.copy()
    bad[1, 0] = np.nan
    with pytest.raises(TableError, match=r"table 'cell_rise': value at index \(1, 0\) \(nan\)"):
        Table(table.axes, bad, "cell_rise", "s")


def test_wrong_shape_raises_naming_quantity_and_shapes() -> None:
    table = _table_2x3()
    with pytest.raises(
        TableError, match=r"table 'cell_rise': values have shape \(3, 2\).*\(2, 3\)"
    ):
        Table(table.axes, table.values.T, "cell_rise", "s")


def test_four_axes_raise() -> None:
    axes = tuple(Axis(f"index_{k}", (1.0,)) for k in range(4))
    with pytest.raises(TableError, match=r"table 'cell_rise': needs 1 to 3 axes, got 4"):
        Table(axes, np.ones((1, 1, 1, 1)), "cell_rise", "s")


def test_no_axes_and_repeated_axes_raise() -> None:
    with pytest.raises(TableError, match=r"table 'cell_rise': needs 1 to 3 axes, got 0"):
        Table((), np.ones(()), "cell_rise", "s")
    axis = Axis("input_net_transition", (1e-11, 2e-11))
    with pytest.raises(TableError, match=r"table 'cell_rise': axis names repeat"):
        Table((axis, axis), np.ones((2, 2)), "cell_rise", "s")


def test_bad_from_dict_raises_naming_quantity() -> None:
    data = _table_2x3().to_dict()
    data["axes"][0]["values"] = [5e-11, 1e-11]
    with pytest.raises(TableError, match=r"table 'cell_rise': axis 'input_net_transition'"):
        Table.from_dict(data)
    del data["unit"]
    with pytest.raises(TableError, match=r"table 'cell_rise': not a table mapping"):
        Table.from_dict(data)


def test_bad_points_raise() -> None:
    table = _table_2x3()
    with pytest.raises(TableError, match=r"table 'cell_rise': points must have shape \(n, 2\)"):
        interpolate(table, np.zeros((4, 3)))
    with pytest.raises(TableError, match=r"point 1: table 'cell_rise': coordinates"):
        interpolate(table, [[1e-11, 1e-15], [np.nan, 1e-15]])
    with pytest.raises(TableError, match=r"table 'cell_rise': got 1 coordinates"):
        table.interpolate(1e-11)
    with pytest.raises(TableError, match=r"table 'cell_rise': got 3 coordinates"):
        interpolate_loop(table, (1e-11, 1e-15, 0.0))


# --- dropping an axis (the default Liberty file's two-output tables) ---------------------------


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_dropping_an_axis_at_a_value_equals_scipy_on_that_plane(seed: int) -> None:
    # Read at a fixed third coordinate, a trilinear table is the bilinear one scipy's
    # RegularGridInterpolator gives on that plane (scipy reference library).
    rng = np.random.default_rng(seed)
    table = _random_table(rng, (3, 4, 3))
    third = table.axes[2].values
    at = float(rng.uniform(third[0], third[-1]))
    flat = drop_axis(table, table.axes[2].name, at)
    assert flat.axes == table.axes[:2]
    reference = RegularGridInterpolator([np.asarray(a.values) for a in table.axes], table.values)
    grid = np.array(list(itertools.product(*(a.values for a in flat.axes))))
    planar = np.column_stack([grid, np.full(len(grid), at)])
    np.testing.assert_allclose(flat.values.reshape(-1), reference(planar), rtol=1e-12, atol=0)


def test_dropping_an_axis_by_its_largest_and_smallest_value() -> None:
    values = np.array([[[1.0, 5.0], [7.0, 2.0]], [[3.0, 3.0], [0.0, -1.0]]])
    axes = (Axis("a", (1, 2)), Axis("b", (1, 2)), Axis("c", (0, 1)))
    table = Table(axes, values, "q", "s")
    np.testing.assert_array_equal(drop_axis(table, "c", "largest").values, [[5, 7], [3, 0]])
    np.testing.assert_array_equal(drop_axis(table, "c", "smallest").values, [[1, 2], [3, -1]])
    # A table without the axis is left as it is; a value off the axis is refused.
    assert drop_axis(table, "z", "largest") is table
    with pytest.raises(TableError, match=r"c 2 is outside the axis \[0, 1\]"):
        drop_axis(table, "c", 2.0)
