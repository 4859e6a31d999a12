"""Simulating and measuring one sweep point, and checking a cell's function by simulation.

The transient of a point ends when every output that switches has settled and the input ramp
is over (an ngspice stop condition), with a cap for outputs that never do; its first maximum
step follows an estimate of the output edge (``stepsize``) and is refined when too few samples
fall on the output edge. Besides delay and transition a point yields the input pin's charge and
the supply's switching energy. Every run of a point is deterministic in the point alone, so
re-running one arc reproduces its stored values.
"""

from __future__ import annotations

import itertools
import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace

import numpy as np

from charflow.config.library import CellSpec, LibraryConfig
from charflow.execution.sweep import TimingPoint
from charflow.measurement import stepsize
from charflow.measurement.waves import (
    KeepWaveform,
    Waveform,
    check_settled,
    integral,
    single_crossing,
    step_at,
    supply_energy,
    transition,
    waveform,
)
from charflow.records.errors import (
    CharflowError,
    CutOffError,
    DeckReadError,
    FunctionalMismatchError,
    MeasurementError,
    SimulatorError,
    SimulatorHungError,
    SimulatorTimeoutError,
    place,
)
from charflow.records.units import show_time
from charflow.simulation import plausible, stimulus
from charflow.simulation.backends import RETRY_LADDER, Request, Result, make_backend
from charflow.simulation.netlist import PARKED_LOAD, Deck

log = logging.getLogger("charflow")

RAMP_SAMPLES = 20  # samples across the input ramp, before any refinement
WINDOW_CAP = 100.0  # stop-time cap, in ramp durations (or the grid's largest slew)
WINDOW_ADVICE = 10.0  # a cut-off point's message suggests this many times the window it had
REFINEMENTS = 2
REFINE_SLACK = 1.5  # the simulator's step may exceed the wanted one a little
LOGIC_MARGIN = 0.1  # a DC output within 10 % of a rail is a clean logic level


@dataclass(frozen=True, slots=True)
class Measurement:
    point: TimingPoint
    delay: float  # s; may be negative, never clipped
    transition: float  # s, already divided by the slew derate
    input_charge: float  # C drawn from the input source over the run
    runs: int  # simulations this point took (refinements and retries included)
    sim_seconds: float  # wall time inside the simulator
    # s, simulated time at which the point's last run ended: where its stop condition held
    # (the outputs had settled), or its cap
    stopped: float
    # Energies: every runner measures them; None only in records built without (tests).
    supply_energy: float | None = None  # J the supply delivered beyond its static draw
    # J: supply_energy less what the external loads took from the supply, shared equally by
    # the outputs that switched together (a power tool adds the internal power of every output
    # that toggles, so the event counts once)
    internal_energy: float | None = None
    # A: the supply's static draw before the event and once it has settled, taken off
    # supply_energy (a flip-flop's depends on the value it stores)
    static_current: tuple[float, float] | None = None
    # (pin, edge, C) drawn by other inputs that moved in the run: a flip-flop's data pins
    side_charges: tuple[tuple[str, str, float], ...] = ()
    stop_cap: float | None = None  # s, the time the last run could not go past; None: not run


@dataclass(frozen=True, slots=True)
class Failure:
    point: TimingPoint
    reason: str
    waveform: Waveform | None = None  # the run that gave no measurement, when one ran
    where: str = ""  # cell, arc, state and point in the library's units (``explain``)
    cut_off: bool = False  # the window cap stopped the run before the output settled

    @property
    def message(self) -> str:
        """One line saying where and why: what the run lists for each failed point."""
        where = self.where or f"cell {self.point.cell}, {self.point.label}"
        return f"{where}: {self.reason}"


def explain(config: LibraryConfig, point, exc: CharflowError) -> CharflowError:
    """``exc`` located at ``point`` (cell, arc with its edges, state, and the point in the
    library's units); a run cut off by its window also names the key and what to change."""
    reason = exc.reason
    if isinstance(exc, CutOffError):
        reason = f"{reason}; {_window_advice(config, point.cell, exc.cap)}"
    return exc.located(reason, **point.where(config))


