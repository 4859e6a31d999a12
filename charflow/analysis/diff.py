"""Comparing two libraries table by table (``charflow diff OLD NEW``).

Either file may be Liberty, read back with the independent ``liberty-parser`` package, or
charflow's JSON; both are read into SI units, so a Liberty file compares with a JSON file too.
Tables are matched by name: cell, arc (related pin -> pin), the arc's kind when it is not
combinational (clock, clear, preset, setup_rising, ...), ``when`` and quantity; pin
capacitances and minimum pulse widths are compared as one-value tables. The change of a table
is its largest relative change over its points.
"""

from __future__ import annotations

import base64
import html
import io
import json
import math
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from charflow.io.atomic import write_atomic
from charflow.records.errors import DiffError
from charflow.records.names import (
    CONSTRAINT_QUANTITIES,
    PIN_QUANTITIES,
    PULSE_QUANTITIES,
    TIMING_QUANTITIES,
    pin_name,
    table_name,
)
from charflow.tables.table import Table

# Liberty holds 7 significant digits: a Liberty file and its JSON twin differ by up to 5e-7.
TOLERANCE = 1e-6
# A point's change is taken relative to its old value, but never to less than this fraction of
# the table's largest value, so that a delay near zero does not make a small shift look huge.
FLOOR = 0.01
PLOTS = 6  # tables plotted in the HTML report

_UNIT = re.compile(r"^\s*([0-9.eE+-]*)\s*(fs|ps|ns|us|ms|s)\s*$", re.I)
_TIME = {"fs": 1e-15, "ps": 1e-12, "ns": 1e-9, "us": 1e-6, "ms": 1e-3, "s": 1.0}
_CAP = {"ff": 1e-15, "pf": 1e-12, "nf": 1e-9, "uf": 1e-6}


@dataclass(frozen=True, slots=True, eq=False)
class Entry:
    """One table of a library, in SI units; a pin capacitance has no axes."""

    name: str
    axes: tuple[tuple[str, tuple[float, ...]], ...]  # (variable, index values)
    values: np.ndarray
    unit: str  # "s" or "F"


@dataclass(frozen=True, slots=True)
class Change:
    name: str
    relative: float  # signed (new - old) / |old| at the point that changed most
    coords: tuple[tuple[str, float], ...]  # that point's axis values
    old: float
    new: float
    unit: str


@dataclass(frozen=True, slots=True)
class Comparison:
    changed: tuple[Change, ...]  # beyond the tolerance, largest first
    unchanged: tuple[str, ...]
    appeared: tuple[str, ...]  # only in the new library
    vanished: tuple[str, ...]  # only in the old library
    reshaped: tuple[str, ...]  # in both, with different axes: not comparable point by point
    tolerance: float

    @property
    def differs(self) -> bool:
        return bool(self.changed or self.appeared or self.vanished or self.reshaped)


