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
``combinational.measure_point`` still refines the step when the samples on the edge fall short, so
the estimate decides the cost of a point, not its accuracy; and since the probes depend on the
series alone, every point's value still depends on the point alone, whatever the chunking or
the worker count. The probes are measurements of the corner points themselves and stand as
their results.

This module also holds charflow's one definition of *tightened* settings, the ones a value is
re-measured at to see how far the time step and tolerances move it (``tightened``).
"""

from __future__ import annotations

from dataclasses import dataclass

from charflow.config.library import LibraryConfig
from charflow.records.points import TIGHT_RELTOL, TIGHT_STEPS, TimingPoint
from charflow.simulation import stimulus
from charflow.simulation.backends import RESETTABLE, deck_options
from charflow.simulation.netlist import Deck

RAMP_SAMPLES = 20  # samples across the input ramp, before any refinement
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


def plain_step(config: LibraryConfig, point: TimingPoint) -> float:
    """The step the input ramp alone suggests; the reference rule, and the fallback."""
    thr, vdd, shape = config.thresholds, config.process.vdd, config.input_shape
    ramp = stimulus.ramp(point.slew, point.input_edge, thr, vdd, shape)
    return ramp.duration / RAMP_SAMPLES


def step_for(config: LibraryConfig, model: EdgeModel | None, point: TimingPoint) -> float:
    """The first maximum step for ``point`` from its series' ``model``: the estimated
    transition / samples_per_edge (the plain step without a model)."""
    if model is None:
        return plain_step(config, point)
    thr = config.thresholds
    shape = config.input_shape
    ramp = stimulus.ramp(point.slew, point.input_edge, thr, config.process.vdd, shape).duration
    # The estimate is in raw (underated) seconds, as the simulator sees the edge.
    return model.transition(ramp, point.load) / config.simulation.samples_per_edge


def tightened(deck: Deck, step: float) -> tuple[float, tuple[str, ...]]:
    """The tightened form (``records.points.TIGHT_STEPS``: the flip-flop convergence checks
    and every error bar use it) of a run with largest step ``step`` on ``deck``: the step over
    TIGHT_STEPS, and reltol (the deck's, else ngspice's default) over TIGHT_RELTOL as a
    simulator option."""
    return step / TIGHT_STEPS, (f"reltol={tight_reltol(deck):.3g}",)


def tight_reltol(deck: Deck) -> float:
    """The relative tolerance of a tightened run on ``deck``."""
    return float(deck_options(deck.text).get("reltol", RESETTABLE["reltol"])) / TIGHT_RELTOL
