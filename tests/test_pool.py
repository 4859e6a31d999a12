"""The local worker pool (``execution.pool``): workers forked from the driver keep nothing of
it they must not: no simulator caches, no folder lock; they end with a killed driver and end
quietly on Ctrl-C; a driver running other threads spawns them instead. A dead worker is
reported by its signal (tests/test_faults.py kills one)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from charflow.cli import shared
from charflow.execution import pool, workers
from charflow.execution.lock import FolderLock
from charflow.records.errors import SimulatorError

ROOT = Path(__file__).resolve().parents[1]
SMALL = ROOT / "tests" / "data" / "small_l1.toml"
EXIT_INTERRUPTED = 130  # 128 + SIGINT: what a shell reports for a command stopped by Ctrl-C
GONE_WITHIN = 10.0  # s a worker may take to end after its driver


# A driver of its own (the test process runs other threads, and would spawn its workers):
# it holds the folder and a cache entry when its pool forks, then asks a worker what it has.
_FORKED = """
import os, sys
from charflow.execution import pool, workers
from charflow.execution.lock import LOCK_NAME, FolderLock
from charflow.simulation.session import SESSION

def held():
    names = []
    for fd in os.listdir("/proc/self/fd"):
        try:
            names.append(os.readlink(f"/proc/self/fd/{fd}"))
        except OSError:
            pass  # the listing's own descriptor, gone
    return len(SESSION.cache("test_pool")), sum(n.endswith(LOCK_NAME) for n in names)

SESSION.cache("test_pool")["driver's"] = 1  # what a driver that measured a point may hold
with FolderLock(sys.argv[1]):
    caches, locks = workers.in_worker(held)
with FolderLock(sys.argv[1]):  # the pool's workers are alive: none holds the folder
    print(pool.method(), caches, locks)
"""


def _driver(script: str, *args: str | Path) -> subprocess.CompletedProcess[str]:
    """``script`` run as a driver of its own with ``args``; it must succeed."""
    done = subprocess.run(
        [sys.executable, "-c", script, *map(str, args)],
        capture_output=True,
        text=True,
        timeout=300,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    return done


def test_a_forked_worker_drops_the_drivers_caches_and_lock(tmp_path):
    done = _driver(_FORKED, tmp_path)
    assert done.stdout.split() == ["fork", "0", "0"]  # forked; no cache entry, no lock file


# A forked worker killed in the middle of a sweep, in a driver of its own (as above): its
# points are kept or re-run, and the pool after it forks again.
_KILLED = """
import os, signal, sys
from charflow.config import library as config
from charflow.execution import pool, sweep
from charflow.plan import arcs

cfg = config.load(sys.argv[1])
points = arcs.plan(cfg).points
killed = []

def kill_one(outcome):
    if not killed:
        killed.append(pool.method())
        os.kill(pool.worker_ids()[0], signal.SIGKILL)

outcomes = list(sweep.run(cfg, points, jobs=2, on_result=kill_one))
failed = sum(type(o).__name__ == "Failure" for o in outcomes)
print(killed[0], pool.method(), len(outcomes) == len(points), failed)
"""


def test_a_killed_forked_worker_costs_no_point():
    done = _driver(_KILLED, SMALL)
    assert done.stdout.split() == ["fork", "fork", "True", "0"], done.stdout
    died = [line for line in done.stderr.splitlines() if "a worker process died" in line]
    assert died and "SIGKILL" in died[0], done.stderr


def test_a_driver_with_threads_spawns_its_workers():
    # A forked copy of a threaded process holds no thread but every lock one held then.
    stop = threading.Event()
    helper = threading.Thread(target=stop.wait)
    helper.start()
    try:
        pool.discard(pool.executor())
        assert workers.in_worker(os.getpid) in pool.worker_ids()
        assert pool.method() == "spawn"
    finally:
        stop.set()
        helper.join()
        pool.discard(pool.executor())


def test_a_worker_that_dies_in_a_task_is_a_simulator_error_naming_its_end():
    # The path the simulator's banner and the plan's timing samples take (``in_worker``).
    died = r"a worker process died \(worker exits: .*exit status 3"
    with pytest.raises(SimulatorError, match=died):
        workers.in_worker(os._exit, 3)
    assert workers.in_worker(os.getpid) in pool.worker_ids()  # a new pool serves the next


def test_a_task_queued_as_its_sweep_ends_takes_no_chunk(tmp_path):
    # A sweep closed early removes its journal folder; a task a worker had queued then
    # returns without measuring the chunk it was offered.
    gone = tmp_path / "journals"
    offers = ((None, None, ("a chunk",)),)
    done = workers._offered(None, offers, [str(gone / "0")], None, str(gone / workers.STOPPED))
    assert done.chosen is None and done.outcomes == []


def test_the_progress_bar_starts_no_thread():
    progress = shared.Progress(quiet=False)
    progress.enabled = True  # as on a terminal
    before = threading.active_count()
    progress.start(10)
    try:
        assert threading.active_count() == before
    finally:
        progress.bar.close()


def _ended(pid: int) -> bool:
    """Whether process ``pid`` has ended (gone, or a zombie its new parent has not reaped)."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return True
    return stat.rsplit(")", 1)[1].split()[0] == "Z"


