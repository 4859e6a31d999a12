#!/usr/bin/env python3
"""An independent, converged reference for the test flip-flops: plain ngspice, no charflow.

Each experiment is a .cir deck written here (the cell rendered from its own template with
jinja2, linear PWL sources, `.meas` lines), run with `ngspice -b`; nothing is imported from
charflow. What it measures (definitions are common practice; thresholds 50 % for delays):

- clock->Q and clear->Q: the flop is written with the opposite value first, the data (or, for
  a clear, the stored 1) settles for a whole phase, then the measured edge; delay from the
  input's 50 % crossing to the output's;
- setup, hold, recovery, removal: bisection to SEARCH_TOL on the data-to-clock offset (50 % to
  50 %). Setup/recovery pass: the clock captures the new value and clock->Q is within PUSHOUT
  of its relaxed value; hold: the old value is captured, in time, and the output crosses once;
  removal: the flop, held by its clear through the clock edge, stays cleared.

Every run steps at most its target's fine step at its reltol (0.1 ps and 1e-5 on the level-1
models, 0.4 ps and 1e-4 on BSIM); each clock->Q and clear->Q value is also run at coarser
settings and the two must agree within AGREE, or the script stops: the reference is
converged. A search's result passes and result - SEARCH_TOL fails at the fine settings (the
bisection's own last bracket).

    python3 tests/reference/flop/flopref.py seq_l1 > tests/reference/flop/seq_l1.csv
    python3 tests/reference/flop/flopref.py vellum90 > tests/reference/flop/vellum90.csv
    python3 tests/reference/flop/flopref.py judge seq_l1 QDFFR_P1 setup rise 20e-12 20e-12 -2e-12
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
import tempfile
from pathlib import Path

import jinja2

ROOT = Path(__file__).resolve().parents[3]
BUNDLED = ROOT / "charflow" / "bundled"
# Each target's (largest step s, reltol) of its runs, and of the convergence cross-check.
L1_SETTINGS = ((0.1e-12, 1e-5), (0.4e-12, 1e-4))
BSIM_SETTINGS = ((0.4e-12, 1e-4), (1e-12, 1e-3))  # a BSIM run at 0.1 ps takes 40 s here
AGREE = 0.001  # clock->Q at the two settings, relative
SEARCH_TOL = 0.05e-12  # s, final bracket of a bisection
PUSHOUT = 0.1  # setup/hold pass: clock->Q at most 10 % over its relaxed value (charflow's default)
SETTLE = 0.01  # of vdd: the output's final level must be this close to its rail
PHASE = 0.6e-9  # s, each clock phase: the cells settle in ~0.3 ns
SLEW_BAND = 0.6  # a linear ramp spends the slew between 20 % and 80 % (common practice)
SHARP = 0.01e-9  # s, slew of the data moves that are not under test

TARGETS = {
    "seq_l1": {
        "models": (BUNDLED / "models" / "vellum90_l1.lib", "tt"),
        "vdd": 1.2,
        "temp": 25.0,
        "cells": {"QDFFR_P1": {"wn": 0.4e-6, "wp": 0.8e-6, "l": 0.1e-6, "reset": True}},
        "clock_slews": (0.01e-9, 0.1e-9),
        "loads": ((2e-15, 1e-15), (10e-15, 1e-15)),  # (Q, QB)
        "constraint_slews": (0.02e-9,),
        "constraint_load": 2e-15,  # every output, as charflow's searches load them
        "settings": L1_SETTINGS,
    },
    "vellum90": {
        "models": (BUNDLED / "models" / "vellum90_bsim.lib", "tt"),
        "vdd": 1.2,
        "temp": 25.0,
        "cells": {
            "QDFF_P1": {"wn": 0.4e-6, "wp": 0.8e-6, "l": 0.1e-6, "reset": False},
            "QDFFR_P1": {"wn": 0.4e-6, "wp": 0.8e-6, "l": 0.1e-6, "reset": True},
        },
        "clock_slews": (0.005e-9, 0.1e-9),
        "loads": ((0.5e-15, 0.5e-15), (10e-15, 0.5e-15)),
        "constraint_slews": (0.012e-9,),
        "constraint_load": 0.5e-15,
        "settings": BSIM_SETTINGS,
    },
}


def subckt(name: str, params: dict) -> str:
    template = (BUNDLED / "templates" / "cells" / "dff.sp.j2").read_text(encoding="utf-8")
    env = jinja2.Environment(undefined=jinja2.StrictUndefined)
    return env.from_string(template).render(name=name, **params)


def duration(slew: float) -> float:
    return slew / SLEW_BAND


class Wave:
    """A PWL source between 0 and vdd, built edge by edge; times of edge starts."""

    def __init__(self, vdd: float, high: bool) -> None:
        self.vdd, self.level, self.points = vdd, high, [(0.0, vdd if high else 0.0)]

    def edge(self, start: float, slew: float) -> Wave:
        v = self.vdd if self.level else 0.0
        self.level = not self.level
        self.points += [(start, v), (start + duration(slew), self.vdd - v)]
        return self

    def mid(self, start: float, slew: float) -> float:
        return start + duration(slew) / 2

    def pwl(self) -> str:
        return "pwl(" + " ".join(f"{t:.15g} {v:.6g}" for t, v in self.points) + ")"


def run(
    target: dict,
    cell: str,
    waves: dict,
    loads: tuple,
    stop: float,
    meas: list[str],
    settings=None,
) -> dict[str, float]:
    """Simulate one experiment; the `.meas` results that did not fail."""
    params = target["cells"][cell]
    path, section = target["models"]
    step, reltol = settings or target["settings"][0]
    pins = "D CLK RSTB" if params["reset"] else "D CLK"
    lines = [
        f"* flopref: {cell}",
        f'.lib "{path}" {section}',
        f".temp {target['temp']}",
        f".options reltol={reltol:g}",
        subckt(cell, params),
        f"vdd vdd 0 {target['vdd']}",
        *(f"v{p} {p} 0 {w.pwl()}" for p, w in waves.items()),
        f"cq q 0 {loads[0]:g}",
        f"cqb qb 0 {loads[1]:g}",
        f"xdut {pins} q qb vdd 0 {cell}",
        f".tran {step:g} {stop:.15g} 0 {step:g}",
        *meas,
        ".end",
    ]
    with tempfile.TemporaryDirectory() as tmp:
        deck = Path(tmp) / "ref.cir"
        deck.write_text("\n".join(lines) + "\n", encoding="utf-8")
        # One thread: BSIM's OpenMP threads only slow a cell this small down.
        env = {**os.environ, "OMP_NUM_THREADS": "1"}
        done = subprocess.run(["ngspice", "-b", str(deck)], capture_output=True, text=True, env=env)
    found = re.findall(r"^(\w+)\s*=\s*([-+0-9.eE]+)", done.stdout, re.MULTILINE)
    return {k.lower(): float(v) for k, v in found}


def _clocks(target: dict, clock_slew: float):
    """CLK: a writing edge at PHASE, low again at 2 PHASE; the measured edge at 4 PHASE."""
    clk = Wave(target["vdd"], False).edge(PHASE, SHARP).edge(2 * PHASE, SHARP)
    clk.edge(4 * PHASE, clock_slew)
    return clk, clk.mid(4 * PHASE, clock_slew)


def _levels(vdd: float, edge: str, out_node: str, after: float) -> list[str]:
    half = vdd / 2
    kind = "rise" if edge == "rise" else "fall"
    lo, hi = (0.2 * vdd, 0.8 * vdd) if edge == "rise" else (0.8 * vdd, 0.2 * vdd)
    return [
        f".meas tran tout when v({out_node})={half} {kind}=1 td={after:.15g}",
        f".meas tran tsecond when v({out_node})={half} cross=2 td={after:.15g}",
        f".meas tran ta when v({out_node})={lo} {kind}=1 td={after:.15g}",
        f".meas tran tb when v({out_node})={hi} {kind}=1 td={after:.15g}",
        f".meas tran vend find v({out_node}) at={{END}}",
    ]


def clock_to_q(target, cell, slew, q_edge, loads, settings=None):
    """CLK rise -> Q ``q_edge``: (delay, transition 20-80 %)."""
    vdd, new = target["vdd"], q_edge == "rise"
    clk, t_clk = _clocks(target, slew)
    d = Wave(vdd, not new).edge(3 * PHASE, SHARP)
    waves = {"D": d, "CLK": clk}
    if target["cells"][cell]["reset"]:
        waves["RSTB"] = Wave(vdd, True)
    stop = 5 * PHASE
    meas = [
        m.replace("{END}", f"{stop - 1e-12:.15g}") for m in _levels(vdd, q_edge, "q", 4 * PHASE)
    ]
    got = run(target, cell, waves, loads, stop, meas, settings)
    return got["tout"] - t_clk, got["tb"] - got["ta"]


def clear_to_q(target, cell, slew, loads, settings=None):
    """RSTB fall -> Q fall, a 1 stored: (delay, transition)."""
    vdd = target["vdd"]
    clk = Wave(vdd, False).edge(PHASE, SHARP).edge(2 * PHASE, SHARP)
    rstb = Wave(vdd, True).edge(4 * PHASE, slew)
    t_in = rstb.mid(4 * PHASE, slew)
    waves = {"D": Wave(vdd, True), "CLK": clk, "RSTB": rstb}
    stop = 5 * PHASE
    meas = [
        m.replace("{END}", f"{stop - 1e-12:.15g}") for m in _levels(vdd, "fall", "q", 4 * PHASE)
    ]
    got = run(target, cell, waves, loads, stop, meas, settings)
    return got["tout"] - t_in, got["tb"] - got["ta"]


def trial(target, cell, kind, data_edge, data_slew, clock_slew, offset):
    """One constraint experiment at ``offset`` (s): (captured as wanted, clock->Q or None)."""
    vdd = target["vdd"]
    load = target["constraint_load"]
    clk, t_clk = _clocks(target, clock_slew)
    waves = {"CLK": clk}
    reset = target["cells"][cell]["reset"]
    ramp = duration(data_slew) / 2  # start to 50 %
    if kind in ("setup", "hold"):
        final = data_edge == "rise"
        captured = final if kind == "setup" else not final
        if kind == "setup":
            d = Wave(vdd, not final).edge(t_clk - offset - ramp, data_slew)
        else:  # to the captured value long before, leaving it ``offset`` after the clock
            d = Wave(vdd, not captured).edge(3 * PHASE, SHARP)
            d.edge(t_clk + offset - ramp, data_slew)
        waves["D"] = d
        if reset:
            waves["RSTB"] = Wave(vdd, True)
        q_edge, held = ("rise" if captured else "fall"), False
    else:  # RSTB released (rise) before (recovery) or after (removal) the clock; D = 1
        release = t_clk - offset if kind == "recovery" else t_clk + offset
        waves["D"] = Wave(vdd, True)
        waves["RSTB"] = Wave(vdd, False).edge(release - ramp, data_slew)
        q_edge, held = "rise", kind == "removal"
    stop = max(5 * PHASE, t_clk + abs(offset) + PHASE)
    meas = [
        m.replace("{END}", f"{stop - 1e-12:.15g}") for m in _levels(vdd, q_edge, "q", 4 * PHASE)
    ]
    got = run(target, cell, waves, (load, load), stop, meas)
    if held:  # removal: the flop must stay cleared
        return got["vend"] < SETTLE * vdd, None
    want = vdd if q_edge == "rise" else 0.0
    ok = abs(got["vend"] - want) < SETTLE * vdd and "tout" in got and "tsecond" not in got
    return ok, (got["tout"] - t_clk) if ok else None


RELAXED = 0.5e-9  # s, an offset that passes by far
FAILING = -0.2e-9  # s, one that fails by far


def passes(target, cell, kind, data_edge, data_slew, clock_slew, offset, reference) -> bool:
    ok, delay = trial(target, cell, kind, data_edge, data_slew, clock_slew, offset)
    if kind == "removal" or not ok:
        return ok
    return delay <= (1 + PUSHOUT) * reference


def search(target, cell, kind, data_edge, data_slew, clock_slew) -> tuple[float, float]:
    """The bisection's final (failing, passing) bracket."""
    ok, reference = trial(target, cell, kind, data_edge, data_slew, clock_slew, RELAXED)
    if not ok:
        raise SystemExit(f"{cell} {kind} {data_edge}: fails relaxed")
    args = (target, cell, kind, data_edge, data_slew, clock_slew)
    lo, hi = FAILING, RELAXED
    if passes(*args, lo, reference):
        raise SystemExit(f"{cell} {kind} {data_edge}: passes at {lo}")
    while hi - lo > SEARCH_TOL:
        mid = (lo + hi) / 2
        lo, hi = (lo, mid) if passes(*args, mid, reference) else (mid, hi)
    return lo, hi


