"""The speed benchmark: charflow against the naive way, and against the simulator's own time.

The simulator's analysis time is the floor; all charflow adds around it (process starts,
netlist reading, vector transfer, measurement, scheduling, writing) is overhead. The naive
way is what a user would script without charflow: one ``ngspice -b`` process per point, a
complete netlist written for it with a ``.control`` block, the results read from what
ngspice prints (``meas``). It is given charflow's estimated first step and stop time for
each point, runs each once and on as many processes as charflow has workers, so it does no
more simulator work and the speed-up it shows is charflow's overhead against its own.

Every charflow run is a fresh process doing what ``charflow run`` does (``child.py``), as a
user starts it: its wall time includes Python's start, worker start-up, the function checks (in
the sweep) and writing, each stage timed.

The libraries: the demo on its level-1 and its BSIM models (7 × 7 grid), and a model file of
the kind foundries ship, generated with invented values by the tests' fixture
(tests/fixtures/model_kits.py): thousands of ``.param`` expressions, binned BSIM models and
every device wrapped in a subcircuit. Ratios are measured side by side in the same run, since
absolute times drift with the machine's load.

Not part of the charflow package: it uses charflow as a library, as any program would.
"""

from __future__ import annotations

import compileall
import json
import math
import multiprocessing
import os
import random
import re
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, replace
from pathlib import Path

from fixtures.model_kits import KIT_PARAMS, foundry_kit

import charflow
from charflow.config import library as config_mod
from charflow.config.library import LibraryConfig
from charflow.config.resources import DEMO_CONFIG, MODEL_DIR, TEMPLATE_DIR
from charflow.execution import workers
from charflow.measurement import combinational
from charflow.measurement.combinational import backend_for
from charflow.plan import arcs as planning
from charflow.records.errors import CharflowError, SimulatorError
from charflow.records.points import State, TimingPoint
from charflow.simulation import netlist, stimulus
from charflow.simulation.backends import QUIET, SINGLE_THREAD

DEMO = DEMO_CONFIG
LEVEL1_MODELS = MODEL_DIR / "vellum90_l1.lib"

NAIVE_POINTS = 48  # points the naive way runs per library; its rate is scaled to the rest
NAIVE_TIMEOUT = 600.0  # s per naive ngspice process
# The timed charflow run, started as a script (it imports charflow's whole flow; this module
# does not need to, so the benchmark's --help stays quick).
CHILD = Path(__file__).resolve().with_name("child.py")
STAGES = "bench_stages.json"  # what CHILD writes beside the library: stage times, simulator time

# Targets (issue 7): throughput against the naive way per library, overhead over the floor,
# scaling from one to two cores, peak memory per worker process.
# Read on libraries of gates only (the naive way runs gates' points): the BSIM models' target
# on the demo's gates.
TARGET_SPEEDUP = {"combinational demo": 1.5, "foundry-style kit": 10.0}
# Issue 14: the whole command's wall over the simulator's time per worker, and 1 -> 2 cores,
# on the demo's combinational cells; the demo on 2 cores of a quiet machine.
TARGET_FLOOR_RATIO = 1.2
FLOOR_LIBRARIES = ("combinational demo", "BSIM demo")
TARGET_SCALING = 1.8  # 1 -> 2 cores
TARGET_DEMO_SECONDS = 35.0  # BSIM demo, 2 workers
TARGET_PEAK_BYTES = 300e6
# Issue 16: the sigma tables (linear method, no Monte Carlo checks) within 5x the simulations
# of the nominal run they are added to.
TARGET_SPREAD_RATIO = 5.0


@dataclass(frozen=True, slots=True)
class SpreadCost:
    """The sigma tables' simulations beside the nominal run's, counted by the run itself."""

    points: int  # spread points of the sigma tables
    simulations: int  # their simulations
    checks: int  # simulations of the Monte Carlo checks beside them
    nominal_points: int  # the nominal combinational points
    nominal_simulations: int  # their simulations
    run_simulations: int  # the whole run's, spread points included

    @property
    def nominal_run(self) -> int:
        """Simulations of the run without its spread points."""
        return self.run_simulations - self.simulations - self.checks

    @property
    def ratio(self) -> float:
        """The sigma tables' simulations over the nominal run's."""
        return self.simulations / self.nominal_run


