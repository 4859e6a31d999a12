"""Gate-level circuits of a library's own cells, and the timing paths through them.

A circuit has one input port, whose edge launches every path, and any number of output ports;
every other gate input is tied to a constant (``LOW``, ``HIGH``) or driven by a gate. A path runs
from the input port to one output port through one input of each gate on its way; the other
gates a net drives are its loads (a fan-out tree). Circuits come from a gate-level Verilog file
(``io.verilog``) or are generated (``analysis.pathgen``).
"""

from __future__ import annotations

from dataclasses import dataclass

LOW, HIGH = "1'b0", "1'b1"  # the constant nets, spelled as Verilog writes them
CONSTANTS = {LOW: False, HIGH: True}


@dataclass(frozen=True, slots=True)
class Gate:
    """One instance of a library cell: each of its pins and the net it is on."""

    name: str
    cell: str
    pins: tuple[tuple[str, str], ...]  # (pin, net), outputs included


@dataclass(frozen=True, slots=True)
class Circuit:
    name: str  # the Verilog module's name
    start: str  # the input port: its net launches every path
    outputs: tuple[str, ...]  # output ports, each the end of one path
    gates: tuple[Gate, ...]
    origin: str  # where it came from: a file, or the generator and its seed


@dataclass(frozen=True, slots=True)
class Stage:
    """One gate on a path: the input it is entered by, the output it leaves by, and the values
    its other inputs are held at."""

    gate: str
    cell: str
    pin: str
    output: str
    net_in: str
    net_out: str
    side: tuple[tuple[str, bool], ...]


@dataclass(frozen=True, slots=True)
class Path:
    circuit: str
    end: str  # the output port it ends at
    stages: tuple[Stage, ...]

    @property
    def name(self) -> str:
        return f"{self.circuit}/{self.end}"
