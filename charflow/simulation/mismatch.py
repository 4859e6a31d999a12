"""Transistor mismatch in a testbench: a zero-volt source in series with every gate.

Each transistor of the cell's ``.subckt`` (an M card, or an X card of a subcircuit the config
names as a wrapped device) gets its gate through a DC source of its own. Setting that source
to ΔVt with ``alter`` shifts the gate-source voltage by −ΔVt, which is the threshold shift to
first order in every model (the current depends on Vgs − Vt), for wrapped devices too, and
needs no new deck: a point changes a handful of source values, as it changes its loads. The
source's polarity follows the device, so a positive value is a larger |Vt| (a slower device)
for both kinds. σ(ΔVt) per transistor is Pelgrom's A_Vt / √(W·L·m) (Pelgrom, Duinmaijer &
Welbers, IEEE JSSC 24(5), 1989; m parallel devices average their mismatch).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from charflow.config.library import CellSpec, LibraryConfig
from charflow.records.errors import NetlistError
from charflow.simulation.cards import spice_cards

INSTANCE = "xdut"  # the cell's instance in the testbench (testbench.sp.j2)

_SUFFIX = {"f": 1e-15, "p": 1e-12, "n": 1e-9, "u": 1e-6, "m": 1e-3, "k": 1e3, "g": 1e9, "t": 1e12}
_NUMBER = re.compile(r"^([+-]?(?:\d+\.?\d*|\.\d+)(?:e[+-]?\d+)?)(meg|mil|[fpnumkgt])?[a-z]*$")
_PARAM = re.compile(r"([A-Za-z_][\w]*)\s*=\s*(\S+)")


@dataclass(frozen=True, slots=True)
class Device:
    """One transistor of a cell with its own gate source."""

    name: str  # the instance name in the cell's netlist, e.g. MN1
    model: str
    polarity: str  # "n" | "p"
    width: float  # m, after the netlist's scale
    length: float  # m
    sigma: float  # V, σ(ΔVt) = A_Vt / √(W·L·m)

    @property
    def source(self) -> str:
        return f"vmm_{self.name}".lower()

    @property
    def path(self) -> str:
        """The source as ``alter`` names it inside the cell's instance."""
        return f"v.{INSTANCE}.{self.source}"


def spice_number(text: str) -> float | None:
    """A SPICE number with its scale suffix (``0.4u``, ``1e-7``, ``2meg``); None otherwise."""
    match = _NUMBER.match(text.strip().lower())
    if match is None:
        return None
    scale = {"meg": 1e6, "mil": 25.4e-6}.get(match.group(2) or "")
    if scale is None:
        scale = _SUFFIX.get(match.group(2) or "", 1.0)
    return float(match.group(1)) * scale


def insert_sources(
    config: LibraryConfig, cell: CellSpec, text: str, subckt: str
) -> tuple[str, tuple[Device, ...]]:
    """The cell's text with a gate source in series with every transistor of ``subckt``, and
    those transistors. Raise naming the card when a transistor's model has no coefficient or
    its geometry cannot be read."""
    lines = text.splitlines()
    devices: list[Device] = []
    sources: list[str] = []
    inside = False
    for card in spice_cards(text):
        tokens = card.text.split()
        head = tokens[0].lower()
        if head == ".subckt":
            inside = len(tokens) > 1 and tokens[1].lower() == subckt.lower()
        elif head.startswith(".ends") and inside:
            # The sources go last, so every card keeps its line for the simulator's messages;
            # the sigmas are said in the text, so the deck's key (and the store's) follows them.
            said = ", ".join(f"{d.name} {d.sigma * 1e3:.6g} mV" for d in devices)
            sources.append(f"* threshold sigma per transistor: {said}")
            lines[card.line - 1] = "\n".join([*sources, lines[card.line - 1]])
            inside = False
        elif inside and head[0] in "mx":
            found = _device(config, cell, card.text, card.line)
            if found is None:
                continue
            device, gate_at = found
            gate, tokens[gate_at] = tokens[gate_at], f"cf_gate_{device.name}".lower()
            ends = (gate, tokens[gate_at]) if device.polarity == "n" else (tokens[gate_at], gate)
            sources.append(f"{device.source} {ends[0]} {ends[1]} dc 0")
            lines[card.line - 1] = " ".join(tokens)
            for _, number in card.lines[1:]:
                lines[number - 1] = "*"  # the continuation, now on the card's first line
            devices.append(device)
    if not devices:
        raise NetlistError(
            f".subckt {subckt} has no M card and no instance of a [[mismatch.wrapped]] "
            "subcircuit: name the subcircuits that stand for transistors there, or set "
            '[mismatch] method = "off"',
            file=cell.source,
            cell=cell.name,
        )
    return "\n".join(lines) + "\n", tuple(devices)


def _device(
    config: LibraryConfig, cell: CellSpec, card: str, line: int
) -> tuple[Device, int] | None:
    """The transistor a card makes and the token index of its gate; None for a subcircuit
    instance that is not a wrapped device."""
    mismatch = config.mismatch
    tokens = card.split()
    name = tokens[0]
    where = {"file": cell.source, "line": line, "cell": cell.name, "device": name}
    body = [t for t in tokens[1:] if "=" not in t and t.lower() != "params:"]
    params = {k.lower(): v for k, v in _PARAM.findall(card)}
    if name[0].lower() == "m":
        if len(body) < 5:
            raise NetlistError("a MOSFET card needs drain, gate, source, bulk and model", **where)
        model, gate_at, width_key, length_key = body[4], 2, "w", "l"
    else:
        wrapper = mismatch.wrapper(body[-1]) if body else None
        if wrapper is None:
            return None
        model, gate_at = wrapper.model, wrapper.gate
        width_key, length_key = wrapper.width.lower(), wrapper.length.lower()
        if gate_at > len(body) - 1:
            raise NetlistError(
                f"[mismatch.wrapped] for {body[-1]} says gate = {gate_at}, but the instance "
                f"has {len(body) - 1} nodes",
                **where,
            )
    spec = mismatch.device(model)
    if spec is None:
        raise NetlistError(
            f"model {model} has no threshold mismatch: add a [[mismatch.device]] with "
            f'model = "{model}", its polarity and vt_coefficient (mV·µm)',
            **where,
        )
    scale = config.process.scale or 1.0
    width = _geometry(params, width_key, where, model) * scale
    length = _geometry(params, length_key, where, model) * scale
    count = spice_number(params["m"]) if "m" in params else 1.0
    if count is None or count <= 0:
        raise NetlistError(f"multiplier m = {params['m']} is not a positive number", **where)
    sigma = spec.vt_coefficient / math.sqrt(width * length * count)
    return Device(name, model, spec.polarity, width, length, sigma), gate_at


def _geometry(params: dict[str, str], key: str, where: dict, model: str) -> float:
    text = params.get(key)
    value = spice_number(text) if text is not None else None
    if value is None or value <= 0:
        said = f"{key.upper()} = {text}" if text is not None else f"no {key.upper()} = value"
        raise NetlistError(
            f"{said} on a {model} transistor: the mismatch σ needs its width and length as "
            "plain positive numbers on the card (render expressions in the template)",
            **where,
        )
    return value
