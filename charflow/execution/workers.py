"""Sweep chunks in local worker processes, and what happens when a worker dies.

The in-process simulator (libngspice) runs in worker processes, never in the driver, so a
crash of the library, a run that does not stop when halted (the worker then ends itself,
``EXIT_HUNG``) or a worker killed from outside ends that worker only. Each worker writes every
outcome to a journal file as it is made. When a worker dies the driver keeps what the journals
hold, re-runs each point that was in flight alone through the subprocess backend (one
``ngspice -b`` per run: a crash or a hang there costs one run and names the point), and sends
the points not yet started to fresh workers.

The pool (``pool``: workers forked from the driver) stops every worker when one dies, so the
points in flight on all of them are re-run alone: the pool cannot say which worker died first.

Reading a cell's testbench parses its models, which takes seconds with a foundry's model file,
and a worker keeps what it has read (``backends.MAX_CIRCUITS``). So each task offers every
worker the driver knows (by process id) the chunk it should take next, and one for a worker
not known yet; the worker that takes the task runs its own and the rest go back (``_offered``).
A worker's chunk is of a cell it has read already; else of a cell no worker has read, the cell
with the most work left first; else of the cell with the most work left, if reading its
testbench costs less than the help saves, measured on the chunks so far (``_Queue``). A cell
is then read by a second worker only where the load balance needs it, never twice by one.
"""

from __future__ import annotations

import contextlib
import logging
import os
import pickle
import shutil
import signal
import tempfile
import time
from collections import deque
from collections.abc import Callable, Generator, Iterable, Iterator, Mapping, Sequence
from concurrent.futures import FIRST_COMPLETED, BrokenExecutor, Executor, Future, wait
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, TypeVar

from charflow.config.library import LibraryConfig, Simulation
from charflow.records.errors import OutputError, SimulatorError, SimulatorHungError
from charflow.records.lazy import deferred
from charflow.records.outcomes import Failure, Outcome
from charflow.records.points import Work
from charflow.simulation.netlist import Deck
from charflow.simulation.session import SESSION

# A dead worker's broken pool is caught as BrokenExecutor, the base of BrokenProcessPool:
# concurrent.futures.process (and multiprocessing) load with the pool, only in a run that
# starts one.
#
# The measurers load in the process that measures (a worker; the driver only when it measures
# a point itself), not in the one that plans, schedules and writes.
if TYPE_CHECKING:
    from charflow.execution import pool
    from charflow.measurement import registry
else:
    pool = deferred("charflow.execution.pool")
    registry = deferred("charflow.measurement.registry")

log = logging.getLogger("charflow")
T = TypeVar("T")

EXIT_HUNG = 70  # exit status of a worker whose simulator did not stop when halted
# Rounds in a row in which workers died before finishing or starting a single point: the
# workers cannot start (a broken installation), and more rounds would not help.
FRUITLESS_ROUNDS = 2
# Tasks in flight per worker: the next waits in the pool's queue while one runs, so a worker
# does not idle while the driver takes its result and sends it more. Every task offers each
# known worker its own chunk, so whichever worker takes it keeps to its cells.
AHEAD = 2


@dataclass
class Reads:
    """The testbenches a sweep's simulators read (each read parses the cell's models), as the
    chunks report them; one tally may serve several sweeps (a run's check and its sweep)."""

    count: int = 0
    seconds: float = 0.0  # wall time of the reads, summed over the workers
    cells: dict[str, int] = field(default_factory=dict)  # reads per cell

    def add(self, cell: str, count: int, seconds: float) -> None:
        self.count += count
        self.seconds += seconds
        if count:
            self.cells[cell] = self.cells.get(cell, 0) + count


@dataclass
class Stop:
    """Set by a sweep's caller that wants no further chunk started (``sweep.run``'s ``until``):
    the chunks running finish and their outcomes come as usual; the others never start (a task
    already in a worker's queue finds the ``STOPPED`` file in the journal folder and returns)."""

    asked: bool = False


STOPPED = "stopped"  # in the journal folder once a sweep's caller stopped it (``Stop``)


@dataclass(frozen=True, slots=True)
class Done:
    """A chunk measured by a worker: its outcomes, which process measured it and the
    testbench reads it took."""

    outcomes: list[Outcome]
    pid: int
    reads: int
    read_seconds: float
    seconds: float = 0.0  # wall time of the chunk in the worker, its reads included
    chosen: int | None = 0  # which of the offered chunks it is (``_offered``); None: none


