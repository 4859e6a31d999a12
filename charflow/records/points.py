"""The kinds of work a run is made of, as records: arcs and their sensitizing states, and the
points of each kind (timing, constraint search, pulse search, hidden-power toggle).

Each point kind knows its own ``series`` (the table row it belongs to: everything but its grid
coordinates), its ``coordinates`` on that table's axes (``AXES`` names them), its ``cost`` in
simulations and where it is in the library's units (``where``): tabulation, gap filling, the
store, step control and messages ask the point instead of re-deriving these.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

from charflow.records import logic
from charflow.records.units import LibraryUnits, show_cap, show_time

EDGES = ("rise", "fall")

# Simulations a point of each kind takes, roughly: the weights of the progress bar and of the
# chunks handed to workers (``estimate`` measures the real figures on samples). A combinational
# point is one run, now and then refined (1.6 on tests/data/seq_l1.toml's QBUFC_P1); a flip-flop
# clock or control point is one run where its event's probes guess its edges, none where the
# other output's point shared its run (0.96 a point over the demo flip-flops' 750, the event
# probes included); a search walks to a bracket and narrows it (``sequential._search``) at the
# usual settings, then settles it at tightened ones (``sequential._settled``), a trial a run
# once the relaxed one has placed the edge (9.6 runs a search over the demo flip-flops' 95
# searches at 1 ps, a usual run 0.40 of a tightened one in time points; all measured December
# 2026, --jobs 1: docs/history/2026-12-searchcount.md).
POINT_RUNS = 1
FLOP_POINT_RUNS = 1
SEARCH_RUNS = 10
# A tightened re-measure (``TightPoint``) is one run at a quarter of the step: 5.5 times a
# grid point's simulator time on the demo's combinational cells (145.9 s against 26.5 s for
# their 1764 points, measured December 2026), weighed as this many runs.
TIGHT_RUNS = 5
# Tightened settings: a run's largest step over TIGHT_STEPS and reltol over TIGHT_RELTOL (a
# converged transient no longer moves as both shrink: common practice). The one definition:
# the flip-flop convergence checks and the error bars (``measurement.stepsize.tightened``).
TIGHT_STEPS = 4.0
TIGHT_RELTOL = 10.0
# How charflow measures, as a number raised with every change that moves a measured value (a
# search's trials, a run's layout, a window): a store's rows measured at another revision are
# not served as current (``execution.store.keyring``). 2: searches' usual stage to a wider
# bracket on a reshaped margin; clock points from the flop's held state (December 2026). 3:
# setup, hold, recovery and removal searches from the held state too; each output's edge in
# its own breakpoint train; clock points above the smallest load from just before their edge;
# flip-flop toggles from the held state (December 2026). 4: a clock or control point's guessed
# edges sampled by breakpoints 3x further apart (``sequential.GUESS_SPACING``).
METHOD_REVISION = 4


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

    AXES: ClassVar[tuple[str, ...]] = ("slew", "load", "other load")
    FILLABLE: ClassVar[bool] = True  # gap filling may fill it from its table's neighbours

    @property
    def series(self) -> tuple[object, ...]:
        """The table row the point belongs to: the arc, its state and edges, without the grid
        coordinates."""
        return (
            "timing",
            self.cell,
            self.related,
            self.output,
            self.side,
            self.input_edge,
            self.output_edge,
            self.kind,
        )

    @property
    def coordinates(self) -> tuple[float, ...]:
        """Where the point sits on its tables: (slew, load[, other output's load])."""
        if self.other_load is None:
            return (self.slew, self.load)
        return (self.slew, self.load, self.other_load)

    @property
    def cost(self) -> int:
        return POINT_RUNS if self.kind == "combinational" else FLOP_POINT_RUNS

    def where(self, units: LibraryUnits) -> dict[str, str | None]:
        """Where the point is, in the library's units, as an error's context."""
        edges = f"{self.related} {self.input_edge}, {self.output} {self.output_edge}"
        kind = "" if self.kind == "combinational" else f"{self.kind}: "
        point = f"slew {show_time(self.slew, units.time_unit)}, load "
        point += show_cap(self.load, units.cap_unit)
        if self.other_load is not None:
            point += f", other output's load {show_cap(self.other_load, units.cap_unit)}"
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

    AXES: ClassVar[tuple[str, ...]] = ("data slew", "clock slew")
    FILLABLE: ClassVar[bool] = True  # gap filling may fill it from its table's neighbours

    @property
    def series(self) -> tuple[object, ...]:
        return (
            "constraint",
            self.cell,
            self.constrained,
            self.related,
            self.kind,
            self.data_edge,
            self.clock_edge,
        )

    @property
    def coordinates(self) -> tuple[float, ...]:
        return (self.data_slew, self.clock_slew)

    @property
    def cost(self) -> int:
        return SEARCH_RUNS

    def where(self, units: LibraryUnits) -> dict[str, str | None]:
        """Where the search is, in the library's units, as an error's context."""
        edges = f"{self.constrained} {self.data_edge}, {self.related} {self.clock_edge}"
        unit = units.time_unit
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

    AXES: ClassVar[tuple[str, ...]] = ("slew",)
    FILLABLE: ClassVar[bool] = False

    @property
    def series(self) -> tuple[object, ...]:
        return ("pulse", self.cell, self.pin, self.level)

    @property
    def coordinates(self) -> tuple[float, ...]:
        return (self.slew,)

    @property
    def cost(self) -> int:
        return SEARCH_RUNS

    def where(self, units: LibraryUnits) -> dict[str, str | None]:
        """Where the search is, in the library's units, as an error's context."""
        slew = show_time(self.slew, units.time_unit)
        point = f"minimum {self.level} pulse, slew {slew}"
        return {"cell": self.cell, "pin": self.pin, "point": point}


@dataclass(frozen=True, slots=True)
class TogglePoint:
    """A hidden-power run: one input toggles, no output moves."""

    cell: str
    related: str  # the input that toggles
    side: tuple[tuple[str, bool], ...]  # every other input
    input_edge: str
    slew: float  # s
    load: float  # F on every output (the grid's smallest: the outputs hold)
    # A flip-flop's stored value as the level of an output, e.g. (("Q", True),); () otherwise.
    state: tuple[tuple[str, bool], ...] = ()

    @property
    def when(self) -> str:
        return logic.when_condition((*self.side, *self.state))

    @property
    def label(self) -> str:
        return (
            f"{self.related} {self.input_edge} (no output edge) when {self.when or '-'} "
            f"slew {self.slew:.4g} s"
        )

    AXES: ClassVar[tuple[str, ...]] = ("slew",)
    FILLABLE: ClassVar[bool] = False

    @property
    def series(self) -> tuple[object, ...]:
        return ("toggle", self.cell, self.related, self.side, self.state, self.input_edge)

    @property
    def coordinates(self) -> tuple[float, ...]:
        return (self.slew,)

    @property
    def cost(self) -> int:
        return POINT_RUNS

    def where(self, units: LibraryUnits) -> dict[str, str | None]:
        """Where the toggle is, in the library's units, as an error's context."""
        slew = show_time(self.slew, units.time_unit)
        return {
            "cell": self.cell,
            "pin": f"{self.related} ({self.input_edge}, no output edge)",
            "state": self.when or None,
            "point": f"slew {slew}, load {show_cap(self.load, units.cap_unit)}",
        }


@dataclass(frozen=True, slots=True)
class LeakagePoint:
    """The static power of one cell in every state it can rest in: each input vector (and a
    flip-flop's stored value), held until the supply current is steady."""

    cell: str
    states: int  # the states held: the run's cost

    AXES: ClassVar[tuple[str, ...]] = ()
    FILLABLE: ClassVar[bool] = False

    @property
    def series(self) -> tuple[object, ...]:
        return ("leakage", self.cell)

    @property
    def coordinates(self) -> tuple[float, ...]:
        return ()

    @property
    def label(self) -> str:
        return f"leakage in {self.states} states"

    @property
    def cost(self) -> int:
        return self.states

    def where(self, units: LibraryUnits) -> dict[str, str | None]:
        return {"cell": self.cell, "point": "leakage"}


@dataclass(frozen=True, slots=True)
class FunctionPoint:
    """The check that a cell's netlist does what its functions say: every input vector at DC,
    or for a flip-flop every data vector clocked in from either stored value."""

    cell: str
    vectors: int  # the vectors tried: the check's cost

    AXES: ClassVar[tuple[str, ...]] = ()
    FILLABLE: ClassVar[bool] = False

    @property
    def series(self) -> tuple[object, ...]:
        return ("function", self.cell)

    @property
    def coordinates(self) -> tuple[float, ...]:
        return ()

    @property
    def label(self) -> str:
        return f"function check of {self.vectors} vectors"

    @property
    def cost(self) -> int:
        return self.vectors

    def where(self, units: LibraryUnits) -> dict[str, str | None]:
        return {"cell": self.cell}


@dataclass(frozen=True, slots=True)
class TightPoint:
    """A combinational grid point measured again at tightened simulator settings: how far its
    values move there is their error bar (``outcomes.TightMeasurement``)."""

    base: TimingPoint

    AXES: ClassVar[tuple[str, ...]] = TimingPoint.AXES
    FILLABLE: ClassVar[bool] = False  # an error bar is measured or absent, never filled

    @property
    def cell(self) -> str:
        return self.base.cell

    @property
    def label(self) -> str:
        return f"{self.base.label} (tightened)"

    @property
    def series(self) -> tuple[object, ...]:
        return ("tight", *self.base.series)

    @property
    def coordinates(self) -> tuple[float, ...]:
        return self.base.coordinates

    @property
    def cost(self) -> int:
        return TIGHT_RUNS

    def where(self, units: LibraryUnits) -> dict[str, str | None]:
        return {**self.base.where(units), "check": "tightened settings"}


# Runs of the driver stage: each input edge simulated coarse and then fine.
SHAPE_RUNS = 4


@dataclass(frozen=True, slots=True)
class ShapePoint:
    """The driver stage: the library's driver chain simulated once per run, its output edges
    normalised into the input shape every other point uses. ``cell`` is the chain's last
    cell; its testbench is the chain's (``netlist.build_chain_deck``)."""

    cell: str
    chain: tuple[str, ...]  # the driver's cells, first to last
    slew: float  # s, the linear ramp into the first cell

    AXES: ClassVar[tuple[str, ...]] = ()
    FILLABLE: ClassVar[bool] = False

    @property
    def series(self) -> tuple[object, ...]:
        return ("shape", self.chain)

    @property
    def coordinates(self) -> tuple[float, ...]:
        return ()

    @property
    def label(self) -> str:
        return f"input shape from driver {' > '.join(self.chain)}, slew {self.slew:.4g} s"

    @property
    def cost(self) -> int:
        return SHAPE_RUNS

    def where(self, units: LibraryUnits) -> dict[str, str | None]:
        slew = show_time(self.slew, units.time_unit)
        return {
            "key": "input_shape.driver",
            "cell": self.cell,
            "point": f"driver {' > '.join(self.chain)}, input slew {slew}",
        }


@dataclass(frozen=True, slots=True)
class PathPoint:
    """One transistor-level run of a whole circuit of cells (``records.paths``): its input port
    driven by the library's input ramp, the crossing time and transition of every ``nodes``
    entry measured."""

    cell: str  # the circuit's name: the key of its testbench in a sweep, as a cell's is
    start: str  # the input port
    input_edge: str
    slew: float  # s, the input ramp's, as a table records it
    nodes: tuple[tuple[str, str], ...]  # (simulator node, the edge expected there)
    step: float  # s, the transient's maximum step
    stop: float  # s, the transient's cap
    # (0 V source in series with a gate's input, the node of the net it is on; that node is in
    # ``nodes``): the charge each receiving pin draws in the real circuit
    probes: tuple[tuple[str, str], ...] = ()

    @property
    def label(self) -> str:
        return f"path circuit {self.cell}: {self.start} {self.input_edge} slew {self.slew:.4g} s"

    AXES: ClassVar[tuple[str, ...]] = ("slew",)
    FILLABLE: ClassVar[bool] = False

    @property
    def series(self) -> tuple[object, ...]:
        return ("path", self.cell, self.start, self.input_edge, self.nodes, self.probes)

    @property
    def coordinates(self) -> tuple[float, ...]:
        return (self.slew,)

    @property
    def cost(self) -> int:
        return POINT_RUNS

    def where(self, units: LibraryUnits) -> dict[str, str | None]:
        slew = show_time(self.slew, units.time_unit)
        return {
            "cell": f"path circuit {self.cell}",
            "point": f"{self.start} {self.input_edge}, slew {slew}",
        }


@dataclass(frozen=True, slots=True)
class SpreadPoint:
    """The spread of a combinational point's delay and transition under transistor mismatch:
    with ``samples`` 0, its sensitivities (the point at +σ and −σ of each transistor's
    threshold in turn); otherwise that many Monte Carlo samples of every threshold at once,
    drawn from ``seed``."""

    timing: TimingPoint
    devices: int  # transistors with a threshold of their own
    samples: int = 0
    seed: int = 0

    AXES: ClassVar[tuple[str, ...]] = TimingPoint.AXES
    FILLABLE: ClassVar[bool] = False

    @property
    def cell(self) -> str:
        return self.timing.cell

    @property
    def label(self) -> str:
        how = f"{self.samples} samples" if self.samples else f"{self.devices} transistors"
        return f"spread ({how}) of {self.timing.label}"

    @property
    def series(self) -> tuple[object, ...]:
        return ("spread", self.samples > 0, *self.timing.series[1:])

    @property
    def coordinates(self) -> tuple[float, ...]:
        return self.timing.coordinates

    @property
    def cost(self) -> int:
        return 1 + (self.samples or 2 * self.devices)

    def where(self, units: LibraryUnits) -> dict[str, str | None]:
        where = self.timing.where(units)
        how = f"Monte Carlo, {self.samples} samples" if self.samples else "sensitivities"
        return {**where, "point": f"{where['point']} (spread: {how})"}


# The points of a plan's tables; with the toggles, all the work a sweep hands to workers.
Point = TimingPoint | ConstraintPoint | PulsePoint
Work = (
    Point
    | TogglePoint
    | LeakagePoint
    | FunctionPoint
    | TightPoint
    | ShapePoint
    | PathPoint
    | SpreadPoint
)


@dataclass(frozen=True, slots=True)
class Plan:
    arcs: tuple[Arc, ...]
    points: tuple[Point, ...]

    def for_cell(self, cell: str) -> tuple[Point, ...]:
        return tuple(p for p in self.points if p.cell == cell)
