"""The result store: what its keys depend on, what it gives back, and how sweep.run uses it.

A key must change with every input of a result (testbench, model files followed through
.include and .lib, simulator, thresholds, settings) and with nothing else; a stored point
must come back exactly as it went in, off the grid too, and must not be simulated again.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import shutil
import sqlite3
from pathlib import Path

import pytest

from charflow.config import library as config
from charflow.config.resources import MODEL_DIR, TEMPLATE_DIR
from charflow.execution import store as store_module
from charflow.execution import sweep
from charflow.execution.store import FILE_NAME, Store, keyring
from charflow.flow import characterize as flow
from charflow.measurement import registry
from charflow.plan import arcs as planning
from charflow.records.errors import StoreError
from charflow.records.outcomes import Measurement
from charflow.records.points import TimingPoint
from charflow.simulation import netlist

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "tests" / "data"
SMALL = DATA / "small_l1.toml"


@pytest.fixture(scope="module", autouse=True)
def _need_ngspice():
    # The keys hold the simulator's version, which ngspice itself reports.
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not installed; these tests need it (apt-get install ngspice)")


def _ring(cfg):
    decks = {c.name: netlist.build_deck(cfg, c) for c in cfg.cells}
    return keyring(cfg, decks)


def _point(cfg, slew: float = 3.3e-11, load: float = 7.7e-15) -> TimingPoint:
    """An QINV_P1 point off the config's grid, as a fidelity check would ask for."""
    base = planning.plan(cfg, ["QINV_P1"]).points[0]
    return dataclasses.replace(base, slew=slew, load=load)


def _copy_kit(tmp_path: Path) -> Path:
    """tests/data/wrapped* in a folder of their own, so that their files can be edited."""
    for f in DATA.glob("wrapped*"):
        shutil.copy(f, tmp_path / f.name)
    return tmp_path / "wrapped.toml"


def test_model_files_are_followed_through_include_and_lib(tmp_path: Path) -> None:
    cfg = config.load(_copy_kit(tmp_path))
    deck = netlist.build_deck(cfg, cfg.cells[0])
    # The deck reads wrapped_models.lib by section; that file's tt section includes the core.
    assert netlist.model_files(deck.text, tmp_path) == (
        tmp_path / "wrapped_models.lib",
        tmp_path / "wrapped_core.inc",
    )


def test_model_files_quoting_sections_and_cycles(tmp_path: Path) -> None:
    (tmp_path / "a b.inc").write_text(".include 'c.lib'\n", encoding="utf-8")
    (tmp_path / "c.lib").write_text('.lib tt\n.inc "a b.inc"\n.endl tt\n', encoding="utf-8")
    text = '.LIB "c.lib" tt\n.lib tt\n  .include "a b.inc"\n.include gone.inc\n'
    assert netlist.model_files(text, tmp_path) == (
        tmp_path / "c.lib",
        tmp_path / "a b.inc",
        tmp_path / "gone.inc",
    )


def test_keys_follow_a_change_in_an_included_file(tmp_path: Path) -> None:
    cfg = config.load(_copy_kit(tmp_path))
    point = planning.plan(cfg).points[0]
    before = _ring(cfg)
    core = tmp_path / "wrapped_core.inc"
    core.write_text(core.read_text().replace("lambda=0.05", "lambda=0.06"), encoding="utf-8")
    after = _ring(cfg)
    assert before.key(point) != after.key(point)
    assert before.slot(point) == after.slot(point)


def test_keys_follow_the_inputs_of_a_result_and_nothing_else() -> None:
    cfg = config.load(SMALL)
    point = planning.plan(cfg).points[0]
    key = _ring(cfg).key(point)
    assert _ring(cfg).key(point) == key  # the same inputs give the same key
    changed = {
        "threshold": dataclasses.replace(
            cfg, thresholds=dataclasses.replace(cfg.thresholds, output_rise=0.45)
        ),
        "simulator": dataclasses.replace(
            cfg, simulation=dataclasses.replace(cfg.simulation, backend="subprocess")
        ),
        "settle": dataclasses.replace(
            cfg, simulation=dataclasses.replace(cfg.simulation, settle=0.02)
        ),
        "temperature": dataclasses.replace(
            cfg, process=dataclasses.replace(cfg.process, temperature=85.0)
        ),
    }
    for what, other in changed.items():
        assert _ring(other).key(point) != key, what
        assert _ring(other).slot(point) == _ring(cfg).slot(point), what
    same = dataclasses.replace(cfg, simulation=dataclasses.replace(cfg.simulation, timeout=5.0))
    assert _ring(same).key(point) == key  # a time limit does not change what is measured
    assert _ring(cfg).key(dataclasses.replace(point, load=point.load * 2)) != key


