"""From measurements to tables: per arc and state, and the worst case over states.

Quantities follow Liberty's names: ``cell_rise``/``cell_fall`` (delay to a rising/falling
output) and ``rise_transition``/``fall_transition``. The arc's default table holds, point
by point, the largest value over its sensitizing states.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .config import CellSpec, LibraryConfig
from .errors import TableError
from .sweep import Arc, Plan, State, TimingPoint
from .tables import Axis, Table
from .timing import Measurement, pin_capacitance

SLEW_AXIS = "input_net_transition"
LOAD_AXIS = "total_output_net_capacitance"


def delay_quantity(output_edge: str) -> str:
    return f"cell_{output_edge}"


def transition_quantity(output_edge: str) -> str:
    return f"{output_edge}_transition"


@dataclass(frozen=True, slots=True)
class StateTables:
    state: State
    tables: tuple[Table, ...]


@dataclass(frozen=True, slots=True)
class ArcTables:
    arc: Arc
    default: tuple[Table, ...]  # worst case over states
    states: tuple[StateTables, ...]

    def table(self, quantity: str) -> Table | None:
        return next((t for t in self.default if t.quantity == quantity), None)


@dataclass(frozen=True, slots=True)
class PinCap:
    pin: str
    rise: float  # F
    fall: float  # F

    @property
    def capacitance(self) -> float:
        return max(self.rise, self.fall)


@dataclass(frozen=True, slots=True)
class CellTables:
    cell: CellSpec
    arcs: tuple[ArcTables, ...]
    pins: tuple[PinCap, ...]


def _grid_table(cell: CellSpec, quantity: str, values: dict[tuple[float, float], float]) -> Table:
    slews, loads = cell.grid.slew, cell.grid.load
    grid = np.empty((len(slews), len(loads)))
    for i, s in enumerate(slews):
        for j, c in enumerate(loads):
            try:
                grid[i, j] = values[(s, c)]
            except KeyError as exc:
                raise TableError(
                    f"table {quantity} has no measurement at slew {s:.4g} s, load {c:.4g} F",
                    cell=cell.name,
                ) from exc
    return Table((Axis(SLEW_AXIS, slews), Axis(LOAD_AXIS, loads)), grid, quantity, "s")


def tabulate(
    config: LibraryConfig, plan: Plan, measurements: list[Measurement]
) -> tuple[CellTables, ...]:
    """Tables for every cell of the plan; every point of the plan must have a measurement."""
    by_key: dict[TimingPoint, Measurement] = {m.point: m for m in measurements}
    cells = []
    for cell_name in dict.fromkeys(a.cell for a in plan.arcs):
        cell = config.cell(cell_name)
        arc_tables = []
        for arc in (a for a in plan.arcs if a.cell == cell_name):
            states = []
            for state in arc.states:
                tables = []
                for edge in ("rise", "fall"):
                    out_edge = state.output_edge(edge)
                    delays, transitions = {}, {}
                    for s in cell.grid.slew:
                        for c in cell.grid.load:
                            point = TimingPoint(
                                cell.name, arc.related, arc.output, state.side, edge, out_edge, s, c
                            )
                            m = by_key.get(point)
                            if m is not None:
                                delays[(s, c)] = m.delay
                                transitions[(s, c)] = m.transition
                    tables.append(_grid_table(cell, delay_quantity(out_edge), delays))
                    tables.append(_grid_table(cell, transition_quantity(out_edge), transitions))
                states.append(StateTables(state, tuple(tables)))
            arc_tables.append(ArcTables(arc, _worst(states), tuple(states)))
        measured = [m for m in measurements if m.point.cell == cell_name]
        caps = pin_capacitance(measured, config.process.vdd)
        pins = tuple(
            PinCap(p, caps.get((p, "rise"), 0.0), caps.get((p, "fall"), 0.0)) for p in cell.inputs
        )
        cells.append(CellTables(cell, tuple(arc_tables), pins))
    return tuple(cells)


def _worst(states: list[StateTables]) -> tuple[Table, ...]:
    """Per quantity, the point-wise maximum over the states that have it (non-unate arcs
    reach one output edge from both input edges, in different states)."""
    by_quantity: dict[str, list[Table]] = {}
    for st in states:
        for t in st.tables:
            by_quantity.setdefault(t.quantity, []).append(t)
    worst = []
    for quantity in ("cell_rise", "rise_transition", "cell_fall", "fall_transition"):
        group = by_quantity.get(quantity)
        if group:
            values = np.max(np.stack([t.values for t in group]), axis=0)
            worst.append(Table(group[0].axes, values, quantity, group[0].unit))
    return tuple(worst)
