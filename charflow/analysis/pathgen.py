"""Short circuits of a library's own cells, generated from a seed: chains and small fan-out
trees whose gates are entered by one input, the others tied to the values of one of the arc's
sensitizing states. The same seed, cells and settings give the same circuits.
"""

from __future__ import annotations

import random
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from charflow.records.errors import ConfigError
from charflow.records.paths import HIGH, LOW, Circuit, Gate
from charflow.tables.tabulate import ArcTables, CellTables

CHAIN, TREE = "chain", "tree"
BRANCH_CHANCE = 0.5  # a tree's stage drives extra gates this often
MAX_BRANCHES = 2  # extra gates on one net of a tree


@dataclass(frozen=True, slots=True)
class Shape:
    count: int  # circuits
    stages: tuple[int, int]  # fewest and most stages of a path
    seed: int


def usable(cells: Mapping[str, CellTables]) -> dict[str, tuple[ArcTables, ...]]:
    """Per cell, its arcs a path can go through: combinational, two-axis tables."""
    out = {}
    for name, cell in cells.items():
        arcs = tuple(a for a in cell.arcs if a.arc.kind == "combinational" and a.arc.other is None)
        if cell.cell.flop is None and len(cell.cell.outputs) == 1 and arcs:
            out[name] = arcs
    return out


def _gate(
    rng: random.Random,
    arcs: Mapping[str, Sequence[ArcTables]],
    name: str,
    net_in: str,
    net_out: str,
) -> Gate:
    cell = rng.choice(sorted(arcs))
    arc = rng.choice(list(arcs[cell])).arc
    state = rng.choice(list(arc.states))
    pins = [(arc.related, net_in), *((p, HIGH if v else LOW) for p, v in state.side)]
    pins.append((arc.output, net_out))
    return Gate(name, cell, tuple(pins))


def generate(cells: Mapping[str, CellTables], shape: Shape) -> tuple[Circuit, ...]:
    """``shape.count`` circuits, chains and trees in turn, from ``shape.seed``."""
    arcs = usable(cells)
    if not arcs:
        raise ConfigError("no combinational single-output cell to build paths of")
    lo, hi = shape.stages
    if not 1 <= lo <= hi:
        raise ConfigError(f"path stages must be 1 <= fewest <= most, got {lo}-{hi}")
    rng = random.Random(shape.seed)
    out = []
    for i in range(shape.count):
        kind = CHAIN if i % 2 == 0 else TREE
        n = rng.randint(lo, hi)
        gates, net = [], "a"
        for k in range(1, n + 1):
            net_out = "y" if k == n else f"n{k}"
            gates.append(_gate(rng, arcs, f"u{k}", net, net_out))
            branches = (
                rng.randint(1, MAX_BRANCHES) if kind == TREE and rng.random() < BRANCH_CHANCE else 0
            )
            for b in range(branches):
                gates.append(_gate(rng, arcs, f"b{k}_{b}", net_out, f"nb{k}_{b}"))
            net = net_out
        origin = f"charflow path generator, seed {shape.seed}, circuit {i}"
        out.append(Circuit(f"{kind}{i}", "a", ("y",), tuple(gates), origin))
    return tuple(out)
