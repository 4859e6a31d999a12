"""Flip-flop power: the energy of clock and control events, hidden power, leakage per state.

A flop's static current depends on the value it stores, which a DC operating point cannot know:
every static level here is the supply current at the settled end of a transient that writes the
state with one active clock edge and then holds an input vector without another
(``state_current``; for leakage, ``state_leakage``, at a gmin that adds no leakage of its own).
The energy of an event (a clock edge that switches the outputs, a clear) is the supply's energy
from the event's start until its current has come back to the new state's static level, less
that static draw, less what the external loads took; a hidden event (the clock toggling with
the data equal to the stored value, a data pin moving while the clock holds still) is measured
the same way, and every output must hold its level through it.
Everything is SI here (J, W, A); ``power`` tabulates and the Liberty writer converts.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np

from . import logic, stimulus
from .config import CellSpec, LibraryConfig
from .errors import MeasurementError
from .measure import integral, single_crossing
from .netlist import PARKED_LOAD, Deck
from .power import (
    SLEW_AXIS,
    LeakageState,
    PinPower,
    ToggleMeasurement,
    TogglePoint,
    leakage_run,
    power_quantity,
)
from .sequential import _Bench, run_step
from .simulate import Request, Result
from .stimulus import Ramp
from .sweep import EDGES, capture_values, stored_output
from .tables import Axis, Table
from .timing import LOGIC_MARGIN, RAMP_SAMPLES, alters, backend_for, breakpoints, simulate

# A static run holds its vector long against the slowest relaxation of a node left floating
# between off devices, C·ΔV/I ≈ 1 fF · 0.1 V / 1 nA = 0.1 µs, and averages the current over the
# hold's last quarter; the simulator's steps grow to ~1/200 of it once all is quiet.
STATIC_HOLD = 1e-3  # s
HOLD_STEPS = 200
READ_FRACTION = 0.25
# Leakage holds: Gear integration, as the trapezoidal rule's ringing on the supply current
# biases a hold's mean (measured: 72 pW of 17.5 nW on the demo's QDFF_P1, and ±5 pW on the
# level-1 QDFFR_P1 whose devices leak nothing); up to LEAKAGE_HOLDS holds, each ten times the
# last, until the last two quarters' currents agree within STEADY_RTOL: with gmin out of the
# way a node between off devices relaxes at the devices' own leakage: 1 fF / 2e-14 S ≈ 50 ms
# at 0.03 pW.
LEAKAGE_METHOD = "method=gear"
LEAKAGE_HOLDS = 3
STEADY_RTOL = 0.01
QUIET_FRACTION = 0.5  # an event's current must be quiet over the last half of its window
GRID_SPAN = 0.1  # of the settle window: see event_grid


@dataclass(frozen=True, slots=True)
class EventEnergy:
    """The energy of one flop event, measured on the timing run that timed it."""

    supply: float  # J the supply delivered beyond its static draw
    internal: float  # J per output that switched, the external loads' share taken off
    static: tuple[float, float]  # A: the static draw before the event and after it settles
    settled: float  # s, the end of the energy window


def state_term(cell: CellSpec, state: bool) -> tuple[tuple[str, bool], ...]:
    """The stored value as a ``when`` names it: the level of the first output."""
    pin = cell.outputs[0].pin
    return ((pin, stored_output(cell, pin, state)),)


def stored_value(cell: CellSpec, point: TogglePoint) -> bool:
    """The value a flop's toggle point stores, read back from its ``state_term``."""
    ((pin, level),) = point.state
    return level == stored_output(cell, pin, True)


def rests(cell: CellSpec, state: bool, vector: dict[str, bool]) -> bool:
    """Whether the flop can hold ``state`` under ``vector``: an asserted clear or preset forces
    its value, and with both asserted the state is not defined."""
    flop = cell.flop
    clear = flop.clear is not None and flop.clear.evaluate(vector)
    preset = flop.preset is not None and flop.preset.evaluate(vector)
    return not (clear and preset) and not (clear and state) and not (preset and not state)


def _level(config: LibraryConfig, value: bool) -> float:
    return config.process.vdd if value else 0.0


