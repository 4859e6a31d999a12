"""Flip-flops: clock-to-output and asynchronous-control arcs, setup, hold and pulse widths.

Every experiment writes the opposite value into the flop with a first clock edge, then
applies the event under test (a second clock edge, an asynchronous control, a pulse), so
each output edge is measured from a properly initialised state; a clock arc's run and a
setup, hold, recovery or removal search's trials start from that written state instead,
found once per worker (``heldstate``). Constraints are found on the data-to-clock offset by
a safeguarded regula falsi on clock-to-output (``_falsi``); a point passes when the right
value is captured and clock-to-output has pushed out by no more than ``simulation.pushout``
over its relaxed value. A search runs at the usual settings first and narrows again at the
tightened ones from the root it found there (``_settled``).
"""

from __future__ import annotations

import itertools
import logging
from collections.abc import Callable
from dataclasses import dataclass, replace

import numpy as np

from charflow.config.library import CellSpec, Grid, LibraryConfig, Simulation, Thresholds
from charflow.config.shapes import InputShape
from charflow.measurement import ffpower, heldstate, stepsize
from charflow.measurement.combinational import (
    EXTRA_POINTS,
    GRID_POINTS,
    LOGIC_MARGIN,
    PARKED_GRID,
    REFINE_SLACK,
    REFINEMENTS,
    alters,
    backend_for,
    breakpoints,
    point_loads,
    simulate,
)
from charflow.measurement.waves import (
    KeepWaveform,
    check_settled,
    integral,
    single_crossing,
    step_at,
    waveform,
)
from charflow.plan.arcs import capture_values, inactive_controls, plan, stored_output
from charflow.records.errors import (
    FunctionalMismatchError,
    MeasurementError,
    SimulatorError,
    SimulatorHungError,
)
from charflow.records.outcomes import (
    FULL,
    RUNT,
    EventEnergy,
    Measurement,
    SearchResult,
    Waveform,
    waveform_of,
)
from charflow.records.points import ConstraintPoint, PulsePoint, TimingPoint
from charflow.simulation import stimulus
from charflow.simulation.backends import Request
from charflow.simulation.netlist import Deck
from charflow.simulation.session import SESSION, BoundedCache
from charflow.simulation.stimulus import Ramp, Wave
from charflow.simulation.timeline import Timeline

log = logging.getLogger("charflow")

WINDOW_SLEWS = 10.0  # settle window after an edge, in the grid's sharpest slew, at least
WINDOW_DOUBLINGS = 9  # ... doubled up to this many times until the cell settles in it
RAMP_STEPS = 2.0  # largest time step: the run's sharpest input ramp over this (see run_step)
GRID_SPACING = 3.0  # breakpoint spacing in wanted samples: ngspice adds steps after each one
# Of the breakpoints between a slow event and its output edge (_edge_grid), and where along the
# event's ramp they start: the cell's first gate switches near the ramp's middle. Measured on
# seq_l1's QDFFR_P1 clock and clear arcs, 0.01-1.5 ns: within 0.08 % of a 40x finer step, where
# 12 points from the ramp's start left up to 0.43 %.
LEAD_POINTS = 20
LEAD_FROM = 0.45
CHARGE_SPAN = 0.1  # of the settle window: see _settle_samples
# Tightened settings (``stepsize.tightened``): every constraint and pulse-width search settles
# its answer at them (``_settled``); each clock or control event's sample is re-simulated at
# them, and its delays may move by SAMPLE_RTOL and transitions by SAMPLE_TRANSITION_RTOL before
# the whole event takes those settings (measured on seq_l1's QDFFR_P1 at 0.01 ns: delays within
# 0.02 %, CLK->Q rise's transition 0.52 % and the rest within 0.13 %).
SAMPLE_RTOL = 0.002
SAMPLE_TRANSITION_RTOL = 0.01
# A constraint search's trials (_falsi) stay this share of the tolerance inside the bracket: a
# root estimate at an end would move that end by a hair; this far in, the next verdict either
# way leaves a bracket within the tolerance or moves the end by almost half of it.
FALSI_EDGE = 0.45
# The first step of a constraint search's bracketing walk from offset 0 (_bracket), in
# tolerances: on seq_l1's QDFFR_P1 the constraints lie within 20 ps of 0, on the demo's two
# flops most 10-55 ps from it, where a first step of 8 took fewer trials than one of 4
# (measured December 2026; the steps double).
BRACKET_STEP = 8.0
# A search runs at the usual settings, then again at the tightened ones from the root found
# (``_settled``): where the usual stage's final bracket has a margin at both ends, its first
# trials CONFIRM_SPAN of the tolerance either side of the secant's root there, a final bracket
# within the tolerance where the root has not moved past either. On the demo's QDFF_P1 the
# usual settings' setup and hold answers lay within 0.36 ps of the tightened (tolerance 1 ps);
# its QDFFR_P1's removal answers within 1.5 ps.
CONFIRM_SPAN = 0.45
# The usual stage stops once its bracket is within USUAL_SPAN tolerances where both ends have
# a finite margin (the secant's root through them is where the tightened stage starts), within
# USUAL_SPAN_FLAT where the failing end's is not (the tightened stage starts from the middle
# and steps to the ends, so that its first two trials cover the whole bracket: at most two
# tolerances, for a final bracket within one). From the demo's two flops' trial logs
# (December 2026, the margin reshaped as below): stopping at 5 tolerances, the secant's root
# lay within CONFIRM_SPAN tolerances of the tightened stage's in all 84 searches with a
# margin at both ends (within 0.09 in 9 of 10); stopping at 8, not in 7 of them.
USUAL_SPAN = 5.0
USUAL_SPAN_FLAT = 2.0
# A judged search (a margin with a reference) follows its margin g as g / (g + s), s the slack
# the pass limit allows (simulation.pushout x the relaxed delay; ``_reshaped``): the delay's
# pushout over the relaxed one grows about as 1 / (offset - C) towards the capture's failure
# at C (Weste and Harris, "CMOS VLSI Design", 4th ed., 2011, sec. 10.2.2, from memory), which
# makes g / (g + s) = 1 - s / pushout about linear in the offset: the secants of ``_bracket``,
# ``_falsi`` and ``_Noted.start`` land near the root. The same sign and order as g (a monotone
# map); a failed capture stays infinite (``_falsi`` halves towards it); the pushout is taken as
# at least PUSHOUT_FLOOR x s (a trial no later than the relaxed one, far on the passing side).
PUSHOUT_FLOOR = 0.05
# A clock or control point's guessed edges (_Guess) are widened by GUESS_SLACK of the guessed
# delay either side (linear between probes, the guess is off most between them), with
# breakpoints every GUESS_SPACING of the spacing the guessed transition wants (ngspice restarts
# small after each breakpoint and takes about four steps to the next, so a train GRID_SPACING
# wanted samples apart already samples the edge finely; 0.7 x that leaves room for a guess
# that is off); a guessed transition is taken as at least GUESS_FLOOR of the smallest the
# probes measured. Measured on the demo's QDFF_P1 (14 clock points, December 2026): at 0.7
# (one breakpoint per 0.7 wanted samples) 20,772 time points, transitions within 0.008 % of
# the tightened settings; at 2.1, 15,009 time points, within 0.073 % (the gates' transitions'
# median error bar is 0.11 %: docs/accuracy.md), delays within 0.04 % at both.
GUESS_SLACK = 0.25
# A guessed run stops QUIET_EDGES x its last guessed edge's end after the event's threshold
# crossing (``Expect.stop``) rather than at the cell's settle window, which is sized for its
# slowest point; where its outputs have not settled or its supply current is not yet quiet
# there (``_settles``), it goes on to the window's end.
QUIET_EDGES = 3.0
GUESS_SPACING = 0.7 * GRID_SPACING
GUESS_FLOOR = 0.5
# Where a search's trials after its relaxed one expect their output edge (_Trials.expect): from
# EXPECT_EDGES transitions before the relaxed edge to EXPECT_EDGES transitions after the relaxed
# delay pushed out by EXPECT_PUSHOUTS x simulation.pushout (a trial near the pass limit is
# pushed out by one; the refinement's own span is the band +- a transition and a step), at
# EXPECT_SPACING x the spacing the relaxed edge wants: between breakpoints GRID_SPACING apart
# ngspice steps about half of it, right at REFINE_SLACK (seq_l1's QDFFR_P1: 1.9 ps steps where
# 1.82 were allowed).
EXPECT_EDGES = 1.5
EXPECT_PUSHOUTS = 1.5
EXPECT_SPACING = 0.8


@dataclass(frozen=True, slots=True)
class Expect:
    """Where a run's output edges are expected, from the event's threshold crossing (s), and
    the sample spacing they want there: its first run's breakpoints (``run_event``)."""

    start: float
    end: float
    wanted: float
    # An edge outside [start, end] is judged clearly without refining (a search's trial far
    # from its pass limit, ``_Trials``).
    settles: bool = False
    # Each output's (start, end, spacing) from the event's threshold crossing: its corners go
    # in a train (``edge_trains``) beside the run's own grid (a clock or control point's
    # guess, ``_Guess``); with none, the corners go in that grid (``_edge_grid``).
    trains: tuple[tuple[float, float, float], ...] = ()
    # Where the run may stop, from the event's threshold crossing, before its window's end (a
    # guess's QUIET_EDGES x its last edge's end); a run that has not settled there goes on
    # to the window's end (``run_event``).
    stop: float | None = None


def edge_trains(spans: tuple[tuple[float, float, float], ...]) -> Wave:
    """The breakpoint train over a run's output edges, one (start, stop, spacing) each: one
    edge's is ``edge_train``'s PULSE; several edges' a PWL of each edge's corners at its own
    spacing, the finest first, a coarser edge's left out within its spacing of a finer one's
    span. One spacing for all, the finest, over every edge's span cost a demo flop's clock
    point with one output at the grid's smallest load and the other at its largest about 5x
    the time points of a point timing one output (December 2026)."""
    if len(spans) == 1:
        return edge_train(*spans[0])
    times: list[float] = []
    covered: list[tuple[float, float]] = []
    for start, stop, spacing in sorted(spans, key=lambda span: span[2]):
        count = max(2, int(np.ceil((stop - start) / spacing)) + 1)
        times += [
            float(x)
            for x in np.linspace(start, start + (count - 1) * spacing, count)
            if not any(a - spacing < x < b + spacing for a, b in covered)
        ]
        covered.append((start, start + (count - 1) * spacing))
    return stimulus.Pwl(((0.0, 0.0), *((t, 0.0) for t in sorted(times) if t > 0)))


