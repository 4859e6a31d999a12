"""A dry-run plan: how many simulations a config asks for, and about how long they will take.

The points come from the sweep plan (every arc × sensitizing state × input edge × slew ×
load; a flip-flop adds its setup, hold, recovery, removal and pulse-width searches; every cell
its hidden-power toggles). What each costs, in simulations and in time, is measured here on a
few sample points per cell, simulated and timed on one worker process (this one parses no
model), so that refinements of the
step, retries and the length of a search are counted as the run will meet them:

- combinational points: the probes of one series, which size its steps (``stepsize``) and
  stand as the grid corners' results, then the smallest, middle and largest slew and load of
  the cell's first arc;
- a flip-flop's clock and control arcs: the first, middle and last of them;
- searches: one of each kind (setup, hold, recovery, removal, pulse width), since a search's
  runs are set by its tolerance and by how far its answer lies from where its bracketing walk
  starts (``sequential._bracket``), alike enough for every search of a kind in a cell;
- toggles: the first of the cell's; a flip-flop's first, middle and last (each starts from
  the held state under its own input levels, checked once a worker: ``floptoggle._start``);
- spread points (``[mismatch]``): a few sensitivity points (``SAMPLES``) give the runs and the
  time of one simulation against a point's ``cost``; every spread point, Monte Carlo ones
  included, is charged its ``cost`` at that rate (a Monte Carlo point's samples are runs of
  the same point, at the same step, as the sensitivities are), so the plan never runs one.

Each group of points is charged the mean of its samples. The simulations counted are those the
run's summary counts, leakage included; the functional check, which runs before the sweep, is
counted apart (``plan.cellwork``). The samples cost a few simulations per cell
(a few searches per flip-flop), never the sweep.
"""

from __future__ import annotations

import time
from collections import Counter
from dataclasses import dataclass, replace

from charflow.config.library import LibraryConfig
from charflow.config.shapes import InputShape
from charflow.execution.workers import in_worker
from charflow.measurement import combinational, registry, sequential
from charflow.measurement.combinational import backend_for, explain, measure_point
from charflow.plan import arcs as planning
from charflow.plan.cellwork import function_point, leakage_point, tight_points
from charflow.plan.spread import spread_points
from charflow.plan.toggles import plan_toggles
from charflow.records.errors import CharflowError, MeasurementError
from charflow.records.outcomes import Failure
from charflow.records.points import ConstraintPoint, Plan, PulsePoint, SpreadPoint, TimingPoint
from charflow.simulation import plausible
from charflow.simulation.backends import SharedBackend
from charflow.simulation.netlist import Deck, build_deck
from charflow.simulation.session import SESSION

SAMPLES = 3  # sample points per group of many (combinational and clock points)
TOGGLE_SAMPLES = 3  # a flip-flop's toggles sampled (_cell_costs)
TIMING, PROBES = "timing points", "step probes"  # a combinational cell's nominal points


@dataclass(frozen=True, slots=True)
class ArcCount:
    cell: str
    related: str
    output: str
    states: int
    points: int


@dataclass(frozen=True, slots=True)
class GroupCost:
    """Points of a cell measured the same way, and what one of them costs."""

    kind: str  # "timing points", "step probes", "clock and control arcs", "setup searches", ...
    points: int
    per_point: float  # s, mean over the samples
    simulations: float  # per point, mean over the samples
    samples: int  # points simulated to measure the two


@dataclass(frozen=True, slots=True)
class CellCost:
    cell: str
    groups: tuple[GroupCost, ...]
    load: float  # s, the simulator reading the cell's testbench (once per worker)
    outside: int  # simulations outside the sweep: the functional check
    leakage: int = 0  # the leakage point's runs, one per state (in the sweep)

    @property
    def work(self) -> float:
        """s of simulation on one worker."""
        return sum(g.points * g.per_point for g in self.groups)

    @property
    def simulations(self) -> float:
        """Simulations of the cell's sweep, as the run's summary counts them."""
        return sum(g.points * g.simulations for g in self.groups) + self.leakage


