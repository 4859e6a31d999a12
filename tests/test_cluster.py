"""The Dask backend on a small LocalCluster this test starts on 127.0.0.1: the same tables as
local workers, and the driver, not the workers, writes the store."""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest
from distributed import LocalCluster

from charflow.config import library as config
from charflow.execution import cluster as cluster_module
from charflow.execution.store import FILE_NAME, Store
from charflow.flow import characterize as flow
from charflow.io import liberty
from charflow.plan import arcs as planning
from charflow.records.errors import ClusterError

ROOT = Path(__file__).resolve().parents[1]
SMALL = ROOT / "tests" / "data" / "small_l1.toml"
POINTS = 90
TOGGLES = 24  # hidden-power toggles of NAND2 and NOR2, stored beside the points
CELLS = 3
# Reached over TCP on the loopback address only, one thread per worker (one simulator each);
# the dashboard on any free port, as 8787 may be taken.
LOOPBACK = {
    "threads_per_worker": 1,
    "protocol": "tcp",
    "host": "127.0.0.1",
    "dashboard_address": ":0",
}


@pytest.fixture(scope="module")
def cluster():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not installed; these tests need it (apt-get install ngspice)")
    # Worker threads in this process.
    with LocalCluster(n_workers=2, processes=False, **LOOPBACK) as local:
        yield local


def test_dask_gives_the_same_tables_as_local_workers(cluster, tmp_path: Path) -> None:
    cfg = config.load(SMALL)
    with Store(tmp_path / FILE_NAME) as store:
        on_dask = flow.characterize(cfg, store=store, scheduler=cluster.scheduler_address)
        assert store.count() == POINTS + TOGGLES + 2 * CELLS  # a leakage and a check each
    on_local = flow.characterize(cfg, jobs=2)
    assert not on_dask.failures and len(on_dask.measurements) == POINTS
    assert liberty.render(cfg, on_dask.cells) == liberty.render(cfg, on_local.cells)
    for a, b in zip(on_dask.cells, on_local.cells, strict=True):
        for x, y in zip(a.arcs, b.arcs, strict=True):
            assert x.default == y.default


def test_the_command_on_dask_writes_what_local_workers_write(cluster, tmp_path: Path) -> None:
    exe = shutil.which("charflow")
    if exe is None:
        pytest.fail("the charflow command is not on PATH; install the package (pip install -e .)")
    outputs = {}
    for backend in ("dask", "local"):
        out = tmp_path / backend
        extra = ["--scheduler", cluster.scheduler_address] if backend == "dask" else []
        done = subprocess.run(
            [exe, "run", str(SMALL), "--out", str(out), "--quiet", "--backend", backend, *extra],
            capture_output=True,
            text=True,
            timeout=300,
            check=False,
        )
        assert done.returncode == 0, done.stderr
        assert f"{POINTS} simulated" in done.stdout
        outputs[backend] = [(out / f"small_l1{s}").read_bytes() for s in (".lib", ".json")]
    assert outputs["dask"] == outputs["local"]


def test_an_unreachable_scheduler_is_a_cluster_error(monkeypatch) -> None:
    monkeypatch.setattr(cluster_module, "CONNECT_TIMEOUT", 1.0)
    cfg = config.load(SMALL)
    # Port 9 (discard) on the loopback address: nothing listens there.
    with pytest.raises(ClusterError, match="cannot reach the Dask scheduler"):
        flow.characterize(cfg, cells=["QINV_P1"], scheduler="tcp://127.0.0.1:9")


def test_a_malformed_scheduler_address_is_refused_at_once() -> None:
    cfg = config.load(SMALL)
    with pytest.raises(ClusterError, match="not a Dask scheduler address: foo bar"):
        flow.characterize(cfg, cells=["QINV_P1"], scheduler="foo bar")


def test_a_chunk_whose_worker_dies_runs_alone_here(tmp_path: Path, caplog) -> None:
    import logging
    import os
    import signal

    import dask
    from distributed import Client

    from charflow.execution import sweep

    cfg = config.load(SMALL)
    points = planning.plan(cfg, ["QNAND2_P1", "QNOR2_P1"]).points
    # No retries on the cluster: the first death of a worker gives up on its chunk.
    with (
        dask.config.set({"distributed.scheduler.allowed-failures": 0}),
        LocalCluster(n_workers=1, processes=True, **LOOPBACK) as local,
        Client(local) as client,
    ):
        (pid,) = client.run(os.getpid).values()
        killed: list[int] = []

        def kill_worker(outcome: object) -> None:
            if not killed:
                os.kill(pid, signal.SIGKILL)
                killed.append(pid)

        with caplog.at_level(logging.WARNING, logger="charflow"):
            outcomes = list(
                sweep.run(cfg, points, scheduler=local.scheduler_address, on_result=kill_worker)
            )
    assert killed
    assert any("running its" in r.getMessage() for r in caplog.records)
    assert sorted(map(repr, (o.point for o in outcomes))) == sorted(map(repr, points))
    assert not [o for o in outcomes if isinstance(o, flow.Failure)]
