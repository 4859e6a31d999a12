"""Reading and validating charflow's TOML configuration into typed, frozen records.

Every value the rest of charflow sees is in SI units; the config's library units
(``time_unit``, ``cap_unit``) are applied here and in the writers only. Problems are
collected, not stopped at: one ConfigError lists every one found, each naming the file,
the key and the cell.
"""

from __future__ import annotations

import hashlib
import math
import re
import tomllib
from collections.abc import Iterator
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from charflow.config.shapes import KINDS, InputShape, read_file
from charflow.records import logic
from charflow.records.errors import ConfigError, ConfigProblemsError, FunctionSyntaxError
from charflow.records.units import CAP_UNITS, TIME_UNITS, cap_scale, time_scale, unit_name


@dataclass(frozen=True, slots=True)
class Thresholds:
    """Measurement thresholds as fractions of the supply (the config gives percent)."""

    input_rise: float = 0.5
    input_fall: float = 0.5
    output_rise: float = 0.5
    output_fall: float = 0.5
    slew_lower_rise: float = 0.2
    slew_upper_rise: float = 0.8
    slew_lower_fall: float = 0.2
    slew_upper_fall: float = 0.8
    slew_derate: float = 1.0

    def delay_input(self, edge: str) -> float:
        return self.input_rise if edge == "rise" else self.input_fall

    def delay_output(self, edge: str) -> float:
        return self.output_rise if edge == "rise" else self.output_fall

    def slew_band(self, edge: str) -> tuple[float, float]:
        """(lower, upper) slew thresholds for an edge, as fractions of the supply."""
        if edge == "rise":
            return self.slew_lower_rise, self.slew_upper_rise
        return self.slew_lower_fall, self.slew_upper_fall

    def to_input_threshold(self, edge: str) -> float:
        """The swing from an input edge's start to its delay threshold, as a fraction of the
        supply: a pin's to-threshold charge over it (and the supply) is a capacitance."""
        level = self.delay_input(edge)
        return level if edge == "rise" else 1.0 - level

    def slew_swing(self, edge: str) -> float:
        """The swing between an edge's slew thresholds, as a fraction of the supply."""
        lower, upper = self.slew_band(edge)
        return upper - lower


@dataclass(frozen=True, slots=True)
class ModelFile:
    path: Path
    section: str | None = None


@dataclass(frozen=True, slots=True)
class Process:
    models: tuple[ModelFile, ...]
    vdd: float  # V
    temperature: float  # degrees C
    options: tuple[tuple[str, str], ...] = ()
    compat: str | None = None  # ngspice's ngbehavior, e.g. "hs" for foundry decks
    scale: float | None = None  # .option scale


@dataclass(frozen=True, slots=True)
class Grid:
    slew: tuple[float, ...]  # s
    load: tuple[float, ...]  # F
    related_load: tuple[float, ...] = ()  # F, the other output's load of a two-output cell
    constraint_slew: tuple[float, ...] = ()  # s, the constrained pin's slews (default: slew)
    clock_slew: tuple[float, ...] = ()  # s, the clock's slews of those tables (default: above)
    pulse_slew: tuple[float, ...] = ()  # s, minimum pulse widths' slews (default: sharpest)

    @property
    def data_slews(self) -> tuple[float, ...]:
        """The constrained (data or control) pin's slews of setup, hold, recovery and removal."""
        return self.constraint_slew or self.slew

    @property
    def clock_slews(self) -> tuple[float, ...]:
        """The clock's slews of those tables: its own list, else the data pin's."""
        return self.clock_slew or self.data_slews

    @property
    def pulse_slews(self) -> tuple[float, ...]:
        """The slews minimum pulse widths are searched at: one (the sharpest, a number per pin
        and level in Liberty) unless ``pulse_slew`` asks for a table over the pin's slew."""
        return self.pulse_slew or (min(self.slew),)


@dataclass(frozen=True, slots=True)
class OutputSpec:
    pin: str
    function: logic.Expr


@dataclass(frozen=True, slots=True)
class FlopSpec:
    """An edge-triggered storage element; outputs are functions of ``state``."""

    clock: str
    edge: str  # "rise" or "fall": the active clock edge
    next_state: logic.Expr
    clear: logic.Expr | None = None  # asynchronous clear, active when true
    preset: logic.Expr | None = None
    state: tuple[str, str] = ("IQ", "IQN")  # the stored value and its complement

    @property
    def clocked_on(self) -> str:
        return self.clock if self.edge == "rise" else f"!{self.clock}"


@dataclass(frozen=True, slots=True)
class BodyPin:
    """A cell's body (well) pin: tied to the supply of its kind (an n-well to the cell's power,
    a p-well to its ground) or, with ``voltage``, held at its own voltage (body bias)."""

    pin: str
    kind: str  # "nwell" or "pwell": Liberty's pg_type of the pin
    voltage: float | None = None  # V; None: tied to the cell's power (nwell) or ground (pwell)


BODY_KINDS = ("nwell", "pwell")


@dataclass(frozen=True, slots=True)
class CellSpec:
    name: str
    inputs: tuple[str, ...]
    outputs: tuple[OutputSpec, ...]
    grid: Grid
    template: Path | None = None
    netlist: Path | None = None
    params: tuple[tuple[str, Any], ...] = ()
    power: str = "VDD"
    ground: str = "VSS"
    area: float = 0.0
    flop: FlopSpec | None = None
    other_output_axis: bool = False  # tables get the other output's load as a third index
    body: tuple[BodyPin, ...] = ()  # body pins, n-well before p-well

    @property
    def flip_flop(self) -> FlopSpec:
        """The cell's flip-flop, where the caller knows it is one (a bug of charflow if not)."""
        if self.flop is None:
            raise TypeError(f"cell {self.name} is not a flip-flop")
        return self.flop

    @property
    def supply_pins(self) -> tuple[str, ...]:
        """The power and ground pins and the body pins."""
        return (self.power, self.ground, *(b.pin for b in self.body))

    @property
    def data_inputs(self) -> tuple[str, ...]:
        """Inputs that are neither the clock nor an asynchronous control."""
        if self.flop is None:
            return self.inputs
        controls = {self.flop.clock}
        for expr in (self.flop.clear, self.flop.preset):
            if expr is not None:
                controls |= expr.variables()
        return tuple(p for p in self.inputs if p not in controls)

    @property
    def source(self) -> Path:
        """The file the cell's ``.subckt`` comes from."""
        source = self.template if self.template is not None else self.netlist
        if source is None:  # the config reader requires one of them (a bug of charflow if not)
            raise TypeError(f"cell {self.name} has neither a template nor a netlist")
        return source


