"""Fidelity: how far the tables' interpolation is from the simulator between grid points.

Every table of every arc is checked at every cell centre of its grid, where linear interpolation
of a smooth response errs most (the error bound (x − x0)(x1 − x)/2 · |f''| peaks at the midpoint;
Burden & Faires, *Numerical Analysis*, 9th ed., 2010, sec. 3.1), and at a seeded Latin hypercube
of points inside the index range. The points are simulated through ``sweep.run`` like any
characterization point and compared with ``tables.interpolate``, the interpolation every reader
of the tables uses.

Relative errors divide by max(|simulated|, rel_floor): a delay near zero must not turn a small
absolute error into a huge relative one.

Where the tables carry error bars (``[error_bars]``), each table's largest and median error
bar, relative to its values the same way, are reported beside its interpolation error: the
simulator's own numerical error, against which an interpolation error can be read.
"""

from __future__ import annotations

import itertools
import math
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from scipy.stats import qmc

from charflow.analysis.reporting import head, library_units, pct, where
from charflow.config.library import Fidelity, LibraryConfig
from charflow.execution import sweep
from charflow.execution.store import Store
from charflow.plan import arcs as planning
from charflow.records.errors import TableError
from charflow.records.outcomes import Failure, Measurement
from charflow.records.points import Arc, State, TimingPoint
from charflow.records.units import show_time
from charflow.tables.table import Axis, Table, interpolate
from charflow.tables.tabulate import (
    LOAD_AXIS,
    OTHER_LOAD_AXIS,
    SLEW_AXIS,
    ArcTables,
    CellTables,
    relative_bars,
)

CENTRE, RANDOM = "centre", "random"
# The TimingPoint field each table axis sweeps (its name in reports: reporting.AXIS_LABELS).
POINT_FIELDS = {SLEW_AXIS: "slew", LOAD_AXIS: "load", OTHER_LOAD_AXIS: "other_load"}
PERCENTILE = 95.0


@dataclass(frozen=True, slots=True)
class Probe:
    """A point off the grid where a table is checked, one coordinate per table axis (SI)."""

    coords: tuple[float, ...]
    kind: str  # CENTRE | RANDOM


@dataclass(frozen=True, slots=True)
class Compared:
    coords: tuple[float, ...]
    kind: str
    simulated: float
    interpolated: float
    rel_error: float  # |interpolated − simulated| / max(|simulated|, floor)

    @property
    def error(self) -> float:
        """Signed: positive where the table overestimates."""
        return self.interpolated - self.simulated


@dataclass(frozen=True, slots=True)
class ErrorStats:
    count: int
    max_rel: float
    rms_rel: float
    p95_rel: float  # numpy's default percentile: linear between order statistics
    max_abs: float  # in the table's unit (s)
    worst: int  # index of the point with the largest relative error


@dataclass(frozen=True, slots=True)
class ErrorBarStats:
    """A table's error bars relative to its values (``[error_bars]``)."""

    max_rel: float
    median_rel: float
    over: int  # values whose bar is over ``[error_bars] warn_above``
    worst: tuple[float, ...]  # the coordinates of the largest


def error_bar_stats(table: Table, errors: Table, floor: float, limit: float) -> ErrorBarStats:
    """Relative error bars: each divided by max(|value|, floor), as interpolation errors are."""
    rel = relative_bars(table, errors, floor)
    worst = np.unravel_index(int(np.argmax(rel)), rel.shape)
    return ErrorBarStats(
        max_rel=float(rel.max()),
        median_rel=float(np.median(rel)),
        over=int(np.count_nonzero(rel > limit)),
        worst=tuple(a.values[i] for a, i in zip(table.axes, worst, strict=True)),
    )


