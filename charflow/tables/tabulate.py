"""From measurements to tables: per arc and state, and the worst case over states.

Quantities follow Liberty's names: ``cell_rise``/``cell_fall`` (delay to a rising/falling
output) and ``rise_transition``/``fall_transition``. The arc's default table holds, point
by point, the largest value over its sensitizing states.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np

from charflow.config.library import CellSpec, LibraryConfig, Thresholds
from charflow.records.errors import TableError, place
from charflow.records.names import delay_quantity, transition_quantity
from charflow.records.outcomes import Measurement, Outcome, SearchResult, TightMeasurement
from charflow.records.points import Arc, ConstraintPoint, Plan, PulsePoint, State, TimingPoint
from charflow.tables.table import Axis, Table

SLEW_AXIS = "input_net_transition"
LOAD_AXIS = "total_output_net_capacitance"
OTHER_LOAD_AXIS = "related_out_total_output_net_capacitance"
CONSTRAINED_AXIS = "constrained_pin_transition"
RELATED_AXIS = "related_pin_transition"
PULSE_KIND = "min_pulse_width"  # the timing type of a pulse-width table

log = logging.getLogger("charflow")


@dataclass(frozen=True, slots=True)
class StateTables:
    state: State
    tables: tuple[Table, ...]
    # Error bars of the tables' values (``TightMeasurement.bar``), a table of the same quantity
    # each; none for a table with a point not measured at tightened settings (``[error_bars]``)
    errors: tuple[Table, ...] = ()


@dataclass(frozen=True, slots=True)
class ArcTables:
    arc: Arc
    default: tuple[Table, ...]  # worst case over states
    states: tuple[StateTables, ...]
    default_errors: tuple[Table, ...] = ()  # the largest error bar over the states

    def table(self, quantity: str) -> Table | None:
        return next((t for t in self.default if t.quantity == quantity), None)


@dataclass(frozen=True, slots=True)
class PinCap:
    """A pin's capacitance on each input edge, from the charge it drew on that edge; None
    where no run moved the pin that way (left out of the library, never copied)."""

    pin: str
    rise: float | None  # F
    fall: float | None  # F
    rise_error: float | None = None  # F, error bars (``[error_bars]``); None: not measured
    fall_error: float | None = None
    # F, the capacitance up to the input's delay threshold (``pin_capacitance_to_threshold``);
    # None: not measured. In the Liberty file only with ``[liberty] pin_capacitance``.
    rise_to_threshold: float | None = None
    fall_to_threshold: float | None = None
    # F, the capacitance between the input's slew thresholds (``pin_capacitance_slew_window``);
    # None: not measured. JSON only (``charflow paths --pin-load split``).
    rise_slew_window: float | None = None
    fall_slew_window: float | None = None

    @property
    def capacitance(self) -> float | None:
        measured = [c for c in (self.rise, self.fall) if c is not None]
        return max(measured) if measured else None


@dataclass(frozen=True, slots=True)
class ConstraintTables:
    """Setup or hold of a data pin against the clock (rise_ and fall_constraint tables), or
    recovery or removal of a control pin (the table of its releasing edge)."""

    pin: str
    related: str
    kind: str  # setup | hold | recovery | removal | min_pulse_width
    clock_edge: str
    tables: tuple[Table, ...]

    @property
    def timing_type(self) -> str:
        if self.kind == PULSE_KIND:
            return PULSE_KIND
        return f"{self.kind}_{'rising' if self.clock_edge == 'rise' else 'falling'}"


@dataclass(frozen=True, slots=True)
class PulseWidth:
    pin: str
    level: str  # high | low
    slew: float  # s, the pulse's edges
    width: float | None  # s; None: no width the search could shape failed (``note``)
    stimulus: str  # the pulse shape that found it (sequential.FULL or RUNT)
    bracket: tuple[float | None, float] | None  # s, the search's last failing, passing width
    note: str = ""


@dataclass(frozen=True, slots=True)
class CellTables:
    cell: CellSpec
    arcs: tuple[ArcTables, ...]
    pins: tuple[PinCap, ...]
    constraints: tuple[ConstraintTables, ...] = ()
    pulses: tuple[PulseWidth, ...] = ()
    # With more than one pulse slew: minimum pulse widths as tables over the pin's slew.
    pulse_tables: tuple[ConstraintTables, ...] = ()


TIMING_AXES = (SLEW_AXIS, LOAD_AXIS, OTHER_LOAD_AXIS)


def arc_axes(
    cell: CellSpec, arc: Arc, names: tuple[str, str, str] = TIMING_AXES
) -> tuple[Axis, ...]:
    """The axes of an arc's tables, named ``names``: the cell's slews and loads, and the other
    output's loads when the arc's tables have three axes (``TimingPoint.coordinates``)."""
    axes = [Axis(names[0], cell.grid.slew), Axis(names[1], cell.grid.load)]
    if arc.other:
        axes.append(Axis(names[2], cell.grid.related_load))
    return tuple(axes)


def grid_table(
    cell: CellSpec,
    axes: tuple[Axis, ...],
    quantity: str,
    # None (a point measured without the quantity) becomes NaN, which Table rejects by index
    values: Mapping[tuple[float, ...], float | None],
    unit: str,
    arc: str | None = None,
) -> Table:
    """The table of ``values`` (by coordinates) over ``axes``; raise naming the first point
    without a value."""
    grid = np.empty(tuple(len(a.values) for a in axes))
    for index in np.ndindex(grid.shape):
        key = tuple(a.values[i] for a, i in zip(axes, index, strict=True))
        try:
            grid[index] = values[key]
        except KeyError as exc:
            where = ", ".join(f"{a.name} {v:.4g}" for a, v in zip(axes, key, strict=True))
            raise TableError(
                f"table {quantity} has no measurement at {where}", cell=cell.name, arc=arc
            ) from exc
    return Table(axes, grid, quantity, unit)


def _state_tables(
    config: LibraryConfig,
    arc: Arc,
    state: State,
    measured: list[Measurement],
    bars: Mapping[TimingPoint, TightMeasurement],
) -> StateTables:
    cell = config.cell(arc.cell)
    axes = arc_axes(cell, arc)
    mine = [
        m
        for m in measured
        if m.point.related == arc.related
        and m.point.output == arc.output
        and m.point.kind == arc.kind
        and m.point.state_side == state.side
    ]
    tables, errors = [], []
    for out_edge in arc.output_edges:
        edge = [m for m in mine if m.point.output_edge == out_edge]
        for quantity, value in (
            (delay_quantity(out_edge), _delay),
            (transition_quantity(out_edge), _transition),
        ):
            values = {m.point.coordinates: value(m) for m in edge}
            tables.append(grid_table(cell, axes, quantity, values, "s"))
            if edge and all(m.point in bars for m in edge):
                bar = {
                    m.point.coordinates: bars[m.point].bar(value(m), value(bars[m.point]))
                    for m in edge
                }
                errors.append(grid_table(cell, axes, quantity, bar, "s"))
                _flag(config, tables[-1], errors[-1], {m.point.coordinates: m.point for m in edge})
    return StateTables(state, tuple(tables), tuple(errors))


def _delay(m: Measurement | TightMeasurement) -> float:
    return m.delay


def _transition(m: Measurement | TightMeasurement) -> float:
    return m.transition


def relative_bars(table: Table, error: Table, floor: float) -> np.ndarray:
    """``table``'s error bars relative to its values, each over max(|value|, ``floor``) (as the
    fidelity check's errors): a delay near zero must not make every bar look large."""
    return error.values / np.maximum(np.abs(table.values), floor)


