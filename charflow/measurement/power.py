"""Power: internal switching energy per arc, hidden energy of input toggles, leakage per state.

Internal energy of a timing point is measured by ``timing.measure_point`` (the supply's energy
beyond its static draw, less what the external loads took); here it becomes tables. A toggle
is an input edge that changes no output (NAND2's IA while IB = 0): the supply energy it costs
is Liberty's hidden power, kept on the input pin. Leakage is the supply's DC power per input
vector. Everything is SI here (J, W); the Liberty writer converts.

Leakage is the devices' own, not the simulator's: ngspice puts its gmin (1e-12 S unless told
otherwise) across every pn junction of every device, MOS bulk junctions included, so each
junction reverse-biased by vdd draws gmin·vdd that no device draws, 1.44 pW at 1.2 V: more than
a whole cell's device leakage on a low-leakage process. Leakage runs therefore set gmin to
``LEAKAGE_GMINS[0]``, far below any device's off conductance (0.03 pW at 1.2 V is 2e-14 S); what
it still adds is gmin·vdd² per junction, 1.4e-18 W at 1.2 V. Taking the gmin current off instead
would need every junction's voltage, which only the models know. A state whose operating point
does not converge there is tried at the next, larger gmin, with a warning naming it; the gmin
a value was measured with is kept beside it.

A toggle has no output edge to end its run. Its energy window ends once the input ramp is
over and the supply current has come back to the static current within ``simulation.settle``
of its largest excursion; the run lasts the ramp and a tail of ``TOGGLE_TAIL`` ramp durations,
doubled up to ``TOGGLE_EXTENSIONS`` times until the current is quiet over the tail's second
half. A toggle that never gets quiet is not measurable: it is reported, never tabulated. What a
floating node between series devices draws later, relaxing toward its DC state at a small
fraction of the switching current, is the state's leakage, not the toggle's energy.
"""

from __future__ import annotations

import itertools
import logging
from dataclasses import dataclass, replace

import numpy as np

from charflow.config.library import CellSpec, LibraryConfig
from charflow.execution.sweep import EDGES, POINT_RUNS, Arc, Plan, State
from charflow.measurement.combinational import (
    LOGIC_MARGIN,
    RAMP_SAMPLES,
    Measurement,
    alters,
    backend_for,
    simulate,
    static_current,
)
from charflow.measurement.waves import (
    KeepWaveform,
    integral,
    single_crossing,
    supply_energy,
    waveform,
)
from charflow.records import logic
from charflow.records.errors import (
    DeckReadError,
    MeasurementError,
    SimulatorError,
    SimulatorHungError,
    TableError,
)
from charflow.records.units import show_cap, show_time
from charflow.simulation import stimulus
from charflow.simulation.backends import Request, Result
from charflow.simulation.netlist import Deck, build_deck
from charflow.tables.table import Axis, Table

log = logging.getLogger("charflow")

TOGGLE_TAIL = 4.0  # ramp durations after the ramp, before any extension
TOGGLE_EXTENSIONS = 3
# S: gmin of leakage runs, smallest first; the last is ngspice's default, a last resort whose
# values hold the gmin current (see the module's text).
LEAKAGE_GMINS = (1e-18, 1e-15, 1e-12)

# power_lut_template's variables: the input slew, the output's load and, on a two-output
# cell, the other output's load.
SLEW_AXIS = "input_transition_time"
LOAD_AXIS = "total_output_net_capacitance"
OTHER_LOAD_AXIS = "equal_or_opposite_output_net_capacitance"


def power_quantity(edge: str) -> str:
    """Liberty's table name: rise_power or fall_power (the output's edge for an arc, the
    input's for a toggle)."""
    return f"{edge}_power"


@dataclass(frozen=True, slots=True)
class TogglePoint:
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

    @property
    def cost(self) -> int:
        return POINT_RUNS

    def where(self, config: LibraryConfig) -> dict[str, str | None]:
        """Where the toggle is, in the library's units, as an error's context."""
        slew = show_time(self.slew, config.time_unit)
        return {
            "cell": self.cell,
            "pin": f"{self.related} ({self.input_edge}, no output edge)",
            "state": self.when or None,
            "point": f"slew {slew}, load {show_cap(self.load, config.cap_unit)}",
        }


@dataclass(frozen=True, slots=True)
class ToggleMeasurement:
    point: TogglePoint
    energy: float  # J the supply delivered beyond its static draw: all of it is the cell's
    input_charge: float  # C drawn from the input source over the run
    runs: int
    sim_seconds: float
    settled: float  # s, the end of the energy window


