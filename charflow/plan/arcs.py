"""Planning: the arcs of every cell from its functions, the sensitizing states of every arc,
and the points of each kind of work over the cell's grid.

``plan`` turns every cell into timing arcs (one per input → output pair the output depends
on), every arc into its sensitizing side-input states, and every state into points over
input edge × slew × load; a flip-flop adds its constraint and pulse-width searches.
"""

from __future__ import annotations

import itertools
from collections.abc import Iterable

from charflow.config.library import CellSpec, LibraryConfig
from charflow.records import logic
from charflow.records.errors import ConfigError
from charflow.records.points import (
    EDGES,
    Arc,
    ConstraintPoint,
    Plan,
    Point,
    PulsePoint,
    State,
    TimingPoint,
)


def _assignment(expr: logic.Expr, pins, value: bool, fixed: dict[str, bool]) -> dict[str, bool]:
    """The first assignment of ``pins`` (in truth-table order) that gives ``expr`` = value."""
    for bits in itertools.product((False, True), repeat=len(pins)):
        assign = {**fixed, **dict(zip(pins, bits, strict=True))}
        if expr.evaluate(assign) == value:
            return assign
    raise ConfigError(f"no input values make {expr.to_liberty()} {int(value)}")


def inactive_controls(cell: CellSpec) -> dict[str, bool]:
    """Values of the asynchronous controls that leave the flop alone."""
    flop = cell.flip_flop
    pins = [p for p in cell.inputs if p not in cell.data_inputs and p != flop.clock]
    controls = [e for e in (flop.clear, flop.preset) if e is not None]
    if not controls:
        return {}
    either = controls[0] if len(controls) == 1 else logic.Or(controls[0], controls[1])
    return _assignment(either, pins, False, {})


def capture_values(cell: CellSpec, state: bool) -> dict[str, bool]:
    """Data and control values under which the active clock edge stores ``state``."""
    fixed = inactive_controls(cell)
    assign = _assignment(cell.flip_flop.next_state, cell.data_inputs, state, fixed)
    return {p: assign[p] for p in cell.inputs if p != cell.flip_flop.clock}


def stored_output(cell: CellSpec, pin: str, state: bool) -> bool:
    """The value of output ``pin`` when the flop holds ``state``."""
    a, b = cell.flip_flop.state
    out = next(o for o in cell.outputs if o.pin == pin)
    return out.function.evaluate({a: state, b: not state})


def _other(cell: CellSpec, pin: str) -> str | None:
    if not cell.other_output_axis:
        return None
    return next(o.pin for o in cell.outputs if o.pin != pin)


def arcs_of(cell: CellSpec) -> tuple[Arc, ...]:
    if cell.flop is not None:
        return _flop_arcs(cell)
    arcs = []
    for out in cell.outputs:
        for pin in cell.inputs:
            sense = logic.timing_sense(out.function, cell.inputs, pin, cell=cell.name, pin=out.pin)
            if sense is None:
                continue
            states = tuple(
                State(s.side, s.sense)
                for s in logic.sensitizations(
                    out.function, cell.inputs, pin, cell=cell.name, pin=out.pin
                )
            )
            arcs.append(Arc(cell.name, pin, out.pin, sense, states, other=_other(cell, out.pin)))
    return tuple(arcs)


def _flop_arcs(cell: CellSpec) -> tuple[Arc, ...]:
    flop = cell.flip_flop
    arcs = []
    for out in cell.outputs:
        other = _other(cell, out.pin)
        clock_state = State((), "non_unate")
        arcs.append(
            Arc(cell.name, flop.clock, out.pin, "non_unate", (clock_state,), "clock", other)
        )
        for kind, expr, stored in (("clear", flop.clear, False), ("preset", flop.preset, True)):
            if expr is None:
                continue
            (pin,) = sorted(expr.variables())
            # The control is asserted by its edge toward the value that makes expr true.
            active_high = expr.evaluate({pin: True})
            out_value = stored_output(cell, out.pin, stored)
            sense = "positive_unate" if active_high == out_value else "negative_unate"
            edge = "rise" if out_value else "fall"
            arcs.append(
                Arc(cell.name, pin, out.pin, sense, (State((), sense),), kind, other, (edge,))
            )
    return tuple(arcs)