def _flag(
    config: LibraryConfig,
    table: Table,
    error: Table,
    points: Mapping[tuple[float, ...], TimingPoint],
) -> None:
    """A warning where ``table``'s error bars exceed ``[error_bars] warn_above`` of the values:
    how many do, and where the largest is, in the library's units."""
    rel = relative_bars(table, error, config.fidelity.rel_floor)
    limit = config.error_bars.warn_above
    over = int(np.count_nonzero(rel > limit))
    if not over:
        return
    worst = np.unravel_index(int(np.argmax(rel)), rel.shape)
    at = tuple(a.values[i] for a, i in zip(table.axes, worst, strict=True))
    log.warning(
        "%s: %s's error bar is over %.3g %% of the value ([error_bars] warn_above) at %d of "
        "%d points; the largest, %.3g %%, is here",
        place({k: v for k, v in points[at].where(config).items() if v is not None}),
        table.quantity,
        100 * limit,
        over,
        rel.size,
        100 * float(rel[worst]),
    )


def _constraints(cell: CellSpec, results: list[SearchResult]) -> tuple[ConstraintTables, ...]:
    out = []
    groups: dict[tuple[str, str], list[tuple[ConstraintPoint, float | None]]] = {}
    for r in results:
        if isinstance(r.point, ConstraintPoint):
            groups.setdefault((r.point.constrained, r.point.kind), []).append((r.point, r.value))
    axes = (
        Axis(CONSTRAINED_AXIS, cell.grid.data_slews),
        Axis(RELATED_AXIS, cell.grid.clock_slews),
    )
    for (pin, kind), group in groups.items():
        tables = []
        # A control's recovery and removal are for its releasing edge alone.
        for edge in (e for e in ("rise", "fall") if any(p.data_edge == e for p, _ in group)):
            values = {p.coordinates: v for p, v in group if p.data_edge == edge}
            tables.append(grid_table(cell, axes, f"{edge}_constraint", values, "s"))
        out.append(
            ConstraintTables(pin, cell.flip_flop.clock, kind, group[0][0].clock_edge, tuple(tables))
        )
    return tuple(out)