@dataclass(frozen=True, slots=True)
class Simulation:
    """How charflow drives the simulator; charflow's own settings, not the library's."""

    backend: str = "shared"  # "shared" (in-process libngspice) or "subprocess"
    timeout: float = 60.0  # s of wall time per simulation
    window: float | None = None  # s the transient may run past the input ramp (a cap)
    samples_per_edge: int = 20  # minimum samples across the output transition
    settle: float = 0.01  # fraction of vdd the output must come within of its final rail
    pushout: float = 0.1  # setup/hold pass: clock-to-output at most this much over relaxed
    bisect_tolerance: float = 1e-12  # s, width of the final bracket of a constraint search


@dataclass(frozen=True, slots=True)
class Fidelity:
    """How the tables are checked against re-simulation off their grid (``[fidelity]``)."""

    random_points: int = 16  # Latin-hypercube points per table, besides every cell centre
    seed: int = 1
    rel_floor: float = 1e-12  # s; relative errors divide by max(|simulated|, rel_floor)


ERROR_BAR_POINTS = ("none", "all")  # the grid points an error bar is measured at


@dataclass(frozen=True, slots=True)
class ErrorBars:
    """Which values get an error bar and when one is warned about (``[error_bars]``)."""

    points: str = "none"  # of ERROR_BAR_POINTS: every combinational grid point, or none
    warn_above: float = 0.001  # fraction of a value its error bar may reach without a warning


# How the default Liberty file reduces a two-output cell's tables to the two axes every
# consumer reads: the largest or smallest value over the other output's loads, point by point.
OTHER_LOAD_RULES = ("largest", "smallest")
# Which charge an input pin's Liberty capacitance is (``[liberty] pin_capacitance``): the whole
# input edge's over Vdd, or the charge up to the input's delay threshold over the swing to it
# (the load a driver has charged when its delay is measured; docs/history/2026-12-pathfit.md).
PIN_CAPACITANCE_RULES = ("whole-edge", "threshold")


@dataclass(frozen=True, slots=True)
class LibertyOptions:
    """What the Liberty writer states beyond the tables (``[liberty]``)."""

    # A rule of OTHER_LOAD_RULES, or a load (F) of the other output the tables are read at.
    other_load: str | float = "largest"
    # max_capacitance and max_transition: this factor times the characterized range.
    load_limit_factor: float = 1.0
    slew_limit_factor: float = 1.0
    pin_capacitance: str = "whole-edge"  # one of PIN_CAPACITANCE_RULES


@dataclass(frozen=True, slots=True)
class Corner:
    """One operating corner: the model section it reads, its supply and temperature."""

    name: str
    section: str | None  # replaces the section of every model file read by section
    vdd: float  # V
    temperature: float  # degrees C


# How the spread of delays and transitions is found (``[mismatch] method``): not at all, by
# first-order sensitivities to each transistor's threshold, or by sampling (Monte Carlo).
SPREAD_METHODS = ("off", "linear", "sampled")
# Where the linear method measures sensitivities (``[mismatch] linear_grid``): at the first,
# middle and last value of each axis, interpolated between (``sparse``), or at every point.
LINEAR_GRIDS = ("sparse", "full")


@dataclass(frozen=True, slots=True)
class DeviceMismatch:
    """The threshold mismatch of one device type (SPICE model name): Pelgrom's area
    coefficient A_Vt, σ(ΔVt) = A_Vt / √(W·L) (Pelgrom, Duinmaijer & Welbers, IEEE JSSC
    24(5), 1989)."""

    model: str  # as the netlist names it (case-insensitive, like SPICE)
    polarity: str  # "n" | "p": which way a higher |Vt| moves the gate
    vt_coefficient: float  # V·m (the config's mV·µm × 1e-9)


@dataclass(frozen=True, slots=True)
class WrappedDevice:
    """A subcircuit that stands for one transistor (a foundry kit's wrapped device): which of
    its parameters are the width and length, which port is the gate, and its model's name."""

    subckt: str
    model: str  # a DeviceMismatch's model
    width: str  # instance parameter holding W (m)
    length: str  # instance parameter holding L (m)
    gate: int  # 1-based position of the gate among the instance's nodes


@dataclass(frozen=True, slots=True)
class Mismatch:
    """``[mismatch]``: per-transistor threshold variation and how its spread is found."""

    method: str = "off"  # SPREAD_METHODS
    devices: tuple[DeviceMismatch, ...] = ()
    wrapped: tuple[WrappedDevice, ...] = ()
    linear_grid: str = "sparse"  # LINEAR_GRIDS
    samples: int = 500  # Monte Carlo samples per sampled point
    checks: int = 1  # Monte Carlo reference points per arc edge and state (linear method)
    seed: int = 1

    def device(self, model: str) -> DeviceMismatch | None:
        return next((d for d in self.devices if d.model.lower() == model.lower()), None)

    def wrapper(self, subckt: str) -> WrappedDevice | None:
        return next((w for w in self.wrapped if w.subckt.lower() == subckt.lower()), None)


@dataclass(frozen=True, slots=True)
class LibraryConfig:
    path: Path
    name: str
    time_unit: str
    cap_unit: str
    process: Process
    thresholds: Thresholds
    grid: Grid
    cells: tuple[CellSpec, ...]
    simulation: Simulation = field(default_factory=Simulation)
    fidelity: Fidelity = field(default_factory=Fidelity)
    error_bars: ErrorBars = field(default_factory=ErrorBars)
    corners: tuple[Corner, ...] = ()
    liberty: LibertyOptions = field(default_factory=LibertyOptions)
    mismatch: Mismatch = field(default_factory=Mismatch)
    corner: Corner | None = None  # the corner this library is at (``at``); None: the process's
    input_shape: InputShape = field(default_factory=InputShape)  # ``[input_shape]``
    digest: str | None = None  # sha256 of the file's bytes ``load`` read; None: not from a file
    # The cells by name, for ``cell``: built with the record, never compared or shown.
    _by_name: dict[str, CellSpec] = field(init=False, repr=False, compare=False, hash=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "_by_name", {c.name: c for c in self.cells})

    @property
    def corner_name(self) -> str:
        """The corner's name: the ``[[corner]]`` this library is at, else the model sections
        read (e.g. ``tt``), else the library's name."""
        if self.corner is not None:
            return self.corner.name
        sections = dict.fromkeys(m.section for m in self.process.models if m.section)
        return "_".join(sections) or self.name

    def at(self, corner: Corner) -> LibraryConfig:
        """The library at one corner, named ``<name>_<corner>``, with no corners of its own."""
        models = tuple(
            replace(m, section=corner.section) if m.section and corner.section else m
            for m in self.process.models
        )
        process = replace(
            self.process, models=models, vdd=corner.vdd, temperature=corner.temperature
        )
        name = f"{self.name}_{corner.name}"
        return replace(self, name=name, process=process, corners=(), corner=corner)

    def libraries(self) -> tuple[LibraryConfig, ...]:
        """One library per corner; the library itself when the config lists no corners."""
        return tuple(self.at(c) for c in self.corners) or (self,)

    @property
    def time_scale(self) -> float:
        return time_scale(self.time_unit)

    @property
    def cap_scale(self) -> float:
        return cap_scale(self.cap_unit)

    def cell(self, name: str) -> CellSpec:
        found = self._by_name.get(name)
        if found is not None:
            return found
        raise ConfigError(
            f"no cell named {name!r}; the config has {', '.join(c.name for c in self.cells)}",
            file=self.path,
            cell=name,
        )


