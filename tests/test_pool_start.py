"""The worker pool started ahead of the sweep, and the simulator commands a point sends: needs
ngspice (fails without it).

``charflow run`` starts the pool while it still loads and plans when its store is empty (a store
with rows may serve the run whole, which must start none: tests/test_scheduling.py runs that
re-run); each worker then loads the measurers and the shared library before its first chunk.
A point sends only the ``alter`` commands that change something; the values it measures are
held against closed forms.
"""

from __future__ import annotations

import argparse
import math
import shutil
import sys
from pathlib import Path

import pytest

from charflow.cli import run
from charflow.config import library as config
from charflow.execution import workers
from charflow.measurement import combinational as timing
from charflow.measurement.combinational import backend_for
from charflow.plan import arcs as planning
from charflow.simulation import netlist
from charflow.simulation.backends import loaded_library

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "tests" / "data"
SMALL = DATA / "small_l1.toml"
RC_CONFIG = DATA / "rc_cell.toml"
R_OHMS = 1e3  # R1 in tests/data/rc_cell.sp
RC_RTOL = 5e-3  # as tests/test_timing.py: simulated RC edges against the closed form
STEPS_PER_TAU = 50  # the first maximum step of a point, a fraction of its RC


@pytest.fixture(scope="module", autouse=True)
def _needs_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; these tests need it")


def _args(out: Path, scheduler: str | None = None) -> argparse.Namespace:
    return argparse.Namespace(
        backend="dask" if scheduler else "joblib",
        scheduler=scheduler,
        jobs=1,
        plan=False,
        cell=None,
        arc=None,
        out=out,
    )


def test_a_run_with_an_empty_store_starts_the_pool_before_it_plans(tmp_path, monkeypatch):
    started, planned = [], []
    monkeypatch.setattr(run.workers, "start", lambda sim, jobs: started.append((sim, jobs)))
    monkeypatch.setattr(run, "_library", lambda lib, *rest: planned.append(started[:]) or 0)
    cfg = config.load(SMALL)
    assert run.characterize(cfg, _args(tmp_path / "local")) == 0
    assert started == [(cfg.simulation, 1)]
    assert planned == [started]  # before the library's characterization began
    # On a cluster the pool is Dask's: nothing starts here.
    started.clear()
    assert run.characterize(cfg, _args(tmp_path / "cluster", "tcp://127.0.0.1:1")) == 0
    assert started == []


def _what_a_worker_holds() -> tuple[bool, bool]:
    """In a worker: whether the ngspice shared library and the measurers are loaded."""
    return loaded_library() is not None, "charflow.measurement.combinational" in sys.modules


def test_a_pool_started_ahead_holds_the_simulator_and_the_measurers():
    cfg = config.load(SMALL)
    workers.start(cfg.simulation, 1)
    # The process's own maps (Linux) name the library file the worker loaded.
    assert workers.in_worker(_what_a_worker_holds) == (True, True)


@pytest.fixture(scope="module")
def rc():
    cfg = config.load(RC_CONFIG)
    return cfg, netlist.build_deck(cfg, cfg.cell("RCCELL")), planning.plan(cfg).points


def _sent(monkeypatch, backend) -> list[str]:
    """Every command the backend sends ngspice from now on."""
    sent: list[str] = []
    # A run's own commands go through the backend's ``_command``; the rest through PySpice's.
    for owner, name in ((backend._ng, "exec_command"), (backend, "_command")):
        monkeypatch.setattr(owner, name, _spying(getattr(owner, name), sent))
    return sent


def _spying(send, sent: list[str]):
    def spy(text, *args, **kwargs):
        sent.append(text)
        return send(text, *args, **kwargs)

    return spy


def _step(point) -> float:
    return R_OHMS * point.load / STEPS_PER_TAU


def test_a_point_sends_only_the_alters_that_change_something(rc, monkeypatch):
    cfg, deck, points = rc
    fast = [p for p in points if p.slew == min(cfg.grid.slew) and p.input_edge == "rise"]
    first, other_load = sorted(fast, key=lambda p: p.load)[:2]
    # Twice: the first time its static current (an operating point with the input held)
    # comes after the transient and leaves the input source at a constant.
    for _ in range(2):
        timing.measure_point(cfg, deck, first, step=_step(first))
    sent = _sent(monkeypatch, backend_for(cfg))
    for point in (first, other_load):
        del sent[:]
        m = timing.measure_point(cfg, deck, point, step=_step(point))
        alters = [c for c in sent if c.startswith("alter")]
        # The same point again sets nothing; the next load sets its load capacitor only.
        load = f"alter {deck.load_cap('Y')} = {point.load:.12g}"
        assert alters == ([] if point is first else [load])
        # Step into an RC: 50 % delay ln2 RC (Rabaey, Chandrakasan & Nikolic, Digital
        # Integrated Circuits, 2nd ed., 2003): the commands not sent left the right values.
        tau = R_OHMS * point.load
        assert m.delay == pytest.approx(math.log(2.0) * tau, rel=RC_RTOL, abs=0), point.label


def test_an_alter_to_a_vector_is_always_sent(rc, monkeypatch):
    cfg, deck, _ = rc
    backend = backend_for(cfg)
    backend.load(deck)
    source = deck.input_source("A")
    pulse = f"alter @{source}[pulse] = [ 0 1.2 0 1e-12 1e-12 1 2 ]"
    # ngspice's vector(4) is 0 1 2 3: the corners (0, 1) and (2, 3).
    pwl = ("let cf_test = vector(4)", f"alter @{source}[pwl] = cf_test")
    sent = _sent(monkeypatch, backend)
    for commands in ((pulse,), (pulse,), pwl, pwl, (pulse,)):
        backend._alter(commands, deck.key, deck.cell)
    # The PULSE again is not sent; a vector's name can stand for other values by the next run,
    # so its alter always is, and the source holds no PULSE after it.
    assert sent == [pulse, *pwl, *pwl, pulse]
