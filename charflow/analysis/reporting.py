"""What the fidelity report and the grid study say alike: relative errors in percent, table
axes in library units, the head of their JSON documents, and a JSON document written with its
page or figure beside it.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from pathlib import Path

from charflow import __version__
from charflow.config.library import LibraryConfig
from charflow.io.atomic import write_atomic
from charflow.records.units import index_unit
from charflow.tables.table import Axis
from charflow.tables.tabulate import LOAD_AXIS, OTHER_LOAD_AXIS, SLEW_AXIS

# The short name of a timing table's axis in reports; the grid study's suggested grid uses the
# first two as the config's grid keys.
AXIS_LABELS = {SLEW_AXIS: "slew", LOAD_AXIS: "load", OTHER_LOAD_AXIS: "other load"}


def pct(fraction: float | None) -> str:
    """A relative error in percent, ``4.22 %``; ``failed`` where it could not be measured."""
    return "failed" if fraction is None else f"{fraction * 100:.3g} %"


def axis_unit(config: LibraryConfig, axis_name: str) -> tuple[str, float, str]:
    """(short name, SI per library unit, library unit) of a table axis."""
    scale, unit = index_unit(axis_name, config)
    return AXIS_LABELS[axis_name], scale, unit


def where(config: LibraryConfig, axes: Sequence[Axis], coords: Sequence[float]) -> str:
    """``slew 0.0123 ns, load 0.004 pf``."""
    parts = []
    for axis, x in zip(axes, coords, strict=True):
        label, scale, unit = axis_unit(config, axis.name)
        parts.append(f"{label} {x / scale:.4g} {unit}")
    return ", ".join(parts)


def head(config: LibraryConfig) -> dict:
    """The first keys of a report's JSON document: which library, written by what."""
    return {"library": config.name, "generator": f"charflow {__version__}"}


def library_units(config: LibraryConfig) -> dict:
    """The library's units, named in a JSON document whose values are SI."""
    return {"time": config.time_unit, "capacitance": config.cap_unit}


def write_pair(out_dir: Path, stem: str, doc: dict, suffix: str, figure: str | bytes) -> list[Path]:
    """``<stem>.json`` (``doc``, indented by one space) and ``<stem><suffix>`` (an HTML page or
    a PNG) in ``out_dir``, each written whole or not at all."""
    out_dir = Path(out_dir)
    json_path, figure_path = out_dir / f"{stem}.json", out_dir / f"{stem}{suffix}"
    write_atomic(json_path, json.dumps(doc, indent=1) + "\n")
    write_atomic(figure_path, figure)
    return [json_path, figure_path]
