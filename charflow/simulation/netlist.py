"""Cell netlists and testbenches: rendering templates, reading ``.subckt`` ports, building decks.

A testbench deck holds the models, the cell, one PULSE source per input, a supply and a load
capacitor per output. A body pin is tied to the supply or ground, or held at its own voltage by
a DC source of its own, whose current is not the supply's. Every sweep point of a cell runs on
the same deck: the point's slew, load and side-input values are applied with ``alter``
commands, so the simulator reads the models and the cell once (see ``simulate``).
"""

from __future__ import annotations

import functools
import hashlib
import itertools
import re
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import jinja2

from charflow.config.library import CellSpec, LibraryConfig
from charflow.config.resources import TEMPLATE_DIR
from charflow.config.shapes import InputShape
from charflow.records.errors import NetlistError
from charflow.simulation.cards import spice_cards
from charflow.simulation.mismatch import Device, insert_sources

TESTBENCH = "testbench.sp.j2"

# Placeholder values in the deck; every point overrides them with ``alter``.
PARKED_LOAD = 1e-18
# The node a body pin with no voltage of its own is tied to: the supply of its kind.
_TIED = {"nwell": "cf_vdd", "pwell": "0"}


@dataclass(frozen=True, slots=True)
class Subckt:
    name: str
    ports: tuple[str, ...]
    line: int  # 1-based line of the .subckt card in its source


@dataclass(frozen=True, slots=True)
class Deck:
    """A testbench ready for the simulator; ``key`` identifies its text."""

    cell: str
    text: str
    key: str
    supply: str  # name of the supply source, whose branch current is the supply current
    compat: str | None = None  # ngspice compatibility mode (ngbehavior) the deck is read in
    # The cell's netlist or template, and its text as rendered: for locating simulator errors.
    source: Path | None = None
    cell_text: str = ""
    # The transistors with a gate source of their own (``mismatch``); none unless the library
    # asks for the spread of its delays.
    devices: tuple[Device, ...] = ()

    @staticmethod
    def input_source(pin: str) -> str:
        return f"vin_{pin}".lower()

    @staticmethod
    def load_cap(pin: str) -> str:
        return f"cload_{pin}".lower()

    @staticmethod
    def input_node(pin: str) -> str:
        return f"cf_in_{pin}".lower()

    @staticmethod
    def output_node(pin: str) -> str:
        return f"cf_out_{pin}".lower()

    @staticmethod
    def body_node(kind: str) -> str:
        """The node of a body pin held at its own voltage (``kind`` nwell or pwell)."""
        return f"cf_{kind}"

    @staticmethod
    def body_source(kind: str) -> str:
        return f"v{kind}"


@functools.lru_cache(maxsize=256)
def _compiled(text: str) -> jinja2.Template:
    # Compiling a template costs milliseconds, and every run renders each one more than once.
    env = jinja2.Environment(undefined=jinja2.StrictUndefined, keep_trailing_newline=True)
    return env.from_string(text)


# `.include FILE`, `.inc FILE` and `.lib FILE SECTION` read a file; `.lib NAME` alone opens a
# section and reads nothing. Paths may be quoted with " or '.
_READS = re.compile(
    r"""^[ \t]*\.(?:inc(?:lude)?[ \t]+(?P<inc>"[^"]*"|'[^']*'|\S+)"""
    r"""|lib[ \t]+(?P<lib>"[^"]*"|'[^']*'|\S+)[ \t]+\S)""",
    re.IGNORECASE | re.MULTILINE,
)


