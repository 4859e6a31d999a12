"""Waveform measurements: threshold crossings, delay, transition, charge, energy.

Crossings are located on the simulator's own samples with linear interpolation between
the two samples that straddle the level. A waveform that does not cross, crosses more
than once, or has not settled by the end is a MeasurementError, never a number.
``crossings_loop`` is a plain twin of the vectorised ``crossings`` for the tests.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Literal

import numpy as np

from charflow.records.errors import CutOffError, MeasurementError
from charflow.records.outcomes import Waveform


def waveform(vectors: Mapping[str, np.ndarray], nodes: Mapping[str, str]) -> Waveform:
    """The run's time and the voltage of each ``nodes`` entry (name → simulator vector)."""
    return Waveform(vectors["time"], tuple((name, vectors[node]) for name, node in nodes.items()))


class KeepWaveform:
    """A context (reusable) from which a MeasurementError leaves with ``capture()`` as its
    waveform, unless it already carries one: the innermost run that failed is the one to see."""

    def __init__(self, capture: Callable[[], Waveform | None]) -> None:
        self.capture = capture

    def __enter__(self) -> None:
        return None

    def __exit__(self, kind: object, exc: BaseException | None, tb: object) -> Literal[False]:
        if isinstance(exc, MeasurementError) and exc.waveform is None:
            exc.waveform = self.capture()
        return False


def crossings(t: np.ndarray, v: np.ndarray, level: float, direction: int = 0) -> np.ndarray:
    """Times where ``v`` crosses ``level``; direction +1 rising only, -1 falling only, 0 both.

    A sample exactly on the level counts as above it, so touching the level from above and
    turning back is not a crossing, and a crossing that lands on a sample is counted once.
    """
    above = v >= level
    idx = np.flatnonzero(above[1:] != above[:-1])
    if direction:
        rising = above[idx + 1]
        idx = idx[rising] if direction > 0 else idx[~rising]
    v0, v1 = v[idx], v[idx + 1]
    t0, t1 = t[idx], t[idx + 1]
    return t0 + (level - v0) * (t1 - t0) / (v1 - v0)


def crossings_loop(t, v, level: float, direction: int = 0) -> list[float]:
    """The obvious per-sample loop, kept only to check ``crossings``."""
    out = []
    for i in range(len(v) - 1):
        a, b = v[i] >= level, v[i + 1] >= level
        if a == b:
            continue
        if direction > 0 and not b or direction < 0 and b:
            continue
        out.append(t[i] + (level - v[i]) * (t[i + 1] - t[i]) / (v[i + 1] - v[i]))
    return out


def single_crossing(t: np.ndarray, v: np.ndarray, level: float, edge: str, what: str) -> float:
    """The one crossing of ``level`` on ``edge``; anything else is a MeasurementError."""
    above = v >= level
    changes = (above[1:] != above[:-1]).nonzero()[0]
    # The usual case, one crossing, interpolated as ``crossings`` does in scalars (a test
    # holds the two equal): the arrays' overhead is most of the cost on a few hundred samples.
    if len(changes) == 1:
        found = [_crossing_at(t, v, level, int(changes[0]))]
    else:
        found = list(crossings(t, v, level, 0))
    if len(found) == 0:
        raise MeasurementError(
            f"{what} never crosses {level:.4g} V (from {v[0]:.4g} V to {v[-1]:.4g} V)"
        )
    if len(found) > 1:
        raise MeasurementError(
            f"{what} crosses {level:.4g} V {len(found)} times (glitch) at "
            + ", ".join(f"{x:.4g}" for x in found[:5])
            + " s"
        )
    want = 1 if edge == "rise" else -1
    direction = 1 if v[-1] > v[0] else -1
    if direction != want:
        raise MeasurementError(f"{what} moves the wrong way: expected {edge}")
    return found[0]


def _crossing_at(t: np.ndarray, v: np.ndarray, level: float, i: int) -> float:
    """Where ``v`` crosses ``level`` between samples ``i`` and ``i + 1``."""
    t0, t1, v0, v1 = float(t[i]), float(t[i + 1]), float(v[i]), float(v[i + 1])
    return t0 + (level - v0) * (t1 - t0) / (v1 - v0)


def transition(
    t: np.ndarray, v: np.ndarray, vdd: float, band: tuple[float, float], edge: str, what: str
) -> float:
    """Time between the slew thresholds (fractions of vdd), in the edge's direction."""
    lower = single_crossing(t, v, band[0] * vdd, edge, what)
    upper = single_crossing(t, v, band[1] * vdd, edge, what)
    return upper - lower if edge == "rise" else lower - upper


def check_settled(
    v: np.ndarray, target: float, tolerance: float, edge: str, what: str, cap: float | None = None
) -> None:
    """The waveform ended within ``tolerance`` (V) of ``target``, or beyond it in the edge's
    direction (an output may overshoot its rail a little as it arrives). A run stops as soon
    as its outputs have settled, so one that has not was stopped by its cap: a CutOffError,
    with the window in effect (``cap``, s) when the caller gives it."""
    short = target - v[-1] if edge == "rise" else v[-1] - target
    if short > tolerance:
        raise CutOffError(
            f"{what} had not settled when the run reached its stop-time cap (it ends at "
            f"{v[-1]:.4g} V, {target:.4g} V expected, tolerance {tolerance:.3g} V)",
            cap=cap,
        )


def integral(
    t: np.ndarray, y: np.ndarray, start: float | None = None, stop: float | None = None
) -> float:
    """Trapezoidal integral of ``y`` over [start, stop], the ends interpolated; ``t``
    increasing, as a simulator's time is."""
    lo = t[0] if start is None else start
    hi = t[-1] if stop is None else stop
    # The samples strictly inside (lo, hi): a slice of an increasing t, found by bisection.
    inside = slice(int(t.searchsorted(lo, "right")), int(t.searchsorted(hi, "left")))
    ends = np.interp((lo, hi), t, y)
    ts = np.concatenate(((lo,), t[inside], (hi,)))
    ys = np.concatenate((ends[:1], y[inside], ends[1:]))
    # np.trapezoid's own sum, without its generality's overhead (a test holds the two equal).
    return float(np.add.reduce((ts[1:] - ts[:-1]) * (ys[1:] + ys[:-1]) / 2.0))


def supply_energy(
    t: np.ndarray,
    current: np.ndarray,
    vdd: float,
    switch: float,
    static: tuple[float, float],
    stop: float | None = None,
) -> float:
    """Energy a supply at ``vdd`` delivered over [t[0], stop] beyond its static draw.

    ``current`` flows out of the supply into the cell. The static (leakage) current is the
    first state's, ``static[0]``, before ``switch`` and the second state's after it: leakage is
    reported on its own, so it must not grow the switching energy with the window's length.
    """
    end = t[-1] if stop is None else stop
    at_rest = static[0] * (switch - t[0]) + static[1] * (end - switch)
    return vdd * (integral(t, current, None, end) - at_rest)


def step_at(t: np.ndarray, when: float) -> float:
    """The simulator's sample spacing around time ``when``."""
    i = min(max(int(t.searchsorted(when)), 1), len(t) - 1)
    return float(t[i] - t[i - 1])