@dataclass(frozen=True, slots=True)
class LeakageState:
    when: str  # every input, e.g. "!IA&IB"
    power: float  # W
    gmin: float = LEAKAGE_GMINS[0]  # S, the simulator's gmin the value was measured with


@dataclass(frozen=True, slots=True)
class ArcPower:
    arc: Arc
    default: tuple[Table, ...]  # point-wise largest energy over the states
    states: tuple[tuple[State, tuple[Table, ...]], ...]


@dataclass(frozen=True, slots=True)
class PinPower:
    """Hidden power of one input in one side state: 1D tables over the input slew."""

    pin: str
    when: str
    tables: tuple[Table, ...]


@dataclass(frozen=True, slots=True)
class CellPower:
    cell: str
    arcs: tuple[ArcPower, ...]
    hidden: tuple[PinPower, ...]
    leakage: tuple[LeakageState, ...]

    @property
    def cell_leakage(self) -> float:
        """W: the mean over input vectors, every vector taken as equally likely (common
        practice for a default leakage)."""
        return float(np.mean([s.power for s in self.leakage]))

    def arc(self, related: str, output: str) -> ArcPower | None:
        return next(
            (a for a in self.arcs if (a.arc.related, a.arc.output) == (related, output)), None
        )


def hidden_states(cell: CellSpec, pin: str) -> tuple[tuple[tuple[str, bool], ...], ...]:
    """Side assignments under which ``pin`` changes no output, in counting order."""
    others = [p for p in cell.inputs if p != pin]
    found = []
    for values in itertools.product((False, True), repeat=len(others)):
        side = tuple(zip(others, values, strict=True))
        assign = dict(side)
        if all(
            o.function.evaluate({**assign, pin: False})
            == o.function.evaluate({**assign, pin: True})
            for o in cell.outputs
        ):
            found.append(side)
    return tuple(found)


def _chosen(config: LibraryConfig, cells: list[str] | None) -> list[CellSpec]:
    """The chosen cells, all by default."""
    return [config.cell(n) for n in cells] if cells is not None else list(config.cells)


def plan_toggles(config: LibraryConfig, cells: list[str] | None = None) -> tuple[TogglePoint, ...]:
    """Every hidden toggle of the chosen cells: pin × side state × input edge × slew (and for a
    flip-flop × stored value, ``ffpower.plan_toggles``)."""
    from charflow.measurement import ffpower

    points = []
    for cell in _chosen(config, cells):
        if cell.flop is not None:
            points.extend(ffpower.plan_toggles(cell))
            continue
        for pin in cell.inputs:
            for side in hidden_states(cell, pin):
                for edge in EDGES:
                    for slew in cell.grid.slew:
                        points.append(
                            TogglePoint(cell.name, pin, side, edge, slew, min(cell.grid.load))
                        )
    return tuple(points)


