"""Checking a config without characterizing it: every problem of every cell in one run.

``config.load`` already gathers every problem of the config file into one error. When the
config loads, each cell is then taken through the stages that come before the sweep (its
netlist, its ``.subckt`` ports, its function simulated at DC), and a failing cell does not
stop the others: a user fixing a library sees all that is wrong at once, not one per run.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from pathlib import Path

from charflow.config import library as config_mod
from charflow.config.library import LibraryConfig
from charflow.config.shapes import InputShape
from charflow.execution import sweep
from charflow.flow.characterize import shaped
from charflow.plan.cellwork import function_points
from charflow.records import errors
from charflow.records.errors import (
    CharflowError,
    ConfigError,
    ConfigProblemsError,
    FunctionalMismatchError,
    SimulatorError,
)
from charflow.records.outcomes import Failure
from charflow.simulation import plausible
from charflow.simulation.netlist import Deck, build_deck


@dataclass(frozen=True, slots=True)
class CheckReport:
    cells: int  # cells taken through the checks (0 when the config did not load)
    problems: tuple[str, ...]  # one line each (a line may continue, indented, below it)
    warnings: tuple[str, ...] = ()  # values that run but no process makes (``plausible``)

    @property
    def ok(self) -> bool:
        return not self.problems


def check(path: str | Path) -> CheckReport:
    """Load the config and check every cell; collect the problems instead of raising them."""
    try:
        cfg = config_mod.load(path)
    except ConfigProblemsError as exc:
        return CheckReport(0, tuple(map(str, exc.problems)))
    except ConfigError as exc:
        return CheckReport(0, (str(exc),))
    index = {c.name: i for i, c in enumerate(cfg.cells)}
    problems: dict[int, str] = {}
    cfg, driver = _driver_stage(cfg)
    decks: dict[str, Deck] = {}
    for cell in cfg.cells:
        try:
            decks[cell.name] = build_deck(cfg, cell)
        except CharflowError as exc:
            problems[index[cell.name]] = str(_located(cfg, index[cell.name], exc))
    failed = _failures(cfg, decks)
    if any(f.error == "DeckReadError" for f in failed) and cfg.simulation.backend == "shared":
        # The shared ngspice may refuse every deck after one it could not read: those cells
        # go again to one ngspice process per run, which starts afresh each time.
        cfg = replace(cfg, simulation=replace(cfg.simulation, backend="subprocess"))
        failed = _failures(cfg, {f.point.cell: decks[f.point.cell] for f in failed})
    for f in failed:
        error = errors.again(f.error, f.reason, dict(f.context))
        problems[index[f.point.cell]] = str(_located(cfg, index[f.point.cell], error))
    listed = (*driver, *(problems[i] for i in sorted(problems)))
    return CheckReport(len(cfg.cells), listed, plausible.warnings(cfg))


def _driver_stage(cfg: LibraryConfig) -> tuple[LibraryConfig, tuple[str, ...]]:
    """The config with its driver's input shape measured, and the driver stage's problem if
    it fails (the cells are then checked with the linear ramp)."""
    try:
        return shaped(cfg, jobs=1), ()
    except CharflowError as exc:
        told = exc.located(file=cfg.path, key="input_shape")
        return replace(cfg, input_shape=InputShape()), (str(told),)


def _failures(cfg: LibraryConfig, decks: dict[str, Deck]) -> list[Failure]:
    """The function checks of the cells of ``decks`` that failed, run by the sweep's workers."""
    points = function_points(cfg, decks)
    return [o for o in sweep.run(cfg, points, jobs=1, decks=decks) if isinstance(o, Failure)]


def _located(cfg: LibraryConfig, index: int, exc: CharflowError) -> CharflowError:
    """The error with the config file and key added where the error itself names none, so
    that every line says where to look."""
    context = dict(exc.context)
    if isinstance(exc, FunctionalMismatchError) and "key" not in context:
        context.setdefault("file", cfg.path)
        pin = context.get("pin")
        context["key"] = f"cell[{index}].outputs" + (f".{pin}" if pin else "")
    elif isinstance(exc, SimulatorError):
        # The simulator reads the models and the cell together: either may hold the fault.
        files = [*(m.path for m in cfg.process.models), cfg.cells[index].source]
        context["file"] = ", ".join(map(str, files))
    else:
        context.setdefault("file", cfg.path)
    context.setdefault("cell", cfg.cells[index].name)
    return type(exc)(exc.reason, **context)


def summary(report: CheckReport) -> str:
    """Every problem and warning, then one line counting them."""
    lines = [*report.problems, *(f"warning: {w}" for w in report.warnings)]
    counts = [_count(len(report.problems), "problem") if report.problems else "no problems"]
    if report.warnings:
        counts.append(_count(len(report.warnings), "warning"))
    what = _count(report.cells, "cell") + " checked" if report.cells else "the config did not load"
    return "\n".join([*lines, f"{what}: {', '.join(counts)}"])


def _count(n: int, thing: str) -> str:
    return f"{n} {thing}{'s' * (n != 1)}"
