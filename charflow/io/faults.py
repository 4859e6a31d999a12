"""The saved waveforms of failed points: a CSV and a PNG each, for inspection.

Every failed point whose simulation ran is written to ``<out>/failed/<cell>/<index>-<slug>``
(``.csv`` and ``.png``): the index counts the cell's failed points in the run's order, the slug
is the point's label. The CSV opens with ``#`` comment lines naming the point (cell, arc, kind,
state, edges, slew, loads), the reason and the units; then a header row (``time_s`` and one
``<node>_V`` column per node) and the samples, SI. The PNG draws the same voltages over time
with the library's delay and slew thresholds as horizontal lines.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Sequence
from pathlib import Path

from charflow.config.library import LibraryConfig
from charflow.io.atomic import write_atomic
from charflow.records import logic
from charflow.records.errors import OutputError
from charflow.records.lazy import deferred
from charflow.records.outcomes import Failure, Waveform
from charflow.records.points import (
    ConstraintPoint,
    FunctionPoint,
    LeakagePoint,
    PulsePoint,
    TimingPoint,
    TogglePoint,
    Work,
)

# The drawing needs matplotlib, seconds of start-up that a run without failed points never pays.
plot = deferred("charflow.io.faultplot")

FOLDER = "failed"
SLUG_LENGTH = 72


def paths(failures: Iterable[Failure]) -> dict[Work, tuple[str, str]]:
    """(CSV, PNG) path relative to the output folder, per failed point that has a waveform."""
    out: dict[Work, tuple[str, str]] = {}
    count: dict[str, int] = {}
    for f in failures:
        if f.waveform is None:
            continue
        cell = f.point.cell
        count[cell] = count.get(cell, 0) + 1
        label = f.point.label.replace("!", "not")  # a `when` of !IB is not one of IB
        slug = re.sub(r"[^A-Za-z0-9.+]+", "-", label).strip("-")[:SLUG_LENGTH]
        stem = f"{FOLDER}/{_safe(cell)}/{count[cell]:03d}-{slug.rstrip('-')}"
        out[f.point] = (f"{stem}.csv", f"{stem}.png")
    return out


def _safe(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.+-]+", "_", name)


def describe(p: Work) -> list[tuple[str, str]]:
    """The point's coordinates, named, with their units (SI)."""
    if isinstance(p, TimingPoint):
        side = " ".join(f"{pin}={int(v)}" for pin, v in p.side) or "-"
        other = "-" if p.other_load is None else f"{p.other_load:.6g} F"
        return [
            ("arc", f"{p.related}->{p.output}"),
            ("kind", p.kind),
            ("when", logic.when_condition(p.state_side) or "-"),
            ("side inputs", side),
            ("input edge", p.input_edge),
            ("output edge", p.output_edge),
            ("slew", f"{p.slew:.6g} s"),
            ("load", f"{p.load:.6g} F"),
            ("other load", other),
        ]
    if isinstance(p, TogglePoint):
        return [
            ("pin", p.related),
            ("kind", "hidden-power toggle"),
            ("when", logic.when_condition(p.side) or "-"),
            ("input edge", p.input_edge),
            ("slew", f"{p.slew:.6g} s"),
            ("load", f"{p.load:.6g} F"),
        ]
    if isinstance(p, ConstraintPoint):
        return [
            ("arc", f"{p.related}->{p.constrained}"),
            ("kind", p.kind),
            ("data edge", p.data_edge),
            ("clock edge", p.clock_edge),
            ("data slew", f"{p.data_slew:.6g} s"),
            ("clock slew", f"{p.clock_slew:.6g} s"),
        ]
    if isinstance(p, PulsePoint):
        return [
            ("pin", p.pin),
            ("kind", f"minimum {p.level} pulse"),
            ("slew", f"{p.slew:.6g} s"),
        ]
    if isinstance(p, LeakagePoint):
        return [("kind", "leakage"), ("states", str(p.states))]
    if isinstance(p, FunctionPoint):
        return [("kind", "function check"), ("vectors", str(p.vectors))]
    raise TypeError(f"not a sweep point: {p!r}")


def csv_text(config: LibraryConfig, failure: Failure, w: Waveform) -> str:
    names = [name for name, _ in w.nodes]
    lines = [
        "# charflow: the simulation of a point that gave no measurement",
        f"# library: {config.name}",
        f"# cell: {failure.point.cell}",
        f"# point: {failure.point.label}",
        *(f"# {key}: {value}" for key, value in describe(failure.point)),
        f"# reason: {' '.join(failure.reason.split())}",
        f"# units: time_s in s; {', '.join(f'{n}_V' for n in names)} in V (node voltages)",
        ",".join(["time_s", *(f"{n}_V" for n in names)]),
    ]
    columns = [w.time, *(v for _, v in w.nodes)]
    lines += (",".join(f"{x:.9g}" for x in row) for row in zip(*columns, strict=True))
    return "\n".join(lines) + "\n"


def write(
    config: LibraryConfig, failures: Sequence[Failure], out_dir: Path, cells: Iterable[str] = ()
) -> list[Path]:
    """Write every failed point's waveform (see the module text). The waveforms a previous run
    left for the failed points' cells and for ``cells`` (those the run covers) go first, so
    those folders show this run only."""

    out_dir = Path(out_dir)
    for cell in dict.fromkeys([*cells, *(f.point.cell for f in failures)]):
        folder = out_dir / FOLDER / _safe(cell)
        try:
            for old in (*folder.glob("*.csv"), *folder.glob("*.png")):
                old.unlink()
        except OSError as exc:
            raise OutputError(f"cannot remove an old waveform: {exc}", file=folder) from exc
    written = []
    where = paths(failures)
    for f in failures:
        if f.point not in where or f.waveform is None:  # ``paths`` left it out: no waveform
            continue
        csv_path, png_path = (out_dir / p for p in where[f.point])
        write_atomic(csv_path, csv_text(config, f, f.waveform))
        write_atomic(png_path, plot.png_bytes(config, f, f.waveform))
        written += [csv_path, png_path]
    return written
