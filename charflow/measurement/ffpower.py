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

import numpy as np

from charflow.config.library import LibraryConfig
from charflow.measurement.combinational import (
    LOGIC_MARGIN,
    alters,
    backend_for,
    breakpoints,
    simulate,
)
from charflow.measurement.power import leakage_run
from charflow.measurement.stepsize import RAMP_SAMPLES
from charflow.plan.arcs import capture_values, stored_output
from charflow.plan.toggles import rests, state_term, vectors
from charflow.records import logic
from charflow.records.errors import MeasurementError
from charflow.records.outcomes import EventEnergy, LeakageState
from charflow.simulation.backends import Request, Result
from charflow.simulation.netlist import PARKED_LOAD, Deck
from charflow.simulation.session import SESSION, BoundedCache
from charflow.simulation.stimulus import Ramp, Wave
from charflow.simulation.timeline import Timeline

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


def level(config: LibraryConfig, value: bool) -> float:
    return config.process.vdd if value else 0.0


def hold_waves(
    bench: Timeline, state: bool, vector: dict[str, bool]
) -> tuple[dict[str, Wave], float]:
    """Waves that store ``state`` with one active clock edge (the grid's sharpest slew) and
    then move every input to ``vector`` with no active edge; and the time the inputs start to
    move (sharpest-slew ramps), a quarter period after the clock's last edge: no hold risk."""
    cell, flop = bench.cell, bench.cell.flip_flop
    small = min(cell.grid.slew)
    active = bench.ramp(small, flop.edge)
    v_inactive, v_active = active.levels
    stay = vector[flop.clock] == (flop.edge == "rise")
    width = 1.0 if stay else bench.half - active.duration
    waves = {
        flop.clock: bench.pulse(
            v_inactive, v_active, bench.lead, active.duration, active.duration, width, 2.0
        )
    }
    move = bench.lead + 1.5 * bench.half
    written = capture_values(cell, state)
    for pin, value in written.items():
        waves[pin] = bench.data(pin, value, vector[pin], move, small)[0]
    return waves, move


_STATIC: BoundedCache[tuple[str, bool, tuple[tuple[str, bool], ...]], float] = SESSION.cache(
    "flip-flop static current"
)


def _hold_request(
    config: LibraryConfig,
    deck: Deck,
    state: bool,
    vector: dict[str, bool],
    hold: float,
    window: float,
    options: tuple[str, ...] = (),
) -> Request:
    """The run that writes ``state``, moves the inputs to ``vector`` and holds them ``hold``
    seconds (the data's pulses stay flat 1 s: holds are shorter), on the timeline of the
    flip-flop's settle ``window``."""
    cell = config.cell(deck.cell)
    if not rests(cell, state, vector):
        when = logic.when_condition(tuple(vector.items()))
        raise MeasurementError(
            f"the flop cannot hold {int(state)} under {when}: a clear "
            "or preset it asserts forces the state"
        )
    waves, move = hold_waves(Timeline(config, cell, window, (min(cell.grid.slew),)), state, vector)
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
        if abs(end - level(config, want)) > LOGIC_MARGIN * config.process.vdd:
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


def state_current(
    config: LibraryConfig, deck: Deck, state: bool, vector: dict[str, bool], window: float
) -> float:
    """Current (A) the supply delivers once the flop holds ``state`` under the input
    ``vector``, at the simulator settings of the timing runs it is taken off; simulated once
    per worker, deck, state and vector."""
    cell = config.cell(deck.cell)
    key = (deck.key, state, tuple((p, vector[p]) for p in cell.inputs))
    if key not in _STATIC:
        request = _hold_request(config, deck, state, vector, STATIC_HOLD, window)
        result, _ = simulate(backend_for(config), request)
        t, current = _held(config, deck, state, vector, result)
        _STATIC[key] = _tail_mean(t, current, t[-1] - READ_FRACTION * STATIC_HOLD, t[-1])
    return _STATIC[key]


def state_leakage(
    config: LibraryConfig, deck: Deck, state: bool, vector: dict[str, bool], window: float
) -> tuple[float, float]:
    """The power (W) the flop leaks holding ``state`` under ``vector``, and the gmin it was
    measured with (``power.leakage_run``), with Gear integration (``LEAKAGE_METHOD``). The hold
    is made ten times longer while its current still moves between the last two quarters."""
    cell = config.cell(deck.cell)
    vdd = config.process.vdd
    when = logic.when_condition((*vector.items(), *state_term(cell, state)))
    hold = STATIC_HOLD
    for _ in range(LEAKAGE_HOLDS):
        request = _hold_request(config, deck, state, vector, hold, window, (LEAKAGE_METHOD,))
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


def leakage(config: LibraryConfig, deck: Deck, window: float) -> tuple[LeakageState, ...]:
    """The supply's static power (W) per stored value and input vector."""
    cell = config.cell(deck.cell)
    return tuple(
        LeakageState(
            logic.when_condition((*vector.items(), *state_term(cell, state))),
            *state_leakage(config, deck, state, vector, window),
        )
        for state, vector in vectors(cell)
    )


def quiet_end(
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


def window_energy(
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


def event_energy(
    config: LibraryConfig,
    deck: Deck,
    vectors_: dict,
    event: Ramp,
    states: tuple[bool, bool],
    loads: dict[str, float],
    window: float,
) -> EventEnergy:
    """The energy of an event that moves the flop from ``states[0]`` to ``states[1]``, on a
    run that recorded ``event_vectors`` and went on long enough for the current to settle."""
    cell = config.cell(deck.cell)
    vdd = config.process.vdd
    t = vectors_["time"]
    current = -vectors_[f"{deck.supply}#branch"]
    switch = event.time_at(config.thresholds.delay_input(event.edge))
    static = (
        state_current(
            config, deck, states[0], _levels(config, deck, vectors_, event.start), window
        ),
        state_current(config, deck, states[1], _levels(config, deck, vectors_, t[-1]), window),
    )
    settled = quiet_end(config, t, current, event, switch, static, "the event")
    supplied = window_energy(vdd, t, current, event.start, switch, static, settled)
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
    where the cell's own nodes switch: at the run's coarse step (window / WINDOW_STEPS) the
    energy of a demo flop's event was off by up to 0.8 fJ, with these by 0.1 fJ. ``extra``:
    more breakpoints (``timing.breakpoints``)."""
    span = (event.start, event.end + GRID_SPAN * window, event.duration / RAMP_SAMPLES)
    return breakpoints(*span, extra)