def _window_advice(config: LibraryConfig, cell: str, cap: float | None) -> str:
    """Which ``[simulation] window`` cut a run off, in the library's units, and what to do."""
    unit = config.time_unit
    window = config.simulation.window
    if window is not None:
        said = f"the cap is [simulation] window = {show_time(window, unit)}"
    else:
        said = "the cap is the default of [simulation] window (not set)"
        said += f", here {show_time(cap, unit)}" if cap is not None else ""
    longer = window or cap
    fix = "set window longer than the output takes to settle"
    if longer is not None:
        fix += f" (e.g. window = {longer * WINDOW_ADVICE / config.time_scale:.4g}, in {unit})"
    if min(config.cell(cell).grid.slew) < plausible.SHARPEST_SLEW:
        fix += f", or, if the grid's slews are not in {unit}, correct time_unit"
    return f"{said}: {fix}"


_BACKENDS: dict[str, object] = {}


def backend_for(config: LibraryConfig):
    """This worker's simulator; created once per process and kept."""
    sim = config.simulation
    key = f"{sim.backend}:{sim.timeout}"
    if key not in _BACKENDS:
        _BACKENDS[key] = make_backend(sim.backend, sim.timeout)
    backend = _BACKENDS[key]
    backend.timeout = sim.timeout  # the shared simulator serves every config of the process
    return backend


# Most breakpoints one ``alter`` line holds (PySpice caps a command at 1023 characters, about
# 58 corners): GRID_POINTS over a span, EXTRA_POINTS anywhere else.
GRID_POINTS = 40
EXTRA_POINTS = 16


def breakpoints(start: float, stop: float, spacing: float, extra: Sequence[float] = ()) -> str:
    """A PWL vector for the breakpoint source: corners every ``spacing`` over [start, stop],
    and at the ``extra`` times (at most EXTRA_POINTS of them)."""
    n = int(min(GRID_POINTS, max(2, (stop - start) / spacing)))
    # Rounded as written, so that no two corners print alike: the times must increase.
    times = sorted({float(f"{x:.9g}") for x in (*np.linspace(start, stop, n), *extra) if x > 0})
    return "[ 0 0 " + " ".join(f"{x:.9g} 0" for x in times) + " 1 0 ]"


PARKED_GRID = "[ 0 0 1 0 ]"


def alters(
    deck: Deck,
    cell: CellSpec,
    values: dict[str, str],
    loads: dict[str, float],
    grid: str = PARKED_GRID,
) -> tuple[str, ...]:
    """``alter`` commands setting every input's PULSE, every output's load (unlisted outputs
    stay parked at a negligible load) and the breakpoint source."""
    commands = [f"alter @{deck.input_source(p)}[pulse] = {values[p]}" for p in cell.inputs]
    commands.append(f"alter @vgrid[pwl] = {grid}")
    commands += [
        f"alter {deck.load_cap(o.pin)} = {loads.get(o.pin, PARKED_LOAD):.12g}" for o in cell.outputs
    ]
    return tuple(commands)


def point_loads(cell: CellSpec, point: TimingPoint) -> dict[str, float]:
    loads = {point.output: point.load}
    if point.other_load is not None:
        other = next(o.pin for o in cell.outputs if o.pin != point.output)
        loads[other] = point.other_load
    return loads