def model_files(text: str, base: Path) -> tuple[Path, ...]:
    """Every file ``text`` reads through ``.include`` / ``.lib``, followed into those files.

    A relative path is taken from the folder of the file that names it (``base`` for ``text``
    itself), as ngspice does. Files are listed once, in the order first met; a file that does
    not exist is listed too, so that its appearing later counts as a change.
    """
    found: list[Path] = []
    pending = [(text, base)]
    while pending:
        body, folder = pending.pop(0)
        for match in _READS.finditer(body):
            name = (match.group("inc") or match.group("lib")).strip("\"'")
            path = (folder / name).resolve()
            if path in found:
                continue
            found.append(path)
            try:
                pending.append((path.read_text(encoding="utf-8", errors="replace"), path.parent))
            except OSError:
                continue  # a missing file is a simulator error, reported when the deck runs
    return tuple(found)


def repoint_reads(text: str, to: Callable[[str], str | None]) -> str:
    """``text`` with the file name of each ``.include`` / ``.lib`` read replaced by ``to(name)``
    (``name`` as written, quotes taken off); a read for which ``to`` gives None is left as it
    is."""

    def swap(match: re.Match[str]) -> str:
        group = "inc" if match.group("inc") is not None else "lib"
        new = to(match.group(group).strip("\"'"))
        if new is None:
            return match.group(0)
        start, end = match.start(group) - match.start(), match.end(group) - match.start()
        whole = match.group(0)
        return f'{whole[:start]}"{new}"{whole[end:]}'

    return _READS.sub(swap, text)


def render_cell(cell: CellSpec) -> str:
    """The cell's SPICE text: a rendered template or the plain netlist file."""
    source = cell.source
    try:
        text = source.read_text(encoding="utf-8")
    except OSError as exc:
        raise NetlistError(f"cannot read netlist: {exc}", file=source, cell=cell.name) from exc
    if cell.template is None:
        return text
    try:
        return _compiled(text).render(name=cell.name, **dict(cell.params))
    except jinja2.TemplateSyntaxError as exc:
        raise NetlistError(
            f"template syntax error: {exc.message}", file=source, line=exc.lineno, cell=cell.name
        ) from exc
    except jinja2.UndefinedError as exc:
        raise NetlistError(
            f"template needs a value the cell's params do not give: {exc.message}",
            file=source,
            key="params",
            cell=cell.name,
        ) from exc
    except jinja2.TemplateError as exc:
        raise NetlistError(f"template error: {exc}", file=source, cell=cell.name) from exc
    # The template's own expressions meet the params (say a width given as text): whatever
    # they raise is a problem of this template with these params.
    except (TypeError, ValueError, ArithmeticError, LookupError, AttributeError) as exc:
        params = ", ".join(f"{k} = {v!r}" for k, v in cell.params)
        raise NetlistError(
            f"template cannot be rendered with params {{{params}}}: {exc}",
            file=source,
            key="params",
            cell=cell.name,
        ) from exc


def find_subckt(text: str, name: str, *, source: Path | None = None) -> Subckt:
    """The ``.subckt`` named ``name`` (case-insensitive, as in SPICE), continuation lines joined."""
    found = []
    for card in spice_cards(text):
        tokens = card.text.split()
        if tokens[0].lower() != ".subckt" or len(tokens) < 2:
            continue
        found.append(tokens[1])
        if tokens[1].lower() == name.lower():
            ports = []
            for tok in tokens[2:]:
                if tok.lower().startswith("params:") or "=" in tok:
                    break
                ports.append(tok)
            return Subckt(tokens[1], tuple(ports), card.line)
    have = f"; it defines {', '.join(found)}" if found else "; it defines no .subckt"
    raise NetlistError(f"no .subckt named {name}{have}", file=source, cell=name)