@dataclass(frozen=True, slots=True)
class RunStats:
    """One way of measuring a set of points, timed (SI units)."""

    label: str
    workers: int
    points: int
    simulations: int
    wall: float  # s
    analysis: float  # s inside the simulator, summed over the points
    cpu: float  # s of processor time, every process of the run together
    peak_rss: float | None = None  # bytes, the largest process of the run
    stages: tuple[tuple[str, float], ...] = ()  # (stage, s of wall time), in order
    reads: int = 0  # testbenches the simulators read (each parses the cell's models)
    read_seconds: float = 0.0  # s those reads took, summed over the workers
    most_reads: int = 0  # the most reads of any one cell
    kinds: tuple[tuple[str, int, int], ...] = ()  # (kind of work, points, simulations)
    spread: SpreadCost | None = None  # with [mismatch] on: what the sigma tables cost

    @property
    def sweep(self) -> float:
        """Wall time of the sweep alone (first point to last); the whole run's if not timed."""
        return dict(self.stages).get("sweep", self.wall)

    @property
    def points_per_second(self) -> float:
        return self.points / self.wall

    @property
    def simulations_per_second(self) -> float:
        return self.simulations / self.wall

    @property
    def floor_ratio(self) -> float:
        """Wall time over the simulator's time per worker: 1 would be no overhead at all."""
        return self.wall / (self.analysis / self.workers)

    @property
    def sweep_floor_ratio(self) -> float:
        """The same for the sweep alone, without start-up and writing."""
        return self.sweep / (self.analysis / self.workers)

    @property
    def busy(self) -> float:
        """Share of the sweep's wall time each worker spends inside the simulator."""
        return 1.0 / self.sweep_floor_ratio


@dataclass(frozen=True, slots=True)
class NaivePoint:
    point: TimingPoint
    delay: float  # s
    transition: float  # s, divided by the slew derate


@dataclass(frozen=True, slots=True)
class LibraryBench:
    name: str
    one: RunStats  # charflow, one worker
    full: RunStats  # charflow, all workers
    naive: RunStats  # the naive way on a subset of the points
    agreement: float  # largest |naive − charflow| delay or transition, relative
    notes: tuple[str, ...] = ()
    # Every planned point a gate's arc: the naive way (gates' points only) then times the same
    # kind of work as charflow, and the speed-up compares like with like.
    gates_only: bool = True

    @property
    def speedup(self) -> float:
        """Points per second, charflow on all workers over the naive way on as many."""
        return self.full.points_per_second / self.naive.points_per_second

    @property
    def scaling(self) -> float:
        return self.one.wall / self.full.wall

    @property
    def sweep_scaling(self) -> float:
        """The same for the sweep alone: start-up and writing do not parallelise."""
        return self.one.sweep / self.full.sweep

    @property
    def cpu_speedup(self) -> float:
        """Processor time per point, the naive way's over charflow's: the speed-up as far as
        it does not depend on what else the machine runs."""
        return (self.naive.cpu / self.naive.points) / (self.full.cpu / self.full.points)


def level1_demo(folder: Path) -> Path:
    """The demo library on the level-1 models, as a config file in ``folder``."""
    text = DEMO.read_text(encoding="utf-8")
    text = text.replace("../models/vellum90_bsim.lib", LEVEL1_MODELS.as_posix())
    text = text.replace("../templates/", TEMPLATE_DIR.as_posix() + "/")
    text = text.replace('name = "vellum90_tt"', 'name = "vellum90_l1_tt"')
    path = folder / "vellum90_l1.toml"
    path.write_text(text, encoding="utf-8")
    return path


