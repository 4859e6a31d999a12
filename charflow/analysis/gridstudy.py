"""Grid-density study: which index values make an arc's tables accurate enough, and at what cost.

One arc (every sensitizing state, both input edges, delay and transition) is simulated on a dense
reference grid over the cell's index range. Candidate grids of 3 to 12 points per axis (by
default) are simulated too — their values come from the simulator, never from the reference — and
judged by the relative error of their interpolation at every reference point and at their own
cell centres, simulated as well: a fine candidate has few reference points in each cell. Three
placements of the index values are compared: uniform, geometric, and an optimized one that
equalises the interpolation error between neighbouring intervals.

The optimizer rests on the error of linear interpolation, (x − x0)(x1 − x)/2 · f''(ξ), largest at
the midpoint: h²/8 · |f''| (Burden & Faires, *Numerical Analysis*, 9th ed., 2010, sec. 3.1). An
interval's error grows as h², so the maximum over intervals is smallest when every interval errs
alike; interval widths then follow |f''|^(-1/2), as in the equidistribution of de Boor (*A
Practical Guide to Splines*, 1978, ch. III). The curvature comes from the reference: first from
its second differences, then from the error each interval makes on a cubic-spline surrogate of
the reference, a few rounds until the intervals agree. The surrogate only steers the search; the
grid it picks is simulated and judged like the others.
"""

from __future__ import annotations

import itertools
import math
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass

import numpy as np
from scipy.interpolate import make_interp_spline
from scipy.optimize import brentq

from charflow.analysis.fidelity import measured, row_point_of, row_points, timing_point
from charflow.analysis.reporting import axis_unit, head, library_units, pct
from charflow.config.library import LibraryConfig
from charflow.execution import sweep
from charflow.flow.characterize import shaped
from charflow.plan.arcs import arcs_of
from charflow.records.errors import ConfigError, MeasurementError
from charflow.records.names import delay_quantity, transition_quantity
from charflow.records.outcomes import Failure, Measurement
from charflow.records.points import EDGES, Arc
from charflow.records.units import show_time
from charflow.tables.table import Axis, Table, interpolate
from charflow.tables.tabulate import LOAD_AXIS, SLEW_AXIS

PLACEMENTS = ("uniform", "geometric", "optimized")
SIZES = tuple(range(3, 13))
REFERENCE_POINTS = 41  # per axis
DIGITS = 4  # significant digits of a candidate's index values, in library units
ROUNDS = 12  # equalisation rounds of the optimizer
DAMPING = 0.5  # share of the new placement taken each round
DENSITY_FLOOR = 1e-3  # of the largest density: a flat stretch still gets some points
POLISH_STEPS = (0.3, -0.3, 0.1, -0.1, 0.03, -0.03)  # fractions of the gap to a neighbour
POLISH_SWEEPS = 8


@dataclass(frozen=True, slots=True)
class Surface:
    """An arc's simulated tables on one grid: ``values[key]`` has the shape of ``axes``."""

    axes: tuple[Axis, ...]
    values: dict[tuple[str, str], np.ndarray]  # (when, quantity) → values (SI)
    failures: tuple[Failure, ...]


@dataclass(frozen=True, slots=True)
class Candidate:
    placement: str
    size: int  # points per axis
    axes: tuple[Axis, ...]
    max_rel: float | None  # None when a point of the grid failed
    rms_rel: float | None
    max_abs: float | None  # s
    worst_table: str | None
    worst_at: tuple[float, ...] | None  # the reference point where it errs most
    predicted_max_rel: float | None  # the optimizer's own estimate (optimized grids only)
    failures: int

    @property
    def points(self) -> int:
        return math.prod(len(a) for a in self.axes)


@dataclass(frozen=True, slots=True)
class Recommendation:
    target: float
    needed: tuple[tuple[str, Candidate | None], ...]  # per placement, its smallest passing grid
    best: Candidate | None  # the fewest points over placements, then the smallest error


@dataclass(frozen=True, slots=True)
class Study:
    cell: str
    related: str
    output: str
    floor: float  # s
    reference: tuple[Axis, ...]
    candidates: tuple[Candidate, ...]
    recommendations: tuple[Recommendation, ...]
    points: int  # distinct points simulated
    wall_seconds: float

    @property
    def arc(self) -> str:
        return f"{self.related}->{self.output}"

    def curve(self, placement: str) -> list[Candidate]:
        return sorted(
            (c for c in self.candidates if c.placement == placement), key=lambda c: c.size
        )


