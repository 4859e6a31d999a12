"""Writing the Liberty open format.

Values are converted from SI to the library's units here and nowhere else. Table
templates are shared: one ``lu_table_template`` per distinct pair of index vectors, and one
``power_lut_template`` per distinct set of power table indices. Internal energy is written in
capacitive_load_unit × voltage_unit² (1pf × 1V² = 1pJ), leakage in a ``leakage_power_unit`` of
one such energy unit per time unit (1pJ/1ns = 1mW).

A two-output cell's tables take the other output's load as a third index. Synthesis and timing
tools read that form badly or not at all (yosys's ABC aborts on it; OpenSTA's power report
refuses its internal_power), so the default file holds those tables reduced to two axes by
``[liberty] other_load`` and the three-axis form goes to a second file (``file_names``).

Limits (``limits``): an output's ``max_capacitance`` is the largest load that every table
indexed by that output's load covers, an input's ``max_transition`` the largest slew that every
table indexed by that input's slew covers, and an output's ``max_transition`` the largest
transition its tables hold, each times its ``[liberty]`` factor. An axis of one value makes a
table constant along it and sets no limit. Beyond them a tool extrapolates the tables.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Any

import numpy as np

from charflow.config.library import CellSpec, LibraryConfig
from charflow.records import logic
from charflow.records.errors import ConfigError, TableError
from charflow.records.names import pin_name, table_name
from charflow.records.points import State
from charflow.records.units import energy_unit, power_unit
from charflow.tables import power as power_tables
from charflow.tables import tabulate
from charflow.tables.power import ArcPower, CellPower
from charflow.tables.table import Axis, Table, drop_axis
from charflow.tables.tabulate import ArcTables, CellTables

# Types only: the sigma tables' module needs scipy, which a library without them never loads.
if TYPE_CHECKING:
    from charflow.tables.spread import ArcSpread, SigmaTable

VALUE_FORMAT = "{:.7g}"
# Liberty's order of the four NLDM tables inside a timing group (common practice).
TIMING_QUANTITIES = ("cell_rise", "rise_transition", "cell_fall", "fall_transition")
THREE_AXIS_SUFFIX = ".3d"  # <library>.3d.lib: the tables with the other output's load
TRANSITIONS = ("rise_transition", "fall_transition")


def file_names(config: LibraryConfig) -> tuple[str, str]:
    """The default Liberty file and the one with the three-axis tables of two-output cells."""
    return f"{config.name}.lib", f"{config.name}{THREE_AXIS_SUFFIX}.lib"


def has_three_axes(cells: Iterable[CellTables]) -> bool:
    """Whether any table takes the other output's load: only then is there a second file."""
    return any(arc.arc.other for cell in cells for arc in cell.arcs)


def other_load_rule(config: LibraryConfig) -> str:
    """The reduction of the default file's tables, in words and library units."""
    rule = config.liberty.other_load
    if isinstance(rule, str):
        how = f"the {rule} value over the other output's characterized loads, point by point"
    else:
        how = f"linearly interpolated at the other output's load {_fmt(rule / config.cap_scale)}"
        how += f" {config.cap_unit}"
    return (
        f"tables of two-output cells reduced to two axes: {how}; the tables with the other "
        f"output's load as index_3 are in {file_names(config)[1]}"
    )


def limit_rule(config: LibraryConfig) -> str:
    """How the limits were derived, in words."""
    o = config.liberty
    return (
        f"limits: max_capacitance = {_fmt(o.load_limit_factor)} x the largest load every table "
        f"of the output covers; max_transition = {_fmt(o.slew_limit_factor)} x the largest "
        "slew every table of an input covers, or the largest transition of an output's tables; "
        "library defaults: the smallest of these"
    )


def _fmt(x: float) -> str:
    return VALUE_FORMAT.format(x)


def _comment(text: str) -> str:
    return " ".join(text.replace("*/", "* /").split())


def _index(values: Iterable[float], scale: float) -> str:
    return '("' + ", ".join(_fmt(v / scale) for v in values) + '")'