def combinational_demo(folder: Path) -> Path:
    """The demo as shipped (BSIM models, 7 × 7 grid) without its flip-flops, in ``folder``."""
    text = DEMO.read_text(encoding="utf-8")
    text = text.replace("../models/", MODEL_DIR.as_posix() + "/")
    text = text.replace("../templates/", TEMPLATE_DIR.as_posix() + "/")
    text = text.replace('name = "vellum90_tt"', 'name = "vellum90_comb_tt"')
    head, *cells = text.split("[[cell]]")
    kept = [c for c in cells if not re.search(r"^flop\s*=", c, flags=re.M)]
    path = folder / "vellum90_comb.toml"
    path.write_text("[[cell]]".join([head, *kept]), encoding="utf-8")
    return path


def mismatch_demo(folder: Path) -> Path:
    """The combinational demo with its sigma tables on (linear method, no Monte Carlo
    checks), in ``folder``."""
    text = combinational_demo(folder).read_text(encoding="utf-8")
    text = text.replace('name = "vellum90_comb_tt"', 'name = "vellum90_mismatch_tt"')
    text = re.sub(
        r'^(\[mismatch\]\s*)method = "off"', r'\1method = "linear"\nchecks = 0', text, flags=re.M
    )
    path = folder / "vellum90_mismatch.toml"
    path.write_text(text, encoding="utf-8")
    return path


def charflow_run(config_path: Path, jobs: int, out: Path) -> tuple[RunStats, dict]:
    """charflow on ``config_path`` in a fresh process, as ``charflow run`` does it (child.py:
    load, characterize, write), timed stage by stage; its statistics and the JSON it wrote."""
    out.mkdir(parents=True, exist_ok=True)
    cmd = [sys.executable, str(CHILD), str(config_path), str(jobs), str(out), str(out / STAGES)]
    with open(out / "stderr.txt", "w+", encoding="utf-8") as err:
        begun = time.time()
        start = time.perf_counter()
        proc = subprocess.Popen(
            [*cmd, repr(begun)], stdout=subprocess.DEVNULL, stderr=err, stdin=subprocess.DEVNULL
        )
        # wait4 reports the child's peak memory, its reaped worker processes included.
        _, status, usage = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - start
        proc.returncode = os.waitstatus_to_exitcode(status)
        err.seek(0)
        message = err.read().strip()
    if proc.returncode != 0:
        raise SimulatorError(f"charflow on {config_path.name} failed: {message}")
    name = config_mod.load(config_path).name
    doc = json.loads((out / f"{name}.json").read_text(encoding="utf-8"))
    timed = json.loads((out / STAGES).read_text(encoding="utf-8"))
    records = [r for cell in doc["points"].values() for r in cell]
    stats = RunStats(
        label=f"charflow, {jobs} worker{'s' * (jobs > 1)}",
        workers=jobs,
        points=len(records),
        simulations=timed["simulations"],
        wall=wall,
        analysis=timed["analysis"],
        cpu=usage.ru_utime + usage.ru_stime,
        peak_rss=usage.ru_maxrss * 1024.0,  # Linux reports kilobytes
        stages=tuple(timed["stages"].items()),
        reads=timed["reads"],
        read_seconds=timed["read_seconds"],
        most_reads=max(timed["cell_reads"].values(), default=0),
        kinds=tuple((k, n, sims) for k, (n, sims) in timed["kinds"].items()),
        spread=SpreadCost(**timed["spread"], run_simulations=timed["simulations"])
        if timed["spread"]["points"]
        else None,
    )
    return stats, doc