def _hold_waves(
    bench: _Bench, state: bool, vector: dict[str, bool]
) -> tuple[dict[str, str], float]:
    """Waves that store ``state`` with one active clock edge (the grid's sharpest slew) and
    then move every input to ``vector`` with no active edge; and the time the inputs start to
    move (sharpest-slew ramps), a quarter period after the clock's last edge: no hold risk."""
    cell, flop = bench.cell, bench.cell.flop
    small = min(cell.grid.slew)
    active = stimulus.ramp(small, flop.edge, bench.thr, bench.vdd)
    v_inactive, v_active = active.levels
    stay = vector[flop.clock] == (flop.edge == "rise")
    width = 1.0 if stay else bench.half - active.duration
    waves = {
        flop.clock: stimulus.pulse_vector(
            v_inactive, v_active, bench.lead, active.duration, active.duration, width, 2.0
        )
    }
    move = bench.lead + 1.5 * bench.half
    written = capture_values(cell, state)
    for pin, value in written.items():
        waves[pin] = bench.data(pin, value, vector[pin], move, small)[0]
    return waves, move


_STATIC: dict[tuple[str, bool, tuple[tuple[str, bool], ...]], float] = {}


def _hold_request(
    config: LibraryConfig,
    deck: Deck,
    state: bool,
    vector: dict[str, bool],
    hold: float,
    options: tuple[str, ...] = (),
) -> Request:
    """The run that writes ``state``, moves the inputs to ``vector`` and holds them ``hold``
    seconds (the data's pulses stay flat 1 s: holds are shorter)."""
    cell = config.cell(deck.cell)
    if not rests(cell, state, vector):
        when = logic.when_condition(tuple(vector.items()))
        raise MeasurementError(
            f"the flop cannot hold {int(state)} under {when}: a clear "
            "or preset it asserts forces the state"
        )
    waves, move = _hold_waves(_Bench(config, deck, min(cell.grid.slew)), state, vector)
    max_step = hold / HOLD_STEPS
    outputs = tuple(deck.output_node(o.pin) for o in cell.outputs)
    return Request(
        deck,
        alters(deck, cell, waves, {}),
        f"tran {max_step:.6g} {move + hold:.6g} 0 {max_step:.6g}",
        (*outputs, f"{deck.supply}#branch"),
        options,
    )


def _held(
    config: LibraryConfig, deck: Deck, state: bool, vector: dict[str, bool], result: Result
) -> tuple[np.ndarray, np.ndarray]:
    """The run's time and supply current, once every output is checked to hold ``state``."""
    cell = config.cell(deck.cell)
    for o in cell.outputs:
        want = stored_output(cell, o.pin, state)
        end = result.vectors[deck.output_node(o.pin)][-1]
        if abs(end - _level(config, want)) > LOGIC_MARGIN * config.process.vdd:
            raise MeasurementError(
                f"output {o.pin} ends at {end:.4g} V holding state {int(state)}, "
                f"{int(want)} expected",
                cell=cell.name,
                pin=o.pin,
                vector=logic.when_condition(tuple(vector.items())),
            )
    # A source's branch current flows into its + node.
    return result.vectors["time"], -result.vectors[f"{deck.supply}#branch"]


def _tail_mean(t: np.ndarray, current: np.ndarray, start: float, stop: float) -> float:
    """The trapezoid's mean over the whole steps in [start, stop], not a last sample: the
    sample-to-sample ringing trapezoidal integration leaves on a source's current cancels step
    by step (it would not from an end between samples)."""
    keep = (t >= start) & (t <= stop)
    ts, cs = t[keep], current[keep]
    return float(np.trapezoid(cs, ts) / (ts[-1] - ts[0]))


def state_current(config: LibraryConfig, deck: Deck, state: bool, vector: dict[str, bool]) -> float:
    """Current (A) the supply delivers once the flop holds ``state`` under the input
    ``vector``, at the simulator settings of the timing runs it is taken off; simulated once
    per worker, deck, state and vector."""
    cell = config.cell(deck.cell)
    key = (deck.key, state, tuple((p, vector[p]) for p in cell.inputs))
    if key not in _STATIC:
        request = _hold_request(config, deck, state, vector, STATIC_HOLD)
        result, _ = simulate(backend_for(config), request)
        t, current = _held(config, deck, state, vector, result)
        _STATIC[key] = _tail_mean(t, current, t[-1] - READ_FRACTION * STATIC_HOLD, t[-1])
    return _STATIC[key]


