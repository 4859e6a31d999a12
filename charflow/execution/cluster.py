"""Running sweep chunks on an existing Dask cluster (dask.distributed).

Workers only simulate and measure; they return outcomes, and the driver, which holds the
result store, writes them. Each worker process keeps its own simulator, as a joblib worker
does (``timing.backend_for``). libngspice allows one simulator per process, so tasks in one
worker process take turns; start workers with one thread each (see README, "Scale-out").
"""

from __future__ import annotations

import logging
import os
import threading
from collections.abc import Generator, Mapping, Sequence

from charflow.config.library import LibraryConfig
from charflow.execution.workers import EXIT_HUNG, run_alone
from charflow.measurement import registry
from charflow.records.errors import CharflowError, ClusterError, SimulatorHungError
from charflow.records.outcomes import Outcome
from charflow.records.points import Work
from charflow.simulation.netlist import Deck

log = logging.getLogger("charflow")

CONNECT_TIMEOUT = 30.0  # s to reach the scheduler

# One simulator per process: worker threads of one process must not drive it at once.
_SIMULATOR = threading.Lock()


def _measure(config: LibraryConfig, deck: Deck, points: tuple[Work, ...]) -> list[Outcome]:
    with _SIMULATOR:
        try:
            return registry.measure_chunk(config, deck, points)
        except SimulatorHungError:
            # As a local worker does (``workers``): the nanny starts a fresh process and the
            # scheduler sends the task elsewhere.
            os._exit(EXIT_HUNG)


def map_chunks(
    address: str,
    config: LibraryConfig,
    decks: Mapping[str, Deck],
    tasks: Sequence[tuple[Work, ...]],
) -> Generator[list[Outcome], None, None]:
    """Outcomes of every chunk, in completion order, computed on the cluster at ``address``."""
    try:
        from distributed import Client, as_completed
        from distributed.comm import resolve_address
        from distributed.scheduler import KilledWorker
    except ImportError as exc:
        raise ClusterError(
            "the Dask backend needs dask.distributed: pip install 'charflow[cluster]'"
        ) from exc
    # A malformed address is refused before a client exists: a client that failed half-way
    # keeps its event loop and stalls the interpreter's exit.
    try:
        resolve_address(address)
    except (OSError, ValueError) as exc:
        raise ClusterError(f"not a Dask scheduler address: {address} ({exc})") from exc
    try:
        client = Client(address, timeout=CONNECT_TIMEOUT, set_as_default=False)
    except (OSError, TimeoutError) as exc:
        raise ClusterError(f"cannot reach the Dask scheduler at {address}: {exc}") from exc
    with client:
        # The chunks are sorted longest first; a higher priority runs earlier.
        cells = {}
        for i, t in enumerate(tasks):
            future = client.submit(_measure, config, decks[t[0].cell], t, pure=False, priority=-i)
            cells[future] = t[0].cell
        chunks = dict(zip(cells, tasks, strict=True))
        for future in as_completed(list(cells), loop=client.loop):
            try:
                yield future.result()
            except CharflowError:
                raise
            except KilledWorker as exc:
                # The scheduler already retried the chunk on fresh workers: its points run
                # alone here, through ngspice -b, where a crash costs one run.
                log.warning(
                    "the cluster gave up on a chunk of %s whose workers kept dying (%s); "
                    "running its %d points alone here through ngspice -b",
                    cells[future],
                    exc,
                    len(chunks[future]),
                )
                yield run_alone(config, decks, chunks[future])
            except Exception as exc:  # a task that could not run at all
                raise ClusterError(
                    f"a task on the cluster failed ({exc}); the scheduler and every worker need "
                    "the same charflow, ngspice and model files as this machine",
                    cell=cells[future],
                ) from exc