def control_edge(cell: CellSpec, arc: Arc) -> str:
    """The edge of an asynchronous control pin that asserts it."""
    expr = cell.flip_flop.clear if arc.kind == "clear" else cell.flip_flop.preset
    assert expr is not None  # a clear or preset arc comes from the cell's clear or preset
    return "rise" if expr.evaluate({arc.related: True}) else "fall"


def _timing_points(cell: CellSpec, arc: Arc) -> list[TimingPoint]:
    others = cell.grid.related_load if arc.other else (None,)
    points = []
    for state in arc.states:
        if arc.kind == "combinational":
            cases = [(edge, state.output_edge(edge), state.side) for edge in EDGES]
        elif arc.kind == "clock":
            cases = []
            for out_edge in EDGES:
                stored = next(
                    v
                    for v in (False, True)
                    if stored_output(cell, arc.output, v) == (out_edge == "rise")
                )
                side = tuple(sorted(capture_values(cell, stored).items()))
                cases.append((cell.flip_flop.edge, out_edge, side))
        else:
            side = tuple(sorted(inactive_controls(cell).items()))
            cases = [(control_edge(cell, arc), state.output_edge(control_edge(cell, arc)), side)]
        for in_edge, out_edge, side in cases:
            for slew in cell.grid.slew:
                for load in cell.grid.load:
                    for other in others:
                        points.append(
                            TimingPoint(
                                cell.name,
                                arc.related,
                                arc.output,
                                side,
                                in_edge,
                                out_edge,
                                slew,
                                load,
                                other,
                                arc.kind,
                            )
                        )
    return points


def _flop_points(cell: CellSpec) -> list[Point]:
    flop = cell.flip_flop
    points: list[Point] = []
    data_slews, clock_slews = cell.grid.data_slews, cell.grid.clock_slews
    for data in cell.data_inputs:
        for kind in ("setup", "hold"):
            for edge in EDGES:
                for ds in data_slews:
                    for cs in clock_slews:
                        points.append(
                            ConstraintPoint(
                                cell.name, data, flop.clock, kind, edge, flop.edge, ds, cs
                            )
                        )
    pulse_pins = [(flop.clock, "high"), (flop.clock, "low")]
    for expr in (flop.clear, flop.preset):
        if expr is not None:
            (pin,) = sorted(expr.variables())
            active_high = expr.evaluate({pin: True})
            pulse_pins.append((pin, "high" if active_high else "low"))
            # Recovery and removal: the control's releasing edge against the clock.
            release = "fall" if active_high else "rise"
            for kind in ("recovery", "removal"):
                for ds in data_slews:
                    for cs in clock_slews:
                        points.append(
                            ConstraintPoint(
                                cell.name, pin, flop.clock, kind, release, flop.edge, ds, cs
                            )
                        )
    # Liberty's min_pulse_width_high/low is one number per pin and level (searched at the
    # sharpest slew); with pulse_slew, a table over the pin's slew besides.
    for pin, level in pulse_pins:
        for slew in cell.grid.pulse_slews:
            points.append(PulsePoint(cell.name, pin, level, slew))
    return points


def plan(config: LibraryConfig, cells: Iterable[str] | None = None) -> Plan:
    """Every arc, state, edge and grid point of the chosen cells (all by default), and for
    flip-flops their setup, hold and pulse-width searches."""
    chosen = [config.cell(n) for n in cells] if cells is not None else list(config.cells)
    arcs: list[Arc] = []
    points: list[Point] = []
    for cell in chosen:
        for arc in arcs_of(cell):
            arcs.append(arc)
            points.extend(_timing_points(cell, arc))
        if cell.flop is not None:
            points.extend(_flop_points(cell))
    return Plan(tuple(arcs), tuple(points))