def measure_toggle(config: LibraryConfig, deck: Deck, point: TogglePoint) -> ToggleMeasurement:
    cell = config.cell(point.cell)
    if cell.flop is not None:
        from charflow.measurement import ffpower

        return ffpower.measure_toggle(config, deck, point)
    vdd = config.process.vdd
    thr = config.thresholds
    ramp = stimulus.ramp(point.slew, point.input_edge, thr, vdd)
    values = {p: stimulus.constant(vdd if v else 0.0) for p, v in point.side}
    values[point.related] = ramp.pulse()
    commands = alters(deck, cell, values, {o.pin: point.load for o in cell.outputs})
    outputs = {o.pin: deck.output_node(o.pin) for o in cell.outputs}
    in_node = deck.input_node(point.related)
    in_branch = f"{deck.input_source(point.related)}#branch"
    supply = f"{deck.supply}#branch"
    final = {**dict(point.side), point.related: point.input_edge == "rise"}
    after = static_current(config, deck, final)
    max_step = ramp.duration / RAMP_SAMPLES
    backend = backend_for(config)
    tail = TOGGLE_TAIL * ramp.duration
    runs = 0
    seconds = 0.0
    saved = KeepWaveform(lambda: waveform(result.vectors, {**outputs, point.related: in_node}))
    for extension in range(TOGGLE_EXTENSIONS + 1):
        stop = ramp.end + tail
        request = Request(
            deck,
            commands,
            f"tran {max_step:.6g} {stop:.6g} 0 {max_step:.6g}",
            (*outputs.values(), in_node, in_branch, supply),
        )
        result, attempts = simulate(backend, request)
        runs += attempts
        seconds += result.seconds
        t = result.vectors["time"]
        with saved:
            for pin, node in outputs.items():
                v = result.vectors[node]
                if abs(v[-1] - v[0]) > LOGIC_MARGIN * vdd:
                    raise MeasurementError(
                        f"output {pin} moves from {v[0]:.4g} V to {v[-1]:.4g} V: "
                        f"not a toggle that leaves the outputs alone"
                    )
            t_in = single_crossing(
                t,
                result.vectors[in_node],
                thr.delay_input(point.input_edge) * vdd,
                point.input_edge,
                f"input {point.related}",
            )
        current = -result.vectors[supply]
        static = (float(current[0]), after)
        # Per step, the mean of its two samples: what the trapezoid integrates, and free of the
        # sample-to-sample ringing trapezoidal integration leaves on a source's current.
        excess = current - np.where(t < t_in, static[0], static[1])
        excess = np.abs(excess[1:] + excess[:-1]) / 2
        last_loud = np.flatnonzero(excess > config.simulation.settle * excess.max())[-1]
        settled = max(ramp.end, float(t[last_loud + 1]))
        if settled <= ramp.end + tail / 2:
            break
        if extension == TOGGLE_EXTENSIONS:
            raise MeasurementError(
                f"supply current has not settled {tail:.4g} s after the input ramp: "
                f"{excess[-1]:.4g} A above its static value at the end, "
                f"{excess.max():.4g} A at most",
                waveform=saved.capture(),
            )
        tail *= 2.0
    energy = supply_energy(t, current, vdd, t_in, static, settled)
    # The source's branch current flows into its + node from outside: charge into the pin is −∫i.
    charge = -integral(t, result.vectors[in_branch], ramp.start)
    return ToggleMeasurement(point, energy, charge, runs, seconds, settled)


def leakage_run(config: LibraryConfig, request: Request, vector: str) -> tuple[Result, float]:
    """Run a leakage ``request`` at the smallest of ``LEAKAGE_GMINS`` that converges; return
    the result and that gmin. ``vector`` names the state in messages."""
    backend = backend_for(config)
    cell = request.deck.cell
    failed: dict[float, str] = {}
    for gmin in LEAKAGE_GMINS:
        try:
            result = backend.run(replace(request, options=(*request.options, f"gmin={gmin:g}")))
        except (DeckReadError, SimulatorHungError):
            raise  # no gmin can help
        except SimulatorError as exc:
            failed[gmin] = exc.reason
            continue
        if failed:
            log.warning(
                "cell %s, vector %s: leakage measured with gmin %g S, which adds up to %.3g W "
                "per reverse-biased junction (%s)",
                cell,
                vector,
                gmin,
                gmin * config.process.vdd**2,
                _tried(failed),
            )
        return result, gmin
    raise SimulatorError(
        f"no leakage: the simulator does not converge with any gmin ({_tried(failed)}); "
        "check the models and the cell at this input vector",
        cell=cell,
        vector=vector,
    )


def _tried(failed: dict[float, str]) -> str:
    return "; ".join(f"gmin {g:g} S: {reason}" for g, reason in failed.items())


def leakage(config: LibraryConfig, deck: Deck) -> tuple[LeakageState, ...]:
    """The supply's DC power (W) for every input vector, in counting order (a flip-flop's per
    stored value too, ``ffpower.leakage``), at a gmin that adds no leakage of its own."""
    cell = config.cell(deck.cell)
    if cell.flop is not None:
        from charflow.measurement import ffpower

        return ffpower.leakage(config, deck)
    vdd = config.process.vdd
    supply = f"{deck.supply}#branch"
    states = []
    for bits in itertools.product((False, True), repeat=len(cell.inputs)):
        assign = tuple(zip(cell.inputs, bits, strict=True))
        when = logic.when_condition(assign)
        values = {p: stimulus.constant(vdd if b else 0.0) for p, b in assign}
        request = Request(deck, alters(deck, cell, values, {}), "op", (supply,))
        result, gmin = leakage_run(config, request, when)
        # A source's branch current flows into its + node from outside: out of it is −i.
        states.append(LeakageState(when, -vdd * float(result.vectors[supply][-1]), gmin))
    return tuple(states)