def test_a_row_measured_by_another_method_revision_is_not_served(tmp_path, monkeypatch) -> None:
    # A stored value is only as current as the way it was measured: rows from before a change
    # that moves measured values are re-simulated, never mixed with new ones (common practice
    # for result caches: the key holds every input of the result, the method included).
    cfg = config.load(SMALL)
    point = _point(cfg)
    m = Measurement(point, 1e-11, 2e-11, 1e-15, 1, 0.001, 1e-9)
    with Store(tmp_path / FILE_NAME) as store:
        store.put(_ring(cfg), m)
        monkeypatch.setattr(store_module, "METHOD_REVISION", store_module.METHOD_REVISION + 1)
        assert store.lookup(_ring(cfg), [point]) == {}
        monkeypatch.undo()
        assert store.lookup(_ring(cfg), [point]) == {point: m}


def test_a_key_is_the_hash_of_the_cells_inputs_and_every_field_of_the_point() -> None:
    # The slow twin of the key's definition, written out: SHA-256 of the JSON (sorted keys) of
    # [the cell's inputs, [the point's record name, all its fields]]; the store writes the
    # point's part once per point, and must give the same text (FIPS 180-4 for the hash; the
    # JSON layout is Python's json.dumps with its default separators).
    cfg = config.load(SMALL)
    ring = _ring(cfg)
    points = planning.plan(cfg).points
    for point in (*points[:40], _point(cfg)):
        fields = [type(point).__name__, dataclasses.asdict(point)]
        for head, got in ((ring.cells[point.cell].digest, ring.key), (ring.library, ring.slot)):
            text = json.dumps([head, fields], sort_keys=True)
            assert got(point) == hashlib.sha256(text.encode()).hexdigest()


def test_a_batch_is_stored_in_one_write_and_served_whole(tmp_path: Path) -> None:
    cfg = config.load(SMALL)
    ring = _ring(cfg)
    ms = [
        Measurement(_point(cfg, load=c), 1e-11 * i, 2e-11, 1e-15, 1, 0.001, 1e-9)
        for i, c in enumerate((1e-15, 2e-15, 3e-15), start=1)
    ]
    with Store(tmp_path / FILE_NAME) as store:
        store.put_all(ring, iter(ms))
        store.put_all(ring, ())  # nothing to write: no transaction
        assert store.count() == 3
        assert store.lookup(ring, [m.point for m in ms]) == {m.point: m for m in ms}


def test_an_off_grid_point_comes_back_exactly(tmp_path: Path) -> None:
    cfg = config.load(SMALL)
    ring = _ring(cfg)
    point = _point(cfg)
    m = Measurement(point, -1.2345678901234e-12, 3.3e-11, 2.2e-15, 3, 0.0123, 4.5e-9)
    with Store(tmp_path / FILE_NAME) as store:
        store.put(ring, m)
        assert store.count() == 1
        assert store.lookup(ring, [point]) == {point: m}
    with Store(tmp_path / FILE_NAME) as store:  # and after reopening
        assert store.lookup(ring, [point]) == {point: m}
    db = sqlite3.connect(tmp_path / FILE_NAME)
    assert db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    db.close()


def test_a_row_that_no_longer_fits_the_record_is_a_miss(tmp_path: Path) -> None:
    cfg = config.load(SMALL)
    ring = _ring(cfg)
    point = _point(cfg)
    with Store(tmp_path / FILE_NAME) as store:
        store.put(ring, Measurement(point, 1e-11, 2e-11, 1e-15, 1, 0.001, 1e-9))
    db = sqlite3.connect(tmp_path / FILE_NAME)
    with db:
        db.execute("UPDATE point SET result = '{\"delay\": 1e-11}'")
    db.close()
    with Store(tmp_path / FILE_NAME) as store:
        assert store.lookup(ring, [point]) == {}


