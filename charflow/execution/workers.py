"""Sweep chunks in local worker processes, and what happens when a worker dies.

The in-process simulator (libngspice) runs in worker processes, never in the driver, so a
crash of the library, a run that does not stop when halted (the worker then ends itself,
``EXIT_HUNG``) or a worker killed from outside ends that worker only. Each worker writes every
outcome to a journal file as it is made. When a worker dies the driver keeps what the journals
hold, re-runs each point that was in flight alone through the subprocess backend (one
``ngspice -b`` per run: a crash or a hang there costs one run and names the point), and sends
the points not yet started to fresh workers.

joblib's process pool (loky) stops every worker when one dies, so the points in flight on all
of them are re-run alone: the pool cannot say which worker died first.
"""

from __future__ import annotations

import contextlib
import logging
import os
import pickle
import tempfile
from collections.abc import Generator, Mapping, Sequence
from concurrent.futures import Executor, as_completed
from concurrent.futures.process import BrokenProcessPool
from dataclasses import replace

from charflow.config.library import LibraryConfig
from charflow.measurement import registry
from charflow.records.errors import OutputError, SimulatorError, SimulatorHungError
from charflow.records.outcomes import Failure, Outcome
from charflow.records.points import Work
from charflow.simulation.netlist import Deck

log = logging.getLogger("charflow")

EXIT_HUNG = 70  # exit status of a worker whose simulator did not stop when halted
# Rounds in a row in which workers died before finishing or starting a single point: the
# workers cannot start (a broken installation), and more rounds would not help.
FRUITLESS_ROUNDS = 2


def _work(
    config: LibraryConfig, deck: Deck, points: tuple[Work, ...], journal: str
) -> list[Outcome]:
    """A worker's task: measure ``points``, writing each outcome to ``journal`` at once."""
    try:
        fh = open(journal, "wb")  # noqa: SIM115 - closed below
    except OSError:
        fh = None  # no journal (a full temporary folder): a death then costs the whole chunk

    def done(outcome: Outcome) -> None:
        if fh is not None:
            pickle.dump(outcome, fh)
            fh.flush()  # into the kernel: it survives this process, whatever kills it

    try:
        return registry.measure_chunk(config, deck, points, done)
    except SimulatorHungError:
        # The simulator is still running in its thread and cannot be reset: end the process,
        # so the pool starts a fresh one and the driver re-runs the point alone.
        os._exit(EXIT_HUNG)
    finally:
        if fh is not None:
            fh.close()


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
    config: LibraryConfig, decks: Mapping[str, Deck], tasks: Sequence[tuple[Work, ...]], jobs: int
) -> Generator[list[Outcome], None, None]:
    """Outcomes of every chunk on ``jobs`` worker processes, in completion order; every point
    gets one outcome even when workers die (see the module's description)."""
    # joblib's own factory of its process pool, so that joblib.Parallel elsewhere in the
    # process (the report's plots) shares the pool rather than finding one it cannot use.
    from joblib.executor import get_memmapping_executor

    pending = list(tasks)
    fruitless = 0
    with _journal_folder() as scratch:
        round_ = 0
        while pending:
            # A pool broken by a dead worker is replaced by a fresh one here.
            executor = get_memmapping_executor(jobs)
            lost, death = yield from _run_round(executor, config, decks, pending, scratch, round_)
            if death is None:
                return
            pending, in_flight, kept = yield from _salvage(lost)
            fruitless = fruitless + 1 if not (kept or in_flight) else 0
            if fruitless >= FRUITLESS_ROUNDS:
                raise SimulatorError(
                    f"worker processes keep dying before they measure a point ({death})"
                ) from death
            log.warning(
                "a worker process died (%s); kept %d finished points, re-running the %d in "
                "flight alone through ngspice -b: %s",
                _why(death),
                kept,
                len(in_flight),
                "; ".join(f"{p.cell} {p.label}" for p in in_flight) or "none",
            )
            if in_flight:
                yield run_alone(config, decks, in_flight)
            round_ += 1


def _journal_folder() -> tempfile.TemporaryDirectory[str]:
    """A temporary folder for the workers' journals (removed when the sweep ends)."""
    try:
        return tempfile.TemporaryDirectory(prefix="charflow-journal-")
    except OSError as exc:
        raise OutputError(
            f"cannot make the workers' journal folder in {tempfile.gettempdir()}: {exc}"
        ) from exc


def _run_round(
    executor: Executor,
    config: LibraryConfig,
    decks: Mapping[str, Deck],
    pending: Sequence[tuple],
    scratch: str,
    round_: int,
) -> Generator[list, None, tuple[list[tuple[tuple, str]], BrokenProcessPool | None]]:
    """Yield the outcomes of each chunk of ``pending`` that finished; return the chunks lost
    to a dead worker (each with its journal) and the pool's account of the death."""
    futures = {}
    for i, task in enumerate(pending):
        path = os.path.join(scratch, f"{round_}-{i}.pickle")
        future = executor.submit(_work, config, decks[task[0].cell], task, path)
        futures[future] = (task, path)
    lost, death = [], None
    try:
        for future in as_completed(futures):
            task, path = futures[future]
            try:
                batch = future.result()
            except BrokenProcessPool as exc:
                lost.append((task, path))
                death = exc
                continue
            with contextlib.suppress(FileNotFoundError):  # a worker without one
                os.unlink(path)
            yield batch
    finally:
        # Closed early (the caller stopped): chunks not yet started are not started.
        for future in futures:
            future.cancel()
    return lost, death


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


def _why(death: BaseException) -> str:
    """loky's account of a dead worker, without its advice on memory leaks."""
    text = str(death)
    codes = text.find("The exit codes of the workers are")
    if codes >= 0:
        return text[codes:].splitlines()[0].strip().rstrip(".")
    return text.split(".")[0]


def default_jobs() -> int:
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 1
