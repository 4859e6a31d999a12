"""Running the two open consumers of a Liberty file on a library charflow wrote, for the tests.

yosys: C. Wolf et al., "Yosys Open SYnthesis Suite" (Debian package yosys 0.23), with its
bundled ABC (Berkeley Logic Synthesis and Verification Group, "ABC: A System for Sequential
Synthesis and Verification"). OpenSTA: J. Cherry, Parallax Software, "OpenSTA" (Debian package
opensta 0~20191111). Both must be installed: a test that needs one fails without it.
"""

from __future__ import annotations

import re
import shutil
import subprocess
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path

import pytest

DATA = Path(__file__).resolve().parent / "data" / "consumers"
COUNTER = DATA / "counter.v"  # RTL: a counter with an asynchronous active-low reset
MIXED = DATA / "mixed.v"  # gate level: every cell of tests/data/consumers.toml
TOOL_TIMEOUT = 300  # s; a stuck tool fails the test instead of hanging it
CLOCK_PERIOD = 2.0  # ns, the library's time unit in every script here

# ABC notes that its mapper leaves multi-output cells aside (it names one); it prints the same
# for any library with a full adder. It is about the mapper, not a fault of the library.
ABC_MULTI_OUTPUT = re.compile(r'Detected \d+ multi-output gates \(for example, "(\w+)"\)')
# About the design handed to ABC (its flip-flops are mapped before), not the library.
ABC_COMBINATIONAL = "The network is combinational"


def tool(name: str) -> str:
    path = shutil.which(name)
    if path is None:
        pytest.fail(f"{name} is not on PATH; the consumer tests need it (Debian: yosys, opensta)")
    return path


def _run(args: list[str], cwd: Path) -> str:
    proc = subprocess.run(
        args, cwd=cwd, capture_output=True, text=True, timeout=TOOL_TIMEOUT, check=False
    )
    out = proc.stdout + proc.stderr
    assert proc.returncode == 0, f"{args[0]} exited with {proc.returncode}:\n{out[-4000:]}"
    return out


@dataclass(frozen=True, slots=True)
class Synthesis:
    log: str
    cells: dict[str, int]  # the mapped design's cells by type, from ``stat``


def synthesize(lib: Path, work: Path) -> Synthesis:
    """yosys: generic synthesis of counter.v, flip-flops mapped by dfflibmap, the rest by ABC,
    all onto ``lib``; the log and ``stat``'s cell counts."""
    script = work / "synth.ys"
    script.write_text(
        f"read_liberty -lib {lib}\n"
        f"read_verilog {COUNTER}\n"
        "synth -top counter\n"
        f"dfflibmap -liberty {lib}\n"
        f"abc -liberty {lib}\n"
        "opt_clean\n"
        f"stat -liberty {lib}\n"
        f"write_verilog -noattr {work / 'counter_mapped.v'}\n",
        encoding="utf-8",
    )
    log = _run([tool("yosys"), "-s", str(script)], work)
    stat = log[log.rindex("=== counter ===") :]
    listing = stat[stat.index("Number of cells:") : stat.index("Chip area")]
    cells = {m[1]: int(m[2]) for m in re.finditer(r"^\s+(\S+)\s+(\d+)$", listing, re.M)}
    return Synthesis(log, cells)


def yosys_complaints(log: str, two_output_cells: Iterable[str]) -> list[str]:
    """Every warning or error line of a yosys log but ABC's two notes above (the first only
    when it names a two-output cell of the library)."""
    allowed = set(two_output_cells)
    found = []
    for line in log.splitlines():
        if not re.search(r"warning|error", line, re.I):
            continue
        m = ABC_MULTI_OUTPUT.search(line)
        if (m and m[1] in allowed) or ABC_COMBINATIONAL in line:
            continue
        found.append(line)
    return found


def sta(script: str, work: Path, name: str = "sta.tcl") -> str:
    """OpenSTA on a Tcl script; its whole output."""
    path = work / name
    path.write_text(script + "\nexit\n", encoding="utf-8")
    return _run([tool("sta"), "-no_init", "-no_splash", "-exit", str(path)], work)


def sta_complaints(log: str) -> list[str]:
    """OpenSTA's error and warning lines (it prints them as ``Error: ...``, ``Warning: ...``)."""
    return [line for line in log.splitlines() if re.match(r"\s*(Error|Warning)\b", line)]


def mixed_script(lib: Path, sdf: Path) -> str:
    """Timing, power and SDF of mixed.v: setup and hold at both flip-flops, inputs toggling."""
    checks = "\n".join(
        f"report_checks -path_delay {kind} -to [get_pins {pin}] -digits 6"
        for pin in ("f1/D", "f2/D")
        for kind in ("max", "min")
    )
    return f"""\
read_liberty {lib}
read_verilog {MIXED}
link_design mixed
create_clock -name clk -period {CLOCK_PERIOD} [get_ports clk]
set_input_delay 0.1 -clock clk [get_ports {{d e rst_n}}]
set_output_delay 0.1 -clock clk [get_ports {{q y}}]
set_input_transition 0.03 [all_inputs]
set_load 0.004 [all_outputs]
{checks}
set_power_activity -input -activity 0.1
report_power
write_sdf -digits 6 {sdf}
"""


def total_power(log: str) -> float:
    """W: the Total row of ``report_power``."""
    m = re.search(r"^Total\s+(\S+)\s+(\S+)\s+(\S+)\s+(\S+)", log, re.M)
    assert m is not None, f"no Total row in report_power:\n{log[-2000:]}"
    return float(m[4])


def library_checks(log: str, kind: str) -> list[tuple[str, str, float]]:
    """(endpoint pin, data edge ``^``/``v``, value) of each path's ``library <kind> time``
    line (setup or hold), in report order."""
    found = []
    for report in log.split("Startpoint:")[1:]:
        m = re.search(rf"^\s*(-?[\d.]+)\s+-?[\d.]+\s+library {kind} time$", report, re.M)
        if m is None:
            continue
        edge, pin = re.search(
            r"^\s*[-\d.]+\s+[-\d.]+ ([v^]) (\S+) \(\w+\)\n\s+[-\d.]+\s+data "
            r"arrival time",
            report,
            re.M,
        ).groups()
        found.append((pin, edge, float(m[1])))
    return found
