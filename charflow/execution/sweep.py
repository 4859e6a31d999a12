"""Planning sweep points from the cells' functions, and running them in parallel.

``plan`` turns every cell into timing arcs (one per input → output pair the output depends
on), every arc into its sensitizing side-input states, and every state into points over
input edge × slew × load. ``run`` sends the points to workers in chunks of one cell each,
so a worker's simulator reads each cell's testbench once per chunk at most; with a result
store it simulates only the points the store does not hold.
"""

from __future__ import annotations

import contextlib
import itertools
import os
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass
from typing import TYPE_CHECKING

from charflow.config.library import CellSpec, LibraryConfig
from charflow.records import logic
from charflow.records.errors import ConfigError
from charflow.records.units import show_cap, show_time
from charflow.simulation import plausible
from charflow.simulation.netlist import Deck, build_deck

if TYPE_CHECKING:
    from charflow.execution.store import Store

EDGES = ("rise", "fall")
CHUNK = 25  # points per worker task: large enough to amortise the deck load

# Simulations a point of each kind takes, roughly: the weights of the progress bar and of the
# chunks handed to workers (``estimate`` measures the real figures on samples). A combinational
# point is one run, now and then refined (1.6 on tests/data/seq_l1.toml's QBUFC_P1); a flip-flop
# experiment writes a value first and is refined more often (2.4 a clock point there); a search
# bisects log2(bracket / tolerance) trials, each a run or more, plus its two bracket checks
# (13 to 25 runs a search there at 1 ps, 4 when the narrowest pulse already passes; 15 to 37
# in the demo plan's samples).
POINT_RUNS = 1
FLOP_POINT_RUNS = 2
SEARCH_RUNS = 30


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
    kind: str = "combinational"  # combinational | clock | clear | preset
    other: str | None = None  # the other output, when tables carry its load as index_3
    output_edges: tuple[str, ...] = EDGES  # a clear or preset moves its output one way only

    @property
    def label(self) -> str:
        return f"{self.cell} {self.related}->{self.output}"


@dataclass(frozen=True, slots=True)
class TimingPoint:
    """One simulation of an arc: ``side`` holds every other input's value (for a clock arc,
    the data that is captured); ``other_load`` is the other output's load on 3D tables."""

    cell: str
    related: str
    output: str
    side: tuple[tuple[str, bool], ...]
    input_edge: str
    output_edge: str
    slew: float  # s, as the table records it
    load: float  # F
    other_load: float | None = None  # F
    kind: str = "combinational"

    @property
    def state_side(self) -> tuple[tuple[str, bool], ...]:
        """The side inputs that name the point's state (``when``); none for sequential arcs."""
        return self.side if self.kind == "combinational" else ()

    @property
    def label(self) -> str:
        when = logic.when_condition(self.state_side) or "-"
        other = "" if self.other_load is None else f" other load {self.other_load:.4g} F"
        return (
            f"{self.related}->{self.output} {self.input_edge}/{self.output_edge} when {when} "
            f"slew {self.slew:.4g} s load {self.load:.4g} F{other}"
        )

    @property
    def cost(self) -> int:
        return POINT_RUNS if self.kind == "combinational" else FLOP_POINT_RUNS

    def where(self, config: LibraryConfig) -> dict[str, str | None]:
        """Where the point is, in the library's units, as an error's context."""
        edges = f"{self.related} {self.input_edge}, {self.output} {self.output_edge}"
        kind = "" if self.kind == "combinational" else f"{self.kind}: "
        point = f"slew {show_time(self.slew, config.time_unit)}, load "
        point += show_cap(self.load, config.cap_unit)
        if self.other_load is not None:
            point += f", other output's load {show_cap(self.other_load, config.cap_unit)}"
        return {
            "cell": self.cell,
            "arc": f"{self.related}->{self.output} ({kind}{edges})",
            "state": logic.when_condition(self.state_side) or None,
            "point": point,
        }