def uniform(lo: float, hi: float, n: int) -> np.ndarray:
    return np.linspace(lo, hi, n)


def geometric(lo: float, hi: float, n: int) -> np.ndarray | None:
    """Equal ratios between neighbours; None for an axis that starts at zero."""
    if lo <= 0:
        return None
    values = np.geomspace(lo, hi, n)
    values[0], values[-1] = lo, hi
    return values


def reference_axis(lo: float, hi: float, m: int) -> np.ndarray:
    """``m`` values equally spaced in the mean of the linear and the logarithmic position.

    Near ``lo`` the spacing is at most twice that of a geometric grid of ``m`` points, near
    ``hi`` at most twice that of a uniform one: fine enough everywhere for both kinds of
    candidate, with no near-duplicate points as a union of the two grids would have.
    """
    if lo <= 0:
        return uniform(lo, hi, m)
    ratio = hi / lo

    # On t = (x − lo) / (hi − lo) in [0, 1]: brentq's tolerance is absolute, SI values tiny.
    def position(t: float) -> float:
        return 0.5 * t + 0.5 * math.log1p(t * (ratio - 1)) / math.log(ratio)

    inner = [
        brentq(lambda t, u=u: position(t) - u, 0.0, 1.0, xtol=1e-14)
        for u in np.linspace(0, 1, m)[1:-1]
    ]
    return np.array([lo, *(lo + (hi - lo) * t for t in inner), hi])


def rounded(values: np.ndarray, scale: float, digits: int = DIGITS) -> tuple[float, ...]:
    """Index values rounded to ``digits`` significant digits in library units (more if that
    would merge neighbours), the ends kept exactly: the values a user would paste."""
    for d in range(digits, 16):
        inner = [float(f"{v / scale:.{d}g}") * scale for v in values[1:-1]]
        out = (float(values[0]), *inner, float(values[-1]))
        if all(b > a for a, b in itertools.pairwise(out)):
            return out
    return tuple(float(v) for v in values)


def _along(arrays: Sequence[np.ndarray], k: int, matrix: np.ndarray) -> list[np.ndarray]:
    """Apply ``matrix`` (new points × old points) along axis ``k`` of every array."""
    return [np.moveaxis(np.tensordot(matrix, a, axes=(1, k)), 0, k) for a in arrays]


def _spline_matrix(grid: np.ndarray, at: np.ndarray) -> np.ndarray:
    """The cubic interpolating spline through ``grid``, as a linear map to values at ``at``."""
    return make_interp_spline(grid, np.eye(grid.size), k=3)(at)


def _mesh(grids: Sequence[np.ndarray]) -> np.ndarray:
    return np.stack([g.ravel() for g in np.meshgrid(*grids, indexing="ij")], axis=1)


def _equidistribute(nodes: np.ndarray, density: np.ndarray, n: int) -> np.ndarray:
    """``n`` points that split the integral of a piecewise-constant ``density`` (one value per
    interval of ``nodes``) into equal parts."""
    density = np.maximum(density, DENSITY_FLOOR * density.max())
    cumulative = np.concatenate([[0.0], np.cumsum(density * np.diff(nodes))])
    out = np.interp(np.linspace(0.0, cumulative[-1], n), cumulative, nodes)
    out[0], out[-1] = nodes[0], nodes[-1]
    return out


def deviations(
    axes: Sequence[Axis], values: Sequence[np.ndarray], at: np.ndarray, truth: np.ndarray
) -> np.ndarray:
    """Per table (rows) and point ``at`` (columns): |interpolated − truth| for the tables
    ``values`` on ``axes``; ``truth`` has one flattened row per table."""
    return np.array(
        [
            np.abs(interpolate(Table(tuple(axes), v, "q", "s"), at) - t)
            for v, t in zip(values, truth, strict=True)
        ]
    )


def rel_errors(
    axes: Sequence[Axis], values: Sequence[np.ndarray], at: np.ndarray, truth, floor: float
) -> np.ndarray:
    truth = np.asarray(truth)
    return deviations(axes, values, at, truth) / np.maximum(np.abs(truth), floor)


