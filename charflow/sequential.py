"""Flip-flops: clock-to-output and asynchronous-control arcs, setup, hold and pulse widths.

Every experiment writes the opposite value into the flop with a first clock edge, then
applies the event under test (a second clock edge, an asynchronous control, a pulse), so
each output edge is measured from a properly initialised state. Constraints are found by
bisection on the data-to-clock offset; a point passes when the right value is captured and
clock-to-output has pushed out by no more than ``simulation.pushout`` over its relaxed value.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from . import stimulus
from .config import CellSpec, LibraryConfig
from .errors import FunctionalMismatchError, MeasurementError
from .measure import KeepWaveform, check_settled, integral, single_crossing, step_at, waveform
from .netlist import Deck, build_deck
from .simulate import Request
from .stimulus import Ramp
from .sweep import (
    ConstraintPoint,
    PulsePoint,
    TimingPoint,
    capture_values,
    inactive_controls,
    plan,
    stored_output,
)
from .timing import (
    LOGIC_MARGIN,
    PARKED_GRID,
    REFINE_SLACK,
    REFINEMENTS,
    Measurement,
    alters,
    backend_for,
    breakpoints,
    point_loads,
    simulate,
)

if TYPE_CHECKING:
    from .ffpower import EventEnergy

WINDOW_SLEWS = 10.0  # settle window after an edge, in the grid's largest slew, at least
WINDOW_DOUBLINGS = 5  # ... doubled up to this many times until the cell settles in it
WINDOW_STEPS = 200  # first-run samples across a window, before refinement
GRID_SPACING = 3.0  # breakpoint spacing in wanted samples: ngspice adds steps after each one


@dataclass(frozen=True, slots=True)
class SearchResult:
    point: ConstraintPoint | PulsePoint
    value: float  # s: the constraint (may be negative) or the minimum pulse width
    runs: int  # simulations the search took
    sim_seconds: float
    bound: bool = False  # the value is an upper bound: the narrowest pulse possible passed


@dataclass(frozen=True, slots=True)
class Outcome:
    """One flop experiment: when the measured event crossed its threshold, when the output
    did, and the output's transition (already derated)."""

    t_event: float
    t_out: float
    transition: float
    charges: tuple[tuple[str, float], ...] = ()  # C drawn by each pin asked for, in its window
    energy: EventEnergy | None = None  # asked for with ``run_event``'s states

    @property
    def delay(self) -> float:
        return self.t_out - self.t_event


class _Bench:
    """The waveform timeline shared by every experiment on one cell."""

    def __init__(self, config: LibraryConfig, cell: CellSpec, window: float | None = None) -> None:
        self.config, self.cell = config, cell
        self.vdd = config.process.vdd
        self.thr = config.thresholds
        largest = max(cell.grid.slew)
        self.window = window or settle_window(config, cell)
        ramp = stimulus.ramp(largest, "rise", self.thr, self.vdd)
        # Half a period holds the slowest edge and its settling, with room for a data edge.
        self.half = 2.0 * ramp.duration + self.window
        self.lead = ramp.start

    def level(self, value: bool) -> float:
        return self.vdd if value else 0.0

    def clock(
        self, slew: float, edges: int, high: float | None = None, low: float | None = None
    ) -> tuple[str, Ramp]:
        """A clock PULSE with ``edges`` active edges, one period (2 × half) apart; ``high`` and
        ``low`` set the flat time of the active and of the inactive phase (pulse widths).
        Returns the vector and the ramp of the last active edge."""
        flop = self.cell.flop
        active = stimulus.ramp(slew, flop.edge, self.thr, self.vdd)
        back = stimulus.ramp(slew, "fall" if flop.edge == "rise" else "rise", self.thr, self.vdd)
        v1, v2 = active.levels
        width = self.half - active.duration if high is None else high
        rest = self.half - back.duration if low is None else low
        period = active.duration + width + back.duration + rest
        last = self.lead + (edges - 1) * period
        if edges == 1:
            period = 1.0  # one edge only: the next is far beyond the run
        vector = stimulus.pulse_vector(
            v1, v2, self.lead, active.duration, back.duration, width, period
        )
        return vector, Ramp(flop.edge, last, active.duration, self.vdd)

    def data(
        self, pin: str, old: bool, new: bool, start: float, slew: float, hold: float = 1.0
    ) -> tuple[str, Ramp, Ramp]:
        """A data PULSE leaving ``old`` at ``start``, staying ``hold`` at ``new``, then
        returning; with the ramps of its two edges (timed from ``start``)."""
        go = stimulus.ramp(slew, "rise" if new else "fall", self.thr, self.vdd)
        back = stimulus.ramp(slew, "fall" if new else "rise", self.thr, self.vdd)
        go = Ramp(go.edge, start, go.duration, self.vdd)
        back = Ramp(back.edge, start + go.duration + hold, back.duration, self.vdd)
        if old == new:
            return stimulus.constant(self.level(old)), go, back
        vector = stimulus.pulse_vector(
            self.level(old), self.level(new), start, go.duration, back.duration, hold, 2.0
        )
        return vector, go, back


