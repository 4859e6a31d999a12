"""Path correlation: short paths of a library's own cells simulated whole at transistor level,
against the same paths timed from the library's tables the way a timing tool times them.

A timing tool computes a path stage by stage (common practice; e.g. Bhasker & Chadha, *Static
Timing Analysis for Nanometer Designs*, Springer, 2009, ch. 5): each stage's delay and output
slew are interpolated in its arc's tables at the input slew the previous stage gave and at the
stage's load, the sum of the capacitances of the pins on its output net (of the edge that
arrives there: ``rise_capacitance`` or ``fall_capacitance``) and of the wire. The simulation
runs the whole circuit in ngspice, each stage driven by the real previous gate and loaded by
the real next gates, in workers like any sweep point (``measurement.paths``).

To say where a difference comes from, every stage is also simulated twice more: its replica
(``simulation.pathdeck.Replica``: the real input waveform, a lumped load of the pins'
capacitance) and a table point (the library's input edge at the stage's simulated input
slew, the same lumped load). Real against replica is the load a real gate presents beyond its
pin capacitance; replica against ramp is the input's shape (the tables' edge, linear or a
driver's, against the real previous gate's); the tables against the ramp point is
interpolation.

The circuit's input port is driven by the library's input shape (``config.input_shape``, a
driver's edges measured: ``flow.characterize.with_shape``), as a table point's input is, so the
first stage sees the edge its tables were measured with.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np

from charflow.analysis.opensta import StaStage
from charflow.config.library import LibraryConfig
from charflow.execution import sweep
from charflow.records.errors import ConfigError, NetlistError, TableError
from charflow.records.outcomes import Failure, Measurement, Outcome, PathMeasurement
from charflow.records.paths import CONSTANTS, Circuit, Path, Stage
from charflow.records.points import PathPoint, State, TimingPoint, Work
from charflow.simulation.netlist import Deck
from charflow.simulation.pathdeck import (
    Replica,
    build_path_deck,
    node,
    pin_probe,
    replica_node,
)
from charflow.tables.table import Table, interpolate
from charflow.tables.tabulate import ArcTables, CellTables, PinCap

# The transient's cap, in multiples of the tables' prediction of the latest arrival (plus the
# input ramp): a path the tables get wrong by this much is worth an error, not a number.
STOP_MARGIN = 4.0
SAMPLES_PER_EDGE = 40  # the maximum step: the sharpest predicted edge over this
SINGLE, PER_EDGE = "one number", "per edge"  # how a pin's capacitance is taken
# Which charge a pin's capacitance is taken from (``Setup.pin_load``): the whole input edge's
# (the Liberty file's); the charge up to the input's delay threshold, what a driver has
# delivered when its delay is measured (``PinCap.rise_to_threshold``); the charge between the
# input's slew thresholds, what it delivers while its output slew is measured
# (``PinCap.rise_slew_window``); or ``split``: a stage's delay looked up at the first, its
# output slew at the second (a receiver's capacitance before and after the delay threshold).
WHOLE_EDGE, TO_THRESHOLD, SLEW_WINDOW, SPLIT = "whole-edge", "threshold", "slew-window", "split"
DELAY, SLEW = 0, 1  # which lookup a capacitance serves
# pin load -> the PinCap fields' suffix (of ``rise``/``fall``) for the delay and for the slew
PIN_LOADS = {
    WHOLE_EDGE: ("", ""),
    TO_THRESHOLD: ("_to_threshold", "_to_threshold"),
    SLEW_WINDOW: ("_slew_window", "_slew_window"),
    SPLIT: ("_to_threshold", "_slew_window"),
}
_WINDOW_NAMES = {
    "": "over the whole edge",
    "_to_threshold": "up to its delay threshold",
    "_slew_window": "between its slew thresholds",
}
_Cells = Mapping[str, CellTables]


# --- the circuit: its paths and its loads -----------------------------------------------


def _state(
    cell: CellTables, pin: str, output: str, side: dict[str, bool]
) -> tuple[ArcTables, State]:
    arc = next((a for a in cell.arcs if (a.arc.related, a.arc.output) == (pin, output)), None)
    if arc is None or arc.arc.kind != "combinational" or arc.arc.other is not None:
        raise NetlistError(
            f"cell {cell.cell.name} has no two-axis combinational arc {pin}->{output}",
            cell=cell.cell.name,
        )
    for st in arc.arc.states:
        if all(side.get(p) == v for p, v in st.side):
            return arc, st
    held = " ".join(f"{p}={int(v)}" for p, v in sorted(side.items()))
    raise NetlistError(
        f"side inputs {held or '(none)'} do not let {pin} switch {output}: tie them to "
        f"values of one of its states ({', '.join(s.when or '-' for s in arc.arc.states)})",
        cell=cell.cell.name,
    )


def routes(circuit: Circuit, cells: Mapping[str, CellTables]) -> tuple[Path, ...]:
    """One path per output port, from the input port through one input of each gate; raise
    where a gate has two inputs in the input port's cone or a port is not reached."""
    driver = {}
    for g in circuit.gates:
        outs = {o.pin for o in cells[g.cell].cell.outputs}
        driver.update({net: (g, pin) for pin, net in g.pins if pin in outs})
    paths = []
    for end in circuit.outputs:
        stages: list[Stage] = []
        net = end
        while net != circuit.start:
            if net not in driver or len(stages) > len(circuit.gates):
                raise NetlistError(
                    f"output port {end} is not reached from input port {circuit.start} "
                    "through the gates (or the gates make a loop)",
                    file=circuit.origin,
                )
            gate, out = driver[net]
            cell = cells[gate.cell].cell
            moving = [(p, n) for p, n in gate.pins if p in cell.inputs and n not in CONSTANTS]
            if len(moving) != 1:
                raise NetlistError(
                    f"instance {gate.name}: {len(moving)} inputs are not constants; a path "
                    "circuit's gates have one input on the path and the others tied",
                    file=circuit.origin,
                )
            pin, net_in = moving[0]
            side = {p: CONSTANTS[n] for p, n in gate.pins if n in CONSTANTS and p in cell.inputs}
            _, st = _state(cells[gate.cell], pin, out, side)
            stages.append(Stage(gate.name, gate.cell, pin, out, net_in, net, st.side))
            net = net_in
        paths.append(Path(circuit.name, end, tuple(reversed(stages))))
    return tuple(paths)