@dataclass(frozen=True, slots=True)
class TableCheck:
    cell: str
    related: str
    output: str
    when: str  # the state's condition ("" when it needs none)
    default: bool  # the arc's worst-of-states table, checked for arcs with several states
    table: Table
    points: tuple[Compared, ...]
    failures: tuple[tuple[tuple[float, ...], str], ...]  # probes that did not simulate, and why
    stats: ErrorStats | None  # None when no probe simulated
    error_bars: ErrorBarStats | None = None  # None: the table has no error bars

    @property
    def arc(self) -> str:
        return f"{self.related}->{self.output}"

    @property
    def state(self) -> str:
        if self.default:
            return "worst of states"
        return f"when {self.when}" if self.when else ""

    @property
    def label(self) -> str:
        return " ".join(
            part for part in (self.cell, self.arc, self.state, self.table.quantity) if part
        )

    @property
    def worst_point(self) -> Compared | None:
        return None if self.stats is None else self.points[self.stats.worst]


@dataclass(frozen=True, slots=True)
class FidelityReport:
    settings: Fidelity
    checks: tuple[TableCheck, ...]
    points: int  # distinct points simulated
    simulations: int  # simulator runs, refinements and retries included
    wall_seconds: float

    @property
    def failures(self) -> int:
        return sum(len(c.failures) for c in self.checks)

    def ranked(self) -> list[TableCheck]:
        """Worst first."""
        return sorted(self.checks, key=severity, reverse=True)

    def max_rel_errors(self) -> np.ndarray:
        return np.array([c.stats.max_rel for c in self.checks if c.stats is not None])

    def spread(self) -> tuple[float, float] | None:
        """The worst and the median of the tables' largest relative errors; None when no probe
        simulated."""
        errors = self.max_rel_errors()
        return (float(errors.max()), float(np.median(errors))) if errors.size else None

    def bar_spread(self) -> tuple[float, float, int] | None:
        """The largest error bar of any table, the median of the tables' median error bars
        (both relative) and the values over ``warn_above``; None without error bars."""
        bars = [c.error_bars for c in self.checks if c.error_bars is not None]
        if not bars:
            return None
        worst = max(b.max_rel for b in bars)
        return worst, float(np.median([b.median_rel for b in bars])), sum(b.over for b in bars)


def severity(check: TableCheck) -> float:
    """For ranking: the largest relative error; a table with no simulated probe ranks first."""
    return math.inf if check.stats is None else check.stats.max_rel


def _along(grid: np.ndarray, u: float) -> float:
    """The value a fraction ``u`` of the way along the axis counted in cells, not in value:
    every cell gets its share of random points however unevenly the index values are spaced."""
    return float(np.interp(u * (grid.size - 1), np.arange(grid.size), grid))


def probes(axes: Sequence[Axis], random_points: int, seed: int) -> tuple[Probe, ...]:
    """Every cell centre of the grid, then ``random_points`` Latin-hypercube points inside it.

    An axis with a single value contributes that value. Random points that land exactly on a
    grid line (probability zero, but cheap to rule out) are dropped: every probe is off the grid.
    """
    grids = [np.asarray(axis.values, dtype=np.float64) for axis in axes]
    mids = [(g[:-1] + g[1:]) / 2 if g.size > 1 else g for g in grids]
    found = [Probe(tuple(float(c) for c in corner), CENTRE) for corner in itertools.product(*mids)]
    if random_points:
        unit = qmc.LatinHypercube(d=len(grids), rng=seed).random(random_points)
        for row in unit:
            coords = tuple(_along(g, u) for g, u in zip(grids, row, strict=True))
            if not any(g.size > 1 and c in g for g, c in zip(grids, coords, strict=True)):
                found.append(Probe(coords, RANDOM))
    return tuple(found)


def compare(
    table: Table, at: Sequence[Probe], simulated: Sequence[float], floor: float
) -> tuple[Compared, ...]:
    """The table interpolated at each probe against the value simulated there."""
    if not at:
        return ()
    interpolated = interpolate(table, [p.coords for p in at])
    sim = np.asarray(simulated, dtype=np.float64)
    rel = np.abs(interpolated - sim) / np.maximum(np.abs(sim), floor)
    return tuple(
        Compared(p.coords, p.kind, float(s), float(i), float(r))
        for p, s, i, r in zip(at, sim, interpolated, rel, strict=True)
    )


