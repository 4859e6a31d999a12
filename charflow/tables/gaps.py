"""Filling the gaps failed points leave, by a method the user names (``--allow-gaps``).

No method is the default: without one a failed point stops the Liberty file. A filled value
comes only from measured points of the same table (same arc, state, edges; for setup and hold
the same pin, kind and edges), never from another filled value, and is never stored.

``linear``: along the table's row (timing: the load axis at the same slew and other load;
setup/hold: the clock-slew axis at the same data slew) from the two nearest measured points,
interpolated between the nearest one on each side, or extrapolated linearly from the two nearest
on one side at a row end. A row with fewer than two measured points falls back to the column
(timing: the slew axis; setup/hold: the data-slew axis). Interpolation is linear in the axis
value (F or s), not in the index.

``nearest``: the values of the measured point nearest in index distance (the sum of the index
steps over the axes). A tie goes to the point in the same row (same slew and other load, or
same data slew), then to the one with the smaller indices (sharper slew, lighter load).

Minimum pulse widths (one value per pin and level) and points with no measured neighbour to
take values from cannot be filled: they stay failures.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from charflow.records.errors import ConfigError
from charflow.records.outcomes import INTERNAL, Failure, Measurement, SearchResult
from charflow.records.points import ConstraintPoint, Plan, Point, PulsePoint, TimingPoint, Work

METHODS = ("linear", "nearest")
Record = Measurement | SearchResult  # what a measured (or filled) fillable point has
ROW, COLUMN = 1, 0  # the axes ``linear`` goes along, first and as a fallback


@dataclass(frozen=True, slots=True)
class Filled:
    failure: Failure  # the point and the reason (and waveform) the filled values replace
    record: Measurement | SearchResult  # the filled values; runs 0: nothing was simulated
    method: str
    sources: tuple[Point, ...]  # the measured points the values came from
    along: str  # linear: the axis followed ("load", "slew", ...); nearest: "grid"


@dataclass(frozen=True, slots=True)
class Unfilled:
    failure: Failure
    why: str


@dataclass(frozen=True, slots=True)
class GapReport:
    method: str
    filled: tuple[Filled, ...]
    unfilled: tuple[Unfilled, ...]

    @property
    def records(self) -> tuple[Measurement | SearchResult, ...]:
        return tuple(f.record for f in self.filled)

    @property
    def remaining(self) -> tuple[Failure, ...]:
        return tuple(u.failure for u in self.unfilled)


def _place(p: Work) -> tuple[tuple[object, ...], tuple[float, ...], tuple[str, ...]] | None:
    """(table key, coordinates, axis names) of a point that sits on a fillable grid."""
    if not p.FILLABLE:
        return None
    return p.series, p.coordinates, p.AXES[: len(p.coordinates)]


class _Grid:
    """The measured points of one table, by coordinates, and each axis's values."""

    def __init__(self, names: tuple[str, ...]) -> None:
        self.names = names
        self.values: list[set[float]] = [set() for _ in names]
        self.measured: dict[tuple[float, ...], Record] = {}
        self._positions: list[dict[float, int]] | None = None

    def index(self, coords: tuple[float, ...]) -> tuple[int, ...]:
        if self._positions is None:
            self._positions = [{v: i for i, v in enumerate(sorted(vs))} for vs in self.values]
        return tuple(pos[c] for pos, c in zip(self._positions, coords, strict=True))


def _grids(plan: Plan, measurements: Sequence[Record]) -> dict[tuple[object, ...], _Grid]:
    grids: dict[tuple[object, ...], _Grid] = {}
    for p in plan.points:
        place = _place(p)
        if place is not None:
            key, coords, names = place
            grid = grids.setdefault(key, _Grid(names))
            for axis, c in zip(grid.values, coords, strict=True):
                axis.add(c)
    for m in measurements:
        place = _place(m.point)
        if place is not None and place[0] in grids:
            grids[place[0]].measured[place[1]] = m
    return grids


def _linear(grid: _Grid, coords: tuple[float, ...]) -> tuple[list[Record], list[float], str] | None:
    """Sources and weights along the row, else the column; None when neither has two."""
    for axis in (ROW, COLUMN):
        line = sorted(
            (
                (c[axis], m)
                for c, m in grid.measured.items()
                if all(a == b for k, (a, b) in enumerate(zip(c, coords, strict=True)) if k != axis)
            ),
            key=lambda e: e[0],
        )
        if len(line) < 2:
            continue
        x = coords[axis]
        below = [e for e in line if e[0] < x]
        above = [e for e in line if e[0] > x]
        if below and above:
            (x1, m1), (x2, m2) = below[-1], above[0]
        elif below:
            (x1, m1), (x2, m2) = below[-2], below[-1]
        else:
            (x1, m1), (x2, m2) = above[0], above[1]
        w2 = (x - x1) / (x2 - x1)
        return [m1, m2], [1.0 - w2, w2], grid.names[axis]
    return None