def naive_netlist(
    config: LibraryConfig, deck: netlist.Deck, point: TimingPoint, step: float, stop: float
) -> str:
    """A complete netlist for one point, as a script without charflow would write it."""
    cell = config.cell(point.cell)
    vdd = config.process.vdd
    thr = config.thresholds
    ramp = stimulus.ramp(point.slew, point.input_edge, thr, vdd)
    waves = {p: stimulus.constant(vdd if v else 0.0) for p, v in point.side}
    waves[point.related] = ramp.pulse()
    text = deck.text
    for pin in cell.inputs:
        src, node = deck.input_source(pin), deck.input_node(pin)
        pulse = waves[pin].strip("[] ")
        text = re.sub(rf"^{src} .*$", f"{src} {node} 0 pulse({pulse})", text, flags=re.M)
    # The point's own load and, on a two-output cell's 3D tables, the other output's.
    loads = combinational.point_loads(cell, point)
    for out in cell.outputs:
        cap, node = deck.load_cap(out.pin), deck.output_node(out.pin)
        load = loads.get(out.pin, netlist.PARKED_LOAD)
        text = re.sub(rf"^{cap} .*$", f"{cap} {node} 0 {load:.12g}", text, flags=re.M)
    out_node = deck.output_node(point.output)
    in_node = deck.input_node(point.related)
    tol = config.simulation.settle * vdd
    rising = point.output_edge == "rise"
    settled = f"v({out_node}) > {vdd - tol:.6g}" if rising else f"v({out_node}) < {tol:.6g}"
    lower, upper = thr.slew_band(point.output_edge)
    o_dir = point.output_edge
    i_dir = point.input_edge
    control = [
        ".control",
        SINGLE_THREAD,
        QUIET,
        f"stop when {settled}",
        f"tran {step:.6g} {stop:.6g} 0 {step:.6g}",
        f"meas tran t_in when v({in_node})={thr.delay_input(i_dir) * vdd:.6g} {i_dir}=1",
        f"meas tran t_out when v({out_node})={thr.delay_output(o_dir) * vdd:.6g} {o_dir}=1",
        f"meas tran t_lo when v({out_node})={lower * vdd:.6g} {o_dir}=1",
        f"meas tran t_hi when v({out_node})={upper * vdd:.6g} {o_dir}=1",
        ".endc",
    ]
    return re.sub(r"^\.end\s*\Z", "\n".join(control) + "\n.end\n", text, flags=re.M)


def naive_point(
    config: LibraryConfig,
    deck: netlist.Deck,
    point: TimingPoint,
    step: float,
    stop: float,
    folder: Path,
) -> NaivePoint:
    """One ``ngspice -b`` process for one point; its results read from what it prints."""
    exe = shutil.which("ngspice")
    if exe is None:
        raise SimulatorError("ngspice is not on PATH; install it (Debian: apt-get install ngspice)")
    with tempfile.TemporaryDirectory(dir=folder) as tmp:
        path = Path(tmp) / "point.sp"
        path.write_text(naive_netlist(config, deck, point, step, stop), encoding="utf-8")
        if deck.compat:
            (Path(tmp) / ".spiceinit").write_text(f"set ngbehavior={deck.compat}\n")
        proc = subprocess.run(
            [exe, "-b", str(path)],
            capture_output=True,
            text=True,
            cwd=tmp,
            timeout=NAIVE_TIMEOUT,
            env={**os.environ, "LC_ALL": "C"},
            check=False,
        )
    found = dict(re.findall(r"^(t_\w+)\s*=\s*(\S+)", proc.stdout, flags=re.M))
    try:
        t = {k: float(found[k]) for k in ("t_in", "t_out", "t_lo", "t_hi")}
    except (KeyError, ValueError) as exc:
        raise SimulatorError(
            f"the naive run printed no {exc} (exit {proc.returncode})", cell=point.cell
        ) from exc
    transition = abs(t["t_hi"] - t["t_lo"]) / config.thresholds.slew_derate
    return NaivePoint(point, t["t_out"] - t["t_in"], transition)


def _naive_lines(r: LibraryBench) -> list[str]:
    """The naive way's lines of a library's report: its speed-up only where it timed the same
    kind of work as charflow (a library of gates)."""
    agree = f"naive and charflow values agree within {r.agreement:.2%}"
    if not r.gates_only:
        return [
            f"  the naive way ran {r.naive.points} of the gates' points: {agree}; no speed-up "
            "(its runs are gates', most of this library's time is flip-flop work: read the "
            "speed-up on a library of gates)"
        ]
    naive_all = r.full.points / r.naive.points_per_second
    return [
        f"  the naive way on all {r.full.points} points: about {naive_all:.0f} s "
        f"(its {r.naive.points} points, scaled)",
        f"  speed-up against the naive way {r.speedup:.1f}x ({r.cpu_speedup:.1f}x in processor "
        f"time per point); {agree}",
    ]


