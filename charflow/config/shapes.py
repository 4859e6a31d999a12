"""Input waveform shapes: the ramp's linear edge, or a normalised edge a real gate makes.

A normalised edge is a list of corners (τ, p): p is the fraction of the swing travelled (0 at
the resting rail, 1 at the other; a falling edge travels from vdd down), τ the time since the
edge left its rail in units of the time it spends between the library's slew thresholds.
Stretching τ by ``table slew × slew_derate`` gives an edge whose slew, measured the library's
way, is the table slew: its corners include the thresholds themselves, so the simulator's
piecewise-linear source passes through them exactly.

A shape file holds one corner a line, ``EDGE TIME FRACTION`` (``rise`` or ``fall``, a time in
any unit: only ratios count, and the voltage as a fraction of the supply); ``#`` starts a
comment. Each edge's times increase, a rise goes from 0 to 1 and a fall from 1 to 0, and each
edge crosses each of the library's slew and delay thresholds once.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from charflow.records.errors import ConfigError

KINDS = ("linear", "driver", "file")
# The first and last fraction of the swing a measured edge gives up: a gate's output creeps
# toward its rail for ever, and that creep is not part of the edge.
CUT = 0.002
# Largest deviation (fraction of the swing) of the thinned corners from the measured edge.
THIN_TOLERANCE = 5e-4


@dataclass(frozen=True, slots=True)
class InputShape:
    """The library's input waveform (``[input_shape]``); ``rise`` and ``fall`` hold the
    normalised corners once known: read from the file, or measured on the driver by the run's
    driver stage (empty for ``linear`` and before that stage)."""

    kind: str = "linear"
    driver: tuple[str, ...] = ()  # cells, each driving the next through its first input
    driver_slew: float | None = None  # s into the first driver; None: the middle of its grid
    fanout_pin: str | None = None  # "CELL.PIN": the driver's load is copies of this input
    fanout: int = 1
    load: float = 0.0  # F of wire at the driver's output
    file: Path | None = None
    rise: tuple[tuple[float, float], ...] = ()
    fall: tuple[tuple[float, float], ...] = ()

    @property
    def linear(self) -> bool:
        return self.kind == "linear"

    def edge(self, edge: str) -> tuple[tuple[float, float], ...]:
        return self.rise if edge == "rise" else self.fall

    def describe(self, cap_unit: str = "pf", cap_scale: float = 1e-12) -> str:
        """The shape in words, for the Liberty header and messages."""
        if self.kind == "linear":
            return "linear ramp"
        if self.kind == "file":
            return f"normalised shape from {self.file}"
        load = f"{self.fanout} x {self.fanout_pin}" if self.fanout_pin else "no gate load"
        return (
            f"driver-shaped: output of {' > '.join(self.driver)}, loaded by {load} and "
            f"{self.load / cap_scale:g} {cap_unit} of wire"
        )


def progress_band(edge: str, band: tuple[float, float]) -> tuple[float, float]:
    """The slew thresholds (lower, upper; fractions of the supply) as fractions of the swing
    travelled, in the order the edge crosses them."""
    lower, upper = band
    return (lower, upper) if edge == "rise" else (1.0 - upper, 1.0 - lower)


def first_time(corners: Sequence[tuple[float, float]], p: float) -> float:
    """The first τ at which the corners' piecewise-linear edge reaches ``p``."""
    t0, p0 = corners[0]
    for t1, p1 in corners[1:]:
        if p1 >= p > p0 or p1 == p:
            return t0 + (t1 - t0) * (p - p0) / (p1 - p0) if p1 != p0 else t1
        t0, p0 = t1, p1
    raise ValueError(f"the edge never reaches {p}")


def crossings(corners: Sequence[tuple[float, float]], p: float) -> int:
    """How often the piecewise-linear edge crosses the level ``p``."""
    side = [c[1] >= p for c in corners]
    return sum(a != b for a, b in zip(side, side[1:], strict=False))


