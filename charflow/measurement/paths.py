"""Simulating a whole circuit of cells (``records.paths``) at transistor level, and measuring
when every node of interest crossed its thresholds.

The circuit's input port gets the same input edge a table point gets (``stimulus.ramp``: the
library's input shape, a driver's measured edge or the linear ramp, at the path's slew); every
other node is driven by the cells themselves, so each stage sees the waveform and the load a
real gate makes. The run is as long as the driver asks (``PathPoint.stop``, from the tables'
prediction with a margin); a node that has not settled by then is an error, never a number.
"""

from __future__ import annotations

import numpy as np

from charflow.config.library import LibraryConfig
from charflow.measurement.combinational import LOGIC_MARGIN, backend_for, simulate
from charflow.measurement.waves import (
    KeepWaveform,
    integral,
    single_crossing,
    transition,
    waveform,
)
from charflow.records.errors import MeasurementError
from charflow.records.outcomes import PathMeasurement
from charflow.records.points import PathPoint
from charflow.simulation import stimulus
from charflow.simulation.backends import Request
from charflow.simulation.netlist import Deck


def measure_path(config: LibraryConfig, deck: Deck, point: PathPoint) -> PathMeasurement:
    """Run the circuit once with its input port driven by the library's input edge (the
    shape the tables were measured with); measure every node of ``point``."""
    vdd = config.process.vdd
    ramp = stimulus.ramp(point.slew, point.input_edge, config.thresholds, vdd, config.input_shape)
    commands = stimulus.set_source(deck.input_source(point.start), ramp.pulse())
    nodes = tuple(dict.fromkeys(node for node, _ in point.nodes))
    currents = tuple(f"{source}#branch" for source, _ in point.probes)
    analysis = f"tran {point.step:.6g} {max(point.stop, ramp.end):.6g} 0 {point.step:.6g}"
    request = Request(deck, commands, analysis, (*nodes, *currents))
    result, runs = simulate(backend_for(config), request)
    t = result.vectors["time"]
    saved = KeepWaveform(lambda: waveform(result.vectors, {n: n for n in nodes}))
    at_input, at_output, slews = [], [], []
    with saved:
        for node, edge in point.nodes:
            t_in, t_out, slew = _node_edge(config, t, result.vectors[node], node, edge)
            at_input.append(t_in)
            at_output.append(t_out)
            slews.append(slew)
        edges = dict(point.nodes)
        charges = tuple(
            _pin_charges(config, t, result.vectors[node], result.vectors[i], node, edges[node])
            for (_, node), i in zip(point.probes, currents, strict=True)
        )
    return PathMeasurement(
        point, tuple(at_input), tuple(at_output), tuple(slews), runs, result.seconds, charges
    )


def _pin_charges(
    config: LibraryConfig, t: np.ndarray, v: np.ndarray, i: np.ndarray, node: str, edge: str
) -> tuple[float, float, float]:
    """The charge (C) a probe's current carried into its pin over the run, up to its net's
    input delay-threshold crossing, and between the net's slew-threshold crossings."""
    vdd, thr = config.process.vdd, config.thresholds
    what = f"node {node}"
    t_in = single_crossing(t, v, thr.delay_input(edge) * vdd, edge, what)
    band = [single_crossing(t, v, f * vdd, edge, what) for f in thr.slew_band(edge)]
    return integral(t, i), integral(t, i, None, t_in), integral(t, i, min(band), max(band))


def _node_edge(
    config: LibraryConfig, t: np.ndarray, v: np.ndarray, node: str, edge: str
) -> tuple[float, float, float]:
    """A node's input- and output-threshold crossings and its transition, once it is found
    to leave the right rail and to settle at the other."""
    vdd = config.process.vdd
    thr = config.thresholds
    final = vdd if edge == "rise" else 0.0
    what = f"node {node}"
    if abs(v[0] - (vdd - final)) > LOGIC_MARGIN * vdd:
        raise MeasurementError(
            f"{what} starts at {v[0]:.4g} V, not at {vdd - final:.4g} V: the circuit's side "
            "inputs do not hold it where the functions say"
        )
    if abs(v[-1] - final) > config.simulation.settle * vdd * (1 + 1e-6):
        raise MeasurementError(
            f"{what} is at {v[-1]:.4g} V when the run ends at {t[-1]:.4g} s, not settled at "
            f"{final:.4g} V"
        )
    t_in = single_crossing(t, v, thr.delay_input(edge) * vdd, edge, what)
    t_out = single_crossing(t, v, thr.delay_output(edge) * vdd, edge, what)
    raw = transition(t, v, vdd, thr.slew_band(edge), edge, what)
    return t_in, t_out, raw / thr.slew_derate