def gate_points(config: LibraryConfig, count: int) -> list[TimingPoint]:
    """``count`` of the plan's combinational points, the same ones every run."""
    gates = [
        p
        for p in planning.plan(config).points
        if isinstance(p, TimingPoint) and p.kind == "combinational"
    ]
    # A fixed sample, not a stride: a stride of the series' length picks one grid corner only.
    chosen = sorted(random.Random(0).sample(range(len(gates)), min(count, len(gates))))
    return [gates[i] for i in chosen]


def naive_run(
    config: LibraryConfig, doc: dict, count: int, jobs: int, folder: Path
) -> tuple[RunStats, float]:
    """The naive way on ``count`` combinational points drawn from the plan, on ``jobs``
    processes at once; its statistics and its largest relative difference from charflow's
    values in ``doc``. A flip-flop's clock point needs its state set before the edge, which a
    plain run per point does not do: the naive way times the arcs of gates."""
    points = gate_points(config, count)
    decks = {c.name: netlist.build_deck(config, c) for c in config.cells}
    measured = _records(doc)
    # charflow's estimated first step and its stop-time cap for each point (a plain run
    # has no stop condition: it runs to the cap).
    runs = [
        (p, combinational.first_step(config, decks[p.cell], p), measured[_key(p)]["stop_cap_s"])
        for p in points
    ]
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    with ThreadPoolExecutor(max_workers=jobs) as pool:
        results = list(pool.map(lambda r: naive_point(config, decks[r[0].cell], *r, folder), runs))
    wall = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    worst = 0.0
    for r in results:
        m = measured[_key(r.point)]
        for got, want in ((r.delay, m["delay_s"]), (r.transition, m["transition_s"])):
            worst = max(worst, abs(got - want) / abs(want))
    stats = RunStats(
        label=f"naive, {jobs} process{'es' * (jobs > 1)} at a time",
        workers=jobs,
        points=len(results),
        simulations=len(results),
        wall=wall,
        analysis=math.nan,
        cpu=after.ru_utime + after.ru_stime - before.ru_utime - before.ru_stime,
    )
    return stats, worst


def _key(p: TimingPoint) -> tuple:
    # The other output's load too: without it a two-output cell's points at every other
    # load would meet one record.
    when = State(p.side, "").when
    return (p.cell, p.related, p.output, when, p.input_edge, p.slew, p.load, p.other_load)


def _records(doc: dict) -> dict[tuple, dict]:
    """The JSON's timing-point records by point; searches (no related pin) are left out."""
    return {
        (
            cell,
            r["related_pin"],
            r["output"],
            r["when"],
            r["input_edge"],
            r["slew_s"],
            r["load_F"],
            r["other_load_F"],
        ): r
        for cell, records in doc["points"].items()
        for r in records
        if "related_pin" in r
    }


def bench_library(
    name: str, config_path: Path, jobs: int, naive_points: int, folder: Path, repeat: int = 1
) -> LibraryBench:
    """charflow on one and on ``jobs`` workers, and the naive way, side by side; charflow's
    runs alternate ``repeat`` times and the fastest of each is kept."""
    config = config_mod.load(config_path)
    ones, fulls = [], []
    doc: dict = {}
    for i in range(repeat):
        ones.append(charflow_run(config_path, 1, folder / f"one{i}")[0])
        stats, doc = charflow_run(config_path, jobs, folder / f"full{i}")
        fulls.append(stats)
    naive, agreement = naive_run(config, doc, naive_points, jobs, folder)
    one = min(ones, key=lambda s: s.wall)
    full = min(fulls, key=lambda s: s.wall)
    planned = len(planning.plan(config).points)
    only = len(gate_points(config, planned)) == planned
    return LibraryBench(name, one, full, naive, agreement, gates_only=only)


def kit_load_seconds(config_path: Path) -> float:
    """Wall time of ngspice reading one cell's testbench on the kit (its models, mostly)."""
    config = config_mod.load(config_path)
    deck = netlist.build_deck(config, config.cells[0])
    backend = backend_for(config)
    start = time.perf_counter()
    backend.load(deck)
    return time.perf_counter() - start