def simulate(backend, request: Request) -> tuple[Result, int]:
    """Run with the fallback ladder; return the result and the number of attempts. A run that
    timed out is retried once, on the next rung: each try can cost the whole timeout."""
    errors = {}
    timed_out = False
    for attempt, options in enumerate(RETRY_LADDER, 1):
        try:
            return backend.run(replace(request, options=request.options + options)), attempt
        except (DeckReadError, SimulatorHungError):
            raise
        except SimulatorError as exc:
            errors[" ".join(options) or "default options"] = exc.reason
            if isinstance(exc, SimulatorTimeoutError):
                if timed_out:
                    break
                timed_out = True
    if len(set(errors.values())) == 1:  # the same message each time: say it once
        tried = "; ".join(errors)
        reason = (
            f"failed with {len(errors)} sets of options ({tried}): {next(iter(errors.values()))}"
        )
    else:
        reason = f"failed with {len(errors)} sets of options: " + " | ".join(
            f"[{k}] {v}" for k, v in errors.items()
        )
    raise SimulatorError(reason, cell=request.deck.cell)


_STATIC: dict[tuple[str, tuple[tuple[str, bool], ...]], float] = {}


def static_current(config: LibraryConfig, deck: Deck, assign: dict[str, bool]) -> float:
    """Current (A) the supply delivers at DC with the inputs at ``assign``; computed once per
    worker, deck and input vector."""
    cell = config.cell(deck.cell)
    key = (deck.key, tuple((p, assign[p]) for p in cell.inputs))
    if key not in _STATIC:
        vdd = config.process.vdd
        values = {p: stimulus.constant(vdd if b else 0.0) for p, b in key[1]}
        request = Request(deck, alters(deck, cell, values, {}), "op", (f"{deck.supply}#branch",))
        result, _ = simulate(backend_for(config), request)
        # A source's branch current flows into its + node from outside: out of it is −i.
        _STATIC[key] = -float(result.vectors[f"{deck.supply}#branch"][-1])
    return _STATIC[key]


