"""The testbench of a whole circuit of cells (``records.paths``): every cell's netlist or
rendered template once, one instance per gate, the input port's PULSE source, the constant
nets, wire and port capacitors, and the replica stages of the input-shape experiment.

Every gate input on a driven net sits behind a 0 V source (``pin_probe``), whose current is the
charge that pin draws in the real circuit.

A replica (``Replica``) is a copy of one path stage whose input is an ideal voltage copy of the
real stage's input (a unity-gain VCVS: it loads nothing) and whose output drives a plain
capacitor instead of the real gates: the stage with the real input waveform and a lumped load.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from charflow.config.library import CellSpec, LibraryConfig
from charflow.records.errors import NetlistError
from charflow.records.paths import CONSTANTS, Circuit, Stage
from charflow.simulation.netlist import (
    PARKED_LOAD,
    Deck,
    check_ports,
    find_subckt,
    render_cell,
)

SUPPLY = "vsupply"
_RAIL = {False: "0", True: "cf_vdd"}


@dataclass(frozen=True, slots=True)
class Replica:
    name: str
    stage: Stage
    load: float  # F, the lumped capacitor on its output


def node(net: str) -> str:
    """The simulator node of a circuit net (constants are the rails)."""
    if net in CONSTANTS:
        return _RAIL[CONSTANTS[net]]
    return f"cfn_{net}".lower()


def replica_node(name: str) -> str:
    return f"cfr_{name}_out".lower()


def pin_probe(gate: str, pin: str) -> str:
    """The 0 V source in series with a gate's input pin: its branch current is the current
    into the pin (the charge a receiving gate draws from its net)."""
    return f"vcfp_{gate}_{pin}".lower()


def _probed_nets(
    cell: CellSpec, name: str, nets: Mapping[str, str]
) -> tuple[dict[str, str], list[str]]:
    """``nets`` with each input on a driven net moved behind its probe, and the probes' cards
    (from the net's node to the pin's node: the probe's current flows into the pin)."""
    out, cards = dict(nets), []
    for pin, net_node in nets.items():
        if pin in cell.inputs and net_node not in _RAIL.values():
            inner = f"cfp_{name}_{pin}".lower()
            cards.append(f"{pin_probe(name, pin)} {net_node} {inner} dc 0")
            out[pin] = inner
    return out, cards


def _instance(cell: CellSpec, ports: Sequence[str], name: str, nets: Mapping[str, str]) -> str:
    """An ``x`` card: each port on the node ``nets`` gives, the supply and body pins on theirs
    (as ``netlist.build_deck`` ties them), an unlisted output on a node of its own."""
    fixed = {cell.power.upper(): "cf_vdd", cell.ground.upper(): "0"}
    for b in cell.body:
        tied = "cf_vdd" if b.kind == "nwell" else "0"
        fixed[b.pin.upper()] = tied if b.voltage is None else Deck.body_node(b.kind)
    given = {p.upper(): n for p, n in nets.items()}
    nodes = [
        fixed.get(p.upper()) or given.get(p.upper()) or f"cfu_{name}_{p}".lower() for p in ports
    ]
    return f"x{name} {' '.join(nodes)} {cell.name}"


def build_path_deck(
    config: LibraryConfig,
    circuit: Circuit,
    wire: Mapping[str, float],
    port_loads: Mapping[str, float],
    replicas: Sequence[Replica] = (),
) -> Deck:
    """The circuit's testbench; ``wire`` and ``port_loads`` are capacitors (F) by net."""
    process = config.process
    texts: dict[str, None] = {}
    ports: dict[str, tuple[str, ...]] = {}
    for name in dict.fromkeys(g.cell for g in circuit.gates):
        cell = config.cell(name)
        text = render_cell(cell)
        sub = find_subckt(text, cell.name, source=cell.source)
        check_ports(cell, sub)
        texts[text.rstrip("\n")] = None
        ports[name] = sub.ports
    lines = [f"* charflow path testbench for circuit {circuit.name} ({circuit.origin})"]
    for m in process.models:
        lines.append(f'.lib "{m.path}" {m.section}' if m.section else f'.include "{m.path}"')
    if process.scale:
        lines.append(f".option scale={process.scale}")
    lines += [f".option {k}={v}" for k, v in process.options]
    lines += [f".temp {process.temperature}", *texts]
    lines.append(f"{SUPPLY} cf_vdd 0 dc {process.vdd}")
    biases = {
        b.kind: b.voltage
        for g in circuit.gates
        for b in config.cell(g.cell).body
        if b.voltage is not None
    }
    for kind, volts in biases.items():
        lines.append(f"{Deck.body_source(kind)} {Deck.body_node(kind)} 0 dc {volts}")
    lines.append(
        f"{Deck.input_source(circuit.start)} {node(circuit.start)} 0 pulse(0 0 0 1e-12 1e-12 1 2)"
    )
    for g in circuit.gates:
        cell = config.cell(g.cell)
        nets, probes = _probed_nets(cell, g.name, {pin: node(net) for pin, net in g.pins})
        lines += [*probes, _instance(cell, ports[g.cell], g.name, nets)]
    caps = {**{n: 0.0 for n in port_loads}, **wire}
    for net, c in port_loads.items():
        caps[net] += c
    for i, (net, c) in enumerate(caps.items()):
        lines.append(f"cw{i} {node(net)} 0 {max(c, PARKED_LOAD):.12g}")
    for r in replicas:
        lines += _replica(config.cell(r.stage.cell), ports[r.stage.cell], r)
    lines.append(".end")
    text = "\n".join(lines) + "\n"
    key = hashlib.sha256(f"{process.compat}\n{text}".encode()).hexdigest()
    return Deck(circuit.name, text, key, SUPPLY, process.compat, None, "\n".join(texts))


def _replica(cell: CellSpec, ports: Sequence[str], r: Replica) -> list[str]:
    s = r.stage
    if s.pin not in cell.inputs:
        raise NetlistError(f"replica of stage {s.gate}: no input {s.pin}", cell=cell.name)
    copy = f"cfr_{r.name}_in".lower()
    nets = {p: _RAIL[v] for p, v in s.side}
    nets.update({s.pin: copy, s.output: replica_node(r.name)})
    return [
        f"er_{r.name} {copy} 0 {node(s.net_in)} 0 1",
        _instance(cell, ports, f"r_{r.name}", nets),
        f"cr_{r.name} {replica_node(r.name)} 0 {r.load:.12g}",
    ]