_WINDOWS: dict[tuple, float] = {}


def settle_window(config: LibraryConfig, cell: CellSpec) -> float:
    """How long a flop experiment runs past its event, and the clock's phases hold:
    ``simulation.window`` when set; else WINDOW_SLEWS × the grid's largest slew, doubled up to
    WINDOW_DOUBLINGS times until the cell's slowest events (its clock and control arcs to the
    first output at the sharpest slew and the largest loads; the other output moving draws
    supply current, which must settle too) measure cleanly in it: a window follows the cell,
    not only the grid. A cell that measures in none keeps the shortest, and its points report
    why. Probed once per worker and cell."""
    if config.simulation.window:
        return config.simulation.window
    deck = build_deck(config, cell)
    key = (deck.key, cell.grid, config.thresholds, config.simulation)
    if key not in _WINDOWS:
        base = WINDOW_SLEWS * max(cell.grid.slew)
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


def run_event(
    config: LibraryConfig,
    deck: Deck,
    waves: dict[str, str],
    loads: dict[str, float],
    *,
    event: Ramp,
    output: str,
    before: bool,
    after: bool,
    quiet_until: float = 0.0,
    charge_windows: dict[str, tuple[float, float | None]] | None = None,
    states: tuple[bool, bool] | None = None,
    window: float | None = None,
) -> tuple[Outcome, int, float]:
    """Simulate one experiment; the output must hold ``before`` until the event and settle at
    ``after`` (a bool level) once it, within ``window`` (``settle_window`` unless given). With
    ``states`` (the flop's state before and after the event) the event's energy is measured
    too (``ffpower.event_energy``). Returns the outcome, simulations and simulator seconds."""
    cell = config.cell(deck.cell)
    vdd, thr, sim = config.process.vdd, config.thresholds, config.simulation
    out_node = deck.output_node(output)
    windows = charge_windows or {}
    edge = "rise" if after else "fall"
    tol = sim.settle * vdd
    window = window or settle_window(config, cell)
    # Stop once the output has settled after the event, and after any late data edge.
    arm = max(event.end, quiet_until)
    level = f"v({out_node}) > {vdd - tol:.6g}" if after else f"v({out_node}) < {tol:.6g}"
    stop_when = f"time > {arm:.6g} when {level}" if before != after else None
    # The inputs' nodes too: a failed run is saved with the clock and data that drove it.
    nodes = {output: out_node, **{p: deck.input_node(p) for p in waves}}
    recorded = (*nodes.values(), *(f"{deck.input_source(p)}#branch" for p in windows))
    if states is not None:
        from . import ffpower

        # The energy window ends when the supply current is quiet, some time after the
        # outputs settle: the run goes on to its cap.
        recorded = tuple(dict.fromkeys((*recorded, *ffpower.event_vectors(cell, deck))))
        stop_when = None
    stop = arm + window
    max_step = window / WINDOW_STEPS
    grid = PARKED_GRID
    if states is not None:
        grid = ffpower.event_grid(event, window)
    runs, seconds = 0, 0.0
    backend = backend_for(config)
    what = f"output {output}"
    saved = KeepWaveform(lambda: waveform(result.vectors, nodes))
    for refine in range(REFINEMENTS + 1):
        request = Request(
            deck,
            alters(deck, cell, waves, loads, grid),
            f"tran {max_step:.6g} {stop:.6g} 0 {max_step:.6g}",
            recorded,
            stop_when=stop_when,
        )
        result, attempts = simulate(backend, request)
        runs, seconds = runs + attempts, seconds + result.seconds
        t, v = result.vectors["time"], result.vectors[out_node]
        held = v[t <= event.start]
        with saved:
            if held.size and abs(held[-1] - (vdd if before else 0.0)) > LOGIC_MARGIN * vdd:
                raise MeasurementError(
                    f"{what} is at {held[-1]:.4g} V before the event, not {int(before)}: the "
                    "flop was not initialised"
                )
            # Overshooting the rail as it arrives is settled; stopping short of it is not.
            after_level = vdd if after else 0.0
            check_settled(v, after_level, tol * (1 + 1e-6), "rise" if after else "fall", what)
            if before == after:
                return Outcome(np.nan, np.nan, np.nan), runs, seconds
            # The event pin is driven by an ideal source: its ramp crosses where the ramp says.
            t_ev = event.time_at(thr.delay_input(event.edge))
            t_out = _crossing_after(t, v, thr.delay_output(edge) * vdd, edge, event.start, what)
            band = sorted(
                _crossing_after(t, v, x * vdd, edge, event.start, what) for x in thr.slew_band(edge)
            )
        raw = band[1] - band[0]
        wanted = raw / sim.samples_per_edge
        coarse = max(step_at(t, t_out), step_at(t, band[0]), step_at(t, band[1]))
        if coarse <= REFINE_SLACK * wanted or refine == REFINEMENTS:
            break
        # Dense samples only around the output edge: the rest of the run keeps its step.
        margin = coarse + raw
        grid = breakpoints(band[0] - margin, band[1] + margin, GRID_SPACING * wanted)
    # A source's branch current flows into its + node from outside: the pin's charge is −∫i.
    charges = tuple(
        (p, -integral(t, result.vectors[f"{deck.input_source(p)}#branch"], a, b))
        for p, (a, b) in windows.items()
    )
    energy = None
    if states is not None:
        energy = ffpower.event_energy(config, deck, result.vectors, event, states, loads)
    return Outcome(t_ev, t_out, raw / thr.slew_derate, charges, energy), runs, seconds