def _nearest(
    grid: _Grid, coords: tuple[float, ...]
) -> tuple[list[Record], list[float], str] | None:
    if not grid.measured:
        return None
    here = grid.index(coords)

    def rank(item: tuple[tuple[float, ...], Record]) -> tuple[int, bool, tuple[int, ...]]:
        there = grid.index(item[0])
        distance = sum(abs(a - b) for a, b in zip(here, there, strict=True))
        same_row = all(a == b for k, (a, b) in enumerate(zip(here, there, strict=True)) if k != ROW)
        return distance, not same_row, there

    _, m = min(grid.measured.items(), key=rank)
    return [m], [1.0], "grid"


def _mix(values: Sequence[float], weights: Sequence[float]) -> float:
    return float(sum(w * v for w, v in zip(weights, values, strict=True)))


def _mix_known(values: Sequence[float | None], weights: Sequence[float]) -> float | None:
    """The mix where every source has the value, else None."""
    known = [v for v in values if v is not None]
    return _mix(known, weights) if len(known) == len(values) else None


def _side_charges(
    measured: list[Measurement], weights: list[float]
) -> tuple[tuple[str, str, float], ...]:
    """The side charges of a filled point, mixed from the sources that measured them alike
    (a flip-flop's clock points but those at the smallest load on every output measure none:
    only those give pin capacitance, ``sequential._short``); none where no source has them."""

    def pins(m: Measurement) -> tuple[tuple[str, str], ...]:
        return tuple((p, e) for p, e, _ in m.side_charges)

    most = max((pins(m) for m in measured), key=len)
    alike = [(m, w) for m, w in zip(measured, weights, strict=True) if most and pins(m) == most]
    total = sum(w for _, w in alike)
    if not alike or total == 0:
        return ()
    return tuple(
        (pin, edge, _mix([m.side_charges[k][2] for m, _ in alike], [w / total for _, w in alike]))
        for k, (pin, edge) in enumerate(most)
    )


def _record(point: Work, sources: list[Record], weights: list[float]) -> Record:
    # A grid holds one kind of point (its key starts with the kind): its sources are alike.
    if isinstance(point, ConstraintPoint):
        values = [s.value for s in sources if isinstance(s, SearchResult)]
        return SearchResult(point, _mix_known(values, weights), 0, 0.0)
    assert isinstance(point, TimingPoint)  # the only other FILLABLE kind
    measured = [s for s in sources if isinstance(s, Measurement)]
    return Measurement(
        point=point,
        delay=_mix([s.delay for s in measured], weights),
        transition=_mix([s.transition for s in measured], weights),
        input_charge=_mix([s.input_charge for s in measured], weights),
        runs=0,
        sim_seconds=0.0,
        stopped=0.0,  # never written: a filled record gives its values only
        supply_energy=_mix_known([s.supply_energy for s in measured], weights),
        internal_energy=_mix_known([s.internal_energy for s in measured], weights),
        side_charges=_side_charges(measured, weights),
        input_charge_to_threshold=_mix_known(
            [s.input_charge_to_threshold for s in measured], weights
        ),
        input_charge_slew_window=_mix_known(
            [s.input_charge_slew_window for s in measured], weights
        ),
    )


def check_method(method: str) -> None:
    if method not in METHODS:
        raise ConfigError(
            f"unknown gap-filling method {method!r}; choose one of {', '.join(METHODS)}"
        )


def fill_gaps(
    plan: Plan,
    measurements: Sequence[Measurement | SearchResult],
    failures: Sequence[Failure],
    method: str,
) -> GapReport:
    """Fill each failed point of ``plan`` from the measured ones by ``method`` (see the module
    text); every quantity of the point is filled (delay, transition, charges, energies, or a
    setup/hold value). Failures that cannot be filled are reported with the reason."""
    check_method(method)
    grids = _grids(plan, measurements)
    filled, unfilled = [], []
    for failure in failures:
        place = _place(failure.point)
        if failure.error == INTERNAL:
            why = "an internal error of charflow is never filled: please report it"
            unfilled.append(Unfilled(failure, why))
            continue
        if place is None:
            why = (
                "a minimum pulse width has no grid neighbours to fill it from"
                if isinstance(failure.point, PulsePoint)
                else "this kind of point is not filled"
            )
            unfilled.append(Unfilled(failure, why))
            continue
        key, coords, names = place
        grid = grids.get(key)
        found = None
        if grid is not None:
            found = (_linear if method == "linear" else _nearest)(grid, coords)
        if found is None:
            need = (
                f"two measured points along its {names[ROW]} or its {names[COLUMN]} axis"
                if method == "linear"
                else "a measured point in its table"
            )
            unfilled.append(Unfilled(failure, f"cannot be filled by {method}: it needs {need}"))
            continue
        sources, weights, along = found
        record = _record(failure.point, sources, weights)
        filled.append(Filled(failure, record, method, tuple(s.point for s in sources), along))
    return GapReport(method, tuple(filled), tuple(unfilled))