def test_sweep_run_stores_and_then_serves_without_simulating(tmp_path, monkeypatch) -> None:
    cfg = config.load(SMALL)
    points = [_point(cfg), _point(cfg, slew=1.7e-10, load=1.3e-14)]
    with Store(tmp_path / FILE_NAME) as store:
        first = list(sweep.run(cfg, points, jobs=1, store=store))
        assert store.count() == 2
        assert all(isinstance(m, Measurement) for m in first)

        def no_simulation(*args):
            raise AssertionError("a stored point was simulated again")

        monkeypatch.setattr(registry, "measure_chunk", no_simulation)
        served: list[tuple] = []
        again = list(sweep.run(cfg, points, jobs=1, store=store, on_stored=served.append))
    assert [len(s) for s in served] == [2]
    assert sorted(again, key=lambda m: m.point.slew) == sorted(first, key=lambda m: m.point.slew)


def test_a_run_served_from_the_store_simulates_nothing(tmp_path, monkeypatch) -> None:
    # The function check and the leakage are points like the others: stored on the first run,
    # served on the second, which must not simulate at all. The subprocess backend with one
    # job measures in this process (each run in its own ngspice), so the patch below sees
    # every simulation the run would do.
    cfg = config.load(SMALL)
    cfg = dataclasses.replace(
        cfg, simulation=dataclasses.replace(cfg.simulation, backend="subprocess")
    )
    with Store(tmp_path / FILE_NAME) as store:
        first = flow.characterize(cfg, cells=["QINV_P1"], jobs=1, store=store)
        kinds = {row[0] for row in store._db.execute("SELECT record FROM point")}
        assert {"Measurement", "LeakageResult", "FunctionChecked"} <= kinds

        def no_simulation(*args, **kwargs):
            raise AssertionError("a stored point was simulated again")

        monkeypatch.setattr(registry, "measure_chunk", no_simulation)
        again = flow.characterize(cfg, cells=["QINV_P1"], jobs=1, store=store)
    assert again.simulations == 0 and len(again.reused) == len(first.reused) + first.simulated + 1
    assert again.leakage == first.leakage and again.cell_power == first.cell_power


def test_latest_serves_older_rows_and_says_why(tmp_path: Path) -> None:
    shutil.copy(MODEL_DIR / "vellum90_l1.lib", tmp_path / "models.lib")
    doc = (
        SMALL.read_text(encoding="utf-8")
        .replace(
            "../../charflow/bundled/models/vellum90_l1.lib", (tmp_path / "models.lib").as_posix()
        )
        .replace("../../charflow/bundled/templates", TEMPLATE_DIR.as_posix())
    )
    (tmp_path / "cfg.toml").write_text(doc, encoding="utf-8")
    cfg = config.load(tmp_path / "cfg.toml")
    point = _point(cfg)
    m = Measurement(point, 1e-11, 2e-11, 1e-15, 1, 0.001, 1e-9)
    with Store(tmp_path / FILE_NAME) as store:
        store.put(_ring(cfg), m)
        found, stale = store.latest(_ring(cfg), [point])
        assert found == {point: m} and stale == {}
        model = tmp_path / "models.lib"
        model.write_text(model.read_text().replace("kp=200e-6", "kp=210e-6", 1))
        ring = _ring(cfg)
        assert store.lookup(ring, [point]) == {}
        found, stale = store.latest(ring, [point])
    assert found == {point: m}
    assert stale[point].reason == "model file models.lib changed"


def test_a_store_of_another_schema_is_refused(tmp_path: Path) -> None:
    path = tmp_path / FILE_NAME
    db = sqlite3.connect(path)
    db.execute("PRAGMA user_version=99")
    db.close()
    with pytest.raises(StoreError, match="schema 99") as info:
        Store(path)
    assert str(path) in str(info.value)
