"""The spread of a combinational point under transistor mismatch, measured in a worker.

Every run is the point itself with threshold shifts on the deck's gate sources
(``simulation.mismatch``), at the first maximum step of the nominal run, so the differences
are the shifts' and not the step's. The sensitivity method moves each transistor to +σ and
−σ in turn (central differences: the slope and, from the pair's asymmetry, the curvature);
the Monte Carlo method draws every threshold at once from its normal distribution.
"""

from __future__ import annotations

import hashlib

import numpy as np

from charflow.config.library import LibraryConfig
from charflow.measurement import combinational
from charflow.records.errors import MeasurementError, NetlistError
from charflow.records.outcomes import DeviceShift, Measurement, SpreadMeasurement
from charflow.records.points import SpreadPoint
from charflow.simulation.netlist import Deck


def measure_spread(config: LibraryConfig, deck: Deck, point: SpreadPoint) -> SpreadMeasurement:
    """The point's nominal delay and transition and their shifts (or samples) under mismatch."""
    if len(deck.devices) != point.devices or not deck.devices:
        raise NetlistError(
            f"the testbench has {len(deck.devices)} transistors with a gate source, the plan "
            f"{point.devices}: set [mismatch] method and rebuild (a charflow bug if it persists)",
            cell=point.cell,
        )
    base = point.timing
    step = combinational.first_step(config, deck, base)
    nominal = combinational.measure_point(config, deck, base, step=step)
    tally = [nominal.runs, nominal.sim_seconds]

    def run(shifts: dict[str, float]) -> Measurement:
        m = combinational.measure_point(config, deck, base, step=step, shifts=shifts)
        tally[0] += m.runs
        tally[1] += m.sim_seconds
        return m

    shifts: list[DeviceShift] = []
    delays: list[float] = []
    transitions: list[float] = []
    failed = 0
    if point.samples:
        for draw in draws(deck, point):
            try:
                m = run(dict(zip((d.name for d in deck.devices), draw, strict=True)))
            except MeasurementError:
                failed += 1  # a sample that does not switch cleanly: counted, reported
                continue
            delays.append(m.delay)
            transitions.append(m.transition)
        if not delays:
            raise MeasurementError(f"none of the {point.samples} Monte Carlo samples switched")
    else:
        for d in deck.devices:
            up, down = run({d.name: d.sigma}), run({d.name: -d.sigma})
            shifts.append(
                DeviceShift(
                    d.name,
                    d.sigma,
                    (up.delay - nominal.delay, down.delay - nominal.delay),
                    (up.transition - nominal.transition, down.transition - nominal.transition),
                )
            )
    return SpreadMeasurement(
        point,
        nominal.delay,
        nominal.transition,
        tuple(shifts),
        tuple(delays),
        tuple(transitions),
        int(tally[0]),
        float(tally[1]),
        failed,
    )


def draws(deck: Deck, point: SpreadPoint) -> np.ndarray:
    """The threshold shifts (V) of every sample, one row per sample: each transistor's
    normal ΔVt with its σ, from the config's seed and the point (so a point's samples do not
    depend on which worker draws them, and two points' are independent)."""
    digest = hashlib.sha256(repr(point.timing).encode()).digest()
    rng = np.random.default_rng([point.seed, int.from_bytes(digest[:8], "little")])
    sigmas = np.array([d.sigma for d in deck.devices])
    return rng.standard_normal((point.samples, len(sigmas))) * sigmas