class _Surrogate:
    """The reference as a smooth function: its cubic spline, evaluated on tensor grids."""

    def __init__(self, axes: Sequence[Axis], values: Sequence[np.ndarray], floor: float) -> None:
        self.grids = [np.asarray(a.values) for a in axes]
        self.names = [a.name for a in axes]
        self.values = [np.asarray(v) for v in values]
        self.floor = floor
        self.points = _mesh(self.grids)
        self.flat = [v.ravel() for v in self.values]

    def on(self, grids: Sequence[np.ndarray]) -> list[np.ndarray]:
        arrays = self.values
        for k, g in enumerate(grids):
            arrays = _along(arrays, k, _spline_matrix(self.grids[k], g))
        return arrays

    def max_error(self, nodes: Sequence[np.ndarray]) -> float:
        """The grid's worst relative error at the reference points and at its own cell centres
        (there the surrogate stands in for the simulator)."""
        axes = [Axis(name, tuple(g)) for name, g in zip(self.names, nodes, strict=True)]
        values = self.on(nodes)
        worst = rel_errors(axes, values, self.points, self.flat, self.floor).max()
        mids = [(g[:-1] + g[1:]) / 2 for g in nodes]
        centres = [v.ravel() for v in self.on(mids)]
        return float(max(worst, rel_errors(axes, values, _mesh(mids), centres, self.floor).max()))

    def interval_errors(self, nodes: Sequence[np.ndarray], k: int) -> np.ndarray:
        """Per interval of axis ``k``: the largest relative error of interpolating along that
        axis alone, at the interval's midpoint, over the reference values of the other axes."""
        g = nodes[k]
        mids = (g[:-1] + g[1:]) / 2
        at_nodes = _along(self.values, k, _spline_matrix(self.grids[k], g))
        at_mids = _along(self.values, k, _spline_matrix(self.grids[k], mids))
        worst = np.zeros(mids.size)
        for a, m in zip(at_nodes, at_mids, strict=True):
            a, m = np.moveaxis(a, k, 0), np.moveaxis(m, k, 0)
            err = np.abs((a[:-1] + a[1:]) / 2 - m) / np.maximum(np.abs(m), self.floor)
            worst = np.maximum(worst, err.reshape(mids.size, -1).max(axis=1))
        return worst

    def curvature_start(self, k: int, n: int) -> np.ndarray:
        """A first placement on axis ``k`` from the reference's relative second differences."""
        g = self.grids[k]
        h = np.diff(g)
        density = np.zeros(h.size)
        for v in self.values:
            a = np.moveaxis(v, k, 0).reshape(g.size, -1)
            slope = np.diff(a, axis=0) / h[:, None]
            second = 2 * np.diff(slope, axis=0) / (h[:-1] + h[1:])[:, None]
            rel = np.abs(second) / np.maximum(np.abs(a[1:-1]), self.floor)
            c = rel.max(axis=1)  # at interior nodes
            ends = np.maximum(np.concatenate([[c[0]], c]), np.concatenate([c, [c[-1]]]))
            density = np.maximum(density, np.sqrt(ends))
        return _equidistribute(g, density, n)


def _polish(s: _Surrogate, nodes: list[np.ndarray], error: float) -> tuple[list, float]:
    """Move one interior point at a time toward a neighbour while the largest error falls:
    equalising intervals along each axis alone cannot see where the two axes' errors add up."""
    for _ in range(POLISH_SWEEPS):
        improved = False
        for k, g in enumerate(nodes):
            for i in range(1, g.size - 1):
                for step in POLISH_STEPS:
                    trial = nodes[k].copy()
                    neighbour = trial[i + 1] if step > 0 else trial[i - 1]
                    trial[i] += abs(step) * (neighbour - trial[i])
                    candidate = [trial if j == k else x for j, x in enumerate(nodes)]
                    e = s.max_error(candidate)
                    if e < error:
                        nodes, error, improved = candidate, e, True
        if not improved:
            break
    return nodes, error


def optimized_axes(
    axes: Sequence[Axis], values: Sequence[np.ndarray], n: int, floor: float
) -> tuple[tuple[np.ndarray, ...], float]:
    """Index values, ``n`` per axis over the range of ``axes``, that minimise the largest
    relative interpolation error of the reference tables ``values``; and that error as the
    surrogate predicts it.

    A start from the reference's curvature, rounds of equalising the intervals' errors along
    each axis, then a direct descent on the largest error.
    """
    s = _Surrogate(axes, values, floor)
    nodes = [s.curvature_start(k, n) for k in range(len(axes))]
    best, best_error = list(nodes), s.max_error(nodes)
    for _ in range(ROUNDS):
        for k in range(len(nodes)):
            g = nodes[k]
            curvature = s.interval_errors(nodes, k) / np.diff(g) ** 2
            target = _equidistribute(g, np.sqrt(curvature), n)
            nodes[k] = (1 - DAMPING) * g + DAMPING * target
        error = s.max_error(nodes)
        if error < best_error:
            best, best_error = list(nodes), error
    best, best_error = _polish(s, best, best_error)
    return tuple(best), best_error