def _capture_waves(
    bench: _Bench, old: dict[str, bool], new: dict[str, bool], slew: float, start: float
) -> dict[str, str]:
    """Every non-clock input moving from ``old`` to ``new`` at ``start``."""
    return {p: bench.data(p, old[p], new[p], start, slew)[0] for p in new}


def measure_clocked(
    config: LibraryConfig, deck: Deck, point: TimingPoint, window: float | None = None
) -> Measurement:
    """A clock arc (second active edge after writing the opposite value) or an asynchronous
    control arc (after writing the value it changes); ``window`` as in ``run_event``."""
    cell = config.cell(point.cell)
    bench = _Bench(config, cell, window)
    flop = cell.flop
    loads = point_loads(cell, point)
    smallest = min(cell.grid.slew)
    out_after = point.output_edge == "rise"
    if point.kind == "clock":
        stored = next(v for v in (False, True) if stored_output(cell, point.output, v) == out_after)
        new, old = dict(point.side), capture_values(cell, not stored)
        clock, event = bench.clock(point.slew, edges=2)
        # Data moves half-way through the inactive phase before the measured edge: relaxed.
        change = event.start - bench.half / 2
        waves = _capture_waves(bench, old, new, smallest, change)
        waves[flop.clock] = clock
        before = stored_output(cell, point.output, not stored)
        # The data pins' charge while they move (clock quiet), the clock's over its edge.
        windows = {p: (change, event.start) for p in new if new[p] != old[p]}
        windows[flop.clock] = (event.start, None)
        moves = tuple((p, "rise" if new[p] else "fall") for p in new if new[p] != old[p])
    else:
        stored = point.kind == "preset"
        before = stored_output(cell, point.output, not stored)
        old = capture_values(cell, not stored)
        clock, first = bench.clock(smallest, edges=1)
        waves = {p: stimulus.constant(bench.level(v)) for p, v in old.items()}
        waves[flop.clock] = clock
        event = stimulus.ramp(point.slew, point.input_edge, config.thresholds, bench.vdd)
        # A quarter period after the clock's inactive edge has ended: that edge's currents
        # have died down and stay out of the control's energy window.
        event = Ramp(event.edge, first.end + 1.5 * bench.half, event.duration, bench.vdd)
        waves[point.related] = event.pulse()
        windows, moves = {point.related: (event.start, None)}, ()
    outcome, runs, seconds = run_event(
        config,
        deck,
        waves,
        loads,
        event=event,
        output=point.output,
        before=before,
        after=out_after,
        charge_windows=windows,
        states=(not stored, stored),
        window=bench.window,
    )
    charges = dict(outcome.charges)
    energy = outcome.energy
    return Measurement(
        point=point,
        delay=outcome.delay,
        transition=outcome.transition,
        input_charge=charges[point.related],
        side_charges=tuple((p, edge, charges[p]) for p, edge in moves),
        runs=runs,
        sim_seconds=seconds,
        stop=0.0,
        supply_energy=energy.supply,
        internal_energy=energy.internal,
        static_current=energy.static,
    )


