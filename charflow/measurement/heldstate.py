"""A flip-flop's held state as the start of a clock point's run (``sequential._clock_run``) and
of a constraint search's trials (``sequential._held_start``).

A clock point's run wrote the old value into the flop with a first active edge and waited
half a period for it to settle before the parts that are measured. The state it waited for
is an operating point of the same circuit: the clock at its active level, the other inputs
still, the flop holding the value. It is found once per worker, cell and state by the run
that writes it (every node's voltage at its quiet end) and written into a copy of the
testbench as ``.nodeset`` cards, every node by ngspice's own name (``xdut.n5``), so a user's
netlist needs no names known in advance. A run of that copy starts at the operating point
Newton's method finds from those voltages: the held state, settled exactly.
"""

from __future__ import annotations

import hashlib
import re
from dataclasses import replace

from charflow.config.library import LibraryConfig
from charflow.measurement.combinational import LOGIC_MARGIN, alters, backend_for, simulate
from charflow.measurement.waves import KeepWaveform, waveform
from charflow.plan.arcs import stored_output
from charflow.records.errors import MeasurementError
from charflow.records.units import show_time
from charflow.simulation import stimulus
from charflow.simulation.backends import Request, node_names
from charflow.simulation.netlist import Deck
from charflow.simulation.session import SESSION, BoundedCache
from charflow.simulation.timeline import Timeline

# Decimals (V) the written voltages keep in the ``.nodeset`` cards: Newton's method finds the
# operating point from them exactly, and both backends (the batch one prints 8 digits) write
# the same testbench.
NODESET_DECIMALS = 4

_CARDS: BoundedCache[tuple, Deck] = SESSION.cache("held states' cards")
_HELD: BoundedCache[tuple, Deck] = SESSION.cache("held states")


def held_deck(
    config: LibraryConfig,
    deck: Deck,
    bench: Timeline,
    state: bool,
    levels: dict[str, bool],
    step: float,
    then: dict[str, bool] | None = None,
) -> tuple[Deck, int, float]:
    """The testbench whose runs start with the flop holding ``state``, the clock at its
    active level and the other inputs at ``levels``; or with every input (the clock too) at
    ``then`` (the latch that captures open, or closed on what was written: a state Newton's
    method finds from the cards as well). Each start is checked once (``_check_holds``).
    With the simulations and simulator seconds spent finding it (none once this worker has
    it). ``step``: the largest step of the run that writes it (``sequential.held_state``)."""
    flop = bench.cell.flip_flop
    start = {**levels, flop.clock: flop.edge == "rise"} if then is None else then
    settings = (config.thresholds, config.simulation, config.input_shape)
    key = (deck.key, state, tuple(sorted(levels.items())), bench.window, step, *settings)
    checked = (*key, tuple(sorted(start.items())))
    if checked in _HELD:
        return _HELD[checked], 0, 0.0
    runs, seconds = 0, 0.0
    if key not in _CARDS:
        _CARDS[key], runs, seconds = _carded(config, deck, bench, state, levels, step)
    held = _CARDS[key]
    runs_op, seconds_op = _check_holds(config, held, bench, state, start)
    _HELD[checked] = held
    return held, runs + runs_op, seconds + seconds_op


def _carded(
    config: LibraryConfig,
    deck: Deck,
    bench: Timeline,
    state: bool,
    levels: dict[str, bool],
    step: float,
) -> tuple[Deck, int, float]:
    """A copy of ``deck`` with the written state's voltages as ``.nodeset`` cards, keyed
    by its text; with the simulations and seconds the writing run took."""
    written, runs, seconds = _written(config, deck, bench, state, levels, step)
    cards = "".join(f".nodeset v({n})={v:.{NODESET_DECIMALS}f}\n" for n, v in written.items())
    text = re.sub(r"^\.end\s*\Z", cards + ".end\n", deck.text, flags=re.M)
    key_text = f"{deck.key}\n{text}"
    held = replace(deck, text=text, key=hashlib.sha256(key_text.encode()).hexdigest())
    return held, runs, seconds