def table_label(key: tuple[str, str]) -> str:
    when, quantity = key
    return f"when {when}: {quantity}" if when else quantity


def _grid_points(series: dict, arc: Arc, axes: Sequence[Axis]) -> dict:
    """(key, index tuple) → the sweep point that measures it; ``series`` as
    ``fidelity.row_points`` gives it."""
    out = {}
    shape = [range(len(a)) for a in axes]
    for state in arc.states:
        # In input-edge order; a clear or preset arc moves its output one way only.
        edges = [state.output_edge(e) for e in EDGES]
        for out_edge in (e for e in edges if e in arc.output_edges):
            for quantity in (delay_quantity(out_edge), transition_quantity(out_edge)):
                row = row_point_of(series, arc, state, quantity)
                for index in itertools.product(*shape):
                    coords = [a.values[i] for a, i in zip(axes, index, strict=True)]
                    point = timing_point(row, axes, coords)
                    out[((state.when, quantity), index)] = point
    return out


def _surface(axes: Sequence[Axis], points: dict, outcomes: dict) -> Surface:
    values: dict[tuple[str, str], np.ndarray] = {}
    failures = []
    for (key, index), point in points.items():
        outcome = outcomes[point]
        array = values.setdefault(key, np.full(tuple(len(a) for a in axes), np.nan))
        if isinstance(outcome, Measurement):
            array[index] = measured(outcome, key[1])
        else:
            failures.append(outcome)
    return Surface(tuple(axes), values, tuple(dict.fromkeys(failures)))


def centres(axes: Sequence[Axis]) -> tuple[Axis, ...]:
    """The grid of a grid's cell centres."""
    return tuple(
        Axis(a.name, tuple((np.asarray(a.values)[:-1] + np.asarray(a.values)[1:]) / 2))
        for a in axes
    )


def _judge(
    placement: str,
    size: int,
    surface: Surface,
    middle: Surface,
    reference: Surface,
    floor: float,
    predicted: float | None = None,
) -> Candidate:
    """Errors at every reference point and, where they peak for a smooth response, at the
    candidate's own cell centres (``middle``), both simulated; RMS over the reference only, a
    sample the same for every candidate."""
    failed = len(surface.failures) + len(middle.failures)
    if failed:
        return Candidate(
            placement, size, surface.axes, None, None, None, None, None, predicted, failed
        )
    keys = list(reference.values)
    values = [surface.values[k] for k in keys]
    rel_parts, dev_parts, where = [], [], []
    for truth_surface in (reference, middle):
        at = _mesh([np.asarray(a.values) for a in truth_surface.axes])
        truth = np.array([truth_surface.values[k].ravel() for k in keys])
        dev = deviations(surface.axes, values, at, truth)
        rel_parts.append(dev / np.maximum(np.abs(truth), floor))
        dev_parts.append(dev)
        where.append(at)
    rel, at = np.concatenate(rel_parts, axis=1), np.concatenate(where)
    table, point = np.unravel_index(int(np.argmax(rel)), rel.shape)
    return Candidate(
        placement=placement,
        size=size,
        axes=surface.axes,
        max_rel=float(rel.max()),
        rms_rel=float(np.sqrt(np.mean(rel_parts[0] ** 2))),
        max_abs=float(max(d.max() for d in dev_parts)),
        worst_table=table_label(keys[table]),
        worst_at=tuple(float(x) for x in at[point]),
        predicted_max_rel=predicted,
        failures=0,
    )


def recommend(candidates: Sequence[Candidate], target: float) -> Recommendation:
    passing = [c for c in candidates if c.max_rel is not None and c.max_rel <= target]
    needed = []
    tried = {c.placement for c in candidates}
    for placement in (p for p in PLACEMENTS if p in tried):
        mine = [c for c in passing if c.placement == placement]
        needed.append((placement, min(mine, key=lambda c: c.points) if mine else None))
    best = min(passing, key=lambda c: (c.points, c.max_rel)) if passing else None
    return Recommendation(target, tuple(needed), best)