@dataclass(frozen=True, slots=True)
class ConstraintPoint:
    """A setup or hold search of a data pin against the clock at one pair of slews, or a
    recovery or removal search of an asynchronous control's release against the clock."""

    cell: str
    constrained: str  # data pin, or the clear or preset pin
    related: str  # clock pin
    kind: str  # "setup" | "hold" | "recovery" | "removal"
    data_edge: str  # the constrained pin's transition the constraint is for (a release)
    clock_edge: str
    data_slew: float  # s
    clock_slew: float  # s

    @property
    def label(self) -> str:
        return (
            f"{self.kind} {self.constrained} {self.data_edge} vs {self.related} "
            f"{self.clock_edge}, data slew {self.data_slew:.4g} s, clock slew "
            f"{self.clock_slew:.4g} s"
        )

    @property
    def cost(self) -> int:
        return SEARCH_RUNS

    def where(self, config: LibraryConfig) -> dict[str, str | None]:
        """Where the search is, in the library's units, as an error's context."""
        edges = f"{self.constrained} {self.data_edge}, {self.related} {self.clock_edge}"
        unit = config.time_unit
        return {
            "cell": self.cell,
            "arc": f"{self.related}->{self.constrained} ({self.kind}: {edges})",
            "point": f"{self.constrained} slew {show_time(self.data_slew, unit)}, "
            f"{self.related} slew {show_time(self.clock_slew, unit)}",
        }


@dataclass(frozen=True, slots=True)
class PulsePoint:
    """A minimum pulse width search on a clock or an asynchronous control pin."""

    cell: str
    pin: str
    level: str  # "high" | "low": the pulse's level
    slew: float  # s

    @property
    def label(self) -> str:
        return f"minimum {self.level} pulse on {self.pin}, slew {self.slew:.4g} s"

    @property
    def cost(self) -> int:
        return SEARCH_RUNS

    def where(self, config: LibraryConfig) -> dict[str, str | None]:
        """Where the search is, in the library's units, as an error's context."""
        slew = show_time(self.slew, config.time_unit)
        point = f"minimum {self.level} pulse, slew {slew}"
        return {"cell": self.cell, "pin": self.pin, "point": point}


Point = TimingPoint | ConstraintPoint | PulsePoint


@dataclass(frozen=True, slots=True)
class Plan:
    arcs: tuple[Arc, ...]
    points: tuple[Point, ...]

    def for_cell(self, cell: str) -> tuple[Point, ...]:
        return tuple(p for p in self.points if p.cell == cell)


def _assignment(expr: logic.Expr, pins, value: bool, fixed: dict[str, bool]) -> dict[str, bool]:
    """The first assignment of ``pins`` (in truth-table order) that gives ``expr`` = value."""
    for bits in itertools.product((False, True), repeat=len(pins)):
        assign = {**fixed, **dict(zip(pins, bits, strict=True))}
        if expr.evaluate(assign) == value:
            return assign
    raise ConfigError(f"no input values make {expr.to_liberty()} {int(value)}")


def inactive_controls(cell: CellSpec) -> dict[str, bool]:
    """Values of the asynchronous controls that leave the flop alone."""
    flop = cell.flop
    pins = [p for p in cell.inputs if p not in cell.data_inputs and p != flop.clock]
    controls = [e for e in (flop.clear, flop.preset) if e is not None]
    if not controls:
        return {}
    either = controls[0] if len(controls) == 1 else logic.Or(controls[0], controls[1])
    return _assignment(either, pins, False, {})


def capture_values(cell: CellSpec, state: bool) -> dict[str, bool]:
    """Data and control values under which the active clock edge stores ``state``."""
    fixed = inactive_controls(cell)
    assign = _assignment(cell.flop.next_state, cell.data_inputs, state, fixed)
    return {p: assign[p] for p in cell.inputs if p != cell.flop.clock}


