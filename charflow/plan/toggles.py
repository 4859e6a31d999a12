"""Planning the hidden-power toggles: runs in which an input moves and no output does, for
every input, side state, edge and slew (and a flip-flop's stored value)."""

from __future__ import annotations

import itertools

from charflow.config.library import CellSpec, LibraryConfig
from charflow.plan.arcs import capture_values, stored_output
from charflow.records.points import EDGES, TogglePoint


def hidden_states(cell: CellSpec, pin: str) -> tuple[tuple[tuple[str, bool], ...], ...]:
    """Side assignments under which ``pin`` changes no output, in counting order."""
    others = [p for p in cell.inputs if p != pin]
    found = []
    for values in itertools.product((False, True), repeat=len(others)):
        side = tuple(zip(others, values, strict=True))
        assign = dict(side)
        if all(
            o.function.evaluate({**assign, pin: False})
            == o.function.evaluate({**assign, pin: True})
            for o in cell.outputs
        ):
            found.append(side)
    return tuple(found)


def _chosen(config: LibraryConfig, cells: list[str] | None) -> list[CellSpec]:
    """The chosen cells, all by default."""
    return [config.cell(n) for n in cells] if cells is not None else list(config.cells)


def plan_toggles(config: LibraryConfig, cells: list[str] | None = None) -> tuple[TogglePoint, ...]:
    """Every hidden toggle of the chosen cells: pin × side state × input edge × slew (and for a
    flip-flop × stored value, ``flop_toggles``)."""
    points: list[TogglePoint] = []
    for cell in _chosen(config, cells):
        if cell.flop is not None:
            points.extend(flop_toggles(cell))
            continue
        for pin in cell.inputs:
            for side in hidden_states(cell, pin):
                for edge in EDGES:
                    for slew in cell.grid.slew:
                        points.append(
                            TogglePoint(cell.name, pin, side, edge, slew, min(cell.grid.load))
                        )
    return tuple(points)


def state_term(cell: CellSpec, state: bool) -> tuple[tuple[str, bool], ...]:
    """The stored value as a ``when`` names it: the level of the first output."""
    pin = cell.outputs[0].pin
    return ((pin, stored_output(cell, pin, state)),)


def stored_value(cell: CellSpec, point: TogglePoint) -> bool:
    """The value a flop's toggle point stores, read back from its ``state_term``."""
    ((pin, level),) = point.state
    return level == stored_output(cell, pin, True)


def rests(cell: CellSpec, state: bool, vector: dict[str, bool]) -> bool:
    """Whether the flop can hold ``state`` under ``vector``: an asserted clear or preset forces
    its value, and with both asserted the state is not defined."""
    flop = cell.flip_flop
    clear = flop.clear is not None and flop.clear.evaluate(vector)
    preset = flop.preset is not None and flop.preset.evaluate(vector)
    return not (clear and preset) and not (clear and state) and not (preset and not state)


def vectors(cell: CellSpec) -> tuple[tuple[bool, dict[str, bool]], ...]:
    """Every (state, input vector) a flop can rest in (``rests``), in counting order."""
    found = []
    for state in (False, True):
        for bits in itertools.product((False, True), repeat=len(cell.inputs)):
            vector = dict(zip(cell.inputs, bits, strict=True))
            if rests(cell, state, vector):
                found.append((state, vector))
    return tuple(found)


def flop_toggles(cell: CellSpec) -> tuple[TogglePoint, ...]:
    """A flop's hidden events: the clock's two edges with the data equal to each stored value,
    its inactive edge with the data opposite it (no edge of that kind captures), and every data
    pin's two edges under either clock level and either stored value."""
    flop = cell.flip_flop
    load = min(cell.grid.load)
    inactive = EDGES[1] if flop.edge == EDGES[0] else EDGES[0]
    points = []
    for state, data in itertools.product((False, True), repeat=2):
        side = tuple(sorted(capture_values(cell, data).items(), key=_order(cell)))
        for edge in EDGES if data == state else (inactive,):
            for slew in cell.grid.slew:
                points.append(
                    TogglePoint(
                        cell.name, flop.clock, side, edge, slew, load, state_term(cell, state)
                    )
                )
    for pin in cell.data_inputs:
        for level, state in itertools.product((False, True), repeat=2):
            held = {**capture_values(cell, state), flop.clock: level}
            side = tuple(sorted(((p, v) for p, v in held.items() if p != pin), key=_order(cell)))
            for edge in EDGES:
                for slew in cell.grid.slew:
                    points.append(
                        TogglePoint(cell.name, pin, side, edge, slew, load, state_term(cell, state))
                    )
    return tuple(points)


def _order(cell: CellSpec):
    return lambda item: cell.inputs.index(item[0])