@dataclass(frozen=True, slots=True)
class Loads:
    """What each net of a circuit drives: gate pins (gate, cell, pin), wire and port load."""

    pins: dict[str, tuple[tuple[str, str, str], ...]]
    wire: dict[str, float]  # F
    port: dict[str, float]  # F

    def total(self, net: str, edge: str, cells: Mapping[str, CellTables], mode: str) -> float:
        """The capacitance on ``net`` when ``edge`` arrives there (F)."""
        c = self.wire.get(net, 0.0) + self.port.get(net, 0.0)
        for _, cell, pin in self.pins.get(net, ()):
            c += pin_cap(cells[cell], pin, edge, mode)
        return c


def loads(circuit: Circuit, cells: Mapping[str, CellTables], wire: float, port: float) -> Loads:
    """Every gate input on each net; ``wire`` (F) on every net a gate drives, ``port`` (F) on
    every output port."""
    pins: dict[str, list[tuple[str, str, str]]] = {}
    driven = []
    for g in circuit.gates:
        inputs = cells[g.cell].cell.inputs
        for pin, net in g.pins:
            if pin in inputs:
                pins.setdefault(net, []).append((g.name, g.cell, pin))
            else:
                driven.append(net)
    return Loads(
        {n: tuple(p) for n, p in pins.items()},
        {n: wire for n in driven} if wire else {},
        {o: port for o in circuit.outputs},
    )


def with_pin_load(
    cells: Mapping[str, CellTables], which: str, use: int = DELAY
) -> Mapping[str, CellTables]:
    """``cells`` with each pin's capacitance the one ``which`` names (``PIN_LOADS``) for the
    lookup ``use`` (``DELAY``: the tables' delay and the replicas' lumped loads; ``SLEW``: the
    output slew handed to the next stage)."""
    if which not in PIN_LOADS:
        raise ConfigError(f"unknown pin load {which!r}; choose one of {', '.join(PIN_LOADS)}")
    suffix = PIN_LOADS[which][use]
    if not suffix:
        return cells
    return {
        name: replace(c, pins=tuple(_windowed(c, p, suffix) for p in c.pins))
        for name, c in cells.items()
    }


def _windowed(cell: CellTables, p: PinCap, suffix: str) -> PinCap:
    for edge in ("rise", "fall"):
        if getattr(p, edge) is not None and getattr(p, f"{edge}{suffix}") is None:
            raise TableError(
                f"pin {p.pin} has no {edge} capacitance {_WINDOW_NAMES[suffix]} (a "
                f"flip-flop's pins are not measured that way); time the paths with "
                f"--pin-load {WHOLE_EDGE}",
                cell=cell.cell.name,
                pin=p.pin,
            )
    return replace(p, rise=getattr(p, f"rise{suffix}"), fall=getattr(p, f"fall{suffix}"))


def pin_cap(cell: CellTables, pin: str, edge: str, mode: str) -> float:
    cap = next(p for p in cell.pins if p.pin == pin)
    value = cap.capacitance if mode == SINGLE else getattr(cap, edge)
    if value is None:
        raise TableError(f"pin {pin} has no {edge} capacitance", cell=cell.cell.name, pin=pin)
    return float(value)


