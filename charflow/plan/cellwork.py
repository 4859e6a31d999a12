"""Planning the work done once per cell (the function check and the leakage runs) and the
tightened re-measures of the grid's points that give their values' error bars. They are
points like any other, so workers run them, the store keeps them, and a run served wholly
from the store simulates nothing."""

from __future__ import annotations

from collections.abc import Iterable

from charflow.config.library import CellSpec, LibraryConfig
from charflow.plan.toggles import vectors
from charflow.records.points import FunctionPoint, LeakagePoint, TightPoint, TimingPoint, Work


def function_point(cell: CellSpec) -> FunctionPoint:
    if cell.flop is None:  # a DC solution per input vector
        return FunctionPoint(cell.name, 2 ** len(cell.inputs))
    # Every data vector clocked in from either stored value, checked at each output.
    return FunctionPoint(cell.name, 2 ** len(cell.data_inputs) * 2 * len(cell.outputs))


def leakage_point(cell: CellSpec) -> LeakagePoint:
    states = 2 ** len(cell.inputs) if cell.flop is None else len(vectors(cell))
    return LeakagePoint(cell.name, states)


def function_points(config: LibraryConfig, cells: Iterable[str]) -> tuple[FunctionPoint, ...]:
    return tuple(function_point(config.cell(c)) for c in cells)


def leakage_points(config: LibraryConfig, cells: Iterable[str]) -> tuple[LeakagePoint, ...]:
    return tuple(leakage_point(config.cell(c)) for c in cells)


def tight_points(config: LibraryConfig, points: Iterable[Work]) -> tuple[TightPoint, ...]:
    """The error-bar re-measures of ``points``' combinational grid points, as
    ``[error_bars] points`` asks (a flip-flop arc is checked at tightened settings on its own
    sample: ``measurement.sequential``)."""
    if config.error_bars.points == "none":
        return ()
    return tuple(
        TightPoint(p) for p in points if isinstance(p, TimingPoint) and p.kind == "combinational"
    )
