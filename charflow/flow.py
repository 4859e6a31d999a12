"""The characterization flow as public stages a user can call one by one.

    config.load → sweep.plan → netlist.build_deck → verify → sweep.run → tabulate → write

(power rides along: toggles through ``sweep.run``, leakage per deck, ``power.tabulate``).
``characterize`` chains them; each stage takes and returns plain records, so any one can
be tested or re-run alone.
"""

from __future__ import annotations

import json
import os
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from . import __version__, liberty, power, sweep
from .config import LibraryConfig
from .errors import OutputError
from .netlist import build_deck
from .sequential import SearchResult
from .tabulate import CellTables, tabulate
from .timing import Failure, Measurement, check_function
from .units import energy_unit, power_unit


@dataclass(frozen=True, slots=True)
class RunResult:
    plan: sweep.Plan
    measurements: tuple[Measurement | SearchResult, ...]
    failures: tuple[Failure, ...]
    cells: tuple[CellTables, ...]  # empty when any point failed
    wall_seconds: float
    toggles: tuple[power.ToggleMeasurement, ...] = ()
    # Toggles whose energy could not be measured: reported, left out of the tables; they do
    # not stop the Liberty file, which then has no hidden power for that pin, state and edge.
    unmeasured: tuple[Failure, ...] = ()
    cell_power: tuple[power.CellPower, ...] = ()  # empty when any timing point failed

    @property
    def simulations(self) -> int:
        return sum(m.runs for m in (*self.measurements, *self.toggles))

    @property
    def sim_seconds(self) -> float:
        return sum(m.sim_seconds for m in (*self.measurements, *self.toggles))


def verify(config: LibraryConfig, cells: list[str] | None = None) -> None:
    """Simulate every input vector of every chosen cell against its declared function."""
    for cell in config.cells:
        if cells is None or cell.name in cells:
            check_function(config, build_deck(config, cell))


def characterize(
    config: LibraryConfig,
    *,
    cells: list[str] | None = None,
    jobs: int | None = None,
    on_start: Callable[[int], None] | None = None,
    on_result: Callable[[object], None] | None = None,
) -> RunResult:
    """Plan, verify, sweep and tabulate; failed points are collected, never turned into numbers."""
    start = time.perf_counter()
    the_plan = sweep.plan(config, cells)
    toggle_points = power.plan_toggles(config, cells)
    verify(config, cells)
    if on_start is not None:
        on_start(len(the_plan.points) + len(toggle_points))
    measurements: list[Measurement | SearchResult] = []
    failures: list[Failure] = []
    for outcome in sweep.run(config, the_plan.points, jobs=jobs, on_result=on_result):
        (failures if isinstance(outcome, Failure) else measurements).append(outcome)
    toggles: list[power.ToggleMeasurement] = []
    unmeasured: list[Failure] = []
    if toggle_points:
        runs = sweep.run(
            config, toggle_points, jobs=jobs, on_result=on_result, measure=power.measure_chunk
        )
        for outcome in runs:
            (unmeasured if isinstance(outcome, Failure) else toggles).append(outcome)
    order = {p: i for i, p in enumerate((*the_plan.points, *toggle_points))}
    for outcomes in (measurements, failures, toggles, unmeasured):
        outcomes.sort(key=lambda m: order[m.point])
    tables, cell_power = (), ()
    if not failures:
        tables = tabulate(config, the_plan, measurements)
        leakages = power.leakages(config, the_plan)
        cell_power = power.tabulate(config, the_plan, measurements, toggles, leakages)
    return RunResult(
        the_plan,
        tuple(measurements),
        tuple(failures),
        tables,
        time.perf_counter() - start,
        tuple(toggles),
        tuple(unmeasured),
        cell_power,
    )


def _arc_power_record(cell: power.CellPower | None, arc: sweep.Arc) -> dict:
    energy = cell.arc(arc.related, arc.output) if cell is not None else None
    if energy is None:
        return {}
    states = [{"when": st.when, "tables": [t.to_dict() for t in ts]} for st, ts in energy.states]
    return {"internal_power": {"tables": [t.to_dict() for t in energy.default], "states": states}}


def _cell_power_record(cell: power.CellPower | None) -> dict:
    if cell is None:
        return {}
    return {
        "cell_leakage_power_W": cell.cell_leakage,
        "leakage_power": [{"when": s.when, "value_W": s.power} for s in cell.leakage],
        "hidden_power": [
            {"pin": h.pin, "when": h.when, "tables": [t.to_dict() for t in h.tables]}
            for h in cell.hidden
        ],
    }