class _Writer:
    def __init__(self, notes: Mapping[str, str] | None = None) -> None:
        self.lines: list[str] = []
        self.depth = 0
        self.notes = notes or {}

    def note(self, name: str) -> None:
        """The comment on the table or pin value ``name`` (as ``charflow diff`` names it)."""
        if name in self.notes:
            self.lines.append("  " * self.depth + f"/* {_comment(self.notes[name])} */")

    def attr(self, name: str, value: str) -> None:
        self.lines.append("  " * self.depth + f"{name} : {value} ;")

    def complex(self, name: str, args: str) -> None:
        self.lines.append("  " * self.depth + f"{name} {args} ;")

    def open(self, group: str, name: str = "") -> None:
        self.lines.append("  " * self.depth + f"{group} ({name}) {{")
        self.depth += 1

    def close(self) -> None:
        self.depth -= 1
        self.lines.append("  " * self.depth + "}")


# --- Reducing the other output's load -----------------------------------------------------


def _flat_tables(tables: Iterable[Table], rule: str | float) -> tuple[Table, ...]:
    axes = (tabulate.OTHER_LOAD_AXIS, power_tables.OTHER_LOAD_AXIS)
    out = []
    for table in tables:
        for name in axes:
            table = drop_axis(table, name, rule)
        out.append(table)
    return tuple(out)


def _flat_arc(arc: ArcTables, rule: str | float) -> ArcTables:
    states = tuple(replace(st, tables=_flat_tables(st.tables, rule)) for st in arc.states)
    return ArcTables(replace(arc.arc, other=None), _flat_tables(arc.default, rule), states)


def _flat_sigma(tables: tuple[SigmaTable, ...], rule: str | float) -> tuple[SigmaTable, ...]:
    flat = _flat_tables((s.table for s in tables), rule)
    return tuple(replace(s, table=t) for s, t in zip(tables, flat, strict=True))


def _flat_energy(arc: ArcPower, rule: str | float) -> ArcPower:
    states = tuple((state, _flat_tables(tables, rule)) for state, tables in arc.states)
    return ArcPower(replace(arc.arc, other=None), _flat_tables(arc.default, rule), states)


def flatten(
    config: LibraryConfig, cells: Iterable[CellTables], powers: Iterable[CellPower]
) -> tuple[tuple[CellTables, ...], tuple[CellPower, ...]]:
    """The cells and their power with every table on the other output's load reduced to two
    axes by ``config.liberty.other_load``; arcs no longer name the other output."""
    rule = config.liberty.other_load
    flat = tuple(replace(c, arcs=tuple(_flat_arc(a, rule) for a in c.arcs)) for c in cells)
    flat_power = tuple(
        replace(p, arcs=tuple(_flat_energy(a, rule) for a in p.arcs)) for p in powers
    )
    return flat, flat_power


# --- Limits --------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class PinLimit:
    cell: str
    pin: str
    max_transition: float | None  # s
    max_capacitance: float | None = None  # F, outputs only


@dataclass(frozen=True, slots=True)
class Limits:
    pins: tuple[PinLimit, ...]
    default_max_transition: float | None  # s
    default_max_capacitance: float | None  # F

    def of(self, cell: str, pin: str) -> PinLimit | None:
        return next((p for p in self.pins if (p.cell, p.pin) == (cell, pin)), None)


def _pin_axes(
    tables: Iterable[Table], roles: Mapping[str, str | None]
) -> Iterator[tuple[str, Axis]]:
    """(pin, axis) for every axis of ``tables`` that ``roles`` names a pin for."""
    for table in tables:
        for axis in table.axes:
            pin = roles.get(axis.name)
            if pin is not None:
                yield pin, axis


