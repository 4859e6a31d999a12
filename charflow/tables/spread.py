"""Sigma tables of delay and transition under transistor mismatch, and the statistics behind.

Linear method: each transistor's threshold moved to ±σ_i gives the one-sided changes u_i
(at +σ) and d_i (at −σ). σ = √Σ((u_i − d_i)/2)², the first-order sigma of a sum of
independent normal parameters. The late (slower) sigma is √Σ max(u_i, d_i, 0)², the early
√Σ min(u_i, d_i, 0)²: for one parameter whose effect is monotone these are exactly the
84.13th percentile less the nominal and the nominal less the 15.87th, so they differ where
the response is curved (second order, measured by the pair), and are equal where it is linear.
Monte Carlo: σ is the sample standard deviation; late and early are the same percentiles
taken from the samples, about the median.

The sparse sub-grid's sigmas are interpolated linearly in slew and load (and the other
output's load) to the table's points: sigma itself, not its ratio to the delay, whose
nominal can pass through zero on a slow input.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
from scipy.interpolate import RegularGridInterpolator

from charflow.records.errors import TableError
from charflow.records.names import delay_quantity, transition_quantity
from charflow.records.outcomes import DeviceShift, SpreadMeasurement
from charflow.records.points import Arc, State
from charflow.tables.table import Axis, Table
from charflow.tables.tabulate import CellTables, arc_axes

SIGMA_TYPES = ("early", "late")
ONE_SIGMA = 84.134474606854  # % of a normal distribution below its mean + 1σ (from memory)
CONFIDENCE_Z = 1.96  # two-sided 95 % of a normal distribution (common practice)


@dataclass(frozen=True, slots=True)
class Sigmas:
    """A quantity's spread at one point: symmetric, early and late (s)."""

    sigma: float
    early: float
    late: float

    def of(self, kind: str) -> float:
        return self.early if kind == "early" else self.late


def linear(shifts: Sequence[DeviceShift], quantity: str) -> Sigmas:
    """The spread of ``quantity`` ("delay" or "transition") from each transistor's ±σ runs."""
    pairs = np.array([getattr(s, quantity) for s in shifts], dtype=float).reshape(-1, 2)
    up, down = pairs[:, 0], pairs[:, 1]
    sigma = float(np.sqrt(np.sum(((up - down) / 2) ** 2)))
    late = float(np.sqrt(np.sum(np.maximum(np.maximum(up, down), 0.0) ** 2)))
    early = float(np.sqrt(np.sum(np.minimum(np.minimum(up, down), 0.0) ** 2)))
    return Sigmas(sigma, early, late)


def sampled(values: Sequence[float]) -> Sigmas:
    """The spread of Monte Carlo samples: standard deviation, and the one-sigma percentiles
    about the median."""
    x = np.asarray(values, dtype=float)
    low, median, high = np.percentile(x, (100 - ONE_SIGMA, 50.0, ONE_SIGMA))
    return Sigmas(float(np.std(x, ddof=1)), float(median - low), float(high - median))


def interval(sigma: float, samples: int, z: float = CONFIDENCE_Z) -> tuple[float, float]:
    """The confidence interval of a normal sample's standard deviation, by the normal
    approximation σ·(1 ± z/√(2(n−1))) (the large-sample standard error of s; e.g. Kendall &
    Stuart, The Advanced Theory of Statistics, vol. 1; from memory)."""
    half = z / np.sqrt(2.0 * (samples - 1))
    return sigma * (1 - half), sigma * (1 + half)


def contributions(shifts: Sequence[DeviceShift], quantity: str) -> dict[str, float]:
    """Each transistor's share of σ² of ``quantity`` (fractions summing to 1)."""
    parts = {
        s.device: ((getattr(s, quantity)[0] - getattr(s, quantity)[1]) / 2) ** 2 for s in shifts
    }
    total = sum(parts.values())
    return {k: (v / total if total > 0 else 0.0) for k, v in parts.items()}


def spread_of(m: SpreadMeasurement, quantity: str) -> Sigmas:
    """A spread measurement's sigmas of ``quantity``, whichever method made it."""
    if m.point.samples:
        return sampled(m.sampled_delays if quantity == "delay" else m.sampled_transitions)
    return linear(m.shifts, quantity)