def measured(config: LibraryConfig, deck: Deck, points: tuple[Work, ...]) -> Done:
    """``points`` measured in this process (``registry.measure_chunk``), its reads counted."""
    start = time.perf_counter()
    before, before_s = SESSION.reads()
    outcomes = registry.measure_chunk(config, deck, points)
    after, after_s = SESSION.reads()
    seconds = time.perf_counter() - start
    return Done(outcomes, os.getpid(), after - before, after_s - before_s, seconds)


# A chunk offered to one worker process (its id; None: any worker not known yet).
Offer = tuple[int | None, Deck, tuple[Work, ...]]


def _offered(
    config: LibraryConfig,
    offers: tuple[Offer, ...],
    journals: list[str],
    known: frozenset[int] | None,
    stopped: str,
) -> Done:
    """A worker's task: the chunk offered to this process, else, to a process the driver does
    not know yet, the one offered to any (journalled in that offer's file). A known worker
    offered nothing (no chunk worth its read) returns at once (``Done.chosen`` None), unless
    ``known`` is None (a forced task): then it takes the first chunk, whoever it was meant for
    (the driver's knowledge may name a worker the pool has since replaced, e.g. one that
    stopped after its idle timeout; offering the last chunk to it for ever would spin). Once
    the file ``stopped`` exists, or its folder is gone (the sweep has ended), it takes none."""
    pid = os.getpid()
    if os.path.exists(stopped) or not os.path.isdir(os.path.dirname(stopped)):
        return Done([], pid, 0, 0.0, 0.0, None)
    wants = (pid, None) if known is None or pid not in known else (pid,)
    for want in wants:
        for i, (to, deck, points) in enumerate(offers):
            if to == want:
                return replace(_work(config, deck, points, journals[i]), chosen=i)
    if known is None and offers:
        return replace(_work(config, offers[0][1], offers[0][2], journals[0]), chosen=0)
    return Done([], pid, 0, 0.0, 0.0, None)


def _work(config: LibraryConfig, deck: Deck, points: tuple[Work, ...], journal: str) -> Done:
    """A worker's task: measure ``points``, writing each outcome to ``journal`` at once."""
    try:
        fh = open(journal, "wb")  # noqa: SIM115 - closed below
    except OSError:
        fh = None  # no journal (a full temporary folder): a death then costs the whole chunk

    def done(outcome: Outcome) -> None:
        if fh is not None:
            pickle.dump(outcome, fh)
            fh.flush()  # into the kernel: it survives this process, whatever kills it

    start = time.perf_counter()
    before, before_s = SESSION.reads()
    try:
        outcomes = registry.measure_chunk(config, deck, points, done)
        after, after_s = SESSION.reads()
        seconds = time.perf_counter() - start
        return Done(outcomes, os.getpid(), after - before, after_s - before_s, seconds)
    except SimulatorHungError:
        # The simulator is still running in its thread and cannot be reset: end the process,
        # so the pool starts a fresh one and the driver re-runs the point alone.
        os._exit(EXIT_HUNG)
    finally:
        if fh is not None:
            fh.close()


def warm(simulation: Simulation) -> bool:
    """A worker's first task when its pool starts ahead of the sweep (``start``): the
    measurers imported and the simulator loaded, while the driver still imports and plans
    (a worker forked from the driver has what the driver has loaded, not these)."""
    SESSION.backend(simulation)
    return callable(registry.measure_chunk)  # the measurers load here, not in the first chunk


def start(simulation: Simulation, jobs: int) -> None:
    """Start the sweep's pool of ``jobs`` worker processes now and warm them (``warm``),
    without waiting: their start-up (the measurers, PySpice, the shared library) then
    overlaps the driver's own. For a caller that knows a pool will be needed:
    never when the store may serve the run wholly, which must start none. Nothing is started
    where the sweep would start no pool (the subprocess backend on one worker)."""
    if simulation.backend == "subprocess" and jobs == 1:
        return
    executor = pool.executor(jobs)
    # One task per worker, though which worker takes which is the pool's choice: a worker
    # that takes none warms in its first chunk, as without a start. A warm-up that fails
    # (no shared library) is not reported here: the sweep's first chunk meets it again.
    for _ in range(jobs):
        executor.submit(warm, simulation)


