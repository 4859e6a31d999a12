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
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace
from functools import partial

import numpy as np

from charflow.config.library import CellSpec, Grid, LibraryConfig, Simulation, Thresholds
from charflow.config.shapes import InputShape
from charflow.measurement import stepsize
from charflow.measurement.waves import (
    KeepWaveform,
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
)
from charflow.records.outcomes import Measurement, TightMeasurement
from charflow.records.points import TightPoint, TimingPoint
from charflow.records.units import show_time
from charflow.simulation import plausible, stimulus
from charflow.simulation.backends import (
    RETRY_LADDER,
    Request,
    Result,
    SharedBackend,
    SubprocessBackend,
)
from charflow.simulation.netlist import PARKED_LOAD, Deck
from charflow.simulation.session import SESSION, BoundedCache

log = logging.getLogger("charflow")

WINDOW_CAP = 100.0  # stop-time cap, in ramp durations (or the grid's largest slew)
WINDOW_ADVICE = 10.0  # a cut-off point's message suggests this many times the window it had
REFINEMENTS = 2
REFINE_SLACK = 1.5  # the simulator's step may exceed the wanted one a little
LOGIC_MARGIN = 0.1  # a DC output within 10 % of a rail is a clean logic level


def explain(config: LibraryConfig, point, exc: CharflowError) -> CharflowError:
    """``exc`` located at ``point`` (cell, arc with its edges, state, and the point in the
    library's units); a run cut off by its window also names the key and what to change."""
    reason = exc.reason
    if isinstance(exc, CutOffError):
        reason = f"{reason}; {window_advice(config, point.cell, exc.cap)}"
    return exc.located(reason, **point.where(config))


def window_advice(config: LibraryConfig, cell: str, cap: float | None) -> str:
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


def backend_for(config: LibraryConfig) -> SharedBackend | SubprocessBackend:
    """This worker's simulator; created once per process and kept (``session``)."""
    return SESSION.backend(config.simulation)


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
    values: Mapping[str, stimulus.Wave],
    loads: dict[str, float],
    grid: str = PARKED_GRID,
    train: stimulus.Wave | None = None,
    shifts: Mapping[str, float] | None = None,
) -> tuple[str, ...]:
    """``alter`` commands setting every input's wave (a PULSE, or a shaped edge's PWL), every
    output's load (unlisted outputs stay parked at a negligible load), the breakpoint sources
    (``grid``'s corners, and a ``train`` of evenly spaced ones: a PULSE vector or a PWL,
    ``sequential.edge_trains``, or none) and every transistor's threshold shift (V, by device
    name; unlisted devices at 0: no run inherits another's)."""
    commands = [
        c for p in cell.inputs for c in stimulus.set_source(deck.input_source(p), values[p])
    ]
    commands.append(f"alter @vgrid[pwl] = {grid}")
    if train is None:
        commands.append(f"alter @vedge[pwl] = {PARKED_GRID}")
    else:
        commands += stimulus.set_source("vedge", train)
    commands += [
        f"alter {deck.load_cap(o.pin)} = {loads.get(o.pin, PARKED_LOAD):.12g}" for o in cell.outputs
    ]
    shift = shifts or {}
    commands += [f"alter @{d.path}[dc] = {shift.get(d.name, 0.0):.9g}" for d in deck.devices]
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
            sent = replace(request, options=request.options + options) if options else request
            return backend.run(sent), attempt
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


# by testbench and input vector
_STATIC: BoundedCache[tuple[str, tuple[tuple[str, bool], ...]], float] = SESSION.cache(
    "static current"
)


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
    config: LibraryConfig,
    deck: Deck,
    point: TimingPoint,
    *,
    step: float | None = None,
    tight: bool = False,
    shifts: Mapping[str, float] | None = None,
) -> Measurement:
    """Simulate and measure one point; ``step`` overrides the first maximum step, which is
    otherwise estimated from the point's series (``stepsize``). With ``tight`` the point is
    measured at tightened settings (``stepsize.tightened``): every step it would take, first
    or refined, over TIGHT_STEPS, and reltol over TIGHT_RELTOL. ``shifts`` are threshold
    shifts (V) by transistor (``mismatch``), none by default."""
    options: tuple[str, ...] = ()
    if step is None:
        # The series' model and probes, looked up once (the key hashes the grid and settings).
        model, probes = _series(config, deck, point)
        known = None if tight else probes.get((point.slew, point.load))
        if known is not None:
            return known
        step = stepsize.step_for(config, model, point)
    if tight:
        step, options = stepsize.tightened(deck, step)
    bench = _bench(config, deck, point, options, shifts)
    samples = config.simulation.samples_per_edge * (stepsize.TIGHT_STEPS if tight else 1.0)
    edge = _measure_edge(config, point, bench, (step, samples))
    return _measurement(config, deck, point, bench, edge)