_MISSING = object()


class _Reader:
    """Walks the TOML document, collecting every problem with its file, key and cell."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.problems: list[ConfigError] = []

    def problem(self, key: str, message: str, cell: str | None = None) -> None:
        self.problems.append(ConfigError(message, file=self.path, key=key, cell=cell))

    def section(
        self,
        table: dict[str, Any],
        key: str,
        allowed: set[str],
        *,
        required: bool,
        cell: str | None = None,
    ) -> dict[str, Any]:
        value = table.get(key, _MISSING)
        if value is _MISSING:
            if required:
                self.problem(key, "missing section", cell)
            return {}
        if not isinstance(value, dict):
            self.problem(key, f"must be a table, got {type(value).__name__}", cell)
            return {}
        self.unknown(value, allowed, key, cell)
        return value

    def unknown(
        self, table: dict[str, Any], allowed: set[str], prefix: str, cell: str | None
    ) -> None:
        for k in sorted(set(table) - allowed):
            self.problem(
                f"{prefix}.{k}" if prefix else k,
                f"unknown key; allowed: {', '.join(sorted(allowed))}",
                cell,
            )

    def entries(
        self, docs: Any, key: str, allowed: set[str]
    ) -> Iterator[tuple[str, dict[str, Any]]]:
        """Each table of the array of tables ``[[key]]`` with its key (``key[i]``), checked for
        unknown keys; what is not an array or not a table is a problem, left out."""
        if not isinstance(docs, list):
            self.problem(key, f"must be an array of tables: [[{key}]]")
            return
        for i, doc in enumerate(docs):
            if not isinstance(doc, dict):
                self.problem(f"{key}[{i}]", "must be a table")
                continue
            self.unknown(doc, allowed, f"{key}[{i}]", None)
            yield f"{key}[{i}]", doc

    def get(
        self,
        table: dict[str, Any],
        key: str,
        kind: type | tuple[type, ...],
        prefix: str,
        default: Any = _MISSING,
        cell: str | None = None,
    ) -> Any:
        full = f"{prefix}.{key}" if prefix else key
        value = table.get(key, _MISSING)
        if value is _MISSING:
            if default is _MISSING:
                self.problem(full, "missing key", cell)
                return None
            return default
        kinds = kind if isinstance(kind, tuple) else (kind,)
        # TOML integers are fine where a float is wanted; booleans are not numbers here.
        if float in kinds and isinstance(value, int) and not isinstance(value, bool):
            value = float(value)
        if not isinstance(value, kinds) or (isinstance(value, bool) and bool not in kinds):
            names = " or ".join(k.__name__ for k in kinds)
            self.problem(full, f"must be {names}, got {type(value).__name__} {value!r}", cell)
            return None
        return value

    def number(
        self,
        table: dict[str, Any],
        key: str,
        prefix: str,
        default: Any = _MISSING,
        cell: str | None = None,
        low: float | None = None,
        high: float | None = None,
    ) -> float | None:
        value: float | None = self.get(table, key, float, prefix, default, cell)
        if value is None:
            return None
        full = f"{prefix}.{key}"
        if not math.isfinite(value):
            self.problem(full, f"must be finite, got {value}", cell)
            return None
        if low is not None and value <= low:
            self.problem(full, f"must be greater than {low:g}, got {value:g}", cell)
            return None
        if high is not None and value > high:
            self.problem(full, f"must be at most {high:g}, got {value:g}", cell)
            return None
        return value

    def axis(
        self,
        table: dict[str, Any],
        key: str,
        prefix: str,
        scale: float,
        cell: str | None,
        *,
        zero_ok: bool = False,
    ) -> tuple[float, ...] | None:
        full = f"{prefix}.{key}"
        values = table.get(key)
        if not isinstance(values, list) or not values:
            self.problem(full, "must be a non-empty list of numbers", cell)
            return None
        if not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in values):
            self.problem(full, f"must hold numbers only, got {values!r}", cell)
            return None
        # A zero-duration ramp is no input slew; a zero load (an open output) is a real point.
        least = "not negative" if zero_ok else "greater than 0"
        for i, v in enumerate(values):
            if not math.isfinite(v) or v < 0 or (v == 0 and not zero_ok):
                self.problem(full, f"entry {i} must be finite and {least}, got {v!r}", cell)
                return None
        for i in range(1, len(values)):
            if values[i] <= values[i - 1]:
                self.problem(
                    full,
                    f"must be strictly increasing: entry {i} ({values[i]!r}) "
                    f"follows {values[i - 1]!r}",
                    cell,
                )
                return None
        return tuple(float(v) * scale for v in values)


_LIBRARY_KEYS = {"name", "time_unit", "cap_unit"}
_PROCESS_KEYS = {"models", "vdd", "temperature", "options", "compat", "scale"}
_THRESHOLD_KEYS = set(Thresholds.__dataclass_fields__)
_GRID_KEYS = {"slew", "load", "related_load", "constraint_slew", "clock_slew", "pulse_slew"}
_SIM_KEYS = set(Simulation.__dataclass_fields__)
_FIDELITY_KEYS = set(Fidelity.__dataclass_fields__)
_ERROR_BAR_KEYS = set(ErrorBars.__dataclass_fields__)
_CELL_KEYS = {
    "name",
    "template",
    "netlist",
    "params",
    "inputs",
    "outputs",
    "power",
    "ground",
    "area",
    "grid",
    "flop",
    "other_output_axis",
    *BODY_KINDS,
}
_FLOP_KEYS = {"clock", "edge", "next_state", "clear", "preset", "state"}
_CORNER_KEYS = {"name", "section", "vdd", "temperature"}
_LIBERTY_KEYS = set(LibertyOptions.__dataclass_fields__)
_TOP_KEYS = {
    "library",
    "process",
    "thresholds",
    "grid",
    "cell",
    "simulation",
    "fidelity",
    "error_bars",
    "corner",
    "liberty",
    "input_shape",
    "mismatch",
}
_SHAPE_KEYS = {"kind", "driver", "driver_slew", "fanout_pin", "fanout", "load", "file"}
_MISMATCH_KEYS = {"method", "device", "wrapped", "linear_grid", "samples", "checks", "seed"}
_DEVICE_KEYS = {"model", "polarity", "vt_coefficient"}
_WRAPPED_KEYS = {"subckt", "model", "width", "length", "gate"}
_PIN = r"[A-Za-z_][A-Za-z0-9_]*"


def load(path: str | Path) -> LibraryConfig:
    """Read and validate a config file; raise one ConfigError that lists every problem."""
    path = Path(path).resolve()
    try:
        data = path.read_bytes()
        doc = tomllib.loads(data.decode("utf-8"))
    except FileNotFoundError as exc:
        raise ConfigError("config file not found", file=path) from exc
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"cannot read config: {exc}", file=path) from exc
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"not valid TOML: {exc}", file=path) from exc
    return replace(parse(doc, path), digest=hashlib.sha256(data).hexdigest())


def parse(doc: dict[str, Any], path: Path) -> LibraryConfig:
    """Validate a parsed TOML document; ``path`` locates messages and relative paths."""
    r = _Reader(path)
    r.unknown(doc, _TOP_KEYS, "", None)
    base = path.parent

    name, time_unit, cap_unit = _library(r, doc)
    tscale = time_scale(time_unit) if time_unit else 1.0
    cscale = cap_scale(cap_unit) if cap_unit else 1.0

    process = _process(r, r.section(doc, "process", _PROCESS_KEYS, required=True), base)
    thresholds = _thresholds(r, r.section(doc, "thresholds", _THRESHOLD_KEYS, required=False))
    grid = _library_grid(r, r.section(doc, "grid", _GRID_KEYS, required=True), tscale, cscale)
    simulation = _simulation(r, r.section(doc, "simulation", _SIM_KEYS, required=False), tscale)
    fidelity = _fidelity(r, r.section(doc, "fidelity", _FIDELITY_KEYS, required=False), tscale)
    error_bars = _error_bars(r, r.section(doc, "error_bars", _ERROR_BAR_KEYS, required=False))
    cells = _cells(r, doc, base, grid, tscale, cscale)
    corners = _corners(r, doc.get("corner", []), process)
    options = _liberty(r, r.section(doc, "liberty", _LIBERTY_KEYS, required=False), cscale)
    _check_other_load(r, options, cells, cap_unit)
    shape_doc = r.section(doc, "input_shape", _SHAPE_KEYS, required=False)
    shape = _input_shape(r, shape_doc, base, cells, tscale, cscale)
    mismatch = _mismatch(r, r.section(doc, "mismatch", _MISMATCH_KEYS, required=False))

    _raise_problems(r, path)
    if shape.kind == "file" and shape.file is not None:
        shape = _shape_file(shape, thresholds)
    # A name or unit that did not read is a problem, raised above.
    assert name is not None and time_unit is not None and cap_unit is not None
    return LibraryConfig(
        path=path,
        name=name,
        time_unit=time_unit,
        cap_unit=cap_unit,
        process=process,
        thresholds=thresholds,
        grid=grid,
        cells=tuple(cells),
        simulation=simulation,
        fidelity=fidelity,
        error_bars=error_bars,
        corners=corners,
        liberty=options,
        input_shape=shape,
        mismatch=mismatch,
    )


def _library(r: _Reader, doc: dict[str, Any]) -> tuple[str | None, str | None, str | None]:
    """The ``[library]`` section: the library's name, time unit and capacitance unit."""
    lib = r.section(doc, "library", _LIBRARY_KEYS, required=True)
    name = r.get(lib, "name", str, "library")
    if name is not None and not _is_identifier(name):
        r.problem("library.name", f"must be a name of letters, digits and _, got {name!r}")
    time_unit = _unit(r, lib, "time_unit", "ns", TIME_UNITS)
    cap_unit = _unit(r, lib, "cap_unit", "pf", CAP_UNITS)
    return name, time_unit, cap_unit


