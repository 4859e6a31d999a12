"""Power: internal switching energy per arc, hidden energy of input toggles, leakage per state.

Internal energy of a timing point is measured by ``timing.measure_point`` (the supply's energy
beyond its static draw, less what the external loads took); here it becomes tables. A toggle
is an input edge that changes no output (NAND2's IA while IB = 0): the supply energy it costs
is Liberty's hidden power, kept on the input pin. Leakage is the supply's DC power per input
vector. Everything is SI here (J, W); the Liberty writer converts.

Leakage is the devices' own, not the simulator's: ngspice puts its gmin (1e-12 S unless told
otherwise) across every pn junction of every device, MOS bulk junctions included, so each
junction reverse-biased by vdd draws gmin·vdd that no device draws, 1.44 pW at 1.2 V: more than
a whole cell's device leakage on a low-leakage process. Leakage runs therefore set gmin to
``LEAKAGE_GMINS[0]``, far below any device's off conductance (0.03 pW at 1.2 V is 2e-14 S); what
it still adds is gmin·vdd² per junction, 1.4e-18 W at 1.2 V. Taking the gmin current off instead
would need every junction's voltage, which only the models know. A state whose operating point
does not converge there is tried at the next, larger gmin, with a warning naming it; the gmin
a value was measured with is kept beside it.

A toggle has no output edge to end its run. Its energy window ends once the input ramp is
over and the supply current has come back to the static current within ``simulation.settle``
of its largest excursion; the run lasts the ramp and a tail of ``TOGGLE_TAIL`` ramp durations,
doubled up to ``TOGGLE_EXTENSIONS`` times until the current is quiet over the tail's second
half. A toggle that never gets quiet is not measurable: it is reported, never tabulated. What a
floating node between series devices draws later, relaxing toward its DC state at a small
fraction of the switching current, is the state's leakage, not the toggle's energy.
"""

from __future__ import annotations

import itertools
import logging
from dataclasses import replace

import numpy as np

from charflow.config.library import LibraryConfig, Thresholds
from charflow.measurement.combinational import (
    LOGIC_MARGIN,
    alters,
    backend_for,
    simulate,
    static_current,
)
from charflow.measurement.stepsize import RAMP_SAMPLES
from charflow.measurement.waves import (
    KeepWaveform,
    integral,
    single_crossing,
    supply_energy,
    waveform,
)
from charflow.records import logic
from charflow.records.errors import (
    DeckReadError,
    MeasurementError,
    SimulatorError,
    SimulatorHungError,
)
from charflow.records.outcomes import LeakageState, ToggleMeasurement
from charflow.records.points import TogglePoint
from charflow.simulation import stimulus
from charflow.simulation.backends import Request, Result
from charflow.simulation.netlist import Deck

log = logging.getLogger("charflow")

TOGGLE_TAIL = 4.0  # ramp durations after the ramp, before any extension
TOGGLE_EXTENSIONS = 3
# S: gmin of leakage runs, smallest first; the last is ngspice's default, a last resort whose
# values hold the gmin current (see the module's text).
LEAKAGE_GMINS = (1e-18, 1e-15, 1e-12)

# power_lut_template's variables: the input slew, the output's load and, on a two-output
# cell, the other output's load.


def measure_toggle(config: LibraryConfig, deck: Deck, point: TogglePoint) -> ToggleMeasurement:
    cell = config.cell(point.cell)
    vdd = config.process.vdd
    thr = config.thresholds
    ramp = stimulus.ramp(point.slew, point.input_edge, thr, vdd, config.input_shape)
    values: dict[str, stimulus.Wave]
    values = {p: stimulus.constant(vdd if v else 0.0) for p, v in point.side}
    values[point.related] = ramp.pulse()
    commands = alters(deck, cell, values, {o.pin: point.load for o in cell.outputs})
    outputs = {o.pin: deck.output_node(o.pin) for o in cell.outputs}
    in_node = deck.input_node(point.related)
    in_branch = f"{deck.input_source(point.related)}#branch"
    supply = f"{deck.supply}#branch"
    final = {**dict(point.side), point.related: point.input_edge == "rise"}
    after = static_current(config, deck, final)
    max_step = ramp.duration / RAMP_SAMPLES
    backend = backend_for(config)
    tail = TOGGLE_TAIL * ramp.duration
    runs = 0
    seconds = 0.0
    saved = KeepWaveform(lambda: waveform(result.vectors, {**outputs, point.related: in_node}))
    for extension in range(TOGGLE_EXTENSIONS + 1):
        stop = ramp.end + tail
        request = Request(
            deck,
            commands,
            f"tran {max_step:.6g} {stop:.6g} 0 {max_step:.6g}",
            (*outputs.values(), in_node, in_branch, supply),
        )
        result, attempts = simulate(backend, request)
        runs += attempts
        seconds += result.seconds
        t = result.vectors["time"]
        with saved:
            t_in = _toggle_input_time(result, point, outputs, in_node, thr, vdd)
        current = -result.vectors[supply]
        static = (float(current[0]), after)
        settled, excess = _settle_time(config, t, current, t_in, static, ramp.end)
        if settled <= ramp.end + tail / 2:
            break
        if extension == TOGGLE_EXTENSIONS:
            raise MeasurementError(
                f"supply current has not settled {tail:.4g} s after the input ramp: "
                f"{excess[-1]:.4g} A above its static value at the end, "
                f"{excess.max():.4g} A at most",
                waveform=saved.capture(),
            )
        tail *= 2.0
    energy = supply_energy(t, current, vdd, t_in, static, settled)
    # The source's branch current flows into its + node from outside: charge into the pin is −∫i.
    charge = -integral(t, result.vectors[in_branch], ramp.start)
    return ToggleMeasurement(point, energy, charge, runs, seconds, settled)