# --- the tables' prediction ---------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class StageTiming:
    """One stage timed: its edges, load, input and output slew, delay, arrival (SI)."""

    input_edge: str
    output_edge: str
    load: float  # the delay's
    slew_in: float
    delay: float
    slew_out: float
    arrival: float
    inside: bool  # slew and load within the table's grid (no extrapolation)
    slew_load: float  # the output slew's (``load`` but with ``--pin-load split``)


def stage_tables(cell: CellTables, stage: Stage, output_edge: str) -> tuple[Table, Table]:
    """The delay and transition tables of the stage's state (a timing tool reading the ``when``
    of the side inputs' values would pick these)."""
    arc, st = _state(cell, stage.pin, stage.output, dict(stage.side))
    tables = next(s.tables for s in arc.states if s.state == st)
    by = {t.quantity: t for t in tables}
    try:
        return by[f"cell_{output_edge}"], by[f"{output_edge}_transition"]
    except KeyError as exc:
        raise TableError(
            f"arc {stage.pin}->{stage.output} has no {output_edge} tables", cell=cell.cell.name
        ) from exc


def walk(path: Path, cells: Mapping[str, CellTables], edge: str) -> list[tuple[str, str]]:
    """Each stage's input and output edge when ``edge`` enters the path."""
    out = []
    for stage in path.stages:
        _, st = _state(cells[stage.cell], stage.pin, stage.output, dict(stage.side))
        out.append((edge, st.output_edge(edge)))
        edge = out[-1][1]
    return out


def predict(
    path: Path,
    cells: Mapping[str, CellTables],
    net_loads: Loads,
    slew: float,
    edge: str,
    mode: str = PER_EDGE,
    slew_cells: Mapping[str, CellTables] | None = None,
) -> tuple[StageTiming, ...]:
    """The path timed from the tables, slew propagated stage by stage; each output slew
    looked up at the load of ``slew_cells``' pin capacitances (default ``cells``')."""
    out, arrival = [], 0.0
    for stage, (edge_in, edge_out) in zip(path.stages, walk(path, cells, edge), strict=True):
        cell = cells[stage.cell]
        delay_t, slew_t = stage_tables(cell, stage, edge_out)
        load = net_loads.total(stage.net_out, edge_out, cells, mode)
        slew_load = net_loads.total(stage.net_out, edge_out, slew_cells or cells, mode)
        at = [(slew, load)]
        d = float(interpolate(delay_t, at)[0])
        s = float(interpolate(slew_t, [(slew, slew_load)])[0])
        inside = all(
            a.values[0] <= x <= a.values[-1]
            for at_load in (load, slew_load)
            for a, x in zip(delay_t.axes, (slew, at_load), strict=True)
        )
        arrival += d
        out.append(StageTiming(edge_in, edge_out, load, slew, d, s, arrival, inside, slew_load))
        slew = s
    return tuple(out)


# --- the simulations ------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Setup:
    slews: tuple[float, ...]  # s, the input port's
    edges: tuple[str, ...]  # the input port's edges
    wire: float  # F on every net a gate drives
    port: float  # F on every output port
    pin_load: str = WHOLE_EDGE  # which pin capacitance the loads sum (``PIN_LOADS``)


@dataclass(frozen=True, slots=True)
class _Circuit:
    """A circuit ready to run: its paths, loads, replicas and testbench."""

    circuit: Circuit
    paths: tuple[Path, ...]
    loads: Loads
    replicas: dict[tuple[str, str], Replica]  # by (gate, edge arriving at its input)


def _replicas(
    paths: Sequence[Path], cells: Mapping[str, CellTables], net_loads: Loads, edges: Sequence[str]
) -> dict[tuple[str, str], Replica]:
    """A replica of every stage for each edge that can arrive at its input, loaded with the
    pins' capacitance of the edge it then makes (and the wire and port loads)."""
    out = {}
    for path in paths:
        for edge in edges:
            for stage, (edge_in, edge_out) in zip(
                path.stages, walk(path, cells, edge), strict=True
            ):
                load = net_loads.total(stage.net_out, edge_out, cells, PER_EDGE)
                out[(stage.gate, edge_in)] = Replica(f"{stage.gate}_{edge_in}", stage, load)
    return out


def _prepare(
    config: LibraryConfig, circuit: Circuit, cells: Mapping[str, CellTables], setup: Setup
) -> tuple[_Circuit, Deck]:
    paths = routes(circuit, cells)
    net_loads = loads(circuit, cells, setup.wire, setup.port)
    replicas = _replicas(paths, cells, net_loads, setup.edges)
    deck = build_path_deck(
        config, circuit, net_loads.wire, net_loads.port, tuple(replicas.values())
    )
    return _Circuit(circuit, paths, net_loads, replicas), deck