@dataclass(frozen=True, slots=True)
class _Bench:
    """A point's transient before it runs: the request it makes from an analysis line and the
    nodes and vectors its values are read from."""

    cell: CellSpec
    ramp: stimulus.Ramp  # the related input's edge
    tran: Callable[[str], Request]
    after: dict[str, bool]  # the inputs once the ramp is over
    out_node: str  # the measured output's
    out_nodes: tuple[str, ...]  # every output's, in the cell's order
    nodes: dict[str, str]  # what a failure's waveform shows, by pin
    in_node: str
    in_branch: str  # the input source's branch current
    supply: str  # the supply's branch current
    stop: float  # s, the run's stop-time cap
    window: float  # s, from the ramp's end to the cap


def _bench(
    config: LibraryConfig,
    deck: Deck,
    point: TimingPoint,
    options: tuple[str, ...],
    shifts: Mapping[str, float] | None,
) -> _Bench:
    """The point's stimulus, loads, saved vectors, stop condition and stop-time cap, built
    apart from running it so ``_measure_edge`` can re-run it at finer steps."""
    cell = config.cell(point.cell)
    vdd = config.process.vdd
    thr = config.thresholds
    sim = config.simulation
    ramp = stimulus.ramp(point.slew, point.input_edge, thr, vdd, config.input_shape)
    values: dict[str, stimulus.Wave]
    values = {p: stimulus.constant(vdd if v else 0.0) for p, v in point.side}
    values[point.related] = ramp.pulse()
    commands = alters(deck, cell, values, point_loads(cell, point), shifts=shifts)
    out_node = deck.output_node(point.output)
    out_nodes = tuple(deck.output_node(o.pin) for o in cell.outputs)
    in_node = deck.input_node(point.related)
    in_branch = f"{deck.input_source(point.related)}#branch"
    supply = f"{deck.supply}#branch"
    vectors = (*out_nodes, in_node, in_branch, supply)
    before = {**dict(point.side), point.related: point.input_edge == "fall"}
    after = {**before, point.related: point.input_edge == "rise"}
    stop_when = _stop_when(config, cell, point, out_node, out_nodes, ramp.end, before, after)
    window = sim.window or WINDOW_CAP * max(ramp.duration, max(cell.grid.slew))
    nodes = {o.pin: node for o, node in zip(cell.outputs, out_nodes, strict=True)}
    nodes[point.related] = in_node
    tran = partial(Request, deck, commands, vectors=vectors, options=options, stop_when=stop_when)
    return _Bench(
        cell=cell,
        ramp=ramp,
        tran=tran,
        after=after,
        out_node=out_node,
        out_nodes=out_nodes,
        nodes=nodes,
        in_node=in_node,
        in_branch=in_branch,
        supply=supply,
        stop=ramp.end + window,
        window=window,
    )


def _measurement(
    config: LibraryConfig, deck: Deck, point: TimingPoint, bench: _Bench, edge: _Edge
) -> Measurement:
    """The point's values from the run its output edge was measured on: the input's charges,
    the supply's energy with its static part taken out, and the share left in the cell."""
    vdd = config.process.vdd
    result = edge.result
    t = result.vectors["time"]
    with edge.saved:
        t_in, charges = _input_charges(
            config, point, t, result.vectors, (bench.in_node, bench.in_branch), bench.ramp
        )
    charge, to_threshold, slew_window = charges
    current = -result.vectors[bench.supply]
    static = (float(current[0]), static_current(config, deck, bench.after))
    energy = supply_energy(t, current, vdd, t_in, static)
    taken, switched = _load_energy(bench.cell, point, result, bench.out_nodes, vdd)
    return Measurement(
        point=point,
        delay=edge.t_out - t_in,
        transition=edge.raw_transition / config.thresholds.slew_derate,
        input_charge=charge,
        supply_energy=energy,
        internal_energy=(energy - taken) / switched,
        static_current=static,
        runs=edge.runs,
        sim_seconds=edge.seconds,
        stopped=float(t[-1]),
        stop_cap=bench.stop,
        input_charge_to_threshold=to_threshold,
        input_charge_slew_window=slew_window,
    )