def _axes(cell: CellSpec, arc: Arc) -> tuple[Axis, ...]:
    axes = [Axis(SLEW_AXIS, cell.grid.slew), Axis(LOAD_AXIS, cell.grid.load)]
    if arc.other:
        axes.append(Axis(OTHER_LOAD_AXIS, cell.grid.related_load))
    return tuple(axes)


def _arc_tables(
    cell: CellSpec, arc: Arc, state: State, measured: list[Measurement]
) -> tuple[Table, ...]:
    axes = _axes(cell, arc)
    mine = [
        m
        for m in measured
        if (m.point.related, m.point.output, m.point.state_side)
        == (arc.related, arc.output, state.side)
    ]
    tables = []
    for out_edge in arc.output_edges:
        energy = {}
        for m in (m for m in mine if m.point.output_edge == out_edge):
            p = m.point
            key = (p.slew, p.load) if p.other_load is None else (p.slew, p.load, p.other_load)
            energy[key] = m.internal_energy
        grid = np.empty(tuple(len(a.values) for a in axes))
        for index in np.ndindex(grid.shape):
            key = tuple(a.values[i] for a, i in zip(axes, index, strict=True))
            try:
                grid[index] = energy[key]
            except KeyError as exc:
                where = ", ".join(f"{a.name} {v:.4g}" for a, v in zip(axes, key, strict=True))
                raise TableError(
                    f"{power_quantity(out_edge)} has no measurement at {where}",
                    cell=cell.name,
                    arc=arc.label,
                ) from exc
        tables.append(Table(axes, grid, power_quantity(out_edge), "J"))
    return tuple(tables)


def _worst(states: list[tuple[State, tuple[Table, ...]]]) -> tuple[Table, ...]:
    """Per quantity, the point-wise largest energy over the states that have it."""
    worst = []
    for quantity in map(power_quantity, EDGES):
        group = [t for _, tables in states for t in tables if t.quantity == quantity]
        if group:
            values = np.max(np.stack([t.values for t in group]), axis=0)
            worst.append(Table(group[0].axes, values, quantity, "J"))
    return tuple(worst)


def _hidden_tables(cell: CellSpec, toggles: list[ToggleMeasurement]) -> tuple[PinPower, ...]:
    """One PinPower per pin and side state with at least one edge measured at every slew."""
    energy = {
        (m.point.related, m.point.side, m.point.input_edge, m.point.slew): m.energy for m in toggles
    }
    axes = (Axis(SLEW_AXIS, cell.grid.slew),)
    out = []
    for pin in cell.inputs:
        for side in hidden_states(cell, pin):
            tables = []
            for edge in EDGES:
                row = [energy.get((pin, side, edge, s)) for s in cell.grid.slew]
                if all(e is not None for e in row):
                    tables.append(Table(axes, row, power_quantity(edge), "J"))
            if tables:
                out.append(PinPower(pin, logic.when_condition(side), tuple(tables)))
    return tuple(out)


def leakages(config: LibraryConfig, plan: Plan) -> dict[str, tuple[LeakageState, ...]]:
    """Leakage per input vector (and stored value) of every cell of the plan."""
    names = {a.cell for a in plan.arcs}
    return {c.name: leakage(config, build_deck(config, c)) for c in config.cells if c.name in names}


def tabulate(
    config: LibraryConfig,
    plan: Plan,
    results: list,
    toggles: list[ToggleMeasurement],
    leakage_states: dict[str, tuple[LeakageState, ...]],
) -> tuple[CellPower, ...]:
    """Power of every cell of the plan; every timing point must have a measurement (a toggle
    may be missing: its pin and state then get no table for that edge)."""
    from charflow.measurement import ffpower

    measured = [m for m in results if isinstance(m, Measurement)]
    cells = []
    for cell in _chosen(config, list(dict.fromkeys(a.cell for a in plan.arcs))):
        mine = [m for m in measured if m.point.cell == cell.name]
        arcs = []
        for arc in (a for a in plan.arcs if a.cell == cell.name):
            states = [(st, _arc_tables(cell, arc, st, mine)) for st in arc.states]
            arcs.append(ArcPower(arc, _worst(states), tuple(states)))
        mine_toggles = [m for m in toggles if m.point.cell == cell.name]
        if cell.flop is not None:
            hidden = ffpower.hidden_tables(cell, mine_toggles)
        else:
            hidden = _hidden_tables(cell, mine_toggles)
        cells.append(CellPower(cell.name, tuple(arcs), hidden, leakage_states[cell.name]))
    return tuple(cells)