def _point(
    c: _Circuit, cells: Mapping[str, CellTables], slew: float, edge: str, slew_cells: _Cells
) -> PathPoint:
    """The circuit's run for one input slew and edge: every path's nets and replicas."""
    nodes = {node(c.circuit.start): edge}
    latest, sharpest = slew, slew
    for path in c.paths:
        timed = predict(path, cells, c.loads, slew, edge, slew_cells=slew_cells)
        for stage, t in zip(path.stages, timed, strict=True):
            nodes[node(stage.net_out)] = t.output_edge
            nodes[replica_node(c.replicas[(stage.gate, t.input_edge)].name)] = t.output_edge
            sharpest = min(sharpest, t.slew_out)
        latest = max(latest, timed[-1].arrival + 2 * timed[-1].slew_out)
    nets = dict.fromkeys(
        [c.circuit.start, *(stage.net_out for path in c.paths for stage in path.stages)]
    )
    probes = tuple(
        (pin_probe(gate, pin), node(net))
        for net in nets
        for gate, _, pin in c.loads.pins.get(net, ())
    )
    return PathPoint(
        cell=c.circuit.name,
        start=c.circuit.start,
        input_edge=edge,
        slew=slew,
        nodes=tuple(nodes.items()),
        step=sharpest / SAMPLES_PER_EDGE,
        stop=STOP_MARGIN * (latest + 2 * slew),
        probes=probes,
    )


@dataclass(frozen=True, slots=True)
class PinDraw:
    """What one pin on a stage's output net drew in the path run, as capacitances (F): the
    charge over the whole run over Vdd, up to its net's input delay threshold over the swing to
    it, between the net's slew thresholds over the voltage between them; beside the library's
    values of the same pin and edge (``PinCap``; None where not measured)."""

    gate: str
    cell: str
    pin: str
    edge: str  # the net's
    in_path: tuple[float, float, float]  # whole edge, to threshold, slew window
    library: tuple[float | None, float | None, float | None]


@dataclass(frozen=True, slots=True)
class StageResult:
    """One stage of one path run: simulated, predicted (pin capacitance per edge and as one
    number), and the three experiments at the stage's simulated input slew (SI, s)."""

    stage: Stage
    predicted: StageTiming
    single: StageTiming  # the prediction with each pin's capacitance as one number
    sim_delay: float
    sim_slew_in: float
    sim_slew_out: float
    sim_arrival: float
    replica_delay: float  # real input waveform, lumped load
    ramp_delay: float | None  # the tables' input edge, lumped load (None: the point failed)
    table_delay: float  # the tables at the simulated input slew and the lumped load
    sta_delay: float | None = None
    sta_slew: float | None = None
    sta_arrival: float | None = None
    receivers: tuple[PinDraw, ...] = ()  # the gate pins on its output net


@dataclass(frozen=True, slots=True)
class PathResult:
    path: Path
    slew: float
    edge: str
    stages: tuple[StageResult, ...]
    failure: str | None = None  # why the path run gave no measurement

    @property
    def simulated(self) -> float | None:
        return self.stages[-1].sim_arrival if self.stages else None

    @property
    def predicted(self) -> float:
        return self.stages[-1].predicted.arrival

    def error(self, value: float | None) -> float | None:
        """(value − simulated) / simulated: negative where ``value`` is too fast."""
        sim = self.simulated
        return None if value is None or sim is None else (value - sim) / sim


@dataclass(frozen=True, slots=True)
class Correlation:
    setup: Setup
    results: tuple[PathResult, ...]
    circuits: tuple[Circuit, ...]
    simulations: int
    wall_seconds: float

    def errors(
        self, which: Callable[[PathResult], float | None], slew: float | None = None
    ) -> np.ndarray:
        """The path-delay errors of every measured path (at input slew ``slew`` only, if
        given), of the value ``which`` picks."""
        found = [
            r.error(which(r))
            for r in self.results
            if r.failure is None and (slew is None or r.slew == slew)
        ]
        return np.array([e for e in found if e is not None])


def _ramp_point(stage: Stage, t: StageTiming, slew: float) -> TimingPoint:
    return TimingPoint(
        stage.cell, stage.pin, stage.output, stage.side, t.input_edge, t.output_edge, slew, t.load
    )


def _stage_sims(m: PathMeasurement, c: _Circuit, path: Path) -> list[tuple[float, ...]]:
    """(delay, slew in, slew out, arrival, replica delay) of each stage, from the path run."""
    index = {n: i for i, (n, _) in enumerate(m.point.nodes)}
    start = index[node(c.circuit.start)]
    out: list[tuple[float, ...]] = []
    edge = m.point.input_edge
    for stage in path.stages:
        i, o = index[node(stage.net_in)], index[node(stage.net_out)]
        r = index[replica_node(c.replicas[(stage.gate, edge)].name)]
        out.append(
            (
                m.at_output[o] - m.at_input[i],
                m.transitions[i],
                m.transitions[o],
                m.at_output[o] - m.at_input[start],
                m.at_output[r] - m.at_input[i],
            )
        )
        edge = m.point.nodes[o][1]
    return out