def _library_grid(r: _Reader, grid_doc: dict[str, Any], tscale: float, cscale: float) -> Grid:
    """The library's ``[grid]``: slew and load are required, the other axes optional."""
    slew = r.axis(grid_doc, "slew", "grid", tscale, None)
    load_ = r.axis(grid_doc, "load", "grid", cscale, None, zero_ok=True)
    related = (
        r.axis(grid_doc, "related_load", "grid", cscale, None, zero_ok=True)
        if "related_load" in grid_doc
        else ()
    )
    constraint, clock, pulse = (
        r.axis(grid_doc, key, "grid", tscale, None) if key in grid_doc else ()
        for key in ("constraint_slew", "clock_slew", "pulse_slew")
    )
    return Grid(slew or (), load_ or (), related or (), constraint or (), clock or (), pulse or ())


def _cells(
    r: _Reader, doc: dict[str, Any], base: Path, grid: Grid, tscale: float, cscale: float
) -> list[CellSpec]:
    """Every valid ``[[cell]]``, in the config's order; a name declared twice is a problem."""
    cells_doc = doc.get("cell", [])
    if not isinstance(cells_doc, list) or not cells_doc:
        r.problem("cell", "the config must declare at least one [[cell]]")
        cells_doc = []
    cells = []
    seen: set[str] = set()
    for i, cell_doc in enumerate(cells_doc):
        cell = _cell(r, cell_doc, i, base, grid, tscale, cscale)
        if cell is None:
            continue
        if cell.name in seen:
            r.problem(f"cell[{i}].name", "a cell of this name is declared twice", cell.name)
        seen.add(cell.name)
        cells.append(cell)
    return cells


def _raise_problems(r: _Reader, path: Path) -> None:
    """One problem keeps its own key and cell (and its one-line message); several are listed."""
    if len(r.problems) == 1:
        raise r.problems[0]
    if r.problems:
        raise ConfigProblemsError(r.problems, file=path)