def _toggle_input_time(
    result: Result,
    point: TogglePoint,
    outputs: dict[str, str],
    in_node: str,
    thr: Thresholds,
    vdd: float,
) -> float:
    """When the toggling input crosses its delay threshold, once every output is found to
    stay where it was (else it is not a toggle)."""
    t = result.vectors["time"]
    for pin, node in outputs.items():
        v = result.vectors[node]
        if abs(v[-1] - v[0]) > LOGIC_MARGIN * vdd:
            raise MeasurementError(
                f"output {pin} moves from {v[0]:.4g} V to {v[-1]:.4g} V: "
                f"not a toggle that leaves the outputs alone"
            )
    return single_crossing(
        t,
        result.vectors[in_node],
        thr.delay_input(point.input_edge) * vdd,
        point.input_edge,
        f"input {point.related}",
    )


def _settle_time(
    config: LibraryConfig,
    t: np.ndarray,
    current: np.ndarray,
    t_in: float,
    static: tuple[float, float],
    ramp_end: float,
) -> tuple[float, np.ndarray]:
    """When the supply current last strayed from its static value (before / after the input
    crossing) by more than ``simulation.settle`` of its largest excursion, never before the
    ramp ends; and the per-step excess that was judged."""
    # Per step, the mean of its two samples: what the trapezoid integrates, and free of the
    # sample-to-sample ringing trapezoidal integration leaves on a source's current.
    excess = current - np.where(t < t_in, static[0], static[1])
    excess = np.abs(excess[1:] + excess[:-1]) / 2
    last_loud = np.flatnonzero(excess > config.simulation.settle * excess.max())[-1]
    return max(ramp_end, float(t[last_loud + 1])), excess


def leakage_run(config: LibraryConfig, request: Request, vector: str) -> tuple[Result, float]:
    """Run a leakage ``request`` at the smallest of ``LEAKAGE_GMINS`` that converges; return
    the result and that gmin. ``vector`` names the state in messages."""
    backend = backend_for(config)
    cell = request.deck.cell
    failed: dict[float, str] = {}
    for gmin in LEAKAGE_GMINS:
        try:
            result = backend.run(replace(request, options=(*request.options, f"gmin={gmin:g}")))
        except (DeckReadError, SimulatorHungError):
            raise  # no gmin can help
        except SimulatorError as exc:
            failed[gmin] = exc.reason
            continue
        if failed:
            log.warning(
                "cell %s, vector %s: leakage measured with gmin %g S, which adds up to %.3g W "
                "per reverse-biased junction (%s)",
                cell,
                vector,
                gmin,
                gmin * config.process.vdd**2,
                _tried(failed),
            )
        return result, gmin
    raise SimulatorError(
        f"no leakage: the simulator does not converge with any gmin ({_tried(failed)}); "
        "check the models and the cell at this input vector",
        cell=cell,
        vector=vector,
    )


def _tried(failed: dict[float, str]) -> str:
    return "; ".join(f"gmin {g:g} S: {reason}" for g, reason in failed.items())


def leakage(config: LibraryConfig, deck: Deck) -> tuple[LeakageState, ...]:
    """The supply's DC power (W) of a combinational cell for every input vector, in counting
    order, at a gmin that adds no leakage of its own."""
    cell = config.cell(deck.cell)
    vdd = config.process.vdd
    supply = f"{deck.supply}#branch"
    states = []
    for bits in itertools.product((False, True), repeat=len(cell.inputs)):
        assign = tuple(zip(cell.inputs, bits, strict=True))
        when = logic.when_condition(assign)
        values = {p: stimulus.constant(vdd if b else 0.0) for p, b in assign}
        request = Request(deck, alters(deck, cell, values, {}), "op", (supply,))
        result, gmin = leakage_run(config, request, when)
        # A source's branch current flows into its + node from outside: out of it is −i.
        states.append(LeakageState(when, -vdd * float(result.vectors[supply][-1]), gmin))
    return tuple(states)
