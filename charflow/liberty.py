"""Writing the Liberty open format.

Values are converted from SI to the library's units here and nowhere else. Table
templates are shared: one ``lu_table_template`` per distinct pair of index vectors, and one
``power_lut_template`` per distinct set of power table indices. Internal energy is written in
capacitive_load_unit × voltage_unit² (1pf × 1V² = 1pJ), leakage in a ``leakage_power_unit`` of
one such energy unit per time unit (1pJ/1ns = 1mW).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence

import numpy as np

from .config import LibraryConfig
from .diff import pin_name, table_name
from .power import CellPower
from .tables import Table
from .tabulate import ArcTables, CellTables
from .units import energy_unit, power_unit

VALUE_FORMAT = "{:.7g}"
# Liberty's order of the four NLDM tables inside a timing group (common practice).
TIMING_QUANTITIES = ("cell_rise", "rise_transition", "cell_fall", "fall_transition")


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


def _axis_scale(config: LibraryConfig, name: str) -> float:
    """Library unit of an index variable: capacitances in cap_unit, transitions in time_unit."""
    return config.cap_scale if name.endswith("capacitance") else config.time_scale


def _scales(config: LibraryConfig, table: Table) -> list[float]:
    return [_axis_scale(config, a.name) for a in table.axes]


def _value_scale(config: LibraryConfig, table: Table) -> float:
    # Energy's library unit is one capacitance unit times (1 V)^2.
    return {"s": config.time_scale, "F": config.cap_scale, "J": config.cap_scale}[table.unit]


def templates(config: LibraryConfig, cells: Iterable[CellTables]) -> dict[tuple, str]:
    """Template name per distinct (axis names, index values)."""
    tables = [t for cell in cells for arc in cell.arcs for t in arc.default]
    tables += [t for cell in cells for c in cell.constraints for t in c.tables]
    return _template_names(tables, "grid")


def power_templates(cells: Iterable[CellPower]) -> dict[tuple, str]:
    """Power template name per distinct (axis names, index values)."""
    tables = [t for cell in cells for a in cell.arcs for t in a.default]
    tables += [t for cell in cells for a in cell.arcs for _, ts in a.states for t in ts]
    tables += [t for cell in cells for h in cell.hidden for t in h.tables]
    return _template_names(tables, "energy")


def _template_names(tables: Iterable[Table], prefix: str) -> dict[tuple, str]:
    """One template name per distinct (axis names, index values), in order of first use."""
    names: dict[tuple, str] = {}
    for table in tables:
        key = tuple((a.name, a.values) for a in table.axes)
        if key not in names:
            shape = "x".join(str(len(a.values)) for a in table.axes)
            names[key] = f"{prefix}_{shape}_{len(names) + 1}"
    return names


def _template_of(names: dict[tuple, str], table: Table) -> str:
    return names[tuple((a.name, a.values) for a in table.axes)]


def write_table(w: _Writer, config: LibraryConfig, table: Table, template: str) -> None:
    w.open(table.quantity, template)
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
        edge = config.cell(arc.arc.cell).flop.edge
        return "rising_edge" if edge == "rise" else "falling_edge"
    return kind  # combinational, clear, preset


def _timing_group(
    w: _Writer,
    config: LibraryConfig,
    names: dict[tuple, str],
    arc: ArcTables,
    tables: tuple[Table, ...],
    sense: str,
    when: str = "",
) -> None:
    w.open("timing")
    w.attr("related_pin", f'"{arc.arc.related}"')
    if arc.arc.other:
        w.attr("related_output_pin", f'"{arc.arc.other}"')
    w.attr("timing_sense", sense)
    w.attr("timing_type", _timing_type(config, arc))
    if when:
        w.attr("when", f'"{when}"')
    by_quantity = {t.quantity: t for t in tables}
    for quantity in TIMING_QUANTITIES:
        table = by_quantity.get(quantity)
        if table is not None:
            spec = arc.arc
            w.note(table_name(spec.cell, spec.related, spec.output, when, quantity, spec.kind))
            write_table(w, config, table, names[tuple((a.name, a.values) for a in table.axes)])
    w.close()


def _internal_power(
    w: _Writer,
    config: LibraryConfig,
    names: dict[tuple, str],
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


def render(
    config: LibraryConfig,
    cells: tuple[CellTables, ...],
    power: Iterable[CellPower] = (),
    *,
    header: Sequence[str] = (),
    notes: Mapping[str, str] | None = None,
) -> str:
    """The whole library as Liberty text; ``power`` adds each named cell's power groups.
    ``header`` lines become comments at the top, ``notes`` comments beside the tables and pin
    values they name (``diff.table_name``, ``diff.pin_name``)."""
    p = config.process
    t = config.thresholds
    powers = {c.cell: c for c in power}
    leakage_unit, leakage_scale = power_unit(config.time_unit, config.cap_unit)
    w = _Writer(notes)
    w.lines.append(f"/* {config.name}: written by charflow from {config.path.name} */")
    w.lines += [f"/* {_comment(line)} */" for line in header]
    w.lines.append(
        f"/* internal_power tables: energy per transition in 1{energy_unit(config.cap_unit)} "
        f"(capacitive_load_unit x voltage_unit^2); leakage in {leakage_unit} */"
    )
    w.open("library", config.name)
    w.attr("delay_model", "table_lookup")
    w.attr("time_unit", f'"1{config.time_unit}"')
    w.attr("voltage_unit", '"1V"')
    w.attr("current_unit", '"1mA"')
    w.attr("pulling_resistance_unit", '"1kohm"')
    w.attr("leakage_power_unit", f'"{leakage_unit}"')
    w.complex("capacitive_load_unit", f"(1, {config.cap_unit})")
    w.attr("nom_process", "1")
    w.attr("nom_voltage", _fmt(p.vdd))
    w.attr("nom_temperature", _fmt(p.temperature))
    w.open("operating_conditions", "nominal")
    w.attr("process", "1")
    w.attr("voltage", _fmt(p.vdd))
    w.attr("temperature", _fmt(p.temperature))
    w.close()
    w.attr("default_operating_conditions", "nominal")
    for edge in ("rise", "fall"):
        w.attr(f"input_threshold_pct_{edge}", _fmt(100 * t.delay_input(edge)))
        w.attr(f"output_threshold_pct_{edge}", _fmt(100 * t.delay_output(edge)))
    for edge in ("rise", "fall"):
        lower, upper = t.slew_band(edge)
        w.attr(f"slew_lower_threshold_pct_{edge}", _fmt(100 * lower))
        w.attr(f"slew_upper_threshold_pct_{edge}", _fmt(100 * upper))
    w.attr("slew_derate_from_library", _fmt(t.slew_derate))
    names = templates(config, cells)
    for key, name in names.items():
        w.open("lu_table_template", name)
        for k, (axis_name, _) in enumerate(key, 1):
            w.attr(f"variable_{k}", axis_name)
        for k, (axis_name, values) in enumerate(key, 1):
            w.complex(f"index_{k}", _index(values, _axis_scale(config, axis_name)))
        w.close()
    energy_names = power_templates(powers.values())
    for key, name in energy_names.items():
        w.open("power_lut_template", name)
        for k, (axis_name, _) in enumerate(key, 1):
            w.attr(f"variable_{k}", axis_name)
        for k, (axis_name, values) in enumerate(key, 1):
            w.complex(f"index_{k}", _index(values, _axis_scale(config, axis_name)))
        w.close()
    for cell in cells:
        cell_power = powers.get(cell.cell.name)
        w.open("cell", cell.cell.name)
        w.attr("area", _fmt(cell.cell.area))
        if cell_power is not None:
            _leakage(w, cell_power, leakage_scale)
        flop = cell.cell.flop
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
            w.open("pin", pin.pin)
            w.attr("direction", "input")
            if flop is not None and pin.pin == flop.clock:
                w.attr("clock", "true")
            w.note(pin_name(cell.cell.name, pin.pin, "capacitance"))
            # An edge no run made is left out (``tabulate`` warns), never copied.
            for name, cap in (("", pin.capacitance), ("rise_", pin.rise), ("fall_", pin.fall)):
                if cap is not None:
                    w.attr(f"{name}capacitance", _fmt(cap / config.cap_scale))
            hidden = cell_power.hidden if cell_power is not None else ()
            for h in (h for h in hidden if h.pin == pin.pin):
                _internal_power(w, config, energy_names, h.tables, when=h.when)
            # A pulse no width failed has no minimum: left out (``tabulate`` warns).
            for pulse in (p for p in cell.pulses if p.pin == pin.pin and p.width is not None):
                w.attr(f"min_pulse_width_{pulse.level}", _fmt(pulse.width / config.time_scale))
            for c in (c for c in cell.constraints if c.pin == pin.pin):
                w.open("timing")
                w.attr("related_pin", f'"{c.related}"')
                w.attr("timing_type", c.timing_type)
                for table in c.tables:
                    w.note(
                        table_name(
                            cell.cell.name, c.related, c.pin, "", table.quantity, c.timing_type
                        )
                    )
                    write_table(
                        w, config, table, names[tuple((a.name, a.values) for a in table.axes)]
                    )
                w.close()
            w.close()
        for out in cell.cell.outputs:
            w.open("pin", out.pin)
            w.attr("direction", "output")
            w.attr("function", f'"{out.function.to_liberty()}"')
            for arc in (a for a in cell.arcs if a.arc.output == out.pin):
                _timing_group(w, config, names, arc, arc.default, arc.arc.sense)
                if len(arc.states) > 1:
                    for st in arc.states:
                        _timing_group(
                            w, config, names, arc, st.tables, st.state.sense, st.state.when
                        )
            energies = cell_power.arcs if cell_power is not None else ()
            for arc in (a for a in energies if a.arc.output == out.pin):
                related, other = arc.arc.related, arc.arc.other
                owner = (cell.cell.name, out.pin)
                _internal_power(
                    w, config, energy_names, arc.default, related, other=other, owner=owner
                )
                if len(arc.states) > 1:
                    for state, tables in arc.states:
                        _internal_power(
                            w, config, energy_names, tables, related, state.when, other, owner
                        )
            w.close()
        w.close()
    w.close()
    return "\n".join(w.lines) + "\n"
