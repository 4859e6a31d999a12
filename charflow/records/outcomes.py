"""What measuring a point gives: a measurement of each kind, or a Failure with its reason.

Workers send these back, the store keeps them, tables are built from them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from charflow.records.errors import MeasurementError
from charflow.records.points import (
    TIGHT_STEPS,
    ConstraintPoint,
    FunctionPoint,
    LeakagePoint,
    PathPoint,
    PulsePoint,
    ShapePoint,
    SpreadPoint,
    TightPoint,
    TimingPoint,
    TogglePoint,
    Work,
)

# How a minimum pulse width was found: pulses that reach the far rail, their width set by a flat
# top; or, where the narrowest of those still works, pulses at the same edge rate that turn
# back before the rail, their width at the thresholds set by how far they go (RUNT).
FULL = "full swing"
RUNT = "runt"
# A Failure's ``error`` for a bug of charflow: the point is kept as failed so that the rest of
# the work is not lost, and never filled from its neighbours (``tables.gaps``).
INTERNAL = "internal"


@dataclass(frozen=True, slots=True, eq=False)
class Waveform:
    """The simulated vectors of a run that gave no measurement, kept for inspection."""

    time: np.ndarray  # s
    nodes: tuple[tuple[str, np.ndarray], ...]  # (name, V), e.g. the pin a node belongs to


def waveform_of(exc: MeasurementError) -> Waveform | None:
    """The waveform ``exc`` carries, if one was kept."""
    return exc.waveform if isinstance(exc.waveform, Waveform) else None


@dataclass(frozen=True, slots=True)
class Measurement:
    point: TimingPoint
    delay: float  # s; may be negative, never clipped
    transition: float  # s, already divided by the slew derate
    input_charge: float  # C drawn from the input source over the run
    runs: int  # simulations this point took (refinements and retries included)
    sim_seconds: float  # wall time inside the simulator
    # s, simulated time at which the point's last run ended: where its stop condition held
    # (the outputs had settled), or its cap
    stopped: float
    # Energies: every runner measures them; None only in records built without (tests).
    supply_energy: float | None = None  # J the supply delivered beyond its static draw
    # J: supply_energy less what the external loads took from the supply, shared equally by
    # the outputs that switched together (a power tool adds the internal power of every output
    # that toggles, so the event counts once)
    internal_energy: float | None = None
    # A: the supply's static draw before the event and once it has settled, taken off
    # supply_energy (a flip-flop's depends on the value it stores)
    static_current: tuple[float, float] | None = None
    # (pin, edge, C) drawn by other inputs that moved in the run: a flip-flop's data pins
    side_charges: tuple[tuple[str, str, float], ...] = ()
    stop_cap: float | None = None  # s, the time the last run could not go past; None: not run
    # C drawn from the input source from the edge's start to the input's delay-threshold
    # crossing: the charge a driver has delivered when its delay is measured. None: not
    # measured (a flip-flop's point, a record stored before it was)
    input_charge_to_threshold: float | None = None
    # C drawn between the input's two slew-threshold crossings: the charge a driver delivers
    # while its own output slew is measured. None: not measured (as above)
    input_charge_slew_window: float | None = None


@dataclass(frozen=True, slots=True)
class Failure:
    point: Work
    reason: str
    waveform: Waveform | None = None  # the run that gave no measurement, when one ran
    where: str = ""  # cell, arc, state and point in the library's units (``explain``)
    cut_off: bool = False  # the window cap stopped the run before the output settled
    # The error's context (cell, pin, vector, ...), for the driver to raise it again where a
    # failure ends the run (a function check that fails)
    context: tuple[tuple[str, str], ...] = ()
    error: str = ""  # the error's type (``records.errors``), for the same reason

    @property
    def message(self) -> str:
        """One line saying where and why: what the run lists for each failed point."""
        where = self.where or f"cell {self.point.cell}, {self.point.label}"
        return f"{where}: {self.reason}"


@dataclass(frozen=True, slots=True)
class SearchResult:
    point: ConstraintPoint | PulsePoint
    # s: the constraint (may be negative) or the minimum pulse width; None for a pulse that
    # works at every width the search could shape (``note`` says why)
    value: float | None
    runs: int  # simulations the search took
    sim_seconds: float
    # s: the search's last failing and passing values; failing None when no value failed
    bracket: tuple[float | None, float] | None = None
    stimulus: str = FULL  # a pulse search's pulse shape
    note: str = ""  # why a pulse search has no value


@dataclass(frozen=True, slots=True)
class EventEnergy:
    """The energy of one flop event, measured on the timing run that timed it."""

    supply: float  # J the supply delivered beyond its static draw
    internal: float  # J per output that switched, the external loads' share taken off
    static: tuple[float, float]  # A: the static draw before the event and after it settles
    settled: float  # s, the end of the energy window


@dataclass(frozen=True, slots=True)
class ToggleMeasurement:
    point: TogglePoint
    energy: float  # J the supply delivered beyond its static draw: all of it is the cell's
    input_charge: float  # C drawn from the input source over the run
    runs: int
    sim_seconds: float
    settled: float  # s, the end of the energy window


@dataclass(frozen=True, slots=True)
class LeakageState:
    when: str  # every input, e.g. "!IA&IB"
    power: float  # W
    gmin: float  # S, the simulator's gmin the value was measured with


@dataclass(frozen=True, slots=True)
class LeakageResult:
    point: LeakagePoint
    states: tuple[LeakageState, ...]  # in counting order of the vectors (and stored values)
    runs: int
    sim_seconds: float  # wall time of the runs in the worker


@dataclass(frozen=True, slots=True)
class FunctionChecked:
    """The cell's netlist gave every output level its functions declare."""

    point: FunctionPoint
    runs: int
    sim_seconds: float  # wall time of the check in the worker


