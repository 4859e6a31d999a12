"""One timed charflow run in a fresh process, as a user starts ``charflow run``; the benchmark
(benchmarks/speed.py) starts it as a script:

    python benchmarks/child.py CONFIG JOBS OUT STAGES LAUNCHED

It does what ``charflow run CONFIG --jobs JOBS --out OUT`` does (load, characterize, write),
through charflow's library API, and writes each stage's wall time to the JSON file STAGES
(seconds; the first stage runs from LAUNCHED, the parent's ``time.time()`` at the launch, so it
holds Python's start and charflow's imports). As ``charflow run`` does when its store is empty
(here there is none), the worker pool starts once the config is read, and the flow's modules
load while it starts. Exit 1 when some points failed.
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path
from typing import TYPE_CHECKING

from charflow.config import library as config
from charflow.execution import workers
from charflow.records.lazy import deferred
from charflow.records.points import (
    ConstraintPoint,
    PulsePoint,
    SpreadPoint,
    TimingPoint,
    TogglePoint,
    Work,
)

if TYPE_CHECKING:
    from charflow.flow import characterize as flow
else:
    flow = deferred("charflow.flow.characterize")


def kind_of(point: Work) -> str:
    """The kind of work a point is, as the benchmark's report counts it."""
    if isinstance(point, TimingPoint):
        return "combinational arcs" if point.kind == "combinational" else "clock and control arcs"
    if isinstance(point, ConstraintPoint):
        return f"{point.kind} searches"
    if isinstance(point, PulsePoint):
        return "pulse-width searches"
    if isinstance(point, TogglePoint):
        return "hidden-power toggles"
    if isinstance(point, SpreadPoint):
        return "Monte Carlo spread points" if point.samples else "sensitivity spread points"
    return "leakage"


def by_kind(result: flow.RunResult) -> dict[str, list[int]]:
    """Points and simulations of each kind of work the run simulated."""
    counts: dict[str, list[int]] = {}
    for m in (*result.measurements, *result.toggles, *result.leakage, *result.spreads):
        entry = counts.setdefault(kind_of(m.point), [0, 0])
        entry[0] += 1
        entry[1] += m.runs
    return counts


def spread(result: flow.RunResult) -> dict[str, int]:
    """What the sigma tables cost beside the nominal points, from the run's own counts."""
    tables, checks, nominal = result.spread_cost()
    sampled = all(m.point.samples for m in result.spreads)
    return {
        "points": sum(1 for m in result.spreads if bool(m.point.samples) == sampled),
        "simulations": tables,
        "checks": checks,
        "nominal_points": sum(
            1
            for m in result.measurements
            if isinstance(m.point, TimingPoint) and m.point.kind == "combinational"
        ),
        "nominal_simulations": nominal,
    }


def main(argv: list[str]) -> int:
    path, jobs, out, timings = Path(argv[0]), int(argv[1]), Path(argv[2]), Path(argv[3])
    begun = float(argv[4])
    stages = {"start and imports": time.time() - begun}
    mark = time.perf_counter()
    sweep_start = last = 0.0

    def on_start(_: int) -> None:
        nonlocal sweep_start
        sweep_start = time.perf_counter()

    def on_result(_: object) -> None:
        nonlocal last
        last = time.perf_counter()

    cfg = config.load(path)
    stages["config"] = time.perf_counter() - mark
    mark = time.perf_counter()
    workers.start(cfg.simulation, jobs)
    stages["pool start"] = time.perf_counter() - mark
    mark = time.perf_counter()
    callable(flow.characterize)  # the flow's modules, loaded while the workers start
    stages["imports"] = time.perf_counter() - mark
    mark = time.perf_counter()
    result = flow.characterize(cfg, jobs=jobs, on_start=on_start, on_result=on_result)
    done = time.perf_counter()
    stages["plan"] = sweep_start - mark  # the function checks are in the sweep
    stages["sweep"] = last - sweep_start
    stages["tables"] = done - last
    flow.write(cfg, result, out)
    stages["write"] = time.perf_counter() - done
    # The library's JSON carries no timings (a re-run from the store must reproduce it byte
    # for byte): the simulator's time travels beside the stages.
    totals = {
        "simulations": result.simulations,
        "analysis": result.sim_seconds,
        "reads": result.reads,
        "read_seconds": result.read_seconds,
        "cell_reads": dict(result.cell_reads),
        "kinds": by_kind(result),
        "spread": spread(result),
    }
    timings.write_text(json.dumps({"stages": stages, **totals}), encoding="utf-8")
    return 1 if result.failures else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
