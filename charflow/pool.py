"""Measuring chunks of points on worker processes and on this process at once.

The worker processes are forked from this one when the sweep starts, so they begin with
everything it has: Python's modules, the simulator and every testbench the functional check
loaded into it. A worker therefore starts in milliseconds and reads no model file at all for
the cells it inherited (with a foundry's model file that read takes seconds per cell). Where
``fork`` does not exist they are spawned instead and start from nothing. This process
measures chunks too, from the first moment, and shares the queue with ``jobs - 1`` workers,
costliest chunks first. Which process measures a chunk does not change its values (they depend
on the point alone), only when it is done.
"""

from __future__ import annotations

import multiprocessing
from collections import deque
from collections.abc import Iterator, Sequence
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait

from .config import LibraryConfig
from .netlist import Deck

AHEAD = 2  # chunks queued per worker process, so that none waits for its next one


def map_chunks(
    config: LibraryConfig, decks: dict[str, Deck], tasks: Sequence[tuple], jobs: int
) -> Iterator[list]:
    """Each chunk's outcomes (``timing.measure_chunk``), in completion order, measured by
    this process and ``jobs - 1`` worker processes."""
    from .timing import measure_chunk

    queue = deque(tasks)
    workers = min(jobs, len(queue)) - 1
    if workers < 1:
        for task in queue:
            yield measure_chunk(config, decks[task[0].cell], task)
        return
    method = "fork" if "fork" in multiprocessing.get_all_start_methods() else "spawn"
    running: set[Future] = set()
    with ProcessPoolExecutor(workers, mp_context=multiprocessing.get_context(method)) as pool:
        try:
            while queue or running:
                while queue and len(running) < AHEAD * workers:
                    task = queue.popleft()
                    running.add(pool.submit(measure_chunk, config, decks[task[0].cell], task))
                finished = {f for f in running if f.done()}
                if not queue and not finished:
                    finished, _ = wait(running, return_when=FIRST_COMPLETED)
                for future in finished:
                    running.discard(future)
                    yield future.result()
                if queue:
                    task = queue.popleft()
                    yield measure_chunk(config, decks[task[0].cell], task)
        finally:
            for future in running:
                future.cancel()