def _sensitized_data(cell: CellSpec, pin: str) -> dict[str, bool]:
    """Values of the other data pins (controls inactive) under which ``pin`` decides the
    next state, with the next state equal to ``pin``'s value where the function allows."""
    fixed = inactive_controls(cell)
    others = [p for p in cell.data_inputs if p != pin]
    flop = cell.flop
    for bits in itertools.product((False, True), repeat=len(others)):
        assign = {**fixed, **dict(zip(others, bits, strict=True))}
        if flop.next_state.evaluate({**assign, pin: True}) != flop.next_state.evaluate(
            {**assign, pin: False}
        ):
            return assign
    raise MeasurementError(f"the next state {flop.next_state.to_liberty()} never depends on {pin}")


def _search(
    passes, lo: float, hi: float, tol: float, what: str, *, floor_ok: bool = False
) -> tuple[float, bool]:
    """Bisection for the smallest passing value between ``lo`` (must fail) and ``hi`` (must
    pass). With ``floor_ok`` a passing ``lo`` is returned as an upper bound (the narrowest
    pulse the slew allows already works); returns the value and whether it is such a bound."""
    if not passes(hi):
        raise MeasurementError(f"{what}: fails even with relaxed timing ({hi:.4g} s)")
    if passes(lo):
        if floor_ok:
            return lo, True
        raise MeasurementError(f"{what}: passes even at {lo:.4g} s; the search does not bracket")
    while hi - lo > tol:
        mid = 0.5 * (lo + hi)
        if passes(mid):
            hi = mid
        else:
            lo = mid
    return hi, False


class _Trials:
    """Counts simulations and keeps the relaxed clock-to-output delay for the pass test."""

    def __init__(self, config: LibraryConfig, deck: Deck) -> None:
        self.config, self.deck = config, deck
        self.runs, self.seconds = 0, 0.0
        self.reference: float | None = None
        self.failed = None  # the waveform of the last trial that gave no measurement

    def __call__(self, waves, loads, **kw) -> Outcome | None:
        try:
            outcome, runs, seconds = run_event(self.config, self.deck, waves, loads, **kw)
        except MeasurementError as exc:
            self.runs += 1
            self.failed = exc.waveform
            return None
        self.runs, self.seconds = self.runs + runs, self.seconds + seconds
        return outcome

    def in_time(self, outcome: Outcome | None) -> bool:
        if outcome is None:
            return False
        if self.reference is None:
            self.reference = outcome.delay
            return True
        return outcome.delay <= (1.0 + self.config.simulation.pushout) * self.reference


def measure_constraint(config: LibraryConfig, deck: Deck, point: ConstraintPoint) -> SearchResult:
    """Setup: the least data-before-clock offset that still captures in time. Hold: the least
    clock-to-data-change offset that keeps the captured value (either may be negative).
    Recovery and removal: the same for a clear or preset's release (``_release_setup``)."""
    passes, lo, hi, trials = _constraint_setup(config, deck, point)
    # A search that fails on its relaxed trial is saved with that trial's run.
    with KeepWaveform(lambda: trials.failed):
        value, _ = _search(passes, lo, hi, config.simulation.bisect_tolerance, point.label)
    return SearchResult(point, value, trials.runs, trials.seconds)


