"""Grid values no process makes: warnings at ``check`` and at the start of a run, not errors.

A unit mistake (``time_unit = "ps"`` with the values still in ns) or a slipped digit gives a
grid that simulates after a fashion and then fails, or lies, point by point. Two signs catch
most of them before any simulation:

- an input slew under ``SHARPEST_SLEW`` (1 ps): no driver in a CMOS process makes an edge
  that sharp (common practice; the sharpest library slews are a few ps);
- a load over ``LOAD_EFFORT`` (1000) times the cell's input capacitance: an electrical effort
  no cell is sized for (logical effort puts the best effort of a stage near 4; Sutherland,
  Sproull and Harris, "Logical Effort", 1999).

The input capacitance is not simulated here: it is bounded from above by the gate area of the
transistors each input drives, read from the cell's netlist (M cards, and X cards of a 4-node
device wrapper with ``w`` and ``l``, gate the second node), at the gate capacitance per area of
the thinnest oxide in production plus overlap and fringe per width. A bound from above warns
less often, never wrongly: a load over 1000 times the bound is over 1000 times the real value.
The cell's input capacitance is its largest input's; a cell none of whose inputs drives a gate
charflow can read gets no load warning.
"""

from __future__ import annotations

import logging
import re
from dataclasses import dataclass

from charflow.config.library import CellSpec, LibraryConfig
from charflow.records.errors import CharflowError, place
from charflow.records.units import show_cap, show_time
from charflow.simulation.netlist import find_subckt, render_cell, spice_cards

log = logging.getLogger("charflow")

SHARPEST_SLEW = 1e-12  # s
LOAD_EFFORT = 1000.0
# Permittivity of SiO2, 3.9 x that of free space (Sze and Ng, "Physics of Semiconductor
# Devices", 3rd ed., 2007, appendix); an equivalent oxide of 0.8 nm, thinner than any
# production gate (from memory: high-k gates reach about 0.9 nm).
OXIDE_PERMITTIVITY = 3.9 * 8.8541878128e-12  # F/m
THINNEST_OXIDE = 0.8e-9  # m
GATE_CAP_PER_AREA = OXIDE_PERMITTIVITY / THINNEST_OXIDE  # F/m^2, about 43 fF/um^2
# Overlap and fringe capacitance per metre of gate width on each side, generous (from memory:
# 0.2 to 0.4 fF/um in processes of 90 nm and below).
EDGE_CAP = 0.5e-9  # F/m

_SI = {"t": 1e12, "g": 1e9, "meg": 1e6, "k": 1e3, "m": 1e-3, "u": 1e-6, "n": 1e-9, "p": 1e-12}
_SI |= {"f": 1e-15, "a": 1e-18, "mil": 25.4e-6}
_NUMBER = re.compile(r"([-+]?(?:\d+\.?\d*|\.\d+)(?:e[-+]?\d+)?)(meg|mil|[tgkmunpfa])?[a-z]*$")


@dataclass(frozen=True, slots=True)
class InputBound:
    """An upper bound of the capacitance one input pin presents, from its gate area."""

    pin: str
    farads: float
    gate_area: float  # m^2, sum of W x L (x multiplier) of the gates it drives


def spice_number(text: str) -> float | None:
    """A SPICE number with its scale suffix (``0.4u``, ``1e-7``, ``2meg``); None for anything
    else (a parameter, an expression)."""
    match = _NUMBER.match(text.strip().lower())
    if match is None:
        return None
    return float(match.group(1)) * _SI.get(match.group(2) or "", 1.0)


def _cards(text: str, line: int) -> list[str]:
    """The device cards of the ``.subckt`` whose card starts at ``line`` (1-based)."""
    cards: list[str] = []
    for card in spice_cards(text):
        if card.line <= line:
            continue
        if card.text.lower().startswith(".ends"):
            break
        cards.append(card.text)
    return cards


def _gate(card: str, scale: float) -> tuple[str, float, float] | None:
    """(gate node, W x L x m, W x m) of a transistor card, or None when it is not one or its
    sizes are not plain numbers."""
    tokens = re.sub(r"\s*=\s*", "=", card).split()
    params = dict(t.lower().split("=", 1) for t in tokens if "=" in t)
    nodes = [t for t in tokens[1:] if "=" not in t]
    kind = tokens[0][0].lower()
    mosfet = kind == "m" and len(nodes) >= 5
    wrapped = kind == "x" and len(nodes) == 5  # d g s b and the wrapper's name
    if not (mosfet or wrapped) or "w" not in params or "l" not in params:
        return None
    width, length, many = (spice_number(params.get(k, "1")) for k in ("w", "l", "m"))
    if width is None or length is None or many is None:
        return None
    return nodes[1], width * length * many * scale * scale, width * many * scale