@dataclass(frozen=True, slots=True)
class _Timing:
    """What every path run of a correlation is timed and judged with."""

    config: LibraryConfig
    cells: _Cells  # pin capacitances of the setup's pin load, for the delay lookups
    slew_cells: _Cells  # ... for the output slew lookups
    given: _Cells  # as characterized: the library's pin capacitances


def _draws(t: _Timing, m: PathMeasurement, c: _Circuit, net: str) -> tuple[PinDraw, ...]:
    """Every gate pin on ``net``: what it drew in the path run, beside the library's values."""
    probe = {source: i for i, (source, _) in enumerate(m.point.probes)}
    edge = dict(m.point.nodes)[node(net)]
    vdd, thr = t.config.process.vdd, t.config.thresholds
    swings = (vdd, thr.to_input_threshold(edge) * vdd, thr.slew_swing(edge) * vdd)
    out = []
    for gate, cell, pin in c.loads.pins.get(net, ()):
        charges = m.pin_charges[probe[pin_probe(gate, pin)]]
        cap = next(p for p in t.given[cell].pins if p.pin == pin)
        library = (
            getattr(cap, edge),
            getattr(cap, f"{edge}_to_threshold"),
            getattr(cap, f"{edge}_slew_window"),
        )
        whole, to_threshold, window = (abs(q) / v for q, v in zip(charges, swings, strict=True))
        out.append(PinDraw(gate, cell, pin, edge, (whole, to_threshold, window), library))
    return tuple(out)


def _result(
    t: _Timing, path: Path, c: _Circuit, m: PathMeasurement, ramps: Mapping[Work, Outcome]
) -> PathResult:
    p = m.point
    pred = predict(path, t.cells, c.loads, p.slew, p.input_edge, slew_cells=t.slew_cells)
    single = predict(path, t.cells, c.loads, p.slew, p.input_edge, SINGLE, t.slew_cells)
    stages = []
    for stage, timed, one, sim in zip(
        path.stages, pred, single, _stage_sims(m, c, path), strict=True
    ):
        delay, slew_in, slew_out, arrival, replica = sim
        ramp = ramps.get(_ramp_point(stage, timed, slew_in))
        delay_t, _ = stage_tables(t.cells[stage.cell], stage, timed.output_edge)
        at_sim = float(interpolate(delay_t, [(slew_in, timed.load)])[0])
        stages.append(
            StageResult(
                stage=stage,
                predicted=timed,
                single=one,
                sim_delay=delay,
                sim_slew_in=slew_in,
                sim_slew_out=slew_out,
                sim_arrival=arrival,
                replica_delay=replica,
                ramp_delay=ramp.delay if isinstance(ramp, Measurement) else None,
                table_delay=at_sim,
                receivers=_draws(t, m, c, stage.net_out),
            )
        )
    return PathResult(path, p.slew, p.input_edge, tuple(stages))


_Measured = tuple[Path, _Circuit, PathMeasurement]


def _split(
    t: _Timing,
    points: Sequence[PathPoint],
    prepared: Mapping[str, _Circuit],
    runs: Mapping[Work, Outcome],
) -> tuple[list[_Measured], list[PathResult], list[TimingPoint]]:
    """The path runs' paths: measured, failed (with the reason), and the ramp points of every
    measured stage (its table edge at its simulated input slew and its lumped load)."""
    measured, failed, ramp_points = [], [], []
    for p in points:
        c, o = prepared[p.cell], runs[p]
        for path in c.paths:
            if not isinstance(o, PathMeasurement):
                reason = o.reason if isinstance(o, Failure) else "no measurement"
                failed.append(PathResult(path, p.slew, p.input_edge, (), reason))
                continue
            sims = _stage_sims(o, c, path)
            pred = predict(path, t.cells, c.loads, p.slew, p.input_edge, slew_cells=t.slew_cells)
            ramp_points += [
                _ramp_point(st, x, s[1]) for st, x, s in zip(path.stages, pred, sims, strict=True)
            ]
            measured.append((path, c, o))
    return measured, failed, ramp_points