def stored_output(cell: CellSpec, pin: str, state: bool) -> bool:
    """The value of output ``pin`` when the flop holds ``state``."""
    a, b = cell.flop.state
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
    flop = cell.flop
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
    expr = cell.flop.clear if arc.kind == "clear" else cell.flop.preset
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
                cases.append((cell.flop.edge, out_edge, side))
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
    flop = cell.flop
    points: list[Point] = []
    slews = cell.grid.constraint_slew or cell.grid.slew
    for data in cell.data_inputs:
        for kind in ("setup", "hold"):
            for edge in EDGES:
                for ds in slews:
                    for cs in slews:
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
                for ds in slews:
                    for cs in slews:
                        points.append(
                            ConstraintPoint(
                                cell.name, pin, flop.clock, kind, release, flop.edge, ds, cs
                            )
                        )
    # Liberty's min_pulse_width is one number per pin and level: searched at the sharpest slew.
    for pin, level in pulse_pins:
        points.append(PulsePoint(cell.name, pin, level, min(cell.grid.slew)))
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


def work(points: Iterable[Point]) -> int:
    """The simulations ``points`` take, roughly (the sum of their ``cost``): the unit of
    progress."""
    return sum(p.cost for p in points)


def _weight(p: Point) -> float:
    if isinstance(p, ConstraintPoint | PulsePoint):
        return p.cost
    # Within a kind, a slower ramp and a larger load make a longer run (power's toggles too).
    return p.cost * (1.0 + p.load * 1e12 + p.slew * 1e9)


def chunks(points: Iterable[Point], size: int = CHUNK) -> list[tuple[Point, ...]]:
    """Consecutive points of one cell and kind, about ``size`` simulations each; the costliest
    first so the longest tasks start early and the short ones fill in at the end."""
    groups: dict[tuple[str, type], list[Point]] = {}
    for p in points:
        groups.setdefault((p.cell, type(p)), []).append(p)
    out = []
    for group in groups.values():
        step = max(1, size // group[0].cost)
        for i in range(0, len(group), step):
            out.append(tuple(group[i : i + step]))
    out.sort(key=lambda c: -sum(_weight(p) for p in c))
    return out


def default_jobs() -> int:
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 1


def run(
    config: LibraryConfig,
    points: Iterable[Point],
    *,
    jobs: int | None = None,
    on_result: Callable[[object], None] | None = None,
    store: Store | None = None,
    on_stored: Callable[[tuple], None] | None = None,
    scheduler: str | None = None,
) -> Iterator[object]:
    """Simulate and measure ``points``; yield one outcome (a measurement or a Failure) per point.

    Outcomes come in completion order; ``on_result`` is a hook for progress display. With a
    ``store``, the points whose key is stored come from it first, unsimulated (``on_stored``
    gets them together, before ``on_result`` gets each), and every new measurement is stored
    as it arrives. With a Dask ``scheduler`` address the points run on that cluster, otherwise
    on ``jobs`` local worker processes.
    """
    from charflow.measurement.combinational import Failure, measure_chunk

    points = list(points)
    decks: dict[str, Deck] = {
        c: build_deck(config, config.cell(c)) for c in {p.cell for p in points}
    }
    plausible.announce(config, decks)
    ring = None
    if store is not None:
        from charflow.execution.store import keyring

        ring = keyring(config, decks)
        found = store.lookup(ring, points)
        if on_stored is not None:
            on_stored(tuple(found.values()))
        for m in found.values():
            if on_result is not None:
                on_result(m)
            yield m
        points = [p for p in points if p not in found]
    tasks = chunks(points)
    jobs = jobs or default_jobs()
    if scheduler is not None:
        from charflow.execution.cluster import map_chunks

        results: Iterable[list] = map_chunks(scheduler, config, decks, tasks)
    elif config.simulation.backend == "subprocess" and (jobs == 1 or len(tasks) <= 1):
        # Each run is its own ngspice process already: a crash cannot take this one down.
        results = (measure_chunk(config, decks[t[0].cell], t) for t in tasks)
    else:
        from charflow.execution.workers import run_chunks

        # Worker processes, not this one, run the simulator: a crash of the shared library
        # then costs only the points in flight, which are re-run alone.
        results = run_chunks(config, decks, tasks, jobs)
    # Closed as soon as the loop ends early (a store that cannot take a row, an interrupt): the
    # workers stop and their journals go now, not when the garbage collector gets to them.
    with contextlib.closing(results):
        for batch in results:
            for outcome in batch:
                if ring is not None and not isinstance(outcome, Failure):
                    store.put(ring, outcome)
                if on_result is not None:
                    on_result(outcome)
                yield outcome