def in_worker(function: Callable[..., T], *args: object, jobs: int | None = None) -> T:
    """``function(*args)`` in one of the sweep's worker processes: where the simulator may
    run (the driver parses no model). ``jobs``: the pool's size where one is to be made (the
    sweep's, so that it serves the sweep after); None: the pool there is, else one worker. A
    worker that dies is a SimulatorError."""
    executor = pool.executor(jobs)
    try:
        return executor.submit(function, *args).result()
    except BrokenExecutor as exc:
        raise SimulatorError(
            f"a worker process died ({_discard_broken(executor)}); if the ngspice shared "
            "library crashed, backend 'subprocess' in [simulation] runs each simulation in a "
            "process of its own"
        ) from exc


def read_journal(path: str) -> list[Outcome] | None:
    """The outcomes a worker wrote to ``path``; None if it never started that task."""
    outcomes: list[Outcome] = []
    try:
        fh = open(path, "rb")  # noqa: SIM115 - closed below; a missing file means "not started"
    except FileNotFoundError:
        return None
    with fh:
        while True:
            try:
                outcomes.append(pickle.load(fh))
            except EOFError:
                break
            except (pickle.UnpicklingError, ValueError, TypeError, AttributeError):
                break  # the record being written when the worker died
    return outcomes


def run_alone(
    config: LibraryConfig, decks: Mapping[str, Deck], points: Sequence[Work]
) -> list[Outcome]:
    """Measure each point on its own through the subprocess backend, in this process."""
    alone = replace(config, simulation=replace(config.simulation, backend="subprocess"))
    out: list[Outcome] = []
    for point in points:
        (outcome,) = registry.measure_chunk(alone, decks[point.cell], (point,))
        if isinstance(outcome, Failure):
            outcome = replace(
                outcome,
                reason="a worker process died while this point was in flight; run alone "
                f"through ngspice -b it failed too: {outcome.reason}",
            )
        out.append(outcome)
    return out


def run_chunks(
    config: LibraryConfig,
    decks: Mapping[str, Deck],
    tasks: Sequence[tuple[Work, ...]],
    jobs: int,
    reads: Reads | None = None,
    stop: Stop | None = None,
) -> Generator[list[Outcome], None, None]:
    """Outcomes of every chunk on ``jobs`` worker processes, in completion order; every point
    gets one outcome even when workers die (see the module's description), unless ``stop`` is
    asked: then the chunks started finish and no other starts. ``reads`` tallies the
    testbenches the workers read."""
    pending = list(tasks)
    fruitless = 0
    tally = reads if reads is not None else Reads()
    stop = stop if stop is not None else Stop()
    with _journal_folder() as scratch:
        round_ = 0
        while pending:
            # A pool broken by a dead worker is replaced by a fresh one here.
            executor = pool.executor(jobs)
            queue = _Queue(pending, decks, _known(executor))
            lost, death = yield from _run_round(
                executor, config, queue, jobs, (scratch, round_), tally, stop
            )
            if death is None:
                return
            why = _discard_broken(executor)
            salvaged, in_flight, kept = yield from _salvage(lost)
            if stop.asked:
                return  # what the journals held is kept; nothing more starts
            pending = [*salvaged, *queue.rest()]
            fruitless = fruitless + 1 if not (kept or in_flight) else 0
            if fruitless >= FRUITLESS_ROUNDS:
                raise SimulatorError(
                    f"worker processes keep dying before they measure a point ({why})"
                ) from death
            log.warning(
                "a worker process died (%s); kept %d finished points, re-running the %d in "
                "flight alone through ngspice -b: %s",
                why,
                kept,
                len(in_flight),
                "; ".join(f"{p.cell} {p.label}" for p in in_flight) or "none",
            )
            if in_flight:
                yield run_alone(config, decks, in_flight)
            round_ += 1


@dataclass
class _Known:
    """What the driver knows of its pool's workers, which outlive a sweep (the driver
    stage's, then the run's): the testbenches (``Deck.key``) each process has read, by process
    id, and per testbench the seconds of a read and of work per unit of cost, measured."""

    ident: int = 0  # id() of the pool described; a new pool starts afresh
    held: dict[int, set[str]] = field(default_factory=dict)
    read_time: dict[str, float] = field(default_factory=dict)
    unit_time: dict[str, float] = field(default_factory=dict)


_KNOWN = _Known()


def _known(executor: Executor) -> _Known:
    global _KNOWN
    if _KNOWN.ident != id(executor):
        _KNOWN = _Known(id(executor))
    return _KNOWN