def to_json(config: LibraryConfig, result: RunResult) -> dict:
    """Tables in SI units with the measurement details behind every point."""

    def point_record(m: Measurement | SearchResult) -> dict:
        p = m.point
        if isinstance(m, SearchResult):
            return {
                "search": p.label,
                "value_s": m.value,
                "upper_bound": m.bound,
                "simulations": m.runs,
                "sim_seconds": round(m.sim_seconds, 6),
            }
        return {
            "related_pin": p.related,
            "output": p.output,
            "when": sweep.State(p.state_side, "").when,
            "input_edge": p.input_edge,
            "output_edge": p.output_edge,
            "kind": p.kind,
            "slew_s": p.slew,
            "load_F": p.load,
            "other_load_F": p.other_load,
            "delay_s": m.delay,
            "transition_s": m.transition,
            "input_charge_C": m.input_charge,
            "supply_energy_J": m.supply_energy,
            "internal_energy_J": m.internal_energy,
            "simulations": m.runs,
            "sim_seconds": round(m.sim_seconds, 6),
            "stop_s": m.stop,
        }

    def toggle_record(m: power.ToggleMeasurement) -> dict:
        p = m.point
        return {
            "related_pin": p.related,
            "when": sweep.State(p.side, "").when,
            "input_edge": p.input_edge,
            "slew_s": p.slew,
            "load_F": p.load,
            "energy_J": m.energy,
            "input_charge_C": m.input_charge,
            "simulations": m.runs,
            "sim_seconds": round(m.sim_seconds, 6),
            "window_end_s": m.settled,
        }

    powers = {c.cell: c for c in result.cell_power}
    cells = []
    for cell in result.cells:
        cell_power = powers.get(cell.cell.name)
        arcs = []
        for arc in cell.arcs:
            arcs.append(
                {
                    "related_pin": arc.arc.related,
                    "output": arc.arc.output,
                    "kind": arc.arc.kind,
                    "related_output": arc.arc.other,
                    "timing_sense": arc.arc.sense,
                    "tables": [t.to_dict() for t in arc.default],
                    "states": [
                        {
                            "when": st.state.when,
                            "timing_sense": st.state.sense,
                            "tables": [t.to_dict() for t in st.tables],
                        }
                        for st in arc.states
                    ],
                    **_arc_power_record(cell_power, arc.arc),
                }
            )
        cells.append(
            {
                "name": cell.cell.name,
                "area": cell.cell.area,
                "inputs": [
                    {"pin": p.pin, "rise_capacitance_F": p.rise, "fall_capacitance_F": p.fall}
                    for p in cell.pins
                ],
                "outputs": {o.pin: o.function.to_liberty() for o in cell.cell.outputs},
                "arcs": arcs,
                "constraints": [
                    {
                        "pin": c.pin,
                        "related_pin": c.related,
                        "timing_type": c.timing_type,
                        "tables": [t.to_dict() for t in c.tables],
                    }
                    for c in cell.constraints
                ],
                "min_pulse_widths": [
                    {"pin": p.pin, "level": p.level, "width_s": p.width, "upper_bound": p.bound}
                    for p in cell.pulses
                ],
                **_cell_power_record(cell_power),
            }
        )
    lib_power, _ = power_unit(config.time_unit, config.cap_unit)
    return {
        "library": config.name,
        "generator": f"charflow {__version__}",
        "units": {
            "time": "s",
            "capacitance": "F",
            "charge": "C",
            "voltage": "V",
            "energy": "J",
            "power": "W",
        },
        "library_units": {
            "time": config.time_unit,
            "capacitance": config.cap_unit,
            "energy": energy_unit(config.cap_unit),
            "power": lib_power[1:],
        },
        "vdd_V": config.process.vdd,
        "temperature_C": config.process.temperature,
        "cells": cells,
        "points": {
            name: [point_record(m) for m in result.measurements if m.point.cell == name]
            for name in dict.fromkeys(p.cell for p in result.plan.points)
        },
        "toggles": {
            name: [toggle_record(m) for m in result.toggles if m.point.cell == name]
            for name in dict.fromkeys(m.point.cell for m in result.toggles)
        },
        "failures": [
            {"cell": f.point.cell, "point": f.point.label, "reason": f.reason}
            for f in result.failures
        ],
        "unmeasured_toggles": [
            {"cell": f.point.cell, "point": f.point.label, "reason": f.reason}
            for f in result.unmeasured
        ],
    }


OUTPUT_MODE = 0o644


def write_atomic(path: Path, text: str | bytes) -> None:
    """Write to a temporary file beside ``path`` and rename it: never a half-written output."""
    binary = isinstance(text, bytes)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
        with os.fdopen(fd, "wb" if binary else "w", encoding=None if binary else "utf-8") as fh:
            fh.write(text)
        # mkstemp makes the file private; outputs are ordinary files.
        os.chmod(tmp, OUTPUT_MODE)
        os.replace(tmp, path)
    except OSError as exc:
        raise OutputError(f"cannot write output: {exc}", file=path) from exc


def write(config: LibraryConfig, result: RunResult, out_dir: Path) -> list[Path]:
    """Write the JSON (always) and the Liberty file (only when every point was measured)."""
    out_dir = Path(out_dir)
    written = []
    json_path = out_dir / f"{config.name}.json"
    write_atomic(json_path, json.dumps(to_json(config, result), indent=1) + "\n")
    written.append(json_path)
    if not result.failures:
        lib_path = out_dir / f"{config.name}.lib"
        write_atomic(lib_path, liberty.render(config, result.cells, result.cell_power))
        written.append(lib_path)
    return written