def _constraint_setup(config: LibraryConfig, deck: Deck, point: ConstraintPoint):
    """The pass test of a constraint point, its failing and its relaxed (passing) offset."""
    if point.kind in ("recovery", "removal"):
        return _release_setup(config, deck, point)
    cell = config.cell(point.cell)
    bench, flop = _Bench(config, cell), cell.flop
    out = cell.outputs[0].pin
    others = _sensitized_data(cell, point.constrained)
    final = point.data_edge == "rise"  # the constrained pin's value after its edge
    captured = final if point.kind == "setup" else not final
    stored = flop.next_state.evaluate({**others, point.constrained: captured})
    old = {**others, point.constrained: not captured}
    clock, event = bench.clock(point.clock_slew, edges=2)
    t_clk = event.time_at(config.thresholds.delay_input(event.edge))
    loads = {o.pin: min(cell.grid.load) for o in cell.outputs}
    trials = _Trials(config, deck)
    before, after = stored_output(cell, out, not stored), stored_output(cell, out, stored)
    pin = point.constrained

    def waves_at(offset: float):
        waves = {p: stimulus.constant(bench.level(v)) for p, v in old.items()}
        waves[flop.clock] = clock
        probe = bench.data(pin, not captured, captured, 0.0, point.data_slew)
        go_along = probe[1].time_at(config.thresholds.delay_input(probe[1].edge))
        back_along = probe[2].time_at(config.thresholds.delay_input(probe[2].edge)) - probe[2].start
        if point.kind == "setup":
            vector, go, _ = bench.data(
                pin, not captured, captured, t_clk - offset - go_along, point.data_slew
            )
            quiet = go.end
        else:
            start = t_clk - bench.half / 2 - go_along
            hold = t_clk + offset - back_along - start - probe[1].duration
            vector, _, back = bench.data(pin, not captured, captured, start, point.data_slew, hold)
            quiet = back.end + bench.window / 4
        waves[pin] = vector
        return waves, quiet

    def passes(offset: float) -> bool:
        waves, quiet = waves_at(offset)
        outcome = trials(
            waves, loads, event=event, output=out, before=before, after=after, quiet_until=quiet
        )
        return trials.in_time(outcome)

    relaxed = bench.half / 2
    if point.kind == "setup":
        lo = -(
            stimulus.ramp(point.data_slew, point.data_edge, config.thresholds, bench.vdd).duration
            + event.duration
        )
    else:
        lo = -relaxed / 2
    return passes, lo, relaxed, trials


def _release_setup(config: LibraryConfig, deck: Deck, point: ConstraintPoint):
    """Recovery: the least release-before-clock offset of a clear or preset after which the
    clock edge still captures the other value in time. Removal: the least clock-to-release
    offset for which the edge captures nothing, the control still holding the flop (either may
    be negative). The data asks for the value the control does not force."""
    cell = config.cell(point.cell)
    bench, flop = _Bench(config, cell), cell.flop
    out = cell.outputs[0].pin
    pin = point.constrained
    clear = flop.clear is not None and pin in flop.clear.variables()
    forced = not clear  # the state the control holds
    released = point.data_edge == "rise"  # the pin's value once released
    clock, event = bench.clock(point.clock_slew, edges=2)
    t_clk = event.time_at(config.thresholds.delay_input(event.edge))
    loads = {o.pin: min(cell.grid.load) for o in cell.outputs}
    trials = _Trials(config, deck)
    held = stored_output(cell, out, forced)
    recovery = point.kind == "recovery"
    probe = bench.data(pin, not released, released, 0.0, point.data_slew)
    go_along = probe[1].time_at(config.thresholds.delay_input(probe[1].edge))
    values = capture_values(cell, not forced)

    def passes(offset: float) -> bool:
        waves = {p: stimulus.constant(bench.level(v)) for p, v in values.items()}
        waves[flop.clock] = clock
        release_at = t_clk - offset if recovery else t_clk + offset
        waves[pin], go, _ = bench.data(
            pin, not released, released, release_at - go_along, point.data_slew
        )
        after = stored_output(cell, out, not forced) if recovery else held
        quiet = go.end if recovery else go.end + bench.window / 4
        outcome = trials(
            waves, loads, event=event, output=out, before=held, after=after, quiet_until=quiet
        )
        # Recovery is judged like setup (captured, and in time); removal by the flop staying.
        return trials.in_time(outcome) if recovery else outcome is not None

    relaxed = bench.half / 2
    # Released after the edge's ramp (recovery) or a quarter period before it (removal): the
    # edge captures nothing, or captures.
    lo = -(probe[1].duration + event.duration) if recovery else -relaxed
    return passes, lo, relaxed, trials