def _unit(
    r: _Reader, lib: dict[str, Any], key: str, default: str, known: dict[str, float]
) -> str | None:
    """A library unit in any case (``fF``, ``nS``), kept in its lower-case spelling."""
    text = r.get(lib, key, str, "library", default)
    if text is None:
        return None
    unit = unit_name(text, known)
    if unit is None:
        r.problem(f"library.{key}", f"must be one of {', '.join(known)} (any case), got {text!r}")
    return unit


def _is_identifier(text: str) -> bool:
    return re.fullmatch(_PIN, text) is not None


def _process(r: _Reader, doc: dict[str, Any], base: Path) -> Process:
    models: list[ModelFile] = []
    entries = doc.get("models")
    if not isinstance(entries, list) or not entries:
        r.problem("process.models", "must be a non-empty list of files or {file, section} tables")
        entries = []
    for i, entry in enumerate(entries):
        key = f"process.models[{i}]"
        if isinstance(entry, str):
            file, section = entry, None
        elif isinstance(entry, dict):
            r.unknown(entry, {"file", "section"}, key, None)
            file = r.get(entry, "file", str, key)
            section = r.get(entry, "section", str, key, None)
            if file is None:
                continue
        else:
            r.problem(key, f"must be a file name or a {{file, section}} table, got {entry!r}")
            continue
        model_path = (base / file).resolve()
        if not model_path.is_file():
            r.problem(key, f"model file not found: {model_path}")
            continue
        models.append(ModelFile(model_path, section))
    vdd = r.number(doc, "vdd", "process", low=0.0)
    temperature = r.number(doc, "temperature", "process", 25.0, low=-273.15)
    options_doc = r.get(doc, "options", dict, "process", {})
    options = []
    for k, v in sorted((options_doc or {}).items()):
        if isinstance(v, bool) or not isinstance(v, (int, float, str)):
            r.problem(f"process.options.{k}", f"must be a number or a string, got {v!r}")
            continue
        options.append((k, str(v)))
    compat = r.get(doc, "compat", str, "process", None)
    scale = r.number(doc, "scale", "process", None, low=0.0)
    return Process(tuple(models), vdd or 0.0, temperature or 0.0, tuple(options), compat, scale)


def _corners(r: _Reader, docs: Any, process: Process) -> tuple[Corner, ...]:
    corners: list[Corner] = []
    seen: set[str] = set()
    for key, doc in r.entries(docs, "corner", _CORNER_KEYS):
        name = r.get(doc, "name", str, key)
        if name is not None and not _is_identifier(name):
            r.problem(f"{key}.name", f"must be a name of letters, digits and _, got {name!r}")
            continue
        if name in seen:
            r.problem(f"{key}.name", f"a corner named {name!r} is declared twice")
            continue
        seen.add(name)
        section = r.get(doc, "section", str, key, None)
        if section is not None and not any(m.section for m in process.models):
            r.problem(f"{key}.section", "no model file is read by section ({file, section})")
        vdd = r.number(doc, "vdd", key, process.vdd, low=0.0)
        temperature = r.number(doc, "temperature", key, process.temperature, low=-273.15)
        if name is not None and vdd is not None and temperature is not None:
            corners.append(Corner(name, section, vdd, temperature))
    return tuple(corners)


def _thresholds(r: _Reader, doc: dict[str, Any]) -> Thresholds:
    values: dict[str, float] = {}
    defaults = Thresholds()
    for key in Thresholds.__dataclass_fields__:
        default: float = getattr(defaults, key)
        if key == "slew_derate":
            v = r.number(doc, key, "thresholds", default, low=0.0, high=1.0)
            values[key] = default if v is None else v
        else:
            v = r.number(doc, key, "thresholds", default * 100, low=0.0, high=100.0)
            values[key] = default if v is None else v / 100.0
    t = Thresholds(**values)
    for edge in ("rise", "fall"):
        lo, hi = t.slew_band(edge)
        if lo >= hi:
            r.problem(
                f"thresholds.slew_lower_{edge}",
                f"must be below slew_upper_{edge} ({lo * 100:g} % >= {hi * 100:g} %)",
            )
    return t


def _simulation(r: _Reader, doc: dict[str, Any], tscale: float) -> Simulation:
    d = Simulation()
    backend = r.get(doc, "backend", str, "simulation", d.backend)
    if backend not in ("shared", "subprocess"):
        r.problem("simulation.backend", f"must be 'shared' or 'subprocess', got {backend!r}")
        backend = d.backend
    timeout = r.number(doc, "timeout", "simulation", d.timeout, low=0.0)
    window = r.number(doc, "window", "simulation", None, low=0.0)
    samples = r.get(doc, "samples_per_edge", int, "simulation", d.samples_per_edge)
    if samples is not None and samples < 4:
        r.problem("simulation.samples_per_edge", f"must be at least 4, got {samples}")
        samples = None
    settle = r.number(doc, "settle", "simulation", d.settle, low=0.0, high=0.5)
    pushout = r.number(doc, "pushout", "simulation", d.pushout, low=0.0, high=1.0)
    tol = r.number(doc, "bisect_tolerance", "simulation", None, low=0.0)
    return Simulation(
        backend=backend,
        timeout=timeout or d.timeout,
        window=None if window is None else window * tscale,
        samples_per_edge=samples or d.samples_per_edge,
        settle=settle or d.settle,
        pushout=pushout or d.pushout,
        bisect_tolerance=d.bisect_tolerance if tol is None else tol * tscale,
    )


def _fidelity(r: _Reader, doc: dict[str, Any], tscale: float) -> Fidelity:
    d = Fidelity()
    count = r.get(doc, "random_points", int, "fidelity", d.random_points)
    if count is not None and count < 0:
        r.problem("fidelity.random_points", f"must not be negative, got {count}")
        count = None
    seed = r.get(doc, "seed", int, "fidelity", d.seed)
    if seed is not None and seed < 0:
        r.problem("fidelity.seed", f"must not be negative, got {seed}")
        seed = None
    floor = r.number(doc, "rel_floor", "fidelity", None, low=0.0)
    return Fidelity(
        random_points=d.random_points if count is None else count,
        seed=d.seed if seed is None else seed,
        rel_floor=d.rel_floor if floor is None else floor * tscale,
    )