def check_ports(cell: CellSpec, sub: Subckt) -> None:
    """Every declared pin is a port and every port is a declared pin, whatever the order."""
    ports = {p.upper(): p for p in sub.ports}
    declared = [*cell.inputs, *(o.pin for o in cell.outputs), *cell.supply_pins]
    for pin in declared:
        if pin.upper() not in ports:
            raise NetlistError(
                f"pin {pin} is declared in the config but is not a port of .subckt {sub.name} "
                f"(ports: {' '.join(sub.ports)})",
                file=cell.source,
                line=sub.line,
                cell=cell.name,
                pin=pin,
            )
    declared_upper = {p.upper() for p in declared}
    for port in sub.ports:
        if port.upper() not in declared_upper:
            raise NetlistError(
                f"port {port} of .subckt {sub.name} is neither an input, an output, power, "
                "ground nor a body pin in the config (a well or substrate pin is declared "
                f'with nwell = "{port}" or pwell = "{port}")',
                file=cell.source,
                line=sub.line,
                cell=cell.name,
                pin=port,
            )


def build_deck(config: LibraryConfig, cell: CellSpec) -> Deck:
    """Render the testbench for one cell."""
    cell_text = render_cell(cell)
    sub = find_subckt(cell_text, cell.name, source=cell.source)
    check_ports(cell, sub)
    deck_text, devices = cell_text, tuple[Device, ...]()
    if config.mismatch.method != "off":
        deck_text, devices = insert_sources(config, cell, cell_text, sub.name)
    nodes = {cell.power.upper(): "cf_vdd", cell.ground.upper(): "0"}
    for b in cell.body:
        nodes[b.pin.upper()] = _TIED[b.kind] if b.voltage is None else Deck.body_node(b.kind)
    biases = [
        (Deck.body_source(b.kind), Deck.body_node(b.kind), b.voltage)
        for b in cell.body
        if b.voltage is not None
    ]
    nodes.update({p.upper(): Deck.input_node(p) for p in cell.inputs})
    nodes.update({o.pin.upper(): Deck.output_node(o.pin) for o in cell.outputs})
    process = config.process
    text = _compiled((TEMPLATE_DIR / TESTBENCH).read_text(encoding="utf-8")).render(
        cell=cell.name,
        models=process.models,
        cell_text=deck_text.rstrip("\n"),
        subckt=sub.name,
        port_nodes=[nodes[p.upper()] for p in sub.ports],
        inputs=[(Deck.input_source(p), Deck.input_node(p)) for p in cell.inputs],
        loads=[(Deck.load_cap(o.pin), Deck.output_node(o.pin)) for o in cell.outputs],
        biases=biases,
        parked_load=PARKED_LOAD,
        vdd=process.vdd,
        temperature=process.temperature,
        options=process.options,
        scale=process.scale,
    )
    key = hashlib.sha256(f"{process.compat}\n{text}".encode()).hexdigest()
    return Deck(cell.name, text, key, "vsupply", process.compat, cell.source, cell_text, devices)


# The driver chain's testbench (``build_chain_deck``): its input source and its output node.
CHAIN_SOURCE = "vin_drv"
CHAIN_OUTPUT = "cf_drv_out"


@dataclass(frozen=True, slots=True)
class Stage:
    """One cell of the driver chain or of its load: the input it is driven on, the output it
    drives, the other inputs held where that output follows the input."""

    cell: CellSpec
    pin: str
    output: str
    side: tuple[tuple[str, bool], ...]
    inverting: bool


def sensitized(cell: CellSpec, pin: str) -> Stage:
    """The cell driven on ``pin``: its first output that depends on it, under the first side
    assignment (in counting order) that makes it do so."""
    others = [p for p in cell.inputs if p != pin]
    for o in cell.outputs:
        for bits in itertools.product((False, True), repeat=len(others)):
            side = dict(zip(others, bits, strict=True))
            low = o.function.evaluate({**side, pin: False})
            if low != o.function.evaluate({**side, pin: True}):
                return Stage(cell, pin, o.pin, tuple(side.items()), inverting=low)
    raise NetlistError(
        f"no output of the cell follows input {pin}: it cannot drive or load the driver chain",
        cell=cell.name,
        pin=pin,
        key="input_shape",
    )


def chain_stages(config: LibraryConfig, shape: InputShape) -> tuple[Stage, ...]:
    """The driver chain of ``[input_shape]``, each cell driven on its first input."""
    return tuple(sensitized(config.cell(n), config.cell(n).inputs[0]) for n in shape.driver)