def measure_pulse(config: LibraryConfig, deck: Deck, point: PulsePoint) -> SearchResult:
    """The narrowest pulse (threshold to threshold) on a clock or control pin that still does
    its job: the clock captures in time, the control forces the state."""
    cell = config.cell(point.cell)
    bench, flop, thr = _Bench(config, cell), cell.flop, config.thresholds
    out = cell.outputs[0].pin
    loads = {o.pin: min(cell.grid.load) for o in cell.outputs}
    trials = _Trials(config, deck)
    up = stimulus.ramp(point.slew, "rise", thr, bench.vdd)
    down = stimulus.ramp(point.slew, "fall", thr, bench.vdd)
    first, second = (up, down) if point.level == "high" else (down, up)
    # Flat time that gives ``width`` between the two edges' delay thresholds.
    lead_in = first.duration - (first.time_at(thr.delay_input(first.edge)) - first.start)
    lead_out = second.time_at(thr.delay_input(second.edge)) - second.start

    def flat(width: float) -> float:
        return width - lead_in - lead_out

    if point.pin == flop.clock:
        stored = True
        new, old = capture_values(cell, stored), capture_values(cell, not stored)
        active_level = "high" if flop.edge == "rise" else "low"

        def waves_at(width: float):
            if point.level == active_level:
                clock, event = bench.clock(point.slew, edges=2, high=max(flat(width), 0.0))
                change = event.start - bench.half / 2
            else:
                clock, event = bench.clock(point.slew, edges=2, low=max(flat(width), 0.0))
                change = bench.lead + bench.half / 2
            waves = _capture_waves(bench, old, new, min(cell.grid.slew), change)
            waves[flop.clock] = clock
            return waves, event

        def passes(width: float) -> bool:
            waves, event = waves_at(width)
            outcome = trials(
                waves,
                loads,
                event=event,
                output=out,
                before=stored_output(cell, out, not stored),
                after=stored_output(cell, out, stored),
            )
            return trials.in_time(outcome)

        relaxed = bench.half - up.duration
    else:
        stored = flop.preset is not None and point.pin in flop.preset.variables()
        old = capture_values(cell, not stored)
        clock, first_edge = bench.clock(min(cell.grid.slew), edges=1)
        start = first_edge.end + bench.half

        def passes(width: float) -> bool:
            waves = {p: stimulus.constant(bench.level(v)) for p, v in old.items()}
            waves[flop.clock] = clock
            v1, v2 = first.levels
            waves[point.pin] = stimulus.pulse_vector(
                v1, v2, start, first.duration, second.duration, max(flat(width), 0.0), 1.0
            )
            event = Ramp(first.edge, start, first.duration, bench.vdd)
            end = start + first.duration + max(flat(width), 0.0) + second.duration
            outcome = trials(
                waves,
                loads,
                event=event,
                output=out,
                before=stored_output(cell, out, not stored),
                after=stored_output(cell, out, stored),
                quiet_until=end,
            )
            return outcome is not None

        relaxed = bench.half
    # The narrowest pulse the slew allows has no flat top: its width is lead_in + lead_out.
    with KeepWaveform(lambda: trials.failed):
        value, bound = _search(
            passes,
            lead_in + lead_out,
            relaxed,
            config.simulation.bisect_tolerance,
            point.label,
            floor_ok=True,
        )
    return SearchResult(point, value, trials.runs, trials.seconds, bound)


def check_flop(config: LibraryConfig, deck: Deck) -> None:
    """Every data vector is captured from either stored value, and every asynchronous control
    forces its value: simulated with relaxed timing; raise naming the vector."""
    cell = config.cell(deck.cell)
    # The shortest window: a cell that does not work should not be probed for one first.
    bench, flop = _Bench(config, cell, WINDOW_SLEWS * max(cell.grid.slew)), cell.flop
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
    result: a fresh relaxed reference is simulated first."""
    passes, _, relaxed, _ = _constraint_setup(config, deck, point)
    if not passes(relaxed):
        raise MeasurementError(f"{point.label}: fails even with relaxed timing")
    return passes
