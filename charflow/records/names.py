"""The names of tables and quantities: Liberty's table names, and how charflow names one table of
a library in messages, the diff and the store's staleness notes (``table_name``)."""

from __future__ import annotations

TIMING_QUANTITIES = ("cell_rise", "rise_transition", "cell_fall", "fall_transition")
CONSTRAINT_QUANTITIES = ("rise_constraint", "fall_constraint")
PIN_QUANTITIES = ("capacitance", "rise_capacitance", "fall_capacitance")
PULSE_QUANTITIES = ("min_pulse_width_high", "min_pulse_width_low")


def delay_quantity(output_edge: str) -> str:
    return f"cell_{output_edge}"


def transition_quantity(output_edge: str) -> str:
    return f"{output_edge}_transition"


def power_quantity(edge: str) -> str:
    """Liberty's table name: rise_power or fall_power (the output's edge for an arc, the
    input's for a toggle)."""
    return f"{edge}_power"


def table_name(
    cell: str, related: str, pin: str, when: str, quantity: str, kind: str = "combinational"
) -> str:
    """How charflow names a table: ``QNAND2_P1 IA->Y when IB cell_rise``, ``QDFF_P1 CLK->Q clock
    cell_rise``, ``QDFF_P1 CLK->D setup_rising rise_constraint``."""
    name = f"{cell} {related}->{pin}" + ("" if kind == "combinational" else f" {kind}")
    return name + (f" when {when}" if when else "") + f" {quantity}"


def pin_name(cell: str, pin: str, quantity: str) -> str:
    return f"{cell} pin {pin} {quantity}"
