"""The third column of a path check: OpenSTA (J. Cherry, Parallax Software, "OpenSTA"), when
installed, timing the same circuits from the same Liberty file, loads and input slews.

Each circuit is one ``sta`` run: its Verilog (``io.verilog.write``), ``set_load`` on its ports
and wired nets, ``set_input_transition`` on its input port, and one unconstrained path report
per output port, input edge and slew, read back stage by stage.
"""

from __future__ import annotations

import re
import shutil
import subprocess
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from charflow.config.library import LibraryConfig
from charflow.io import verilog
from charflow.records.errors import SimulatorError
from charflow.records.paths import Circuit

PROGRAM = "sta"
TIMEOUT = 300.0  # s: one circuit's reports
DIGITS = 6
_MARK = "charflow-path"
# One stage's row of a full report with the slew field: slew, delay, time, edge, pin, cell.
_ROW = re.compile(r"^\s*(-?[\d.]+)\s+(-?[\d.]+)\s+(-?[\d.]+)\s+[v^]\s+(\S+)/(\S+)\s+\((\S+)\)\s*$")


@dataclass(frozen=True, slots=True)
class StaStage:
    gate: str
    slew: float  # s, at the gate's output
    delay: float  # s
    arrival: float  # s


def installed() -> bool:
    return shutil.which(PROGRAM) is not None


def script(
    config: LibraryConfig,
    liberty: Path,
    netlist: Path,
    circuit: Circuit,
    loads: tuple[dict[str, float], dict[str, float]],
    slews: Sequence[float],
) -> str:
    """The Tcl that times every output port of ``circuit`` at each slew and input edge;
    ``loads`` are (wire by net, port load by port) in F."""
    wire, port = loads
    t, c = config.time_scale, config.cap_scale
    lines = [f"read_liberty {liberty}", f"read_verilog {netlist}", f"link_design {circuit.name}"]
    # An output port's net: its wire with the port's load, one number on the port.
    lines += [
        f"set_load {(cap + wire.get(p, 0.0)) / c:.9g} [get_ports {p}]" for p, cap in port.items()
    ]
    lines += [f"set_load {cap / c:.9g} [get_nets {n}]" for n, cap in wire.items() if n not in port]
    for i, slew in enumerate(slews):
        lines.append(f"set_input_transition {slew / t:.9g} [get_ports {circuit.start}]")
        for end in circuit.outputs:
            for edge in ("rise", "fall"):
                lines.append(f'puts "{_MARK} {end} {edge} {i}"')
                lines.append(
                    f"report_checks -unconstrained -{edge}_from [get_ports {circuit.start}] "
                    f"-to [get_ports {end}] -fields {{slew}} -digits {DIGITS} -format full"
                )
    return "\n".join([*lines, "exit", ""])


def parse(text: str, time_scale: float) -> dict[tuple[str, str, int], tuple[StaStage, ...]]:
    """Per (output port, input edge, slew index): each gate's row of the report."""
    out: dict[tuple[str, str, int], tuple[StaStage, ...]] = {}
    for block in text.split(_MARK)[1:]:
        head, _, body = block.partition("\n")
        end, edge, index = head.split()
        rows = [
            StaStage(
                m[4], float(m[1]) * time_scale, float(m[2]) * time_scale, float(m[3]) * time_scale
            )
            for m in (_ROW.match(line) for line in body.splitlines())
            if m is not None
        ]
        out[(end, edge, int(index))] = tuple(rows)
    return out


def time_circuit(
    config: LibraryConfig,
    liberty: Path,
    circuit: Circuit,
    loads: tuple[dict[str, float], dict[str, float]],
    slews: Sequence[float],
) -> dict[tuple[str, str, int], tuple[StaStage, ...]]:
    """OpenSTA's report of every path of ``circuit`` (see ``parse``)."""
    with tempfile.TemporaryDirectory(prefix="charflow-sta-") as work:
        netlist = Path(work) / f"{circuit.name}.v"
        netlist.write_text(verilog.write(circuit, config), encoding="utf-8")
        tcl = Path(work) / "paths.tcl"
        tcl.write_text(script(config, liberty, netlist, circuit, loads, slews), encoding="utf-8")
        try:
            proc = subprocess.run(
                [PROGRAM, "-no_init", "-no_splash", "-exit", str(tcl)],
                capture_output=True,
                text=True,
                timeout=TIMEOUT,
                check=False,
            )
        except (OSError, subprocess.TimeoutExpired) as exc:
            raise SimulatorError(f"{PROGRAM} could not time circuit {circuit.name}: {exc}") from exc
    said = proc.stdout + proc.stderr
    errors = [line for line in said.splitlines() if line.startswith("Error")]
    if proc.returncode != 0 or errors:
        raise SimulatorError(
            f"{PROGRAM} failed on circuit {circuit.name} (exit {proc.returncode}): "
            + ("; ".join(errors) or said[-500:])
        )
    return parse(proc.stdout, config.time_scale)