def state_leakage(
    config: LibraryConfig, deck: Deck, state: bool, vector: dict[str, bool]
) -> tuple[float, float]:
    """The power (W) the flop leaks holding ``state`` under ``vector``, and the gmin it was
    measured with (``power.leakage_run``), with Gear integration (``LEAKAGE_METHOD``). The hold
    is made ten times longer while its current still moves between the last two quarters."""
    cell = config.cell(deck.cell)
    vdd = config.process.vdd
    when = logic.when_condition((*vector.items(), *state_term(cell, state)))
    hold = STATIC_HOLD
    for _ in range(LEAKAGE_HOLDS):
        request = _hold_request(config, deck, state, vector, hold, (LEAKAGE_METHOD,))
        result, gmin = leakage_run(config, request, when)
        t, current = _held(config, deck, state, vector, result)
        quarter = READ_FRACTION * hold
        last = _tail_mean(t, current, t[-1] - quarter, t[-1])
        before = _tail_mean(t, current, t[-1] - 2 * quarter, t[-1] - quarter)
        # Steady: within STEADY_RTOL, or within one junction's gmin current, which the value
        # may hold anyway.
        if abs(last - before) <= max(STEADY_RTOL * abs(last), gmin * vdd):
            return vdd * last, gmin
        hold *= 10
    raise MeasurementError(
        f"leakage has not settled in a {hold / 10:g} s hold: the supply current moves from "
        f"{before:.4g} A to {last:.4g} A over its last two quarters",
        cell=cell.name,
        vector=when,
    )


def vectors(cell: CellSpec) -> tuple[tuple[bool, dict[str, bool]], ...]:
    """Every (state, input vector) a flop can rest in (``rests``), in counting order."""
    found = []
    for state in (False, True):
        for bits in itertools.product((False, True), repeat=len(cell.inputs)):
            vector = dict(zip(cell.inputs, bits, strict=True))
            if rests(cell, state, vector):
                found.append((state, vector))
    return tuple(found)


def leakage(config: LibraryConfig, deck: Deck) -> tuple[LeakageState, ...]:
    """The supply's static power (W) per stored value and input vector."""
    cell = config.cell(deck.cell)
    return tuple(
        LeakageState(
            logic.when_condition((*vector.items(), *state_term(cell, state))),
            *state_leakage(config, deck, state, vector),
        )
        for state, vector in vectors(cell)
    )


def _quiet_end(
    config: LibraryConfig,
    t: np.ndarray,
    current: np.ndarray,
    event: Ramp,
    switch: float,
    static: tuple[float, float],
    what: str,
) -> float:
    """The end of the energy window: once the event's ramp is over and the supply current is
    back at its static level, within ``simulation.settle`` of its largest excursion after the
    event began. The current must stay quiet over the window's last part."""
    keep = t >= event.start
    ts, cs = t[keep], current[keep]
    # Per step, the mean of its two samples: what the trapezoid integrates, and free of the
    # sample-to-sample ringing trapezoidal integration leaves on a source's current.
    excess = cs - np.where(ts < switch, static[0], static[1])
    excess = np.abs(excess[1:] + excess[:-1]) / 2
    loud = np.flatnonzero(excess > config.simulation.settle * excess.max())
    settled = max(event.end, float(ts[loud[-1] + 1]))
    if settled > ts[-1] - QUIET_FRACTION * (ts[-1] - event.end):
        span = (ts[-1] - event.end) / config.time_scale
        raise MeasurementError(
            f"supply current has not settled {span:.4g} {config.time_unit} after {what}, the "
            f"end of the run ([simulation] window): {excess[-1]:.4g} A off its static value at "
            f"the end, {excess.max():.4g} A at most"
        )
    return settled


def _window_energy(
    vdd: float,
    t: np.ndarray,
    current: np.ndarray,
    start: float,
    switch: float,
    static: tuple[float, float],
    stop: float,
) -> float:
    """Supply energy over the whole steps that cover [start, stop], beyond the static draw:
    the ringing trapezoidal integration leaves on a source's current cancels step by step,
    not over a part of a step."""
    first = max(int(np.searchsorted(t, start, "right")) - 1, 0)
    last = min(int(np.searchsorted(t, stop, "left")), len(t) - 1)
    ts, cs = t[first : last + 1], current[first : last + 1]
    at_rest = static[0] * (switch - ts[0]) + static[1] * (ts[-1] - switch)
    return vdd * (float(np.trapezoid(cs, ts)) - at_rest)


def _levels(config: LibraryConfig, deck: Deck, vectors_: dict, when: float) -> dict[str, bool]:
    """Every input's logic level at ``when``, from its node."""
    cell = config.cell(deck.cell)
    t = vectors_["time"]
    half = config.process.vdd / 2
    return {p: float(np.interp(when, t, vectors_[deck.input_node(p)])) > half for p in cell.inputs}