# (axis name, lowest, highest value) per axis of the studied grid.
Span = tuple[tuple[str, float, float], ...]


def _span(config: LibraryConfig, cell_name: str) -> Span:
    """The range of the cell's grid on each axis; a study needs more than one value on each."""
    grid = config.cell(cell_name).grid
    span = (
        (SLEW_AXIS, min(grid.slew), max(grid.slew)),
        (LOAD_AXIS, min(grid.load), max(grid.load)),
    )
    for name, lo, hi in span:
        if not lo < hi:
            raise ConfigError(
                f"the grid study needs a range on every axis; {name} has the one value {lo:g}",
                cell=cell_name,
            )
    return span


def choose_arc(config: LibraryConfig, cell_name: str, arc: str | None) -> Arc:
    """The cell's arc ``FROM:TO`` (related input : output); its first arc when not given."""
    arcs = arcs_of(config.cell(cell_name))
    if arc is None:
        return arcs[0]
    related, _, output = arc.partition(":")
    for a in arcs:
        if a.related == related and a.output == output:
            return a
    names = ", ".join(f"{a.related}:{a.output}" for a in arcs)
    raise ConfigError(f"no arc {arc!r}; the cell's arcs are {names}", cell=cell_name)


def _candidate_axes(
    config: LibraryConfig, span: Span, per_axis: Sequence[np.ndarray]
) -> tuple[Axis, ...]:
    """A candidate grid's axes, its values rounded in library units (``rounded``)."""
    return tuple(
        Axis(name, rounded(v, axis_unit(config, name)[1]))
        for (name, _, _), v in zip(span, per_axis, strict=True)
    )


def _fixed_grids(
    config: LibraryConfig, span: Span, sizes: Sequence[int]
) -> dict[tuple[str, int], tuple[Axis, ...]]:
    """The uniform and geometric candidates of every size: the ones that need no reference."""
    grids: dict[tuple[str, int], tuple[Axis, ...]] = {}
    for n in sizes:
        for placement, place in (("uniform", uniform), ("geometric", geometric)):
            placed = [place(lo, hi, n) for _, lo, hi in span]
            per_axis = [v for v in placed if v is not None]
            if len(per_axis) == len(placed):
                grids[(placement, n)] = _candidate_axes(config, span, per_axis)
    return grids


def _optimized_grids(
    config: LibraryConfig, span: Span, ref: Surface, sizes: Sequence[int], floor: float
) -> tuple[dict[tuple[str, int], tuple[Axis, ...]], dict[int, float]]:
    """The optimized candidates of every size, placed on the simulated reference, and the
    largest error the optimizer predicts for each."""
    values = list(ref.values.values())
    grids, predicted = {}, {}
    for n in sizes:
        nodes, predicted[n] = optimized_axes(ref.axes, values, n, floor)
        grids[("optimized", n)] = _candidate_axes(config, span, nodes)
    return grids, predicted


def _whole(ref: Surface, cell_name: str, arc: Arc) -> Surface:
    """The reference, which must have simulated at every point."""
    if ref.failures:
        first = ref.failures[0]
        raise MeasurementError(
            f"{len(ref.failures)} reference point(s) failed; the study needs all of them. "
            f"First: {first.reason}",
            cell=cell_name,
            arc=arc.label,
            point=first.point.label,
        )
    return ref


def _candidates(
    grids: dict[tuple[str, int], tuple[Axis, ...]],
    point_maps: dict[tuple[str, int], tuple[dict, dict]],
    outcomes: dict,
    ref: Surface,
    floor: float,
    predicted: dict[int, float],
) -> tuple[Candidate, ...]:
    """Every candidate judged, by placement (in ``PLACEMENTS`` order), then size."""
    order = sorted(grids, key=lambda key: (PLACEMENTS.index(key[0]), key[1]))
    return tuple(
        _judge(
            placement,
            n,
            _surface(grids[(placement, n)], point_maps[(placement, n)][0], outcomes),
            _surface(centres(grids[(placement, n)]), point_maps[(placement, n)][1], outcomes),
            ref,
            floor,
            predicted.get(n) if placement == "optimized" else None,
        )
        for placement, n in order
    )


