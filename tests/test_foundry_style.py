"""Foundry-style inputs: device wrappers instantiated with X, .lib sections, .param
expressions, an HSPICE compatibility mode, pins in any order (tests/data/wrapped*.*), and a
generated kit of that kind (tests/fixtures/model_kits.py)."""

from __future__ import annotations

import dataclasses
import shutil
from pathlib import Path

import pytest
from fixtures.model_kits import foundry_kit

from charflow.config import library as config
from charflow.flow import characterize as flow

DATA = Path(__file__).parent / "data"
RTOL = 1e-3  # two decks of identical devices; only the simulator's step choices differ
TINY_GRID = "slew = [0.02, 0.2]\nload = [0.002, 0.02]"


@pytest.fixture(scope="module", autouse=True)
def _need_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not installed; these tests need it (apt-get install ngspice)")


def _tables(result):
    return {
        (c.cell.name, a.arc.related, t.quantity): t
        for c in result.cells
        for a in c.arcs
        for t in a.default
    }


@pytest.mark.parametrize("backend", ["shared", "subprocess"])
def test_wrapped_devices_time_like_their_m_card_twin(backend):
    wrapped = config.load(DATA / "wrapped.toml")
    wrapped = dataclasses.replace(
        wrapped, simulation=dataclasses.replace(wrapped.simulation, backend=backend)
    )
    plain = config.load(DATA / "small_l1.toml")
    grid = wrapped.cells[0].grid
    inv = dataclasses.replace(plain.cell("QINV_P1"), grid=grid)
    plain = dataclasses.replace(plain, cells=(inv,))

    got = flow.characterize(wrapped, jobs=1)
    want = flow.characterize(plain, jobs=1)
    assert not got.failures
    for quantity in ("cell_rise", "cell_fall", "rise_transition", "fall_transition"):
        a = _tables(got)[("WINV", "A", quantity)].values
        b = _tables(want)[("QINV_P1", "A", quantity)].values
        assert a == pytest.approx(b, rel=RTOL, abs=0), quantity


def test_compatibility_mode_reaches_the_deck():
    cfg = config.load(DATA / "wrapped.toml")
    assert cfg.process.compat == "hs"
    from charflow.simulation.netlist import build_deck

    deck = build_deck(cfg, cfg.cells[0])
    assert deck.compat == "hs"
    assert '.lib "' in deck.text and deck.text.count("xdut") == 1


def test_a_generated_foundry_style_kit_characterizes(tmp_path):
    path = foundry_kit(tmp_path, params=200, grid=TINY_GRID)
    cfg = config.load(path)
    text = (tmp_path / "kit.lib").read_text(encoding="utf-8")
    assert text.count(".param") == 200 - 2 + 1  # two on the first line, one per line after
    assert ".model nch.4 nmos" in text
    result = flow.characterize(cfg, jobs=1)
    assert not result.failures
    # KINV's one arc and KNAND2's two, each for both output edges, on the 2 x 2 grid.
    assert len(result.measurements) == 3 * 2 * 4
