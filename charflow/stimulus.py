"""Input waveforms: a linear ramp whose slew, measured the library's way, is the table value.

A table slew ``s`` means the input spends ``s × derate`` between the slew thresholds, so a
full-swing linear ramp lasts ``s × derate / (upper − lower)`` (thresholds as fractions).
"""

from __future__ import annotations

from dataclasses import dataclass

from .config import Thresholds

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
        fields = (v1, v2, self.start, self.duration, self.duration, hold, 2 * hold)
        return "[ " + " ".join(f"{x:.12g}" for x in fields) + " ]"


def ramp(slew: float, edge: str, thresholds: Thresholds, vdd: float) -> Ramp:
    """The input ramp for a table slew ``slew`` (s) on ``edge``."""
    lower, upper = thresholds.slew_band(edge)
    duration = slew * thresholds.slew_derate / (upper - lower)
    return Ramp(edge, max(LEAD_MIN, LEAD_FRACTION * duration), duration, vdd)


def constant(value: float) -> str:
    """A PULSE vector that holds ``value`` (a side input)."""
    return f"[ {value:.12g} {value:.12g} 0 1e-12 1e-12 1 2 ]"
