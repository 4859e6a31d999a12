"""A flip-flop's setup, hold, recovery or removal offset judged with plain ngspice
(``plain.py``), independent of charflow: its own deck and stimulus, ``.meas`` for the times.

The cell is QDFFR_P1 of tests/data/seq_l1.toml: D captured on CLK rising, RSTB an active-low
clear, Q the stored value (its config's ``flop`` table says so; ``read_flop`` checks). Each
experiment clocks the opposite value in on a first CLK edge, then the event is the second edge.
An offset is from the moving pin's delay-threshold crossing to the clock's (each pin driven by a
linear ramp at its slew), positive when the constraint is met by more:

- setup: D reaches the value ``offset`` before the clock;
- hold: D, at the value since long before the clock, leaves it ``offset`` after the clock;
- recovery: RSTB releases ``offset`` before the clock (D = 1, the value the clear does not
  force);
- removal: RSTB releases ``offset`` after the clock (D = 1).

Pass (setup, hold and recovery): Q moves to the captured value after the edge and ends within
``settle`` × vdd of its rail. Its clock-to-Q delay must also be at most (1 + ``pushout``) times
the delay of the same experiment with the data or release RELAXED away. Removal passes when Q
ends at the cleared value (common practice; the criterion and its defaults are the library's,
README, ``[simulation]``).
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass

from reference import plain

CELL = "QDFFR_P1"
FLOP = {"clock": "CLK", "next_state": "D", "clear": "!RSTB"}
OUTPUTS = ("Q", "QB")
FIRST = 0.1e-9  # s, the first clock edge starts
PERIOD = 2e-9  # s between the two clock edges
RELAXED = 0.8e-9  # s, an offset far from any constraint: the relaxed run
SETTLE = 2e-9  # s simulated after the last edge
# s: 0.5, 1 and 2 ps give the same clock-to-Q within 0.1 ps at every offset the tests judge
MAX_STEP = 1e-12
# [simulation] defaults (README): pushout, settle, bisect_tolerance in the library's time unit
DEFAULTS = {"pushout": 0.1, "settle": 0.01, "bisect_tolerance": 0.001}


@dataclass(frozen=True, slots=True)
class Verdict:
    passed: bool
    delay: float | None  # s, clock to Q crossing its delay threshold; None when Q stayed
    q_end: float  # V, Q at the end of the run
    relaxed: float | None  # s, the relaxed run's delay (setup, hold, recovery)


def read_flop(lib: plain.Library) -> dict:
    """The config's [simulation] settings the judge uses, in SI, after checking the cell is
    the flop this module knows."""
    spec = lib.cells[CELL]
    if spec.get("flop") != FLOP or tuple(spec.get("outputs", {})) != OUTPUTS:
        raise ValueError(f"{CELL} in {lib.path} is not the flop {FLOP} this judge knows")
    doc = tomllib.loads(lib.path.read_text(encoding="utf-8")).get("simulation", {})
    settings = {**DEFAULTS, **{k: doc[k] for k in DEFAULTS if k in doc}}
    settings["bisect_tolerance"] *= lib.time_unit
    return settings


def _edge_at(lib: plain.Library, slew: float, edge: str, crossing: float) -> tuple[float, float]:
    """(start, duration) of a ramp on ``edge`` whose delay-threshold crossing is at ``crossing``."""
    duration = plain.ramp_duration(lib, slew, edge)
    along = lib.thresholds.delay_input(edge)
    along = along if edge == "rise" else 1.0 - along
    return crossing - along * duration, duration


def _steps(lib: plain.Library, start: bool, edges: list[tuple[float, float]]) -> str:
    """A PWL from level ``start`` through ramps (start, duration), each to the other rail."""
    level = lib.vdd if start else 0.0
    points = [(0.0, level)]
    for begin, duration in sorted(edges):
        points.append((begin, level))
        level = lib.vdd - level
        points.append((begin + duration, level))
    return "pwl(" + " ".join(f"{t:.12g} {v:.9g}" for t, v in points) + ")"


def _stimulus(lib: plain.Library, kind: str, data_edge: str, slews, offset: float):
    """(D, RSTB, CLK) PWL texts, the clock's crossing time, the edge start and the run's end."""
    data_slew, clock_slew = slews
    clock = plain.ramp_duration(lib, clock_slew, "rise")
    back = plain.ramp_duration(lib, clock_slew, "fall")
    second = FIRST + PERIOD
    t_clk = second + lib.thresholds.delay_input("rise") * clock
    clk = _steps(lib, False, [(FIRST, clock), (FIRST + PERIOD / 2, back), (second, clock)])
    rises = data_edge == "rise"
    if kind in ("setup", "hold"):
        rstb = _steps(lib, True, [])
        # setup: D goes to the captured value; hold: D leaves it, the captured value being
        # there since RELAXED before the clock.
        go = _edge_at(
            lib, data_slew, data_edge, t_clk - offset if kind == "setup" else t_clk + offset
        )
        edges = [go]
        if kind == "hold":
            edges.append(_edge_at(lib, data_slew, "fall" if rises else "rise", t_clk - RELAXED))
        d = _steps(lib, not rises if kind == "setup" else rises, edges)
    else:
        d = _steps(lib, True, [])
        at = t_clk - offset if kind == "recovery" else t_clk + offset
        go = _edge_at(lib, data_slew, data_edge, at)
        rstb = _steps(lib, False, [go])
    end = max(t_clk, go[0] + go[1]) + SETTLE
    return d, rstb, clk, t_clk, second, end


def _run(lib: plain.Library, kind: str, data_edge: str, slews, offset: float, captured: bool):
    """(Q's delay-threshold crossing toward ``captured`` after the clock edge starts, from the
    clock's crossing, or None; Q at the end of the run)."""
    d, rstb, clk, t_clk, second, end = _stimulus(lib, kind, data_edge, slews, offset)
    load = min(lib.grid["load"]) * lib.cap_unit
    text = plain.subckt(lib, CELL)
    nodes = {"VDD": "vdd", "VSS": "0"}
    ports = [nodes.get(p, p.lower()) for p in plain.ports(text, CELL)]
    q_edge = "rise" if captured else "fall"
    level = lib.thresholds.delay_output(q_edge) * lib.vdd
    lines = [*plain.header(lib, f"{CELL} {kind} {data_edge} offset {offset:.6g}"), text]
    lines += [
        f"vsupply vdd 0 dc {lib.vdd:.9g}",
        f"vd d 0 {d}",
        f"vrstb rstb 0 {rstb}",
        f"vclk clk 0 {clk}",
        *(f"c{o.lower()} {o.lower()} 0 {load:.9g}" for o in OUTPUTS),
        f"xdut {' '.join(ports)} {CELL}",
        f".tran {MAX_STEP:.6g} {end:.12g} 0 {MAX_STEP:.6g}",
        f".meas tran ref_tq when v(q)={level:.9g} {q_edge}=1 td={second:.12g}",
        f".meas tran ref_qend find v(q) at={end - MAX_STEP * 10:.12g}",
        ".end",
    ]
    got = plain.run("\n".join(lines) + "\n")
    if "ref_qend" not in got:
        raise RuntimeError(f"{CELL} {kind} {data_edge} offset {offset:.6g}: no final Q")
    tq = got.get("ref_tq")
    return (None if tq is None else tq - t_clk), got["ref_qend"]


def judge(lib: plain.Library, kind: str, data_edge: str, slews, offsets) -> list[Verdict]:
    """Does each of ``offsets`` (s) meet the constraint ``kind`` for the ``data_edge`` of D
    (setup, hold) or of RSTB's release (recovery, removal)? ``slews``: (data, clock), s."""
    settings = read_flop(lib)
    band = settings["settle"] * lib.vdd
    if kind == "removal":
        # The release comes after the clock: the flop must stay cleared.
        ends = [_run(lib, kind, data_edge, slews, x, captured=True)[1] for x in offsets]
        return [Verdict(abs(q) <= band, None, q, None) for q in ends]
    if kind == "setup":
        captured = data_edge == "rise"
    elif kind == "hold":
        captured = data_edge != "rise"
    else:
        captured = True
    rail = lib.vdd if captured else 0.0
    relaxed, q_relaxed = _run(lib, kind, data_edge, slews, RELAXED, captured)
    if relaxed is None or abs(q_relaxed - rail) > band:
        raise RuntimeError(f"{CELL} {kind} {data_edge}: the relaxed run does not capture")
    verdicts = []
    for offset in offsets:
        delay, q_end = _run(lib, kind, data_edge, slews, offset, captured)
        in_time = delay is not None and delay <= (1.0 + settings["pushout"]) * relaxed
        verdicts.append(Verdict(in_time and abs(q_end - rail) <= band, delay, q_end, relaxed))
    return verdicts
