"""Library units at the edges, SI inside: the one place where the two meet."""

from __future__ import annotations

import math
from typing import Protocol

TIME_UNITS = {"ns": 1e-9, "ps": 1e-12}
CAP_UNITS = {"pf": 1e-12, "ff": 1e-15}
# Liberty states internal energy in capacitive_load_unit x voltage_unit^2: with 1 V, the joule
# of the capacitance unit's prefix.
ENERGY_UNITS = {"pf": "pJ", "ff": "fJ"}
POWER_PREFIXES = {"p": 1e-12, "n": 1e-9, "u": 1e-6, "m": 1e-3, "": 1.0}


def time_scale(unit: str) -> float:
    """Seconds per library time unit."""
    return TIME_UNITS[unit]


def cap_scale(unit: str) -> float:
    """Farads per library capacitance unit."""
    return CAP_UNITS[unit]


def unit_name(text: str, known: dict[str, float]) -> str | None:
    """The unit ``text`` names, in its stored (lower-case) spelling, whatever its case
    (``pF``, ``nS``); None when it names none of ``known``."""
    name = text.strip().lower()
    return name if name in known else None


def show_time(seconds: float, unit: str) -> str:
    """A time in the library's unit, for messages: ``0.05 ns``."""
    return f"{seconds / time_scale(unit):.4g} {unit}"


def show_cap(farads: float, unit: str) -> str:
    """A capacitance in the library's unit, for messages: ``0.01 pf``."""
    return f"{farads / cap_scale(unit):.4g} {unit}"


def index_unit(variable: str, units: LibraryUnits) -> tuple[float, str]:
    """(SI per library unit, library unit) of a table index variable: a capacitance
    (``total_output_net_capacitance``) in the capacitance unit, a transition in the time unit."""
    if variable.endswith("capacitance"):
        return cap_scale(units.cap_unit), units.cap_unit
    return time_scale(units.time_unit), units.time_unit


def energy_unit(cap_unit: str) -> str:
    """The unit of internal energy tables: one capacitance unit times (1 V)^2."""
    return ENERGY_UNITS[cap_unit]


def power_unit(time_unit: str, cap_unit: str) -> tuple[str, float]:
    """``leakage_power_unit`` coherent with the other units, and its watts: one energy unit per
    time unit (pf and ns: 1 pJ/ns = 1mW), so energy x toggle rate and leakage add unconverted."""
    watts = cap_scale(cap_unit) / time_scale(time_unit)
    prefix = min(POWER_PREFIXES, key=lambda p: abs(math.log10(POWER_PREFIXES[p] / watts)))
    return f"1{prefix}W", POWER_PREFIXES[prefix]


class LibraryUnits(Protocol):
    """What a message needs to say a value in the library's units (a ``LibraryConfig``)."""

    @property
    def time_unit(self) -> str: ...

    @property
    def cap_unit(self) -> str: ...
