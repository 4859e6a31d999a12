"""charflow on a Dask cluster of separate processes, started as a user starts one (``dask
scheduler`` and two ``dask worker`` commands on 127.0.0.1, each in a folder of its own): the
model files reach the workers by content, a run there equals a local run value for value, and
the store's keys hold no path, so the same library from another folder meets the same rows.

The library lives in a temporary folder, its models split over three files that reach each
other by relative ``.include`` (one in a subfolder, one beside the models' folder), as a
foundry kit's do.
"""

from __future__ import annotations

import dataclasses
import json
import shutil
import socket
import sqlite3
import subprocess
from pathlib import Path

import pytest
from fixtures import dask_processes

from charflow.config import library as config
from charflow.config.resources import TEMPLATE_DIR
from charflow.execution import cluster as cluster_module
from charflow.execution import parcel, sweep
from charflow.execution.store import FILE_NAME, Store, keyring
from charflow.flow import characterize as flow
from charflow.plan import arcs as planning
from charflow.plan.cellwork import leakage_points
from charflow.records.errors import ClusterError
from charflow.records.outcomes import Failure
from charflow.simulation.netlist import build_deck

BUNDLED = TEMPLATE_DIR.parent / "models" / "vellum90_l1.lib"
# The cards of the tt section, with ".model" where each file starts.
NCH, PCH = BUNDLED.read_text().split("\n.lib tt\n")[1].split(".endl tt")[0].split(".model pch")
TOP = """* vellum90 tt, its cards in two files
.lib tt
.include "cards/nch_tt.inc"
.include "../shared/pch_tt.inc"
.endl tt
"""
CONFIG = """[library]
name = "tiny"
time_unit = "ns"
cap_unit = "pf"

[process]
models = [{ file = "models/top.lib", section = "tt" }]
vdd = 1.2

[grid]
slew = [0.02, 0.1]
load = [0.002, 0.01]

[[cell]]
name = "TINV"
template = "cells/inv.sp.j2"
params = { wn = 0.4e-6, wp = 0.8e-6, l = 0.1e-6 }
inputs = ["A"]
outputs = { Y = "!A" }
area = 0.8

[[cell]]
name = "TNAND2"
template = "cells/nand2.sp.j2"
params = { wn = 0.8e-6, wp = 0.8e-6, l = 0.1e-6 }
inputs = ["IA", "IB"]
outputs = { Y = "!(IA&IB)" }
area = 1.2
"""
SHIPPED = ("models/top.lib", "models/cards/nch_tt.inc", "shared/pch_tt.inc")


def _library(folder: Path) -> Path:
    for name, text in zip(SHIPPED, (TOP, NCH, ".model pch" + PCH), strict=True):
        (folder / name).parent.mkdir(parents=True, exist_ok=True)
        (folder / name).write_text(text)
    (folder / "cells").mkdir()
    for cell in ("inv", "nand2"):
        shutil.copy(TEMPLATE_DIR / "cells" / f"{cell}.sp.j2", folder / "cells")
    (folder / "tiny.toml").write_text(CONFIG)
    return folder / "tiny.toml"


@pytest.fixture(scope="module")
def cluster(tmp_path_factory):
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not installed; these tests need it (apt-get install ngspice)")
    with dask_processes.running(tmp_path_factory.mktemp("cluster")) as running:
        yield running


def _values(outcomes) -> dict:
    """Each outcome's fields by point, but the simulator's wall time."""
    found = {}
    for o in outcomes:
        fields = {k: v for k, v in dataclasses.asdict(o).items() if k != "sim_seconds"}
        found[repr(o.point)] = fields
    return found


def test_workers_run_on_shipped_copies_and_equal_a_local_run(cluster, tmp_path, monkeypatch):
    cfg = config.load(_library(tmp_path / "lib"))
    names = [c.name for c in cfg.cells]
    points = [*planning.plan(cfg).points, *leakage_points(cfg, names)]
    hidden = tmp_path / "hidden"
    real_pack = parcel.pack

    def pack_then_hide(decks, base):
        # Once the driver has read the files, they are gone from where the decks name them:
        # a worker that read the driver's paths would fail every point.
        files = real_pack(decks, base)
        (tmp_path / "lib").rename(hidden)
        return files

    monkeypatch.setattr(parcel, "pack", pack_then_hide)
    on_cluster = list(sweep.run(cfg, points, scheduler=cluster.address))
    monkeypatch.undo()
    hidden.rename(tmp_path / "lib")
    assert not [o for o in on_cluster if isinstance(o, Failure)]
    local = list(sweep.run(cfg, points, jobs=1))
    # Same simulator, same decks but for where they read the same bytes: equal to the last bit.
    assert _values(on_cluster) == _values(local)
    # Each worker that ran a chunk holds the files in their layout, byte for byte.
    copies = [t for w in cluster.workers for t in (w / "local").rglob(f"{cluster_module.FILES}/*")]
    copies = [c for c in copies if not c.name.startswith(".")]
    assert copies
    for tree in copies:
        for name in SHIPPED:
            assert (tree / name).read_bytes() == (tmp_path / "lib" / name).read_bytes()


