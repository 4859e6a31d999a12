"""Planning sweep points from the cells' functions, and running them in parallel.

``plan`` turns every cell into timing arcs (one per input → output pair the output depends
on), every arc into its sensitizing side-input states, and every state into points over
input edge × slew × load. ``run`` sends the points to workers in chunks of one cell each,
a worker kept on the cells it has read (``workers``), so a cell's testbench is read by as few
workers as the load balance allows; with a result store it simulates only the points the
store does not hold.
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Generator, Iterable, Iterator, Mapping
from typing import TYPE_CHECKING

from charflow.config.library import LibraryConfig
from charflow.execution.store import Store, keyring
from charflow.execution.workers import Reads, Stop, default_jobs, measured, run_chunks
from charflow.records.lazy import deferred
from charflow.records.outcomes import Failure, Outcome, PathMeasurement
from charflow.records.points import FunctionPoint, TimingPoint, TogglePoint, Work
from charflow.simulation import plausible
from charflow.simulation.netlist import Deck, build_deck

# A Dask cluster's side (and the measurers it imports) loads only for a run on one.
if TYPE_CHECKING:
    from charflow.execution import cluster
else:
    cluster = deferred("charflow.execution.cluster")

CHUNK = 25  # points per worker task: large enough to amortise the deck load


def work(points: Iterable[Work]) -> int:
    """The simulations ``points`` take, roughly (the sum of their ``cost``): the unit of
    progress."""
    return sum(p.cost for p in points)


def _weight(p: Work) -> float:
    if not isinstance(p, TimingPoint | TogglePoint):
        return p.cost
    # Within a kind, a slower ramp and a larger load make a longer run (power's toggles too).
    return p.cost * (1.0 + p.load * 1e12 + p.slew * 1e9)


def chunks(points: Iterable[Work], size: int = CHUNK) -> list[tuple[Work, ...]]:
    """Consecutive points of one cell and kind, about ``size`` simulations each. Function
    checks first: they are cheap, and a cell that fails its check stops the run (``run``'s
    ``until``) before its other work is spent. Then the costliest first, so the longest tasks
    start early and the short ones fill in at the end."""
    groups: dict[tuple[str, type], list[Work]] = {}
    for p in points:
        groups.setdefault((p.cell, type(p)), []).append(p)
    out = []
    for group in groups.values():
        step = max(1, size // group[0].cost)
        for i in range(0, len(group), step):
            out.append(tuple(group[i : i + step]))
    out.sort(key=lambda c: (not isinstance(c[0], FunctionPoint), -sum(_weight(p) for p in c)))
    return out


def run(
    config: LibraryConfig,
    points: Iterable[Work],
    *,
    jobs: int | None = None,
    on_result: Callable[[Outcome], None] | None = None,
    store: Store | None = None,
    on_stored: Callable[[tuple], None] | None = None,
    scheduler: str | None = None,
    decks: Mapping[str, Deck] | None = None,
    reads: Reads | None = None,
    until: Callable[[Outcome], bool] | None = None,
) -> Iterator[Outcome]:
    """Simulate and measure ``points``; yield one outcome (a measurement or a Failure) per point,
    or, once ``until`` is true of an outcome, of the points started by then (local workers:
    the chunks in flight finish and are stored, no other starts; a cluster, which holds every
    chunk from the start, stops at once).

    Outcomes come in completion order; ``on_result`` is a hook for progress display. With a
    ``store``, the points whose key is stored come from it first, unsimulated (``on_stored``
    gets them together, before ``on_result`` gets each), and every new measurement is stored
    as it arrives. With a Dask ``scheduler`` address the points run on that cluster, otherwise
    on ``jobs`` local worker processes. ``reads`` tallies the testbenches the simulators read
    (local runs; a cluster's workers are not counted).
    """
    points = list(points)
    # The testbenches the caller built are used as they are (a stage passes on what it made).
    given = decks or {}
    built = {
        c: given.get(c) or build_deck(config, config.cell(c)) for c in {p.cell for p in points}
    }
    plausible.announce(config, built)
    stop = Stop()
    ring = None
    if store is not None:
        ring = keyring(config, built, scheduler)
        found = store.lookup(ring, points)
        if on_stored is not None:
            on_stored(tuple(found.values()))
        yield from _told(found.values(), on_result, stop, until)
        points = [p for p in points if p not in found]
    if not points or stop.asked:
        return  # all from the store (no worker pool started), or stopped
    results = _executed(
        config, built, chunks(points), jobs or default_jobs(), reads, stop, scheduler
    )
    # Closed as soon as the loop ends early (a store that cannot take a row, an interrupt): the
    # workers stop and their journals go now, not when the garbage collector gets to them.
    with contextlib.closing(results):
        for batch in results:
            # A path run (``analysis.paths``) is not a library's result: never stored.
            if store is not None and ring is not None:
                kept = (o for o in batch if not isinstance(o, Failure | PathMeasurement))
                store.put_all(ring, kept)
            yield from _told(batch, on_result, stop, until)
            if stop.asked and scheduler is not None:
                return


def _told(
    outcomes: Iterable[Outcome],
    on_result: Callable[[Outcome], None] | None,
    stop: Stop,
    until: Callable[[Outcome], bool] | None,
) -> Iterator[Outcome]:
    """Each of ``outcomes``, handed to ``on_result`` first; ``stop`` asked once ``until`` is
    true of one (the caller's loop goes on to the end of what it holds)."""
    for outcome in outcomes:
        if on_result is not None:
            on_result(outcome)
        yield outcome
        stop.asked = stop.asked or (until is not None and until(outcome))


def _executed(
    config: LibraryConfig,
    built: Mapping[str, Deck],
    tasks: list[tuple[Work, ...]],
    jobs: int,
    reads: Reads | None,
    stop: Stop,
    scheduler: str | None,
) -> Generator[list[Outcome], None, None]:
    """The chunks' outcomes, batch by batch, from where they run."""
    if scheduler is not None:
        return cluster.map_chunks(scheduler, config, built, tasks)
    if config.simulation.backend == "subprocess" and (jobs == 1 or len(tasks) <= 1):
        # Each run is its own ngspice process already: a crash cannot take this one down.
        return _here(config, built, tasks, reads, stop)
    # Worker processes, not this one, run the simulator: a crash of the shared library then
    # costs only the points in flight, which are re-run alone.
    return run_chunks(config, built, tasks, jobs, reads, stop)


def _here(
    config: LibraryConfig,
    decks: Mapping[str, Deck],
    tasks: Iterable[tuple[Work, ...]],
    reads: Reads | None,
    stop: Stop,
) -> Generator[list[Outcome], None, None]:
    """The chunks measured in this process (the subprocess backend: ngspice runs apart), until
    ``stop`` is asked."""
    for task in tasks:
        if stop.asked:
            return
        done = measured(config, decks[task[0].cell], task)
        if reads is not None:
            reads.add(task[0].cell, done.reads, done.read_seconds)
        yield done.outcomes