def _pin_caps(
    config: LibraryConfig,
    cell: CellSpec,
    measured: list[Measurement],
    bars: Mapping[TimingPoint, TightMeasurement],
) -> tuple[PinCap, ...]:
    """Every input's capacitance; with the error bars of its values where every point it
    comes from was measured at tightened settings too."""
    vdd = config.process.vdd
    caps = pin_capacitance(measured, vdd)
    to_thr = pin_capacitance_to_threshold(measured, config.thresholds, vdd)
    window = pin_capacitance_slew_window(measured, config.thresholds, vdd)
    pins = tuple(
        replace(
            _pin_cap(cell.name, p, caps),
            rise_to_threshold=to_thr.get((p, "rise")),
            fall_to_threshold=to_thr.get((p, "fall")),
            rise_slew_window=window.get((p, "rise")),
            fall_slew_window=window.get((p, "fall")),
        )
        for p in cell.inputs
    )
    if not measured or not all(m.point in bars for m in measured):
        return pins
    tight = [replace(m, input_charge=bars[m.point].input_charge) for m in measured]
    tight_caps = pin_capacitance(tight, vdd)
    bar = next(iter(bars.values())).bar  # each bar alike but for the value
    errors = {k: bar(c, tight_caps[k]) for k, c in caps.items()}
    return tuple(
        replace(p, rise_error=errors.get((p.pin, "rise")), fall_error=errors.get((p.pin, "fall")))
        for p in pins
    )


def pin_capacitance(measurements: list[Measurement], vdd: float) -> dict[tuple[str, str], float]:
    """(pin, input edge) → capacitance, from the charge the pin drew on that edge at the
    smallest load: each edge's value from its own edge's charge.

    At each pin and edge the points at the smallest load are averaged over slews and states:
    the effective (Miller-inclusive) capacitance a driver sees (common practice). Besides each
    point's related pin on its edge, the charges in its ``side_charges`` count: a flip-flop's
    data pins as they move before the clock edge, the clock's inactive edge, a clear or
    preset's release (``sequential.measure_clocked``).
    """
    groups: dict[tuple[str, str], list[tuple[float, float]]] = {}
    for m in measurements:
        entries = [(m.point.related, m.point.input_edge, m.input_charge), *m.side_charges]
        for pin, edge, charge in entries:
            groups.setdefault((pin, edge), []).append((m.point.load, abs(charge)))
    return {key: _smallest_load_mean(group) / vdd for key, group in groups.items()}


def pin_capacitance_to_threshold(
    measurements: list[Measurement], thresholds: Thresholds, vdd: float
) -> dict[tuple[str, str], float]:
    """(pin, input edge) → the charge the pin drew from the edge's start to its delay-threshold
    crossing over the swing to that crossing, at the smallest load, averaged as in
    ``pin_capacitance``: the capacitance a driver has charged when its own delay is measured
    (a plain capacitor's is its C). Only points that measured the charge count (a flip-flop's
    do not): a pin and edge with none is left out."""

    def swing(edge: str) -> float:
        return thresholds.to_input_threshold(edge) * vdd

    return _windowed([(m, m.input_charge_to_threshold) for m in measurements], swing)


def pin_capacitance_slew_window(
    measurements: list[Measurement], thresholds: Thresholds, vdd: float
) -> dict[tuple[str, str], float]:
    """(pin, input edge) → the charge the pin drew between its input's two slew-threshold
    crossings over the voltage between them, at the smallest load, averaged as in
    ``pin_capacitance``: the capacitance a driver charges while its own output slew is measured
    (a plain capacitor's is its C). Pins and edges without the charge are left out."""

    def swing(edge: str) -> float:
        return thresholds.slew_swing(edge) * vdd

    return _windowed([(m, m.input_charge_slew_window) for m in measurements], swing)


def _windowed(
    charges: list[tuple[Measurement, float | None]], swing: Callable[[str], float]
) -> dict[tuple[str, str], float]:
    """(pin, input edge) → the mean charge at the smallest load over ``swing(edge)`` (V)."""
    groups: dict[tuple[str, str], list[tuple[float, float]]] = {}
    for m, charge in charges:
        if charge is not None:
            key = (m.point.related, m.point.input_edge)
            groups.setdefault(key, []).append((m.point.load, abs(charge)))
    return {(pin, e): _smallest_load_mean(g) / swing(e) for (pin, e), g in groups.items()}


def _smallest_load_mean(group: list[tuple[float, float]]) -> float:
    """The mean charge of the (load, charge) pairs at the smallest load."""
    smallest = min(load for load, _ in group)
    return float(np.mean([q for load, q in group if load == smallest]))