def event_vectors(cell: CellSpec, deck: Deck) -> tuple[str, ...]:
    """What a timing run must record for ``event_energy``: the supply and every pin."""
    pins = (*map(deck.input_node, cell.inputs), *(deck.output_node(o.pin) for o in cell.outputs))
    return (*pins, f"{deck.supply}#branch")


def event_energy(
    config: LibraryConfig,
    deck: Deck,
    vectors_: dict,
    event: Ramp,
    states: tuple[bool, bool],
    loads: dict[str, float],
) -> EventEnergy:
    """The energy of an event that moves the flop from ``states[0]`` to ``states[1]``, on a
    run that recorded ``event_vectors`` and went on long enough for the current to settle."""
    cell = config.cell(deck.cell)
    vdd = config.process.vdd
    t = vectors_["time"]
    current = -vectors_[f"{deck.supply}#branch"]
    switch = event.time_at(config.thresholds.delay_input(event.edge))
    static = (
        state_current(config, deck, states[0], _levels(config, deck, vectors_, event.start)),
        state_current(config, deck, states[1], _levels(config, deck, vectors_, t[-1])),
    )
    settled = _quiet_end(config, t, current, event, switch, static, "the event")
    supplied = _window_energy(vdd, t, current, event.start, switch, static, settled)
    # A load charging by dv took C·vdd·dv from the supply; one discharging takes nothing.
    taken, switched = 0.0, 0
    for o in cell.outputs:
        v = vectors_[deck.output_node(o.pin)]
        dv = float(np.interp(settled, t, v) - np.interp(event.start, t, v))
        taken += loads.get(o.pin, PARKED_LOAD) * vdd * max(dv, 0.0)
        switched += abs(dv) > vdd / 2
    return EventEnergy(supplied, (supplied - taken) / max(switched, 1), static, settled)


def event_grid(event: Ramp, window: float, extra: tuple[float, ...] = ()) -> str:
    """Breakpoints over the event's ramp and the first tenth of the settle window after it,
    where the cell's own nodes switch: at the old coarse step (window / 200) the
    energy of a demo flop's event was off by up to 0.8 fJ, with these by 0.1 fJ. ``extra``:
    more breakpoints (``timing.breakpoints``)."""
    span = (event.start, event.end + GRID_SPAN * window, event.duration / RAMP_SAMPLES)
    return breakpoints(*span, extra)


def plan_toggles(cell: CellSpec) -> tuple[TogglePoint, ...]:
    """A flop's hidden events: the clock's two edges with the data equal to each stored value,
    its inactive edge with the data opposite it (no edge of that kind captures), and every data
    pin's two edges under either clock level and either stored value."""
    flop = cell.flop
    load = min(cell.grid.load)
    inactive = EDGES[1] if flop.edge == EDGES[0] else EDGES[0]
    points = []
    for state, data in itertools.product((False, True), repeat=2):
        side = tuple(sorted(capture_values(cell, data).items(), key=_order(cell)))
        for edge in EDGES if data == state else (inactive,):
            for slew in cell.grid.slew:
                points.append(
                    TogglePoint(
                        cell.name, flop.clock, side, edge, slew, load, state_term(cell, state)
                    )
                )
    for pin in cell.data_inputs:
        for level, state in itertools.product((False, True), repeat=2):
            held = {**capture_values(cell, state), flop.clock: level}
            side = tuple(sorted(((p, v) for p, v in held.items() if p != pin), key=_order(cell)))
            for edge in EDGES:
                for slew in cell.grid.slew:
                    points.append(
                        TogglePoint(cell.name, pin, side, edge, slew, load, state_term(cell, state))
                    )
    return tuple(points)


def _order(cell: CellSpec):
    return lambda item: cell.inputs.index(item[0])