def test_the_command_on_the_cluster_writes_what_a_local_run_writes(cluster, tmp_path):
    exe = shutil.which("charflow")
    if exe is None:
        pytest.fail("the charflow command is not on PATH; install the package (pip install -e .)")
    toml = _library(tmp_path / "lib")
    outputs = {}
    # "joblib": the former name of --backend local, still accepted.
    for backend, extra in (("dask", ["--scheduler", cluster.address]), ("joblib", ["--jobs", "2"])):
        out = tmp_path / backend
        # From a folder of its own: nothing depends on the working folder.
        (tmp_path / f"cwd-{backend}").mkdir()
        done = subprocess.run(
            [exe, "run", str(toml), "--out", str(out), "--quiet", "--backend", backend, *extra],
            capture_output=True,
            text=True,
            timeout=600,
            check=False,
            cwd=tmp_path / f"cwd-{backend}",
        )
        assert done.returncode == 0, done.stderr
        outputs[backend] = [(out / f"tiny{s}").read_bytes() for s in (".lib", ".json")]
    # The Liberty file and the JSON, provenance included, byte for byte.
    assert outputs["dask"] == outputs["joblib"]
    # Neither names a path of this machine: files are named, not located.
    assert not [f for f in outputs["dask"] if str(tmp_path).encode() in f]


def _rows_models(store: Path) -> list[str]:
    with sqlite3.connect(store) as db:
        return [m for (m,) in db.execute("SELECT models FROM point")]


def test_keys_hold_no_path_and_follow_a_changed_model_file(cluster, tmp_path, monkeypatch):
    first = config.load(_library(tmp_path / "a"))
    with Store(tmp_path / FILE_NAME) as store:
        ran = flow.characterize(first, cells=["TINV"], store=store, scheduler=cluster.address)
        rows = store.count()
    assert not ran.failures and rows
    for models in _rows_models(tmp_path / FILE_NAME):
        assert str(tmp_path) not in models
        assert [n for n, _ in json.loads(models)] == list(SHIPPED)
    # The same library copied elsewhere, run here: every row is met, nothing is simulated.
    shutil.copytree(tmp_path / "a", tmp_path / "b")
    second = config.load(tmp_path / "b" / "tiny.toml")

    def no_simulation(config, decks, tasks, *rest):
        assert not tasks, "a point was simulated"
        return (batch for batch in ())

    monkeypatch.setattr(sweep, "run_chunks", no_simulation)
    monkeypatch.setattr(cluster_module, "map_chunks", no_simulation)
    with Store(tmp_path / FILE_NAME) as store:
        again = flow.characterize(second, cells=["TINV"], store=store, jobs=1)
        assert store.count() == rows
    assert _values(again.measurements) == _values(ran.measurements)
    monkeypatch.undo()
    # A model file changed (an included one, PMOS threshold -0.35 -> -0.40 V): new keys, and
    # the long-lived workers simulate the new bytes, not a copy or a deck they loaded before.
    decks = {"TINV": build_deck(second, second.cell("TINV"))}
    before = keyring(second, decks, cluster.address).cells["TINV"].digest
    card = tmp_path / "b" / "shared" / "pch_tt.inc"
    card.write_text(card.read_text().replace("vto=-0.35", "vto=-0.40"))
    changed = config.load(tmp_path / "b" / "tiny.toml")
    with Store(tmp_path / FILE_NAME) as store:
        after = keyring(changed, decks, cluster.address).cells["TINV"].digest
        third = flow.characterize(changed, cells=["TINV"], store=store, scheduler=cluster.address)
        assert store.count() == 2 * rows
    assert after != before and not third.reused
    rise = {repr(m.point): m.delay for m in ran.measurements if m.point.output_edge == "rise"}
    later = {repr(m.point): m.delay for m in third.measurements if repr(m.point) in rise}
    # A higher PMOS threshold drives less current: every rising output is slower (Shichman &
    # Hodges, IEEE JSSC 1968: Id grows with (Vgs - Vt)^2).
    assert later.keys() == rise.keys() and all(later[k] > rise[k] for k in rise)


def test_a_worker_without_ngspice_is_named(tmp_path):
    cfg = config.load(_library(tmp_path / "lib"))
    # PySpice loads the library NGSPICE_LIBRARY_PATH names: none there.
    missing = {"NGSPICE_LIBRARY_PATH": str(tmp_path / "nowhere" / "libngspice.so")}
    with (
        dask_processes.running(tmp_path / "bad", workers=1, worker_env=missing) as bad,
        pytest.raises(ClusterError) as caught,
    ):
        flow.characterize(cfg, cells=["TINV"], scheduler=bad.address)
    message = str(caught.value)
    assert "cannot start the simulator" in message and "tcp://127.0.0.1:" in message
    assert "install ngspice and libngspice there" in message


def test_an_unreachable_scheduler_names_its_address_and_what_to_change(tmp_path, monkeypatch):
    monkeypatch.setattr(cluster_module, "CONNECT_TIMEOUT", 1.0)
    cfg = config.load(_library(tmp_path / "lib"))
    # A port that was free a moment ago: nothing listens there.
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    address = f"tcp://127.0.0.1:{port}"
    with pytest.raises(ClusterError) as caught:
        flow.characterize(cfg, cells=["TINV"], scheduler=address)
    message = str(caught.value)
    assert f"cannot reach the Dask scheduler at {address}" in message
    assert "dask scheduler" in message and "--scheduler" in message


def test_workers_with_other_versions_are_named():
    # Client.get_versions' layout (distributed.versions); a micro release of Python may differ.
    here = {n: "1.0" for n in cluster_module.ALIKE} | {"python": "3.11.7.final.0", "pandas": "2"}
    same = here | {"python": "3.11.2.final.0", "pandas": None}  # pandas is no concern of ours
    other = here | {"python": "3.12.1.final.0", "numpy": "0.9"}
    versions = {
        "client": {"packages": here},
        "workers": {
            "tcp://10.0.0.2:1": {"packages": same},
            "tcp://10.0.0.3:1": {"packages": other},
        },
    }
    assert cluster_module._differences(versions) == [
        "worker tcp://10.0.0.3:1 has python 3.12, this machine 3.11",
        "worker tcp://10.0.0.3:1 has numpy 0.9, this machine 1.0",
    ]
