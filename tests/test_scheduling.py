"""Where the models are parsed: never in the process that runs the command, and in the workers
as few times as the load balance allows (each cell's testbench read at most once per worker).

Counts and the process's own account of its mappings are the checks, never a time: a time
depends on the machine. Needs ngspice (fails without it).
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from fixtures.driver_modules import NOT_IN_A_STORED_RUN, NOT_IN_DRIVER

from charflow.execution import sweep, workers
from charflow.records.points import FunctionPoint, LeakagePoint
from charflow.simulation.netlist import Deck

ROOT = Path(__file__).resolve().parents[1]
SMALL = ROOT / "tests" / "data" / "small_l1.toml"
CELLS = 3  # small_l1's cells
JOBS = 2
RUN_TIMEOUT = 600  # s, a bound on a shared machine, not an assertion

# The command run in a fresh interpreter (the test process holds libngspice from other
# tests), then what that process holds: Linux lists every mapped file in /proc/self/maps.
DRIVER = """\
import contextlib, io, json, sys
from charflow.cli import main as cli
from charflow.simulation.session import SESSION
out = io.StringIO()
with contextlib.redirect_stdout(out):
    code = cli.main(sys.argv[1:])
maps = open("/proc/self/maps").read()
print(json.dumps({"code": code, "stdout": out.getvalue(), "libngspice": "libngspice" in maps,
                  "reads": SESSION.reads()[0], "pysp": "PySpice" in sys.modules,
                  "modules": sorted(sys.modules)}))