def _error_bars(r: _Reader, doc: dict[str, Any]) -> ErrorBars:
    d = ErrorBars()
    points = r.get(doc, "points", str, "error_bars", d.points)
    if points is not None and points not in ERROR_BAR_POINTS:
        choices = " or ".join(repr(p) for p in ERROR_BAR_POINTS)
        r.problem("error_bars.points", f"must be {choices}, got {points!r}")
        points = None
    # In percent of the value, as the thresholds are.
    warn = r.number(doc, "warn_above", "error_bars", None, low=0.0, high=100.0)
    return ErrorBars(
        points=points or d.points,
        warn_above=d.warn_above if warn is None else warn / 100.0,
    )


def _liberty(r: _Reader, doc: dict[str, Any], cscale: float) -> LibertyOptions:
    d = LibertyOptions()
    rule = r.get(doc, "other_load", (str, float), "liberty", d.other_load)
    if isinstance(rule, float):
        if math.isfinite(rule) and rule >= 0:
            rule *= cscale
        else:
            r.problem("liberty.other_load", f"must be a finite load, not negative, got {rule!r}")
            rule = None
    elif rule is not None and rule not in OTHER_LOAD_RULES:
        r.problem(
            "liberty.other_load",
            f"must be {' or '.join(map(repr, OTHER_LOAD_RULES))} or a load in cap_unit, "
            f"got {rule!r}",
        )
        rule = None
    factors = {
        key: r.number(doc, key, "liberty", getattr(d, key), low=0.0)
        for key in ("load_limit_factor", "slew_limit_factor")
    }
    pin_cap = r.get(doc, "pin_capacitance", str, "liberty", d.pin_capacitance)
    if pin_cap is not None and pin_cap not in PIN_CAPACITANCE_RULES:
        r.problem(
            "liberty.pin_capacitance",
            f"must be {' or '.join(map(repr, PIN_CAPACITANCE_RULES))}, got {pin_cap!r}",
        )
        pin_cap = None
    return LibertyOptions(
        other_load=d.other_load if rule is None else rule,
        load_limit_factor=factors["load_limit_factor"] or d.load_limit_factor,
        slew_limit_factor=factors["slew_limit_factor"] or d.slew_limit_factor,
        pin_capacitance=pin_cap or d.pin_capacitance,
    )


def _mismatch(r: _Reader, doc: dict[str, Any]) -> Mismatch:
    d = Mismatch()
    method = r.get(doc, "method", str, "mismatch", d.method)
    if method is not None and method not in SPREAD_METHODS:
        r.problem("mismatch.method", f"must be one of {', '.join(SPREAD_METHODS)}, got {method!r}")
    grid = r.get(doc, "linear_grid", str, "mismatch", d.linear_grid)
    if grid is not None and grid not in LINEAR_GRIDS:
        r.problem("mismatch.linear_grid", f"must be one of {', '.join(LINEAR_GRIDS)}, got {grid!r}")
    counts = {}
    for key, least in (("samples", 2), ("checks", 0), ("seed", 0)):
        value = r.get(doc, key, int, "mismatch", getattr(d, key))
        if value is not None and value < least:
            r.problem(f"mismatch.{key}", f"must be at least {least}, got {value}")
            value = None
        counts[key] = getattr(d, key) if value is None else value
    devices = _mismatch_devices(r, doc.get("device", []))
    wrapped = _wrapped_devices(r, doc.get("wrapped", []), devices)
    if method not in (None, "off") and not devices:
        r.problem(
            "mismatch.device",
            f"method {method!r} needs at least one [[mismatch.device]] with a model's "
            "vt_coefficient (mV·µm)",
        )
    return Mismatch(method or d.method, devices, wrapped, grid or d.linear_grid, **counts)


def _mismatch_devices(r: _Reader, docs: Any) -> tuple[DeviceMismatch, ...]:
    out: list[DeviceMismatch] = []
    for key, doc in r.entries(docs, "mismatch.device", _DEVICE_KEYS):
        model = r.get(doc, "model", str, key)
        polarity = r.get(doc, "polarity", str, key)
        if polarity is not None and polarity not in ("n", "p"):
            r.problem(f"{key}.polarity", f'must be "n" or "p", got {polarity!r}')
            polarity = None
        # mV·µm in the config: 1e-3 V × 1e-6 m.
        coefficient = r.number(doc, "vt_coefficient", key, low=0.0)
        if model is not None and any(d.model.lower() == model.lower() for d in out):
            r.problem(f"{key}.model", f"model {model!r} is given twice")
        elif model is not None and polarity is not None and coefficient is not None:
            out.append(DeviceMismatch(model, polarity, coefficient * 1e-9))
    return tuple(out)


def _wrapped_devices(
    r: _Reader, docs: Any, devices: tuple[DeviceMismatch, ...]
) -> tuple[WrappedDevice, ...]:
    out: list[WrappedDevice] = []
    models = {d.model.lower() for d in devices}
    for key, doc in r.entries(docs, "mismatch.wrapped", _WRAPPED_KEYS):
        subckt = r.get(doc, "subckt", str, key)
        model = r.get(doc, "model", str, key)
        width = r.get(doc, "width", str, key, "w")
        length = r.get(doc, "length", str, key, "l")
        gate = r.get(doc, "gate", int, key, 2)
        if gate is not None and gate < 1:
            r.problem(f"{key}.gate", f"must be a node position from 1, got {gate}")
            gate = None
        if model is not None and model.lower() not in models:
            r.problem(f"{key}.model", f"no [[mismatch.device]] has model {model!r}")
            model = None
        if None not in (subckt, model, width, length, gate):
            out.append(WrappedDevice(subckt, model, width, length, gate))
    return tuple(out)


def _check_other_load(
    r: _Reader, options: LibertyOptions, cells: list[CellSpec], cap_unit: str | None
) -> None:
    """A given other-output load must lie within every two-output cell's related_load: the
    default file's tables are read there, never extrapolated."""
    load = options.other_load
    if isinstance(load, str) or cap_unit is None:
        return
    unit = cap_scale(cap_unit)
    for cell in (c for c in cells if c.other_output_axis and c.grid.related_load):
        low, high = cell.grid.related_load[0], cell.grid.related_load[-1]
        if not low <= load <= high:
            r.problem(
                "liberty.other_load",
                f"{load / unit:g} {cap_unit} is outside the cell's related_load "
                f"[{low / unit:g}, {high / unit:g}] {cap_unit}: give a load within it, "
                f"or {' or '.join(map(repr, OTHER_LOAD_RULES))}",
                cell.name,
            )