def arc_value(target, cell, kind, slew, edge, loads, settings):
    """A clock->Q (Q ``edge``) or clear->Q run: (delay, transition)."""
    if kind == "clock":
        return clock_to_q(target, cell, slew, edge, loads, settings)
    return clear_to_q(target, cell, slew, loads, settings)


def reference_rows(name: str):
    target = TARGETS[name]
    yield "target,cell,kind,related,pin,edge,slew_s,clock_slew_s,load_F,other_load_F,value_s,check"
    for cell, params in target["cells"].items():
        for slew in target["clock_slews"]:
            for loads in target["loads"]:
                arcs = [("clock", "CLK", edge) for edge in ("rise", "fall")]
                arcs += [("clear", "RSTB", "fall")] if params["reset"] else []
                for kind, related, edge in arcs:
                    args = (target, cell, kind, slew, edge, loads)
                    fine, coarse = (arc_value(*args, s) for s in target["settings"])
                    if abs(coarse[0] / fine[0] - 1) > AGREE:
                        raise SystemExit(f"{cell} {kind} {edge}: not converged {fine} {coarse}")
                    check = f"coarse {coarse[0]:.6g}"
                    yield (
                        f"{name},{cell},{kind},{related},Q,{edge},{slew:g},,{loads[0]:g},"
                        f"{loads[1]:g},{fine[0]:.6g},{check}"
                    )
        searches = [("setup", e) for e in ("rise", "fall")] + [
            ("hold", e) for e in ("rise", "fall")
        ]
        searches += [("recovery", "rise"), ("removal", "rise")] if params["reset"] else []
        for slew in target["constraint_slews"]:
            for kind, edge in searches:
                pin = "RSTB" if kind in ("recovery", "removal") else "D"
                lo, hi = search(target, cell, kind, edge, slew, slew)
                yield (
                    f"{name},{cell},{kind},CLK,{pin},{edge},{slew:g},{slew:g},"
                    f"{target['constraint_load']:g},,{hi:.6g},fails at {lo:.6g}"
                )


def main(argv: list[str]) -> None:
    if argv[:1] == ["judge"]:
        name, cell, kind, edge, data_slew, clock_slew, offset = argv[1:8]
        target = TARGETS[name]
        ds, cs = float(data_slew), float(clock_slew)
        _, reference = trial(target, cell, kind, edge, ds, cs, RELAXED)
        print(passes(target, cell, kind, edge, ds, cs, float(offset), reference))
        return
    print(f"# made by: python3 tests/reference/flop/flopref.py {argv[0]}")
    (step, reltol), (coarse_step, coarse_reltol) = TARGETS[argv[0]]["settings"]
    print(
        f"# settings: step {step:g} s, reltol {reltol:g} (cross-checked at {coarse_step:g} s, "
        f"{coarse_reltol:g}); bisection to {SEARCH_TOL:g} s"
    )
    for row in reference_rows(argv[0]):
        print(row, flush=True)


if __name__ == "__main__":
    main(sys.argv[1:])