def edge_train(start: float, stop: float, spacing: float) -> str:
    """The PULSE vector (0 V throughout) of the breakpoint train: corners every ``spacing``
    (at most; rounded to stimulus.TIME_QUANTUM) over [start, stop]: four per period, for a
    count of periods (ngspice's PULSE takes one as its eighth value)."""
    q = stimulus.TIME_QUANTUM
    spacing = max(q, np.floor(spacing / q) * q)
    start = max(q, round(start / q) * q)
    count = max(1, int(np.ceil((stop - start) / (4 * spacing))))
    s = f"{spacing:.9g}"
    return f"[ 0 0 {start:.9g} {s} {s} {s} {4 * spacing:.9g} {count} ]"


@dataclass(frozen=True, slots=True)
class Outcome:
    """One flop experiment: when the measured event crossed its threshold, when the output
    did, and the output's transition (already derated)."""

    t_event: float
    t_out: float
    transition: float
    # (pin, edge, C): the charge each pin asked for drew over its window
    charges: tuple[tuple[str, str, float], ...] = ()
    energy: EventEnergy | None = None  # asked for with ``run_event``'s states
    stopped: float | None = None  # s, simulated time at which the run ended
    stop_cap: float | None = None  # s, the time the run could not go past
    # (pin, t_out, transition) of each other output timed in the same run (``run_event``'s also)
    others: tuple[tuple[str, float, float], ...] = ()

    @property
    def delay(self) -> float:
        return self.t_out - self.t_event


def _bench(
    config: LibraryConfig, deck: Deck, *slews: float, window: float | None = None
) -> Timeline:
    """The timeline of one experiment, sized from the slews of the edges it makes (not the
    grid's largest: a sharp point's run stays short) and the cell's settle window."""
    cell = config.cell(deck.cell)
    return Timeline(config, cell, window or settle_window(config, deck), slews)


def run_step(config: LibraryConfig, *slews: float) -> float:
    """The largest time step of a flop experiment whose edges have these slews: the sharpest
    ramp among them over RAMP_STEPS, never a share of the window (which is sized from the
    grid's largest slew). At window / 200 a 0.01 ns clock-to-output of seq_l1's QDFFR_P1 read
    1.35 ps (1.5 %) late on a [0.01, 1.5] ns grid against a 0.2 ps-step run; with this step
    (and the refinement's breakpoints from the event on) within 0.05 ps of it on either grid."""
    thr, vdd = config.thresholds, config.process.vdd
    shape = config.input_shape
    ramps = (stimulus.ramp(s, e, thr, vdd, shape) for s in slews for e in ("rise", "fall"))
    return min(r.duration for r in ramps) / RAMP_STEPS


def run_settings(
    config: LibraryConfig, deck: Deck, tight: bool, *slews: float
) -> tuple[float, tuple[str, ...]]:
    """The largest step (``run_step``) and the simulator options of a flop experiment; with
    ``tight``, of its convergence check (``stepsize.tightened``)."""
    step = run_step(config, *slews)
    return stepsize.tightened(deck, step) if tight else (step, ())


_WINDOWS: BoundedCache[tuple[str, Grid, Thresholds, Simulation, InputShape], float] = SESSION.cache(
    "settle windows"
)


def settle_window(config: LibraryConfig, deck: Deck) -> float:
    """How long a flop experiment runs past its event, and the clock's phases hold:
    ``simulation.window`` when set; else WINDOW_SLEWS × the grid's sharpest slew, doubled up
    to WINDOW_DOUBLINGS times until the cell's slowest events (its clock and control arcs to
    the first output at the sharpest slew and the largest loads; the other output moving draws
    supply current, which must settle too) measure cleanly in it: a window follows the cell,
    not the grid's largest slew (it starts once the event's ramp is over, so a slow ramp needs
    no more of it). A cell that measures in none keeps the shortest, and its points report
    why. Probed once per worker and testbench."""
    if config.simulation.window:
        return config.simulation.window
    cell = config.cell(deck.cell)
    key = (deck.key, cell.grid, config.thresholds, config.simulation, config.input_shape)
    if key not in _WINDOWS:
        base = WINDOW_SLEWS * min(cell.grid.slew)
        slowest = [
            p
            for p in plan(config, [cell.name]).points
            if isinstance(p, TimingPoint)
            and p.output == cell.outputs[0].pin
            and (p.slew, p.load) == (min(cell.grid.slew), max(cell.grid.load))
            and p.other_load in (None, max(cell.grid.related_load, default=None))
        ]
        _WINDOWS[key] = base
        for window in (base * 2**k for k in range(WINDOW_DOUBLINGS + 1)):
            try:
                for point in slowest:
                    measure_clocked(config, deck, point, window)
            except MeasurementError:
                continue
            _WINDOWS[key] = window
            break
    return _WINDOWS[key]


def _crossing_after(t, v, level: float, edge: str, after: float, what: str) -> float:
    keep = t >= after
    return single_crossing(t[keep], v[keep], level, edge, what)