@dataclass(frozen=True, slots=True)
class SigmaTable:
    table: Table  # quantity: the Liberty group, e.g. ocv_sigma_cell_rise
    sigma_type: str  # early | late


@dataclass(frozen=True, slots=True)
class ArcSpread:
    """The sigma tables of one arc's timing group: a state's, or (``when`` None) the
    largest over its states, as the arc's default tables are the worst case."""

    cell: str
    related: str
    output: str
    when: str | None
    tables: tuple[SigmaTable, ...]


def group(quantity: str, output_edge: str) -> str:
    """The Liberty variation group of ``quantity`` on ``output_edge``."""
    name = delay_quantity(output_edge) if quantity == "delay" else transition_quantity(output_edge)
    return f"ocv_sigma_{name}"


def tabulate(
    cells: Iterable[CellTables], measured: Sequence[SpreadMeasurement], method: str
) -> tuple[ArcSpread, ...]:
    """The sigma tables of every combinational arc the measurements cover: per state, and the
    arc's default (the largest over states)."""
    wanted = [m for m in measured if (m.point.samples > 0) == (method == "sampled")]
    out: list[ArcSpread] = []
    for cell in cells:
        for arc in (a for a in cell.arcs if a.arc.kind == "combinational"):
            states = [_state(cell, arc.arc, st.state, wanted) for st in arc.states]
            if not states or any(not s.tables for s in states):
                continue
            out += states if len(states) > 1 else []
            out.append(
                ArcSpread(cell.cell.name, arc.arc.related, arc.arc.output, None, _largest(states))
            )
    return tuple(out)


def _state(
    cell: CellTables, arc: Arc, state: State, measured: Sequence[SpreadMeasurement]
) -> ArcSpread:
    axes = arc_axes(cell.cell, arc)
    mine = [
        m
        for m in measured
        if m.point.cell == arc.cell
        and m.point.timing.related == arc.related
        and m.point.timing.output == arc.output
        and m.point.timing.state_side == state.side
    ]
    tables: list[SigmaTable] = []
    for edge in arc.output_edges:
        at_edge = [m for m in mine if m.point.timing.output_edge == edge]
        if not at_edge:
            return ArcSpread(arc.cell, arc.related, arc.output, state.when, ())
        for quantity in ("delay", "transition"):
            points = {m.point.coordinates: spread_of(m, quantity) for m in at_edge}
            for kind in SIGMA_TYPES:
                values = {k: v.of(kind) for k, v in points.items()}
                table = Table(axes, _spread(axes, values, arc), group(quantity, edge), "s")
                tables.append(SigmaTable(table, kind))
    return ArcSpread(arc.cell, arc.related, arc.output, state.when, tuple(tables))


def _spread(axes: tuple[Axis, ...], values: dict[tuple[float, ...], float], arc: Arc) -> np.ndarray:
    """``values`` (on a sub-grid of ``axes``) at every point of ``axes``, linearly between."""
    sub = [sorted({k[i] for k in values}) for i in range(len(axes))]
    grid = np.empty(tuple(len(s) for s in sub))
    for index in np.ndindex(grid.shape):
        key = tuple(s[i] for s, i in zip(sub, index, strict=True))
        if key not in values:
            raise TableError(
                f"no spread measured at {key} (a sub-grid point)", cell=arc.cell, arc=arc.label
            )
        grid[index] = values[key]
    full = np.meshgrid(*(np.array(a.values) for a in axes), indexing="ij")
    where = np.stack([f.ravel() for f in full], axis=-1)
    # An axis of one value (a sub-grid of one point) is constant along it.
    keep = [i for i, s in enumerate(sub) if len(s) > 1]
    if not keep:
        return np.full(tuple(len(a.values) for a in axes), grid.ravel()[0])
    squeezed = grid.reshape(tuple(len(sub[i]) for i in keep))
    interp = RegularGridInterpolator(tuple(np.array(sub[i]) for i in keep), squeezed)
    table: np.ndarray = interp(where[:, keep]).reshape(tuple(len(a.values) for a in axes))
    return table


def _largest(states: Sequence[ArcSpread]) -> tuple[SigmaTable, ...]:
    out = []
    for k, first in enumerate(states[0].tables):
        values = np.max([s.tables[k].table.values for s in states], axis=0)
        t = first.table
        out.append(SigmaTable(Table(t.axes, values, t.quantity, t.unit), first.sigma_type))
    return tuple(out)