def study(
    config: LibraryConfig,
    cell_name: str,
    arc: str | None = None,
    *,
    sizes: Sequence[int] = SIZES,
    reference_points: int = REFERENCE_POINTS,
    targets: Sequence[float] = (0.01,),
    jobs: int | None = None,
    on_start: Callable[[int], None] | None = None,
    on_result: Callable[[object], None] | None = None,
) -> Study:
    """Simulate the reference and every candidate grid of one arc; judge and recommend.

    Two sweeps: the reference with the uniform and geometric candidates, then the optimized
    candidates, whose placement needs the reference.
    """
    start = time.perf_counter()
    config = shaped(config, jobs=jobs)  # a driver's input shape, measured once for the study
    the_arc = choose_arc(config, cell_name, arc)
    floor = config.fidelity.rel_floor
    span = _span(config, cell_name)
    reference = tuple(
        Axis(name, tuple(reference_axis(lo, hi, reference_points).tolist()))
        for name, lo, hi in span
    )
    grids = _fixed_grids(config, span, sizes)

    series = row_points(config, cell_name)
    outcomes: dict = {}
    ref_points = _grid_points(series, the_arc, reference)
    point_maps = {key: _maps_of(series, the_arc, axes) for key, axes in grids.items()}
    maps = [ref_points, *(m for pair in point_maps.values() for m in pair)]
    _simulate(config, maps, outcomes, jobs, on_start, on_result)
    ref = _whole(_surface(reference, ref_points, outcomes), cell_name, the_arc)
    optimized, predicted = _optimized_grids(config, span, ref, sizes, floor)
    grids.update(optimized)
    point_maps.update((key, _maps_of(series, the_arc, axes)) for key, axes in optimized.items())
    maps = [m for key in optimized for m in point_maps[key]]
    _simulate(config, maps, outcomes, jobs, on_start, on_result)
    candidates = _candidates(grids, point_maps, outcomes, ref, floor, predicted)
    return Study(
        cell=cell_name,
        related=the_arc.related,
        output=the_arc.output,
        floor=floor,
        reference=reference,
        candidates=candidates,
        recommendations=tuple(recommend(candidates, t) for t in targets),
        points=len(outcomes),
        wall_seconds=time.perf_counter() - start,
    )


def _maps_of(series: dict, the_arc: Arc, axes: Sequence[Axis]) -> tuple[dict, dict]:
    """The points of a grid and of its cell centres."""
    return (
        _grid_points(series, the_arc, axes),
        _grid_points(series, the_arc, centres(axes)),
    )


def _simulate(
    config: LibraryConfig,
    maps: Iterable[dict],
    outcomes: dict,
    jobs: int | None,
    on_start: Callable[[int], None] | None,
    on_result: Callable[[object], None] | None,
) -> None:
    """Add to ``outcomes`` the outcomes of the points of ``maps`` not yet simulated in this
    study (a point shared by several grids is simulated once)."""
    requested = dict.fromkeys(p for m in maps for p in m.values())
    unique = [p for p in requested if p not in outcomes]
    if on_start is not None:
        on_start(sweep.work(unique))
    outcomes.update((o.point, o) for o in sweep.run(config, unique, jobs=jobs, on_result=on_result))


def library_values(config: LibraryConfig, axis: Axis) -> list[float]:
    """An axis's values in library units, as short as the rounding made them."""
    _, scale, _ = axis_unit(config, axis.name)
    return [float(f"{v / scale:.12g}") for v in axis.values]


def paste_line(config: LibraryConfig, axes: Sequence[Axis]) -> str:
    """``grid = { slew = [...], load = [...] }``, for a ``[[cell]]`` table of the config."""
    parts = []
    for axis in axes:
        label, _, _ = axis_unit(config, axis.name)
        parts.append(f"{label} = [{', '.join(f'{v:g}' for v in library_values(config, axis))}]")
    return "grid = { " + ", ".join(parts) + " }"


def _index(config: LibraryConfig, axes: Sequence[Axis]) -> dict[str, list[float]]:
    """A grid's index values in library units by the axes' short names."""
    return {axis_unit(config, a.name)[0]: library_values(config, a) for a in axes}