def _cell_axes(cell: CellTables, energy: CellPower | None) -> Iterator[tuple[str, Axis]]:
    """Every table axis of a cell that stands for one pin's slew or load."""
    for arc in cell.arcs:
        a = arc.arc
        roles = {
            tabulate.SLEW_AXIS: a.related,
            tabulate.LOAD_AXIS: a.output,
            tabulate.OTHER_LOAD_AXIS: a.other,
        }
        yield from _pin_axes((*arc.default, *(t for s in arc.states for t in s.tables)), roles)
    for c in cell.constraints:
        roles = {tabulate.CONSTRAINED_AXIS: c.pin, tabulate.RELATED_AXIS: c.related}
        yield from _pin_axes(c.tables, roles)
    if energy is None:
        return
    for e in energy.arcs:
        roles = {
            power_tables.SLEW_AXIS: e.arc.related,
            power_tables.LOAD_AXIS: e.arc.output,
            power_tables.OTHER_LOAD_AXIS: e.arc.other,
        }
        yield from _pin_axes((*e.default, *(t for _, ts in e.states for t in ts)), roles)
    for h in energy.hidden:
        yield from _pin_axes(h.tables, {power_tables.SLEW_AXIS: h.pin})


def _covered(axes: Iterable[tuple[str, Axis]], pin: str) -> float | None:
    """The largest value every axis of ``pin`` with more than one value reaches."""
    tops = [axis.values[-1] for p, axis in axes if p == pin and len(axis) > 1]
    return min(tops) if tops else None


def _scaled(value: float | None, factor: float) -> float | None:
    return None if value is None else value * factor


def limits(
    config: LibraryConfig, cells: Iterable[CellTables], powers: Iterable[CellPower] = ()
) -> Limits:
    """The limits of every pin, from the full (unreduced) tables; see the module's notes."""
    o = config.liberty
    energies = {p.cell: p for p in powers}
    pins: list[PinLimit] = []
    for cell in cells:
        name = cell.cell.name
        axes = list(_cell_axes(cell, energies.get(name)))
        for pin in cell.cell.inputs:
            pins.append(PinLimit(name, pin, _scaled(_covered(axes, pin), o.slew_limit_factor)))
        for out in cell.cell.outputs:
            own = [t for a in cell.arcs if a.arc.output == out.pin for t in a.default]
            moves = [float(np.max(t.values)) for t in own if t.quantity in TRANSITIONS]
            pins.append(
                PinLimit(
                    name,
                    out.pin,
                    max(moves) * o.slew_limit_factor if moves else None,
                    _scaled(_covered(axes, out.pin), o.load_limit_factor),
                )
            )
    inputs = {(c.cell.name, p) for c in cells for p in c.cell.inputs}
    slews = [p.max_transition for p in pins if (p.cell, p.pin) in inputs and p.max_transition]
    loads = [p.max_capacitance for p in pins if p.max_capacitance is not None]
    return Limits(tuple(pins), min(slews, default=None), min(loads, default=None))


# --- Supplies ------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class SupplyPin:
    """A cell's supply or body pin as Liberty's ``pg_pin``, and its ``voltage_map`` entry."""

    name: str
    pg_type: str  # primary_power | primary_ground (body pins: nwell | pwell)
    voltage: float  # V
    voltage_name: str  # the supply's own name; a tied body pin shares its supply's


def _bias_name(pin: str, volts: float) -> str:
    """A biased body pin's voltage_map name, e.g. ``VPB_1p5V``: one name per pin and voltage."""
    return f"{pin}_{_fmt(volts).replace('-', 'm').replace('.', 'p')}V"


def supply_pins(config: LibraryConfig, cell: CellSpec) -> tuple[SupplyPin, ...]:
    """The cell's supply pins: power, ground, then its body pins with pg_type nwell (at the
    supply's voltage unless biased) or pwell (at ground's unless biased)."""
    vdd = config.process.vdd
    tied = {"nwell": (vdd, cell.power), "pwell": (0.0, cell.ground)}
    body = (
        SupplyPin(b.pin, b.kind, *tied[b.kind])
        if b.voltage is None
        else SupplyPin(b.pin, b.kind, b.voltage, _bias_name(b.pin, b.voltage))
        for b in cell.body
    )
    return (
        SupplyPin(cell.power, "primary_power", vdd, cell.power),
        SupplyPin(cell.ground, "primary_ground", 0.0, cell.ground),
        *body,
    )


