"""NLDM tables: their axes, their values, and the one interpolation charflow uses.

A table holds one measured quantity (for example ``cell_rise``) on a rectilinear grid of 1 to 3
axes named by their Liberty variables, all in SI units. Between grid points the value is
multilinear (linear, bilinear, trilinear); outside the grid the edge cell's multilinear function
is extended, which is how static timing tools read NLDM tables (common practice). An axis with a
single value makes the table constant along it.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from numbers import Real
from typing import Any

import numpy as np
import numpy.typing as npt

from charflow.records.errors import TableError

MAX_AXES = 3


@dataclass(frozen=True, slots=True)
class Axis:
    """One table index: a Liberty variable name and its strictly increasing values (SI)."""

    name: str
    values: tuple[float, ...]

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name:
            raise TableError(f"axis name must be a non-empty string, got {self.name!r}")
        try:
            raw = tuple(self.values)
        except TypeError as exc:
            raise TableError(f"axis {self.name!r}: values must be a sequence of numbers") from exc
        if not raw:
            raise TableError(f"axis {self.name!r}: needs at least one value")
        for i, v in enumerate(raw):
            # bool is a Real in Python; a flag in an axis is a caller's mistake, not a number.
            if isinstance(v, bool) or not isinstance(v, Real):
                raise TableError(f"axis {self.name!r}: value at index {i} ({v!r}) is not a number")
            if not math.isfinite(v):
                raise TableError(
                    f"axis {self.name!r}: value at index {i} ({float(v)}) is not finite"
                )
        values = tuple(float(v) for v in raw)
        for i in range(1, len(values)):
            if values[i] <= values[i - 1]:
                raise TableError(
                    f"axis {self.name!r}: value at index {i} ({values[i]!r}) is not greater "
                    f"than the one before ({values[i - 1]!r}); values must strictly increase"
                )
        object.__setattr__(self, "values", values)

    def __len__(self) -> int:
        return len(self.values)


@dataclass(frozen=True, slots=True, eq=False)
class Table:
    """A quantity on a grid of 1 to 3 axes; ``values`` has shape ``(len(axis) for axis in axes)``.

    ``values`` is a read-only float64 copy of what was passed in. Tables compare equal when
    quantity, unit, axes and every value are exactly equal; they are not hashable.
    """

    axes: tuple[Axis, ...]
    values: npt.NDArray[np.float64]
    quantity: str
    unit: str

    def __post_init__(self) -> None:
        if not isinstance(self.quantity, str) or not self.quantity:
            raise TableError(f"table quantity must be a non-empty string, got {self.quantity!r}")
        where = f"table {self.quantity!r}"
        if not isinstance(self.unit, str) or not self.unit:
            raise TableError(f"{where}: unit must be a non-empty string, got {self.unit!r}")
        axes = tuple(self.axes)
        if not 1 <= len(axes) <= MAX_AXES:
            raise TableError(f"{where}: needs 1 to {MAX_AXES} axes, got {len(axes)}")
        for k, axis in enumerate(axes):
            if not isinstance(axis, Axis):
                raise TableError(f"{where}: axis {k} is a {type(axis).__name__}, not an Axis")
        names = [axis.name for axis in axes]
        if len(set(names)) != len(names):
            raise TableError(f"{where}: axis names repeat: {names}")
        values = _readonly_float_copy(self.values, where)
        expected = tuple(len(axis) for axis in axes)
        if values.shape != expected:
            raise TableError(
                f"{where}: values have shape {values.shape}, axes {names} need shape {expected}"
            )
        if not np.all(np.isfinite(values)):
            first = tuple(int(i) for i in np.argwhere(~np.isfinite(values))[0])
            raise TableError(
                f"{where}: value at index {first} ({float(values[first])}) of shape {expected} "
                "is not finite"
            )
        object.__setattr__(self, "axes", axes)
        object.__setattr__(self, "values", values)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Table):
            return NotImplemented
        return (
            self.quantity == other.quantity
            and self.unit == other.unit
            and self.axes == other.axes
            and bool(np.array_equal(self.values, other.values))
        )

    # Equal tables would have to hash equal, and an ndarray has no hash. (typeshed types
    # __hash__ as a method; None is the language's way to make instances unhashable.)
    __hash__ = None  # type: ignore[assignment]

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(self.values.shape)

    @property
    def ndim(self) -> int:
        return len(self.axes)

    @property
    def axis_names(self) -> tuple[str, ...]:
        return tuple(axis.name for axis in self.axes)

    def interpolate(self, *coords: float) -> float:
        """The table's value at one point, one coordinate per axis in axis order (SI)."""
        if len(coords) != self.ndim:
            raise TableError(
                f"table {self.quantity!r}: got {len(coords)} coordinates for axes "
                f"{list(self.axis_names)}"
            )
        return float(interpolate(self, np.array([coords], dtype=np.float64))[0])

    def to_dict(self) -> dict[str, Any]:
        """Plain lists and strings, ready for ``json.dump``; floats round-trip exactly."""
        return {
            "quantity": self.quantity,
            "unit": self.unit,
            "axes": [{"name": axis.name, "values": list(axis.values)} for axis in self.axes],
            "values": self.values.tolist(),
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Table:
        """The inverse of :meth:`to_dict`."""
        quantity = data.get("quantity") if isinstance(data, Mapping) else None
        try:
            unit = data["unit"]
            values = data["values"]
            axis_fields = [(a["name"], a["values"]) for a in data["axes"]]
            quantity = data["quantity"]
        except (KeyError, TypeError) as exc:
            raise TableError(
                f"table {quantity!r}: not a table mapping (needs quantity, unit, values and axes "
                f"with name and values): {exc!r}"
            ) from exc
        try:
            axes = tuple(Axis(name=name, values=vals) for name, vals in axis_fields)
        except TableError as exc:
            raise TableError(f"table {quantity!r}: {exc.reason}") from exc
        return cls(axes=axes, values=values, quantity=quantity, unit=unit)


def _readonly_float_copy(values: object, where: str) -> npt.NDArray[np.float64]:
    try:
        given = np.asarray(values)
    except ValueError as exc:  # ragged nested lists
        raise TableError(f"{where}: values are not a rectangular array of numbers") from exc
    if given.dtype.kind not in "iuf":
        raise TableError(f"{where}: values must be numbers, got dtype {given.dtype}")
    owner = np.array(given, dtype=np.float64, copy=True)
    owner.flags.writeable = False
    # A view of a read-only array cannot be made writeable again, unlike the array owning data.
    return owner.view()


def _points_array(table: Table, points: npt.ArrayLike) -> npt.NDArray[np.float64]:
    where = f"table {table.quantity!r}"
    try:
        pts = np.asarray(points, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise TableError(f"{where}: points are not an array of numbers") from exc
    if pts.ndim != 2 or pts.shape[1] != table.ndim:
        raise TableError(
            f"{where}: points must have shape (n, {table.ndim}) for axes "
            f"{list(table.axis_names)}, got {pts.shape}"
        )
    bad = ~np.all(np.isfinite(pts), axis=1)
    if np.any(bad):
        n = int(np.argmax(bad))
        raise TableError(f"{where}: coordinates {pts[n].tolist()} are not finite", point=n)
    return pts


def _bracket(
    grid: npt.NDArray[np.float64], x: npt.NDArray[np.float64]
) -> tuple[npt.NDArray[np.intp], npt.NDArray[np.intp], npt.NDArray[np.float64]]:
    """Per coordinate: lower and upper grid index and the fraction ``t`` of the way between.

    The pair is the grid cell holding ``x``, or the edge cell when ``x`` is outside, where ``t``
    falls below 0 or above 1 and the cell's linear function is extended.
    """
    if grid.size == 1:
        zero = np.zeros(x.shape, dtype=np.intp)
        return zero, zero, np.zeros(x.shape, dtype=np.float64)
    lo = np.clip(np.searchsorted(grid, x, side="right") - 1, 0, grid.size - 2)
    hi = lo + 1
    t = (x - grid[lo]) / (grid[hi] - grid[lo])
    return lo, hi, t


def interpolate(table: Table, points: npt.ArrayLike) -> npt.NDArray[np.float64]:
    """Values of ``table`` at ``points`` (shape ``(n, table.ndim)``, SI), as an array of n.

    Multilinear inside the grid, linear extrapolation of the edge cell outside it.
    """
    pts = _points_array(table, points)
    n, ndim = pts.shape
    brackets = [_bracket(np.asarray(axis.values), pts[:, k]) for k, axis in enumerate(table.axes)]
    # The 2**ndim corner values of each point's cell, indexed by (point, bit per axis).
    corners = np.empty((n,) + (2,) * ndim, dtype=np.float64)
    for bits in itertools.product((0, 1), repeat=ndim):
        index = tuple(hi if bit else lo for (lo, hi, _), bit in zip(brackets, bits, strict=True))
        corner: tuple[slice | int, ...] = (slice(None), *bits)
        corners[corner] = table.values[index]
    # Collapse one axis at a time, last first. (1 - t) * a + t * b rather than a + t * (b - a):
    # at t = 0 or t = 1 it returns a grid value exactly.
    for k in reversed(range(ndim)):
        t = brackets[k][2].reshape((n,) + (1,) * k)
        corners = (1.0 - t) * corners[..., 0] + t * corners[..., 1]
    return corners


def interpolate_loop(table: Table, point: Iterable[float]) -> float:
    """The same interpolation as :func:`interpolate`, one point, in plain loops.

    Written separately and as plainly as possible so that tests can check the vectorised kernel
    against it; not meant for production use.
    """
    coords = [float(c) for c in point]
    if len(coords) != table.ndim:
        raise TableError(
            f"table {table.quantity!r}: got {len(coords)} coordinates for axes "
            f"{list(table.axis_names)}"
        )
    # For each axis, the grid indices that contribute and their weights.
    per_axis: list[list[tuple[int, float]]] = []
    for axis, x in zip(table.axes, coords, strict=True):
        grid = axis.values
        if len(grid) == 1:
            per_axis.append([(0, 1.0)])
            continue
        # The last cell whose lower end is at or below x; the first cell when x is below the grid.
        lo = 0
        for i in range(len(grid) - 1):
            if grid[i] <= x:
                lo = i
        hi = lo + 1
        t = (x - grid[lo]) / (grid[hi] - grid[lo])
        per_axis.append([(lo, 1.0 - t), (hi, t)])
    total = 0.0
    for corner in itertools.product(*per_axis):
        index = tuple(i for i, _ in corner)
        weight = 1.0
        for _, w in corner:
            weight *= w
        total += weight * float(table.values[index])
    return total


def drop_axis(table: Table, name: str, at: str | float) -> Table:
    """``table`` without its axis ``name``: at each remaining grid point, the ``"largest"`` or
    ``"smallest"`` value along that axis, or the value linearly interpolated at coordinate
    ``at`` (SI), which must lie within the axis. A table without the axis comes back as it is.

    Along one axis the table is piecewise linear, so the largest value over its grid points is
    the largest anywhere between its first and last value (likewise the smallest).
    """
    if name not in table.axis_names:
        return table
    k = table.axis_names.index(name)
    axes = tuple(a for a in table.axes if a.name != name)
    if at == "largest":
        values = np.max(table.values, axis=k)
    elif at == "smallest":
        values = np.min(table.values, axis=k)
    elif isinstance(at, Real) and not isinstance(at, bool):
        grid = table.axes[k].values
        if not grid[0] <= at <= grid[-1]:
            raise TableError(
                f"table {table.quantity!r}: {name} {at:.4g} is outside the axis "
                f"[{grid[0]:.4g}, {grid[-1]:.4g}]; it is read within its grid only"
            )
        lo, hi, t = _bracket(np.asarray(grid), np.array([float(at)]))
        first = np.take(table.values, lo[0], axis=k)
        values = (1.0 - t[0]) * first + t[0] * np.take(table.values, hi[0], axis=k)
    else:
        raise TableError(f"table {table.quantity!r}: cannot drop {name} at {at!r}")
    return Table(axes, values, table.quantity, table.unit)