def _candidate_record(config: LibraryConfig, c: Candidate) -> dict:
    return {
        "placement": c.placement,
        "points_per_axis": c.size,
        "table_points": c.points,
        "index": _index(config, c.axes),
        "max_rel_error": c.max_rel,
        "rms_rel_error": c.rms_rel,
        "max_abs_error_s": c.max_abs,
        "worst_table": c.worst_table,
        "worst_at": None
        if c.worst_at is None
        else {
            axis_unit(config, a.name)[0]: x / axis_unit(config, a.name)[1]
            for a, x in zip(c.axes, c.worst_at, strict=True)
        },
        "predicted_max_rel_error": c.predicted_max_rel,
        "failed_points": c.failures,
    }


def savings(s: Study, rec: Recommendation) -> dict[str, tuple[int, bool]]:
    """Table points the optimized grid saves at ``rec``'s target against each fixed spacing the
    study tried, with whether the number is exact. A spacing that met the target with no size
    tried saves at least the difference to the next size beyond the largest."""
    chosen = dict(rec.needed)
    mine = chosen["optimized"]
    if mine is None:
        return {}
    beyond = (max(c.size for c in s.candidates) + 1) ** 2
    out = {}
    for other in ("uniform", "geometric"):
        if s.curve(other):
            c = chosen[other]
            out[other] = (
                (beyond - mine.points, False) if c is None else (c.points - mine.points, True)
            )
    return out


def to_json(config: LibraryConfig, s: Study) -> dict:
    return {
        **head(config),
        "cell": s.cell,
        "arc": {"related_pin": s.related, "output": s.output},
        "library_units": library_units(config),
        "rel_floor_s": s.floor,
        "rel_error": "|interpolated - simulated| / max(|simulated|, rel_floor), over every table "
        "of the arc (each state, delay and transition, rise and fall) at every reference point",
        "reference": _index(config, s.reference),
        "points_simulated": s.points,
        "wall_seconds": round(s.wall_seconds, 3),
        "candidates": [_candidate_record(config, c) for c in s.candidates],
        "recommendations": [
            {
                "target_rel_error": r.target,
                "points_per_axis": {p: (c.size if c else None) for p, c in r.needed},
                "table_points": {p: (c.points if c else None) for p, c in r.needed},
                "optimized_saves_points": {
                    other: {"points": n, "exact": exact}
                    for other, (n, exact) in savings(s, r).items()
                },
                "best": None if r.best is None else _candidate_record(config, r.best),
                "paste": None if r.best is None else paste_line(config, r.best.axes),
            }
            for r in s.recommendations
        ],
    }


def summary_lines(config: LibraryConfig, s: Study) -> list[str]:
    ref_shape = "x".join(str(len(a)) for a in s.reference)
    lines = [
        f"grid study of {s.cell} {s.arc}: reference {ref_shape}, {s.points} points simulated in "
        f"{s.wall_seconds:.1f} s (relative error floor {show_time(s.floor, config.time_unit)})",
        f"  {'points':>7} " + " ".join(f"{p + ' max':>15} {'rms':>8}" for p in PLACEMENTS),
    ]
    sizes = sorted({c.size for c in s.candidates})
    by = {(c.placement, c.size): c for c in s.candidates}
    for n in sizes:
        row = []
        for p in PLACEMENTS:
            c = by.get((p, n))
            row.append(
                f"{'-':>15} {'-':>8}" if c is None else f"{pct(c.max_rel):>15} {pct(c.rms_rel):>8}"
            )
        lines.append(f"  {f'{n}x{n}':>7} " + " ".join(row))
    for r in s.recommendations:
        needed = ", ".join(
            f"{p} {c.size}x{c.size} ({c.points} points)"
            if c
            else f"{p} more than {sizes[-1]}x{sizes[-1]}"
            for p, c in r.needed
        )
        lines.append(f"target {r.target * 100:g} %: {needed}")
        if r.best is None:
            lines.append("  no candidate meets it; try larger --sizes")
            continue
        b = r.best
        lines.append(
            f"  recommended: {b.placement} {b.size}x{b.size}, max error {pct(b.max_rel)}; "
            f"for the [[cell]] table of {s.cell}:"
        )
        lines.append(f"  {paste_line(config, b.axes)}")
        largest = sizes[-1]
        parts = []
        for other, (n, exact) in savings(s, r).items():
            c = dict(r.needed)[other]
            if exact and c is not None:  # exact: a size tried met the target
                parts.append(f"{n} points against {other} ({c.size}x{c.size})")
            else:
                parts.append(
                    f"at least {n} points against {other} (not met by {largest}x{largest})"
                )
        if parts:
            lines.append("  the optimized placement saves " + ", ".join(parts))
    return lines