def _pin_cap(cell: str, pin: str, caps: dict[tuple[str, str], float]) -> PinCap:
    """Each edge's capacitance from that edge's charge; an edge no run made is left out."""
    found = PinCap(pin, caps.get((pin, "rise")), caps.get((pin, "fall")))
    for edge in (e for e in ("rise", "fall") if getattr(found, e) is None):
        log.warning(
            "cell %s, pin %s: %s_capacitance left out: no run moved the pin on its %s edge",
            cell,
            pin,
            edge,
            "rising" if edge == "rise" else "falling",
        )
    return found


def _pulse_width(config: LibraryConfig, p: PulsePoint, r: SearchResult) -> PulseWidth:
    """A pulse search's result (``r``, of point ``p``); one with no value is left out of the
    library, with a warning."""
    if r.value is None:
        assert r.bracket is not None  # a search with no value brackets the widths it tried
        tried = r.bracket[1] / config.time_scale
        log.warning(
            "cell %s, pin %s: min_pulse_width_%s left out: %s (%s pulse %.4g %s wide at the "
            "thresholds, slew %.4g %s)",
            p.cell,
            p.pin,
            p.level,
            r.note,
            r.stimulus,
            tried,
            config.time_unit,
            p.slew / config.time_scale,
            config.time_unit,
        )
    return PulseWidth(p.pin, p.level, p.slew, r.value, r.stimulus, r.bracket, r.note)


def _pulse_tables(cell: CellSpec, pulses: tuple[PulseWidth, ...]) -> tuple[ConstraintTables, ...]:
    """Each pin's minimum pulse widths over its slew (``pulse_slew`` with more than one value):
    rise_constraint for the high pulse, fall_constraint for the low one (Liberty's
    min_pulse_width timing type; from memory), a level left out where a width is missing."""
    slews = cell.grid.pulse_slews
    if len(slews) < 2:
        return ()
    axes = (Axis(RELATED_AXIS, slews),)
    out = []
    for pin in dict.fromkeys(p.pin for p in pulses):
        tables = []
        for level, quantity in (("high", "rise_constraint"), ("low", "fall_constraint")):
            widths: dict[tuple[float, ...], float | None] = {
                (p.slew,): p.width
                for p in pulses
                if (p.pin, p.level) == (pin, level) and p.width is not None
            }
            if len(widths) == len(slews):
                tables.append(grid_table(cell, axes, quantity, widths, "s"))
        if tables:
            out.append(ConstraintTables(pin, pin, PULSE_KIND, "rise", tuple(tables)))
    return tuple(out)


def tabulate(
    config: LibraryConfig, plan: Plan, results: Sequence[Outcome]
) -> tuple[CellTables, ...]:
    """Tables for every cell of the plan; every point of the plan must have a result."""
    cells = []
    for cell_name in dict.fromkeys(a.cell for a in plan.arcs):
        cell = config.cell(cell_name)
        measured = [m for m in results if isinstance(m, Measurement) and m.point.cell == cell_name]
        bars = {
            r.point.base: r
            for r in results
            if isinstance(r, TightMeasurement) and r.point.cell == cell_name
        }
        searches = [r for r in results if isinstance(r, SearchResult) and r.point.cell == cell_name]
        arc_tables = []
        for arc in (a for a in plan.arcs if a.cell == cell_name):
            states = [_state_tables(config, arc, st, measured, bars) for st in arc.states]
            whole = all(len(st.errors) == len(st.tables) for st in states)
            errors = _worst([st.errors for st in states]) if whole else ()
            arc_tables.append(
                ArcTables(arc, _worst([st.tables for st in states]), tuple(states), errors)
            )
        pins = _pin_caps(config, cell, measured, bars)
        pulses = tuple(
            _pulse_width(config, r.point, r) for r in searches if isinstance(r.point, PulsePoint)
        )
        constraints = _constraints(cell, searches)
        cells.append(
            CellTables(
                cell, tuple(arc_tables), pins, constraints, pulses, _pulse_tables(cell, pulses)
            )
        )
    return tuple(cells)


def _worst(states: list[tuple[Table, ...]]) -> tuple[Table, ...]:
    """Per quantity, the point-wise maximum over the states' tables that have it (non-unate
    arcs reach one output edge from both input edges, in different states)."""
    by_quantity: dict[str, list[Table]] = {}
    for tables in states:
        for t in tables:
            by_quantity.setdefault(t.quantity, []).append(t)
    worst = []
    for quantity in ("cell_rise", "rise_transition", "cell_fall", "fall_transition"):
        group = by_quantity.get(quantity)
        if group:
            values = np.max(np.stack([t.values for t in group]), axis=0)
            worst.append(Table(group[0].axes, values, quantity, group[0].unit))
    return tuple(worst)
