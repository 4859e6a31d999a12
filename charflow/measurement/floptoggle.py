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
    """One hidden event of a flop: from the flop holding the stored value with every input at
    its level before the edge (``_start``), the pin's edge moves no output; its supply energy
    from the edge until the current is quiet again."""
    cell = config.cell(point.cell)
    window = sequential.settle_window(config, deck)
    bench = Timeline(config, cell, window, (point.slew, min(cell.grid.slew)))
    state = stored_value(cell, point)
    start, runs, seconds = _start(deck, bench, point, state)
    event = bench.ramp(point.slew, point.input_edge).moved(bench.lead)
    waves = {p: stimulus.constant(ffpower.level(config, v)) for p, v in _before(point).items()}
    waves[point.related] = event.pulse()
    result, event_runs = _run(config, start, bench, point, waves, event)
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
    runs, seconds = runs + event_runs, seconds + result.seconds
    return ToggleMeasurement(point, energy, charge, runs, seconds, settled)


def _before(point: TogglePoint) -> dict[str, bool]:
    """Every input's value just before the hidden event's edge (the clock's too)."""
    return {**dict(point.side), point.related: point.input_edge == "fall"}


def _start(deck: Deck, bench: Timeline, point: TogglePoint, state: bool) -> tuple[Deck, int, float]:
    """The testbench the hidden event's run starts on: the flop holding ``state`` (written
    by an active edge, ``heldstate``) with every input at its level before the edge."""
    return sequential.held_state(
        bench, deck, state, capture_values(bench.cell, state), _before(point)
    )


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