class _Queue:
    """The chunks not yet started, by cell, each cell's in the order given (its function
    check, then the costliest first: ``sweep.chunks``), and which worker to offer which (see
    the module's description)."""

    def __init__(
        self,
        tasks: Iterable[tuple[Work, ...]],
        decks: Mapping[str, Deck],
        known: _Known,
    ) -> None:
        self.cells: dict[str, deque[tuple[Work, ...]]] = {}
        for task in tasks:
            self.cells.setdefault(task[0].cell, deque()).append(task)
        self.left = {c: sum(p.cost for t in q for p in t) for c, q in self.cells.items()}
        self.decks = decks
        self.keys = {c: decks[c].key for c in self.cells}
        self.known = known
        self.held = known.held
        self.started: set[str] = set()

    def take(self, pid: int | None, force: bool = False) -> tuple[Work, ...] | None:
        """The next chunk for worker ``pid`` (None: a worker not known yet): of a cell it has
        read, else of one no worker has read or started, else of the cell with the most work
        left, unless reading that cell costs more than the help saves (``force``: even so);
        None when no chunk is (worth) taking."""
        mine = self.held.get(pid, set()) if pid is not None else set()
        others = {k for p, keys in self.held.items() if p != pid for k in keys}
        open_ = [c for c, q in self.cells.items() if q]
        own = [c for c in open_ if self.keys[c] in mine]
        fresh = [c for c in open_ if c not in self.started and self.keys[c] not in others]
        choice = own or fresh or open_
        if not choice:
            return None
        cell = max(choice, key=lambda c: self.left[c])
        if not (own or fresh or force or self._worth_reading(cell)):
            return None
        task = self.cells[cell].popleft()
        self.left[cell] -= sum(p.cost for p in task)
        self.started.add(cell)
        return task

    def _worth_reading(self, cell: str) -> bool:
        """Whether one more worker on ``cell`` ends it sooner than its holders alone would,
        its read of the testbench counted (unmeasured: yes)."""
        key = self.keys[cell]
        read, unit = self.known.read_time.get(key), self.known.unit_time.get(key)
        if read is None or unit is None:
            return True
        holders = sum(1 for keys in self.held.values() if key in keys)
        alone = self.left[cell] * unit / max(1, holders)
        return read + alone * holders / (holders + 1) < alone

    def offers(self, force: bool = False) -> tuple[Offer, ...]:
        """A chunk for each worker known (the one it should take next; a known worker offered
        none takes none) and one for any other (a fresh worker of the pool); each chunk
        offered once."""
        offers: list[Offer] = []
        for pid in (*self.held, None):
            task = self.take(pid, force)
            if task is not None:
                offers.append((pid, self.decks[task[0].cell], task))
        return tuple(offers)

    def give_back(self, task: tuple[Work, ...]) -> None:
        """A chunk offered but not taken goes back to the front of its cell's queue."""
        cell = task[0].cell
        self.cells[cell].appendleft(task)
        self.left[cell] += sum(p.cost for p in task)

    def done(self, cell: str, chunk: tuple[Work, ...], done: Done) -> None:
        """Worker ``done.pid`` holds ``cell``'s testbench now; what its chunk took."""
        key = self.keys[cell]
        self.held.setdefault(done.pid, set()).add(key)
        if done.reads:
            self.known.read_time[key] = done.read_seconds / done.reads
        cost = sum(p.cost for p in chunk)
        if cost:
            self.known.unit_time[key] = max(0.0, done.seconds - done.read_seconds) / cost

    def rest(self) -> list[tuple[Work, ...]]:
        return [t for q in self.cells.values() for t in q]


@contextlib.contextmanager
def _journal_folder() -> Iterator[str]:
    """A temporary folder for the workers' journals, removed when the sweep ends; a task
    still queued in a worker then takes no chunk (``_offered``). One already past that check
    as a sweep closes early (an error) opens its journal by the folder's name: the folder is
    renamed before it is emptied, so that journal cannot appear in it midway (the task gets
    none, which only a death would need)."""
    try:
        folder = tempfile.mkdtemp(prefix="charflow-journal-")
    except OSError as exc:
        raise OutputError(
            f"cannot make the workers' journal folder in {tempfile.gettempdir()}: {exc}"
        ) from exc
    try:
        yield folder
    finally:
        gone = f"{folder}-ended"
        with contextlib.suppress(OSError):
            os.rename(folder, gone)
            folder = gone
        shutil.rmtree(folder, ignore_errors=True)  # never in the way of the sweep's own error


