"""Which measurer serves which kind of point: the one place that knows. A new kind of point
adds its record (``records.points``), its measurer, and a line here.

``measure_chunk`` is what a worker runs: every point of a chunk measured, a point that fails
turned into a ``Failure`` that says where and why.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable, Sequence

from charflow.config.library import LibraryConfig
from charflow.measurement import (
    combinational,
    driver,
    ffpower,
    floptoggle,
    paths,
    power,
    sequential,
    variation,
)
from charflow.measurement.combinational import explain, window_advice
from charflow.records.errors import (
    CutOffError,
    FunctionalMismatchError,
    MeasurementError,
    SimulatorError,
    SimulatorHungError,
    place,
)
from charflow.records.outcomes import (
    INTERNAL,
    Failure,
    FunctionChecked,
    LeakageResult,
    LeakageState,
    Outcome,
    waveform_of,
)
from charflow.records.points import (
    ConstraintPoint,
    FunctionPoint,
    LeakagePoint,
    PathPoint,
    PulsePoint,
    ShapePoint,
    SpreadPoint,
    TightPoint,
    TogglePoint,
    Work,
)
from charflow.simulation.netlist import Deck

log = logging.getLogger("charflow")


def measure(config: LibraryConfig, deck: Deck, point: Work) -> Outcome:
    """One point measured by the measurer of its kind (and of its cell's kind)."""
    if isinstance(point, ShapePoint):
        return driver.measure_shape(config, deck, point)
    if isinstance(point, PathPoint):  # a circuit of cells, not one cell
        return paths.measure_path(config, deck, point)
    flop = config.cell(point.cell).flop is not None
    if isinstance(point, LeakagePoint | FunctionPoint):
        return _per_cell(config, deck, point)
    if isinstance(point, TogglePoint):
        return (floptoggle if flop else power).measure_toggle(config, deck, point)
    if isinstance(point, ConstraintPoint):
        return sequential.measure_constraint(config, deck, point)
    if isinstance(point, PulsePoint):
        return sequential.measure_pulse(config, deck, point)
    if isinstance(point, TightPoint):
        return combinational.measure_tight(config, deck, point)
    if isinstance(point, SpreadPoint):
        return variation.measure_spread(config, deck, point)
    if point.kind != "combinational":
        return sequential.measure_clocked(config, deck, point)
    return combinational.measure_point(config, deck, point)


def _per_cell(
    config: LibraryConfig, deck: Deck, point: LeakagePoint | FunctionPoint
) -> LeakageResult | FunctionChecked:
    start = time.perf_counter()
    if isinstance(point, LeakagePoint):
        states = leakage(config, deck)
        return LeakageResult(point, states, point.states, time.perf_counter() - start)
    check_function(config, deck)
    return FunctionChecked(point, point.vectors, time.perf_counter() - start)


def leakage(config: LibraryConfig, deck: Deck) -> tuple[LeakageState, ...]:
    """The cell's static power per input vector (and, for a flip-flop, per stored value)."""
    if config.cell(deck.cell).flop is not None:
        return ffpower.leakage(config, deck, sequential.settle_window(config, deck))
    return power.leakage(config, deck)


def check_function(config: LibraryConfig, deck: Deck) -> None:
    """Every input vector gives the declared output levels at DC; raise naming the vector.
    A flip-flop is checked by clocking every data vector in from either stored value."""
    cell = config.cell(deck.cell)
    if cell.flop is None:
        return combinational.check_gates(config, deck)
    try:
        return sequential.check_flop(config, deck)
    except FunctionalMismatchError as exc:
        cause = exc.__cause__
        if not isinstance(cause, CutOffError):
            raise
        # Not the netlist's fault: the window is too short for the flop to settle.
        advice = window_advice(config, cell.name, cause.cap)
        raise exc.located(f"{exc.reason}; {advice}", key="simulation.window") from cause


def measure_chunk(
    config: LibraryConfig,
    deck: Deck,
    points: Sequence[Work],
    done: Callable[[Outcome], None] | None = None,
) -> list[Outcome]:
    """Measure points of one cell; a point that fails becomes a Failure, the rest go on.
    ``done`` gets each outcome as it is made. A simulator that hangs ends the chunk
    (SimulatorHungError): this process cannot simulate again."""
    out: list[Outcome] = []
    for point in points:
        try:
            outcome = measure(config, deck, point)
        except SimulatorHungError:
            raise
        except (MeasurementError, SimulatorError, FunctionalMismatchError) as exc:
            wave = waveform_of(exc) if isinstance(exc, MeasurementError) else None
            told = explain(config, point, exc)
            cut = isinstance(exc, CutOffError)
            context = tuple((k, str(v)) for k, v in told.context.items())
            kind = type(exc).__name__
            outcome = Failure(point, told.reason, wave, place(told.context), cut, context, kind)
        except Exception as exc:  # noqa: BLE001 - a charflow bug must not end hours of work
            where = place(point.where(config))
            log.exception("internal error measuring %s", where)
            outcome = Failure(
                point,
                f"internal error in charflow ({type(exc).__name__}: {exc}); please report it",
                where=where,
                error=INTERNAL,
            )
        if done is not None:
            done(outcome)
        out.append(outcome)
    return out
