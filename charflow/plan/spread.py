"""The spread points of a plan: where the delays' sigma under mismatch is measured.

The linear method measures sensitivities on a sub-grid of each combinational table (the
first, middle and last value of every axis, ``sparse``) or on every point (``full``); the
sigma tables interpolate between the sub-grid's points (``tables.spread``). Beside them it
samples ``checks`` points per arc edge and state by Monte Carlo, the reference the report
holds the linear sigma against. The ``sampled`` method samples every point of the tables.
"""

from __future__ import annotations

from collections.abc import Mapping

from charflow.config.library import LibraryConfig
from charflow.records.points import Plan, SpreadPoint, TimingPoint


def sub_indices(count: int) -> tuple[int, ...]:
    """The indices of an axis of ``count`` values the sparse sub-grid keeps."""
    return tuple(sorted({0, (count - 1) // 2, count - 1}))


def spread_points(
    config: LibraryConfig, plan: Plan, devices: Mapping[str, int]
) -> tuple[SpreadPoint, ...]:
    """The spread points of ``plan``'s combinational timing points; ``devices`` holds each
    cell's transistors with a threshold of their own."""
    mismatch = config.mismatch
    if mismatch.method == "off":
        return ()
    timing = [p for p in plan.points if isinstance(p, TimingPoint) and p.kind == "combinational"]
    out: list[SpreadPoint] = []
    for p in timing:
        n = devices[p.cell]
        grid = config.cell(p.cell).grid
        at = _indices(grid.slew, grid.load, grid.related_load, p)
        if mismatch.method == "sampled":
            out.append(SpreadPoint(p, n, mismatch.samples, mismatch.seed))
            continue
        sparse = mismatch.linear_grid == "sparse"
        axes = (len(grid.slew), len(grid.load), len(grid.related_load))
        if not sparse or all(i in sub_indices(k) for i, k in zip(at, axes, strict=False)):
            out.append(SpreadPoint(p, n))
        if (at[0], at[1]) in _checks(axes[0], axes[1], mismatch.checks) and _middle_other(at, axes):
            out.append(SpreadPoint(p, n, mismatch.samples, mismatch.seed))
    return tuple(out)


def _indices(
    slews: tuple[float, ...], loads: tuple[float, ...], others: tuple[float, ...], p: TimingPoint
) -> tuple[int, ...]:
    at = (slews.index(p.slew), loads.index(p.load))
    return at if p.other_load is None else (*at, others.index(p.other_load))


def _middle_other(at: tuple[int, ...], axes: tuple[int, int, int]) -> bool:
    """A three-axis table is checked at its middle other-output load only."""
    return len(at) < 3 or at[2] == (axes[2] - 1) // 2


def _checks(slews: int, loads: int, count: int) -> list[tuple[int, int]]:
    # The middle; the slowest slew at the smallest load; the second slew and load (between
    # the sparse sub-grid's points on a larger grid).
    middle = ((slews - 1) // 2, (loads - 1) // 2)
    wanted = [middle, (slews - 1, 0), (min(1, slews - 1), min(1, loads - 1))]
    return list(dict.fromkeys(wanted))[:count]