def _wait_ended(pids: list[int]) -> list[int]:
    """The pids of ``pids`` still running after ``GONE_WITHIN``."""
    deadline = time.monotonic() + GONE_WITHIN
    while time.monotonic() < deadline and not all(map(_ended, pids)):
        time.sleep(0.05)
    return [p for p in pids if not _ended(p)]


_DRIVER = """
import sys, time
from charflow.config import library as config
from charflow.cli import shared
from charflow.execution import pool, workers
workers.start(config.load(sys.argv[1]).simulation, 2)
print(" ".join(map(str, pool.worker_ids())), flush=True)
time.sleep(120)
"""


def test_workers_end_with_a_killed_driver():
    with subprocess.Popen(
        [sys.executable, "-c", _DRIVER, str(SMALL)], stdout=subprocess.PIPE, text=True
    ) as driver:
        try:
            ids = [int(p) for p in driver.stdout.readline().split()]
            assert len(ids) == 2
            driver.send_signal(signal.SIGKILL)
            driver.wait(timeout=10)
            assert _wait_ended(ids) == []
        finally:
            driver.kill()


def _children(pid: int) -> list[int]:
    try:
        return [int(c) for c in Path(f"/proc/{pid}/task/{pid}/children").read_text().split()]
    except OSError:
        return []


def _started_workers(pid: int) -> list[int]:
    deadline = time.monotonic() + 60
    while len(_children(pid)) < 2 and time.monotonic() < deadline:
        time.sleep(0.02)
    ids = _children(pid)
    assert len(ids) >= 2, "the run started no workers"
    return ids


# A command started with SIGINT at Python's default (a terminal's foreground command) or
# ignored (a background job of a shell without job control, or nohup): its workers do the same.
_RUN = """
import runpy, signal, sys
default = sys.argv.pop(1) == "default"
signal.signal(signal.SIGINT, signal.default_int_handler if default else signal.SIG_IGN)
sys.argv[0] = "charflow"
runpy.run_module("charflow.cli.main", run_name="__main__")
"""


@pytest.mark.parametrize(("sigint", "code"), [("default", EXIT_INTERRUPTED), ("ignored", 0)])
def test_ctrl_c_ends_the_run_and_its_workers_quietly(tmp_path, sigint, code):
    # The small library on a 20 x 20 grid: a sweep of seconds, to interrupt in its middle.
    slews = ", ".join(f"{0.01 * 1.2**i:.4g}" for i in range(20))
    loads = ", ".join(f"{0.001 * 1.2**i:.4g}" for i in range(20))
    doc = SMALL.read_text(encoding="utf-8").replace(
        "slew = [0.01, 0.05, 0.2]\nload = [0.001, 0.005, 0.02]",
        f"slew = [{slews}]\nload = [{loads}]",
    )
    path = SMALL.with_name(f"_interrupted_{sigint}.toml")  # beside the original: its paths hold
    path.write_text(doc, encoding="utf-8")
    out = tmp_path / "out"
    command = [sys.executable, "-c", _RUN, sigint, "run", str(path), "--out", str(out)]
    try:
        with subprocess.Popen(
            [*command, "--jobs", "2", "--quiet"],
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
            start_new_session=True,  # its own process group, as a terminal's foreground command
        ) as run:
            try:
                ids = _started_workers(run.pid)
                time.sleep(0.5)  # into the sweep
                os.killpg(run.pid, signal.SIGINT)  # what Ctrl-C does: every process of the group
                _, stderr = run.communicate(timeout=120)
            finally:
                run.kill()
    finally:
        path.unlink()
    assert run.returncode == code, stderr
    assert ("charflow: interrupted" in stderr) == (code == EXIT_INTERRUPTED), stderr
    assert "Traceback" not in stderr and "worker process died" not in stderr, stderr
    assert _wait_ended(ids) == []
    with FolderLock(out):  # the folder is free again
        pass
