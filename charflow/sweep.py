"""Planning sweep points from the cells' functions, and running them in parallel.

``plan`` turns every cell into timing arcs (one per input → output pair the output depends
on), every arc into its sensitizing side-input states, and every state into points over
input edge × slew × load. ``run`` sends the points to workers in chunks of one cell each,
so a worker's simulator reads each cell's testbench once per chunk at most.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass

from . import logic
from .config import CellSpec, LibraryConfig
from .netlist import Deck, build_deck

EDGES = ("rise", "fall")
CHUNK = 25  # points per worker task: large enough to amortise the deck load


@dataclass(frozen=True, slots=True)
class State:
    """One sensitizing assignment of an arc's side inputs."""

    side: tuple[tuple[str, bool], ...]
    sense: str  # positive_unate | negative_unate

    @property
    def when(self) -> str:
        return logic.when_condition(self.side)

    def output_edge(self, input_edge: str) -> str:
        if self.sense == "positive_unate":
            return input_edge
        return "fall" if input_edge == "rise" else "rise"


@dataclass(frozen=True, slots=True)
class Arc:
    cell: str
    related: str  # input pin
    output: str
    sense: str  # positive_unate | negative_unate | non_unate
    states: tuple[State, ...]

    @property
    def label(self) -> str:
        return f"{self.cell} {self.related}->{self.output}"


@dataclass(frozen=True, slots=True)
class TimingPoint:
    cell: str
    related: str
    output: str
    side: tuple[tuple[str, bool], ...]
    input_edge: str
    output_edge: str
    slew: float  # s, as the table records it
    load: float  # F

    @property
    def label(self) -> str:
        when = logic.when_condition(self.side) or "-"
        return (
            f"{self.related}->{self.output} {self.input_edge}/{self.output_edge} when {when} "
            f"slew {self.slew:.4g} s load {self.load:.4g} F"
        )


@dataclass(frozen=True, slots=True)
class Plan:
    arcs: tuple[Arc, ...]
    points: tuple[TimingPoint, ...]

    def for_cell(self, cell: str) -> tuple[TimingPoint, ...]:
        return tuple(p for p in self.points if p.cell == cell)


def arcs_of(cell: CellSpec) -> tuple[Arc, ...]:
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
            arcs.append(Arc(cell.name, pin, out.pin, sense, states))
    return tuple(arcs)


def plan(config: LibraryConfig, cells: Iterable[str] | None = None) -> Plan:
    """Every arc, state, edge, slew and load of the chosen cells (all by default)."""
    chosen = [config.cell(n) for n in cells] if cells is not None else list(config.cells)
    arcs: list[Arc] = []
    points: list[TimingPoint] = []
    for cell in chosen:
        for arc in arcs_of(cell):
            arcs.append(arc)
            for state in arc.states:
                for edge in EDGES:
                    for slew in cell.grid.slew:
                        for load in cell.grid.load:
                            points.append(
                                TimingPoint(
                                    cell.name,
                                    arc.related,
                                    arc.output,
                                    state.side,
                                    edge,
                                    state.output_edge(edge),
                                    slew,
                                    load,
                                )
                            )
    return Plan(tuple(arcs), tuple(points))


def chunks(points: Iterable[TimingPoint], size: int = CHUNK) -> list[tuple[TimingPoint, ...]]:
    """Consecutive points of one cell, at most ``size`` each; the largest loads first so the
    longest simulations start early and the short ones fill in at the end."""
    by_cell: dict[str, list[TimingPoint]] = {}
    for p in points:
        by_cell.setdefault(p.cell, []).append(p)
    out = []
    for group in by_cell.values():
        for i in range(0, len(group), size):
            out.append(tuple(group[i : i + size]))
    out.sort(key=lambda c: -max(p.load * 1e12 + p.slew * 1e9 for p in c))
    return out


def default_jobs() -> int:
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 1


def run(
    config: LibraryConfig,
    points: Iterable[TimingPoint],
    *,
    jobs: int | None = None,
    on_result: Callable[[object], None] | None = None,
    measure: Callable | None = None,
) -> Iterator[object]:
    """Simulate and measure ``points``; yield one outcome (Measurement or Failure) per point.

    Outcomes come in completion order; ``on_result`` is a hook for progress display.
    ``measure`` measures one cell's chunk (default ``timing.measure_chunk``; points of
    another kind, such as ``power.TogglePoint``, bring their own).
    """
    from joblib import Parallel, delayed

    from .timing import measure_chunk

    chunk = measure or measure_chunk
    points = list(points)
    decks: dict[str, Deck] = {
        c: build_deck(config, config.cell(c)) for c in {p.cell for p in points}
    }
    tasks = chunks(points)
    jobs = jobs or default_jobs()
    if jobs == 1 or len(tasks) == 1:
        results: Iterable[list] = (chunk(config, decks[t[0].cell], t) for t in tasks)
    else:
        results = Parallel(n_jobs=min(jobs, len(tasks)), return_as="generator_unordered")(
            delayed(chunk)(config, decks[t[0].cell], t) for t in tasks
        )
    for batch in results:
        for outcome in batch:
            if on_result is not None:
                on_result(outcome)
            yield outcome