def measure_point(
    config: LibraryConfig, deck: Deck, point: TimingPoint, *, step: float | None = None
) -> Measurement:
    """Simulate and measure one point; ``step`` overrides the first maximum step, which is
    otherwise estimated from the point's series (``stepsize``)."""
    if step is None:
        known = stepsize.probed(config, deck, point)
        if known is not None:
            return known
        step = stepsize.first_step(config, deck, point)
    cell = config.cell(point.cell)
    vdd = config.process.vdd
    thr = config.thresholds
    sim = config.simulation
    ramp = stimulus.ramp(point.slew, point.input_edge, thr, vdd)
    values = {p: stimulus.constant(vdd if v else 0.0) for p, v in point.side}
    values[point.related] = ramp.pulse()
    commands = alters(deck, cell, values, point_loads(cell, point))
    out_node = deck.output_node(point.output)
    out_nodes = tuple(deck.output_node(o.pin) for o in cell.outputs)
    in_node = deck.input_node(point.related)
    in_branch = f"{deck.input_source(point.related)}#branch"
    supply = f"{deck.supply}#branch"
    vectors = (*out_nodes, in_node, in_branch, supply)
    target = vdd if point.output_edge == "rise" else 0.0
    start_level = vdd - target

    # The run ends once every output that switches is within the settle tolerance of its final
    # rail and the input ramp is over, so the input charge and the supply energy are whole (a
    # slow ramp can leave the output at its rail while the input still moves; a second output
    # driven from the first settles after it); the stop time is only a cap for outputs that
    # never get there.
    tol = sim.settle * vdd
    before = {**dict(point.side), point.related: point.input_edge == "fall"}
    after = {**before, point.related: point.input_edge == "rise"}
    rising = point.output_edge == "rise"
    settled = [f"v({out_node}) > {vdd - tol:.6g}" if rising else f"v({out_node}) < {tol:.6g}"]
    for o, node in zip(cell.outputs, out_nodes, strict=True):
        final = o.function.evaluate(after)
        if o.pin != point.output and final != o.function.evaluate(before):
            settled.append(f"v({node}) > {vdd - tol:.6g}" if final else f"v({node}) < {tol:.6g}")
    stop_when = " when ".join([*settled, f"time > {ramp.end:.12g}"])
    window = sim.window or WINDOW_CAP * max(ramp.duration, max(cell.grid.slew))
    stop = ramp.end + window
    max_step = step
    runs = 0
    seconds = 0.0
    backend = backend_for(config)
    what = f"output {point.output}"
    nodes = {o.pin: node for o, node in zip(cell.outputs, out_nodes, strict=True)}
    nodes[point.related] = in_node
    saved = KeepWaveform(lambda: waveform(result.vectors, nodes))
    for refinement in range(REFINEMENTS + 1):
        request = Request(
            deck,
            commands,
            f"tran {max_step:.6g} {stop:.6g} 0 {max_step:.6g}",
            vectors,
            stop_when=stop_when,
        )
        result, attempts = simulate(backend, request)
        runs += attempts
        seconds += result.seconds
        t = result.vectors["time"]
        v = result.vectors[out_node]
        with saved:
            if abs(v[0] - start_level) > LOGIC_MARGIN * vdd:
                raise MeasurementError(
                    f"{what} starts at {v[0]:.4g} V, not at {start_level:.4g} V: the side inputs "
                    f"do not hold it where the function says"
                )
            check_settled(v, target, tol * (1 + 1e-6), point.output_edge, what, window)
            t_out = single_crossing(
                t, v, thr.delay_output(point.output_edge) * vdd, point.output_edge, what
            )
            band = thr.slew_band(point.output_edge)
            raw_transition = transition(t, v, vdd, band, point.output_edge, what)
        # Too few samples on the edge make the interpolated crossings coarse: refine the step.
        wanted = raw_transition / sim.samples_per_edge
        if step_at(t, t_out) <= REFINE_SLACK * wanted or refinement == REFINEMENTS:
            break
        max_step = wanted
    vin = result.vectors[in_node]
    with saved:
        t_in = single_crossing(
            t,
            vin,
            thr.delay_input(point.input_edge) * vdd,
            point.input_edge,
            f"input {point.related}",
        )
    # The source's branch current flows into its + node from outside: charge into the pin is −∫i.
    charge = -integral(t, result.vectors[in_branch], ramp.start)
    current = -result.vectors[supply]
    static = (float(current[0]), static_current(config, deck, after))
    energy = supply_energy(t, current, vdd, t_in, static)
    # A load charging by dv took C·vdd·dv from the supply (C·V² once at the rail, half of it
    # stored); one discharging takes nothing from it. Counting the dv reached rather than the
    # full swing keeps the window's end from cutting off load energy as if it were the cell's.
    loads = point_loads(cell, point)
    taken, switched = 0.0, 0
    for o, node in zip(cell.outputs, out_nodes, strict=True):
        dv = float(result.vectors[node][-1] - result.vectors[node][0])
        taken += loads.get(o.pin, PARKED_LOAD) * vdd * max(dv, 0.0)
        switched += abs(dv) > vdd / 2
    return Measurement(
        point=point,
        delay=t_out - t_in,
        transition=raw_transition / thr.slew_derate,
        input_charge=charge,
        supply_energy=energy,
        internal_energy=(energy - taken) / switched,
        static_current=static,
        runs=runs,
        sim_seconds=seconds,
        stopped=float(t[-1]),
        stop_cap=stop,
    )


