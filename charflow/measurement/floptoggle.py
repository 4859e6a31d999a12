"""A flip-flop's hidden-power runs: a clock edge that stores nothing new, or a data edge that is
not captured; the energy measured like an event's (``ffpower``), on the flip-flop's timeline
(``sequential``)."""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from charflow.config.library import LibraryConfig
from charflow.measurement import ffpower, sequential
from charflow.measurement.combinational import LOGIC_MARGIN, alters, backend_for, simulate
from charflow.measurement.waves import integral, single_crossing
from charflow.plan.arcs import capture_values, stored_output
from charflow.plan.toggles import stored_value
from charflow.records.errors import MeasurementError
from charflow.records.outcomes import ToggleMeasurement
from charflow.records.points import TogglePoint
from charflow.simulation import stimulus
from charflow.simulation.backends import Request, Result
from charflow.simulation.netlist import Deck
from charflow.simulation.stimulus import Ramp, Wave
from charflow.simulation.timeline import Timeline


def measure_toggle(config: LibraryConfig, deck: Deck, point: TogglePoint) -> ToggleMeasurement:
    """One hidden event of a flop: the stored value is written first, the pin's edge then
    moves no output; its supply energy from the edge until the current is quiet again."""
    cell = config.cell(point.cell)
    window = sequential.settle_window(config, deck)
    bench = Timeline(config, cell, window, (point.slew, min(cell.grid.slew)))
    state = stored_value(cell, point)
    waves, event = _waves(bench, point, state)
    result, runs = _run(config, deck, bench, point, waves, event)
    t = result.vectors["time"]
    during = t >= event.start
    _outputs_held(config, deck, result.vectors, during, state)
    switch = single_crossing(
        t[during],
        result.vectors[deck.input_node(point.related)][during],
        bench.thr.delay_input(point.input_edge) * bench.vdd,
        point.input_edge,
        f"input {point.related}",
    )
    side = dict(point.side)
    after = {**side, point.related: point.input_edge == "rise"}
    before = {**side, point.related: point.input_edge != "rise"}
    static = (
        ffpower.state_current(config, deck, state, before, window),
        ffpower.state_current(config, deck, state, after, window),
    )
    current = -result.vectors[f"{deck.supply}#branch"]
    what = f"the {point.related} edge"
    settled = ffpower.quiet_end(config, t, current, event, switch, static, what)
    energy = ffpower.window_energy(bench.vdd, t, current, event.start, switch, static, settled)
    in_branch = result.vectors[f"{deck.input_source(point.related)}#branch"]
    charge = -integral(t, in_branch, event.start, settled)
    return ToggleMeasurement(point, energy, charge, runs, result.seconds, settled)


def _waves(bench: Timeline, point: TogglePoint, state: bool) -> tuple[dict[str, Wave], Ramp]:
    """The inputs' waves of the hidden event and the ramp of the edge under test."""
    cell, flop = bench.cell, bench.cell.flip_flop
    side = dict(point.side)
    inactive = point.input_edge != flop.edge
    if point.related == flop.clock and inactive and side != capture_values(cell, state):
        return _inactive_clock_waves(bench, point, state)
    if point.related == flop.clock:
        clock, second = bench.clock(point.slew, edges=2)
        waves = {p: stimulus.constant(ffpower.level(bench.config, v)) for p, v in side.items()}
        waves[flop.clock] = clock
        if point.input_edge == flop.edge:
            return waves, second
        # The first inactive edge: half a period after the edge that wrote the state.
        back = bench.ramp(point.slew, point.input_edge)
        return waves, back.moved(bench.lead + bench.half)
    return _data_waves(bench, point, state)


def _inactive_clock_waves(
    bench: Timeline, point: TogglePoint, state: bool
) -> tuple[dict[str, Wave], Ramp]:
    """The data opposite the stored value: it moves there while the clock is still active
    after writing the state, then the inactive edge under test."""
    cell, flop = bench.cell, bench.cell.flip_flop
    active = flop.edge == "rise"
    waves, move = ffpower.hold_waves(bench, state, {**dict(point.side), flop.clock: active})
    event = bench.ramp(point.slew, point.input_edge).moved(move + bench.half)
    first = bench.ramp(min(cell.grid.slew), flop.edge)
    waves[flop.clock] = bench.pulse(
        *first.levels,
        bench.lead,
        first.duration,
        event.duration,
        event.start - bench.lead - first.duration,
        2.0,
    )
    return waves, event


def _data_waves(bench: Timeline, point: TogglePoint, state: bool) -> tuple[dict[str, Wave], Ramp]:
    """A data pin's edge that the clock does not capture."""
    cell = bench.cell
    before = point.input_edge == "fall"
    waves, move = ffpower.hold_waves(bench, state, {**dict(point.side), point.related: before})
    event = bench.ramp(point.slew, point.input_edge).moved(move + bench.half)
    written = capture_values(cell, state)[point.related]
    if written == before:
        waves[point.related] = event.pulse()
    else:  # to ``before`` with the other data, then the edge under test back again
        first = bench.ramp(min(cell.grid.slew), "rise" if before else "fall")
        flat = event.start - move - first.duration
        waves[point.related] = bench.pulse(
            *event.levels[::-1], move, first.duration, event.duration, flat, 2.0
        )
    return waves, event


def _run(
    config: LibraryConfig,
    deck: Deck,
    bench: Timeline,
    point: TogglePoint,
    waves: dict[str, Wave],
    event: Ramp,
) -> tuple[Result, int]:
    """The transient of the hidden event, run past it by the settle window."""
    cell = bench.cell
    stop = event.end + bench.window
    outputs = [deck.output_node(o.pin) for o in cell.outputs]
    in_branch = f"{deck.input_source(point.related)}#branch"
    grid = ffpower.event_grid(event, bench.window)
    max_step = sequential.run_step(config, point.slew, min(cell.grid.slew))
    request = Request(
        deck,
        alters(deck, cell, waves, {o.pin: point.load for o in cell.outputs}, grid),
        f"tran {max_step:.6g} {stop:.6g} 0 {max_step:.6g}",
        (*outputs, deck.input_node(point.related), in_branch, f"{deck.supply}#branch"),
    )
    return simulate(backend_for(config), request)


def _outputs_held(
    config: LibraryConfig,
    deck: Deck,
    vectors: Mapping[str, np.ndarray],
    during: np.ndarray,
    state: bool,
) -> None:
    """Raise when an output leaves the stored value's level after the event starts."""
    cell = config.cell(deck.cell)
    for o in cell.outputs:
        v = vectors[deck.output_node(o.pin)]
        want = ffpower.level(config, stored_output(cell, o.pin, state))
        moved = float(np.max(np.abs(v[during] - want)))
        if moved > LOGIC_MARGIN * config.process.vdd:
            raise MeasurementError(
                f"output {o.pin} leaves its stored level {want:.4g} V by {moved:.4g} V: not an "
                "event that leaves the outputs alone"
            )