def _cell(
    r: _Reader, doc: Any, i: int, base: Path, grid: Grid, tscale: float, cscale: float
) -> CellSpec | None:
    key = f"cell[{i}]"
    if not isinstance(doc, dict):
        r.problem(key, "must be a table")
        return None
    name = r.get(doc, "name", str, key)
    if name is None:
        return None
    r.unknown(doc, _CELL_KEYS, key, name)
    template, netlist, source = _cell_source(r, doc, key, name, base)
    params = r.get(doc, "params", dict, key, {}, name) or {}
    inputs = _cell_inputs(r, doc, key, name)
    flop = _flop(r, doc, key, name, inputs)
    known = set(inputs) | (set(flop.state) if flop else set())
    outputs_doc, outputs = _cell_outputs(r, doc, key, name, inputs, known)
    power = r.get(doc, "power", str, key, "VDD", name)
    ground = r.get(doc, "ground", str, key, "VSS", name)
    taken = {*inputs, *outputs_doc, power or "VDD", ground or "VSS"}
    body = _body(r, doc, key, name, taken)
    area = r.number(doc, "area", key, 0.0, name)
    cell_grid = _cell_grid(r, doc, key, name, grid, tscale, cscale)
    axis3 = r.get(doc, "other_output_axis", bool, key, len(outputs) == 2, name)
    _check_other_output_axis(r, key, name, axis3, len(outputs), cell_grid.related_load)
    return CellSpec(
        name=name,
        inputs=tuple(inputs),
        outputs=tuple(outputs),
        grid=cell_grid,
        template=source if template is not None else None,
        netlist=source if netlist is not None else None,
        params=tuple(sorted(params.items())),
        power=power or "VDD",
        ground=ground or "VSS",
        area=area or 0.0,
        flop=flop,
        other_output_axis=bool(axis3) and len(outputs) == 2,
        body=body,
    )


def _cell_source(
    r: _Reader, doc: dict[str, Any], key: str, name: str, base: Path
) -> tuple[str | None, str | None, Path | None]:
    """The cell's ``template`` and ``netlist`` as given, and the one file they name
    (None when neither or both are given, or the given one is empty)."""
    template = r.get(doc, "template", str, key, None, name)
    netlist = r.get(doc, "netlist", str, key, None, name)
    source: Path | None = None
    if (template is None) == (netlist is None):
        r.problem(key, "give exactly one of 'template' (Jinja2) or 'netlist' (plain SPICE)", name)
    else:
        which, given = ("template", template) if template is not None else ("netlist", netlist)
        if not given.strip():
            r.problem(f"{key}.{which}", "must be a file path, got an empty string", name)
        elif not (source := (base / given).resolve()).is_file():
            r.problem(f"{key}.{which}", f"file not found: {source}", name)
    return template, netlist, source


def _cell_inputs(r: _Reader, doc: dict[str, Any], key: str, name: str) -> list[str]:
    """The cell's input pin names; entries that are not strings are reported and dropped."""
    inputs = r.get(doc, "inputs", list, key, None, name) or []
    for j, pin in enumerate(inputs):
        if not isinstance(pin, str) or not _is_identifier(pin):
            r.problem(f"{key}.inputs[{j}]", f"must be a pin name, got {pin!r}", name)
    inputs = [p for p in inputs if isinstance(p, str)]
    if len(set(inputs)) != len(inputs):
        r.problem(f"{key}.inputs", f"names a pin twice: {inputs}", name)
    return inputs


def _cell_outputs(
    r: _Reader, doc: dict[str, Any], key: str, name: str, inputs: list[str], known: set[str]
) -> tuple[dict[str, Any], list[OutputSpec]]:
    """The ``outputs`` table as given (its pins count as taken names even when their
    function is bad) and the outputs whose function parses over the ``known`` pins."""
    outputs_doc = r.get(doc, "outputs", dict, key, None, name) or {}
    if not outputs_doc:
        r.problem(f"{key}.outputs", "must map at least one output pin to its function", name)
    outputs = []
    for pin, text in outputs_doc.items():
        okey = f"{key}.outputs.{pin}"
        if not isinstance(text, str):
            r.problem(okey, f"must be a Boolean function in Liberty syntax, got {text!r}", name)
            continue
        if pin in inputs:
            r.problem(okey, "an output cannot also be an input", name)
        try:
            expr = logic.parse(text, cell=name, pin=pin)
        except FunctionSyntaxError as exc:
            r.problem(okey, exc.reason, name)
            continue
        extra = sorted(expr.variables() - known)
        if extra:
            r.problem(
                okey, f"function uses {', '.join(extra)}, not among the inputs {inputs}", name
            )
            continue
        outputs.append(OutputSpec(pin, expr))
    return outputs_doc, outputs


def _cell_grid(
    r: _Reader, doc: dict[str, Any], key: str, name: str, grid: Grid, tscale: float, cscale: float
) -> Grid:
    """The cell's own ``grid`` table; each axis it leaves out is the library's."""
    grid_doc = r.get(doc, "grid", dict, key, {}, name) or {}
    r.unknown(grid_doc, _GRID_KEYS, f"{key}.grid", name)
    slew = (
        r.axis(grid_doc, "slew", f"{key}.grid", tscale, name) if "slew" in grid_doc else grid.slew
    )
    load_ = (
        r.axis(grid_doc, "load", f"{key}.grid", cscale, name, zero_ok=True)
        if "load" in grid_doc
        else grid.load
    )
    related = (
        r.axis(grid_doc, "related_load", f"{key}.grid", cscale, name, zero_ok=True)
        if "related_load" in grid_doc
        else grid.related_load
    )
    constraint = (
        r.axis(grid_doc, "constraint_slew", f"{key}.grid", tscale, name)
        if "constraint_slew" in grid_doc
        else grid.constraint_slew
    )
    clock, pulse = (
        r.axis(grid_doc, axis, f"{key}.grid", tscale, name) if axis in grid_doc else default
        for axis, default in (("clock_slew", grid.clock_slew), ("pulse_slew", grid.pulse_slew))
    )
    return Grid(slew or (), load_ or (), related or (), constraint or (), clock or (), pulse or ())


def _check_other_output_axis(
    r: _Reader, key: str, name: str, axis3: bool | None, n_outputs: int, related: tuple[float, ...]
) -> None:
    """``other_output_axis`` asks for a two-output cell with a related_load axis."""
    if axis3 and n_outputs != 2:
        r.problem(f"{key}.other_output_axis", "needs a cell with exactly two outputs", name)
    if axis3 and n_outputs == 2 and not related:
        r.problem(
            f"{key}.grid.related_load",
            "a two-output cell with other_output_axis needs [grid] related_load "
            "(or set other_output_axis = false)",
            name,
        )