def statistics(points: Sequence[Compared]) -> ErrorStats:
    rel = np.array([p.rel_error for p in points])
    absolute = np.array([abs(p.error) for p in points])
    return ErrorStats(
        count=len(points),
        max_rel=float(rel.max()),
        rms_rel=float(np.sqrt(np.mean(rel**2))),
        p95_rel=float(np.percentile(rel, PERCENTILE)),
        max_abs=float(absolute.max()),
        worst=int(np.argmax(rel)),
    )


def output_edge(quantity: str) -> str:
    """The output edge of a timing table: ``cell_rise`` and ``rise_transition`` → ``rise``."""
    return quantity.removeprefix("cell_").removesuffix("_transition")


def row_points(config: LibraryConfig, cell: str) -> dict[tuple, TimingPoint]:
    """A plan point of every (related pin, output, state, output edge) of ``cell``: what a
    point off the grid shares with it (side inputs, input edge, kind, a flip-flop's captured
    data; for a 3D table the other output's load, unless its axis is given)."""
    out: dict[tuple, TimingPoint] = {}
    for p in planning.plan(config, [cell]).points:
        if isinstance(p, TimingPoint):
            out.setdefault((p.related, p.output, p.state_side, p.output_edge), p)
    return out


def timing_point(row: TimingPoint, axes: Sequence[Axis], coords: Sequence[float]) -> TimingPoint:
    """The point of ``row``'s series at ``coords`` on ``axes``."""
    fields: dict[str, Any] = {}  # TimingPoint's coordinate fields
    for axis, value in zip(axes, coords, strict=True):
        if axis.name not in POINT_FIELDS:
            raise TableError(f"no sweep coordinate for table axis {axis.name!r}", cell=row.cell)
        fields[POINT_FIELDS[axis.name]] = float(value)
    return replace(row, **fields)


def row_point_of(
    points: dict[tuple, TimingPoint], arc: Arc, state: State, quantity: str
) -> TimingPoint:
    side = state.side if arc.kind == "combinational" else ()
    return points[(arc.related, arc.output, side, output_edge(quantity))]


def measured(outcome: Measurement, quantity: str) -> float:
    return outcome.delay if quantity.startswith("cell_") else outcome.transition


@dataclass(frozen=True, slots=True)
class _Work:
    """One table to check: its probes and, per probe, the points whose worst value it holds."""

    cell: str
    arc: ArcTables
    when: str
    default: bool
    table: Table
    probes: tuple[Probe, ...]
    points: tuple[tuple[TimingPoint, ...], ...]
    errors: Table | None  # the table's error bars, when it has them


def _work(config: LibraryConfig, cells: Iterable[CellTables], settings: Fidelity) -> list[_Work]:
    work = []
    for cell in cells:
        name = cell.cell.name
        series = row_points(config, name)
        for arc in cell.arcs:
            # (table, states it is the worst of, when, default, its error bars)
            targets: list[tuple[Table, tuple[State, ...], str, bool, Table | None]] = [
                (t, (st.state,), st.state.when, False, _errors_of(st.errors, t))
                for st in arc.states
                for t in st.tables
            ]
            if len(arc.states) > 1:
                for t in arc.default:
                    having = tuple(
                        st.state
                        for st in arc.states
                        if any(s.quantity == t.quantity for s in st.tables)
                    )
                    targets.append((t, having, "", True, _errors_of(arc.default_errors, t)))
            for table, states, when, default, errors in targets:
                at = probes(table.axes, settings.random_points, settings.seed)
                points = tuple(
                    tuple(
                        timing_point(
                            row_point_of(series, arc.arc, s, table.quantity), table.axes, p.coords
                        )
                        for s in states
                    )
                    for p in at
                )
                work.append(_Work(name, arc, when, default, table, at, points, errors))
    return work


def _errors_of(errors: tuple[Table, ...], table: Table) -> Table | None:
    return next((e for e in errors if e.quantity == table.quantity), None)


