"""The first maximum step of a point's transient, from an estimate of its output transition.

A step sized by the input ramp alone is wrong at both ends of a grid: a fast ramp into a
heavy load puts hundreds of samples on a slow output edge, and a slow ramp into a light load
puts too few on a fast one, which costs a second, refined run. So each series of points (one
arc, state and input edge of a cell, across the grid) is calibrated once per worker with
three probe measurements at the grid's corners — the smallest slew at the smallest and the
largest load, the largest slew at the smallest load — and the output transition of any point
of the series is estimated as

    T(r, C) = T0 + k (C - C0) + b (r - r0)

with r the input ramp's duration (r0 at the smallest slew): a linear growth with the load for
a fast input, plus a share of the ramp for a slower one (on the demo's grid the estimate lies
within 0.8 and 1.2 times the measured transition). The first step is T / samples_per_edge.
``timing.measure_point`` still refines the step when the samples on the edge fall short, so
the estimate decides the cost of a point, not its accuracy; and since the probes depend on the
series alone, every point's value still depends on the point alone, whatever the chunking or
the worker count. The probes are measurements of the corner points themselves and stand as
their results.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import TYPE_CHECKING

from charflow.config.library import LibraryConfig
from charflow.execution.sweep import TimingPoint
from charflow.records.errors import MeasurementError, SimulatorError, SimulatorHungError
from charflow.simulation import stimulus
from charflow.simulation.netlist import Deck

if TYPE_CHECKING:
    from charflow.measurement.combinational import Measurement

PROBE_SAMPLES = 2.0  # first step of the later probes: the first probe's transition / this


@dataclass(frozen=True, slots=True)
class EdgeModel:
    """The output transition of one series, as the probes measured it (SI units)."""

    base: float  # s, transition at the smallest slew and load
    base_ramp: float  # s, the input ramp's duration at the smallest slew
    base_load: float  # F, the smallest load
    per_farad: float  # s/F, growth with load at the smallest slew
    per_ramp: float  # s of transition per s of input ramp, at the smallest load

    def transition(self, ramp: float, load: float) -> float:
        return (
            self.base
            + self.per_farad * (load - self.base_load)
            + self.per_ramp * (ramp - self.base_ramp)
        )


# Per series: its model (None when a probe failed) and its probes' measurements by (slew, load).
_SERIES: dict[tuple, tuple[EdgeModel | None, dict[tuple[float, float], Measurement]]] = {}


def plain_step(config: LibraryConfig, point: TimingPoint) -> float:
    """The step the input ramp alone suggests; the reference rule, and the fallback."""
    from charflow.measurement.combinational import RAMP_SAMPLES

    ramp = stimulus.ramp(point.slew, point.input_edge, config.thresholds, config.process.vdd)
    return ramp.duration / RAMP_SAMPLES


def _series(config: LibraryConfig, deck: Deck, point: TimingPoint) -> tuple:
    # Everything the probes depend on: the testbench, the grid's corners, how points are run.
    key = (
        deck.key,
        replace(point, slew=0.0, load=0.0),
        config.cell(point.cell).grid,
        config.thresholds,
        config.simulation,
    )
    if key not in _SERIES:
        _SERIES[key] = _calibrate(config, deck, point)
    return _SERIES[key]


def model_for(config: LibraryConfig, deck: Deck, point: TimingPoint) -> EdgeModel | None:
    """The transition model of ``point``'s series, calibrated on first use in this process;
    None when a probe fails."""
    return _series(config, deck, point)[0]


def probed(config: LibraryConfig, deck: Deck, point: TimingPoint) -> Measurement | None:
    """``point``'s measurement if it is one of its series' probes (a grid corner): a probe is
    a measurement of that point like any other, so it is not simulated twice."""
    return _series(config, deck, point)[1].get((point.slew, point.load))


def first_step(config: LibraryConfig, deck: Deck, point: TimingPoint) -> float:
    """The first maximum step for ``point``: its estimated transition / samples_per_edge."""
    model = model_for(config, deck, point)
    if model is None:
        return plain_step(config, point)
    thr = config.thresholds
    ramp = stimulus.ramp(point.slew, point.input_edge, thr, config.process.vdd).duration
    # The estimate is in raw (underated) seconds, as the simulator sees the edge.
    return model.transition(ramp, point.load) / config.simulation.samples_per_edge


def _calibrate(
    config: LibraryConfig, deck: Deck, point: TimingPoint
) -> tuple[EdgeModel | None, dict[tuple[float, float], Measurement]]:
    from charflow.measurement.combinational import measure_point

    grid = config.cell(point.cell).grid
    thr = config.thresholds
    vdd = config.process.vdd
    s0, s1 = grid.slew[0], grid.slew[-1]
    c0, c1 = grid.load[0], grid.load[-1]
    probes: dict[tuple[float, float], Measurement] = {}

    def probe(slew: float, load: float, step: float) -> float:
        corner = replace(point, slew=slew, load=load)
        probes[(slew, load)] = measure_point(config, deck, corner, step=step)
        return probes[(slew, load)].transition * thr.slew_derate

    try:
        t0 = probe(s0, c0, plain_step(config, replace(point, slew=s0)))
        # The other corners' edges are slower; measure_point refines the step if they are not.
        coarse = t0 / PROBE_SAMPLES
        t_load = probe(s0, c1, coarse) if c1 > c0 else t0
        t_slew = probe(s1, c0, coarse) if s1 > s0 else t0
    except SimulatorHungError:
        raise
    except (MeasurementError, SimulatorError):
        # The points themselves will report what is wrong; their first step stays plain.
        return None, {}
    r0, r1 = (stimulus.ramp(s, point.input_edge, thr, vdd).duration for s in (s0, s1))
    per_farad = max(t_load - t0, 0.0) / (c1 - c0) if c1 > c0 else 0.0
    per_ramp = max(t_slew - t0, 0.0) / (r1 - r0) if s1 > s0 else 0.0
    return EdgeModel(t0, r0, c0, per_farad, per_ramp), probes