def input_bounds(config: LibraryConfig, cell: CellSpec) -> tuple[InputBound, ...]:
    """Each input's capacitance bound, for the inputs that drive a readable gate."""
    text = render_cell(cell)
    sub = find_subckt(text, cell.name, source=cell.source)
    scale = config.process.scale or 1.0
    area: dict[str, float] = {}
    width: dict[str, float] = {}
    for card in _cards(text, sub.line):
        found = _gate(card, scale)
        if found is not None:
            node = found[0].upper()
            area[node] = area.get(node, 0.0) + found[1]
            width[node] = width.get(node, 0.0) + found[2]
    return tuple(
        InputBound(pin, GATE_CAP_PER_AREA * area[key] + 2 * EDGE_CAP * width[key], area[key])
        for pin in cell.inputs
        if (key := pin.upper()) in area
    )


def _sharp(config: LibraryConfig, slews) -> str | None:
    unit = config.time_unit
    sharp = [show_time(s, unit) for s in slews if s < SHARPEST_SLEW]
    if not sharp:
        return None
    return (
        f"{', '.join(sharp)}: under {show_time(SHARPEST_SLEW, unit)}, sharper than any process "
        f"makes an edge; are the values in time_unit = {unit}?"
    )


def _heavy(config: LibraryConfig, loads, bound: InputBound) -> str | None:
    unit = config.cap_unit
    heavy = [show_cap(c, unit) for c in loads if c > LOAD_EFFORT * bound.farads]
    if not heavy:
        return None
    return (
        f"{', '.join(heavy)}: over {LOAD_EFFORT:g} x the cell's input capacitance, which is at "
        f"most {show_cap(bound.farads, unit)} (an upper bound from the gate area pin "
        f"{bound.pin} drives, {bound.gate_area * 1e12:.3g} um^2, not simulated); are the values "
        f"in cap_unit = {unit}?"
    )


def _axes(cell: CellSpec) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """The slew axes and the load axes the cell's points use."""
    flop_slews = ("slew", "constraint_slew", "clock_slew", "pulse_slew")
    slews = flop_slews if cell.flop is not None else ("slew",)
    loads = ("load", "related_load") if cell.other_output_axis else ("load",)
    return slews, loads


def warnings(config: LibraryConfig, cells=None) -> tuple[str, ...]:
    """One line per grid axis holding values no process makes (see the module text), for the
    chosen cells (all by default), each naming the file, the key (the cell's own grid or the
    library's), the cell where the judgement is the cell's, and the values."""
    lines: list[str] = []

    def say(index: int, cell: CellSpec, axis: str, message: str | None, per_cell: bool) -> None:
        own = getattr(cell.grid, axis) != getattr(config.grid, axis)
        where = {
            "file": config.path,
            "key": f"cell[{index}].grid.{axis}" if own else f"grid.{axis}",
        }
        if own or per_cell:
            where["cell"] = cell.name
        line = f"{place(where)}: {message}"
        if message is not None and line not in lines:
            lines.append(line)

    for index, cell in enumerate(config.cells):
        if cells is not None and cell.name not in cells:
            continue
        slew_axes, load_axes = _axes(cell)
        for axis in slew_axes:
            say(index, cell, axis, _sharp(config, getattr(cell.grid, axis)), False)
        try:
            bounds = input_bounds(config, cell)
        except CharflowError:
            continue  # a netlist that cannot be read is a problem of its own, reported apart
        if bounds:
            largest = max(bounds, key=lambda b: b.farads)
            for axis in load_axes:
                say(index, cell, axis, _heavy(config, getattr(cell.grid, axis), largest), True)
    return tuple(lines)


_SAID: set[str] = set()


def announce(config: LibraryConfig, cells) -> None:
    """Log the warnings about ``cells`` as a run starts, each once per process."""
    for line in warnings(config, cells):
        if line not in _SAID:
            _SAID.add(line)
            log.warning("warning: %s", line)