@dataclass(frozen=True, slots=True)
class Estimate:
    arcs: tuple[ArcCount, ...]
    cells: tuple[CellCost, ...]
    jobs: int

    @property
    def points(self) -> int:
        """Timing points of every arc."""
        return sum(a.points for a in self.arcs)

    @property
    def samples(self) -> int:
        """Points simulated to measure the costs."""
        return sum(g.samples for c in self.cells for g in c.groups)

    def _searches(self) -> list[GroupCost]:
        return [g for c in self.cells for g in c.groups if g.kind.endswith("searches")]

    @property
    def searches(self) -> int:
        return sum(g.points for g in self._searches())

    @property
    def search_simulations(self) -> float:
        return sum(g.points * g.simulations for g in self._searches())

    @property
    def simulations(self) -> float:
        """Simulations of the sweep: what the run's summary will count."""
        return sum(c.simulations for c in self.cells)

    @property
    def outside(self) -> int:
        return sum(c.outside for c in self.cells)

    def simulations_of(self, kind: str) -> float:
        """Simulations of one kind of group (``SIGMA_TABLES``, ...) over every cell."""
        return sum(g.points * g.simulations for c in self.cells for g in c.groups if g.kind == kind)

    @property
    def seconds(self) -> float:
        """Estimated wall time of the sweep on ``jobs`` workers."""
        # Any worker may read any cell's testbench, once.
        return sum(c.work for c in self.cells) / self.jobs + sum(c.load for c in self.cells)


def estimate(config: LibraryConfig, cells: list[str] | None = None, jobs: int = 1) -> Estimate:
    """Count the points of the chosen cells and measure a few of each. A driver's input shape
    is not measured for the estimate: its samples are timed with the linear ramp."""
    if config.input_shape.kind == "driver" and not config.input_shape.rise:
        config = replace(config, input_shape=InputShape())
    plan = planning.plan(config, cells)
    plausible.announce(config, {a.cell for a in plan.arcs})
    timing = [p for p in plan.points if isinstance(p, TimingPoint)]
    per_arc = Counter((p.cell, p.related, p.output) for p in timing)
    arcs = tuple(
        ArcCount(a.cell, a.related, a.output, len(a.states), per_arc[(a.cell, a.related, a.output)])
        for a in plan.arcs
    )
    names = list(dict.fromkeys(a.cell for a in plan.arcs))
    # The samples run in a worker process, as the sweep's points do: this one parses no model.
    costs = in_worker(_cell_costs, config, names, plan)
    return Estimate(arcs, tuple(costs), jobs)


def _cell_costs(config: LibraryConfig, names: list[str], plan: Plan) -> list[CellCost]:
    """In a worker: each cell's testbench read and its sample points measured, timed. The
    worker may be one an earlier sweep in this process left running: its caches (held
    states, event checks, windows) are emptied first, so that the samples pay what a fresh
    worker of the run pays."""
    SESSION.forget()
    costs = []
    for name in names:
        cell = config.cell(name)
        deck = build_deck(config, cell)
        start = time.perf_counter()
        if config.simulation.backend == "shared":
            backend = backend_for(config)
            assert isinstance(backend, SharedBackend)  # the backend the config names
            backend.load(deck)
        load = time.perf_counter() - start
        points = plan.for_cell(name)
        if cell.flop is not None:
            groups = _flop_groups(config, deck, points)
        else:
            groups = _combinational_groups(config, deck, points)
        toggles = plan_toggles(config, [name])
        if toggles:
            # A flip-flop's toggle checks the state it starts from once a worker: three samples.
            count = 1 if cell.flop is None else TOGGLE_SAMPLES
            groups += (_sampled(config, deck, "hidden-power toggles", toggles, count),)
        tight = tight_points(config, points)
        if tight:
            groups += (_sampled(config, deck, "error bars", tight, SAMPLES),)
        groups += _spread_groups(
            config, deck, spread_points(config, Plan(plan.arcs, points), {name: len(deck.devices)})
        )
        costs.append(
            CellCost(name, groups, load, function_point(cell).cost, leakage_point(cell).cost)
        )
    return costs


