"""A flip-flop's hidden-power runs: a clock edge that stores nothing new, or a data edge that is
not captured; the energy measured like an event's (``ffpower``), on the flip-flop's timeline
(``sequential``)."""

from __future__ import annotations

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
from charflow.simulation.backends import Request
from charflow.simulation.netlist import Deck
from charflow.simulation.stimulus import Ramp
from charflow.simulation.timeline import Timeline


def measure_toggle(config: LibraryConfig, deck: Deck, point: TogglePoint) -> ToggleMeasurement:
    """One hidden event of a flop: the stored value is written first, the pin's edge then
    moves no output; its supply energy from the edge until the current is quiet again."""
    cell = config.cell(point.cell)
    flop = cell.flip_flop
    window = sequential.settle_window(config, deck)
    bench = Timeline(config, cell, window, (point.slew, min(cell.grid.slew)))
    vdd, thr = bench.vdd, bench.thr
    side = dict(point.side)
    state = stored_value(cell, point)
    inactive = point.input_edge != flop.edge
    if point.related == flop.clock and inactive and side != capture_values(cell, state):
        # The data opposite the stored value: it moves there while the clock is still active
        # after writing the state, then the inactive edge under test.
        active = flop.edge == "rise"
        waves, move = ffpower._hold_waves(bench, state, {**side, flop.clock: active})
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
        waves = {p: stimulus.constant(ffpower._level(config, v)) for p, v in side.items()}
        waves[flop.clock] = clock
        if point.input_edge == flop.edge:
            event = second
        else:  # the first inactive edge: half a period after the edge that wrote the state
            back = stimulus.ramp(point.slew, point.input_edge, thr, vdd)
            event = Ramp(back.edge, bench.lead + bench.half, back.duration, vdd)
    else:
        before = point.input_edge == "fall"
        waves, move = ffpower._hold_waves(bench, state, {**side, point.related: before})
        go = stimulus.ramp(point.slew, point.input_edge, thr, vdd)
        event = Ramp(go.edge, move + bench.half, go.duration, vdd)
        written = capture_values(cell, state)[point.related]
        if written == before:
            waves[point.related] = event.pulse()
        else:  # to ``before`` with the other data, then the edge under test back again
            first = stimulus.ramp(min(cell.grid.slew), "rise" if before else "fall", thr, vdd)
            flat = event.start - move - first.duration
            waves[point.related] = stimulus.pulse_vector(
                *event.levels[::-1], move, first.duration, event.duration, flat, 2.0
            )
    stop = event.end + bench.window
    outputs = {o.pin: deck.output_node(o.pin) for o in cell.outputs}
    supply = f"{deck.supply}#branch"
    in_branch = f"{deck.input_source(point.related)}#branch"
    grid = ffpower.event_grid(event, bench.window)
    max_step = sequential.run_step(config, point.slew, min(cell.grid.slew))
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
        want = ffpower._level(config, stored_output(cell, pin, state))
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
        ffpower.state_current(config, deck, state, before_vector, window),
        ffpower.state_current(config, deck, state, after, window),
    )
    current = -result.vectors[supply]
    settled = ffpower._quiet_end(
        config, t, current, event, switch, static, f"the {point.related} edge"
    )
    energy = ffpower._window_energy(vdd, t, current, event.start, switch, static, settled)
    charge = -integral(t, result.vectors[in_branch], event.start, settled)
    return ToggleMeasurement(point, energy, charge, runs, result.seconds, settled)