def measure_chunk(
    config: LibraryConfig, deck: Deck, points, done: Callable[[object], None] | None = None
) -> list:
    """Measure points of one cell; a point that fails becomes a Failure, the rest go on.
    ``done`` gets each outcome as it is made. A simulator that hangs ends the chunk
    (SimulatorHungError): this process cannot simulate again."""
    from charflow.execution.sweep import ConstraintPoint, PulsePoint
    from charflow.measurement import power, sequential

    out: list = []
    for point in points:
        try:
            if isinstance(point, power.TogglePoint):
                outcome = power.measure_toggle(config, deck, point)
            elif isinstance(point, ConstraintPoint):
                outcome = sequential.measure_constraint(config, deck, point)
            elif isinstance(point, PulsePoint):
                outcome = sequential.measure_pulse(config, deck, point)
            elif point.kind != "combinational":
                outcome = sequential.measure_clocked(config, deck, point)
            else:
                outcome = measure_point(config, deck, point)
        except SimulatorHungError:
            raise
        except (MeasurementError, SimulatorError) as exc:
            wave = exc.waveform if isinstance(exc, MeasurementError) else None
            told = explain(config, point, exc)
            cut = isinstance(exc, CutOffError)
            outcome = Failure(point, told.reason, wave, place(told.context), cut)
        except Exception as exc:  # noqa: BLE001 - a charflow bug must not end hours of work
            where = place(point.where(config))
            log.exception("internal error measuring %s", where)
            outcome = Failure(
                point,
                f"internal error in charflow ({type(exc).__name__}: {exc}); please report it",
                where=where,
            )
        if done is not None:
            done(outcome)
        out.append(outcome)
    return out


def check_function(config: LibraryConfig, deck: Deck) -> None:
    """Every input vector gives the declared output levels at DC; raise naming the vector.
    A flip-flop is checked by clocking every data vector in from either stored value."""
    cell = config.cell(deck.cell)
    if cell.flop is not None:
        from charflow.measurement.sequential import check_flop

        try:
            return check_flop(config, deck)
        except FunctionalMismatchError as exc:
            cause = exc.__cause__
            if not isinstance(cause, CutOffError):
                raise
            # Not the netlist's fault: the window is too short for the flop to settle.
            advice = _window_advice(config, cell.name, cause.cap)
            raise exc.located(f"{exc.reason}; {advice}", key="simulation.window") from cause
    vdd = config.process.vdd
    outputs = tuple(deck.output_node(o.pin) for o in cell.outputs)
    backend = backend_for(config)
    for bits in itertools.product((False, True), repeat=len(cell.inputs)):
        assign = dict(zip(cell.inputs, bits, strict=True))
        values = {p: stimulus.constant(vdd if b else 0.0) for p, b in assign.items()}
        request = Request(deck, alters(deck, cell, values, {}), "op", outputs)
        result, _ = simulate(backend, request)
        vector = " ".join(f"{p}={int(b)}" for p, b in assign.items())
        for spec, node in zip(cell.outputs, outputs, strict=True):
            level = float(result.vectors[node][-1])
            expected = spec.function.evaluate(assign)
            want = vdd if expected else 0.0
            if abs(level - want) > LOGIC_MARGIN * vdd:
                raise FunctionalMismatchError(
                    f"output {spec.pin} is {level:.4g} V, but {spec.function.to_liberty()} = "
                    f"{int(expected)} expects {want:.4g} V",
                    cell=cell.name,
                    pin=spec.pin,
                    vector=vector,
                )


def pin_capacitance(measurements: list[Measurement], vdd: float) -> dict[tuple[str, str], float]:
    """(pin, input edge) → capacitance, from the charge the pin drew on that edge at the
    smallest load: each edge's value from its own edge's charge.

    At each pin and edge the points at the smallest load are averaged over slews and states:
    the effective (Miller-inclusive) capacitance a driver sees (common practice). Besides each
    point's related pin on its edge, the charges in its ``side_charges`` count: a flip-flop's
    data pins as they move before the clock edge, the clock's inactive edge, a clear or
    preset's release (``sequential.measure_clocked``).
    """
    groups: dict[tuple[str, str], list[tuple[float, float]]] = {}
    for m in measurements:
        entries = [(m.point.related, m.point.input_edge, m.input_charge), *m.side_charges]
        for pin, edge, charge in entries:
            groups.setdefault((pin, edge), []).append((m.point.load, abs(charge)))
    caps = {}
    for key, group in groups.items():
        smallest = min(load for load, _ in group)
        caps[key] = float(np.mean([q for load, q in group if load == smallest])) / vdd
    return caps