def correlate(
    config: LibraryConfig,
    circuits: Sequence[Circuit],
    cells: Mapping[str, CellTables],
    setup: Setup,
    *,
    jobs: int | None = None,
    on_start: Callable[[int], None] | None = None,
    on_result: Callable[[object], None] | None = None,
) -> Correlation:
    """Every path of ``circuits`` at every input slew and edge of ``setup``: simulated whole,
    timed from ``cells``' tables, each stage's experiments run (see the module's text)."""
    shape = config.input_shape
    if not shape.linear and not (shape.rise and shape.fall):
        raise ConfigError(
            f"[input_shape] kind = {shape.kind!r}: its edges are not measured yet; time the "
            "paths with the config the tables were measured with (flow.characterize.with_shape)"
        )
    timing = _Timing(
        config,
        with_pin_load(cells, setup.pin_load),
        with_pin_load(cells, setup.pin_load, SLEW),
        cells,
    )
    cells, slew_cells = timing.cells, timing.slew_cells
    begin = time.perf_counter()
    prepared, decks = {}, {}
    for circuit in circuits:
        prepared[circuit.name], decks[circuit.name] = _prepare(config, circuit, cells, setup)
    points = [
        _point(c, cells, s, e, slew_cells)
        for c in prepared.values()
        for s in setup.slews
        for e in setup.edges
    ]
    if on_start is not None:
        on_start(sweep.work(points))
    runs = {
        o.point: o for o in sweep.run(config, points, jobs=jobs, decks=decks, on_result=on_result)
    }
    measured, failed, ramp_points = _split(timing, points, prepared, runs)
    unique = list(dict.fromkeys(ramp_points))
    ramps = {o.point: o for o in sweep.run(config, unique, jobs=jobs)}
    results = [_result(timing, path, c, m, ramps) for path, c, m in measured]
    simulations = sum(
        o.runs for o in (*runs.values(), *ramps.values()) if not isinstance(o, Failure)
    )
    return Correlation(
        setup,
        (*results, *failed),
        tuple(circuits),
        simulations,
        time.perf_counter() - begin,
    )


def with_sta(
    corr: Correlation, timed: Mapping[str, Mapping[tuple[str, str, int], Sequence[StaStage]]]
) -> Correlation:
    """``corr`` with OpenSTA's delay, slew and arrival of every stage (by circuit, then by
    output port, input edge and slew index, as ``opensta.parse`` gives them)."""
    out = []
    for r in corr.results:
        rows = timed.get(r.path.circuit, {}).get(
            (r.path.end, r.edge, corr.setup.slews.index(r.slew)), ()
        )
        by_gate = {row.gate: row for row in rows}
        stages = tuple(
            replace(s, sta_delay=g.delay, sta_slew=g.slew, sta_arrival=g.arrival)
            if (g := by_gate.get(s.stage.gate)) is not None
            else s
            for s in r.stages
        )
        out.append(replace(r, stages=stages))
    return replace(corr, results=tuple(out))


def summary(
    corr: Correlation, slew: float | None = None
) -> dict[str, dict[str, float | int] | None]:
    """Median and worst |error| of the path delay, per column (at input slew ``slew`` only,
    if given)."""
    columns: dict[str, Callable[[PathResult], float | None]] = {
        "predicted": lambda r: r.predicted,
        "predicted_one_number_capacitance": lambda r: r.stages[-1].single.arrival,
        "opensta": lambda r: r.stages[-1].sta_arrival,
    }
    out: dict[str, dict[str, float | int] | None] = {}
    for name, pick in columns.items():
        e = corr.errors(pick, slew)
        out[name] = (
            None
            if e.size == 0
            else {
                "paths": int(e.size),
                "median_abs_error": float(np.median(np.abs(e))),
                "worst_abs_error": float(np.max(np.abs(e))),
                "mean_error": float(np.mean(e)),
            }
        )
    return out


def by_slew(corr: Correlation) -> list[dict]:
    """``summary`` at each input slew: the error grows where the port's edge is slower than any
    edge a gate of the path makes, and a goal may hold at some slews only."""
    return [{"input_slew_s": s, **summary(corr, s)} for s in corr.setup.slews]


DRAWS = ("whole_edge", "to_threshold", "slew_window")  # the charges of ``PinDraw.in_path``


def receiver_ratios(corr: Correlation, slew: float | None = None) -> dict[str, dict | None]:
    """Per charge (``DRAWS``): median, lowest and highest ratio of what the receiving pins drew
    in the paths to the library's capacitance of the same pin and edge (at input slew
    ``slew`` only, if given): above 1, a real gate loaded its driver more than the tables
    assume."""
    out: dict[str, dict | None] = {}
    for k, name in enumerate(DRAWS):
        ratios = np.array(
            [
                d.in_path[k] / lib
                for r in corr.results
                if r.failure is None and (slew is None or r.slew == slew)
                for s in r.stages
                for d in s.receivers
                if (lib := d.library[k])
            ]
        )
        out[name] = (
            None
            if ratios.size == 0
            else {
                "pins": int(ratios.size),
                "median": float(np.median(ratios)),
                "lowest": float(ratios.min()),
                "highest": float(ratios.max()),
            }
        )
    return out


# A stage effect larger than this share of its stage's delay is counted apart: the means hide
# effects that cancel over a path but not on each stage (docs/history/2026-12-receivereq.md).
EFFECT_FLAG = 0.02


