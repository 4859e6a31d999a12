"""The stimulus timeline of flip-flop experiments: where the clock's and the data's edges go."""

from __future__ import annotations

from charflow.config.library import CellSpec, LibraryConfig
from charflow.simulation import stimulus
from charflow.simulation.stimulus import Ramp


class Timeline:
    """The waveform timeline shared by every experiment on one flip-flop: clock and data
    pulses placed half a period apart, a period long enough for the slowest of ``slews`` and
    the settling ``window`` after it."""

    def __init__(
        self, config: LibraryConfig, cell: CellSpec, window: float, slews: tuple[float, ...]
    ) -> None:
        self.config, self.cell = config, cell
        self.vdd = config.process.vdd
        self.thr = config.thresholds
        self.window = window
        # Sized from the slews of the edges the experiment makes, not the grid's largest.
        ramp = stimulus.ramp(max(slews), "rise", self.thr, self.vdd)
        # Half a period holds the slowest edge and its settling, with room for a data edge.
        self.half = 2.0 * ramp.duration + self.window
        self.lead = ramp.start

    def level(self, value: bool) -> float:
        return self.vdd if value else 0.0

    def clock(
        self,
        slew: float,
        edges: int,
        high: float | None = None,
        low: float | None = None,
        start: float | None = None,
    ) -> tuple[str, Ramp]:
        """A clock PULSE with ``edges`` active edges, one period (2 × half) apart, the first at
        ``start`` (``lead`` by default); ``high`` and ``low`` set the flat time of the active
        and of the inactive phase (pulse widths). Returns the vector and the ramp of the last
        active edge."""
        flop = self.cell.flip_flop
        active = stimulus.ramp(slew, flop.edge, self.thr, self.vdd)
        back = stimulus.ramp(slew, "fall" if flop.edge == "rise" else "rise", self.thr, self.vdd)
        v1, v2 = active.levels
        width = self.half - active.duration if high is None else high
        rest = self.half - back.duration if low is None else low
        period = active.duration + width + back.duration + rest
        first = self.lead if start is None else start
        last = first + (edges - 1) * period
        if edges == 1:
            period = 1.0  # one edge only: the next is far beyond the run
        vector = stimulus.pulse_vector(v1, v2, first, active.duration, back.duration, width, period)
        return vector, Ramp(flop.edge, last, active.duration, self.vdd)

    def data(
        self, pin: str, old: bool, new: bool, start: float, slew: float, hold: float = 1.0
    ) -> tuple[str, Ramp, Ramp]:
        """A data PULSE leaving ``old`` at ``start``, staying ``hold`` at ``new``, then
        returning; with the ramps of its two edges (timed from ``start``)."""
        go = stimulus.ramp(slew, "rise" if new else "fall", self.thr, self.vdd)
        back = stimulus.ramp(slew, "fall" if new else "rise", self.thr, self.vdd)
        go = Ramp(go.edge, start, go.duration, self.vdd)
        back = Ramp(back.edge, start + go.duration + hold, back.duration, self.vdd)
        if old == new:
            return stimulus.constant(self.level(old)), go, back
        vector = stimulus.pulse_vector(
            self.level(old), self.level(new), start, go.duration, back.duration, hold, 2.0
        )
        return vector, go, back