"""


@pytest.fixture(scope="module", autouse=True)
def _needs_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not installed; these tests need it (apt-get install ngspice)")


def _driver(*args: str | Path) -> dict:
    done = subprocess.run(
        [sys.executable, "-c", DRIVER, *map(str, args)],
        capture_output=True,
        text=True,
        timeout=RUN_TIMEOUT,
        check=False,
        stdin=subprocess.DEVNULL,
    )
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout.splitlines()[-1])


def test_the_driver_parses_no_model_and_the_summary_counts_the_reads(tmp_path):
    out = tmp_path / "out"
    first = _driver("run", SMALL, "--jobs", str(JOBS), "--out", out, "--quiet")
    assert first["code"] == 0
    # The workers read every cell's testbench (function check and sweep); this process none.
    assert not first["libngspice"] and not first["pysp"] and first["reads"] == 0
    assert not set(first["modules"]) & set(NOT_IN_DRIVER)
    reads = [line for line in first["stdout"].splitlines() if "testbench reads" in line]
    assert len(reads) == 1, first["stdout"]
    count = int(reads[0].split(": ")[1].split()[0])
    assert CELLS <= count <= CELLS * JOBS
    # Served wholly from the store: nothing read anywhere, no worker asked for the version.
    again = _driver("run", SMALL, "--jobs", str(JOBS), "--out", out, "--quiet")
    assert not again["libngspice"] and again["reads"] == 0
    assert not set(again["modules"]) & {*NOT_IN_DRIVER, *NOT_IN_A_STORED_RUN}
    assert "small_l1: 0 testbench reads" in again["stdout"]
    # --plan times sample points: in a worker too.
    plan = _driver("run", SMALL, "--jobs", str(JOBS), "--plan")
    assert plan["code"] == 0 and not plan["libngspice"] and plan["reads"] == 0


def _deck(cell: str) -> Deck:
    return Deck(cell=cell, text=f"* {cell}\n.end\n", key=f"key-{cell}", supply="vdd")


def _chunks(cell: str, count: int, cost: int) -> list[tuple[LeakagePoint, ...]]:
    return [(LeakagePoint(cell, states=cost),) for _ in range(count)]


def _done(
    queue: workers._Queue,
    pid: int,
    chunk,
    reads: int = 1,
    read_s: float = 0.0,
    seconds: float = 0.0,
) -> None:
    queue.done(chunk[0].cell, chunk, workers.Done([], pid, reads, read_s, seconds))


def test_a_free_worker_takes_its_own_cells_first_then_unread_ones_then_the_largest():
    decks = {c: _deck(c) for c in "ABCD"}
    tasks = [*_chunks("A", 3, 10), *_chunks("B", 2, 5), *_chunks("C", 1, 4), *_chunks("D", 1, 1)]
    queue = workers._Queue(tasks, decks, workers._Known())
    # Unknown workers start the cells with the most work left, one cell each.
    a, b = queue.take(None), queue.take(None)
    assert (a[0].cell, b[0].cell) == ("A", "B")
    _done(queue, 1, a)
    _done(queue, 2, b)
    assert [queue.take(1)[0].cell for _ in range(2)] == ["A", "A"]
    assert queue.take(2)[0].cell == "B"
    # Worker 1's cell is done: a cell no worker has read (C, the larger of C and D).
    c = queue.take(1)
    assert c[0].cell == "C"
    _done(queue, 1, c)
    assert queue.take(2)[0].cell == "D"
    assert queue.take(1) is None and queue.rest() == []


def test_each_known_worker_is_offered_a_chunk_of_its_own_cell():
    decks = {c: _deck(c) for c in "AB"}
    queue = workers._Queue([*_chunks("A", 3, 10), *_chunks("B", 3, 10)], decks, workers._Known())
    _done(queue, 1, queue.take(None))
    _done(queue, 2, queue.take(None))
    offers = queue.offers()
    assert [(pid, task[0].cell) for pid, _, task in offers] == [(1, "A"), (2, "B")]
    # Worker 1 took its chunk; worker 2's goes back to the front of B's queue.
    queue.give_back(offers[1][2])
    assert queue.take(2) is offers[1][2]


def test_each_cell_starts_with_its_function_check():
    # The checks share the run's sweep: cheap, and a failed one stops the run, so each comes
    # before the rest of its cell's work whichever worker starts the cell.
    work = [LeakagePoint(c, states=30) for c in "AABB"] + [FunctionPoint(c, 4) for c in "AB"]
    tasks = sweep.chunks(work)
    assert [type(t[0]) for t in tasks[:2]] == [FunctionPoint, FunctionPoint]
    queue = workers._Queue(tasks, {c: _deck(c) for c in "AB"}, workers._Known())
    a, b = queue.take(None), queue.take(None)
    assert [(t[0].cell, type(t[0])) for t in (a, b)] == [("A", FunctionPoint), ("B", FunctionPoint)]
    _done(queue, 1, a)
    assert isinstance(queue.take(1)[0], LeakagePoint)


def test_a_worker_steals_only_where_the_read_costs_less_than_the_help_saves():
    decks = {c: _deck(c) for c in "AB"}
    queue = workers._Queue([*_chunks("A", 5, 10), *_chunks("B", 1, 1)], decks, workers._Known())
    _done(queue, 1, queue.take(None), read_s=1.0, seconds=2.0)  # A: 1 s read, 0.1 s per unit
    _done(queue, 2, queue.take(None), read_s=1.0, seconds=1.1)
    # A has 40 units (4 s) left on worker 1: a second worker would save 2 s for a 1 s read.
    assert queue.take(2)[0].cell == "A"
    # 20 units (2 s) left after worker 1's next chunk: help would save 1 s for a 1 s read.
    _done(queue, 1, queue.take(1), reads=0, seconds=1.0)
    assert queue.take(2) is None
    assert queue.take(2, force=True)[0].cell == "A"


# A pool the driver knows from earlier sweeps, whose worker has since been replaced (loky stops
# a worker after its idle timeout): every testbench is held by a process that is gone, and
# reading one is not worth the help. The sweep must still end (it once offered the last chunk
# to the gone worker for ever, filling the pool's wake-up pipe until the driver blocked).
STALE = """\
import sys
from joblib.executor import get_memmapping_executor
from charflow.config import library as config
from charflow.execution import workers
from charflow.execution.store import Store
from charflow.flow import characterize as flow
from charflow.simulation.netlist import build_deck
cfg = config.load(sys.argv[1])
keys = {build_deck(cfg, c).key for c in cfg.cells}
executor = get_memmapping_executor(1)
gone = 2**22 + 12345  # a process id no worker has
workers._KNOWN = workers._Known(
    id(executor), {gone: set(keys)}, {k: 100.0 for k in keys}, {k: 1e-9 for k in keys}
)
with Store(sys.argv[2]) as store:
    result = flow.characterize(cfg, jobs=1, store=store)
print(len(result.failures), len(result.measurements))
"""


def test_a_sweep_ends_when_the_known_worker_is_gone(tmp_path: Path) -> None:
    done = subprocess.run(
        [sys.executable, "-c", STALE, str(SMALL), str(tmp_path / "store.sqlite")],
        capture_output=True,
        text=True,
        timeout=RUN_TIMEOUT,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    failures, measured = map(int, done.stdout.split())
    assert failures == 0 and measured > 0