def read(path: str | Path) -> dict[str, Entry]:
    """Every table of a Liberty or charflow JSON file, by name."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError as exc:
        raise DiffError("library file not found", file=path) from exc
    except (OSError, UnicodeDecodeError) as exc:
        raise DiffError(f"cannot read the library: {exc}", file=path) from exc
    if text.lstrip().startswith("{"):
        return _read_json(text, path)
    return _read_liberty(text, path)


def _read_json(text: str, path: Path) -> dict[str, Entry]:
    try:
        doc = json.loads(text)
        entries: dict[str, Entry] = {}
        for cell in doc["cells"]:
            for pin in cell["inputs"]:
                rise, fall = pin["rise_capacitance_F"], pin["fall_capacitance_F"]
                measured = [c for c in (rise, fall) if c is not None]
                caps = (max(measured) if measured else None, rise, fall)
                for quantity, value in zip(PIN_QUANTITIES, caps, strict=True):
                    name = pin_name(cell["name"], pin["pin"], quantity)
                    if value is not None:  # an edge left out of the library
                        entries[name] = Entry(name, (), np.array(float(value)), "F")
            for pulse in _sharpest_pulses(cell.get("min_pulse_widths", [])):
                name = pin_name(cell["name"], pulse["pin"], f"min_pulse_width_{pulse['level']}")
                entries[name] = Entry(name, (), np.array(float(pulse["width_s"])), "s")
            groups = []
            for arc in cell["arcs"]:
                where = (arc["related_pin"], arc["output"], arc.get("kind", "combinational"))
                groups.append((*where, "", arc["tables"]))
                if len(arc["states"]) > 1:
                    groups += [(*where, st["when"], st["tables"]) for st in arc["states"]]
            for c in cell.get("constraints", []):
                groups.append((c["related_pin"], c["pin"], c["timing_type"], "", c["tables"]))
            for related, pin, kind, when, tables in groups:
                for data in tables:
                    t = Table.from_dict(data)
                    name = table_name(cell["name"], related, pin, when, t.quantity, kind)
                    axes = tuple((a.name, a.values) for a in t.axes)
                    entries[name] = Entry(name, axes, np.asarray(t.values), t.unit)
    except (ValueError, KeyError, TypeError) as exc:
        raise DiffError(f"not a charflow JSON library: {exc!r}", file=path) from exc
    return entries


def _sharpest_pulses(pulses: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """The measured pulse widths at each pin and level's sharpest slew: the Liberty file's
    min_pulse_width_high/low (a document without slews holds one per pin and level)."""
    measured = [p for p in pulses if p["width_s"] is not None]
    sharpest: dict[tuple[str, str], float] = {}
    for p in measured:
        key = (p["pin"], p["level"])
        sharpest[key] = min(sharpest.get(key, math.inf), p.get("slew_s", 0.0))
    return [p for p in measured if p.get("slew_s", 0.0) == sharpest[(p["pin"], p["level"])]]


def _text(value: object) -> str:
    """A Liberty attribute as plain text (liberty-parser wraps quoted strings)."""
    return str(getattr(value, "value", value))


def _read_liberty(text: str, path: Path) -> dict[str, Entry]:
    try:
        from liberty.parser import LibertyParserError, parse_liberty
    except ImportError as exc:
        raise DiffError(
            "reading Liberty needs liberty-parser: pip install 'charflow[diff]'", file=path
        ) from exc

    try:
        lib = parse_liberty(text)
    except LibertyParserError as exc:
        raise DiffError(f"not a Liberty file: {exc}", file=path) from exc
    try:
        match = _UNIT.match(_text(lib["time_unit"]))
        if match is None:
            raise DiffError(f"unknown time_unit {_text(lib['time_unit'])}", file=path)
        time_scale = float(match.group(1) or 1) * _TIME[match.group(2).lower()]
        amount, unit = lib["capacitive_load_unit"]
        cap_scale = float(amount) * _CAP[str(unit).lower()]
        templates = {g.args[0]: g for g in lib.get_groups("lu_table_template")}
        entries: dict[str, Entry] = {}
        for cell in lib.get_groups("cell"):
            cname = cell.args[0]
            for pin in cell.get_groups("pin"):
                pname = pin.args[0]
                for quantities, scale, unit in (
                    (PIN_QUANTITIES, cap_scale, "F"),
                    (PULSE_QUANTITIES, time_scale, "s"),
                ):
                    for quantity in quantities:
                        if pin.get(quantity) is not None:
                            name = pin_name(cname, pname, quantity)
                            value = float(pin[quantity]) * scale
                            entries[name] = Entry(name, (), np.array(value), unit)
                for timing in pin.get_groups("timing"):
                    related = _text(timing["related_pin"])
                    when = _text(timing.get("when", ""))
                    kind = _text(timing.get("timing_type", "combinational"))
                    kind = "clock" if kind in ("rising_edge", "falling_edge") else kind
                    for quantity in TIMING_QUANTITIES + CONSTRAINT_QUANTITIES:
                        group = timing.get_groups(quantity)
                        if not group:
                            continue
                        name = table_name(cname, related, pname, when, quantity, kind)
                        entries[name] = _liberty_table(
                            name, group[0], templates, time_scale, cap_scale
                        )
    except (KeyError, TypeError, ValueError, IndexError) as exc:
        raise DiffError(f"a Liberty group charflow cannot compare: {exc!r}", file=path) from exc
    return entries


def _liberty_table(name, group, templates, time_scale: float, cap_scale: float) -> Entry:
    """A table group in SI units; indices come from the group, or else from its template."""
    template = templates.get(group.args[0]) if group.args else None
    axes = []
    for k in (1, 2, 3):
        key = f"index_{k}"
        holder = group if group.get(key) is not None else template
        if holder is None or holder.get(key) is None:
            break
        variable = _text(template[f"variable_{k}"]) if template is not None else key
        scale = time_scale if "transition" in variable else cap_scale
        index = np.asarray(holder.get_array(key), dtype=float).ravel() * scale
        axes.append((variable, tuple(float(v) for v in index)))
    shape = [len(values) for _, values in axes]
    values = np.asarray(group.get_array("values"), dtype=float).reshape(shape) * time_scale
    return Entry(name, tuple(axes), values, "s")


def compare(
    old: dict[str, Entry], new: dict[str, Entry], tolerance: float = TOLERANCE
) -> Comparison:
    changed, unchanged, reshaped = [], [], []
    for name in sorted(old.keys() & new.keys()):
        a, b = old[name], new[name]
        if not _same_axes(a, b, tolerance):
            reshaped.append(name)
            continue
        change = _largest(a, b)
        if abs(change.relative) > tolerance:
            changed.append(change)
        else:
            unchanged.append(name)
    changed.sort(key=lambda c: (-abs(c.relative), c.name))
    return Comparison(
        tuple(changed),
        tuple(unchanged),
        tuple(sorted(new.keys() - old.keys())),
        tuple(sorted(old.keys() - new.keys())),
        tuple(reshaped),
        tolerance,
    )


def _same_axes(a: Entry, b: Entry, tolerance: float) -> bool:
    # Index values read from Liberty carry 7 digits: equal within the tolerance is the same.
    return len(a.axes) == len(b.axes) and all(
        x[0] == y[0] and len(x[1]) == len(y[1]) and np.allclose(x[1], y[1], rtol=tolerance, atol=0)
        for x, y in zip(a.axes, b.axes, strict=True)
    )


def _relative(a: Entry, b: Entry) -> np.ndarray:
    old, new = np.asarray(a.values, float), np.asarray(b.values, float)
    floor = FLOOR * float(np.max(np.abs(old))) if old.size else 0.0
    scale = np.maximum(np.abs(old), floor)
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = np.where(scale > 0, (new - old) / scale, np.where(new == old, 0.0, np.inf))
    return np.atleast_1d(rel)


def _largest(a: Entry, b: Entry) -> Change:
    rel = _relative(a, b)
    flat = int(np.argmax(np.abs(rel)))
    index = np.unravel_index(flat, rel.shape) if a.axes else ()
    coords = tuple((axis[0], axis[1][i]) for axis, i in zip(a.axes, index, strict=True))
    old = float(np.asarray(a.values).reshape(-1)[flat])
    new = float(np.asarray(b.values).reshape(-1)[flat])
    return Change(a.name, float(rel.reshape(-1)[flat]), coords, old, new, a.unit)


def eng(value: float, unit: str) -> str:
    """A value with an SI prefix: 3.12e-11 s -> "31.2 ps"."""
    if value == 0 or not math.isfinite(value):
        return f"{value:g} {unit}"
    exp = max(-15, min(0, 3 * math.floor(math.log10(abs(value)) / 3)))
    prefix = {-15: "f", -12: "p", -9: "n", -6: "u", -3: "m", 0: ""}[exp]
    return f"{value / 10**exp:.4g} {prefix}{unit}"


def _where(change: Change) -> str:
    unit = {True: "s", False: "F"}
    return ", ".join(f"{n} {eng(v, unit['transition' in n])}" for n, v in change.coords)


def report(c: Comparison, old: str, new: str, top: int = 10) -> str:
    """The comparison as text: counts, the largest changes, tables that came and went."""
    lines = [
        f"old: {old}",
        f"new: {new}",
        f"{len(c.changed)} tables changed, {len(c.appeared)} appeared, {len(c.vanished)} "
        f"vanished, {len(c.reshaped)} with other axes, {len(c.unchanged)} unchanged "
        f"(relative tolerance {c.tolerance:g})",
    ]
    if c.changed:
        lines.append(f"largest relative changes ({min(top, len(c.changed))} of {len(c.changed)}):")
        for ch in c.changed[:top]:
            at = f" at {_where(ch)}" if ch.coords else ""
            lines.append(
                f"  {100 * ch.relative:+10.4g} %  {ch.name}{at}: "
                f"{eng(ch.old, ch.unit)} -> {eng(ch.new, ch.unit)}"
            )
    for title, names in (
        ("appeared", c.appeared),
        ("vanished", c.vanished),
        ("axes changed", c.reshaped),
    ):
        if names:
            lines.append(f"{title}:")
            lines.extend(f"  {n}" for n in names)
    return "\n".join(lines) + "\n"


def write_html(
    path: Path,
    c: Comparison,
    old: dict[str, Entry],
    new: dict[str, Entry],
    old_label: str,
    new_label: str,
    top: int = 10,
) -> None:
    """An HTML report: the text report, and plots of the tables that shifted most."""

    esc = html.escape
    parts = [
        "<!DOCTYPE html>",
        '<html><head><meta charset="utf-8"><title>charflow diff</title>',
        "<style>body{font-family:sans-serif;max-width:70em;margin:2em auto}"
        "pre{background:#f4f4f4;padding:1em;overflow-x:auto}</style></head><body>",
        "<h1>charflow diff</h1>",
        f"<pre>{esc(report(c, old_label, new_label, top))}</pre>",
    ]
    plotted = [ch for ch in c.changed if old[ch.name].axes][:PLOTS]
    if plotted:
        parts.append(f"<h2>The {len(plotted)} tables that shifted most</h2>")
    for ch in plotted:
        a, b = old[ch.name], new[ch.name]
        title = f"{ch.name}: {100 * ch.relative:+.3f} %"
        if len(a.axes) > 2:
            third = ", ".join(f"{n} {eng(v[0], 'F')}" for n, v in a.axes[2:])
            title += f" (shown at {third})"
            a, b = _first_slice(a), _first_slice(b)
        png = _plot(a, b)
        parts.append(f"<h3>{esc(title)}</h3>")
        parts.append(f'<img alt="{esc(ch.name)}" src="data:image/png;base64,{png}">')
    parts.append("</body></html>")
    write_atomic(Path(path), "\n".join(parts) + "\n")


def _first_slice(e: Entry) -> Entry:
    """A table of 3 axes cut at the first value of its third axis (the related load)."""
    return Entry(e.name, e.axes[:2], np.asarray(e.values)[..., 0], e.unit)


def _plot(a: Entry, b: Entry) -> str:
    """Old and new values along the table's last axis, and the relative change, as PNG."""
    from matplotlib.figure import Figure

    def scaled(name: str) -> tuple[float, str]:  # plots read best in ps and fF
        return (1e15, "fF") if "capacitance" in name else (1e12, "ps")

    fig = Figure(figsize=(10, 3.8), layout="constrained")
    left, right = fig.subplots(1, 2)
    (last_name, last), first = a.axes[-1], a.axes[0] if len(a.axes) > 1 else None
    xs, xunit = scaled(last_name)
    ys, yunit = scaled("" if a.unit == "s" else "capacitance")
    old = np.asarray(a.values, float).reshape(-1, len(last))
    new = np.asarray(b.values, float).reshape(-1, len(last))
    x = np.asarray(last) * xs
    for i in range(old.shape[0]):
        label = f"{first[0]} {eng(first[1][i], 's')}" if first else None
        (line,) = left.plot(x, old[i] * ys, "--", marker="o", markersize=3)
        left.plot(
            x, new[i] * ys, "-", marker="o", markersize=3, color=line.get_color(), label=label
        )
    left.set_xlabel(f"{last_name} ({xunit})")
    left.set_ylabel(f"{a.name.split()[-1]} ({yunit}); old dashed, new solid")
    if first:
        left.legend(fontsize="small")
    rel = 100 * _relative(a, b).reshape(old.shape)
    # Symmetric colour limits keep the sign of a change readable: red up, blue down.
    limit = float(np.max(np.abs(rel[np.isfinite(rel)]), initial=0.0)) or 1.0
    image = right.imshow(
        rel, aspect="auto", origin="lower", cmap="coolwarm", vmin=-limit, vmax=limit
    )
    right.set_xticks(range(len(last)), [f"{v:.4g}" for v in x])
    right.set_xlabel(f"{last_name} ({xunit})")
    if first:
        fs, funit = scaled(first[0])
        right.set_yticks(range(len(first[1])), [f"{v * fs:.4g}" for v in first[1]])
        right.set_ylabel(f"{first[0]} ({funit})")
    fig.colorbar(image, ax=right, label="relative change (%)")
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=80)
    return base64.b64encode(buffer.getvalue()).decode("ascii")
