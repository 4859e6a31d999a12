"""The local worker processes: forked from the driver, kept for the process's later sweeps.

A worker is a copy of the driver made by ``fork``: Python, numpy and charflow's modules are
already loaded in it, so a pool is ready in milliseconds, where a fresh interpreter per worker
(joblib's loky pool, used before) spent about 0.3 s of processor time each importing them and
started two helper processes besides (docs/history/2026-12-forkpool.md). The simulator is never
loaded in the driver (``workers``), so a worker loads its own, as before.
A driver running other Python threads (charflow used as a library in a threaded program)
spawns fresh interpreters instead (``start_method``); what follows holds for both.

What a forked worker must not keep of the driver's, it drops as it starts (``_started``):
- the output folder's lock (``lock.forget_inherited``): a copy of the descriptor would hold the
  folder after the driver released it (a spawned worker has none);
- the simulator's caches (``SESSION.forget``), which a driver that measured a point itself
  would otherwise pass on;
- Ctrl-C: the terminal sends SIGINT to every process of the command; a worker ends at once and
  quietly, and the driver reports the interrupt (a driver that ignores SIGINT, as a background
  job of a shell without job control does, has workers that ignore it too);
- a dead driver: a worker whose driver was killed ends itself (``_orphan_watch``), so no
  orphan runs on or holds the folder.
The driver's result store (SQLite) is not touched by a worker: it ends with ``os._exit``
(multiprocessing's fork start), which runs no finalizer on what it inherited.

A dead worker breaks the pool (concurrent.futures stops every worker of it, as loky did): the
caller sees ``BrokenExecutor`` and asks for a new pool (``discard``, then ``executor``).
"""

from __future__ import annotations

import atexit
import multiprocessing
import multiprocessing.connection
import os
import signal
import threading
from concurrent.futures import Executor, ProcessPoolExecutor

from charflow.execution import lock
from charflow.simulation.session import SESSION

EXIT_INTERRUPTED = 130  # 128 + SIGINT, as the command itself exits on Ctrl-C
EXIT_ORPHANED = 71  # a worker whose driver is gone

# This process's pool (at most one) and how its workers started ("fork" or "spawn").
_POOLS: list[tuple[ProcessPoolExecutor, str]] = []


def executor(jobs: int | None = None) -> Executor:
    """This process's pool of ``jobs`` workers, made on first use and kept for later sweeps;
    ``jobs`` None: the pool there is, whatever its size, else one of a single worker. A pool
    of another size, or one a dead worker broke, is replaced."""
    if _POOLS:
        pool = _POOLS[0][0]
        if not _is_broken(pool) and jobs in (None, _size(pool)):
            return pool
        discard(pool)
    how = start_method()
    pool = ProcessPoolExecutor(
        jobs or 1, mp_context=multiprocessing.get_context(how), initializer=_started
    )
    _POOLS.append((pool, how))
    return pool


def start_method() -> str:
    """How a new pool's workers start: forked while this process runs a single Python thread,
    else spawned (fresh interpreters, a third of a second each): a fork copies no other
    thread, and a lock one of them held would stay held in the copy for ever (Python 3.12
    warns of such a fork). charflow starts no thread of its own before its pool (``discard``
    waits for a replaced pool's); a library user's threads make the spawn."""
    return "fork" if threading.active_count() == 1 else "spawn"


def method() -> str | None:
    """How the current pool's workers started; None without a pool."""
    return _POOLS[0][1] if _POOLS else None


def discard(pool: Executor) -> list[int | None]:
    """Stop ``pool`` (a broken one's workers are already stopped, a replaced one's idle) and
    wait for its thread to end, so that the next pool may fork; the next ``executor`` call
    makes one. Return its workers' exit codes, each a negative signal number for a worker
    killed by one (None: unknown)."""
    _POOLS[:] = [entry for entry in _POOLS if entry[0] is not pool]
    # concurrent.futures keeps its processes private and drops them at shutdown; their codes
    # are read after it, once its thread has reaped every one.
    processes = list((getattr(pool, "_processes", None) or {}).values())
    pool.shutdown(wait=True, cancel_futures=True)
    return [p.exitcode for p in processes]


def worker_ids() -> list[int]:
    """Process ids of the current pool's workers (none before its first task)."""
    if not _POOLS:
        return []
    return sorted(getattr(_POOLS[0][0], "_processes", None) or {})


def _is_broken(pool: ProcessPoolExecutor) -> bool:
    # concurrent.futures keeps it private; a broken pool refuses every new task.
    return bool(getattr(pool, "_broken", False))


def _size(pool: ProcessPoolExecutor) -> int:
    return int(getattr(pool, "_max_workers", 0))


@atexit.register
def _stop_all() -> None:
    # While the interpreter still works: a pool collected during its teardown reports errors.
    for pool, _ in _POOLS:
        pool.shutdown(wait=True, cancel_futures=True)
    _POOLS.clear()


def _started() -> None:
    """A worker's first act: drop what it must not keep of the driver (module description)."""
    if signal.getsignal(signal.SIGINT) is not signal.SIG_IGN:  # as the driver: ignored stays so
        signal.signal(signal.SIGINT, _interrupted)
    lock.forget_inherited()
    SESSION.forget()
    parent = multiprocessing.parent_process()
    if parent is not None:
        threading.Thread(target=_orphan_watch, args=(parent.sentinel,), daemon=True).start()


def _interrupted(signum: int, frame: object) -> None:
    os._exit(EXIT_INTERRUPTED)


def _orphan_watch(sentinel: int) -> None:
    """End this worker once its driver has ended (the sentinel is readable then)."""
    multiprocessing.connection.wait([sentinel])
    os._exit(EXIT_ORPHANED)
