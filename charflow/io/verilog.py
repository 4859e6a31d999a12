"""A small gate-level Verilog netlist: read (the circuits a path check is given) and written
(the circuits it generates, for the timing tool that reads the same netlist).

The subset read: one ``module`` with a port list, ``input``/``output``/``wire`` declarations
and cell instances with named connections (``CELL u1 (.A(n1), .Y(n2));``); nets are plain
identifiers or the constants ``1'b0`` and ``1'b1``; ``//`` and ``/* */`` comments. A circuit has
one input port (every path starts there); every other gate input is a constant or a gate's
output.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

from charflow.config.library import LibraryConfig
from charflow.records.errors import NetlistError
from charflow.records.paths import CONSTANTS, Circuit, Gate

_TOKEN = re.compile(r"\s*(?:(1'b[01])|([A-Za-z_][A-Za-z0-9_]*)|([().,;])|(\S))")
_COMMENT = re.compile(r"//[^\n]*|/\*.*?\*/", re.DOTALL)


@dataclass(frozen=True, slots=True)
class _Token:
    text: str
    line: int


def _tokens(text: str, path: Path) -> list[_Token]:
    # Comments become spaces of the same line count, so that lines stay right.
    text = _COMMENT.sub(lambda m: "\n" * m.group(0).count("\n") + " ", text)
    out, pos = [], 0
    while pos < len(text):
        m = _TOKEN.match(text, pos)
        if m is None:  # trailing white space
            break
        pos = m.end()
        line = text.count("\n", 0, m.start(m.lastindex or 0)) + 1
        if m.group(4):
            raise NetlistError(
                f"unexpected character {m.group(4)!r}: the reader takes named connections of "
                "plain identifiers and the constants 1'b0, 1'b1 only",
                file=path,
                line=line,
            )
        out.append(_Token(m.group(m.lastindex or 0), line))
    return out


class _Reader:
    def __init__(self, tokens: list[_Token], path: Path) -> None:
        self.tokens, self.path, self.at = tokens, path, 0

    def error(self, message: str, line: int | None = None) -> NetlistError:
        if line is None:
            line = self.tokens[min(self.at, len(self.tokens) - 1)].line if self.tokens else 1
        return NetlistError(message, file=self.path, line=line)

    def take(self, expected: str | None = None) -> _Token:
        if self.at >= len(self.tokens):
            raise self.error(f"the file ends where {expected or 'more'} was expected")
        tok = self.tokens[self.at]
        if expected is not None and tok.text != expected:
            raise self.error(f"expected {expected!r}, found {tok.text!r}")
        self.at += 1
        return tok

    def peek(self) -> str:
        return self.tokens[self.at].text if self.at < len(self.tokens) else ""

    def names(self, end: str) -> Iterator[_Token]:
        """Identifiers separated by commas, up to ``end``."""
        while True:
            yield self.take()
            if self.take().text == end:
                return
            self.at -= 1
            self.take(",")


def read(path: Path, config: LibraryConfig) -> Circuit:
    """The circuit of a gate-level Verilog file, checked against ``config``'s cells."""
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise NetlistError(f"cannot read the netlist: {exc.strerror or exc}", file=path) from exc
    r = _Reader(_tokens(text, path), path)
    r.take("module")
    name = r.take().text
    if r.peek() == "(":  # the port list: the declarations below say which port is what
        r.take("(")
        if r.peek() == ")":
            r.take(")")
        else:
            for _ in r.names(")"):
                pass
    r.take(";")
    inputs: list[_Token] = []
    outputs: list[_Token] = []
    wires: list[_Token] = []
    gates: list[Gate] = []
    lines: dict[str, int] = {}
    while (word := r.peek()) != "endmodule":
        if word in ("input", "output", "wire"):
            r.take()
            {"input": inputs, "output": outputs, "wire": wires}[word].extend(r.names(";"))
            continue
        gate, line = _instance(r, config)
        lines[gate.name] = line
        gates.append(gate)
    r.take("endmodule")
    if r.peek():
        raise r.error("only one module is read; text follows endmodule")
    wired = {w.text for w in wires}
    return _circuit(path, config, name, (inputs, outputs), wired, gates, lines)


