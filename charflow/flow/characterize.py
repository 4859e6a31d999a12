"""The characterization flow as public stages a user can call one by one.

    config.load → planning.plan → netlist.build_deck → sweep.run → tabulate → write

``characterize`` chains them, with the function checks (``verify`` runs them alone) in the
run's one sweep, each cell's first; each stage takes and returns plain records, so any one can
be tested or re-run alone; power rides along (hidden-power toggles in the sweep, leakage per
deck, ``power_tables.tabulate``). With a result store (``store.Store``) the sweep simulates only
points it does not hold, and a run of a few cells or one arc fills the rest of the library
from the store.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

from charflow import __version__
from charflow.config.library import FlopSpec, LibraryConfig
from charflow.config.shapes import InputShape
from charflow.execution import provenance, sweep
from charflow.execution.store import Stale, Store, keyring
from charflow.execution.workers import Reads
from charflow.io import faults, liberty
from charflow.io.atomic import write_atomic
from charflow.plan import arcs as planning
from charflow.plan.cellwork import function_points, leakage_points, tight_points
from charflow.plan.spread import spread_points
from charflow.plan.toggles import plan_toggles
from charflow.records import errors
from charflow.records.errors import ConfigError, OutputError
from charflow.records.lazy import deferred
from charflow.records.names import (
    delay_quantity,
    pin_name,
    power_quantity,
    table_name,
    transition_quantity,
)
from charflow.records.outcomes import (
    Failure,
    FunctionChecked,
    LeakageResult,
    Measurement,
    Outcome,
    SearchResult,
    ShapeResult,
    SpreadMeasurement,
    TightMeasurement,
    ToggleMeasurement,
)
from charflow.records.points import (
    TIGHT_RELTOL,
    TIGHT_STEPS,
    Arc,
    ConstraintPoint,
    FunctionPoint,
    LeakagePoint,
    PathPoint,
    Plan,
    PulsePoint,
    ShapePoint,
    SpreadPoint,
    State,
    TightPoint,
    TimingPoint,
    TogglePoint,
    Work,
)
from charflow.simulation.netlist import Deck, build_chain_deck, build_deck
from charflow.tables import gaps
from charflow.tables import power as power_tables
from charflow.tables.table import Table
from charflow.tables.tabulate import ArcTables, CellTables, PinCap, tabulate

# The sigma tables need scipy: it loads only in a run with spread points ([mismatch]).
if TYPE_CHECKING:
    from charflow.tables import spread as spread_tables
else:
    spread_tables = deferred("charflow.tables.spread")


@dataclass(frozen=True, slots=True)
class RunResult:
    plan: Plan
    measurements: tuple[Measurement | SearchResult, ...]
    failures: tuple[Failure, ...]
    cells: tuple[CellTables, ...]  # empty when any point failed
    wall_seconds: float
    provenance: provenance.Provenance  # what made the library: programs, files, settings
    reused: frozenset[Work] = frozenset()  # from the store, not simulated now
    stale: tuple[Stale, ...] = ()  # from stored rows older than the current inputs
    left_out: tuple[str, ...] = ()  # cells with points never stored: not in plan or tables
    toggles: tuple[ToggleMeasurement, ...] = ()
    leakage: tuple[LeakageResult, ...] = ()  # per cell of the plan, in its order
    # Toggles whose energy could not be measured: reported, left out of the tables; they do
    # not stop the Liberty file, which then has no hidden power for that pin, state and edge.
    unmeasured: tuple[Failure, ...] = ()
    cell_power: tuple[power_tables.CellPower, ...] = ()  # empty when any timing point failed
    # With a gap-filling method: the failed points it filled (in the tables, never stored) and
    # those it could not (still in ``failures``).
    gap_report: gaps.GapReport | None = None
    # The grid points measured again at tightened settings (``[error_bars]``), and those whose
    # re-measure failed (their values have no error bar; the library is written all the same).
    tight: tuple[TightMeasurement, ...] = ()
    unbarred: tuple[Failure, ...] = ()
    # The input waveform every point had: the config's, with the driver's edges measured.
    input_shape: InputShape = field(default_factory=InputShape)
    # With [mismatch] method set: the spread points measured, those that failed (reported;
    # they leave their arc without sigma tables, never stop the nominal library) and the
    # sigma tables.
    spreads: tuple[SpreadMeasurement, ...] = ()
    spread_failures: tuple[Failure, ...] = ()
    spread: tuple[spread_tables.ArcSpread, ...] = ()
    # Testbenches the simulators read for this run (function check and sweep), each a parse
    # of the cell's models, and the seconds they took summed over the workers.
    reads: int = 0
    read_seconds: float = 0.0
    cell_reads: tuple[tuple[str, int], ...] = ()  # (cell, reads) of each cell read

    @property
    def filled(self) -> tuple[gaps.Filled, ...]:
        return self.gap_report.filled if self.gap_report is not None else ()

    @property
    def faults(self) -> tuple[Failure, ...]:
        """Every point that gave no measurement, filled or not, in the plan's order; then the
        toggles."""
        order: dict[Work, int] = {p: i for i, p in enumerate(self.plan.points)}
        timing = sorted(
            (*self.failures, *(f.failure for f in self.filled)),
            key=lambda f: order.get(f.point, len(order)),  # per-cell work after the grid
        )
        return (*timing, *self.unmeasured)

    @property
    def simulated(self) -> int:
        """Points measured by simulating them in this run."""
        return len(self.measurements) - len(self.reused & {m.point for m in self.measurements})

    @property
    def simulations(self) -> int:
        """Simulator runs of this run, refinements and retries included."""
        done = (*self.measurements, *self.toggles, *self.leakage, *self.tight, *self.spreads)
        return sum(m.runs for m in done if m.point not in self.reused)

    def spread_cost(self) -> tuple[int, int, int]:
        """Simulations of the sigma tables, of the Monte Carlo checks beside them, and of the
        nominal combinational points they are for (measured or stored: the ratio is the
        method's, not this run's)."""
        method = all(m.point.samples > 0 for m in self.spreads)  # the sampled method
        tables = sum(m.runs for m in self.spreads if (m.point.samples > 0) == method)
        checks = sum(m.runs for m in self.spreads if (m.point.samples > 0) != method)
        nominal = sum(
            m.runs
            for m in self.measurements
            if isinstance(m, Measurement) and m.point.kind == "combinational"
        )
        return tables, checks, nominal

    @property
    def sim_seconds(self) -> float:
        """Simulator time of this run, summed over workers."""
        done = (*self.measurements, *self.toggles, *self.leakage, *self.tight)
        return sum(m.sim_seconds for m in done if m.point not in self.reused)

    def stale_tables(self) -> dict[tuple[str, ...], list[str]]:
        """The names (as ``charflow diff`` prints them) of the tables holding values from stored
        rows older than the current inputs, by the model files that changed since (``()``:
        the testbench or the settings changed)."""
        out: dict[tuple[str, ...], dict[str, None]] = {}
        for s in self.stale:
            names = out.setdefault(s.models, {})
            names.update(dict.fromkeys(_tables_of(self.plan, s.point)))
        return {models: sorted(names) for models, names in sorted(out.items())}


def _tables_of(plan: Plan, p: Work) -> list[str]:
    """The tables (or pin values) of a library that a point's result goes into."""
    if isinstance(p, LeakagePoint):
        return [f"{p.cell} leakage"]
    # A tightened value, the driver's shape and a path run are in no Liberty table.
    if isinstance(p, FunctionPoint | TightPoint | ShapePoint | PathPoint):
        return []
    if isinstance(p, PulsePoint):
        return [pin_name(p.cell, p.pin, f"min_pulse_width_{p.level}")]
    if isinstance(p, TogglePoint):
        return [pin_name(p.cell, p.related, f"when {p.when} {power_quantity(p.input_edge)}")]
    if isinstance(p, ConstraintPoint):
        kind = f"{p.kind}_{'rising' if p.clock_edge == 'rise' else 'falling'}"
        quantity = f"{p.data_edge}_constraint"
        return [table_name(p.cell, p.related, p.constrained, "", quantity, kind)]
    if isinstance(p, SpreadPoint):  # the sigma tables beside the point's timing tables
        return [f"{name} (sigma)" for name in _tables_of(plan, p.timing)]
    arc = next(
        a for a in plan.arcs if (a.cell, a.related, a.output) == (p.cell, p.related, p.output)
    )
    whens = [""] + ([State(p.state_side, "").when] if len(arc.states) > 1 else [])
    quantities = [
        delay_quantity(p.output_edge),
        transition_quantity(p.output_edge),
        power_quantity(p.output_edge),
    ]
    return [
        table_name(p.cell, p.related, p.output, when, quantity, arc.kind)
        for when in whens
        for quantity in quantities
    ]