def voltage_map(config: LibraryConfig) -> dict[str, float]:
    """Every supply name of the library and its voltage; one name cannot carry two."""
    volts: dict[str, float] = {}
    for cell in config.cells:
        for pin in supply_pins(config, cell):
            if volts.setdefault(pin.voltage_name, pin.voltage) != pin.voltage:
                raise ConfigError(
                    f"supply {pin.voltage_name} is at {_fmt(volts[pin.voltage_name])} V in "
                    f"another cell and at {_fmt(pin.voltage)} V ({pin.name}, {pin.pg_type}) "
                    "here: give it another name",
                    file=config.path,
                    cell=cell.name,
                )
    return volts


# --- Writing -------------------------------------------------------------------------------


def _axis_scale(config: LibraryConfig, name: str) -> float:
    """Library unit of an index variable: capacitances in cap_unit, transitions in time_unit."""
    return config.cap_scale if name.endswith("capacitance") else config.time_scale


def _scales(config: LibraryConfig, table: Table) -> list[float]:
    return [_axis_scale(config, a.name) for a in table.axes]


def _value_scale(config: LibraryConfig, table: Table) -> float:
    # Energy's library unit is one capacitance unit times (1 V)^2.
    return {"s": config.time_scale, "F": config.cap_scale, "J": config.cap_scale}[table.unit]


# A table template's key: its axes' names and index values.
TemplateKey = tuple[tuple[str, tuple[float, ...]], ...]


def templates(config: LibraryConfig, cells: Iterable[CellTables]) -> dict[TemplateKey, str]:
    """Template name per distinct (axis names, index values)."""
    tables = [t for cell in cells for arc in cell.arcs for t in arc.default]
    tables += [t for cell in cells for c in cell.constraints for t in c.tables]
    tables += [t for cell in cells for c in cell.pulse_tables for t in c.tables]
    return _template_names(tables, "grid")


def power_templates(cells: Iterable[CellPower]) -> dict[TemplateKey, str]:
    """Power template name per distinct (axis names, index values)."""
    tables = [t for cell in cells for a in cell.arcs for t in a.default]
    tables += [t for cell in cells for a in cell.arcs for _, ts in a.states for t in ts]
    tables += [t for cell in cells for h in cell.hidden for t in h.tables]
    return _template_names(tables, "energy")


def _template_names(tables: Iterable[Table], prefix: str) -> dict[TemplateKey, str]:
    """One template name per distinct (axis names, index values), in order of first use."""
    names: dict[TemplateKey, str] = {}
    for table in tables:
        key = tuple((a.name, a.values) for a in table.axes)
        if key not in names:
            shape = "x".join(str(len(a.values)) for a in table.axes)
            names[key] = f"{prefix}_{shape}_{len(names) + 1}"
    return names


def _template_of(names: dict[TemplateKey, str], table: Table) -> str:
    return names[tuple((a.name, a.values) for a in table.axes)]


def write_table(
    w: _Writer, config: LibraryConfig, table: Table, template: str, sigma_type: str = ""
) -> None:
    w.open(table.quantity, template)
    if sigma_type:  # a variation group (ocv_sigma_*): which side of the spread it is
        w.attr("sigma_type", sigma_type)
    for k, (axis, scale) in enumerate(zip(table.axes, _scales(config, table), strict=True), 1):
        w.complex(f"index_{k}", _index(axis.values, scale))
    scaled = np.asarray(table.values) / _value_scale(config, table)
    rows = scaled.reshape(-1, scaled.shape[-1]) if scaled.ndim > 1 else scaled.reshape(1, -1)
    text = ", \\\n".join(
        "  " * (w.depth + 1) + '"' + ", ".join(_fmt(x) for x in row) + '"' for row in rows
    )
    w.lines.append("  " * w.depth + "values ( \\")
    w.lines.append(text + " ) ;")
    w.close()