def _written(
    config: LibraryConfig,
    deck: Deck,
    bench: Timeline,
    state: bool,
    levels: dict[str, bool],
    step: float,
) -> tuple[dict[str, float], int, float]:
    """Every node's voltage (but the testbench's sources') once one active clock edge at the
    grid's sharpest slew has written ``state`` and the settle window has passed."""
    cell = bench.cell
    waves = {p: stimulus.constant(bench.level(v)) for p, v in levels.items()}
    waves[cell.flip_flop.clock], edge = bench.clock(min(cell.grid.slew), edges=1)
    outputs = {o.pin: deck.output_node(o.pin) for o in cell.outputs}
    nodes = {**outputs, **{p: deck.input_node(p) for p in waves}}  # kept if it fails
    stop = edge.end + bench.window
    tran = f"tran {step:.6g} {stop:.6g} 0 {step:.6g}"
    request = Request(
        deck, alters(deck, cell, waves, {}), tran, tuple(nodes.values()), every_node=True
    )
    result, runs = simulate(backend_for(config), request)
    # The cell's own nodes are named through its instance (``xdut.n5``); its outputs are the
    # only ports no source drives.
    kept = [n for n in node_names(tuple(result.vectors)) if "." in n or n in outputs.values()]
    written = {n: float(result.vectors[n][-1]) for n in sorted(kept)}
    what = (
        f"after the clock's active edge with {_levels(levels)} and "
        f"{show_time(bench.window, config.time_unit)} of settling"
    )
    with KeepWaveform(lambda: waveform(result.vectors, nodes)):
        _check_outputs(config, cell.name, state, {o: written[n] for o, n in outputs.items()}, what)
    return written, runs, result.seconds


def _check_holds(
    config: LibraryConfig,
    held: Deck,
    bench: Timeline,
    state: bool,
    inputs: dict[str, bool],
) -> tuple[int, float]:
    """Raise unless the held testbench's operating point (every input, the clock too, at
    ``inputs``) has every output at its stored value; the simulations and seconds."""
    cell = bench.cell
    waves = {p: stimulus.constant(bench.level(v)) for p, v in inputs.items()}
    outputs = {o.pin: held.output_node(o.pin) for o in cell.outputs}
    request = Request(held, alters(held, cell, waves, {}), "op", tuple(outputs.values()))
    result, runs = simulate(backend_for(config), request)
    found = {o: float(result.vectors[n][-1]) for o, n in outputs.items()}
    what = (
        "at the operating point found from the written state's voltages (.nodeset cards) "
        f"with {_levels(inputs)}"
    )
    _check_outputs(config, cell.name, state, found, what)
    return runs, result.seconds


def _check_outputs(
    config: LibraryConfig, cell_name: str, state: bool, found: dict[str, float], what: str
) -> None:
    """Raise unless every output in ``found`` (pin -> V) is at its value for ``state``."""
    cell, vdd = config.cell(cell_name), config.process.vdd
    for pin, v in found.items():
        want = stored_output(cell, pin, state)
        if abs(v - (vdd if want else 0.0)) > LOGIC_MARGIN * vdd:
            raise MeasurementError(
                f"the flop's held state (stored {int(state)}) could not be established: "
                f"{what}, output {pin} is at {v:.4g} V, not {int(want)}. Clock points and "
                "setup, hold, recovery and removal searches start from this state: check "
                "that the netlist stores the value next_state "
                f"({cell.flip_flop.next_state.to_liberty()}) gives (or an asserted clear or "
                "preset forces) and holds it with the clock at its active level, or "
                "lengthen [simulation] window if the flop settles slowly",
                cell=cell_name,
                pin=cell.flip_flop.clock,
            )


def _levels(levels: dict[str, bool]) -> str:
    return ", ".join(f"{p} at {int(v)}" for p, v in levels.items()) or "no other inputs"