LIBRARIES = (
    "combinational demo",
    "mismatch demo",
    "level-1 demo",
    "BSIM demo",
    "foundry-style kit",
)


SPIN = 3_000_000  # iterations of the busy loop that gauges the cores free for the benchmark


def _spin() -> None:
    total = 0
    for i in range(SPIN):
        total += i


def free_cores(jobs: int) -> float:
    """How many cores ``jobs`` busy processes get at once, against one alone: ``jobs`` on an
    idle machine, less when other work shares it (then no scaling above it can be measured)."""
    method = "fork" if "fork" in multiprocessing.get_all_start_methods() else "spawn"
    context = multiprocessing.get_context(method)

    def timed(count: int) -> float:
        procs = [context.Process(target=_spin) for _ in range(count)]
        start = time.perf_counter()
        for proc in procs:
            proc.start()
        for proc in procs:
            proc.join()
        return time.perf_counter() - start

    return jobs * timed(1) / timed(jobs)


def run(
    *,
    jobs: int | None = None,
    naive_points: int = NAIVE_POINTS,
    params: int = KIT_PARAMS,
    repeat: int = 1,
    libraries: tuple[str, ...] = LIBRARIES,
) -> list[LibraryBench]:
    """The benchmark on each of ``libraries``, in a temporary folder."""
    jobs = jobs or workers.default_jobs()
    # Every process of a run (the driver, each worker) imports charflow: timed as installed,
    # from compiled modules (pip compiles them at install). An editable install under
    # PYTHONDONTWRITEBYTECODE has none and recompiles its sources in each process (measured
    # December 2026: 0.1 s of processor time more per worker, 0.15 s more in the driver).
    compileall.compile_dir(Path(charflow.__file__).parent, quiet=1)
    unknown = sorted(set(libraries) - set(LIBRARIES))
    if unknown:
        raise CharflowError(f"no benchmark library {unknown[0]!r}; have {', '.join(LIBRARIES)}")
    out = []
    with tempfile.TemporaryDirectory(prefix="charflow-bench-") as tmp:
        base = Path(tmp)
        for name in libraries:
            work = base / name.replace(" ", "_")
            work.mkdir()
            notes = []
            before = free_cores(jobs)
            if name == "level-1 demo":
                path = level1_demo(work)
            elif name == "combinational demo":
                path = combinational_demo(work)
            elif name == "mismatch demo":
                path = mismatch_demo(work)
            elif name == "BSIM demo":
                path = DEMO
            else:
                path = foundry_kit(work, params)
                load = kit_load_seconds(path)
                notes.append(
                    f"ngspice reads one testbench on the kit ({params} .param lines) in "
                    f"{load:.2f} s; the naive way does so for every point"
                )
            result = bench_library(name, path, jobs, naive_points, work, repeat)
            notes.append(
                f"{jobs} busy processes got {before:.2f} cores' worth just before, "
                f"{free_cores(jobs):.2f} just after (no more scaling than that can show)"
            )
            out.append(replace(result, notes=tuple(notes)))
    return out


def render(results: list[LibraryBench]) -> str:
    """The benchmark's report: a table per library, then the ratios against their targets."""
    lines = [
        "floor = simulator time / workers; sweep = its start to its last point (function checks "
        "included), without start-up and writing",
        "",
    ]
    for r in results:
        lines += _library_lines(r)
    lines.append("targets")
    for r in results:
        lines += _target_lines(r)
    return "\n".join(lines)