def verify(
    config: LibraryConfig,
    cells: list[str] | None = None,
    *,
    store: Store | None = None,
    decks: Mapping[str, Deck] | None = None,
    jobs: int | None = None,
    scheduler: str | None = None,
    reads: Reads | None = None,
) -> tuple[FunctionChecked, ...]:
    """Simulate every input vector of every chosen cell against its declared function, in the
    sweep's workers, as a sweep of its own (``characterize`` runs the checks in its sweep);
    with a store, a cell whose check passed before with the same inputs is not checked again.
    The first cell that fails stops the run with its error. ``reads`` tallies the testbenches
    read."""
    names = [c.name for c in config.cells if cells is None or c.name in cells]
    points = function_points(config, names)
    outcomes = list(
        sweep.run(
            config, points, jobs=jobs, store=store, scheduler=scheduler, decks=decks, reads=reads
        )
    )
    failed = [o for o in outcomes if isinstance(o, Failure)]
    if failed:
        raise _first_failed(failed, names)
    return tuple(o for o in outcomes if isinstance(o, FunctionChecked))


def _mismatch(outcome: Outcome) -> bool:
    """Whether an outcome is a failed function check: ``sweep.run``'s ``until`` in a run."""
    return isinstance(outcome, Failure) and isinstance(outcome.point, FunctionPoint)


def _first_failed(failed: list[Failure], names: list[str]) -> errors.CharflowError:
    """The error of the first cell in ``names`` (the config's order) among those whose check
    failed."""
    first = min(failed, key=lambda f: names.index(f.point.cell))
    return errors.again(first.error, first.reason, dict(first.context))


