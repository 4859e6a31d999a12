"""Plain ngspice for the reference values: a deck written here, run with ``ngspice -b``, its
``.meas`` lines read back. Imports nothing from charflow: it reads the library's TOML and renders
the cell's template itself, so a change in charflow's code cannot move what it measures.

The measurement convention it follows is the library's, as the config states it (Liberty's
threshold convention, common practice): delay from the input's to the output's delay threshold,
transition between the slew thresholds divided by the derate, and an input ramp that is linear
and spends ``slew x derate`` between the slew thresholds.
"""

from __future__ import annotations

import re
import subprocess
import tempfile
import tomllib
from dataclasses import dataclass
from pathlib import Path

import jinja2

# Units the config's [library] section may name (README, "[library]"); the reference covers
# the ones its configs use.
TIME_UNITS = {"ns": 1e-9, "ps": 1e-12}
CAP_UNITS = {"pf": 1e-12, "ff": 1e-15}
# The config's threshold defaults in percent of vdd (README, "[thresholds]").
DEFAULT_THRESHOLDS = {
    "input_rise": 50.0,
    "input_fall": 50.0,
    "output_rise": 50.0,
    "output_fall": 50.0,
    "slew_lower_rise": 20.0,
    "slew_upper_rise": 80.0,
    "slew_lower_fall": 20.0,
    "slew_upper_fall": 80.0,
}
DEFAULT_TEMPERATURE = 25.0  # degrees C (README, "[process]")
LEAD = 20e-12  # s before an input leaves its rail: the operating point holds until then
# Simulator tolerances 100 to 1000 times tighter than ngspice's defaults (reltol 1e-3, abstol
# 1 pA, vntol 1 uV, chgtol 1e-14 C; the ngspice manual, from memory): the reference should be
# the circuit's answer, not the accuracy of one setting.
OPTIONS = "reltol=1e-5 abstol=1e-14 vntol=1e-8 chgtol=1e-17"
TIMEOUT = 120.0  # s of wall time for one reference run
_MEAS = re.compile(r"^(ref_\w+)\s*=\s*([-+0-9.eE]+)")  # every .meas here is named ref_*


@dataclass(frozen=True, slots=True)
class Thresholds:
    """Fractions of vdd (the config gives percent)."""

    input_rise: float
    input_fall: float
    output_rise: float
    output_fall: float
    slew_lower_rise: float
    slew_upper_rise: float
    slew_lower_fall: float
    slew_upper_fall: float
    derate: float

    def delay_input(self, edge: str) -> float:
        return self.input_rise if edge == "rise" else self.input_fall

    def delay_output(self, edge: str) -> float:
        return self.output_rise if edge == "rise" else self.output_fall

    def band(self, edge: str) -> tuple[float, float]:
        if edge == "rise":
            return self.slew_lower_rise, self.slew_upper_rise
        return self.slew_lower_fall, self.slew_upper_fall


@dataclass(frozen=True, slots=True)
class Library:
    """What a reference run needs of a charflow config TOML, in SI units."""

    path: Path
    vdd: float  # V
    temperature: float  # degrees C
    models: tuple[tuple[Path, str | None], ...]
    thresholds: Thresholds
    time_unit: float  # s per library time unit
    cap_unit: float  # F per library capacitance unit
    cells: dict[str, dict]  # name -> its [[cell]] table
    grid: dict[str, list[float]]  # the library's [grid], in library units


def read_library(path: Path) -> Library:
    doc = tomllib.loads(path.read_text(encoding="utf-8"))
    here = path.parent
    models = []
    for entry in doc["process"]["models"]:
        if isinstance(entry, str):
            models.append(((here / entry).resolve(), None))
        else:
            models.append(((here / entry["file"]).resolve(), entry.get("section")))
    percent = {**DEFAULT_THRESHOLDS, **doc.get("thresholds", {})}
    derate = percent.pop("slew_derate", 1.0)
    thresholds = Thresholds(**{k: v / 100.0 for k, v in percent.items()}, derate=derate)
    lib = doc["library"]
    return Library(
        path=path,
        vdd=float(doc["process"]["vdd"]),
        temperature=float(doc["process"].get("temperature", DEFAULT_TEMPERATURE)),
        models=tuple(models),
        thresholds=thresholds,
        time_unit=TIME_UNITS[lib.get("time_unit", "ns")],
        cap_unit=CAP_UNITS[lib.get("cap_unit", "pf")],
        cells={c["name"]: c for c in doc["cell"]},
        grid=doc["grid"],
    )


def subckt(lib: Library, cell: str) -> str:
    """The cell's .subckt text: its Jinja template rendered with its name and params."""
    spec = lib.cells[cell]
    template = (lib.path.parent / spec["template"]).resolve()
    text = template.read_text(encoding="utf-8")
    env = jinja2.Environment(undefined=jinja2.StrictUndefined)
    return env.from_string(text).render(name=cell, **spec.get("params", {}))


def ports(text: str, cell: str) -> list[str]:
    """The port names of ``.subckt cell`` in ``text``, in order."""
    for line in text.splitlines():
        words = line.split()
        if len(words) > 2 and words[0].lower() == ".subckt" and words[1] == cell:
            return words[2:]
    raise ValueError(f"no .subckt {cell} in the rendered template")


def ramp_duration(lib: Library, slew: float, edge: str) -> float:
    """s of full swing of a linear ramp whose table slew is ``slew`` (s)."""
    lower, upper = lib.thresholds.band(edge)
    return slew * lib.thresholds.derate / (upper - lower)


def ramp_pwl(lib: Library, edge: str, start: float, duration: float) -> str:
    """A PWL that holds its rail, ramps linearly at ``start`` for ``duration``, then holds."""
    v0, v1 = (0.0, lib.vdd) if edge == "rise" else (lib.vdd, 0.0)
    return f"pwl(0 {v0:.9g} {start:.9g} {v0:.9g} {start + duration:.9g} {v1:.9g})"


def header(lib: Library, title: str) -> list[str]:
    lines = [f"* {title}"]
    for file, section in lib.models:
        lines.append(f'.lib "{file}" {section}' if section else f'.include "{file}"')
    lines += [f".temp {lib.temperature:.9g}", f".options {OPTIONS}"]
    return lines


def run(deck: str) -> dict[str, float]:
    """Run ``deck`` with ``ngspice -b``; every ``.meas`` result named ``ref_*``, by name. A
    measurement that failed is missing from the result."""
    with tempfile.TemporaryDirectory(prefix="reference-") as folder:
        path = Path(folder) / "deck.cir"
        path.write_text(deck, encoding="utf-8")
        done = subprocess.run(
            ["ngspice", "-b", str(path)],
            capture_output=True,
            text=True,
            timeout=TIMEOUT,
            cwd=folder,
            check=False,
        )
    if done.returncode != 0:
        raise RuntimeError(f"ngspice failed ({done.returncode}):\n{done.stderr[-2000:]}")
    found = {}
    for line in done.stdout.splitlines():
        match = _MEAS.match(line.strip())
        if match:
            found[match.group(1).lower()] = float(match.group(2))
    return found


def ngspice_version() -> str:
    """The first line naming ngspice in ``ngspice -v``, e.g. ``ngspice-39``."""
    text = subprocess.run(["ngspice", "-v"], capture_output=True, text=True, check=False).stdout
    match = re.search(r"ngspice-\S+", text)
    return match.group(0) if match else "unknown"
