"""Running sweep chunks on an existing Dask cluster (dask.distributed).

Workers only simulate and measure; they return outcomes, and the driver, which holds the
result store, writes them. Each worker process keeps its own simulator, as a local worker
does (``timing.backend_for``). libngspice allows one simulator per process, so tasks in one
worker process take turns; start workers with one thread each (see README, "Scale-out").
A worker needs charflow and ngspice, not the library's files: the model files the decks read
travel with the work, by content (``parcel``), and each worker writes them into its own folder.
"""

from __future__ import annotations

import contextlib
import logging
import os
import threading
from collections.abc import Generator, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

from charflow.config.library import LibraryConfig
from charflow.execution import parcel
from charflow.execution.workers import EXIT_HUNG, run_alone
from charflow.measurement import registry
from charflow.measurement.combinational import backend_for
from charflow.records.errors import CharflowError, ClusterError, SimulatorHungError
from charflow.records.outcomes import Outcome
from charflow.records.points import Work
from charflow.simulation.netlist import Deck
from charflow.simulation.session import SESSION, BoundedCache

log = logging.getLogger("charflow")

CONNECT_TIMEOUT = 30.0  # s to reach the scheduler
# s a worker may take to start its simulator and say its version (a first libngspice load).
ASK_TIMEOUT = 120.0
FILES = "charflow-files"  # the folder in a worker's local directory that holds shipped files
INSTALL = (
    "every worker needs charflow, ngspice and libngspice of the same version as the others, "
    "and the driver's Python version"
)

# Packages whose versions must be alike on the driver and every worker: Dask's own (it sends
# charflow's tasks between them) and those behind the numbers.
ALIKE = ("dask", "distributed", "cloudpickle", "charflow", "PySpice", "numpy", "scipy")

# One simulator per process: worker threads of one process must not drive it at once.
_SIMULATOR = threading.Lock()


def _here(deck: Deck, files: parcel.Parcel) -> Deck:
    """In a worker: ``deck`` reading this worker's copies of its files, written on first use."""
    from distributed import get_worker

    decks: BoundedCache[tuple[str, str], Deck] = SESSION.cache("cluster.decks")
    if (deck.key, files.tree) not in decks:
        folders: BoundedCache[str, Path] = SESSION.cache("cluster.files")
        if files.tree not in folders:
            folders[files.tree] = parcel.unpack(files, Path(get_worker().local_directory) / FILES)
        decks[deck.key, files.tree] = parcel.localize(deck, files, folders[files.tree])
    return decks[deck.key, files.tree]


def _measure(
    config: LibraryConfig, deck: Deck, points: tuple[Work, ...], files: parcel.Parcel
) -> list[Outcome]:
    with _SIMULATOR:
        try:
            return registry.measure_chunk(config, _here(deck, files), points)
        except SimulatorHungError:
            # As a local worker does (``workers``): the nanny starts a fresh process and the
            # scheduler sends the task elsewhere.
            os._exit(EXIT_HUNG)


def _files(files: parcel.Parcel) -> parcel.Parcel:
    """A task whose result is the parcel: the scheduler keeps its input, so a worker that dies
    with the only copy costs a re-run of this task, not the sweep."""
    return files


def _banner(config: LibraryConfig) -> str:
    with _SIMULATOR:
        return backend_for(config).version()


@contextlib.contextmanager
def _connect(address: str) -> Iterator[Any]:  # Any: distributed is an optional extra
    """A client of the scheduler at ``address``, closed on leaving."""
    try:
        from distributed import Client
        from distributed.comm import resolve_address
    except ImportError as exc:
        raise ClusterError(
            "the Dask backend needs dask.distributed: pip install 'charflow[cluster]'"
        ) from exc
    # A malformed address is refused before a client exists: a client that failed half-way
    # keeps its event loop and stalls the interpreter's exit.
    try:
        resolve_address(address)
    except (OSError, ValueError) as exc:
        raise ClusterError(
            f"not a Dask scheduler address: {address} ({exc}); give --scheduler the address "
            "the scheduler prints when it starts, e.g. tcp://10.0.0.5:8786"
        ) from exc
    try:
        client = Client(address, timeout=CONNECT_TIMEOUT, set_as_default=False)
    except (OSError, TimeoutError) as exc:
        raise ClusterError(
            f"cannot reach the Dask scheduler at {address} within {CONNECT_TIMEOUT:g} s ({exc}); "
            "start one there (dask scheduler) or give --scheduler the address it prints"
        ) from exc
    with client:
        yield client


def _differences(versions: dict[str, Any]) -> list[str]:
    """Where a worker's Python (major.minor) or one of ``ALIKE`` differs from this machine's,
    in words; ``versions`` as ``Client.get_versions`` gives them."""
    here = versions["client"]["packages"]
    found = []
    for worker, info in sorted(versions["workers"].items()):
        there = info["packages"]
        for name in ("python", *ALIKE):
            mine, theirs = here.get(name), there.get(name)
            if name == "python":
                mine, theirs = (".".join(str(v).split(".")[:2]) for v in (mine, theirs))
            if mine != theirs:
                found.append(f"worker {worker} has {name} {theirs}, this machine {mine}")
    return found


def simulator_banner(address: str, config: LibraryConfig) -> str:
    """The version every worker of the cluster at ``address`` reports for its simulator (each
    starts the one its runs use); an error names a worker that has none, or a cluster whose
    workers run different versions, whose results would differ from worker to worker."""
    with _connect(address) as client:
        differ = _differences(client.get_versions(packages=list(ALIKE)))
        if differ:
            raise ClusterError(
                f"the Dask cluster at {address} runs other versions than this machine: "
                f"{'; '.join(differ)}; {INSTALL}"
            )
        workers = sorted(client.scheduler_info(n_workers=-1)["workers"])
        if not workers:
            raise ClusterError(
                f"the Dask scheduler at {address} has no workers; start them on each machine "
                f"with: dask worker {address} --nthreads 1"
            )
        asked = {
            w: client.submit(_banner, config, workers=[w], allow_other_workers=False, pure=False)
            for w in workers
        }
        banners = {}
        for worker, future in asked.items():
            try:
                banners[worker] = future.result(timeout=ASK_TIMEOUT)
            except Exception as exc:  # whatever the worker raised, or no answer in time
                raise ClusterError(
                    f"the Dask worker {worker} cannot start the simulator ({exc}); install "
                    f"ngspice and libngspice there ({INSTALL})"
                ) from exc
    if len(set(banners.values())) > 1:
        which = "; ".join(f"{w}: {b}" for w, b in banners.items())
        raise ClusterError(
            f"the Dask workers run different simulators ({which}); {INSTALL}, or their "
            "results would differ from worker to worker"
        )
    return banners[workers[0]]


def map_chunks(
    address: str,
    config: LibraryConfig,
    decks: Mapping[str, Deck],
    tasks: Sequence[tuple[Work, ...]],
) -> Generator[list[Outcome], None, None]:
    """Outcomes of every chunk, in completion order, computed on the cluster at ``address``."""
    files = parcel.pack(decks.values(), Path.cwd())
    with _connect(address) as client:
        from distributed import as_completed
        from distributed.scheduler import KilledWorker

        shipped = client.submit(_files, files, pure=False)
        # The chunks are sorted longest first; a higher priority runs earlier.
        cells = {}
        for i, t in enumerate(tasks):
            deck = decks[t[0].cell]
            future = client.submit(_measure, config, deck, t, shipped, pure=False, priority=-i)
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
                    f"a task on the cluster failed ({exc}); {INSTALL}",
                    cell=cells[future],
                ) from exc