@dataclass(frozen=True, slots=True)
class TightMeasurement:
    """A grid point's values measured again at tightened settings (``TightPoint``)."""

    point: TightPoint
    delay: float  # s
    transition: float  # s, derated
    input_charge: float  # C
    internal_energy: float | None  # J
    reltol: float  # the tightened run's relative tolerance
    runs: int
    sim_seconds: float

    def bar(self, value: float, tightened: float) -> float:
        """The error bar of ``value`` (measured at the usual settings) from the same quantity
        at tightened settings. If the error falls at least linearly with the step (the
        trapezoidal rule and the crossings' linear interpolation are second order; refinement
        breakpoints and tolerances can make it less), value's error e and the tightened one's
        e / TIGHT_STEPS differ by |value - tightened| >= e (1 - 1 / TIGHT_STEPS); what does not
        shrink with the step is bounded by the tightened run's relative tolerance."""
        shrinking = abs(value - tightened) * TIGHT_STEPS / (TIGHT_STEPS - 1.0)
        return shrinking + self.reltol * abs(tightened)


@dataclass(frozen=True, slots=True)
class ShapeResult:
    """The driver's output edges, normalised (``config.shapes``): (τ, fraction of the swing)."""

    point: ShapePoint
    rise: tuple[tuple[float, float], ...]
    fall: tuple[tuple[float, float], ...]
    runs: int
    sim_seconds: float


@dataclass(frozen=True, slots=True)
class PathMeasurement:
    """Per node of a path run (``PathPoint.nodes``, in order): when it crossed the input and
    the output delay threshold of its edge (a node is one stage's output and the next one's
    input) and its transition (divided by the slew derate)."""

    point: PathPoint
    at_input: tuple[float, ...]  # s, crossing the input delay threshold
    at_output: tuple[float, ...]  # s, crossing the output delay threshold
    transitions: tuple[float, ...]  # s
    runs: int
    sim_seconds: float
    # C, per ``PathPoint.probes`` entry: the charge into the pin over the whole run, up to its
    # net's input delay-threshold crossing, and between its net's slew-threshold crossings
    pin_charges: tuple[tuple[float, float, float], ...] = ()


@dataclass(frozen=True, slots=True)
class DeviceShift:
    """What one transistor's threshold, moved by ±σ, does to a point (sensitivity method)."""

    device: str  # the instance name in the cell's netlist
    sigma: float  # V, σ(ΔVt)
    delay: tuple[float, float]  # s: delay at +σ and at −σ, less the nominal delay
    transition: tuple[float, float]  # s: the same for the transition (slew derate applied)


@dataclass(frozen=True, slots=True)
class SpreadMeasurement:
    """A point's delay and transition under mismatch: the nominal values and either each
    transistor's ±σ shifts or the Monte Carlo samples."""

    point: SpreadPoint
    delay: float  # s, nominal
    transition: float  # s, nominal
    shifts: tuple[DeviceShift, ...]  # sensitivity method; () for samples
    sampled_delays: tuple[float, ...]  # s, one per Monte Carlo sample
    sampled_transitions: tuple[float, ...]  # s
    runs: int
    sim_seconds: float
    failed_samples: int = 0  # samples whose run gave no measurement (left out, counted)


# What a store row may hold: every outcome of a sweep point but a path run's (not stored) and
# a failure.
Result = (
    Measurement
    | SearchResult
    | ToggleMeasurement
    | LeakageResult
    | FunctionChecked
    | TightMeasurement
    | ShapeResult
    | SpreadMeasurement
)
# One outcome of a sweep point: what ``execution.sweep.run`` yields.
Outcome = Result | PathMeasurement | Failure