def _timing_type(config: LibraryConfig, arc: ArcTables) -> str:
    kind = arc.arc.kind
    if kind == "clock":
        edge = config.cell(arc.arc.cell).flip_flop.edge
        return "rising_edge" if edge == "rise" else "falling_edge"
    return kind  # combinational, clear, preset


def _timing_group(
    w: _Writer,
    config: LibraryConfig,
    names: dict[TemplateKey, str],
    arc: ArcTables,
    tables: tuple[Table, ...],
    state: State | None = None,
    sigma: tuple[SigmaTable, ...] = (),
) -> None:
    """One timing group: the arc's default tables, or one sensitizing state's (``when`` and
    the same condition in SDF's syntax, ``sdf_cond``), with their ``sigma`` tables after."""
    spec = arc.arc
    when = state.when if state is not None else ""
    w.open("timing")
    w.attr("related_pin", f'"{spec.related}"')
    if spec.other:
        w.attr("related_output_pin", f'"{spec.other}"')
    w.attr("timing_sense", state.sense if state is not None else spec.sense)
    w.attr("timing_type", _timing_type(config, arc))
    if state is not None and when:
        w.attr("when", f'"{when}"')
        w.attr("sdf_cond", f'"{logic.sdf_condition(state.side)}"')
    by_quantity = {t.quantity: t for t in tables}
    for quantity in TIMING_QUANTITIES:
        table = by_quantity.get(quantity)
        if table is not None:
            w.note(table_name(spec.cell, spec.related, spec.output, when, quantity, spec.kind))
            write_table(w, config, table, _template_of(names, table))
    for s in sigma:
        write_table(w, config, s.table, _template_of(names, s.table), s.sigma_type)
    w.close()


def _internal_power(
    w: _Writer,
    config: LibraryConfig,
    names: dict[TemplateKey, str],
    tables: Iterable[Table],
    related: str = "",
    when: str = "",
    other: str | None = None,
    owner: tuple[str, str] | None = None,
) -> None:
    """``owner``: the cell and output pin of an arc's tables, which may carry notes."""
    w.open("internal_power")
    if related:
        w.attr("related_pin", f'"{related}"')
    if other:
        # The output whose load is the tables' third index (3D tables of a two-output cell).
        w.attr("equal_or_opposite_output", f'"{other}"')
    if when:
        w.attr("when", f'"{when}"')
    for table in tables:
        if owner is not None:
            w.note(table_name(owner[0], related, owner[1], when, table.quantity))
        write_table(w, config, table, _template_of(names, table))
    w.close()


def _leakage(w: _Writer, cell: CellPower, scale: float) -> None:
    w.attr("cell_leakage_power", _fmt(cell.cell_leakage / scale))
    for state in cell.leakage:
        w.open("leakage_power")
        if state.when:
            w.attr("when", f'"{state.when}"')
        w.attr("value", _fmt(state.power / scale))
        w.close()


def liberty_pin_cap(config: LibraryConfig, cell: str, pin: tabulate.PinCap) -> tabulate.PinCap:
    """``pin`` with the rise and fall capacitance ``[liberty] pin_capacitance`` picks: the
    whole edge's (the default) or the charge up to the input's delay threshold."""
    if config.liberty.pin_capacitance == "whole-edge":
        return pin
    for edge in ("rise", "fall"):
        if getattr(pin, edge) is not None and getattr(pin, f"{edge}_to_threshold") is None:
            raise TableError(
                f"pin {pin.pin} has no {edge} capacitance up to its delay threshold (a "
                "flip-flop's pins are measured over the whole edge only): set "
                '[liberty] pin_capacitance = "whole-edge", or leave the cell out (--cell)',
                file=config.path,
                key="liberty.pin_capacitance",
                cell=cell,
                pin=pin.pin,
            )
    return replace(pin, rise=pin.rise_to_threshold, fall=pin.fall_to_threshold)