def build_chain_deck(config: LibraryConfig, shape: InputShape) -> Deck:
    """The testbench of the driver chain: a PULSE source into the first cell, each cell's
    output into the next, the last one's into ``fanout`` copies of ``fanout_pin`` and the
    wire load; side inputs tied to the rails that sensitize them. Named after the last cell."""
    stages = chain_stages(config, shape)
    loads: tuple[Stage, ...] = ()
    if shape.fanout_pin is not None:
        name, _, pin = shape.fanout_pin.partition(".")
        loads = (sensitized(config.cell(name), pin),) * shape.fanout
    cells = {s.cell.name: s.cell for s in (*stages, *loads)}
    texts = {n: render_cell(c) for n, c in cells.items()}
    subs = {n: find_subckt(texts[n], n, source=c.source) for n, c in cells.items()}
    nodes = [f"cf_drv_{i}" for i in range(len(stages))] + [CHAIN_OUTPUT]
    lines: list[str] = []
    biases: dict[str, float] = {}
    placed = [(s, nodes[i], nodes[i + 1], f"xs{i}") for i, s in enumerate(stages)]
    placed += [(s, CHAIN_OUTPUT, f"cf_ld_{i}", f"xl{i}") for i, s in enumerate(loads)]
    for stage, node_in, node_out, instance in placed:
        ports = _stage_ports(stage, node_in, node_out, instance, biases)
        lines.append(
            f"{instance} {' '.join(ports[p.upper()] for p in subs[stage.cell.name].ports)} "
            f"{subs[stage.cell.name].name}"
        )
    load = max(shape.load, PARKED_LOAD)
    text = "\n".join(
        [
            f"* charflow driver chain {' > '.join(shape.driver)}",
            *_header(config),
            *(texts[n].rstrip("\n") for n in cells),
            f"vsupply cf_vdd 0 dc {config.process.vdd}",
            *(f"v{kind} {Deck.body_node(kind)} 0 dc {v}" for kind, v in biases.items()),
            f"{CHAIN_SOURCE} {nodes[0]} 0 pulse(0 0 0 1e-12 1e-12 1 2)",
            *lines,
            f"cload_drv {CHAIN_OUTPUT} 0 {load!r}",
            ".end",
            "",
        ]
    )
    key = hashlib.sha256(f"{config.process.compat}\n{text}".encode()).hexdigest()
    last = stages[-1].cell
    return Deck(
        last.name, text, key, "vsupply", config.process.compat, last.source, texts[last.name]
    )


def _stage_ports(
    stage: Stage, node_in: str, node_out: str, instance: str, biases: dict[str, float]
) -> dict[str, str]:
    """Each port of a stage's cell (upper case) to its node in the chain."""
    cell = stage.cell
    ports = {cell.power.upper(): "cf_vdd", cell.ground.upper(): "0"}
    for b in cell.body:
        if b.voltage is not None:
            biases.setdefault(b.kind, b.voltage)
        ports[b.pin.upper()] = _TIED[b.kind] if b.voltage is None else Deck.body_node(b.kind)
    ports.update({p.upper(): "cf_vdd" if v else "0" for p, v in stage.side})
    ports[stage.pin.upper()] = node_in
    for o in cell.outputs:
        ports[o.pin.upper()] = node_out if o.pin == stage.output else f"{instance}_{o.pin}"
    return ports


def _header(config: LibraryConfig) -> list[str]:
    """The model, option and temperature lines a testbench starts with."""
    process = config.process
    lines = [
        f'.lib "{m.path}" {m.section}' if m.section else f'.include "{m.path}"'
        for m in process.models
    ]
    if process.scale:
        lines.append(f".option scale={process.scale}")
    lines += [f".option {name}={value}" for name, value in process.options]
    return [*lines, f".temp {process.temperature}"]
