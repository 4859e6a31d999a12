"""Input waveforms whose slew, measured the library's way, is the table value.

A table slew ``s`` means the input spends ``s × derate`` between the slew thresholds, so a
full-swing linear ramp lasts ``s × derate / (upper − lower)`` (thresholds as fractions). A
shaped edge (``config.shapes``: a driver's output or a file's) is its normalised corners
stretched by ``s × derate``; it drives the input's source as a PWL, set per point with
``alter`` like the ramp's PULSE, so the testbench is read once whatever the shape.
"""

from __future__ import annotations

import functools
from collections.abc import Sequence
from dataclasses import dataclass, replace

from charflow.config.library import Thresholds
from charflow.config.shapes import InputShape, first_time

# The ramp starts a little after t = 0 so that energy windows begin before the input moves.
LEAD_FRACTION = 0.1
LEAD_MIN = 1e-12  # s


@dataclass(frozen=True, slots=True)
class Ramp:
    edge: str  # "rise" or "fall"
    start: float  # s, when the input leaves its rail
    duration: float  # s, full swing
    vdd: float  # V
    # A shaped edge's corners (time as a fraction of ``duration``, fraction of the swing
    # travelled); () for the linear ramp.
    corners: tuple[tuple[float, float], ...] = ()

    @property
    def end(self) -> float:
        return self.start + self.duration

    @property
    def levels(self) -> tuple[float, float]:
        return (0.0, self.vdd) if self.edge == "rise" else (self.vdd, 0.0)

    def time_at(self, fraction: float) -> float:
        """When the ramp crosses ``fraction`` × vdd (a shaped edge: first reaches it)."""
        along = fraction if self.edge == "rise" else 1.0 - fraction
        if self.corners:
            return self.start + first_time(self.corners, along) * self.duration
        return self.start + along * self.duration

    def moved(self, start: float) -> Ramp:
        """The same edge leaving its rail at ``start``."""
        return replace(self, start=start)

    def pulse(self) -> Wave:
        """The PULSE vector (a shaped edge: the PWL) for ``alter``; the wave holds its second
        level for ever."""
        v1, v2 = self.levels
        hold = 1.0  # s: far beyond any transient charflow runs
        if self.corners:
            return Pwl(((0.0, v1), *_edge_corners(self, v1, v2)))
        return pulse_vector(v1, v2, self.start, self.duration, self.duration, hold, 2 * hold)


@dataclass(frozen=True, slots=True)
class Pwl:
    """A piecewise-linear wave: (time s, voltage V) corners, times increasing."""

    corners: tuple[tuple[float, float], ...]


# What an input source is set to: a PULSE vector, or a PWL.
Wave = str | Pwl


def ramp(
    slew: float, edge: str, thresholds: Thresholds, vdd: float, shape: InputShape | None = None
) -> Ramp:
    """The input edge for a table slew ``slew`` (s) on ``edge``: the linear ramp, or the
    library's ``shape`` stretched to that slew."""
    if shape is None or shape.linear:
        lower, upper = thresholds.slew_band(edge)
        duration = slew * thresholds.slew_derate / (upper - lower)
        return Ramp(edge, max(LEAD_MIN, LEAD_FRACTION * duration), duration, vdd)
    corners = unit_corners(shape, edge)
    duration = slew * thresholds.slew_derate * shape.edge(edge)[-1][0]
    return Ramp(edge, max(LEAD_MIN, LEAD_FRACTION * duration), duration, vdd, corners)


@functools.lru_cache(maxsize=64)
def unit_corners(shape: InputShape, edge: str) -> tuple[tuple[float, float], ...]:
    """The shape's corners of ``edge`` with time as a fraction of the whole edge."""
    corners = shape.edge(edge)
    if not corners:
        raise ValueError(f"the {shape.kind} input shape has no {edge} edge measured yet")
    end = corners[-1][0]
    return tuple((t / end, p) for t, p in corners)


def _edge_corners(edge: Ramp, v1: float, v2: float) -> list[tuple[float, float]]:
    """A shaped edge's corners from ``v1`` toward ``v2`` (a runt stops short of the rail)."""
    return [(edge.start + t * edge.duration, v1 + p * (v2 - v1)) for t, p in edge.corners]


@functools.lru_cache(maxsize=64)
def constant(value: float) -> Wave:
    """A PULSE vector that holds ``value`` (a side input); remembered by value (a point's
    side inputs are at the rails)."""
    return pulse_vector(value, value, 0.0, 1e-12, 1e-12, 1.0, 2.0)


# Pulse times are rounded to this grid: two sources' corners a hair apart (not equal) make
# ngspice's breakpoint handling shrink the step to nothing ("timestep too small").
TIME_QUANTUM = 1e-15  # s


def pulse_vector(
    v1, v2, delay, rise, fall, width, period, shape: InputShape | None = None, count: int = 1
) -> Wave:
    """The ``alter`` vector of a PULSE source, times rounded to TIME_QUANTUM; with a
    ``shape``, the PWL of the same pulse's first ``count`` periods with shaped edges."""
    if shape is not None and not shape.linear:
        return _shaped_pulse(shape, v1, v2, delay, rise, fall, width, period, count)
    times = (round(x / TIME_QUANTUM) * TIME_QUANTUM for x in (delay, rise, fall, width, period))
    return "[ " + " ".join(f"{x:.12g}" for x in (v1, v2, *times)) + " ]"


def _shaped_pulse(shape, v1, v2, delay, rise, fall, width, period, count) -> Pwl:
    """PULSE's wave with the shape's edges: the first of each period toward ``v2``."""
    up, down = ("rise", "fall") if v2 >= v1 else ("fall", "rise")
    corners: list[tuple[float, float]] = [(0.0, v1)]
    for k in range(count):
        go = Ramp(up, delay + k * period, rise, 0.0, unit_corners(shape, up))
        back = Ramp(down, go.end + width, fall, 0.0, unit_corners(shape, down))
        corners += _edge_corners(go, v1, v2) + _edge_corners(back, v2, v1)
    return Pwl(tuple(corners))


# Numbers per ``compose`` command: one ngspice command line holds at most 1023 characters.
PIECE = 24


def set_source(source: str, wave: Wave) -> tuple[str, ...]:
    """The commands that give an input source ``wave``: one ``alter`` of its PULSE, or for a
    PWL the corners composed into a vector in pieces (a command line is too short for a long
    PWL) and that vector set as the source's PWL."""
    if isinstance(wave, str):
        return (f"alter @{source}[pulse] = {wave}",)
    values = _pwl_values(wave.corners)
    name = f"cf_pwl_{source}"
    commands = [f"let {name} = vector({len(values)})"]
    for i in range(0, len(values), PIECE):
        part = values[i : i + PIECE]
        commands.append(f"compose {name}_part values {' '.join(part)}")
        commands.append(f"let {name}[{i}:{i + len(part) - 1}] = {name}_part")
    commands.append(f"alter @{source}[pwl] = {name}")
    return tuple(commands)


def _pwl_values(corners: Sequence[tuple[float, float]]) -> list[str]:
    """The corners as numbers for ngspice, times rounded to TIME_QUANTUM and strictly
    increasing (a corner that rounds onto the one before it is dropped)."""
    out: list[str] = []
    last = -1.0
    for t, v in corners:
        q = round(t / TIME_QUANTUM) * TIME_QUANTUM
        if q <= last:
            continue
        last = q
        # All the digits: a corner far out (a pulse's return after 1 s) is 1 fs from the next.
        out += [f"{q:.17g}", f"{v:.9g}"]
    return out