def _check(config: LibraryConfig, w: _Work, outcomes: dict) -> TableCheck:
    floor = config.fidelity.rel_floor
    kept, values, failures = [], [], []
    for probe, points in zip(w.probes, w.points, strict=True):
        outs = [outcomes[p] for p in points]
        failed = [o for o in outs if isinstance(o, Failure)]
        if failed:
            failures.append((probe.coords, failed[0].reason))
        else:
            kept.append(probe)
            values.append(max(measured(o, w.table.quantity) for o in outs))
    compared = compare(w.table, kept, values, floor)
    return TableCheck(
        cell=w.cell,
        related=w.arc.arc.related,
        output=w.arc.arc.output,
        when=w.when,
        default=w.default,
        table=w.table,
        points=compared,
        failures=tuple(failures),
        stats=statistics(compared) if compared else None,
        error_bars=None
        if w.errors is None
        else error_bar_stats(w.table, w.errors, floor, config.error_bars.warn_above),
    )


def check(
    config: LibraryConfig,
    cells: Sequence[CellTables],
    *,
    jobs: int | None = None,
    store: Store | None = None,
    on_start: Callable[[int], None] | None = None,
    on_stored: Callable[[tuple], None] | None = None,
    on_result: Callable[[object], None] | None = None,
) -> FidelityReport:
    """Re-simulate every table of ``cells`` off its grid and compare; one sweep for all of them.
    With a ``store``, points it holds are not simulated again (see ``sweep.run``)."""
    start = time.perf_counter()
    settings = config.fidelity
    work = _work(config, cells, settings)
    unique = list(dict.fromkeys(p for w in work for per_probe in w.points for p in per_probe))
    if on_start is not None:
        on_start(sweep.work(unique))
    outcomes = {
        o.point: o
        for o in sweep.run(
            config, unique, jobs=jobs, store=store, on_stored=on_stored, on_result=on_result
        )
    }
    checks = tuple(_check(config, w, outcomes) for w in work)
    runs = sum(o.runs for o in outcomes.values() if isinstance(o, Measurement))
    return FidelityReport(settings, checks, len(unique), runs, time.perf_counter() - start)


def _stats_record(stats: ErrorStats | None, check: TableCheck) -> dict | None:
    if stats is None:
        return None
    worst = check.points[stats.worst]
    return {
        "points": stats.count,
        "max_rel_error": stats.max_rel,
        "rms_rel_error": stats.rms_rel,
        "p95_rel_error": stats.p95_rel,
        "max_abs_error": stats.max_abs,
        "worst": {"index": list(worst.coords), "kind": worst.kind, "error": worst.error},
    }


def _table_record(c: TableCheck) -> dict:
    return {
        "quantity": c.table.quantity,
        "unit": c.table.unit,
        "axes": [{"name": a.name, "values": list(a.values)} for a in c.table.axes],
        "statistics": _stats_record(c.stats, c),
        "error_bars": None
        if c.error_bars is None
        else {
            "max_rel": c.error_bars.max_rel,
            "median_rel": c.error_bars.median_rel,
            "over_warn_above": c.error_bars.over,
            "worst": {"index": list(c.error_bars.worst)},
        },
        "compared": [
            {
                "kind": p.kind,
                "index": list(p.coords),
                "simulated": p.simulated,
                "interpolated": p.interpolated,
                "error": p.error,
                "rel_error": p.rel_error,
            }
            for p in c.points
        ],
        "failed": [{"index": list(coords), "reason": why} for coords, why in c.failures],
    }