def _library_lines(r: LibraryBench) -> list[str]:
    """One library's table: its runs, their stages and reads, the kinds simulated, scaling."""
    head = (
        f"  {'':<34}{'points':>7}{'sims':>6}{'wall s':>8}{'sims/s':>8}{'simulator s':>12}"
        f"{'wall/floor':>11}{'sweep/floor':>12}{'CPU s':>7}{'peak MB':>8}"
    )
    lines = [r.name, head]
    for s in (r.one, r.full, r.naive):
        ratios = (
            f"{s.analysis:>12.2f}{s.floor_ratio:>11.2f}{s.sweep_floor_ratio:>12.2f}"
            if not math.isnan(s.analysis)
            else f"{'-':>12}{'-':>11}{'-':>12}"
        )
        tail = f"{s.cpu:>7.2f}" + (
            f"{s.peak_rss / 1e6:>8.0f}" if s.peak_rss is not None else f"{'-':>8}"
        )
        lines.append(
            f"  {s.label:<34}{s.points:>7}{s.simulations:>6}{s.wall:>8.2f}"
            f"{s.simulations_per_second:>8.0f}{ratios}{tail}"
        )
    for s in (r.one, r.full):
        parts = ", ".join(f"{name} {t:.2f}" for name, t in s.stages)
        lines.append(f"  {s.label} stages (s): {parts}")
        lines.append(
            f"  {s.label}: {s.reads} testbench reads, {s.read_seconds:.2f} s (all workers), "
            f"at most {s.most_reads} of one cell"
        )
    kinds = "; ".join(f"{k} {n} points, {sims} simulations" for k, n, sims in r.full.kinds)
    lines.append(f"  simulated ({r.full.label}): {kinds}")
    if r.full.spread is not None:
        lines.append(_spread_line(r.full.spread))
    return [
        *lines,
        *_naive_lines(r),
        f"  scaling 1 -> {r.full.workers} workers {r.scaling:.2f}x (sweep alone "
        f"{r.sweep_scaling:.2f}x); in the sweep each worker is inside the simulator "
        f"{r.one.busy:.0%} of the time on 1 worker, {r.full.busy:.0%} on {r.full.workers}",
        *(f"  {n}" for n in r.notes),
        "",
    ]


def _target_lines(r: LibraryBench) -> list[str]:
    """One library's measured ratios against the targets that apply to it."""
    lines = []
    if r.name in TARGET_SPEEDUP and r.gates_only:
        lines.append(_target(f"speed-up, {r.name}", r.speedup, TARGET_SPEEDUP[r.name], ">="))
    if r.name in FLOOR_LIBRARIES:
        for what, value in (("wall", r.full.floor_ratio), ("sweep", r.full.sweep_floor_ratio)):
            lines.append(_target(f"{what}/floor, {r.name}", value, TARGET_FLOOR_RATIO, "<="))
    if r.name == "BSIM demo" and r.full.workers == 2:
        lines.append(_target("demo wall s, 2 workers", r.full.wall, TARGET_DEMO_SECONDS, "<="))
    if r.full.workers == 2:
        for what, value in (("", r.scaling), (" (sweep)", r.sweep_scaling)):
            lines.append(_target(f"scaling 1 -> 2{what}, {r.name}", value, TARGET_SCALING, ">="))
    if r.full.spread is not None:
        lines.append(
            _target(
                f"sigma tables / nominal run sims, {r.name}",
                r.full.spread.ratio,
                TARGET_SPREAD_RATIO,
                "<=",
            )
        )
    peak = max(s.peak_rss or 0.0 for s in (r.one, r.full))
    lines.append(
        _target(f"peak MB per process, {r.name}", peak / 1e6, TARGET_PEAK_BYTES / 1e6, "<=")
    )
    return lines


def _spread_line(c: SpreadCost) -> str:
    """The sigma tables' extra simulations per spread point, per nominal combinational point
    and against the nominal run's."""
    return (
        f"  sigma tables: {c.simulations} simulations on {c.points} spread points "
        f"({c.simulations / c.points:.1f} a spread point, "
        f"{c.simulations / c.nominal_points:.2f} a nominal combinational point); "
        f"{c.simulations / c.nominal_simulations:.2f}x the {c.nominal_simulations} of the "
        f"{c.nominal_points} nominal combinational points, {c.ratio:.2f}x the {c.nominal_run} "
        f"of the nominal run; Monte Carlo checks {c.checks} simulations"
    )


def _target(what: str, value: float, target: float, sense: str) -> str:
    met = value >= target if sense == ">=" else value <= target
    return f"  {what:<46} {value:8.2f}  target {sense} {target:g}  {'met' if met else 'NOT MET'}"
