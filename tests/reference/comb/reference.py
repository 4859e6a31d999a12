"""Reference delay, transition and input charge of a few combinational cells, measured with
plain ngspice ``.meas`` statements (tests/reference/plain.py), independent of charflow.

Each point is one deck: the cell's subcircuit rendered from its template, a linear-ramp input
at the table slew, the other inputs held at the values that let it through, the load capacitor
on the output, ``.tran`` with a maximum step of MAX_STEP, and ``.meas`` at the library's
thresholds. Every point is run again at half the step; the JSON records by how much it moved.

    cd tests && python -m reference.comb.reference            # print the values
    cd tests && python -m reference.comb.reference --write    # rewrite values.json here

with ngspice on the PATH.
"""

from __future__ import annotations

import argparse
import json
import sys
from dataclasses import dataclass
from pathlib import Path

from reference import plain

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[2]
VALUES = HERE / "values.json"
COMMAND = "cd tests && python -m reference.comb.reference --write"
MAX_STEP = 0.1e-12  # s, the .tran maximum step
SETTLE = 2e-9  # s simulated after the input ramp ends
SETTLED = 1e-3  # of vdd: half-way through SETTLE the output is this close to its rail


@dataclass(frozen=True, slots=True)
class Case:
    """One arc of one cell: every other input held at a value that lets ``pin`` through."""

    config: str  # path from the repository root
    cell: str
    pin: str
    output: str
    side: tuple[tuple[str, bool], ...]


# Every case is an inverting arc: a rising input gives a falling output.
CASES = (
    Case("tests/data/small_l1.toml", "QINV_P1", "A", "Y", ()),
    Case("tests/data/small_l1.toml", "QNAND2_P1", "IA", "Y", (("IB", True),)),
    Case("tests/data/small_l1.toml", "QNAND2_P1", "IB", "Y", (("IA", True),)),
    Case("tests/data/small_l1.toml", "QNOR2_P1", "IA", "Y", (("IB", False),)),
    Case("charflow/bundled/demo/vellum90.toml", "QINV_P1", "A", "Y", ()),
)


def deck(lib: plain.Library, case: Case, edge: str, slew: float, load: float, step: float):
    """The deck of one point (``slew`` s, ``load`` F, the input's ``edge``); its stop time."""
    text = plain.subckt(lib, case.cell)
    nodes = {"VDD": "vdd", "VSS": "0"}
    duration = plain.ramp_duration(lib, slew, edge)
    stop = plain.LEAD + duration + SETTLE
    vdd, thr = lib.vdd, lib.thresholds
    out_edge = "fall" if edge == "rise" else "rise"
    lower, upper = thr.band(out_edge)
    lines = [*plain.header(lib, f"{case.cell} {case.pin}->{case.output}"), text]
    lines.append(f"vsupply vdd 0 dc {vdd:.9g}")
    lines.append(f"vin in_{case.pin} 0 {plain.ramp_pwl(lib, edge, plain.LEAD, duration)}")
    for pin, value in case.side:
        lines.append(f"v{pin.lower()} in_{pin} 0 dc {vdd if value else 0.0:.9g}")
    lines.append(f"cload out_{case.output} 0 {load:.9g}")
    ports = plain.ports(text, case.cell)
    inputs = {case.pin, *(p for p, _ in case.side)}
    wired = [nodes.get(p) or (f"in_{p}" if p in inputs else f"out_{p}") for p in ports]
    lines.append(f"xdut {' '.join(wired)} {case.cell}")
    inp, out = f"v(in_{case.pin})", f"v(out_{case.output})"
    first, second = (upper, lower) if out_edge == "fall" else (lower, upper)
    lines += [
        f".tran {step:.6g} {stop:.9g} 0 {step:.6g}",
        f".meas tran ref_tin when {inp}={thr.delay_input(edge) * vdd:.9g} {edge}=1",
        f".meas tran ref_tout when {out}={thr.delay_output(out_edge) * vdd:.9g} {out_edge}=1",
        ".meas tran ref_delay param='ref_tout-ref_tin'",
        f".meas tran ref_ta when {out}={first * vdd:.9g} {out_edge}=1",
        f".meas tran ref_tb when {out}={second * vdd:.9g} {out_edge}=1",
        ".meas tran ref_span param='ref_tb-ref_ta'",
        f".meas tran ref_q integ i(vin) from=0 to={stop:.9g}",
        f".meas tran ref_vend find {out} at={stop - SETTLE / 2:.9g}",
        ".end",
    ]
    return "\n".join(lines) + "\n", stop


def measure(lib: plain.Library, case: Case, edge: str, slew: float, load: float, step: float):
    """(delay s, transition s, charge C the pin drew) of one point at one maximum step."""
    text, _ = deck(lib, case, edge, slew, load, step)
    got = plain.run(text)
    missing = {"ref_delay", "ref_span", "ref_q", "ref_vend"} - set(got)
    if missing:
        raise RuntimeError(f"{case.cell} {edge} slew {slew} load {load}: no {sorted(missing)}")
    rail = 0.0 if edge == "rise" else lib.vdd
    if abs(got["ref_vend"] - rail) > SETTLED * lib.vdd:
        raise RuntimeError(f"{case.cell} {edge} slew {slew} load {load}: output not settled")
    # i(vin) flows into the source's positive terminal: the pin drew its negative.
    return got["ref_delay"], got["ref_span"] / lib.thresholds.derate, -got["ref_q"]


def points(case: Case, lib: plain.Library):
    """The grid's four corners and its centre (slew, load), both edges, in SI units."""
    slews, loads = lib.grid["slew"], lib.grid["load"]
    chosen = [(s, c) for s in (slews[0], slews[-1]) for c in (loads[0], loads[-1])]
    chosen.append((slews[len(slews) // 2], loads[len(loads) // 2]))
    for slew, load in chosen:
        for edge in ("rise", "fall"):
            yield edge, slew * lib.time_unit, load * lib.cap_unit


def reference() -> list[dict]:
    rows = []
    for case in CASES:
        lib = plain.read_library(ROOT / case.config)
        for edge, slew, load in points(case, lib):
            fine = measure(lib, case, edge, slew, load, MAX_STEP)
            coarse = measure(lib, case, edge, slew, load, 2 * MAX_STEP)
            rows.append(
                {
                    "config": case.config,
                    "cell": case.cell,
                    "pin": case.pin,
                    "output": case.output,
                    "side": {p: int(v) for p, v in case.side},
                    "input_edge": edge,
                    "output_edge": "fall" if edge == "rise" else "rise",
                    "slew_s": slew,
                    "load_F": load,
                    "delay_s": fine[0],
                    "transition_s": fine[1],
                    "input_charge_C": fine[2],
                    # How far each value moved from twice the step to MAX_STEP.
                    "step_change_s": [abs(fine[0] - coarse[0]), abs(fine[1] - coarse[1])],
                    "step_change_C": abs(fine[2] - coarse[2]),
                }
            )
            print(f"{case.cell} {case.pin} {edge} {slew:.3g} {load:.3g} {fine}", file=sys.stderr)
    return rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--write", action="store_true", help=f"rewrite {VALUES.name}")
    args = parser.parse_args()
    doc = {
        "what": "reference values from plain ngspice .meas, independent of charflow",
        "command": COMMAND,
        "ngspice": plain.ngspice_version(),
        "options": plain.OPTIONS,
        "max_step_s": MAX_STEP,
        "points": reference(),
    }
    text = json.dumps(doc, indent=1) + "\n"
    if args.write:
        VALUES.write_text(text, encoding="utf-8")
    else:
        print(text)


if __name__ == "__main__":
    main()