def _input_charges(
    config: LibraryConfig,
    point: TimingPoint,
    t: np.ndarray,
    vectors: Mapping[str, np.ndarray],
    names: tuple[str, str],
    ramp: stimulus.Ramp,
) -> tuple[float, tuple[float, float, float]]:
    """The input's delay-threshold crossing (s) and the charge (C) into the input pin over the
    whole edge, up to that crossing, and between the slew-threshold crossings; ``names`` are
    the input node's and its source's branch current's vectors."""
    thr, vdd = config.thresholds, config.process.vdd
    vin, branch = vectors[names[0]], vectors[names[1]]
    what = f"input {point.related}"
    t_in = single_crossing(t, vin, thr.delay_input(point.input_edge) * vdd, point.input_edge, what)
    band = [
        single_crossing(t, vin, f * vdd, point.input_edge, what)
        for f in thr.slew_band(point.input_edge)
    ]
    # The source's branch current flows into its + node from outside: charge into the pin is −∫i.
    return t_in, (
        -integral(t, branch, ramp.start),
        -integral(t, branch, ramp.start, t_in),
        -integral(t, branch, min(band), max(band)),
    )


def measure_tight(config: LibraryConfig, deck: Deck, point: TightPoint) -> TightMeasurement:
    """``point``'s grid point measured at tightened settings: its values' error bars."""
    m = measure_point(config, deck, point.base, tight=True)
    return TightMeasurement(
        point=point,
        delay=m.delay,
        transition=m.transition,
        input_charge=m.input_charge,
        internal_energy=m.internal_energy,
        reltol=stepsize.tight_reltol(deck),
        runs=m.runs,
        sim_seconds=m.sim_seconds,
    )


@dataclass(frozen=True, slots=True)
class _Edge:
    """The run a point's output edge was measured on (the last, finest one) and what it gave."""

    result: Result
    t_out: float  # s, the output's delay-threshold crossing
    raw_transition: float  # s, between the slew thresholds, before the slew derate
    runs: int  # simulator attempts over every refinement
    seconds: float  # their simulation wall time
    saved: KeepWaveform  # leaves the last run's waveform on a later MeasurementError


def _stop_when(
    config: LibraryConfig,
    cell: CellSpec,
    point: TimingPoint,
    out_node: str,
    out_nodes: tuple[str, ...],
    ramp_end: float,
    before: dict[str, bool],
    after: dict[str, bool],
) -> str:
    """The ngspice condition that ends the point's run; ``out_nodes`` are every output's
    node in the cell's order, ``out_node`` the measured output's."""
    # The run ends once every output that switches is within the settle tolerance of its final
    # rail and the input ramp is over, so the input charge and the supply energy are whole (a
    # slow ramp can leave the output at its rail while the input still moves; a second output
    # driven from the first settles after it); the stop time is only a cap for outputs that
    # never get there.
    vdd = config.process.vdd
    tol = config.simulation.settle * vdd
    rising = point.output_edge == "rise"
    settled = [f"v({out_node}) > {vdd - tol:.6g}" if rising else f"v({out_node}) < {tol:.6g}"]
    for o, node in zip(cell.outputs, out_nodes, strict=True):
        final = o.function.evaluate(after)
        if o.pin != point.output and final != o.function.evaluate(before):
            settled.append(f"v({node}) > {vdd - tol:.6g}" if final else f"v({node}) < {tol:.6g}")
    return " when ".join([*settled, f"time > {ramp_end:.12g}"])


def _measure_edge(
    config: LibraryConfig, point: TimingPoint, bench: _Bench, steps: tuple[float, float]
) -> _Edge:
    """Run the point on its bench and measure its output edge from the first maximum step,
    refining the step until the edge has the samples wanted (``steps``: both) or REFINEMENTS
    are spent."""
    max_step, samples = steps
    runs = 0
    seconds = 0.0
    backend = backend_for(config)
    saved = KeepWaveform(lambda: waveform(result.vectors, bench.nodes))
    for refinement in range(REFINEMENTS + 1):
        request = bench.tran(f"tran {max_step:.6g} {bench.stop:.6g} 0 {max_step:.6g}")
        result, attempts = simulate(backend, request)
        runs += attempts
        seconds += result.seconds
        t = result.vectors["time"]
        v = result.vectors[bench.out_node]
        with saved:
            t_out, raw_transition = _output_edge(config, point, t, v, bench.window)
        # Too few samples on the edge make the interpolated crossings coarse: refine the step.
        wanted = raw_transition / samples
        if step_at(t, t_out) <= REFINE_SLACK * wanted or refinement == REFINEMENTS:
            break
        max_step = wanted
    return _Edge(result, t_out, raw_transition, runs, seconds, saved)


def _output_edge(
    config: LibraryConfig, point: TimingPoint, t: np.ndarray, v: np.ndarray, window: float
) -> tuple[float, float]:
    """The output's delay-threshold crossing and raw transition, once it is found to start at
    the rail the function says and to settle at the other within the window."""
    vdd = config.process.vdd
    thr = config.thresholds
    target = vdd if point.output_edge == "rise" else 0.0
    start_level = vdd - target
    tol = config.simulation.settle * vdd
    what = f"output {point.output}"
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
    return t_out, transition(t, v, vdd, band, point.output_edge, what)