def _body(
    r: _Reader, doc: dict[str, Any], key: str, name: str, taken: set[str]
) -> tuple[BodyPin, ...]:
    """The cell's body pins: ``nwell``/``pwell`` = "PIN" (tied to the cell's power / ground)
    or { pin = "PIN", voltage = V } (its own voltage, for body bias)."""
    found = []
    for kind in BODY_KINDS:
        bkey = f"{key}.{kind}"
        entry = doc.get(kind)
        if entry is None:
            continue
        if isinstance(entry, dict):
            r.unknown(entry, {"pin", "voltage"}, bkey, name)
            pin = r.get(entry, "pin", str, bkey, None, name)
            voltage = r.number(entry, "voltage", bkey, None, name)
        else:
            pin, voltage = entry, None
        if not isinstance(pin, str) or not _is_identifier(pin):
            r.problem(
                bkey, f'must be a pin name or {{ pin = "...", voltage = V }}, got {entry!r}', name
            )
            continue
        if pin.upper() in {t.upper() for t in taken}:
            r.problem(bkey, f"pin {pin} is already an input, output or supply pin", name)
            continue
        taken.add(pin)
        found.append(BodyPin(pin, kind, voltage))
    return tuple(found)


def _flop(
    r: _Reader, doc: dict[str, Any], key: str, name: str, inputs: list[str]
) -> FlopSpec | None:
    fdoc = r.get(doc, "flop", dict, key, None, name)
    if fdoc is None:
        return None
    fkey = f"{key}.flop"
    r.unknown(fdoc, _FLOP_KEYS, fkey, name)
    clock = r.get(fdoc, "clock", str, fkey, None, name)
    if clock is not None and clock not in inputs:
        r.problem(f"{fkey}.clock", f"clock {clock} is not among the inputs {inputs}", name)
    edge = r.get(fdoc, "edge", str, fkey, "rise", name)
    if edge not in ("rise", "fall"):
        r.problem(f"{fkey}.edge", f"must be 'rise' or 'fall', got {edge!r}", name)
    state = r.get(fdoc, "state", list, fkey, ["IQ", "IQN"], name) or ["IQ", "IQN"]
    if len(state) != 2 or not all(isinstance(s, str) and _is_identifier(s) for s in state):
        r.problem(f"{fkey}.state", f"must name two state variables, got {state!r}", name)
        state = ["IQ", "IQN"]
    exprs = {}
    for attr in ("next_state", "clear", "preset"):
        text = r.get(fdoc, attr, str, fkey, None if attr == "next_state" else "", name)
        if not text:
            continue
        try:
            expr = logic.parse(text, cell=name, pin=attr)
        except FunctionSyntaxError as exc:
            r.problem(f"{fkey}.{attr}", exc.reason, name)
            continue
        bad = sorted(expr.variables() - set(inputs))
        if bad or (clock in expr.variables()):
            r.problem(
                f"{fkey}.{attr}",
                f"may use only non-clock inputs, uses {', '.join(bad or [clock])}",
                name,
            )
            continue
        exprs[attr] = expr
    if clock is None or "next_state" not in exprs:
        return None
    return FlopSpec(
        clock=clock,
        edge=edge if edge in ("rise", "fall") else "rise",
        next_state=exprs["next_state"],
        clear=exprs.get("clear"),
        preset=exprs.get("preset"),
        state=(state[0], state[1]),
    )


def _input_shape(
    r: _Reader,
    doc: dict[str, Any],
    base: Path,
    cells: list[CellSpec],
    tscale: float,
    cscale: float,
) -> InputShape:
    """The ``[input_shape]`` section: which waveform every input gets (``config.shapes``)."""
    d = InputShape()
    kind = r.get(doc, "kind", str, "input_shape", d.kind)
    if kind not in KINDS:
        r.problem("input_shape.kind", f"must be one of {', '.join(KINDS)}, got {kind!r}")
        return d
    by_name = {c.name: c for c in cells}
    driver = tuple(r.get(doc, "driver", list, "input_shape", []) or [])
    for name in driver:
        cell = by_name.get(name) if isinstance(name, str) else None
        if cell is None or cell.flop is not None or not cell.inputs:
            r.problem(
                "input_shape.driver",
                f"{name!r} is not a combinational cell of this config; the driver is a list "
                "of the config's cells, each driving the next through its first input",
            )
    if kind == "driver" and not driver:
        r.problem("input_shape.driver", "kind 'driver' needs a driver: a list of cell names")
    pin = r.get(doc, "fanout_pin", str, "input_shape", None)
    if pin is not None:
        name, _, port = pin.partition(".")
        if name not in by_name or port not in by_name[name].inputs:
            r.problem(
                "input_shape.fanout_pin", f"must be 'CELL.PIN', an input of a cell; got {pin!r}"
            )
    fanout = r.get(doc, "fanout", int, "input_shape", d.fanout)
    if fanout is not None and fanout < 1:
        r.problem("input_shape.fanout", f"must be at least 1, got {fanout}")
    slew = r.number(doc, "driver_slew", "input_shape", None, low=0.0)
    load = r.get(doc, "load", float, "input_shape", 0.0)
    if load is not None and (not math.isfinite(load) or load < 0):
        r.problem("input_shape.load", f"must be a load in cap_unit, not negative; got {load!r}")
        load = 0.0
    file = r.get(doc, "file", str, "input_shape", None)
    path = None if file is None else (base / file).resolve()
    if kind == "file" and path is None:
        r.problem("input_shape.file", "kind 'file' needs a file of normalised corners")
    return InputShape(
        kind=kind,
        driver=tuple(n for n in driver if isinstance(n, str)),
        driver_slew=None if slew is None else slew * tscale,
        fanout_pin=pin,
        fanout=fanout or d.fanout,
        load=(load or 0.0) * cscale,
        file=path,
    )


def _shape_file(shape: InputShape, thr: Thresholds) -> InputShape:
    """The shape with its file's normalised edges (errors name the file and line)."""
    assert shape.file is not None  # kind "file" requires it (``_input_shape``)
    band = {e: thr.slew_band(e) for e in ("rise", "fall")}
    delay = {e: thr.delay_input(e) for e in ("rise", "fall")}
    rise, fall = read_file(shape.file, band, delay)
    return replace(shape, rise=rise, fall=fall)
