"""The stimulus timeline of flip-flop experiments: where the clock's and the data's edges go."""

from __future__ import annotations

from charflow.config.library import CellSpec, LibraryConfig
from charflow.simulation import stimulus
from charflow.simulation.stimulus import Ramp, Wave


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
        self.shape = config.input_shape  # every edge's shape: the ramp's or the library's
        # Sized from the slews of the edges the experiment makes, not the grid's largest.
        ramp = self.ramp(max(slews), "rise")
        # Half a period holds the slowest edge and its settling, with room for a data edge.
        self.half = 2.0 * ramp.duration + self.window
        self.lead = ramp.start

    def level(self, value: bool) -> float:
        return self.vdd if value else 0.0

    def ramp(self, slew: float, edge: str) -> Ramp:
        """An edge of the library's input shape at table slew ``slew``."""
        return stimulus.ramp(slew, edge, self.thr, self.vdd, self.shape)

    def pulse(
        self,
        v1: float,
        v2: float,
        delay: float,
        rise: float,
        fall: float,
        width: float,
        period: float,
        count: int = 1,
    ) -> Wave:
        """``stimulus.pulse_vector`` with the library's shape (``count`` periods)."""
        return stimulus.pulse_vector(
            v1, v2, delay, rise, fall, width, period, shape=self.shape, count=count
        )

    def clock(
        self,
        slew: float,
        edges: int,
        high: float | None = None,
        low: float | None = None,
        start: float | None = None,
    ) -> tuple[Wave, Ramp]:
        """A clock PULSE with ``edges`` active edges, one period (2 × half) apart, the first at
        ``start`` (``lead`` by default); ``high`` and ``low`` set the flat time of the active
        and of the inactive phase (pulse widths). Returns the vector and the ramp of the last
        active edge."""
        flop = self.cell.flip_flop
        active = self.ramp(slew, flop.edge)
        back = self.ramp(slew, "fall" if flop.edge == "rise" else "rise")
        v1, v2 = active.levels
        width = self.half - active.duration if high is None else high
        rest = self.half - back.duration if low is None else low
        period = active.duration + width + back.duration + rest
        first = self.lead if start is None else start
        last = first + (edges - 1) * period
        if edges == 1:
            period = 1.0  # one edge only: the next is far beyond the run
        # Beyond the last active edge a shaped wave holds its level: nothing is measured there.
        vector = self.pulse(
            v1, v2, first, active.duration, back.duration, width, period, count=edges
        )
        return vector, active.moved(last)

    def held_clock(self, slew: float) -> tuple[Wave, Ramp]:
        """A clock that starts at its active level (the flop holding what an earlier active
        edge wrote: ``measurement.heldstate``), its inactive edge at ``lead``, its active
        edge half a period later, as ``clock``'s second period; the vector and that edge."""
        flop = self.cell.flip_flop
        active = self.ramp(slew, flop.edge)
        back = self.ramp(slew, "fall" if flop.edge == "rise" else "rise")
        rest = self.half - back.duration
        v1, v2 = back.levels
        # One period only: the clock holds its active level after the edge, beyond the run.
        vector = self.pulse(v1, v2, self.lead, back.duration, active.duration, rest, 1.0)
        return vector, active.moved(self.lead + self.half)

    def data(
        self, pin: str, old: bool, new: bool, start: float, slew: float, hold: float = 1.0
    ) -> tuple[Wave, Ramp, Ramp]:
        """A data PULSE leaving ``old`` at ``start``, staying ``hold`` at ``new``, then
        returning; with the ramps of its two edges (timed from ``start``)."""
        go = self.ramp(slew, "rise" if new else "fall").moved(start)
        back = self.ramp(slew, "fall" if new else "rise").moved(start + go.duration + hold)
        if old == new:
            return stimulus.constant(self.level(old)), go, back
        vector = self.pulse(
            self.level(old), self.level(new), start, go.duration, back.duration, hold, 2.0
        )
        return vector, go, back
