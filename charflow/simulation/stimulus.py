"""Input waveforms: a linear ramp whose slew, measured the library's way, is the table value.

A table slew ``s`` means the input spends ``s × derate`` between the slew thresholds, so a
full-swing linear ramp lasts ``s × derate / (upper − lower)`` (thresholds as fractions).
"""

from __future__ import annotations

from dataclasses import dataclass

from charflow.config.library import Thresholds

# The ramp starts a little after t = 0 so that energy windows begin before the input moves.
LEAD_FRACTION = 0.1
LEAD_MIN = 1e-12  # s


@dataclass(frozen=True, slots=True)
class Ramp:
    edge: str  # "rise" or "fall"
    start: float  # s, when the input leaves its rail
    duration: float  # s, full swing
    vdd: float  # V

    @property
    def end(self) -> float:
        return self.start + self.duration

    @property
    def levels(self) -> tuple[float, float]:
        return (0.0, self.vdd) if self.edge == "rise" else (self.vdd, 0.0)

    def time_at(self, fraction: float) -> float:
        """When the ramp crosses ``fraction`` × vdd."""
        along = fraction if self.edge == "rise" else 1.0 - fraction
        return self.start + along * self.duration

    def pulse(self) -> str:
        """The PULSE vector for ``alter``; the pulse holds its second level for ever."""
        v1, v2 = self.levels
        hold = 1.0  # s: far beyond any transient charflow runs
        return pulse_vector(v1, v2, self.start, self.duration, self.duration, hold, 2 * hold)


def ramp(slew: float, edge: str, thresholds: Thresholds, vdd: float) -> Ramp:
    """The input ramp for a table slew ``slew`` (s) on ``edge``."""
    lower, upper = thresholds.slew_band(edge)
    duration = slew * thresholds.slew_derate / (upper - lower)
    return Ramp(edge, max(LEAD_MIN, LEAD_FRACTION * duration), duration, vdd)


def constant(value: float) -> str:
    """A PULSE vector that holds ``value`` (a side input)."""
    return pulse_vector(value, value, 0.0, 1e-12, 1e-12, 1.0, 2.0)


# Pulse times are rounded to this grid: two sources' corners a hair apart (not equal) make
# ngspice's breakpoint handling shrink the step to nothing ("timestep too small").
TIME_QUANTUM = 1e-15  # s


def pulse_vector(v1, v2, delay, rise, fall, width, period) -> str:
    """The ``alter`` vector of a PULSE source, times rounded to TIME_QUANTUM."""
    times = (round(x / TIME_QUANTUM) * TIME_QUANTUM for x in (delay, rise, fall, width, period))
    return "[ " + " ".join(f"{x:.12g}" for x in (v1, v2, *times)) + " ]"
