"""The driver stage's measurer: the library's driver chain simulated, its output edges
normalised into the input shape (``config.shapes``) every point of the run then uses.

Each input edge runs twice: a coarse run finds how long the output's edge takes between the
slew thresholds, a fine run samples that edge SAMPLES times over; the output must leave its
rail, cross each threshold once and come within CUT / 2 of the other rail.
"""

from __future__ import annotations

from charflow.config.library import LibraryConfig
from charflow.config.shapes import CUT, normalise
from charflow.measurement.combinational import backend_for, simulate
from charflow.measurement.waves import KeepWaveform, check_settled, single_crossing, waveform
from charflow.records.outcomes import ShapeResult
from charflow.records.points import ShapePoint
from charflow.simulation import stimulus
from charflow.simulation.backends import Request, Result
from charflow.simulation.netlist import CHAIN_OUTPUT, CHAIN_SOURCE, Deck, chain_stages

COARSE = 50  # samples over the input ramp in the first run
SAMPLES = 400  # samples between the output's slew thresholds in the fine run
WINDOW = 100.0  # input ramp durations the run may last past the ramp (a cap)


def measure_shape(config: LibraryConfig, deck: Deck, point: ShapePoint) -> ShapeResult:
    """The driver's normalised rise and fall: each from the input edge that makes it."""
    stages = chain_stages(config, config.input_shape)
    inverting = sum(s.inverting for s in stages) % 2 == 1
    found: dict[str, tuple[tuple[float, float], ...]] = {}
    runs, seconds = 0, 0.0
    for in_edge in ("rise", "fall"):
        out_edge = ("fall" if in_edge == "rise" else "rise") if inverting else in_edge
        corners, n, s = _edge(config, deck, point, in_edge, out_edge)
        found[out_edge] = corners
        runs, seconds = runs + n, seconds + s
    return ShapeResult(point, found["rise"], found["fall"], runs, seconds)


def _edge(
    config: LibraryConfig, deck: Deck, point: ShapePoint, in_edge: str, out_edge: str
) -> tuple[tuple[tuple[float, float], ...], int, float]:
    """One output edge normalised, with the simulations and their seconds it took."""
    vdd, thr = config.process.vdd, config.thresholds
    ramp = stimulus.ramp(point.slew, in_edge, thr, vdd)  # a linear ramp into the first cell
    rising = out_edge == "rise"
    near = CUT / 2 * vdd
    settled = (
        f"v({CHAIN_OUTPUT}) > {vdd - near:.6g}" if rising else f"v({CHAIN_OUTPUT}) < {near:.6g}"
    )
    window = config.simulation.window or WINDOW * ramp.duration
    stop = ramp.end + window
    commands = stimulus.set_source(CHAIN_SOURCE, ramp.pulse())
    what = f"driver output ({out_edge})"
    step = ramp.duration / COARSE
    runs, seconds = 0, 0.0
    result: Result | None = None
    saved = KeepWaveform(
        lambda: waveform(result.vectors if result else {}, {"driver": CHAIN_OUTPUT})
    )
    for _ in range(2):
        request = Request(
            deck,
            commands,
            f"tran {step:.6g} {stop:.6g} 0 {step:.6g}",
            (CHAIN_OUTPUT,),
            stop_when=f"{settled} when time > {ramp.end:.12g}",
        )
        result, attempts = simulate(backend_for(config), request)
        runs, seconds = runs + attempts, seconds + result.seconds
        t, v = result.vectors["time"], result.vectors[CHAIN_OUTPUT]
        with saved:
            check_settled(v, vdd if rising else 0.0, near, out_edge, what, window)
            lo, hi = (
                single_crossing(t, v, f * vdd, out_edge, what) for f in thr.slew_band(out_edge)
            )
        step = abs(hi - lo) / SAMPLES
    progress = v / vdd if rising else 1.0 - v / vdd
    level = thr.delay_input(out_edge)
    keep = (level if rising else 1.0 - level,)
    corners = normalise(t.tolist(), progress.tolist(), out_edge, thr.slew_band(out_edge), keep)
    return corners, runs, seconds