def measure_toggle(config: LibraryConfig, deck: Deck, point: TogglePoint) -> ToggleMeasurement:
    """One hidden event of a flop: the stored value is written first, the pin's edge then
    moves no output; its supply energy from the edge until the current is quiet again."""
    cell = config.cell(point.cell)
    flop = cell.flop
    bench = _Bench(config, deck, point.slew, min(cell.grid.slew))
    vdd, thr = bench.vdd, bench.thr
    side = dict(point.side)
    state = stored_value(cell, point)
    inactive = point.input_edge != flop.edge
    if point.related == flop.clock and inactive and side != capture_values(cell, state):
        # The data opposite the stored value: it moves there while the clock is still active
        # after writing the state, then the inactive edge under test.
        active = flop.edge == "rise"
        waves, move = _hold_waves(bench, state, {**side, flop.clock: active})
        back = stimulus.ramp(point.slew, point.input_edge, thr, vdd)
        event = Ramp(back.edge, move + bench.half, back.duration, vdd)
        first = stimulus.ramp(min(cell.grid.slew), flop.edge, thr, vdd)
        waves[flop.clock] = stimulus.pulse_vector(
            *first.levels,
            bench.lead,
            first.duration,
            event.duration,
            event.start - bench.lead - first.duration,
            2.0,
        )
    elif point.related == flop.clock:
        clock, second = bench.clock(point.slew, edges=2)
        waves = {p: stimulus.constant(_level(config, v)) for p, v in side.items()}
        waves[flop.clock] = clock
        if point.input_edge == flop.edge:
            event = second
        else:  # the first inactive edge: half a period after the edge that wrote the state
            back = stimulus.ramp(point.slew, point.input_edge, thr, vdd)
            event = Ramp(back.edge, bench.lead + bench.half, back.duration, vdd)
    else:
        before = point.input_edge == "fall"
        waves, move = _hold_waves(bench, state, {**side, point.related: before})
        go = stimulus.ramp(point.slew, point.input_edge, thr, vdd)
        event = Ramp(go.edge, move + bench.half, go.duration, vdd)
        written = capture_values(cell, state)[point.related]
        if written == before:
            waves[point.related] = event.pulse()
        else:  # to ``before`` with the other data, then the edge under test back again
            first = stimulus.ramp(min(cell.grid.slew), "rise" if before else "fall", thr, vdd)
            flat = event.start - move - first.duration
            waves[point.related] = stimulus.pulse_vector(
                *reversed(event.levels), move, first.duration, event.duration, flat, 2.0
            )
    stop = event.end + bench.window
    outputs = {o.pin: deck.output_node(o.pin) for o in cell.outputs}
    supply = f"{deck.supply}#branch"
    in_branch = f"{deck.input_source(point.related)}#branch"
    grid = event_grid(event, bench.window)
    max_step = run_step(config, point.slew, min(cell.grid.slew))
    request = Request(
        deck,
        alters(deck, cell, waves, {o: point.load for o in outputs}, grid),
        f"tran {max_step:.6g} {stop:.6g} 0 {max_step:.6g}",
        (*outputs.values(), deck.input_node(point.related), in_branch, supply),
    )
    result, runs = simulate(backend_for(config), request)
    t = result.vectors["time"]
    during = t >= event.start
    for pin, node in outputs.items():
        v = result.vectors[node]
        want = _level(config, stored_output(cell, pin, state))
        moved = float(np.max(np.abs(v[during] - want)))
        if moved > LOGIC_MARGIN * vdd:
            raise MeasurementError(
                f"output {pin} leaves its stored level {want:.4g} V by {moved:.4g} V: not an "
                "event that leaves the outputs alone"
            )
    switch = single_crossing(
        t[during],
        result.vectors[deck.input_node(point.related)][during],
        thr.delay_input(point.input_edge) * vdd,
        point.input_edge,
        f"input {point.related}",
    )
    after = {**side, point.related: point.input_edge == "rise"}
    before_vector = {**side, point.related: point.input_edge != "rise"}
    static = (
        state_current(config, deck, state, before_vector),
        state_current(config, deck, state, after),
    )
    current = -result.vectors[supply]
    settled = _quiet_end(config, t, current, event, switch, static, f"the {point.related} edge")
    energy = _window_energy(vdd, t, current, event.start, switch, static, settled)
    charge = -integral(t, result.vectors[in_branch], event.start, settled)
    return ToggleMeasurement(point, energy, charge, runs, result.seconds, settled)


def hidden_tables(cell: CellSpec, toggles: list[ToggleMeasurement]) -> tuple[PinPower, ...]:
    """One PinPower per pin, side and stored value with an edge measured at every slew."""
    energy = {
        (m.point.related, m.point.side, m.point.state, m.point.input_edge, m.point.slew): m.energy
        for m in toggles
    }
    axes = (Axis(SLEW_AXIS, cell.grid.slew),)
    out = []
    for key in dict.fromkeys((p.related, p.side, p.state) for p in plan_toggles(cell)):
        tables = []
        for edge in EDGES:
            row = [energy.get((*key, edge, s)) for s in cell.grid.slew]
            if all(e is not None for e in row):
                tables.append(Table(axes, row, power_quantity(edge), "J"))
        if tables:
            when = logic.when_condition((*key[1], *key[2]))
            out.append(PinPower(key[0], when, tuple(tables)))
    return tuple(out)
