"""This process's simulator and what its measurements have learnt, in one object per process.

A worker keeps one ngspice for its whole life (a foundry's models can take seconds to read),
and a few things worth measuring once: a cell's static current per input vector, the edge
model of a series of points, a flip-flop's settle window. Each cache is bounded (least
recently used entries go first), so a long-lived cluster worker that serves many libraries
does not grow without end; ``forget`` empties them all.
"""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Hashable
from typing import Any, TypeVar

from charflow.config.library import Simulation
from charflow.simulation.backends import SharedBackend, SubprocessBackend, make_backend

CACHE_LIMIT = 4096  # entries per cache

K = TypeVar("K", bound=Hashable)
V = TypeVar("V")


class BoundedCache(OrderedDict[K, V]):
    """A dict that keeps its ``limit`` most recently used entries."""

    def __init__(self, limit: int) -> None:
        super().__init__()
        self.limit = limit

    def __getitem__(self, key: K) -> V:
        value = super().__getitem__(key)
        self.move_to_end(key)
        return value

    def __setitem__(self, key: K, value: V) -> None:
        super().__setitem__(key, value)
        self.move_to_end(key)
        while len(self) > self.limit:
            self.popitem(last=False)


class Session:
    """The simulator of this process (one per backend kind) and its named caches."""

    def __init__(self, limit: int = CACHE_LIMIT) -> None:
        self.limit = limit
        self._backends: dict[str, SharedBackend | SubprocessBackend] = {}
        self._caches: dict[str, BoundedCache[Any, Any]] = {}

    def backend(self, sim: Simulation) -> SharedBackend | SubprocessBackend:
        """The process's simulator of ``sim.backend``, made on first use and kept."""
        if sim.backend not in self._backends:
            self._backends[sim.backend] = make_backend(sim.backend, sim.timeout)
        backend = self._backends[sim.backend]
        backend.timeout = sim.timeout  # one simulator serves every config the process meets
        return backend

    def cache(self, name: str) -> BoundedCache[Any, Any]:
        """The cache ``name``; its user declares what it keeps (``BoundedCache[K, V]``)."""
        if name not in self._caches:
            self._caches[name] = BoundedCache(self.limit)
        return self._caches[name]

    def reads(self) -> tuple[int, float]:
        """Testbenches this process's simulators have read so far, and the seconds it took."""
        backends = self._backends.values()
        return sum(b.reads for b in backends), sum(b.read_seconds for b in backends)

    def forget(self) -> None:
        """Empty every cache (the simulator stays)."""
        for cache in self._caches.values():
            cache.clear()


SESSION = Session()
