"""Library units at the edges, SI inside: the one place where the two meet."""

from __future__ import annotations

TIME_UNITS = {"ns": 1e-9, "ps": 1e-12}
CAP_UNITS = {"pf": 1e-12, "ff": 1e-15}


def time_scale(unit: str) -> float:
    """Seconds per library time unit."""
    return TIME_UNITS[unit]


def cap_scale(unit: str) -> float:
    """Farads per library capacitance unit."""
    return CAP_UNITS[unit]