def _effects(corr: Correlation) -> dict[str, list[float]]:
    """Each stage's delay difference of each effect, as a fraction of its simulated delay
    (positive: makes the tables slower than the simulation)."""
    parts: dict[str, list[float]] = {"load": [], "shape": [], "interpolation": [], "local": []}
    for r in corr.results:
        for s in r.stages:
            d = s.sim_delay
            parts["load"].append((s.replica_delay - s.sim_delay) / d)
            parts["local"].append((s.table_delay - s.sim_delay) / d)
            if s.ramp_delay is not None:
                parts["shape"].append((s.ramp_delay - s.replica_delay) / d)
                parts["interpolation"].append((s.table_delay - s.ramp_delay) / d)
    return parts


def decomposition(corr: Correlation) -> dict[str, float | None]:
    """Mean per-stage delay difference of each effect (see ``_effects``)."""
    return {k: float(np.mean(v)) if v else None for k, v in _effects(corr).items()}


def effect_spread(corr: Correlation) -> dict[str, dict | None]:
    """Per effect over the stages: median, lowest, highest, and how many stages it moves by
    more than ``EFFECT_FLAG`` of their delay either way."""
    out: dict[str, dict | None] = {}
    for k, v in _effects(corr).items():
        a = np.asarray(v)
        out[k] = (
            {
                "median": float(np.median(a)),
                "lowest": float(a.min()),
                "highest": float(a.max()),
                "stages": int(a.size),
                "beyond_flag": int(np.count_nonzero(np.abs(a) > EFFECT_FLAG)),
                "flag": EFFECT_FLAG,
            }
            if a.size
            else None
        )
    return out


def _stage_record(s: StageResult) -> dict:
    p = s.predicted
    return {
        "gate": s.stage.gate,
        "cell": s.stage.cell,
        "arc": f"{s.stage.pin}->{s.stage.output}",
        "side_inputs": {pin: int(v) for pin, v in s.stage.side},
        "input_edge": p.input_edge,
        "output_edge": p.output_edge,
        "load_F": p.load,
        "slew_load_F": p.slew_load,
        "inside_grid": p.inside,
        "delay_s": {
            "simulated": s.sim_delay,
            "predicted": p.delay,
            "opensta": s.sta_delay,
            "predicted_one_number_capacitance": s.single.delay,
            "replica_lumped_load": s.replica_delay,
            "ramp_lumped_load": s.ramp_delay,
            "tables_at_simulated_slew": s.table_delay,
        },
        "slew_in_s": {"simulated": s.sim_slew_in, "predicted": p.slew_in},
        "slew_out_s": {"simulated": s.sim_slew_out, "predicted": p.slew_out, "opensta": s.sta_slew},
        "arrival_s": {"simulated": s.sim_arrival, "predicted": p.arrival, "opensta": s.sta_arrival},
        "delay_error": (p.delay - s.sim_delay) / s.sim_delay,
        "slew_error": (p.slew_out - s.sim_slew_out) / s.sim_slew_out,
        "receivers": [
            {
                "gate": r.gate,
                "cell": r.cell,
                "pin": r.pin,
                "edge": r.edge,
                **{
                    f"{name}_F": {"in_path": got, "library": lib}
                    for name, got, lib in zip(DRAWS, r.in_path, r.library, strict=True)
                },
            }
            for r in s.receivers
        ],
    }


def to_json(config: LibraryConfig, corr: Correlation) -> dict:
    """Per path run and stage: simulated, predicted and OpenSTA values (SI) and errors."""
    st = corr.setup
    return {
        "library": config.name,
        "units": {"time": "s", "capacitance": "F", "error": "fraction of the simulated value"},
        "settings": {
            "input_slews_s": list(st.slews),
            "input_edges": list(st.edges),
            "wire_capacitance_F": st.wire,
            "port_load_F": st.port,
            "pin_load": st.pin_load,
            "input_shape": config.input_shape.describe(config.cap_unit, config.cap_scale),
            "error": "(value - simulated) / simulated; negative: too fast",
        },
        "summary": summary(corr),
        "summary_by_input_slew": by_slew(corr),
        "receivers_in_path_over_library": {
            "all": receiver_ratios(corr),
            "by_input_slew": [
                {"input_slew_s": x, **receiver_ratios(corr, x)} for x in corr.setup.slews
            ],
        },
        "stage_effects": decomposition(corr),
        "stage_effects_spread": effect_spread(corr),
        "simulations": corr.simulations,
        "wall_seconds": round(corr.wall_seconds, 3),
        "circuits": [{"name": c.name, "origin": c.origin} for c in corr.circuits],
        "paths": [
            {
                "path": r.path.name,
                "stages": len(r.path.stages),
                "input_slew_s": r.slew,
                "input_edge": r.edge,
                "failure": r.failure,
                "arrival_s": {
                    "simulated": r.simulated,
                    "predicted": r.predicted if r.stages else None,
                    "opensta": r.stages[-1].sta_arrival if r.stages else None,
                },
                "error": {
                    "predicted": r.error(r.predicted) if r.stages else None,
                    "opensta": r.error(r.stages[-1].sta_arrival) if r.stages else None,
                },
                "per_stage": [_stage_record(s) for s in r.stages],
            }
            for r in corr.results
        ],
    }