def _header(
    w: _Writer, config: LibraryConfig, header: Sequence[str], three_axes: bool | None
) -> None:
    """The comments above the library group; ``three_axes`` None: no two-output tables."""
    leakage_unit, _ = power_unit(config.time_unit, config.cap_unit)
    w.lines.append(f"/* {config.name}: written by charflow from {config.path.name} */")
    w.lines += [f"/* {_comment(line)} */" for line in header]
    w.lines.append(
        f"/* internal_power tables: energy per transition in 1{energy_unit(config.cap_unit)} "
        f"(capacitive_load_unit x voltage_unit^2); leakage in {leakage_unit} */"
    )
    if three_axes is False:
        w.lines.append(f"/* {_comment(other_load_rule(config))} */")
    elif three_axes:
        w.lines.append(
            "/* tables of two-output cells keep the other output's load as index_3; "
            f"{file_names(config)[0]} holds them reduced to two axes for tools that need that */"
        )
    w.lines.append(f"/* {_comment(limit_rule(config))} */")
    if config.liberty.pin_capacitance != "whole-edge":
        w.lines.append(
            "/* input pins' capacitance: the charge up to the input's delay threshold over the "
            "swing to it ([liberty] pin_capacitance); the whole edge's is in the JSON */"
        )


def _library_attributes(w: _Writer, config: LibraryConfig, limit: Limits) -> None:
    p = config.process
    t = config.thresholds
    w.attr("delay_model", "table_lookup")
    w.attr("time_unit", f'"1{config.time_unit}"')
    w.attr("voltage_unit", '"1V"')
    w.attr("current_unit", '"1mA"')
    w.attr("pulling_resistance_unit", '"1kohm"')
    w.attr("leakage_power_unit", f'"{power_unit(config.time_unit, config.cap_unit)[0]}"')
    w.complex("capacitive_load_unit", f"(1, {config.cap_unit})")
    for name, volts in voltage_map(config).items():
        w.complex("voltage_map", f"({name}, {_fmt(volts)})")
    w.attr("nom_process", "1")
    w.attr("nom_voltage", _fmt(p.vdd))
    w.attr("nom_temperature", _fmt(p.temperature))
    corner = config.corner_name
    w.open("operating_conditions", corner)
    w.attr("process", "1")
    w.attr("voltage", _fmt(p.vdd))
    w.attr("temperature", _fmt(p.temperature))
    w.close()
    w.attr("default_operating_conditions", corner)
    for edge in ("rise", "fall"):
        w.attr(f"input_threshold_pct_{edge}", _fmt(100 * t.delay_input(edge)))
        w.attr(f"output_threshold_pct_{edge}", _fmt(100 * t.delay_output(edge)))
    for edge in ("rise", "fall"):
        lower, upper = t.slew_band(edge)
        w.attr(f"slew_lower_threshold_pct_{edge}", _fmt(100 * lower))
        w.attr(f"slew_upper_threshold_pct_{edge}", _fmt(100 * upper))
    w.attr("slew_derate_from_library", _fmt(t.slew_derate))
    if limit.default_max_transition is not None:
        w.attr("default_max_transition", _fmt(limit.default_max_transition / config.time_scale))
    if limit.default_max_capacitance is not None:
        w.attr("default_max_capacitance", _fmt(limit.default_max_capacitance / config.cap_scale))


def _templates(
    w: _Writer, config: LibraryConfig, group: str, names: dict[TemplateKey, str]
) -> None:
    for key, name in names.items():
        w.open(group, name)
        for k, (axis_name, _) in enumerate(key, 1):
            w.attr(f"variable_{k}", axis_name)
        for k, (axis_name, values) in enumerate(key, 1):
            w.complex(f"index_{k}", _index(values, _axis_scale(config, axis_name)))
        w.close()


@dataclass(frozen=True, slots=True)
class _Context:
    """What every cell's groups are written with."""

    config: LibraryConfig
    names: dict[TemplateKey, str]
    energy_names: dict[TemplateKey, str]
    limits: Limits
    # The sigma tables of each timing group, by (cell, related pin, output, when or None for
    # the arc's default group).
    spread: Mapping[tuple[str, str, str, str | None], tuple[SigmaTable, ...]] = field(
        default_factory=dict
    )


