"""A dry-run plan: how many simulations a config asks for, and about how long they will take.

The count comes from the sweep plan (every arc × sensitizing state × input edge × slew ×
load is one point, one simulation unless its step has to be refined; a flip-flop adds its
setup, hold and pulse-width searches, a bisection of many simulations each). The time comes
from a few sample points per cell, simulated and timed here on one process. Combinational
points: the smallest, the middle and the largest slew and load of the cell's first arc, after
the probes that size the series' steps (``stepsize``), timed on their own. Flip-flops: a few
clock-arc points and one search of each kind. Each group of points is charged the mean of its
samples and each series its probes; the sum is shared by the workers. The samples cost a few
simulations per cell (a few searches per flip-flop), never the sweep.
"""

from __future__ import annotations

import time
from collections import Counter
from dataclasses import dataclass, replace

from . import stepsize, sweep
from .config import LibraryConfig
from .netlist import Deck, build_deck
from .timing import Failure, backend_for, measure_chunk, measure_point

SAMPLES = 3  # sample points per cell


@dataclass(frozen=True, slots=True)
class ArcCount:
    cell: str
    related: str
    output: str
    states: int
    points: int


@dataclass(frozen=True, slots=True)
class GroupCost:
    """Points of a flip-flop measured the same way: its clock and control arcs, or one kind
    of search."""

    kind: str  # "clock and control arcs", "constraint searches", "pulse-width searches"
    points: int
    per_point: float  # s, mean over the samples
    simulations: float  # per point, mean over the samples


@dataclass(frozen=True, slots=True)
class CellCost:
    cell: str
    points: int  # combinational timing points
    series: int  # arcs × states × input edges: each calibrates its steps once
    probed: int  # points per series that its probes measure (grid corners)
    per_point: float  # s, mean over the samples
    per_series: float  # s, the step probes of one series
    load: float  # s, the simulator reading the cell's testbench (once per worker)
    groups: tuple[GroupCost, ...] = ()  # a flip-flop's points

    @property
    def work(self) -> float:
        """s of simulation on one worker."""
        timing = (self.points - self.series * self.probed) * self.per_point
        timing += self.series * self.per_series
        return timing + sum(g.points * g.per_point for g in self.groups)


@dataclass(frozen=True, slots=True)
class Estimate:
    arcs: tuple[ArcCount, ...]
    cells: tuple[CellCost, ...]
    jobs: int
    samples: int  # points simulated to time the cells

    @property
    def points(self) -> int:
        """Timing points of every arc."""
        return sum(a.points for a in self.arcs)

    @property
    def searches(self) -> int:
        return sum(g.points for c in self.cells for g in c.groups if "search" in g.kind)

    @property
    def seconds(self) -> float:
        """Estimated wall time of the sweep on ``jobs`` workers."""
        # Any worker may read any cell's testbench, once.
        return sum(c.work for c in self.cells) / self.jobs + sum(c.load for c in self.cells)