def _pct(x: float | None) -> str:
    return "-" if x is None else f"{x * 100:+.2f} %"


def pin_load_note(which: str) -> str:
    """One line saying which charge the pins' capacitance came from, for each lookup."""
    delay, slew = (_WINDOW_NAMES[s].replace("its", "the input's") for s in PIN_LOADS[which])
    charge = delay if delay == slew else f"{delay} (delay, replicas), {slew} (output slew)"
    return f"pins' capacitance: charge {charge}; OpenSTA's: the Liberty file's"


def _slew_lines(corr: Correlation, t: float, tu: str) -> list[str]:
    """The tables' prediction's spread at each input slew (with more than one)."""
    if len(corr.setup.slews) < 2:
        return []
    return [
        f"  predicted at input slew {row['input_slew_s'] / t:.4g} {tu}: median |error| "
        f"{s['median_abs_error'] * 100:.2f} %, worst {s['worst_abs_error'] * 100:.2f} % "
        f"({s['paths']} paths)"
        for row in by_slew(corr)
        if (s := row["predicted"]) is not None
    ]


def _receiver_lines(corr: Correlation, t: float, tu: str) -> list[str]:
    """What the receiving pins drew in the paths over the library's values, per input slew."""
    lines = []
    for x in (None, *corr.setup.slews) if len(corr.setup.slews) > 1 else (None,):
        ratios = receiver_ratios(corr, x)
        parts = [
            f"{name.replace('_', '-')} {r['median']:.3f} ({r['lowest']:.3f}-{r['highest']:.3f})"
            for name, r in ratios.items()
            if r is not None
        ]
        if parts:
            at = "" if x is None else f" at input slew {x / t:.4g} {tu}"
            lines.append(
                f"{'receivers' if x is None else '  receivers'}{at}: in-path charge over the "
                f"library's capacitance, median (range): {', '.join(parts)}"
            )
    return lines


def summary_lines(config: LibraryConfig, corr: Correlation) -> list[str]:
    """The terminal table: one line per path run, then the spread and the stage effects."""
    t, tu = config.time_scale, config.time_unit
    shape = config.input_shape.describe(config.cap_unit, config.cap_scale)
    lines = [
        f"paths of {config.name}: {len(corr.results)} path runs in {corr.wall_seconds:.1f} s",
        f"tables' and paths' input waveform: {shape}",
        *([] if corr.setup.pin_load == WHOLE_EDGE else [pin_load_note(corr.setup.pin_load)]),
        f"  {'path':<14} {'st':>2} {'slew':>7} {'edge':<4} {'simulated':>10} {'predicted':>10} "
        f"{'OpenSTA':>10} {'err pred':>9} {'err sta':>9}  ({tu})",
    ]
    for r in corr.results:
        if r.failure is not None:
            lines.append(f"  {r.path.name:<14} failed: {r.failure}")
            continue
        sta = r.stages[-1].sta_arrival
        lines.append(
            f"  {r.path.name:<14} {len(r.stages):>2} {r.slew / t:>7.4g} {r.edge:<4} "
            f"{(r.simulated or 0) / t:>10.5g} {r.predicted / t:>10.5g} "
            f"{'-' if sta is None else f'{sta / t:.5g}':>10} {_pct(r.error(r.predicted)):>9} "
            f"{_pct(r.error(sta)):>9}"
        )
    for name, s in summary(corr).items():
        if s is not None:
            lines.append(
                f"{name}: median |error| {s['median_abs_error'] * 100:.2f} %, worst "
                f"{s['worst_abs_error'] * 100:.2f} %, mean {s['mean_error'] * 100:+.2f} % "
                f"({s['paths']} paths)"
            )
    lines += _slew_lines(corr, t, tu)
    lines += _receiver_lines(corr, t, tu)
    effects = ", ".join(f"{k} {_pct(v)}" for k, v in decomposition(corr).items())
    lines.append(f"mean per-stage delay effects (tables minus simulation): {effects}")
    spread = [f"{k} {spread_text(v)}" for k, v in effect_spread(corr).items() if v is not None]
    if spread:
        head = f"stages beyond ±{EFFECT_FLAG * 100:g} %"
        lines.append(f"  per stage, median (lowest to highest; {head}): {', '.join(spread)}")
    return lines


def spread_text(v: dict) -> str:
    """One effect's spread over the stages, in words (``effect_spread``)."""
    return (
        f"{_pct(v['median'])} ({_pct(v['lowest'])} to {_pct(v['highest'])}; "
        f"{v['beyond_flag']} of {v['stages']})"
    )