def normalise(
    times: Sequence[float],
    progress: Sequence[float],
    edge: str,
    band: tuple[float, float],
    keep: Sequence[float] = (),
) -> tuple[tuple[float, float], ...]:
    """A measured edge (times in s, fractions of the swing travelled, crossing the band once)
    as normalised corners: from the last sample within CUT of the start rail before the band
    to the first within CUT of the end rail after it, clipped to the rails, with corners at
    the band's ends and at the fractions ``keep`` (the delay threshold), thinned to
    THIN_TOLERANCE."""
    lo, hi = progress_band(edge, band)
    pts = [(float(t), min(max(float(p), 0.0), 1.0)) for t, p in zip(times, progress, strict=True)]
    t_lo, t_hi = first_time(pts, lo), first_time(pts, hi)
    first = max(i for i, (t, p) in enumerate(pts) if t <= t_lo and p <= CUT)
    last = min(i for i, (t, p) in enumerate(pts) if t >= t_hi and p >= 1.0 - CUT)
    part = pts[first : last + 1]
    part[0], part[-1] = (part[0][0], 0.0), (part[-1][0], 1.0)
    levels = sorted({lo, hi, *keep})
    marks = [(first_time(part, p), p) for p in levels]
    merged = sorted({*part, *marks})
    forced = {m[0] for m in marks}
    thinned = _thin(merged, forced)
    scale = t_hi - t_lo
    start = thinned[0][0]
    return tuple(((t - start) / scale, p) for t, p in thinned)


def _thin(pts: list[tuple[float, float]], forced: set[float]) -> list[tuple[float, float]]:
    """The fewest corners (greedy, largest deviation first) whose piecewise-linear edge stays
    within THIN_TOLERANCE of ``pts``; the ends and the ``forced`` times are always kept."""
    keep = {0, len(pts) - 1} | {i for i, (t, _) in enumerate(pts) if t in forced}
    while True:
        chosen = sorted(keep)
        worst, where = 0.0, -1
        for a, b in zip(chosen, chosen[1:], strict=False):
            (ta, pa), (tb, pb) = pts[a], pts[b]
            for i in range(a + 1, b):
                t, p = pts[i]
                line = pa + (pb - pa) * (t - ta) / (tb - ta) if tb > ta else pa
                if abs(p - line) > worst:
                    worst, where = abs(p - line), i
        if worst <= THIN_TOLERANCE:
            return [pts[i] for i in chosen]
        keep.add(where)


Corners = tuple[tuple[float, float], ...]


def read_file(
    path: Path, band: dict[str, tuple[float, float]], delay: dict[str, float]
) -> tuple[Corners, Corners]:
    """The normalised rise and fall of a shape file (see the module's text); ``band`` and
    ``delay`` are the library's slew and delay thresholds per edge (fractions of the supply).
    Raise ConfigError naming the file and line."""
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"cannot read the shape file: {exc}", file=path) from exc
    rows: dict[str, list[tuple[int, float, float]]] = {"rise": [], "fall": []}
    for number, raw in enumerate(text.splitlines(), 1):
        words = raw.split("#")[0].split()
        if not words:
            continue
        if len(words) != 3 or words[0] not in rows:
            raise ConfigError(
                f"expected 'rise|fall TIME FRACTION', got {raw.strip()!r}", file=path, line=number
            )
        try:
            t, v = float(words[1]), float(words[2])
        except ValueError as exc:
            raise ConfigError(f"not a number in {raw.strip()!r}", file=path, line=number) from exc
        rows[words[0]].append((number, t, v))
    return (
        _edge(path, "rise", rows["rise"], band["rise"], delay["rise"]),
        _edge(path, "fall", rows["fall"], band["fall"], delay["fall"]),
    )


def _edge(
    path: Path,
    edge: str,
    rows: list[tuple[int, float, float]],
    band: tuple[float, float],
    delay: float,
) -> Corners:
    """One edge of a shape file checked and normalised."""
    if len(rows) < 2:
        raise ConfigError(f"the {edge} edge needs at least two lines", file=path)
    start, end = (0.0, 1.0) if edge == "rise" else (1.0, 0.0)
    for (line, _, v), want in ((rows[0], start), (rows[-1], end)):
        if v != want:
            where = "first" if want == start else "last"
            raise ConfigError(
                f"the {edge} edge's {where} fraction must be {want:g}, got {v:g}",
                file=path,
                line=line,
            )
    for (_, t0, _), (line, t1, _) in zip(rows, rows[1:], strict=False):
        if t1 <= t0:
            raise ConfigError(
                f"times must increase within the {edge} edge: {t1:g} follows {t0:g}",
                file=path,
                line=line,
            )
    along = [v if edge == "rise" else 1.0 - v for _, _, v in rows]
    corners = [(t, p) for (_, t, _), p in zip(rows, along, strict=True)]
    level = delay if edge == "rise" else 1.0 - delay
    for p in (*progress_band(edge, band), level):
        if crossings(corners, p) != 1:
            raise ConfigError(
                f"the {edge} edge must cross {100 * (p if edge == 'rise' else 1 - p):g} % of "
                "the supply (a threshold of the library) exactly once",
                file=path,
                line=rows[0][0],
            )
    return normalise([t for t, _ in corners], along, edge, band, (level,))