def shape_point(config: LibraryConfig) -> ShapePoint:
    """The driver stage's point: the chain of ``[input_shape] driver``, driven at its
    ``driver_slew`` or else the middle of the first cell's slew grid."""
    shape = config.input_shape
    slews = config.cell(shape.driver[0]).grid.slew
    slew = shape.driver_slew if shape.driver_slew is not None else slews[len(slews) // 2]
    return ShapePoint(shape.driver[-1], shape.driver, slew)


def shaped(
    config: LibraryConfig,
    *,
    store: Store | None = None,
    jobs: int | None = None,
    scheduler: str | None = None,
) -> LibraryConfig:
    """The config with the input shape every point gets: a driver's edges measured in the
    sweep's workers (the driver stage; with a store, once per set of inputs) and kept in
    ``config.input_shape``, which every point is handed. Other shapes are returned as read."""
    shape = config.input_shape
    if shape.kind != "driver" or shape.rise:
        return config
    point = shape_point(config)
    decks = {point.cell: build_chain_deck(config, shape)}
    runs = sweep.run(config, [point], jobs=jobs, store=store, scheduler=scheduler, decks=decks)
    outcome = next(iter(runs))
    if isinstance(outcome, Failure):
        raise errors.again(outcome.error, outcome.reason, dict(outcome.context))
    assert isinstance(outcome, ShapeResult)  # a ShapePoint's measurer gives one
    return replace(config, input_shape=replace(shape, rise=outcome.rise, fall=outcome.fall))


def select(
    config: LibraryConfig, cells: list[str] | None = None, arc: tuple[str, str] | None = None
) -> Plan:
    """The plan of the chosen cells, or of one arc (related pin, output pin) of one cell."""
    plan = planning.plan(config, cells)
    if arc is None:
        return plan
    if cells is None or len(cells) != 1:
        raise ConfigError("an arc is chosen within one cell: give exactly one cell with it")
    related, output = arc
    arcs = tuple(a for a in plan.arcs if (a.related, a.output) == arc)
    if not arcs:
        have = ", ".join(f"{a.related}:{a.output}" for a in plan.arcs)
        raise ConfigError(
            f"no timing arc from {related} to {output}; the cell's arcs are {have}",
            cell=cells[0],
            arc=f"{related}:{output}",
        )
    # Setup, hold and pulse-width searches belong to no arc: they come with the whole cell.
    points = tuple(
        p for p in plan.points if isinstance(p, TimingPoint) and (p.related, p.output) == arc
    )
    return Plan(arcs, points)


@dataclass
class _Collected:
    """What a run's sweep and store gave, sorted by kind as it arrives."""

    measurements: list[Measurement | SearchResult] = field(default_factory=list)
    failures: list[Failure] = field(default_factory=list)
    toggles: list[ToggleMeasurement] = field(default_factory=list)
    unmeasured: list[Failure] = field(default_factory=list)  # toggles that failed
    tight: list[TightMeasurement] = field(default_factory=list)
    unbarred: list[Failure] = field(default_factory=list)  # tightened re-measures that failed
    leaks: dict[str, LeakageResult] = field(default_factory=dict)
    reused: set[Work] = field(default_factory=set)
    spreads: list[SpreadMeasurement] = field(default_factory=list)
    spread_failures: list[Failure] = field(default_factory=list)
    failed_checks: list[Failure] = field(default_factory=list)  # function checks: stop the run

    def keep(self, outcome: Outcome) -> None:
        if isinstance(outcome, Failure) and isinstance(outcome.point, FunctionPoint):
            self.failed_checks.append(outcome)
        elif isinstance(outcome, SpreadMeasurement):
            self.spreads.append(outcome)
        elif isinstance(outcome, Failure) and isinstance(outcome.point, SpreadPoint):
            self.spread_failures.append(outcome)
        elif isinstance(outcome, ToggleMeasurement):
            self.toggles.append(outcome)
        elif isinstance(outcome, TightMeasurement):
            self.tight.append(outcome)
        elif isinstance(outcome, LeakageResult):
            self.leaks[outcome.point.cell] = outcome
        elif isinstance(outcome, Failure) and isinstance(outcome.point, TightPoint):
            self.unbarred.append(outcome)
        elif isinstance(outcome, Failure):
            toggle = isinstance(outcome.point, TogglePoint)
            (self.unmeasured if toggle else self.failures).append(outcome)
        elif isinstance(outcome, Measurement | SearchResult):  # not a passed function check
            self.measurements.append(outcome)

    def served(self, then: Callable[[tuple], None] | None) -> Callable[[tuple], None]:
        """A hook for ``sweep.run``'s ``on_stored``: what the store served is reused (function
        checks aside: they are not among the run's results)."""

        def hook(found: tuple) -> None:
            self.reused.update(m.point for m in found if not isinstance(m, FunctionChecked))
            if then is not None:
                then(found)

        return hook

    def sort(self, order: dict[Work, int]) -> None:
        for outcomes in (self.measurements, self.failures, self.toggles, self.unmeasured):
            outcomes.sort(key=lambda m: order[m.point])
        self.tight.sort(key=lambda m: order[m.point.base])
        self.unbarred.sort(key=lambda f: order[f.point])  # sweep work: in ``order``
        for spread in (self.spreads, self.spread_failures):
            spread.sort(key=lambda m: order[m.point])


def characterize(
    config: LibraryConfig,
    *,
    cells: list[str] | None = None,
    arc: tuple[str, str] | None = None,
    jobs: int | None = None,
    store: Store | None = None,
    scheduler: str | None = None,
    on_start: Callable[[int], None] | None = None,
    on_stored: Callable[[tuple], None] | None = None,
    on_result: Callable[[object], None] | None = None,
    allow_gaps: str | None = None,
) -> RunResult:
    """Plan, sweep (each cell's function check first) and tabulate; failed points are
    collected, never turned into numbers unless ``allow_gaps`` names a method (``gaps.METHODS``)
    to fill them from measured neighbours. A cell whose function check fails stops the run
    with its error (``verify``'s); what the sweep measured before is stored.

    Only the chosen ``cells`` (or ``arc``, see ``select``) are simulated. Without a store the
    library holds just those. With one it holds every cell of the config: points not chosen
    come from the store, from rows with the current inputs or else the newest row of their
    slot (listed in ``stale``); a cell with a point (or its leakage) the store never held is
    left out.
    """
    start = time.perf_counter()
    if allow_gaps is not None:
        gaps.check_method(allow_gaps)  # before the sweep, not after it
    # Before the sweep: the version is asked of the sweep's worker pool, and the store's keys
    # hold it.
    made_by = provenance.build(config, provenance.simulator(config, jobs, scheduler))
    config = shaped(config, store=store, jobs=jobs, scheduler=scheduler)
    chosen, toggle_points, names, work = _work(config, cells, arc)
    decks = {n: build_deck(config, config.cell(n)) for n in names}
    spread = spread_points(config, chosen, {n: len(d.devices) for n, d in decks.items()})
    work = (*work, *spread)
    reads = Reads()
    got = _sweep(
        config,
        (*function_points(config, names), *work),
        decks,
        reads,
        jobs=jobs,
        store=store,
        scheduler=scheduler,
        on_start=on_start,
        on_stored=on_stored,
        on_result=on_result,
    )
    whole, others = chosen, toggle_points
    stale: dict[Work, Stale] = {}
    if store is not None and cells is not None:
        whole, others, stale = _the_rest(config, store, work, decks, got, scheduler)
    the_plan, left_out = _complete(whole, got)
    got.sort({p: i for i, p in enumerate((*whole.points, *others, *work))})
    report = _fill(the_plan, got, allow_gaps)
    return _run_result(config, made_by, the_plan, left_out, stale, got, report, reads, start)


def _run_result(
    config: LibraryConfig,
    made_by: provenance.Provenance,
    the_plan: Plan,
    left_out: tuple[str, ...],
    stale: dict[Work, Stale],
    got: _Collected,
    report: gaps.GapReport | None,
    reads: Reads,
    start: float,
) -> RunResult:
    """The plan's tables and the run's record of what it collected. Stale rows and tightened
    values of left-out cells are dropped: they are in no table. The wall time runs from
    ``start`` (``time.perf_counter``) until the tables are made."""
    tables, cell_power, sigma = _tabulate(config, the_plan, got, report)
    return RunResult(
        plan=the_plan,
        measurements=tuple(got.measurements),
        failures=tuple(got.failures),
        cells=tables,
        wall_seconds=time.perf_counter() - start,
        provenance=made_by,
        reused=frozenset(got.reused),
        stale=tuple(s for p, s in stale.items() if p.cell not in left_out),
        left_out=left_out,
        toggles=tuple(got.toggles),
        leakage=tuple(got.leaks[c] for c in names_in(the_plan) if c in got.leaks),
        unmeasured=tuple(got.unmeasured),
        cell_power=cell_power,
        gap_report=report,
        tight=tuple(m for m in got.tight if m.point.cell not in left_out),
        unbarred=tuple(got.unbarred),
        input_shape=config.input_shape,
        spreads=tuple(got.spreads),
        spread_failures=tuple(got.spread_failures),
        spread=sigma,
        reads=reads.count,
        read_seconds=reads.seconds,
        cell_reads=tuple(reads.cells.items()),
    )


def _sweep(
    config: LibraryConfig,
    swept: tuple[Work, ...],
    decks: Mapping[str, Deck],
    reads: Reads,
    *,
    jobs: int | None,
    store: Store | None,
    scheduler: str | None,
    on_start: Callable[[int], None] | None,
    on_stored: Callable[[tuple], None] | None,
    on_result: Callable[[object], None] | None,
) -> _Collected:
    """The run's one sweep, each cell's function check first in it (``sweep.chunks``) with no
    barrier before the rest: a failed check stops the sweep once the chunks begun are done,
    and the first failed cell in the config's order raises its error."""
    if on_start is not None:
        on_start(sweep.work(swept))
    got = _Collected()
    for outcome in sweep.run(
        config,
        swept,
        jobs=jobs,
        on_result=on_result,
        store=store,
        on_stored=got.served(on_stored),
        scheduler=scheduler,
        decks=decks,
        reads=reads,
        until=_mismatch,
    ):
        got.keep(outcome)
    if got.failed_checks:
        raise _first_failed(got.failed_checks, [c.name for c in config.cells])
    return got


def _work(
    config: LibraryConfig, cells: list[str] | None, arc: tuple[str, str] | None
) -> tuple[Plan, tuple[TogglePoint, ...], list[str], tuple[Work, ...]]:
    """The chosen plan, its toggles, its cells and every point the run's sweep gets. Hidden
    power belongs to input pins, not to arcs: toggles come with whole cells."""
    chosen = select(config, cells, arc)
    toggles = plan_toggles(config, cells) if arc is None else ()
    names = list(dict.fromkeys(p.cell for p in chosen.points))
    per_cell: tuple[Work, ...] = (
        *toggles,
        *leakage_points(config, names),
        *tight_points(config, chosen.points),
    )
    return chosen, toggles, names, (*chosen.points, *per_cell)


def _fill(plan: Plan, got: _Collected, method: str | None) -> gaps.GapReport | None:
    """With a gap-filling method, the failed points filled where they can be. After the
    sweep, which has stored what it measured: filled values are never stored."""
    if not got.failures or method is None:
        return None
    report = gaps.fill_gaps(plan, got.measurements, got.failures, method)
    got.failures = list(report.remaining)
    return report


def _the_rest(
    config: LibraryConfig,
    store: Store,
    done: tuple[Work, ...],
    decks: dict[str, Deck],
    got: _Collected,
    scheduler: str | None,
) -> tuple[Plan, tuple[TogglePoint, ...], dict[Work, Stale]]:
    """The whole library's plan and toggles, with the points this run did not simulate taken
    from the store (``got`` keeps them; the newest row of a slot whose inputs changed is
    listed as stale)."""
    whole = planning.plan(config)
    toggles = plan_toggles(config)
    leakage = leakage_points(config, [c.name for c in config.cells])
    picked = set(done)
    bars = tight_points(config, whole.points)
    rest = [p for p in (*whole.points, *toggles, *leakage, *bars) if p not in picked]
    for c in {p.cell for p in rest} - set(decks):
        decks[c] = build_deck(config, config.cell(c))
    found, stale = store.latest(keyring(config, decks, scheduler), rest)
    for m in found.values():
        got.keep(m)
    got.reused.update(found)
    return whole, toggles, stale


def _complete(whole: Plan, got: _Collected) -> tuple[Plan, tuple[str, ...]]:
    """The plan without the cells that miss a point (measured or failed) or their leakage."""
    have = {m.point for m in got.measurements} | {f.point for f in got.failures}
    in_plan = dict.fromkeys(p.cell for p in whole.points)
    left_out = tuple(
        c
        for c in in_plan
        if c not in got.leaks
        and not any(f.point.cell == c for f in got.failures)
        or not all(p in have for p in whole.for_cell(c))
    )
    the_plan = Plan(
        tuple(a for a in whole.arcs if a.cell not in left_out),
        tuple(p for p in whole.points if p.cell not in left_out),
    )
    return the_plan, left_out


def _tabulate(
    config: LibraryConfig, plan: Plan, got: _Collected, report: gaps.GapReport | None
) -> tuple[
    tuple[CellTables, ...], tuple[power_tables.CellPower, ...], tuple[spread_tables.ArcSpread, ...]
]:
    """Timing, power and sigma tables of the plan's cells; no timing or power tables while
    any point failed."""
    tables: tuple[CellTables, ...] = ()
    cell_power: tuple[power_tables.CellPower, ...] = ()
    if not got.failures:
        done = [*got.measurements, *report.records] if report is not None else got.measurements
        tables = tabulate(config, plan, [*done, *got.tight])
        leaked = {c: r.states for c, r in got.leaks.items()}
        cell_power = power_tables.tabulate(config, plan, done, got.toggles, leaked)
    sigma: tuple[spread_tables.ArcSpread, ...] = ()
    if got.spreads:  # the sigma tables' module (scipy) loads only when there are some
        sigma = spread_tables.tabulate(tables, got.spreads, config.mismatch.method)
    return tables, cell_power, sigma


# The layout of the JSON document (charflow/bundled/schema/charflow-library.schema.json);
# raised whenever a key is renamed, removed or changes its meaning.
JSON_SCHEMA_VERSION = 1

# The values of a JSON point record that a gap-filling method fills.
FILLED_VALUES = (
    "delay_s",
    "transition_s",
    "input_charge_C",
    "input_charge_to_threshold_C",
    "input_charge_slew_window_C",
    "supply_energy_J",
    "internal_energy_J",
    "value_s",
)


def to_json(config: LibraryConfig, result: RunResult) -> dict:
    """Tables in SI units with the measurement details behind every point, and where they come
    from (``provenance``)."""
    powers = {c.cell: c for c in result.cell_power}
    cells = dict.fromkeys(p.cell for p in result.plan.points)
    toggled = dict.fromkeys(m.point.cell for m in result.toggles)
    bars: dict[Work, TightMeasurement] = {m.point.base: m for m in result.tight}
    return {
        "schema_version": JSON_SCHEMA_VERSION,
        "library": config.name,
        "generator": f"charflow {__version__}",
        **provenance.to_json(result.provenance),
        "input_shape": shape_record(config, result.input_shape),
        "cells": [_cell_record(cell, powers.get(cell.cell.name)) for cell in result.cells],
        "points": {
            name: [
                _point_record(m, bars.get(m.point))
                for m in result.measurements
                if m.point.cell == name
            ]
            for name in cells
        },
        "toggles": {
            name: [_toggle_record(m) for m in result.toggles if m.point.cell == name]
            for name in toggled
        },
        **_fault_records(result),
        **_error_bar_settings(config, result),
        "liberty": liberty.describe(config, result.cells, result.cell_power),
        **({"spread": _spread_record(config, result)} if result.spreads else {}),
        # Tables served from stored results whose inputs were not the ones named above.
        "stale_tables": [
            {"changed_models": list(models), "tables": names}
            for models, names in result.stale_tables().items()
        ],
    }


def shape_record(config: LibraryConfig, shape: InputShape) -> dict[str, Any]:
    """The input waveform in the JSON: its kind, its description and its normalised edges
    (τ in units of the time between the slew thresholds, fraction of the swing travelled)."""
    return {
        "kind": shape.kind,
        "description": shape.describe(config.cap_unit, config.cap_scale),
        "driver": list(shape.driver),
        "rise": [list(c) for c in shape.rise],
        "fall": [list(c) for c in shape.fall],
    }


def shape_header(config: LibraryConfig, shape: InputShape) -> tuple[str, ...]:
    """The Liberty header line naming the input waveform the tables were measured with."""
    return (f"input waveform: {shape.describe(config.cap_unit, config.cap_scale)}",)


def with_shape(config: LibraryConfig, result: RunResult) -> LibraryConfig:
    """``config`` with the input shape ``result`` was measured with (a driver's edges): what a
    later re-simulation of its points (the fidelity check) must use."""
    return replace(config, input_shape=result.input_shape)


def _spread_record(config: LibraryConfig, result: RunResult) -> dict[str, Any]:
    """The sigma tables, the transistor that dominates each arc edge's delay spread (the
    largest share of σ² summed over the arc's sensitivity points), and every spread point
    with its sensitivities per transistor or its samples' statistics."""
    tables, checks, nominal = result.spread_cost()
    shares: dict[tuple[str, str, str, str], dict[str, float]] = {}
    for m in (m for m in result.spreads if not m.point.samples):
        p = m.point.timing
        arc = shares.setdefault((p.cell, p.related, p.output, p.output_edge), {})
        for device, share in spread_tables.contributions(m.shifts, "delay").items():
            arc[device] = arc.get(device, 0.0) + share
    return {
        "method": config.mismatch.method,
        "simulations": {"sigma_tables": tables, "checks": checks, "nominal": nominal},
        "dominant": [
            {
                "cell": c,
                "related": r,
                "output": o,
                "output_edge": e,
                "transistor": max(d, key=d.__getitem__),
            }
            for (c, r, o, e), d in shares.items()
        ],
        "tables": [
            {
                "cell": a.cell,
                "related": a.related,
                "output": a.output,
                "when": a.when,
                "tables": [{**t.table.to_dict(), "sigma_type": t.sigma_type} for t in a.tables],
            }
            for a in result.spread
        ],
        "points": [_spread_point(m) for m in result.spreads],
        "failures": [f.message for f in result.spread_failures],
    }


def _spread_point(m: SpreadMeasurement) -> dict[str, Any]:
    record: dict[str, Any] = {
        "cell": m.point.cell,
        "point": m.point.timing.label,
        "delay_s": m.delay,
        "transition_s": m.transition,
        "simulations": m.runs,
    }
    if m.point.samples:
        delay, transition = (
            spread_tables.sampled(v) for v in (m.sampled_delays, m.sampled_transitions)
        )
        n = len(m.sampled_delays)
        record["samples"] = {
            "count": n,
            "failed": m.failed_samples,
            "delay_sigma_s": delay.sigma,
            "delay_sigma_interval_s": list(spread_tables.interval(delay.sigma, n)),
            "transition_sigma_s": transition.sigma,
            "transition_sigma_interval_s": list(spread_tables.interval(transition.sigma, n)),
        }
        return record
    record["sensitivities"] = [
        {
            "transistor": s.device,
            "sigma_vt_V": s.sigma,
            "delay_at_plus_minus_sigma_s": list(s.delay),
            "transition_at_plus_minus_sigma_s": list(s.transition),
            "delay_per_volt_s_per_V": (s.delay[0] - s.delay[1]) / (2 * s.sigma),
        }
        for s in m.shifts
    ]
    return record


def _cell_record(cell: CellTables, cell_power: power_tables.CellPower | None) -> dict:
    return {
        "name": cell.cell.name,
        "area": cell.cell.area,
        "inputs": [
            {
                "pin": p.pin,
                "rise_capacitance_F": p.rise,
                "fall_capacitance_F": p.fall,
                **_bars(
                    rise_capacitance_error_F=p.rise_error, fall_capacitance_error_F=p.fall_error
                ),
                **_to_threshold(p),
                **_slew_window(p),
            }
            for p in cell.pins
        ],
        "outputs": {o.pin: o.function.to_liberty() for o in cell.cell.outputs},
        "ff": _ff_record(cell.cell.flop),
        "arcs": [_arc_record(arc, cell_power) for arc in cell.arcs],
        "constraints": [
            {
                "pin": c.pin,
                "related_pin": c.related,
                "timing_type": c.timing_type,
                "tables": [t.to_dict() for t in c.tables],
            }
            for c in cell.constraints
        ],
        "min_pulse_widths": [
            {
                "pin": p.pin,
                "level": p.level,
                "slew_s": p.slew,
                "width_s": p.width,  # null: left out of the library (note)
                "stimulus": p.stimulus,
                "bracket_s": p.bracket,
                "note": p.note,
            }
            for p in cell.pulses
        ],
        **_cell_power_record(cell_power),
    }


def _ff_record(flop: FlopSpec | None) -> dict | None:
    """The flip-flop's state variables (which its outputs' functions name) and their updates,
    as the Liberty ``ff`` group gives them."""
    if flop is None:
        return None
    state, inverted = flop.state
    return {
        "state": state,
        "inverted_state": inverted,
        "clocked_on": flop.clocked_on,
        "next_state": flop.next_state.to_liberty(),
        "clear": flop.clear.to_liberty() if flop.clear is not None else None,
        "preset": flop.preset.to_liberty() if flop.preset is not None else None,
    }


def _arc_record(arc: ArcTables, cell_power: power_tables.CellPower | None) -> dict:
    return {
        "related_pin": arc.arc.related,
        "output": arc.arc.output,
        "kind": arc.arc.kind,
        "related_output": arc.arc.other,
        "timing_sense": arc.arc.sense,
        "tables": [t.to_dict() for t in arc.default],
        **_error_tables(arc.default_errors),
        "states": [
            {
                "when": st.state.when,
                "timing_sense": st.state.sense,
                "tables": [t.to_dict() for t in st.tables],
                **_error_tables(st.errors),
            }
            for st in arc.states
        ],
        **_arc_power_record(cell_power, arc.arc),
    }


# How an error bar is computed, as the JSON says it (``TightMeasurement.bar``).
BAR_RULE = (
    "|value - tightened| * tight_steps / (tight_steps - 1) + reltol of the tightened run * "
    "|tightened|: the error falls at least linearly with the step; what does not shrink with it "
    "is bounded by the tightened run's tolerance"
)


def _error_bar_settings(config: LibraryConfig, result: RunResult) -> dict:
    """How the error bars were measured, when they were (``[error_bars]``)."""
    if config.error_bars.points == "none":
        return {}
    unbarred = [
        {"cell": f.point.cell, "point": f.point.label, "reason": f.reason} for f in result.unbarred
    ]
    return {
        "error_bars": {
            "points": config.error_bars.points,
            "warn_above": config.error_bars.warn_above,
            "tight_steps": TIGHT_STEPS,
            "tight_reltol": TIGHT_RELTOL,
            "bar": BAR_RULE,
            "unbarred": unbarred,
        }
    }


def _error_tables(errors: tuple[Table, ...]) -> dict:
    """The error bars of an arc's or state's tables (``[error_bars]``), when measured."""
    return {"error_tables": [t.to_dict() for t in errors]} if errors else {}


def _to_threshold(p: PinCap) -> dict[str, float]:
    """A pin's capacitance up to its delay threshold, on each edge it was measured on."""
    values = {"rise": p.rise_to_threshold, "fall": p.fall_to_threshold}
    return {f"{e}_capacitance_to_threshold_F": v for e, v in values.items() if v is not None}


def _slew_window(p: PinCap) -> dict[str, float]:
    """A pin's capacitance between its input's slew thresholds, on each edge measured."""
    values = {"rise": p.rise_slew_window, "fall": p.fall_slew_window}
    return {f"{e}_capacitance_slew_window_F": v for e, v in values.items() if v is not None}


def _bars(**errors: float | None) -> dict[str, float]:
    """The error bars measured (``[error_bars]``), by their JSON keys."""
    return {k: v for k, v in errors.items() if v is not None}


def _arc_power_record(cell: power_tables.CellPower | None, arc: Arc) -> dict:
    energy = cell.arc(arc.related, arc.output) if cell is not None else None
    if energy is None:
        return {}
    states = [{"when": st.when, "tables": [t.to_dict() for t in ts]} for st, ts in energy.states]
    return {"internal_power": {"tables": [t.to_dict() for t in energy.default], "states": states}}


def _cell_power_record(cell: power_tables.CellPower | None) -> dict:
    if cell is None:
        return {}
    return {
        "cell_leakage_power_W": cell.cell_leakage,
        "leakage_power": [{"when": s.when, "value_W": s.power} for s in cell.leakage],
        "hidden_power": [
            {"pin": h.pin, "when": h.when, "tables": [t.to_dict() for t in h.tables]}
            for h in cell.hidden
        ],
    }


def _point_record(
    m: Measurement | SearchResult, tight: TightMeasurement | None = None
) -> dict[str, Any]:
    if isinstance(m, SearchResult):
        record: dict[str, Any] = {
            "search": m.point.label,
            "value_s": m.value,
            "simulations": m.runs,
        }
        if isinstance(m.point, PulsePoint):
            record.update(stimulus=m.stimulus, bracket_s=m.bracket, note=m.note)
        else:  # the bracket that held at tightened settings, and what moved (sequential)
            record.update(bracket_s=m.bracket, note=m.note)
        return record
    p = m.point
    return {
        "related_pin": p.related,
        "output": p.output,
        "when": State(p.state_side, "").when,
        "input_edge": p.input_edge,
        "output_edge": p.output_edge,
        "kind": p.kind,
        "slew_s": p.slew,
        "load_F": p.load,
        "other_load_F": p.other_load,
        "delay_s": m.delay,
        "transition_s": m.transition,
        "input_charge_C": m.input_charge,
        "input_charge_to_threshold_C": m.input_charge_to_threshold,
        "input_charge_slew_window_C": m.input_charge_slew_window,
        "supply_energy_J": m.supply_energy,
        "internal_energy_J": m.internal_energy,
        "simulations": m.runs,
        "stopped_s": m.stopped,
        "stop_cap_s": m.stop_cap,
        **(_point_bars(m, tight) if tight is not None else {}),
    }


def _point_bars(m: Measurement, t: TightMeasurement) -> dict[str, float]:
    """A point's error bars (``TightMeasurement.bar``), each beside its value's key."""
    energy = None
    if m.internal_energy is not None and t.internal_energy is not None:
        energy = t.bar(m.internal_energy, t.internal_energy)
    return _bars(
        delay_error_s=t.bar(m.delay, t.delay),
        transition_error_s=t.bar(m.transition, t.transition),
        input_charge_error_C=t.bar(m.input_charge, t.input_charge),
        internal_energy_error_J=energy,
        tightened_simulations=t.runs,
    )


def _toggle_record(m: ToggleMeasurement) -> dict:
    p = m.point
    return {
        "related_pin": p.related,
        "when": p.when,
        "input_edge": p.input_edge,
        "slew_s": p.slew,
        "load_F": p.load,
        "energy_J": m.energy,
        "input_charge_C": m.input_charge,
        "simulations": m.runs,
        "window_end_s": m.settled,
    }


def _fault_records(result: RunResult) -> dict:
    """The failed points, the toggles not measured and the filled points, each with its
    reason and its saved waveform."""
    saved = faults.paths(result.faults)
    report = result.gap_report
    unfillable = {u.failure.point: u.why for u in report.unfilled} if report else {}

    def fault(f: Failure) -> dict:
        record = {"cell": f.point.cell, "point": f.point.label, "reason": f.reason}
        if f.point in unfillable:
            record["not_filled"] = unfillable[f.point]
        if f.point in saved:
            record["waveform_csv"], record["waveform_png"] = saved[f.point]
        return record

    def filled(f: gaps.Filled) -> dict:
        values = {k: v for k, v in _point_record(f.record).items() if k in FILLED_VALUES}
        return {
            **fault(f.failure),
            "method": f.method,
            "along": f.along,
            "from": [p.label for p in f.sources],
            **values,
        }

    return {
        "failures": [fault(f) for f in result.failures],
        "unmeasured_toggles": [fault(f) for f in result.unmeasured],
        "filled": [filled(f) for f in result.filled],
    }


def stale_notes(result: RunResult) -> tuple[str, ...]:
    """Header lines on the tables that come from stored results older than the inputs the
    header names (a run of a few cells or one arc after a change)."""
    lines = []
    for models, names in result.stale_tables().items():
        changed = f"model file {', '.join(models)}" if models else "the testbench or the settings"
        why = f"{changed} changed since"
        lines.append(
            f"stale: {len(names)} table(s) hold stored results from older inputs ({why}); "
            'listed under "stale_tables" in the JSON; a full run brings them up to date'
        )
    return tuple(lines)


NOTE_POINTS = 4  # filled points a table's note lists


def fill_notes(config: LibraryConfig, result: RunResult) -> tuple[tuple[str, ...], dict[str, str]]:
    """The Liberty comments on filled values: the library header's lines, and a note per table
    or pin capacitance holding one (by the name ``charflow diff`` gives it)."""
    report = result.gap_report
    if report is None or not report.filled:
        return (), {}
    places: dict[str, list[str]] = {}
    for f in report.filled:
        p = f.failure.point
        assert isinstance(p, TimingPoint | ConstraintPoint)  # the kinds gap filling fills
        where = _where(config, p)
        names = _tables_of(result.plan, p)
        record = f.record
        if (
            isinstance(p, TimingPoint)
            and isinstance(record, Measurement)  # as a timing point's always is
            and p.load == min(config.cell(p.cell).grid.load)
        ):
            # Pin capacitance comes from the charges at the smallest load.
            pins = [p.related, *(pin for pin, _, _ in record.side_charges)]
            names += [pin_name(p.cell, pin, "capacitance") for pin in dict.fromkeys(pins)]
        for name in names:
            places.setdefault(name, []).append(where)
    header = (
        f"gaps: the values of {len(report.filled)} failed point(s) were filled by "
        f'{report.method}, not simulated; they are listed under "filled" in '
        f"{config.name}.json",
    )
    notes = {}
    method = report.method
    for name, spots in places.items():
        shown = "; ".join(spots[:NOTE_POINTS]) + ("; ..." if len(spots) > NOTE_POINTS else "")
        notes[name] = f"{len(spots)} value(s) filled by {method}, not simulated, at {shown}"
    return header, notes


def _where(config: LibraryConfig, p: TimingPoint | ConstraintPoint) -> str:
    """A point's place in its table, in library units."""
    t, c = config.time_scale, config.cap_scale
    tu, cu = config.time_unit, config.cap_unit
    if isinstance(p, ConstraintPoint):
        return f"data slew {p.data_slew / t:.4g} {tu}, clock slew {p.clock_slew / t:.4g} {tu}"
    where = f"slew {p.slew / t:.4g} {tu}, load {p.load / c:.4g} {cu}"
    if p.other_load is not None:
        where += f", other load {p.other_load / c:.4g} {cu}"
    return where


def write(config: LibraryConfig, result: RunResult, out_dir: Path) -> list[Path]:
    """Write the waveforms of the points that gave no measurement (``faults``), the JSON
    (always) and the Liberty files (only when every point was measured or filled): the
    default one, and with two-output cells also their three-axis form (``liberty.file_names``)."""
    out_dir = Path(out_dir)
    cells = dict.fromkeys(p.cell for p in result.plan.points)
    written = faults.write(config, result.faults, out_dir, cells)
    json_path = out_dir / f"{config.name}.json"
    write_atomic(json_path, json.dumps(to_json(config, result), indent=1) + "\n")
    written.append(json_path)
    if not result.failures:
        header, notes = fill_notes(config, result)
        header = (
            *provenance.liberty_header(result.provenance),
            *shape_header(config, result.input_shape),
            *stale_notes(result),
            *header,
        )
        # The default file has two-axis tables only; the three-axis form goes beside it.
        forms = (False, True) if liberty.has_three_axes(result.cells) else (False,)
        for three_axes, name in zip(forms, liberty.file_names(config), strict=False):
            text = liberty.render(
                config,
                result.cells,
                result.cell_power,
                header=header,
                notes=notes,
                three_axes=three_axes,
                spread=result.spread,
            )
            write_atomic(out_dir / name, text)
            written.append(out_dir / name)
        if len(forms) == 1:
            # A three-axis file of an earlier run would not match this library.
            stale = out_dir / liberty.file_names(config)[1]
            try:
                stale.unlink(missing_ok=True)
            except OSError as exc:
                reason = f"cannot remove an earlier run's file: {exc.strerror or exc}"
                raise OutputError(reason, file=stale) from exc
    return written


def names_in(plan: Plan) -> list[str]:
    """The plan's cells, in its order."""
    return list(dict.fromkeys(a.cell for a in plan.arcs))