def _settle_samples(ramps: tuple[Ramp, ...], event: Ramp, window: float) -> tuple[float, ...]:
    """Breakpoints over each input ramp whose charge is measured, other than the event's (the
    event has its own), and the first part of the settle window after it, where the cell's
    nodes answer it: at the run's coarse step a demo flop's data pin came out 6–12 % short of
    a 1 ps-step run (and scattered from point to point), with these within 1 %."""
    starts = sorted({r.start: r for r in ramps if r.start != event.start}.items())
    if not starts:
        return ()
    n = max(2, EXTRA_POINTS // len(starts))
    spans = (np.linspace(r.start, r.end + CHARGE_SPAN * window, n) for _, r in starts)
    return tuple(float(x) for span in spans for x in span)


def _edge_grid(
    event: Ramp, edge: tuple[float, float], wanted: float, inside: tuple[float, ...]
) -> str:
    """Breakpoints from the event through the output ``edge`` (with its margins), every
    GRID_SPACING wanted samples: the cell's nodes answer the event in between (a sharp
    clock-to-output read 1.5 % late with the edge alone sampled). Where that takes more than
    the breakpoint source holds (GRID_POINTS + EXTRA_POINTS, less the ``inside`` samples), the
    edge keeps its spacing and LEAD_POINTS spread from LEAD_FROM of the event's ramp on: over
    a slow ramp the spacing would miss the edge (a 1.5 ns clock ramp's QB transition read 16 %
    long). The rest of the run keeps its step."""
    spacing = GRID_SPACING * wanted
    start, last = edge
    room = GRID_POINTS + EXTRA_POINTS - len(inside)
    begin = min(event.start, start)
    if last - begin <= room * spacing:
        every = np.linspace(begin, last, max(2, int((last - begin) / spacing)))
        return breakpoints(begin, last, last - begin, (*inside, *(float(x) for x in every)))
    first = min(event.start + LEAD_FROM * event.duration, start)
    dense = np.linspace(start, last, int(min(room - LEAD_POINTS, (last - start) / spacing)))
    # An edge that starts before LEAD_FROM of the event's ramp has no lead to spread.
    lead = (start - first) / LEAD_POINTS if start > first else spacing
    return breakpoints(first, start, lead, (*inside, *(float(x) for x in dense)))


@dataclass(frozen=True, slots=True)
class _Edge:
    """One output's edge in a run: its delay-threshold crossing and its slew band (s)."""

    t_out: float
    band: tuple[float, float]

    @property
    def raw(self) -> float:
        return self.band[1] - self.band[0]


def run_event(
    config: LibraryConfig,
    deck: Deck,
    waves: dict[str, Wave],
    loads: dict[str, float],
    *,
    event: Ramp,
    step: float,
    output: str,
    before: bool,
    after: bool,
    quiet_until: float = 0.0,
    charge_windows: tuple[tuple[str, Ramp, float | None], ...] = (),
    states: tuple[bool, bool] | None = None,
    window: float | None = None,
    options: tuple[str, ...] = (),
    expect: Expect | None = None,
    also: tuple[tuple[str, bool, bool], ...] = (),
    start: Deck | None = None,
) -> tuple[Outcome, int, float]:
    """Simulate one experiment at steps up to ``step`` (``run_step``) and ``options``
    (``run_settings``): the output holds ``before`` until the event and settles at ``after``
    within ``window`` (``settle_window``); ``also`` (pin, before, after): more outputs timed.
    ``charge_windows`` (pin, its ramp, the end or None): charges asked for; with ``states``
    (stored before, after) the event's energy too; ``expect``: the edges' first breakpoints
    (``_first_grids``) and where the run may stop once settled (``Expect.stop``); ``start``:
    the testbench simulated, where it is not ``deck`` (a flop's held state, ``heldstate``).
    Returns the outcome (``_outcome``), simulations, seconds."""
    cell = config.cell(deck.cell)
    window = window or settle_window(config, deck)
    moves = ((output, before, after), *also)
    nodes = {o: deck.output_node(o) for o, _, _ in moves}
    nodes.update({p: deck.input_node(p) for p in waves})
    cap, stop_when = _stop(config, nodes[output], event, quiet_until, moves, states, window)
    t_ev = event.time_at(config.thresholds.delay_input(event.edge))
    stop = cap if expect is None or expect.stop is None else min(cap, t_ev + expect.stop)
    inside = _settle_samples(tuple(ramp for _, ramp, _ in charge_windows), event, window)
    grid, train = _first_grids(event, t_ev, window, inside, states, expect)
    recorded = _recorded(cell, deck, nodes, charge_windows, states)
    runs, seconds = 0, 0.0
    saved = KeepWaveform(lambda: waveform(result.vectors, nodes))
    refine = 0
    while True:
        tran = f"tran {step:.6g} {stop:.6g} 0 {step:.6g}"
        alter = alters(deck, cell, waves, loads, grid, train=train)
        request = Request(start or deck, alter, tran, recorded, options, stop_when=stop_when)
        result, attempts = simulate(backend_for(config), request)
        runs, seconds = runs + attempts, seconds + result.seconds
        t = result.vectors["time"]
        if stop < cap and not _settles(config, deck, result.vectors, moves, nodes, event, states):
            stop = cap  # cut short too early: again to the window's end, the same breakpoints
            continue
        with saved:
            edges = [_edge(config, result.vectors, *m, nodes, event, window) for m in moves]
        if edges[0] is None:  # the output holds: nothing to time
            nothing = Outcome(np.nan, np.nan, np.nan, stopped=float(t[-1]), stop_cap=stop)
            return nothing, runs, seconds
        timed = [e for e in edges if e is not None]
        train = _retrain(config, t, timed, event, states is not None, expect, refine)
        if train is None or refine == REFINEMENTS or _unexpected(timed[0], t_ev, expect):
            break
        refine += 1
    measured = (event, t_ev, stop, charge_windows, states, loads)
    return _outcome(config, deck, result.vectors, moves, edges, *measured), runs, seconds


def _settles(
    config: LibraryConfig,
    deck: Deck,
    vectors: dict[str, np.ndarray],
    moves: tuple[tuple[str, bool, bool], ...],
    nodes: dict[str, str],
    event: Ramp,
    states: tuple[bool, bool] | None,
) -> bool:
    """Whether a run cut short at its guess's stop (``Expect.stop``) saw every output settle
    at its final value and, with ``states``, the supply current quiet (``ffpower.quiet_end``):
    what the run to the window's end would have measured in it."""
    try:
        for o, _, after in moves:
            _check_landed(config, vectors[nodes[o]], after, f"output {o}", None)
        if states is not None:
            window = settle_window(config, deck)
            ffpower.event_energy(config, deck, vectors, event, states, {}, window)
    except MeasurementError:
        return False
    return True


def _retrain(
    config: LibraryConfig,
    t: np.ndarray,
    timed: list[_Edge],
    event: Ramp,
    energy: bool,
    expect: Expect | None,
    refine: int,
) -> Wave | None:
    """The next run's breakpoint train where a run's edges want more samples (``_sampled``),
    or where its first run's train did not cover every edge (``_Guess.expect``: it found
    them); None where the run is fine. Each edge's train at the spacing it wants: the next
    run is fine. An energy run's grid samples the event and the settling after it; else
    each edge's train starts LEAD_FROM into the event's ramp, where the cell's nodes answer."""
    spans, fine = _sampled(t, timed, config.simulation.samples_per_edge)
    found = refine == 0 and expect is not None and 0 < len(expect.trains) < len(timed)
    if fine and not found:
        return None
    lead = min(a for a, _, _ in spans)
    lead = lead if energy else event.start + LEAD_FROM * event.duration
    return edge_trains(tuple((min(lead, a), b, w) for a, b, w in spans))


def _first_grids(
    event: Ramp,
    t_ev: float,
    window: float,
    inside: tuple[float, ...],
    states: tuple[bool, bool] | None,
    expect: Expect | None,
) -> tuple[str, Wave | None]:
    """A run's first breakpoints (``run_event``): the grid (PWL) and the edge train (PULSE,
    or None): where the edges are ``expect``-ed, else (an energy run) over the event and the
    settling after it."""
    if expect is None:
        grid = ffpower.event_grid(event, window, inside) if states is not None else PARKED_GRID
        return grid, None
    span = (t_ev + expect.start, t_ev + expect.end)
    if not expect.trains:
        return _edge_grid(event, span, expect.wanted, inside), None
    grid = ffpower.event_grid(event, window, inside) if states is not None else PARKED_GRID
    return grid, edge_trains(tuple((t_ev + a, t_ev + b, w) for a, b, w in expect.trains))


def _outcome(
    config: LibraryConfig,
    deck: Deck,
    vectors: dict[str, np.ndarray],
    moves: tuple[tuple[str, bool, bool], ...],
    edges: list[_Edge | None],
    event: Ramp,
    t_ev: float,
    stop: float,
    charge_windows: tuple[tuple[str, Ramp, float | None], ...],
    states: tuple[bool, bool] | None,
    loads: dict[str, float],
) -> Outcome:
    """What ``run_event`` measured on its final run: every output's edge, each charge window's
    charge and (with ``states``) the event's energy."""
    t = vectors["time"]
    # A source's branch current flows into its + node from outside: the pin's charge is −∫i.
    charges = tuple(
        (p, r.edge, -integral(t, vectors[f"{deck.input_source(p)}#branch"], r.start, b))
        for p, r, b in charge_windows
    )
    energy = None
    if states is not None:
        settle = settle_window(config, deck)
        energy = ffpower.event_energy(config, deck, vectors, event, states, loads, settle)
    derate = config.thresholds.slew_derate
    others = tuple(
        (o, e.t_out, e.raw / derate) for (o, _, _), e in zip(moves[1:], edges[1:], strict=True) if e
    )
    first = edges[0]
    assert first is not None  # run_event returns before this when its output holds
    outcome = Outcome(t_ev, first.t_out, first.raw / derate, charges, energy, float(t[-1]), stop)
    return replace(outcome, others=others)


def _unexpected(edge: _Edge, t_ev: float, expect: Expect | None) -> bool:
    """Whether the output edge lies outside where it was expected, where that ``settles`` it:
    a search's trial that far from its pass limit is judged clearly, and not refined."""
    if expect is None or not expect.settles:
        return False
    return not expect.start <= edge.t_out - t_ev <= expect.end


def _stop(
    config: LibraryConfig,
    node: str,
    event: Ramp,
    quiet_until: float,
    moves: tuple[tuple[str, bool, bool], ...],
    states: tuple[bool, bool] | None,
    window: float,
) -> tuple[float, str | None]:
    """A run's stop-time cap and its ngspice stop condition: once the output (at ``node``) has
    settled after the event and after any late data edge (``quiet_until``); an output that
    must hold (a removal trial), once it has settled at the other rail: it failed to. A run
    that measures energy (``states``: the window ends when the supply current is quiet, some
    time after the outputs settle) or more than one output goes on to its cap."""
    tol, vdd = config.simulation.settle * config.process.vdd, config.process.vdd
    arm = max(event.end, quiet_until)
    if states is not None or len(moves) > 1:
        return arm + window, None
    _, before, after = moves[0]
    lands = after if before != after else not after
    level = f"v({node}) > {vdd - tol:.6g}" if lands else f"v({node}) < {tol:.6g}"
    return arm + window, f"time > {arm:.6g} when {level}"


def _recorded(
    cell: CellSpec,
    deck: Deck,
    nodes: dict[str, str],
    charge_windows: tuple[tuple[str, Ramp, float | None], ...],
    states: tuple[bool, bool] | None,
) -> tuple[str, ...]:
    """The vectors a run records: the outputs and the inputs that move (a failed run is saved
    with the clock and data that drove it), the branches whose charge is asked for, and with
    ``states`` what the event's energy needs (``event_vectors``)."""
    branches = dict.fromkeys(f"{deck.input_source(w[0])}#branch" for w in charge_windows)
    recorded = (*nodes.values(), *branches)
    if states is None:
        return recorded
    return tuple(dict.fromkeys((*recorded, *event_vectors(cell, deck))))


def _edge(
    config: LibraryConfig,
    vectors: dict[str, np.ndarray],
    output: str,
    before: bool,
    after: bool,
    nodes: dict[str, str],
    event: Ramp,
    window: float,
) -> _Edge | None:
    """The edge of ``output`` in a run: it must hold ``before`` until the event and settle at
    ``after``; None when the two are the same (nothing to time)."""
    vdd, thr = config.process.vdd, config.thresholds
    t, v = vectors["time"], vectors[nodes[output]]
    what = f"output {output}"
    held = v[t <= event.start]
    if held.size and abs(held[-1] - (vdd if before else 0.0)) > LOGIC_MARGIN * vdd:
        raise MeasurementError(
            f"{what} is at {held[-1]:.4g} V before the event, not {int(before)}: the "
            "flop was not initialised"
        )
    edge = "rise" if after else "fall"
    _check_landed(config, v, after, what, window)
    if before == after:
        return None
    # The event pin is driven by an ideal source: its ramp crosses where the ramp says.
    t_out = _crossing_after(t, v, thr.delay_output(edge) * vdd, edge, event.start, what)
    low, high = sorted(
        _crossing_after(t, v, x * vdd, edge, event.start, what) for x in thr.slew_band(edge)
    )
    return _Edge(t_out, (low, high))


def _check_landed(
    config: LibraryConfig, v: np.ndarray, after: bool, what: str, window: float | None
) -> None:
    """An output's waveform ended within ``simulation.settle`` of its final rail (``after``):
    overshooting the rail as it arrives is settled, stopping short of it is not (a
    CutOffError, ``waves.check_settled``)."""
    tol = config.simulation.settle * config.process.vdd * (1 + 1e-6)
    rail = config.process.vdd if after else 0.0
    check_settled(v, rail, tol, "rise" if after else "fall", what, window)


def _sampled(
    t: np.ndarray, edges: list[_Edge], samples: int
) -> tuple[tuple[tuple[float, float, float], ...], bool]:
    """Where the refinement's breakpoints go, each edge's (start, end, spacing): its span with
    its margins (a transition and the simulator's step at it either side) at the spacing it
    wants; and whether every edge has samples_per_edge samples (with REFINE_SLACK)."""
    fine, spans = True, []
    for e in edges:
        coarse = max(step_at(t, x) for x in (e.t_out, *e.band))
        fine = fine and coarse <= REFINE_SLACK * e.raw / samples
        spans.append((e.band[0] - coarse - e.raw, e.band[1] + coarse + e.raw, e.raw / samples))
    return tuple(spans), fine


def _capture_waves(
    bench: Timeline, old: dict[str, bool], new: dict[str, bool], slew: float, start: float
) -> dict[str, Wave]:
    """Every non-clock input moving from ``old`` to ``new`` at ``start``."""
    return {p: bench.data(p, old[p], new[p], start, slew)[0] for p in new}


def measure_clocked(
    config: LibraryConfig, deck: Deck, point: TimingPoint, window: float | None = None
) -> Measurement:
    """A clock arc (an active edge from the opposite value held, ``_clock_run``) or an asynchronous
    control arc (after writing the value it changes); ``window`` as in ``run_event`` (a window
    probe: the event's convergence is not checked). Every input that moves in the run is
    asked for its charge on each of its edges (``_clock_run``, ``_control_run``). Where the
    grid has the other output's point with the same slew and the same load on each output
    (``_partner``), one run times both: the partner is kept for this worker and comes from it,
    unsimulated. The event is measured at tightened settings where its sample moved there
    (``_event_check``)."""
    if window is not None:
        return _clocked(config, deck, point, window)[0]
    if point in _SHARED:
        return _SHARED.pop(point)
    tight, guess, runs, seconds = _event_check(config, deck, point)
    guess = None if _is_probe(config, point) else guess
    measured, outcome = _clocked(config, deck, point, tight=tight, guess=guess)
    partner = _partner(config, point)
    if partner is not None:
        _SHARED[partner] = replace(_timed(partner, outcome, measured), runs=0, sim_seconds=0.0)
    return replace(measured, runs=measured.runs + runs, sim_seconds=measured.sim_seconds + seconds)


# Points of the other output timed by a run already made in this worker (``measure_clocked``).
_SHARED: BoundedCache[TimingPoint, Measurement] = SESSION.cache("shared clock runs")
# (deck, grid, settings, event) -> whether the event is measured at tightened settings, its guess
_EVENTS: BoundedCache[tuple, tuple[bool, _Guess | None]] = SESSION.cache("event checks")


def arc_of(point: TimingPoint) -> tuple:
    """What a clock or control point shares with every point its event's runs time (each
    output's arc): all but the output, its edge, the slew and the loads."""
    return (point.kind, point.related, point.side, point.input_edge)


def _stored(cell: CellSpec, point: TimingPoint) -> bool:
    """The value a clock or control point's event leaves in the flop."""
    if point.kind == "clock":
        rises = point.output_edge == "rise"
        return next(v for v in (False, True) if stored_output(cell, point.output, v) == rises)
    return point.kind == "preset"


def _partner(config: LibraryConfig, point: TimingPoint) -> TimingPoint | None:
    """The point of the other output's arc that one run times with ``point`` (the same slew,
    the same load on each output), where the grid has it; else None."""
    cell = config.cell(point.cell)
    if point.other_load is None or point.other_load not in cell.grid.load:
        return None
    if point.load not in cell.grid.related_load:
        return None
    other = next(o.pin for o in cell.outputs if o.pin != point.output)
    edge = "rise" if stored_output(cell, other, _stored(cell, point)) else "fall"
    return replace(
        point, output=other, output_edge=edge, load=point.other_load, other_load=point.load
    )


def check_arc(config: LibraryConfig, deck: Deck, point: TimingPoint) -> tuple[int, float]:
    """The probes and convergence check of ``point``'s event (``_event_check``), run now as
    when the event's first point comes to this worker: the simulations and seconds they cost
    (none once the event is checked here)."""
    _, _, runs, seconds = _event_check(config, deck, point)
    return runs, seconds


_Run = tuple[Measurement, Outcome]


def _event_check(
    config: LibraryConfig, deck: Deck, point: TimingPoint
) -> tuple[bool, _Guess | None, int, float]:
    """Once per worker and event (``arc_of``: both outputs' arcs, which may share runs): its
    probes (``_probes``: where its edges fall, ``_Guess``) and its convergence check: the
    first probe (the sharpest slew and the smallest loads: the shortest edges against the
    step) again at tightened settings (``run_settings``); where any output's delay moves by
    more than SAMPLE_RTOL or its transition by SAMPLE_TRANSITION_RTOL the event's points are
    measured at them, with a warning. A probe that does not measure leaves the event at the
    usual settings, unguessed (its points fail as their own). Returns that, the guess, and
    the simulations and seconds spent here."""
    cell = config.cell(point.cell)
    settings = (config.thresholds, config.simulation, config.input_shape)
    key = (deck.key, cell.grid, *settings, arc_of(point))
    if key in _EVENTS:
        return (*_EVENTS[key], 0, 0.0)
    probes = _probes(config, point)
    try:
        runs = [_clocked(config, deck, p, every=True) for p in probes]
        tightened = _clocked(config, deck, probes[0], tight=True, every=True)
    except SimulatorHungError:
        raise
    except (MeasurementError, SimulatorError):
        _EVENTS[key] = (False, None)
        return False, None, 0, 0.0
    moved = _moved_by(runs[0][1], tightened[1])
    tight = moved[0] > SAMPLE_RTOL or moved[1] > SAMPLE_TRANSITION_RTOL
    if tight:
        log.warning(
            "cell %s, %s: its sample %s moved at tightened simulator settings (delay %.2g %%, "
            "transition %.2g %%): the arc is measured at them",
            *(cell.name, point.label, probes[0].label, 100 * moved[0], 100 * moved[1]),
        )
    _EVENTS[key] = (tight, _Guess.fit(config, probes, [o for _, o in runs]))
    spent = [m for m, _ in (*runs, tightened)]
    return (*_EVENTS[key], sum(m.runs for m in spent), sum(m.sim_seconds for m in spent))


def _probes(config: LibraryConfig, point: TimingPoint) -> tuple[TimingPoint, ...]:
    """The runs an event's guess is made from, as points of ``point``'s arc, every output at
    the same load: the sharpest slew at the smallest load and at the largest (of any output's
    load axis), the slowest slew at the smallest."""
    grid = config.cell(point.cell).grid
    every = (*grid.load, *grid.related_load)

    def at(slew: float, load: float) -> TimingPoint:
        other = None if point.other_load is None else load
        return replace(point, slew=slew, load=load, other_load=other)

    sharp, slow = min(grid.slew), max(grid.slew)
    return (at(sharp, min(every)), at(sharp, max(every)), at(slow, min(every)))


def _is_probe(config: LibraryConfig, point: TimingPoint) -> bool:
    """Whether ``point``'s run is one of its event's probe runs (the same slew and loads):
    measured as a probe is, unguessed, whichever worker measures it."""
    cell = config.cell(point.cell)
    loads = point_loads(cell, point)
    return any(
        p.slew == point.slew and point_loads(cell, p) == loads for p in _probes(config, point)
    )


@dataclass(frozen=True, slots=True)
class _Guess:
    """Where a clock or control event's output edges fall, from its probes (``_probes``):
    each output's delay and raw transition, linear in the event's ramp and in the output's own
    load between them (an output's delay and transition grow about linearly with the load it
    drives and with the input's ramp: first-order, common practice)."""

    ramps: tuple[float, float]  # s: the probes' sharpest and slowest event ramps
    loads: tuple[float, float]  # F: the probes' smallest and largest load
    base: dict[str, np.ndarray]  # output -> (delay, raw transition): sharpest, smallest
    heavy: dict[str, np.ndarray]  # ... sharpest slew, largest load
    slow: dict[str, np.ndarray]  # ... slowest slew, smallest load

    @classmethod
    def fit(cls, config: LibraryConfig, probes, outcomes: list[Outcome]) -> _Guess:
        cell, thr, vdd = config.cell(probes[0].cell), config.thresholds, config.process.vdd
        ramps = [
            stimulus.ramp(p.slew, p.input_edge, thr, vdd, config.input_shape).duration
            for p in probes
        ]
        base, heavy, slow = (_values(config, cell, o) for o in outcomes)
        return cls((ramps[0], ramps[2]), (probes[0].load, probes[1].load), base, heavy, slow)

    def expect(
        self, ramp: float, loads: dict[str, float], samples: int, every: dict[str, float] | None
    ) -> Expect:
        """Where a run at the event's ``ramp`` and the timed outputs' ``loads`` moves them: a
        train over each edge of the outputs at the largest of the loads. A lighter output's
        edge is left to the run's refinement (``run_event``): its guess, from probes with
        every output at one load, misses where a heavier output holds it back (a demo flop's
        QB at 0.5 fF switched 45 ps after its guess, with Q at 40 fF, and twice as slowly).
        The run may stop QUIET_EDGES x the last edge's end of the heaviest of ``every``
        output's loads (an output not timed draws supply current as it moves too); with
        ``every`` None it runs to its window's end."""
        spans = self._spans(ramp, loads)
        trains = tuple((a, b, GUESS_SPACING * r / samples) for a, b, r in spans)
        start, end = min(a for a, _, _ in trains), max(b for _, b, _ in trains)
        wanted = min(w for _, _, w in trains)
        if every is None:
            return Expect(start, end, wanted, trains=trains)
        last = max(end, *(b for _, b, _ in self._spans(ramp, every)))
        return Expect(start, end, wanted, trains=trains, stop=QUIET_EDGES * last)

    def _spans(self, ramp: float, loads: dict[str, float]) -> list[tuple[float, float, float]]:
        """The guessed edges of the outputs at the largest of ``loads``, each (start, end, raw
        transition) from the event's threshold crossing, widened by the guess's slack."""
        (r0, r1), (c0, c1) = self.ramps, self.loads
        x = (ramp - r0) / (r1 - r0) if r1 > r0 else 0.0
        heaviest = [o for o in loads if loads[o] == max(loads.values())]
        least = min(self.base[o][1] for o in heaviest)
        spans = []
        for o in heaviest:
            y = (loads[o] - c0) / (c1 - c0) if c1 > c0 else 0.0
            b = self.base[o]
            d, r = b + (self.slow[o] - b) * x + (self.heavy[o] - b) * y
            r = max(r, GUESS_FLOOR * least)
            # Each output's span widened by the slack of its own guessed delay.
            wide = EXPECT_EDGES * r + GUESS_SLACK * d
            spans.append((float(d - wide), float(d + wide), float(r)))
        return spans


def _values(config: LibraryConfig, cell: CellSpec, outcome: Outcome) -> dict[str, np.ndarray]:
    """Each output's (delay, raw transition) in a run that timed every output."""
    derate = config.thresholds.slew_derate
    timed = [(cell.outputs[0].pin, outcome.t_out, outcome.transition), *outcome.others]
    return {o: np.array([t - outcome.t_event, tr * derate]) for o, t, tr in timed}


def _moved_by(usual: Outcome, tight: Outcome) -> tuple[float, float]:
    """The most any output's delay and transition moved from ``usual`` to ``tight``."""

    def timed(o: Outcome) -> list[tuple[float, float]]:
        edges = [(o.t_out, o.transition), *((t, tr) for _, t, tr in o.others)]
        return [(t - o.t_event, tr) for t, tr in edges]

    moved = [
        (abs(b[0] / a[0] - 1.0), abs(b[1] / a[1] - 1.0))
        for a, b in zip(timed(usual), timed(tight), strict=True)
    ]
    return max(m[0] for m in moved), max(m[1] for m in moved)


def _timed(point: TimingPoint, outcome: Outcome, measured: Measurement) -> Measurement:
    """``measured`` with ``point``'s output's delay and transition in the run of ``outcome``."""
    t_out, transition = outcome.t_out, outcome.transition
    for o, t, tr in outcome.others:
        if o == point.output:
            t_out, transition = t, tr
    return replace(measured, point=point, delay=t_out - outcome.t_event, transition=transition)


def _clocked(
    config: LibraryConfig,
    deck: Deck,
    point: TimingPoint,
    window: float | None = None,
    tight: bool = False,
    every: bool = False,
    guess: _Guess | None = None,
) -> _Run:
    """``measure_clocked`` at the usual settings or, with ``tight``, the tightened ones: the
    point's measurement and the run's outcome. A point with a partner (``_partner``) times
    every output, in the cell's order (the partner's run is the same run), and so does
    ``every``. Its first run's edges are sampled where ``guess`` puts them."""
    cell = config.cell(point.cell)
    bench = _bench(config, deck, point.slew, min(cell.grid.slew), window=window)
    stored = _stored(cell, point)
    old = capture_values(cell, not stored)
    # A clock point's data move to its side values; a control point's do not.
    new = dict(point.side) if point.kind == "clock" else old
    short = _short(config, point)
    if short:
        waves, event, windows = _edge_run(bench, point, new)
    else:
        run = _clock_run if point.kind == "clock" else _control_run
        waves, event, windows = run(bench, point, stored)
    step, options = run_settings(config, deck, tight, point.slew, min(cell.grid.slew))
    start, runs, seconds = deck, 0, 0.0
    if point.kind == "clock" or short:
        inactive = {cell.flip_flop.clock: cell.flip_flop.edge != "rise"}
        opened = {**new, **inactive} if short else None
        start, runs, seconds = held_state(bench, deck, not stored, old, opened)
    every = every or _partner(config, point) is not None
    timed = [o.pin for o in cell.outputs] if every else [point.output]
    moves = [(o, stored_output(cell, o, not stored), stored_output(cell, o, stored)) for o in timed]
    loads = point_loads(cell, point)
    expect = _expected(config, cell, guess, short, event.duration, loads, timed)
    outcome, event_runs, event_seconds = run_event(
        config,
        deck,
        waves,
        loads,
        event=event,
        step=step,
        output=moves[0][0],
        before=moves[0][1],
        after=moves[0][2],
        also=tuple(moves[1:]),
        charge_windows=windows,
        states=(not stored, stored),
        window=bench.window,
        options=options,
        expect=expect,
        start=start,
    )
    runs, seconds = runs + event_runs, seconds + event_seconds
    return _timed(point, outcome, _measurement(point, outcome, runs, seconds)), outcome


def _expected(
    config: LibraryConfig,
    cell: CellSpec,
    guess: _Guess | None,
    short: bool,
    ramp: float,
    loads: dict[str, float],
    timed: list[str],
) -> Expect | None:
    """A clock or control point's first run's guessed edges (``_Guess.expect``), over its
    ``timed`` outputs. A ``short`` run with every output above the grid's smallest load may
    stop once it has settled (``Expect.stop``); the rest integrate their charges to their
    window's end: an output at the smallest load gives pin capacitance
    (``tabulate.pin_capacitance``), which a shorter run moved by up to 0.045 % on the demo."""
    if guess is None:
        return None
    samples = config.simulation.samples_per_edge
    timed_loads = {o: loads[o] for o in timed}
    stops = short and min(loads.values()) > min(cell.grid.load)
    return guess.expect(ramp, timed_loads, samples, loads if stops else None)


def _measurement(point: TimingPoint, outcome: Outcome, runs: int, seconds: float) -> Measurement:
    """A clock or control point's measurement from its run (its first output's edge: see
    ``_timed``)."""
    (measured,) = (q for p, e, q in outcome.charges if (p, e) == (point.related, point.input_edge))
    energy = outcome.energy
    assert energy is not None and outcome.stopped is not None  # run_event with states gives both
    return Measurement(
        point=point,
        delay=outcome.delay,
        transition=outcome.transition,
        input_charge=measured,
        side_charges=tuple(
            c for c in outcome.charges if (c[0], c[1]) != (point.related, point.input_edge)
        ),
        runs=runs,
        sim_seconds=seconds,
        stopped=outcome.stopped,
        stop_cap=outcome.stop_cap,
        supply_energy=energy.supply,
        internal_energy=energy.internal,
        static_current=energy.static,
    )


def _clock_run(bench: Timeline, point: TimingPoint, stored: bool):
    """Waves of a clock arc's run, which starts from the flop holding the opposite value with
    the clock at its active level (``heldstate``, as an earlier active edge left it): the
    inactive edge; half-way through the inactive phase the data moves (the latch that captures
    is open: the pins' load as a driver sees it while setting up); then the measured edge.
    Charge windows: each data pin over its edge, the clock over its inactive edge (until the
    data moves) and over its measured edge."""
    cell, flop = bench.cell, bench.cell.flip_flop
    new, old = dict(point.side), capture_values(cell, not stored)
    clock, event = bench.held_clock(point.slew)
    change = event.start - bench.half / 2
    moves = {p: bench.data(p, old[p], new[p], change, min(cell.grid.slew)) for p in new}
    waves = {p: vector for p, (vector, _, _) in moves.items()}
    waves[flop.clock] = clock
    back = bench.ramp(point.slew, "fall" if flop.edge == "rise" else "rise")
    windows = (
        *((p, go, event.start) for p, (_, go, _) in moves.items() if new[p] != old[p]),
        (flop.clock, back.moved(event.start - bench.half), change),
        (flop.clock, event, None),
    )
    return waves, event, windows


def _short(config: LibraryConfig, point: TimingPoint) -> bool:
    """Whether a clock or control point's run starts just before its measured edge
    (``_edge_run``): all but the points at the smallest load on every output (the grid's and
    the other output's smallest), which alone give the charges of what comes before (the
    data's move and the clock's inactive edge, a control's release, none of which depends on
    a load: ``tables.pin_capacitance``), and their partners (``_partner``)."""
    grid = config.cell(point.cell).grid

    def first(p: TimingPoint) -> bool:
        other = None if p.other_load is None else min(grid.related_load)
        return p.load == min(grid.load) and p.other_load == other

    partner = _partner(config, point)
    return not first(point) and (partner is None or not first(partner))


def _edge_run(bench: Timeline, point: TimingPoint, levels: dict[str, bool]):
    """Waves of a clock or control arc's run that starts with the clock at its inactive level
    and the other inputs at ``levels``, the flop holding the old value (an operating point
    found from the held state's cards, ``heldstate``), and makes the measured edge only: what
    ``_clock_run`` makes after the data's move has settled, or ``_control_run`` after the
    clock's edge has, without the edges before (30-43 % of a clock run's time points on the
    demo's QDFF_P1). Charge window: the event's pin over its edge."""
    flop = bench.cell.flip_flop
    edge = flop.edge if point.kind == "clock" else point.input_edge
    event = bench.ramp(point.slew, edge).moved(bench.lead)
    waves = {p: stimulus.constant(bench.level(v)) for p, v in levels.items()}
    inactive = bench.ramp(min(bench.cell.grid.slew), flop.edge).levels[0]
    waves[flop.clock] = stimulus.constant(inactive)
    waves[point.related] = event.pulse()
    return waves, event, ((point.related, event, None),)


def _control_run(bench: Timeline, point: TimingPoint, stored: bool):
    """Waves of a clear or preset arc's run: the control starts asserted and is released at
    the run's start (the flop takes the control's value and keeps it); half a period later one
    active clock edge writes the other value; a quarter period after the clock's inactive edge
    (its currents have died down and stay out of the event's energy window) the control is
    asserted again: the measured event. Charge windows: the release until the clock edge, the
    assertion until the run's end."""
    cell, flop = bench.cell, bench.cell.flip_flop
    waves: dict[str, Wave] = {
        p: stimulus.constant(bench.level(v)) for p, v in capture_values(cell, not stored).items()
    }
    clock, first = bench.clock(min(cell.grid.slew), edges=1, start=bench.lead + bench.half)
    waves[flop.clock] = clock
    release = "fall" if point.input_edge == "rise" else "rise"
    up = bench.ramp(point.slew, release)
    event = bench.ramp(point.slew, point.input_edge).moved(first.end + 1.5 * bench.half)
    held = event.start - bench.lead - up.duration
    waves[point.related] = bench.pulse(
        *up.levels, bench.lead, up.duration, event.duration, held, 1.0
    )
    windows = (
        (point.related, up.moved(bench.lead), first.start),
        (point.related, event, None),
    )
    return waves, event, windows


def _sensitized_data(cell: CellSpec, pin: str) -> dict[str, bool]:
    """Values of the other data pins (controls inactive) under which ``pin`` decides the
    next state, with the next state equal to ``pin``'s value where the function allows."""
    fixed = inactive_controls(cell)
    others = [p for p in cell.data_inputs if p != pin]
    flop = cell.flip_flop
    for bits in itertools.product((False, True), repeat=len(others)):
        assign = {**fixed, **dict(zip(others, bits, strict=True))}
        if flop.next_state.evaluate({**assign, pin: True}) != flop.next_state.evaluate(
            {**assign, pin: False}
        ):
            return assign
    raise MeasurementError(f"the next state {flop.next_state.to_liberty()} never depends on {pin}")


def _bisect(passes, lo: float, hi: float, tol: float) -> tuple[float, float]:
    """Halve [lo (fails), hi (passes)] to ``tol``; the final (failing, passing) bracket."""
    while hi - lo > tol:
        mid = 0.5 * (lo + hi)
        if passes(mid):
            hi = mid
        else:
            lo = mid
    return lo, hi


def _search(
    measure,
    lo: float,
    hi: float,
    tol: float,
    what: str,
    high: float | None = None,
    span: tuple[float, float] = (1.0, 1.0),
) -> tuple[float, float]:
    """The smallest passing offset between ``lo`` (must fail) and ``hi`` (must pass), found on
    the trials' margin (``_Trials.margin``: passing at or below 0): bracketed near offset 0
    (``_bracket``), then narrowed (``_falsi``, to ``span``); returns the final (failing,
    passing) bracket. ``high``: the margin at ``hi`` where it is known."""
    if high is None:
        high = measure(hi)  # the relaxed trial first: it sets the reference clock-to-output
    if high > 0:
        raise MeasurementError(f"{what}: fails even with relaxed timing ({hi:.4g} s)")
    # Constraints lie near offset 0 (the data's threshold at the clock's): the walk starts there.
    failing, passing = _bracket(measure, lo, (0.0, measure(0.0)), (hi, high), tol, what)
    return _falsi(measure, failing, passing, tol, span)


def _bracket(
    measure,
    lo: float,
    start: tuple[float, float],
    high: tuple[float, float],
    tol: float,
    what: str,
    step: float = BRACKET_STEP,
) -> tuple[tuple[float, float], tuple[float, float]]:
    """A first (failing, passing) bracket, each end an (offset, margin) pair: from ``start``
    (measured) in steps that double from ``step`` × ``tol``, down while the trials pass,
    up while they fail, no further than ``lo`` (which must fail) or ``high``'s offset (which
    passed). Where the last two margins are finite and nearing 0, a secant step (Brent 1973,
    ch. 3: the secant through two samples, extrapolated) goes to just past the root it
    estimates, when that is nearer than the doubling step: the margin steepens towards the
    capture's failure, so the estimate lies past the root and the bracket closes tight."""
    at, g = start
    down = g <= 0  # passing: walk down to a failing offset; failing: up to a passing one
    step *= tol
    last: tuple[float, float] | None = None
    while True:
        nxt = max(at - step, lo) if down else min(at + step, high[0])
        guess = _secant_past(last, (at, g), tol if down else -tol)
        if guess is not None and abs(guess - at) < abs(nxt - at):
            nxt = guess
        g_nxt = high[1] if nxt == high[0] else measure(nxt)
        if (g_nxt > 0) == down:
            return ((nxt, g_nxt), (at, g)) if down else ((at, g), (nxt, g_nxt))
        if nxt == lo:
            raise MeasurementError(
                f"{what}: passes even at {lo:.4g} s; the search does not bracket"
            )
        last, (at, g), step = (at, g), (nxt, g_nxt), 2 * step


def _secant_past(
    last: tuple[float, float] | None, at: tuple[float, float], tol: float
) -> float | None:
    """The root of the secant through ``last`` and ``at`` (offset, margin), FALSI_EDGE ×
    ``tol`` further on (below it for ``tol`` > 0), or None where the two margins are not
    finite or do not near 0 from ``last`` to ``at``."""
    if last is None or not (np.isfinite(last[1]) and np.isfinite(at[1])):
        return None
    (x0, g0), (x1, g1) = last, at
    if abs(g1) >= abs(g0) or g0 * g1 <= 0:
        return None
    return x1 - g1 * (x1 - x0) / (g1 - g0) - FALSI_EDGE * tol


def _falsi(
    measure,
    failing: tuple[float, float],
    passing: tuple[float, float],
    tol: float,
    span: tuple[float, float] = (1.0, 1.0),
) -> tuple[float, float]:
    """Narrow the bracket between ``failing`` and ``passing`` (each an (offset, margin) pair,
    margin > 0 failing, <= 0 passing) to ``tol`` (``span``: to ``span[0]`` × ``tol`` where
    the failing end's margin is finite, ``span[1]`` × ``tol`` where not); the final
    (failing, passing) offsets.
    The Illinois variant of regula falsi (M. Dowell and P. Jarratt, "A modified regula falsi
    method for computing the root of an equation", BIT 11, 1971): the secant through the ends,
    the margin of an end kept twice in a row halved. Safeguarded as Brent's method is (R. P.
    Brent, "Algorithms for Minimization without Derivatives", 1973, ch. 4): a bisection step
    where the failing end's margin is not finite (the capture failed), or the bracket has not
    halved over the last two steps; a trial at least FALSI_EDGE × ``tol`` inside either end,
    so that the bracket closes to ``tol`` from either side. Where the failing end's margin is
    not finite but the last two passing ones are, the secant through those (``_secant_past``)
    instead of the bisection step when it falls inside the bracket. A bracket within twice
    ``tol`` takes the trial nearest that step's estimate that leaves it within ``tol`` either
    way."""
    (lo, g_lo), (hi, g_hi) = failing, passing
    widths = [np.inf, np.inf]  # the bracket's width before each step
    kept = 0  # +1: the passing end moved last; -1: the failing end did
    passed: tuple[float, float] | None = None  # the passing end before the last one
    while hi - lo > tol * (span[0] if np.isfinite(g_lo) else span[1]):
        x = 0.5 * (lo + hi)
        inside = (lo + FALSI_EDGE * tol, hi - FALSI_EDGE * tol)
        guess = _secant_past(passed, (hi, g_hi), tol)
        if np.isfinite(g_lo) and hi - lo <= 0.5 * widths[-2]:
            x = hi - g_hi * (hi - lo) / (g_hi - g_lo)
            x = min(max(x, inside[0]), inside[1])
        elif not np.isfinite(g_lo) and guess is not None and inside[0] <= guess <= inside[1]:
            x = guess
        if hi - lo <= 2 * tol:  # one trial closes it either way: the one nearest the estimate
            x = min(max(x, hi - tol), lo + tol)
        widths.append(hi - lo)
        g = measure(x)
        if g <= 0:
            passed, (hi, g_hi) = (hi, g_hi), (x, g)
            g_lo = g_lo / 2 if kept == 1 else g_lo
            kept = 1
        else:
            lo, g_lo = x, g
            g_hi = g_hi / 2 if kept == -1 else g_hi
            kept = -1
    return lo, hi


class _Trials:
    """Counts simulations and keeps the relaxed clock-to-output delay for the pass test; once
    it has one, every later trial's first run samples the output edge where the relaxed edge
    and the pass limit put it (``expect``): a trial is one run, not a coarse run refined."""

    def __init__(self, config: LibraryConfig, deck: Deck) -> None:
        self.config, self.deck = config, deck
        self.runs, self.seconds = 0, 0.0
        self.reference: float | None = None
        self.expect: Expect | None = None
        self.failed: Waveform | None = None  # the waveform of the last failed trial

    def __call__(self, waves, loads, **kw) -> Outcome | None:
        try:
            outcome, runs, seconds = run_event(
                self.config, self.deck, waves, loads, expect=self.expect, **kw
            )
        except MeasurementError as exc:
            self.runs += 1
            self.failed = waveform_of(exc)
            return None
        self.runs, self.seconds = self.runs + runs, self.seconds + seconds
        return outcome

    def margin(self, outcome: Outcome | None) -> float:
        """How far clock-to-output is past the pass limit (the relaxed value, the first
        outcome's, plus ``simulation.pushout``): at or below 0 the trial passes; it grows
        smoothly as the offset shrinks, then is infinite where the capture fails."""
        if outcome is None:
            return float("inf")
        sim = self.config.simulation
        if self.reference is None:
            self.reference = delay = outcome.delay
            raw = outcome.transition * self.config.thresholds.slew_derate
            # A trial near the limit moves its edge out by up to pushout × the relaxed delay.
            late = (1.0 + EXPECT_PUSHOUTS * sim.pushout) * delay
            wanted = EXPECT_SPACING * raw / sim.samples_per_edge
            start, end = delay - EXPECT_EDGES * raw, late + EXPECT_EDGES * raw
            self.expect = Expect(start, end, wanted, settles=True)
        return outcome.delay - (1.0 + sim.pushout) * self.reference

    def reshape(self, margin: float) -> float:
        """``margin`` as a search follows it (see PUSHOUT_FLOOR): g / (g + s); unchanged where
        the capture failed, and before there is a reference (pass or fail only)."""
        if self.reference is None or self.reference <= 0:
            return margin
        slack = self.config.simulation.pushout * self.reference
        if not np.isfinite(margin):
            return margin
        return margin / max(margin + slack, PUSHOUT_FLOOR * slack)


def _reshaped(trials: _Trials, *measures: Callable[[float], float]) -> list:
    """Each margin of ``measures`` as a search follows it (``_Trials.reshape``)."""

    def reshaped(measure: Callable[[float], float]) -> Callable[[float], float]:
        return lambda x: trials.reshape(measure(x))

    return [reshaped(m) for m in measures]


@dataclass(frozen=True, slots=True)
class _Experiment:
    """What every trial of one constraint search shares: the outputs' loads, the run's
    settings, and the output watched with its level before and after (each trial places its
    own clock edge: ``_data_waves``, ``_release_setup``)."""

    loads: dict[str, float]
    step: float
    options: tuple[str, ...]
    output: str
    before: bool
    after: bool
    start: Deck  # the testbench every trial runs: the flop's held state (``heldstate``)


def _offset_margin(trials: _Trials, run: _Experiment, waves_at, judged: bool):
    """The margin of a constraint search's trial by its offset (``_Trials.margin``), from
    ``waves_at`` (offset -> the waves, when the last input edge is over, and the measured clock
    edge); not ``judged`` (removal: the flop stays or not, nothing grows towards failing), 0
    or +inf."""

    def measure(offset: float) -> float:
        waves, quiet, event = waves_at(offset)
        outcome = trials(
            waves,
            run.loads,
            event=event,
            step=run.step,
            output=run.output,
            before=run.before,
            after=run.after,
            quiet_until=quiet,
            options=run.options,
            start=run.start,
        )
        if judged:
            return trials.margin(outcome)
        return 0.0 if outcome is not None else float("inf")

    return measure


def _experiment(
    bench: Timeline,
    point: ConstraintPoint,
    levels: tuple[bool, bool],
    tight: bool,
    start: Deck,
) -> _Experiment:
    """A constraint point's ``_Experiment``: the first output watched at the grid's smallest
    loads, with the levels (before, after) given, its trials run on ``start``."""
    cell = bench.cell
    loads = {o.pin: min(cell.grid.load) for o in cell.outputs}
    step, options = run_settings(bench.config, start, tight, point.data_slew, point.clock_slew)
    return _Experiment(loads, step, options, cell.outputs[0].pin, *levels, start)


def held_state(
    bench: Timeline,
    deck: Deck,
    state: bool,
    levels: dict[str, bool],
    then: dict[str, bool] | None = None,
) -> tuple[Deck, int, float]:
    """``heldstate.held_deck`` with the state written at the step of the grid's sharpest ramp
    (``run_step``), for every flip-flop run that starts from it."""
    step = run_step(bench.config, min(bench.cell.grid.slew))
    return heldstate.held_deck(bench.config, deck, bench, state, levels, step, then)


def _held_start(
    bench: Timeline,
    deck: Deck,
    trials: _Trials,
    state: bool,
    levels: dict[str, bool],
    then: dict[str, bool],
) -> Deck:
    """The testbench a search's trials run on (``held_state``): every input at ``then`` with the
    clock at its inactive level as the trial starts; the runs that find it (once per worker)
    count as the search's."""
    flop = bench.cell.flip_flop
    start = {**then, flop.clock: flop.edge != "rise"}
    deck, runs, seconds = held_state(bench, deck, state, levels, start)
    trials.runs, trials.seconds = trials.runs + runs, trials.seconds + seconds
    return deck


def measure_constraint(config: LibraryConfig, deck: Deck, point: ConstraintPoint) -> SearchResult:
    """Setup: the least data-before-clock offset that still captures in time. Hold: the least
    clock-to-data-change offset that keeps the captured value (either may be negative).
    Recovery and removal: the same for a clear or preset's release (``_release_setup``).
    Searched at the usual settings, then narrowed again from the root found there at the
    tightened settings of a convergence check (``run_settings``, ``_settled``): their
    relaxed trial sets the reference of both, and the final bracket holds at them."""
    measure, lo, hi, trials = _constraint_setup(config, deck, point, tight=True)
    usual = _constraint_setup(config, deck, point, trials=trials)[0]
    tol = config.simulation.bisect_tolerance
    # Removal's margin has no reference (``_offset_margin``): its relaxed trial only checks.
    relaxed = usual if point.kind == "removal" else measure
    # A search that fails on its relaxed trial is saved with that trial's run.
    with KeepWaveform(lambda: trials.failed):
        high = relaxed(hi)
        usual, measure, high = (*_reshaped(trials, usual, measure), trials.reshape(high))
        noted = _Noted(usual, {hi: high})
        found = _search(noted, lo, hi, tol, point.label, high, (USUAL_SPAN, USUAL_SPAN_FLAT))
        bracket = _settled(measure, noted.start(*found, tol), lo, (hi, high), tol, point.label)
    return SearchResult(point, bracket[1], trials.runs, trials.seconds, bracket)


class _Noted:
    """A search's margin that keeps every trial's (``seen``), for the root's estimate: at the
    usual settings, against the relaxed reference of the tightened ones (``_Trials``)."""

    def __init__(self, measure: Callable[[float], float], seen: dict[float, float]) -> None:
        self.measure, self.seen = measure, seen

    def __call__(self, x: float) -> float:
        self.seen[x] = self.measure(x)
        return self.seen[x]

    def start(self, failing: float, passing: float, tol: float) -> tuple[float, float]:
        """Where the tightened stage (``_settled``) starts from the usual stage's final
        (failing, passing) bracket, and its first step: CONFIRM_SPAN × ``tol`` above the root
        of the secant through the bracket's ends where both margins are finite, stepping to as
        far below it; else (no slope to follow) the middle, stepping to either end."""
        g_f, g_p = self.seen[failing], self.seen[passing]
        if not (np.isfinite(g_f) and g_f > 0 >= g_p):
            return 0.5 * (failing + passing), 0.5 * (passing - failing)
        root = passing - g_p * (passing - failing) / (g_p - g_f)
        return root + CONFIRM_SPAN * tol, 2 * CONFIRM_SPAN * tol


def _settled(
    measure: Callable[[float], float],
    begin: tuple[float, float],
    lo: float,
    high: tuple[float, float],
    tol: float,
    what: str,
) -> tuple[float, float]:
    """The final (failing, passing) bracket at the tightened settings (``measure``) from
    ``begin``, the usual stage's (start, first step) (``_Noted.start``): bracketed
    (``_bracket``) from the start in steps from the first (the first bracket within ``tol``
    where the root has not moved past either trial), then narrowed (``_falsi``); ``lo`` and
    ``high`` as ``_bracket`` takes them (the search's failing end, its relaxed trial)."""
    start = min(begin[0], high[0])
    first = (start, high[1] if start == high[0] else measure(start))
    ends = _bracket(measure, lo, first, high, tol, what, step=begin[1] / tol)
    return _falsi(measure, *ends, tol)


def _passing(measure):
    """The pass test of a trial's margin (``_Trials.margin``)."""

    def passes(offset: float) -> bool:
        return measure(offset) <= 0

    return passes


def _constraint_setup(
    config: LibraryConfig,
    deck: Deck,
    point: ConstraintPoint,
    tight: bool = False,
    trials: _Trials | None = None,
):
    """The margin of a constraint point's trial by its offset (``_Trials.margin``: passing at
    or below 0), its failing and its relaxed (passing) offset, and the ``trials`` it counts
    (new ones by default); with ``tight``, at the tightened settings of a convergence check
    (``run_settings``)."""
    trials = trials or _Trials(config, deck)
    if point.kind in ("recovery", "removal"):
        return _release_setup(config, deck, point, tight, trials)
    cell = config.cell(point.cell)
    bench, flop = _bench(config, deck, point.data_slew, point.clock_slew), cell.flip_flop
    out, pin = cell.outputs[0].pin, point.constrained
    others = _sensitized_data(cell, pin)
    final = point.data_edge == "rise"  # the constrained pin's value after its edge
    captured = final if point.kind == "setup" else not final
    stored = flop.next_state.evaluate({**others, pin: captured})
    levels = (stored_output(cell, out, not stored), stored_output(cell, out, stored))
    old = {**others, pin: not captured}
    # Hold's trials start with the pin already at the value the edge captures.
    then = old if point.kind == "setup" else {**others, pin: captured}
    start = _held_start(bench, deck, trials, not stored, old, then)
    run = _experiment(bench, point, levels, tight, start)
    waves_at = _data_waves(bench, point, then)
    relaxed = bench.half / 2
    lo = -relaxed / 2
    if point.kind == "setup":
        data = bench.ramp(point.data_slew, point.data_edge)
        lo = -(data.duration + bench.ramp(point.clock_slew, flop.edge).duration)
    return _offset_margin(trials, run, waves_at, judged=True), lo, relaxed, trials


def _data_waves(bench: Timeline, point: ConstraintPoint, start: dict[str, bool]):
    """Setup or hold: the waves of a trial by its offset, when its last data edge is over,
    and its clock edge. Every input starts at ``start`` with the clock at its inactive level
    (``_held_start``); the constrained pin moves to the value captured ``offset`` before the
    clock's threshold (setup), or moves back from it ``offset`` after (hold). The first of
    the two edges comes at the timeline's lead: a trial near its constraint is short."""
    thr, flop, pin = bench.thr, bench.cell.flip_flop, point.constrained
    edge = bench.ramp(point.clock_slew, flop.edge).moved(0.0)
    clock_along = edge.time_at(thr.delay_input(edge.edge))
    moved = not start[pin] if point.kind == "setup" else start[pin]
    probe = bench.data(pin, not moved, moved, 0.0, point.data_slew)
    go_along = probe[1].time_at(thr.delay_input(probe[1].edge))
    back = bench.ramp(point.data_slew, "fall" if moved else "rise").moved(0.0)
    back_along = back.time_at(thr.delay_input(back.edge))

    def waves_at(offset: float) -> tuple[dict[str, Wave], float, Ramp]:
        waves = {p: stimulus.constant(bench.level(v)) for p, v in start.items()}
        if point.kind == "setup":
            t_clk = bench.lead + max(clock_along, offset + go_along)
            waves[pin], go, _ = bench.data(
                pin, not moved, moved, t_clk - offset - go_along, point.data_slew
            )
            quiet = go.end
        else:
            t_clk = bench.lead + max(clock_along, back_along - offset)
            leaves = back.moved(t_clk + offset - back_along)
            waves[pin], quiet = leaves.pulse(), leaves.end + bench.window / 4
        event = edge.moved(t_clk - clock_along)
        waves[flop.clock] = event.pulse()
        return waves, quiet, event

    return waves_at


def _release_setup(
    config: LibraryConfig,
    deck: Deck,
    point: ConstraintPoint,
    tight: bool,
    trials: _Trials,
):
    """Recovery: the least release-before-clock offset of a clear or preset after which the
    clock edge still captures the other value in time. Removal: the least clock-to-release
    offset for which the edge captures nothing, the control still holding the flop (either may
    be negative). The data asks for the value the control does not force."""
    cell = config.cell(point.cell)
    bench, flop = _bench(config, deck, point.data_slew, point.clock_slew), cell.flip_flop
    out, pin = cell.outputs[0].pin, point.constrained
    clear = flop.clear is not None and pin in flop.clear.variables()
    forced = not clear  # the state the control holds
    released = point.data_edge == "rise"  # the pin's value once released
    edge = bench.ramp(point.clock_slew, flop.edge).moved(0.0)
    clock_along = edge.time_at(config.thresholds.delay_input(edge.edge))
    recovery = point.kind == "recovery"
    held = stored_output(cell, out, forced)
    # Recovery is judged like setup (captured, and in time); removal by the flop staying.
    after = stored_output(cell, out, not forced) if recovery else held
    probe = bench.data(pin, not released, released, 0.0, point.data_slew)
    go_along = probe[1].time_at(config.thresholds.delay_input(probe[1].edge))
    values = {**capture_values(cell, not forced), pin: not released}
    start = _held_start(bench, deck, trials, forced, values, values)
    run = _experiment(bench, point, (held, after), tight, start)

    def waves_at(offset: float) -> tuple[dict[str, Wave], float, Ramp]:
        # The first of the release and the clock's edge comes at the timeline's lead.
        ahead = offset if recovery else -offset  # the release before the clock's threshold
        t_clk = bench.lead + max(clock_along, ahead + go_along)
        waves = {p: stimulus.constant(bench.level(v)) for p, v in values.items()}
        event = edge.moved(t_clk - clock_along)
        waves[flop.clock] = event.pulse()
        waves[pin], go, _ = bench.data(
            pin, not released, released, t_clk - ahead - go_along, point.data_slew
        )
        return waves, go.end if recovery else go.end + bench.window / 4, event

    relaxed = bench.half / 2
    # Released after the edge's ramp (recovery) or a quarter period before it (removal): the
    # edge captures nothing, or captures.
    lo = -(probe[1].duration + edge.duration) if recovery else -relaxed
    return _offset_margin(trials, run, waves_at, judged=recovery), lo, relaxed, trials


@dataclass(frozen=True, slots=True)
class _Pulse:
    """A pulse's two edges at one slew, timed from 0; its width is threshold to threshold."""

    first: Ramp  # leaves the resting level
    second: Ramp  # comes back
    along_in: float  # fraction of the swing the first edge has made at its threshold
    along_out: float  # the same for the second edge
    # The library's input shape; a runt pulse of a shaped edge is the edge scaled to its depth
    # (the depth itself from the times at the thresholds, as for the ramp).
    shape: InputShape | None = None

    @classmethod
    def at(
        cls,
        slew: float,
        level: str,
        thr: Thresholds,
        vdd: float,
        shape: InputShape | None = None,
    ) -> _Pulse:
        up = stimulus.ramp(slew, "rise", thr, vdd, shape)
        down = stimulus.ramp(slew, "fall", thr, vdd, shape)
        first, second = (up, down) if level == "high" else (down, up)
        along = [
            (r.time_at(thr.delay_input(r.edge)) - r.start) / r.duration for r in (first, second)
        ]
        return cls(first, second, along[0], along[1], shape)

    @property
    def narrowest(self) -> float:
        """The narrowest full-swing pulse: no flat top."""
        return (1.0 - self.along_in) * self.first.duration + self.along_out * self.second.duration

    @property
    def floor(self) -> float:
        """The width of a pulse that turns back just as it has crossed both thresholds."""
        d1, d2 = self.first.duration, self.second.duration
        turn = self.along_in + self.along_out - 1.0
        return max(0.0, turn * d2, -turn * d1)

    def flat(self, width: float) -> float:
        return max(width - self.narrowest, 0.0)

    def depth(self, width: float) -> float:
        """The fraction of the swing a pulse ``width`` wide makes at the slew's edge rate:
        below the narrowest full-swing width it turns back before the far rail."""
        if width >= self.narrowest:
            return 1.0
        d1, d2 = self.first.duration, self.second.duration
        return (width + self.along_in * d1 + (1.0 - self.along_out) * d2) / (d1 + d2)

    def vector(self, start: float, width: float) -> tuple[Wave, float]:
        """The PULSE vector of a pulse ``width`` wide starting at ``start``, and its end."""
        depth, flat = self.depth(width), self.flat(width)
        v1, v2 = self.first.levels
        rise, fall = depth * self.first.duration, depth * self.second.duration
        vector = stimulus.pulse_vector(
            v1, v1 + depth * (v2 - v1), start, rise, fall, flat, 1.0, shape=self.shape
        )
        return vector, start + rise + flat + fall


def measure_pulse(config: LibraryConfig, deck: Deck, point: PulsePoint) -> SearchResult:
    """The narrowest pulse (threshold to threshold) on a clock or control pin that still does
    its job: the clock captures in time, the control forces the state. Full-swing pulses
    first; when the narrowest of them (no flat top) still works, a control's pulses keep the
    slew's edge rate and turn back before the rail (``RUNT``), down to one that only just
    crosses the thresholds. A pulse that works even then has no minimum: no value, and the
    result says why (a clock's pulses are full-swing only: one PULSE source shapes both).
    Searched at the usual settings and settled at the tightened ones, as a constraint is
    (``measure_constraint``); where the answer's kind changes there, searched again at them."""
    cell = config.cell(point.cell)
    bench = _bench(config, deck, point.slew, min(cell.grid.slew))
    shape = _Pulse.at(point.slew, point.level, bench.thr, bench.vdd, bench.shape)
    trials = _Trials(config, deck)
    clock = point.pin == cell.flip_flop.clock
    test = _clock_pulse_test if clock else _control_pulse_test
    measure, relaxed = test(bench, point, shape, trials, tight=True)
    usual = test(bench, point, shape, trials)[0]
    tol = config.simulation.bisect_tolerance
    with KeepWaveform(lambda: trials.failed):
        # A clock pulse's margins take the relaxed reference of the tightened settings.
        high = (measure if clock else usual)(relaxed)
        usual, measure, high = (*_reshaped(trials, usual, measure), trials.reshape(high))
        noted = _Noted(usual, {relaxed: high})
        spans = (USUAL_SPAN, USUAL_SPAN_FLAT)
        found = _pulse_search(noted, point, shape, relaxed, clock, config.simulation, high, spans)
        settled = _pulse_settled(measure, noted, found, shape, (relaxed, high), tol, point.label)
        if settled is None:
            settled = _pulse_search(measure, point, shape, relaxed, clock, config.simulation, high)
    bracket, stimulus_, note = settled
    value = None if bracket[0] is None else bracket[1]
    return SearchResult(point, value, trials.runs, trials.seconds, bracket, stimulus_, note)


_Found = tuple[tuple[float | None, float], str, str]  # a pulse search's (``_pulse_search``)


def _pulse_settled(
    measure: Callable[[float], float],
    noted: _Noted,
    found: _Found,
    shape: _Pulse,
    high: tuple[float, float],
    tol: float,
    what: str,
) -> _Found | None:
    """A pulse search's answer at the usual settings (``found``, its trials in ``noted``) as
    the tightened settings (``measure``) have it (``_settled``; ``high``: their relaxed
    trial), or None where it changes its kind there: a width that passed with no failing one
    found fails, a full-swing search's narrowest pulse passes, or a turned-back one's fails."""
    (failing, passing), kind, note = found
    if failing is None:
        return found if measure(passing) <= 0 else None
    if kind != FULL:  # turned back below the narrowest, which passed: no wider
        high = (shape.narrowest, noted.seen[shape.narrowest])
    lower = shape.narrowest if kind == FULL else min(shape.floor + tol, shape.narrowest)
    try:
        bracket = _settled(measure, noted.start(failing, passing, tol), lower, high, tol, what)
    except MeasurementError:  # the search's failing end (the narrowest, the floor) passes here
        return None
    if kind != FULL and bracket[1] == shape.narrowest:  # not simulated at these settings
        return None
    return bracket, kind, note


def _pulse_search(
    measure: Callable[[float], float],
    point: PulsePoint,
    shape: _Pulse,
    relaxed: float,
    clock: bool,
    sim: Simulation,
    high: float | None = None,
    span: tuple[float, float] = (1.0, 1.0),
) -> tuple[tuple[float | None, float], str, str]:
    """The (failing, passing) widths, the pulse shape and a note: full-swing pulses up from the
    narrowest, narrowed on the margin as a constraint search is (``_falsi``, to ``span``);
    then for a control, runt pulses by bisection (pass or fail only); a failing width None when
    no width the search could shape fails. ``high``: the margin at ``relaxed`` where it is
    known."""
    tol = sim.bisect_tolerance
    passes = _passing(measure)
    if high is None:
        high = measure(relaxed)
    if high > 0:
        raise MeasurementError(f"{point.label}: fails even with relaxed timing ({relaxed:.4g} s)")
    narrowest = (shape.narrowest, measure(shape.narrowest))
    if narrowest[1] > 0:
        ends = _bracket(measure, shape.narrowest, narrowest, (relaxed, high), tol, point.label)
        return _falsi(measure, *ends, tol, span), FULL, ""
    if clock:
        note = "the narrowest full-swing pulse works; a clock's pulses are not turned back"
        return (None, shape.narrowest), FULL, note
    floor = min(shape.floor + tol, shape.narrowest)
    if passes(floor):
        note = "works even as a pulse that turns back just past the thresholds: no width fails"
        return (None, floor), RUNT, note
    return _bisect(passes, floor, shape.narrowest, tol), RUNT, ""


def _clock_pulse_test(
    bench: Timeline, point: PulsePoint, shape: _Pulse, trials: _Trials, tight: bool = False
):
    """The margin (``_Trials.margin``) of a clock pulse by its width (full swing: a flat top
    of the width less the edges'), and a relaxed width: two writes, the second must capture
    in time; ``tight``: at the settings a result is confirmed at."""
    cell, flop = bench.cell, bench.cell.flip_flop
    out = cell.outputs[0].pin
    loads = {o.pin: min(cell.grid.load) for o in cell.outputs}
    stored = True
    new, old = capture_values(cell, stored), capture_values(cell, not stored)
    active_level = "high" if flop.edge == "rise" else "low"
    step, options = run_settings(bench.config, trials.deck, tight, point.slew, min(cell.grid.slew))

    def measure(width: float) -> float:
        if point.level == active_level:
            clock, event = bench.clock(point.slew, edges=2, high=shape.flat(width))
            change = event.start - bench.half / 2
        else:
            clock, event = bench.clock(point.slew, edges=2, low=shape.flat(width))
            change = bench.lead + bench.half / 2
        waves = _capture_waves(bench, old, new, min(cell.grid.slew), change)
        waves[flop.clock] = clock
        outcome = trials(
            waves,
            loads,
            event=event,
            step=step,
            output=out,
            before=stored_output(cell, out, not stored),
            after=stored_output(cell, out, stored),
            options=options,
        )
        return trials.margin(outcome)

    return measure, bench.half - shape.first.duration


def _control_pulse_test(
    bench: Timeline, point: PulsePoint, shape: _Pulse, trials: _Trials, tight: bool = False
):
    """The margin (0 passing, +inf failing) of a clear or preset pulse by its width
    (``_Pulse.vector``), and a relaxed width: with the other value stored, the pulse must
    force the control's value; ``tight``: at the settings a result is confirmed at."""
    cell, flop = bench.cell, bench.cell.flip_flop
    out = cell.outputs[0].pin
    loads = {o.pin: min(cell.grid.load) for o in cell.outputs}
    stored = flop.preset is not None and point.pin in flop.preset.variables()
    old = capture_values(cell, not stored)
    clock, first_edge = bench.clock(min(cell.grid.slew), edges=1)
    start = first_edge.end + bench.half
    step, options = run_settings(bench.config, trials.deck, tight, point.slew, min(cell.grid.slew))

    def measure(width: float) -> float:
        waves = {p: stimulus.constant(bench.level(v)) for p, v in old.items()}
        waves[flop.clock] = clock
        waves[point.pin], end = shape.vector(start, width)
        event = shape.first.moved(start)
        outcome = trials(
            waves,
            loads,
            event=event,
            step=step,
            output=out,
            before=stored_output(cell, out, not stored),
            after=stored_output(cell, out, stored),
            quiet_until=end,
            options=options,
        )
        return 0.0 if outcome is not None else float("inf")  # forced or not: no slope

    return measure, bench.half


def check_flop(config: LibraryConfig, deck: Deck) -> None:
    """Every data vector is captured from either stored value, and every asynchronous control
    forces its value: simulated with relaxed timing; raise naming the vector."""
    cell = config.cell(deck.cell)
    # The configured window, else the shortest: a cell that does not work should not be
    # probed for a window first.
    shortest = config.simulation.window or WINDOW_SLEWS * max(cell.grid.slew)
    bench, flop = _bench(config, deck, *cell.grid.slew, window=shortest), cell.flip_flop
    slew = cell.grid.slew[len(cell.grid.slew) // 2]
    loads = {o.pin: min(cell.grid.load) for o in cell.outputs}
    fixed = inactive_controls(cell)
    for bits in itertools.product((False, True), repeat=len(cell.data_inputs)):
        new = {**fixed, **dict(zip(cell.data_inputs, bits, strict=True))}
        stored = flop.next_state.evaluate(new)
        for previous in (False, True):
            old = capture_values(cell, previous)
            clock, event = bench.clock(slew, edges=2)
            waves = _capture_waves(bench, old, new, slew, event.start - bench.half / 2)
            waves[flop.clock] = clock
            vector = " ".join(f"{p}={int(v)}" for p, v in new.items())
            for out in cell.outputs:
                try:
                    run_event(
                        config,
                        deck,
                        waves,
                        loads,
                        event=event,
                        step=run_step(config, slew),
                        output=out.pin,
                        before=stored_output(cell, out.pin, previous),
                        after=stored_output(cell, out.pin, stored),
                        window=bench.window,
                    )
                except MeasurementError as exc:
                    raise FunctionalMismatchError(
                        f"storing {int(previous)} then clocking in {vector} should give "
                        f"{out.pin}={int(stored_output(cell, out.pin, stored))}: {exc.reason}",
                        cell=cell.name,
                        pin=out.pin,
                        vector=vector,
                    ) from exc


def constraint_probe(config: LibraryConfig, deck: Deck, point: ConstraintPoint):
    """The pass test of a constraint search as a function of the offset, for re-checking a
    result: at the tightened settings the search runs at, a fresh relaxed reference simulated
    first."""
    measure, _, relaxed, _ = _constraint_setup(config, deck, point, tight=True)
    passes = _passing(measure)
    if not passes(relaxed):
        raise MeasurementError(f"{point.label}: fails even with relaxed timing")
    return passes


def pulse_probe(config: LibraryConfig, deck: Deck, point: PulsePoint):
    """The pass test of a pulse-width search as a function of the width (``_Pulse``: full
    swing at and above the narrowest, turned back below it), for re-checking a result at the
    tightened settings it is searched at: a fresh relaxed reference is simulated first."""
    cell = config.cell(point.cell)
    bench = _bench(config, deck, point.slew, min(cell.grid.slew))
    shape = _Pulse.at(point.slew, point.level, bench.thr, bench.vdd, bench.shape)
    test = _clock_pulse_test if point.pin == cell.flip_flop.clock else _control_pulse_test
    measure, relaxed = test(bench, point, shape, _Trials(config, deck), tight=True)
    passes = _passing(measure)
    if not passes(relaxed):
        raise MeasurementError(f"{point.label}: fails even with relaxed timing")
    return passes


def event_vectors(cell: CellSpec, deck: Deck) -> tuple[str, ...]:
    """What a timing run must record for ``event_energy``: the supply and every pin."""
    pins = (*map(deck.input_node, cell.inputs), *(deck.output_node(o.pin) for o in cell.outputs))
    return (*pins, f"{deck.supply}#branch")