def _signal_pin(w: _Writer, ctx: _Context, cell: CellSpec, pin: str, direction: str) -> None:
    """Open a signal pin's group with its direction, supplies and limits."""
    w.open("pin", pin)
    w.attr("direction", direction)
    primary = {s.pg_type: s.name for s in supply_pins(ctx.config, cell)}
    w.attr("related_power_pin", f'"{primary["primary_power"]}"')
    w.attr("related_ground_pin", f'"{primary["primary_ground"]}"')
    limit = ctx.limits.of(cell.name, pin)
    if limit is not None and limit.max_capacitance is not None:
        w.attr("max_capacitance", _fmt(limit.max_capacitance / ctx.config.cap_scale))
    if limit is not None and limit.max_transition is not None:
        w.attr("max_transition", _fmt(limit.max_transition / ctx.config.time_scale))


def _input_pin(
    w: _Writer, ctx: _Context, cell: CellTables, pin: tabulate.PinCap, energy: CellPower | None
) -> None:
    config, spec = ctx.config, cell.cell
    _signal_pin(w, ctx, spec, pin.pin, "input")
    if spec.flop is not None and pin.pin == spec.flip_flop.clock:
        w.attr("clock", "true")
    w.note(pin_name(spec.name, pin.pin, "capacitance"))
    pin = liberty_pin_cap(config, spec.name, pin)
    # An edge no run made is left out (``tabulate`` warns), never copied.
    for name, cap in (("", pin.capacitance), ("rise_", pin.rise), ("fall_", pin.fall)):
        if cap is not None:
            w.attr(f"{name}capacitance", _fmt(cap / config.cap_scale))
    for h in (h for h in (energy.hidden if energy else ()) if h.pin == pin.pin):
        _internal_power(w, config, ctx.energy_names, h.tables, when=h.when)
    # A pulse no width failed has no minimum: left out (``tabulate`` warns). The attributes are
    # the sharpest slew's; a table over the pin's slew follows with the constraints.
    sharpest = min(spec.grid.pulse_slews)
    for level, width in (
        (p.level, p.width)
        for p in cell.pulses
        if p.pin == pin.pin and p.width is not None and p.slew == sharpest
    ):
        w.attr(f"min_pulse_width_{level}", _fmt(width / config.time_scale))
    for c in (c for c in (*cell.constraints, *cell.pulse_tables) if c.pin == pin.pin):
        w.open("timing")
        w.attr("related_pin", f'"{c.related}"')
        w.attr("timing_type", c.timing_type)
        for table in c.tables:
            w.note(table_name(spec.name, c.related, c.pin, "", table.quantity, c.timing_type))
            write_table(w, config, table, _template_of(ctx.names, table))
        w.close()
    w.close()


def _output_pin(
    w: _Writer, ctx: _Context, cell: CellTables, out: str, energy: CellPower | None
) -> None:
    config, spec = ctx.config, cell.cell
    _signal_pin(w, ctx, spec, out, "output")
    function = next(o.function for o in spec.outputs if o.pin == out)
    w.attr("function", f'"{function.to_liberty()}"')
    for arc in (a for a in cell.arcs if a.arc.output == out):
        key = (spec.name, arc.arc.related, out)
        sigma = ctx.spread.get((*key, None), ())
        _timing_group(w, config, ctx.names, arc, arc.default, sigma=sigma)
        if len(arc.states) > 1:
            for st in arc.states:
                sigma = ctx.spread.get((*key, st.state.when), ())
                _timing_group(w, config, ctx.names, arc, st.tables, st.state, sigma)
    for power in (a for a in (energy.arcs if energy else ()) if a.arc.output == out):
        related, other = power.arc.related, power.arc.other
        owner = (spec.name, out)
        _internal_power(
            w, config, ctx.energy_names, power.default, related, other=other, owner=owner
        )
        if len(power.states) > 1:
            for state, tables in power.states:
                _internal_power(
                    w, config, ctx.energy_names, tables, related, state.when, other, owner
                )
    w.close()


