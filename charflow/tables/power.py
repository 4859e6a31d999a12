"""Power tables: internal energy per arc (worst case over states), hidden power per input and
side state, and leakage per state, from the sweep's measurements."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from charflow.config.library import CellSpec, LibraryConfig
from charflow.plan.toggles import _chosen, flop_toggles, hidden_states
from charflow.records import logic
from charflow.records.names import power_quantity
from charflow.records.outcomes import LeakageState, Measurement, Outcome, ToggleMeasurement
from charflow.records.points import EDGES, Arc, Plan, State
from charflow.tables.table import Axis, Table
from charflow.tables.tabulate import arc_axes, grid_table

SLEW_AXIS = "input_transition_time"
LOAD_AXIS = "total_output_net_capacitance"
OTHER_LOAD_AXIS = "equal_or_opposite_output_net_capacitance"
POWER_AXES = (SLEW_AXIS, LOAD_AXIS, OTHER_LOAD_AXIS)


@dataclass(frozen=True, slots=True)
class ArcPower:
    arc: Arc
    default: tuple[Table, ...]  # point-wise largest energy over the states
    states: tuple[tuple[State, tuple[Table, ...]], ...]


@dataclass(frozen=True, slots=True)
class PinPower:
    """Hidden power of one input in one side state: 1D tables over the input slew."""

    pin: str
    when: str
    tables: tuple[Table, ...]


@dataclass(frozen=True, slots=True)
class CellPower:
    cell: str
    arcs: tuple[ArcPower, ...]
    hidden: tuple[PinPower, ...]
    leakage: tuple[LeakageState, ...]

    @property
    def cell_leakage(self) -> float:
        """W: the mean over input vectors, every vector taken as equally likely (common
        practice for a default leakage)."""
        return float(np.mean([s.power for s in self.leakage]))

    def arc(self, related: str, output: str) -> ArcPower | None:
        return next(
            (a for a in self.arcs if (a.arc.related, a.arc.output) == (related, output)), None
        )


def _arc_tables(
    cell: CellSpec, arc: Arc, state: State, measured: list[Measurement]
) -> tuple[Table, ...]:
    axes = arc_axes(cell, arc, POWER_AXES)
    mine = [
        m
        for m in measured
        if (m.point.related, m.point.output, m.point.state_side)
        == (arc.related, arc.output, state.side)
    ]
    tables = []
    for out_edge in arc.output_edges:
        energy = {
            m.point.coordinates: m.internal_energy for m in mine if m.point.output_edge == out_edge
        }
        tables.append(grid_table(cell, axes, power_quantity(out_edge), energy, "J", arc.label))
    return tuple(tables)


def _worst(states: list[tuple[State, tuple[Table, ...]]]) -> tuple[Table, ...]:
    """Per quantity, the point-wise largest energy over the states that have it."""
    worst = []
    for quantity in map(power_quantity, EDGES):
        group = [t for _, tables in states for t in tables if t.quantity == quantity]
        if group:
            values = np.max(np.stack([t.values for t in group]), axis=0)
            worst.append(Table(group[0].axes, values, quantity, "J"))
    return tuple(worst)


def _hidden_tables(cell: CellSpec, toggles: list[ToggleMeasurement]) -> tuple[PinPower, ...]:
    """One PinPower per pin and side state with at least one edge measured at every slew."""
    energy = {
        (m.point.related, m.point.side, m.point.input_edge, m.point.slew): m.energy for m in toggles
    }
    axes = (Axis(SLEW_AXIS, cell.grid.slew),)
    out = []
    for pin in cell.inputs:
        for side in hidden_states(cell, pin):
            tables = []
            for edge in EDGES:
                row = _full_row([energy.get((pin, side, edge, s)) for s in cell.grid.slew])
                if row is not None:
                    tables.append(Table(axes, row, power_quantity(edge), "J"))
            if tables:
                out.append(PinPower(pin, logic.when_condition(side), tuple(tables)))
    return tuple(out)


def _full_row(row: list[float | None]) -> npt.NDArray[np.float64] | None:
    """The energies of a row where it has one at every slew, else None."""
    known = [e for e in row if e is not None]
    return np.array(known, dtype=np.float64) if len(known) == len(row) else None


def tabulate(
    config: LibraryConfig,
    plan: Plan,
    results: Sequence[Outcome],
    toggles: list[ToggleMeasurement],
    leakage_states: dict[str, tuple[LeakageState, ...]],
) -> tuple[CellPower, ...]:
    """Power of every cell of the plan; every timing point must have a measurement (a toggle
    may be missing: its pin and state then get no table for that edge)."""
    measured = [m for m in results if isinstance(m, Measurement)]
    cells = []
    for cell in _chosen(config, list(dict.fromkeys(a.cell for a in plan.arcs))):
        mine = [m for m in measured if m.point.cell == cell.name]
        arcs = []
        for arc in (a for a in plan.arcs if a.cell == cell.name):
            states = [(st, _arc_tables(cell, arc, st, mine)) for st in arc.states]
            arcs.append(ArcPower(arc, _worst(states), tuple(states)))
        mine_toggles = [m for m in toggles if m.point.cell == cell.name]
        if cell.flop is not None:
            hidden = _flop_hidden_tables(cell, mine_toggles)
        else:
            hidden = _hidden_tables(cell, mine_toggles)
        cells.append(CellPower(cell.name, tuple(arcs), hidden, leakage_states[cell.name]))
    return tuple(cells)


def _flop_hidden_tables(cell: CellSpec, toggles: list[ToggleMeasurement]) -> tuple[PinPower, ...]:
    """One PinPower per pin, side and stored value with an edge measured at every slew."""
    energy = {
        (m.point.related, m.point.side, m.point.state, m.point.input_edge, m.point.slew): m.energy
        for m in toggles
    }
    axes = (Axis(SLEW_AXIS, cell.grid.slew),)
    out = []
    for key in dict.fromkeys((p.related, p.side, p.state) for p in flop_toggles(cell)):
        tables = []
        for edge in EDGES:
            row = _full_row([energy.get((*key, edge, s)) for s in cell.grid.slew])
            if row is not None:
                tables.append(Table(axes, row, power_quantity(edge), "J"))
        if tables:
            when = logic.when_condition((*key[1], *key[2]))
            out.append(PinPower(key[0], when, tuple(tables)))
    return tuple(out)
