"""Measuring chunks of points on worker processes and on this process at once.

A worker process needs a good part of a second to start: Python, numpy, PySpice and its own
simulator, before its first point. This process has all of that already (the functional
check used its simulator), so it measures chunks itself from the first moment, while
``jobs - 1`` worker processes start, and then shares the queue with them, costliest chunks
first. Which process measures a chunk does not change its values (they depend on the point
alone), only when it is done.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Iterator, Sequence
from concurrent.futures import FIRST_COMPLETED, Future, wait

from .config import LibraryConfig
from .netlist import Deck

AHEAD = 2  # chunks queued per worker process, so that none waits for its next one


def map_chunks(
    config: LibraryConfig, decks: dict[str, Deck], tasks: Sequence[tuple], jobs: int
) -> Iterator[list]:
    """Each chunk's outcomes (``timing.measure_chunk``), in completion order, measured by
    this process and ``jobs - 1`` worker processes."""
    from joblib.externals.loky import get_reusable_executor

    from .timing import measure_chunk

    queue = deque(tasks)
    workers = min(jobs, len(queue)) - 1
    executor = get_reusable_executor(max_workers=workers) if workers > 0 else None
    running: set[Future] = set()
    try:
        while queue or running:
            while executor is not None and queue and len(running) < AHEAD * workers:
                task = queue.popleft()
                running.add(executor.submit(measure_chunk, config, decks[task[0].cell], task))
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