def _run_round(
    executor: Executor,
    config: LibraryConfig,
    queue: _Queue,
    jobs: int,
    journals: tuple[str, int],
    reads: Reads,
    stop: Stop,
) -> Generator[list, None, tuple[list[tuple[tuple, str]], BrokenExecutor | None]]:
    """Yield the outcomes of each chunk of ``queue`` that finished, ``AHEAD`` tasks in flight
    per worker (none submitted once ``stop`` is asked); return the chunks lost to a dead worker
    (each with its journal) and the pool's account of the death. Chunks never started stay in
    ``queue``."""
    scratch, round_ = journals
    stopped = os.path.join(scratch, STOPPED)
    futures: dict[Future[Done], tuple[tuple[Offer, ...], list[str]]] = {}

    def submit(force: bool = False) -> None:
        if stop.asked:
            return
        offers = queue.offers(force)
        if offers:
            # A journal per offer: the one written names the chunk the worker took.
            paths = [
                os.path.join(scratch, f"{round_}-{len(futures)}-{i}-{time.monotonic_ns()}")
                for i in range(len(offers))
            ]
            known = None if force else frozenset(queue.held)
            task = executor.submit(_offered, config, offers, paths, known, stopped)
            futures[task] = (offers, paths)

    for _ in range(AHEAD * jobs):
        submit()
    lost: list[tuple[tuple, str]] = []
    death = None
    try:
        while futures:
            finished, _ = wait(futures, return_when=FIRST_COMPLETED)
            for future in finished:
                offers, paths = futures.pop(future)
                try:
                    done = future.result()
                except BrokenExecutor as exc:
                    lost += [(task, path) for (_, _, task), path in zip(offers, paths, strict=True)]
                    death = exc
                    continue
                _taken(queue, reads, offers, paths, done)
                if death is None and done.chosen is not None:
                    submit()  # for the worker that is free now (one that declined stays idle)
                yield done.outcomes
                if stop.asked and not os.path.exists(stopped):
                    _mark(stopped)  # the tasks queued in the workers start nothing now
            if death is None and not futures and queue.rest():
                submit(force=True)  # no worker would take what is left: the first free does
    finally:
        # Closed early (the caller stopped, or an error): chunks not yet started are not
        # started; those already queued in a worker find the journal folder gone (``_offered``).
        for future in futures:
            future.cancel()
    return lost, death


def _taken(
    queue: _Queue, reads: Reads, offers: tuple[Offer, ...], paths: list[str], done: Done
) -> None:
    """A finished task's account: the offers its worker declined go back to ``queue``; the
    chunk it took is done (its journal, no longer needed, removed; its reads counted)."""
    for i, (_, _, task) in enumerate(offers):
        if i != done.chosen:
            queue.give_back(task)
    if done.chosen is not None:
        with contextlib.suppress(FileNotFoundError):  # a worker without one
            os.unlink(paths[done.chosen])
        task = offers[done.chosen][2]
        queue.done(task[0].cell, task, done)
        reads.add(task[0].cell, done.reads, done.read_seconds)


def _mark(path: str) -> None:
    """An empty file at ``path``; none if it cannot be made (the queued tasks then run)."""
    with contextlib.suppress(OSError), open(path, "x"):
        pass


def _salvage(
    lost: Sequence[tuple[tuple, str]],
) -> Generator[list, None, tuple[list[tuple], list, int]]:
    """Yield what the journals of the lost chunks hold; return the chunks to send to fresh
    workers, the points that were in flight (to re-run alone) and how many outcomes were kept."""
    pending, in_flight, kept = [], [], 0
    for task, path in lost:
        outcomes = read_journal(path)
        if outcomes is None:
            pending.append(task)
            continue
        if outcomes:
            kept += len(outcomes)
            yield outcomes
        rest = task[len(outcomes) :]
        if rest:
            in_flight.append(rest[0])
        if rest[1:]:
            pending.append(rest[1:])
    return pending, in_flight, kept


def _discard_broken(executor: Executor) -> str:
    """A broken pool, discarded; its account of its workers' ends: each one's exit code or
    signal."""
    ends = [_end(code) for code in pool.discard(executor)]
    return "worker exits: " + (", ".join(ends) if ends else "unknown")


def _end(code: int | None) -> str:
    if code is None:
        return "still running"
    if code < 0:
        with contextlib.suppress(ValueError):
            return signal.Signals(-code).name
    return f"exit status {code}"


def default_jobs() -> int:
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 1