def _instance(r: _Reader, config: LibraryConfig) -> tuple[Gate, int]:
    cell_tok = r.take()
    cell_name = cell_tok.text
    if cell_name not in {c.name for c in config.cells}:
        known = ", ".join(c.name for c in config.cells)
        raise r.error(f"cell {cell_name} is not in library {config.name} ({known})", cell_tok.line)
    cell = config.cell(cell_name)
    if cell.flop is not None:
        reason = f"cell {cell_name} is a flip-flop: paths are of combinational cells"
        raise r.error(reason, cell_tok.line)
    inst = r.take().text
    r.take("(")
    pins: dict[str, str] = {}
    while r.peek() != ")":
        r.take(".")
        pin = r.take()
        r.take("(")
        net = r.take().text if r.peek() != ")" else ""
        r.take(")")
        if pin.text not in (*cell.inputs, *(o.pin for o in cell.outputs)):
            reason = f"instance {inst}: cell {cell_name} has no signal pin {pin.text}"
            raise r.error(reason, pin.line)
        if pin.text in pins:
            raise r.error(f"instance {inst}: pin {pin.text} connected twice", pin.line)
        if net:
            pins[pin.text] = net
        if r.peek() != ")":
            r.take(",")
    r.take(")")
    r.take(";")
    missing = [p for p in cell.inputs if p not in pins]
    if missing:
        raise r.error(
            f"instance {inst} of {cell_name}: input {missing[0]} is not connected (tie it to "
            "1'b0 or 1'b1)",
            cell_tok.line,
        )
    return Gate(inst, cell_name, tuple(pins.items())), cell_tok.line


def _circuit(
    path: Path,
    config: LibraryConfig,
    name: str,
    ports: tuple[list[_Token], list[_Token]],
    wires: set[str],
    gates: list[Gate],
    lines: dict[str, int],
) -> Circuit:
    """The checks a circuit must pass: one input port, every net declared and driven once."""
    inputs, outputs = ports
    if len(inputs) != 1:
        raise NetlistError(
            f"module {name} has {len(inputs)} input ports; a path circuit has one (the port "
            "every path starts at): tie side inputs to 1'b0 or 1'b1",
            file=path,
            line=inputs[1].line if len(inputs) > 1 else None,
        )
    start = inputs[0].text
    declared = {start, *(o.text for o in outputs), *wires}
    drivers: dict[str, str] = {}
    for g in gates:
        for pin, net in g.pins:
            where = {"file": path, "line": lines[g.name]}
            if net not in declared and net not in CONSTANTS:
                raise NetlistError(f"instance {g.name}: net {net} is not declared", **where)
            if pin in {o.pin for o in config.cell(g.cell).outputs}:
                if net in drivers or net == start or net in CONSTANTS:
                    first = drivers.get(net, "the input port" if net == start else "a constant")
                    raise NetlistError(
                        f"instance {g.name}: net {net} is driven by {first} already", **where
                    )
                drivers[net] = g.name
    for g in gates:
        for pin, net in g.pins:
            if net not in drivers and net != start and net not in CONSTANTS:
                raise NetlistError(
                    f"instance {g.name}: pin {pin} is on net {net}, which nothing drives",
                    file=path,
                    line=lines[g.name],
                )
    for o in outputs:
        if o.text not in drivers:
            raise NetlistError(f"output port {o.text} is driven by no gate", file=path, line=o.line)
    return Circuit(name, start, tuple(o.text for o in outputs), tuple(gates), str(path))


def write(circuit: Circuit, config: LibraryConfig) -> str:
    """The circuit as gate-level Verilog that ``read`` reads back (and timing tools read)."""
    wires = sorted(
        {n for g in circuit.gates for _, n in g.pins}
        - {circuit.start, *circuit.outputs, *CONSTANTS}
    )
    ports = [circuit.start, *circuit.outputs]
    lines = [
        f"// {circuit.origin}; cells of library {config.name}",
        f"module {circuit.name} ({', '.join(ports)});",
        f"  input {circuit.start};",
        *(f"  output {o};" for o in circuit.outputs),
        *(f"  wire {w};" for w in wires),
    ]
    for g in circuit.gates:
        pins = ", ".join(f".{p}({n})" for p, n in g.pins)
        lines.append(f"  {g.cell} {g.name} ({pins});")
    return "\n".join([*lines, "endmodule", ""])