def estimate(config: LibraryConfig, cells: list[str] | None = None, jobs: int = 1) -> Estimate:
    """Count the points of the chosen cells and time a few of each."""
    plan = sweep.plan(config, cells)
    timing = [p for p in plan.points if isinstance(p, sweep.TimingPoint)]
    per_arc = Counter((p.cell, p.related, p.output) for p in timing)
    arcs = tuple(
        ArcCount(a.cell, a.related, a.output, len(a.states), per_arc[(a.cell, a.related, a.output)])
        for a in plan.arcs
    )
    costs = []
    samples = 0
    for name in dict.fromkeys(a.cell for a in plan.arcs):
        cell = config.cell(name)
        deck = build_deck(config, cell)
        backend = backend_for(config)
        start = time.perf_counter()
        if config.simulation.backend == "shared":
            backend.load(deck)
        load = time.perf_counter() - start
        points = plan.for_cell(name)
        if cell.flop is not None:
            groups = _flop_groups(config, deck, points)
            samples += sum(min(SAMPLES, g.points) if g.kind == CLOCKED else 1 for g in groups)
            costs.append(CellCost(name, 0, 0, 0, 0.0, 0.0, load, groups))
            continue
        series = {replace(p, slew=0.0, load=0.0) for p in points}
        first = points[0]
        start = time.perf_counter()
        stepsize.first_step(config, deck, first)
        per_series = time.perf_counter() - start
        grid = cell.grid
        picks = [
            replace(
                first,
                slew=grid.slew[i * (len(grid.slew) - 1) // (SAMPLES - 1)],
                load=grid.load[i * (len(grid.load) - 1) // (SAMPLES - 1)],
            )
            for i in range(SAMPLES)
        ]
        start = time.perf_counter()
        for p in picks:
            # With its step given, a grid corner is simulated too, not taken from its probe.
            measure_point(config, deck, p, step=stepsize.first_step(config, deck, p))
        per_point = (time.perf_counter() - start) / len(picks)
        samples += len(picks)
        corners = {(grid.slew[0], grid.load[0]), (grid.slew[0], grid.load[-1])}
        corners.add((grid.slew[-1], grid.load[0]))
        costs.append(
            CellCost(name, len(points), len(series), len(corners), per_point, per_series, load)
        )
    return Estimate(arcs, tuple(costs), jobs, samples)


CLOCKED = "clock and control arcs"
_KINDS = (
    (CLOCKED, sweep.TimingPoint),
    ("constraint searches", sweep.ConstraintPoint),
    ("pulse-width searches", sweep.PulsePoint),
)


def _flop_groups(config: LibraryConfig, deck: Deck, points) -> tuple[GroupCost, ...]:
    """A flip-flop's points by how they are measured, each group timed on a few samples
    (clock arcs: the first, middle and last; a search: the first, as each costs many runs)."""
    groups = []
    for kind, cls in _KINDS:
        group = [p for p in points if isinstance(p, cls)]
        if not group:
            continue
        count = min(SAMPLES, len(group)) if kind == CLOCKED else 1
        picks = [group[i * (len(group) - 1) // max(1, count - 1)] for i in range(count)]
        start = time.perf_counter()
        outcomes = measure_chunk(config, deck, picks)
        seconds = (time.perf_counter() - start) / len(picks)
        runs = [o.runs for o in outcomes if not isinstance(o, Failure)]
        groups.append(GroupCost(kind, len(group), seconds, sum(runs) / max(1, len(runs))))
    return tuple(groups)


def render(est: Estimate) -> str:
    lines = ["cell            arc            states  simulations"]
    for a in est.arcs:
        lines.append(
            f"{a.cell:<15} {a.related + '->' + a.output:<14} {a.states:6d}  {a.points:11d}"
        )
    lines.append("")
    lines.append("cell            simulations  per point  step probes      testbench read")
    for c in est.cells:
        if c.groups:
            lines.append(f"{c.cell:<15} {'':11}  {'':9}  {'':15}  {c.load * 1e3:.1f} ms")
            for g in c.groups:
                lines.append(
                    f"  {g.kind:<21} {g.points:5d} x {_duration(g.per_point)} "
                    f"({g.simulations:.0f} simulations each)"
                )
            continue
        probes = f"{c.series} x {c.per_series * 1e3:.1f} ms"
        lines.append(
            f"{c.cell:<15} {c.points:11d}  {c.per_point * 1e3:6.2f} ms  {probes:<15}  "
            f"{c.load * 1e3:.1f} ms"
        )
    lines.append("")
    searches = f" and {est.searches} searches" if est.searches else ""
    lines.append(
        f"{est.points} simulations (one per point; a point whose output edge is sampled too "
        f"coarsely takes more){searches}; the sweep takes about {_duration(est.seconds)} on "
        f"{est.jobs} worker{'s' * (est.jobs > 1)} (start-up, the functional check and the "
        f"hidden-power toggles come on top), estimated from {est.samples} timed sample points"
    )
    return "\n".join(lines)


def _duration(seconds: float) -> str:
    if seconds < 1:
        return f"{seconds * 1e3:.1f} ms"
    if seconds < 120:
        return f"{seconds:.1f} s"
    if seconds < 7200:
        return f"{seconds / 60:.1f} min"
    return f"{seconds / 3600:.1f} h"