def _cell(w: _Writer, ctx: _Context, cell: CellTables, energy: CellPower | None) -> None:
    config, spec = ctx.config, cell.cell
    w.open("cell", spec.name)
    w.attr("area", _fmt(spec.area))
    for supply in supply_pins(config, spec):
        w.open("pg_pin", supply.name)
        w.attr("voltage_name", supply.voltage_name)
        w.attr("pg_type", supply.pg_type)
        w.close()
    if energy is not None:
        _leakage(w, energy, power_unit(config.time_unit, config.cap_unit)[1])
    flop = spec.flop
    if flop is not None:
        w.open("ff", ", ".join(flop.state))
        w.attr("clocked_on", f'"{flop.clocked_on}"')
        w.attr("next_state", f'"{flop.next_state.to_liberty()}"')
        if flop.clear is not None:
            w.attr("clear", f'"{flop.clear.to_liberty()}"')
        if flop.preset is not None:
            w.attr("preset", f'"{flop.preset.to_liberty()}"')
        w.close()
    for pin in cell.pins:
        _input_pin(w, ctx, cell, pin, energy)
    for out in spec.outputs:
        _output_pin(w, ctx, cell, out.pin, energy)
    w.close()


def render(
    config: LibraryConfig,
    cells: tuple[CellTables, ...],
    powers: Iterable[CellPower] = (),
    *,
    header: Sequence[str] = (),
    notes: Mapping[str, str] | None = None,
    three_axes: bool = False,
    spread: Iterable[ArcSpread] = (),
) -> str:
    """The whole library as Liberty text; ``powers`` adds each named cell's power groups.
    ``header`` lines become comments at the top, ``notes`` comments beside the tables and pin
    values they name (``diff.table_name``, ``diff.pin_name``). Two-output cells' tables are
    reduced to two axes (``flatten``) unless ``three_axes``; ``spread`` adds the sigma tables
    (Liberty's ocv_sigma groups) to the timing groups they name."""
    powers = tuple(powers)
    limit = limits(config, cells, powers)
    has_3d = has_three_axes(cells)
    if not three_axes:
        cells, powers = flatten(config, cells, powers)
    by_cell = {c.cell: c for c in powers}
    w = _Writer(notes)
    _header(w, config, header, three_axes if has_3d else None)
    w.open("library", config.name)
    _library_attributes(w, config, limit)
    sigma = {(a.cell, a.related, a.output, a.when): a.tables for a in spread}
    if not three_axes:
        sigma = {k: _flat_sigma(v, config.liberty.other_load) for k, v in sigma.items()}
    names = templates(config, cells)
    ctx = _Context(config, names, power_templates(powers), limit, sigma)
    _templates(w, config, "lu_table_template", ctx.names)
    _templates(w, config, "power_lut_template", ctx.energy_names)
    for cell in cells:
        _cell(w, ctx, cell, by_cell.get(cell.cell.name))
    w.close()
    return "\n".join(w.lines) + "\n"


def describe(
    config: LibraryConfig, cells: tuple[CellTables, ...], powers: Iterable[CellPower] = ()
) -> dict[str, Any]:
    """For the JSON: the Liberty files, the reduction of the default file and the limits (SI)."""
    default, full = file_names(config)
    limit = limits(config, cells, powers)
    o = config.liberty
    return {
        "file": default,
        "three_axis_file": full if has_three_axes(cells) else None,
        "other_load": o.other_load if isinstance(o.other_load, str) else {"load_F": o.other_load},
        "other_load_rule": other_load_rule(config),
        "load_limit_factor": o.load_limit_factor,
        "slew_limit_factor": o.slew_limit_factor,
        "limit_rule": limit_rule(config),
        "default_max_transition_s": limit.default_max_transition,
        "default_max_capacitance_F": limit.default_max_capacitance,
        "pins": [
            {
                "cell": p.cell,
                "pin": p.pin,
                "max_transition_s": p.max_transition,
                "max_capacitance_F": p.max_capacitance,
            }
            for p in limit.pins
        ],
    }