def _load_energy(
    cell: CellSpec, point: TimingPoint, result: Result, out_nodes: tuple[str, ...], vdd: float
) -> tuple[float, int]:
    """The energy (J) the supply gave the outputs' loads and how many outputs switched."""
    # A load charging by dv took C·vdd·dv from the supply (C·V² once at the rail, half of it
    # stored); one discharging takes nothing from it. Counting the dv reached rather than the
    # full swing keeps the window's end from cutting off load energy as if it were the cell's.
    loads = point_loads(cell, point)
    taken, switched = 0.0, 0
    for o, node in zip(cell.outputs, out_nodes, strict=True):
        dv = float(result.vectors[node][-1] - result.vectors[node][0])
        taken += loads.get(o.pin, PARKED_LOAD) * vdd * max(dv, 0.0)
        switched += abs(dv) > vdd / 2
    return taken, switched


# Per series: its model (None when a probe failed) and its probes' measurements by (slew, load),
# calibrated once per process (``stepsize``).
_Calibrated = tuple[stepsize.EdgeModel | None, dict[tuple[float, float], Measurement]]
_SERIES: BoundedCache[
    tuple[str, TimingPoint, Grid, Thresholds, Simulation, InputShape], _Calibrated
] = SESSION.cache("edge models")


def _series(config: LibraryConfig, deck: Deck, point: TimingPoint) -> _Calibrated:
    # Everything the probes depend on: the testbench, the grid's corners, how points are run,
    # the inputs' shape (a probe is a measurement: another shape's never serves).
    key = (
        deck.key,
        replace(point, slew=0.0, load=0.0),  # a series per other output's load too
        config.cell(point.cell).grid,
        config.thresholds,
        config.simulation,
        config.input_shape,
    )
    if key not in _SERIES:
        _SERIES[key] = _calibrate(config, deck, point)
    return _SERIES[key]


def model_for(config: LibraryConfig, deck: Deck, point: TimingPoint) -> stepsize.EdgeModel | None:
    """The transition model of ``point``'s series, calibrated on first use in this process;
    None when a probe fails."""
    return _series(config, deck, point)[0]


def probed(config: LibraryConfig, deck: Deck, point: TimingPoint) -> Measurement | None:
    """``point``'s measurement if it is one of its series' probes (a grid corner): a probe is
    a measurement of that point like any other, so it is not simulated twice."""
    return _series(config, deck, point)[1].get((point.slew, point.load))


def first_step(config: LibraryConfig, deck: Deck, point: TimingPoint) -> float:
    """The first maximum step for ``point``: its estimated transition / samples_per_edge."""
    return stepsize.step_for(config, model_for(config, deck, point), point)


def _calibrate(config: LibraryConfig, deck: Deck, point: TimingPoint) -> _Calibrated:
    grid = config.cell(point.cell).grid
    thr = config.thresholds
    vdd = config.process.vdd
    s0, s1 = grid.slew[0], grid.slew[-1]
    c0, c1 = grid.load[0], grid.load[-1]
    probes: dict[tuple[float, float], Measurement] = {}

    def probe(slew: float, load: float, step: float) -> float:
        corner = replace(point, slew=slew, load=load)
        probes[(slew, load)] = measure_point(config, deck, corner, step=step)
        return probes[(slew, load)].transition * thr.slew_derate

    try:
        t0 = probe(s0, c0, stepsize.plain_step(config, replace(point, slew=s0)))
        # The other corners' edges are slower; measure_point refines the step if they are not.
        coarse = t0 / stepsize.PROBE_SAMPLES
        t_load = probe(s0, c1, coarse) if c1 > c0 else t0
        t_slew = probe(s1, c0, coarse) if s1 > s0 else t0
    except SimulatorHungError:
        raise
    except (MeasurementError, SimulatorError):
        # The points themselves will report what is wrong; their first step stays plain.
        return None, {}
    shape = config.input_shape
    r0, r1 = (stimulus.ramp(s, point.input_edge, thr, vdd, shape).duration for s in (s0, s1))
    per_farad = max(t_load - t0, 0.0) / (c1 - c0) if c1 > c0 else 0.0
    per_ramp = max(t_slew - t0, 0.0) / (r1 - r0) if s1 > s0 else 0.0
    return stepsize.EdgeModel(t0, r0, c0, per_farad, per_ramp), probes


def check_gates(config: LibraryConfig, deck: Deck) -> None:
    """Every input vector of a combinational cell gives the declared output levels at DC;
    raise naming the vector."""
    cell = config.cell(deck.cell)
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