def _measured(config: LibraryConfig, deck: Deck, points) -> list:
    """Measure sample points; a sample that fails stops the plan, naming the point: the run
    would fail there too."""
    outcomes = registry.measure_chunk(config, deck, points)
    for o in outcomes:
        if isinstance(o, Failure):
            raise MeasurementError(o.reason, **o.point.where(config))
    return outcomes


def _picks(group, count: int) -> list:
    """``count`` points spread over ``group``: the first, ..., the last."""
    count = min(count, len(group))
    return [group[i * (len(group) - 1) // max(1, count - 1)] for i in range(count)]


def _sampled(config: LibraryConfig, deck: Deck, kind: str, group, count: int) -> GroupCost:
    """A group's cost from ``count`` samples spread over it (``_picks``)."""
    picks = _picks(group, count)
    start = time.perf_counter()
    outcomes = _measured(config, deck, picks)
    seconds = (time.perf_counter() - start) / len(picks)
    runs = sum(o.runs for o in outcomes) / len(outcomes)
    return GroupCost(kind, len(group), seconds, runs, len(picks))


def _combinational_groups(config: LibraryConfig, deck: Deck, points) -> tuple[GroupCost, ...]:
    """The step probes of one series (each series runs its own, on the grid's corners), and
    a few points measured with the step the probes give."""
    first = points[0]
    series = len({replace(p, slew=0.0, load=0.0) for p in points})
    start = time.perf_counter()
    combinational.first_step(config, deck, first)  # a probe that fails leaves the plain step
    per_series = time.perf_counter() - start
    grid = config.cell(first.cell).grid
    corners = {(grid.slew[0], grid.load[0]), (grid.slew[0], grid.load[-1])}
    corners.add((grid.slew[-1], grid.load[0]))
    tried = [combinational.probed(config, deck, replace(first, slew=s, load=c)) for s, c in corners]
    probes = [m for m in tried if m is not None]  # none when a probe failed
    picks = [
        replace(
            first,
            slew=grid.slew[i * (len(grid.slew) - 1) // (SAMPLES - 1)],
            load=grid.load[i * (len(grid.load) - 1) // (SAMPLES - 1)],
        )
        for i in range(SAMPLES)
    ]
    start = time.perf_counter()
    runs = 0
    for p in picks:
        try:
            # With its step given, a grid corner is simulated too, not taken from its probe.
            runs += measure_point(
                config, deck, p, step=combinational.first_step(config, deck, p)
            ).runs
        except CharflowError as exc:
            raise explain(config, p, exc) from exc
    per_point = (time.perf_counter() - start) / len(picks)
    probed = series * len(probes)
    samples = GroupCost(TIMING, len(points) - probed, per_point, runs / len(picks), len(picks))
    if not probes:
        return (samples,)
    per_probe = sum(m.runs for m in probes) / len(probes)
    cost = GroupCost(PROBES, probed, per_series / len(probes), per_probe, len(probes))
    return (samples, cost)


SIGMA_TABLES = "sigma tables"  # the spread points the sigma tables are made of
MONTE_CARLO_CHECKS = "Monte Carlo checks"  # the linear method's reference points


def _spread_groups(
    config: LibraryConfig, deck: Deck, spread: tuple[SpreadPoint, ...]
) -> tuple[GroupCost, ...]:
    """The sigma tables' spread points and the Monte Carlo checks beside them, each charged
    its points' ``cost`` at the runs per cost and seconds per run of a few sensitivity points
    (``SAMPLES``) measured here: a Monte Carlo sample is one run of the same point."""
    if not spread:
        return ()
    picks = [SpreadPoint(p.timing, p.devices) for p in _picks(spread, SAMPLES)]
    start = time.perf_counter()
    outcomes = _measured(config, deck, picks)
    seconds = time.perf_counter() - start
    runs = sum(o.runs for o in outcomes)
    per_cost = runs / sum(p.cost for p in picks)  # refinements and retries of the step
    per_run = seconds / runs
    sampled = all(p.samples for p in spread)  # the sampled method: Monte Carlo tables
    groups = []
    for kind, group in (
        (SIGMA_TABLES, [p for p in spread if bool(p.samples) == sampled]),
        (MONTE_CARLO_CHECKS, [p for p in spread if bool(p.samples) != sampled]),
    ):
        if group:
            each = per_cost * sum(p.cost for p in group) / len(group)
            measured = len(picks) if kind == SIGMA_TABLES else 0  # the picks, counted once
            groups.append(GroupCost(kind, len(group), each * per_run, each, measured))
    return tuple(groups)


_SEARCHES = ("setup", "hold", "recovery", "removal")
CLOCKED = "clock and control arcs"


def _flop_groups(config: LibraryConfig, deck: Deck, points) -> tuple[GroupCost, ...]:
    """A flip-flop's points by how they are measured: clock and control arcs from a few
    samples, each kind of search from one."""
    clocked = [p for p in points if isinstance(p, TimingPoint)]
    groups = []
    if clocked:
        groups += [
            _arc_checks(config, deck, clocked),
            _sampled(config, deck, CLOCKED, clocked, SAMPLES),
        ]
    for kind in _SEARCHES:
        group = [p for p in points if isinstance(p, ConstraintPoint) and p.kind == kind]
        if group:
            groups.append(_sampled(config, deck, f"{kind} searches", group, 1))
    pulses = [p for p in points if isinstance(p, PulsePoint)]
    if pulses:
        groups.append(_sampled(config, deck, "pulse-width searches", pulses, 1))
    return tuple(groups)


def _arc_checks(config: LibraryConfig, deck: Deck, clocked) -> GroupCost:
    """The probes and convergence checks of the clock and control events (``sequential.
    check_arc``; an event's runs time both outputs' arcs), once per event in a worker: measured
    on the events of the clocked samples, first, so that those samples are charged their own
    runs only."""
    arcs = {sequential.arc_of(p) for p in clocked}
    checked = list({sequential.arc_of(p): p for p in _picks(clocked, SAMPLES)}.values())
    start = time.perf_counter()
    runs = sum(sequential.check_arc(config, deck, p)[0] for p in checked)
    seconds = (time.perf_counter() - start) / len(checked)
    return GroupCost("arc checks", len(arcs), seconds, runs / len(checked), len(checked))


def render(est: Estimate) -> str:
    lines = ["cell            arc            states  points"]
    for a in est.arcs:
        lines.append(f"{a.cell:<15} {a.related + '->' + a.output:<14} {a.states:6d}  {a.points:6d}")
    lines.append("")
    lines.append("cell / group                 points  per point   simulations each")
    for c in est.cells:
        lines.append(f"{c.cell:<28} testbench read {_duration(c.load)}")
        for g in c.groups:
            lines.append(
                f"  {g.kind:<26} {g.points:5d}  {_duration(g.per_point):>9}   {g.simulations:.1f}"
            )
    lines.append("")
    searches = ""
    if est.searches:
        searches = (
            f", {est.search_simulations:,.0f} of them in {est.searches} searches "
            f"({est.search_simulations / est.searches:.0f} each)"
        )
    lines.append(
        f"about {est.simulations:,.0f} simulations in the sweep (refinements, retries and every "
        f"search trial included, as the run's summary counts them){searches}, and "
        f"{est.outside:,} outside it (functional check); the sweep takes about "
        f"{_duration(est.seconds)} on {est.jobs} worker{'s' * (est.jobs > 1)} (start-up and "
        f"the functional check come on top); measured on {est.samples} sample points"
    )
    tables, checks = est.simulations_of(SIGMA_TABLES), est.simulations_of(MONTE_CARLO_CHECKS)
    if tables or checks:
        nominal = est.simulations_of(TIMING) + est.simulations_of(PROBES)
        lines.append(
            f"of them, about {tables:,.0f} for the sigma tables ({tables / nominal:.2f}x the "
            f"nominal combinational points' {nominal:,.0f}) and {checks:,.0f} for the Monte "
            "Carlo checks"
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