def to_json(config: LibraryConfig, report: FidelityReport) -> dict:
    """Per cell, arc, state and table: the statistics and every compared point, in SI units."""
    cells: dict[str, dict[tuple[str, str], dict[tuple[str, bool], list[dict]]]] = {}
    for c in report.checks:
        arcs = cells.setdefault(c.cell, {})
        states = arcs.setdefault((c.related, c.output), {})
        states.setdefault((c.when, c.default), []).append(_table_record(c))
    spread = report.spread()
    s = report.settings
    return {
        **head(config),
        "units": {"time": "s", "capacitance": "F", "rel_error": "fraction"},
        "library_units": library_units(config),
        "settings": {
            "random_points": s.random_points,
            "seed": s.seed,
            "rel_floor_s": s.rel_floor,
            "probes": "every cell centre of the grid + random_points Latin-hypercube points",
            "rel_error": "|interpolated - simulated| / max(|simulated|, rel_floor)",
        },
        "summary": {
            "tables": len(report.checks),
            "points_simulated": report.points,
            "simulations": report.simulations,
            "failed_probes": report.failures,
            "worst_max_rel_error": None if spread is None else spread[0],
            "median_max_rel_error": None if spread is None else spread[1],
            "wall_seconds": round(report.wall_seconds, 3),
            **_bar_summary(report),
        },
        "cells": [
            {
                "name": cell,
                "arcs": [
                    {
                        "related_pin": related,
                        "output": output,
                        "states": [
                            {"when": when, "worst_of_states": default, "tables": tables}
                            for (when, default), tables in states.items()
                        ],
                    }
                    for (related, output), states in arcs.items()
                ],
            }
            for cell, arcs in cells.items()
        ],
    }


def _bar_summary(report: FidelityReport) -> dict:
    spread = report.bar_spread()
    if spread is None:
        return {}
    return {
        "error_bars": {
            "worst_max_rel": spread[0],
            "median_median_rel": spread[1],
            "over_warn_above": spread[2],
        }
    }


def summary_lines(config: LibraryConfig, report: FidelityReport, count: int = 10) -> list[str]:
    """The terminal summary: the settings, the spread over tables, the worst tables."""
    t, tu = config.time_scale, config.time_unit
    s = report.settings
    spread = report.spread()
    lines = [
        f"fidelity of {config.name}: {len(report.checks)} tables, {report.points} points "
        f"simulated off the grid in {report.wall_seconds:.1f} s "
        f"(cell centres + {s.random_points} Latin-hypercube points per table, seed {s.seed}; "
        f"relative error floor {show_time(s.rel_floor, tu)})"
    ]
    if spread is not None:
        lines.append(
            f"max relative error per table: worst {pct(spread[0])}, median {pct(spread[1])}"
        )
    lines.append(
        f"  {'max rel':>9} {'rms rel':>9} {'p95 rel':>9} {'max abs ' + tu:>11}  table, worst point"
    )
    for check in report.ranked()[:count]:
        if check.stats is None:
            lines.append(f"  {'-':>9} {'-':>9} {'-':>9} {'-':>11}  {check.label}: no probe ran")
            continue
        st = check.stats
        at = where(config, check.table.axes, check.points[st.worst].coords)
        lines.append(
            f"  {pct(st.max_rel):>9} {pct(st.rms_rel):>9} {pct(st.p95_rel):>9} "
            f"{st.max_abs / t:>11.4g}  {check.label}, at {at}"
        )
    lines += bar_lines(config, report, count)
    if report.failures:
        lines.append(f"{report.failures} probe(s) failed to simulate; see the JSON for reasons")
    return lines


def bar_lines(config: LibraryConfig, report: FidelityReport, count: int = 10) -> list[str]:
    """The error bars' summary: the spread over tables, the tables with the largest."""
    spread = report.bar_spread()
    if spread is None:
        return []
    limit = config.error_bars.warn_above
    lines = [
        f"error bars (simulator's numerical error, [error_bars]): largest {pct(spread[0])}, "
        f"median of the tables' medians {pct(spread[1])}; {spread[2]} value(s) over "
        f"{pct(limit)}",
        f"  {'max bar':>9} {'median':>9} {'over':>5}  table, largest at",
    ]
    barred = [c for c in report.checks if c.error_bars is not None]
    barred.sort(key=lambda c: c.error_bars.max_rel if c.error_bars else 0.0, reverse=True)
    for check in barred[:count]:
        b = check.error_bars
        assert b is not None  # kept above
        at = where(config, check.table.axes, b.worst)
        lines.append(
            f"  {pct(b.max_rel):>9} {pct(b.median_rel):>9} {b.over:>5}  {check.label}, at {at}"
        )
    return lines
