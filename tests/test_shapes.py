"""Input waveform shapes: a driver's edge or a file's, stretched to the table slew, simulated as
the input source in ngspice (tests/data/small_l1.toml and seq_l1.toml, level-1 models)."""

from __future__ import annotations

import shutil
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from fixtures.shapes import DRIVER
from liberty.parser import parse_liberty

from charflow.config import library as config
from charflow.config.shapes import InputShape
from charflow.execution.store import Store, keyring
from charflow.flow import characterize as flow
from charflow.measurement import combinational, registry
from charflow.measurement.waves import single_crossing
from charflow.records.errors import ConfigError
from charflow.records.outcomes import SearchResult, ShapeResult
from charflow.records.points import ConstraintPoint
from charflow.simulation import netlist, stimulus
from charflow.simulation.backends import Request
from charflow.simulation.timeline import Timeline

DATA = Path(__file__).parent / "data"
# Thresholds unlike the defaults on purpose: asymmetric bands, a derate, off-centre delay levels.
THRESHOLDS = """
[thresholds]
input_rise = 40
input_fall = 60
slew_lower_rise = 10
slew_upper_rise = 90
slew_lower_fall = 30
slew_upper_fall = 70
slew_derate = 0.6
"""
# The simulated source's time between the slew thresholds against table slew × derate: its
# corners sit on the thresholds, rounded to stimulus.TIME_QUANTUM (1 fs, 1e-4 of 10 ps).
SLEW_RTOL = 1e-3
DELAY_ATOL = 2e-15  # s, the delay-threshold crossing against Ramp.time_at
SOURCE_STEPS = 2000  # max steps over the edge when simulating the source alone
LINEAR_RTOL = 1e-12
QUANTUM = stimulus.TIME_QUANTUM  # a file holding a straight edge against the linear ramp's geometry


@pytest.fixture(scope="module", autouse=True)
def _need_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not installed; these tests need it (apt-get install ngspice)")


def _config(folder: Path, source: Path, extra: str) -> config.LibraryConfig:
    """``source`` with its relative paths made absolute and ``extra`` sections appended."""
    text = source.read_text().replace('"../../', f'"{source.parents[2]}/')
    path = folder / source.name
    path.write_text(text + extra)
    return config.load(path)


@pytest.fixture(scope="module")
def driven(tmp_path_factory):
    folder = tmp_path_factory.mktemp("driven")
    cfg = _config(folder, DATA / "small_l1.toml", THRESHOLDS + DRIVER)
    return flow.shaped(cfg, jobs=1), folder


def _source_edge(cfg, ramp: stimulus.Ramp) -> tuple[np.ndarray, np.ndarray]:
    """The wave ``ramp.pulse()`` gives QINV_P1's input source, as ngspice simulates it."""
    cell = cfg.cell("QINV_P1")
    deck = netlist.build_deck(cfg, cell)
    commands = combinational.alters(deck, cell, {"A": ramp.pulse()}, {})
    step = ramp.duration / SOURCE_STEPS
    request = Request(
        deck, commands, f"tran {step:.6g} {ramp.end * 1.2:.6g} 0 {step:.6g}", ("cf_in_a",)
    )
    result, _ = combinational.simulate(combinational.backend_for(cfg), request)
    return result.vectors["time"], result.vectors["cf_in_a"]


@pytest.mark.parametrize("edge", ["rise", "fall"])
def test_driver_shaped_input_has_the_table_slew_at_the_library_thresholds(driven, edge):
    # Liberty's slew convention (common practice; /work/shared/design.md): an input for table
    # slew s spends s × slew_derate between the slew thresholds, and its delay is timed from
    # its crossing of the input delay threshold.
    cfg, _ = driven
    thr, vdd = cfg.thresholds, cfg.process.vdd
    assert cfg.input_shape.rise and cfg.input_shape.fall
    for slew in cfg.cell("QINV_P1").grid.slew:
        ramp = stimulus.ramp(slew, edge, thr, vdd, cfg.input_shape)
        assert isinstance(ramp.pulse(), stimulus.Pwl)
        t, v = _source_edge(cfg, ramp)
        lo, hi = (single_crossing(t, v, f * vdd, edge, "input") for f in thr.slew_band(edge))
        assert abs(hi - lo) == pytest.approx(slew * thr.slew_derate, rel=SLEW_RTOL, abs=0)
        level = thr.delay_input(edge)
        crossed = single_crossing(t, v, level * vdd, edge, "input")
        assert crossed == pytest.approx(ramp.time_at(level), abs=DELAY_ATOL)


def test_the_driver_stage_is_a_stored_point_served_again(tmp_path):
    cfg = _config(tmp_path, DATA / "small_l1.toml", DRIVER)
    with Store(tmp_path / "store.sqlite") as store:
        first = flow.shaped(cfg, jobs=1, store=store)
        point = flow.shape_point(cfg)
        ring = keyring(cfg, {point.cell: netlist.build_chain_deck(cfg, cfg.input_shape)})
        found = store.lookup(ring, [point])
        # What the sweep finds in the store it does not simulate (execution.sweep.run).
        assert isinstance(found[point], ShapeResult)
        again = flow.shaped(cfg, jobs=1, store=store)
    assert again.input_shape == first.input_shape
    # A point's key holds the shape: a driver-shaped result never serves the linear ramp.
    qinv = {"QINV_P1": netlist.build_deck(cfg, cfg.cell("QINV_P1"))}
    linear = replace(cfg, input_shape=InputShape())
    assert (
        keyring(first, qinv).cells["QINV_P1"].digest
        != keyring(linear, qinv).cells["QINV_P1"].digest
    )


def test_linear_is_todays_ramp():
    # The full-swing linear ramp lasts slew × derate / (upper − lower) (design convention,
    # /work/shared/design.md): the linear shape changes nothing of it.
    thr = config.Thresholds(slew_lower_rise=0.1, slew_upper_rise=0.9, slew_derate=0.5)
    for edge in ("rise", "fall"):
        plain = stimulus.ramp(2e-11, edge, thr, 1.2)
        assert stimulus.ramp(2e-11, edge, thr, 1.2, InputShape()) == plain
        assert plain.pulse() == stimulus.ramp(2e-11, edge, thr, 1.2, InputShape()).pulse()
        assert isinstance(plain.pulse(), str)


STRAIGHT = "rise 0 0\nrise 1 1\nfall 0 1\nfall 1 0\n"


def test_a_file_of_straight_edges_is_the_linear_ramp(tmp_path):
    # The same convention: a straight full-swing edge crosses fraction f at f of its duration.
    (tmp_path / "edges.txt").write_text("# straight edges\n" + STRAIGHT)
    extra = THRESHOLDS + '[input_shape]\nkind = "file"\nfile = "edges.txt"\n'
    cfg = _config(tmp_path, DATA / "small_l1.toml", extra)
    thr = cfg.thresholds
    for edge in ("rise", "fall"):
        shaped = stimulus.ramp(5e-11, edge, thr, 1.2, cfg.input_shape)
        plain = stimulus.ramp(5e-11, edge, thr, 1.2)
        assert shaped.duration == pytest.approx(plain.duration, rel=LINEAR_RTOL, abs=0)
        for f in (*thr.slew_band(edge), thr.delay_input(edge)):
            assert shaped.time_at(f) == pytest.approx(plain.time_at(f), rel=LINEAR_RTOL, abs=0)


@pytest.mark.parametrize(
    ("text", "line", "says"),
    [
        ("rise 0 0\nrise 1\n", 2, "expected 'rise|fall TIME FRACTION'"),
        ("rise 0 0\nrise one 1\n", 2, "not a number"),
        ("rise 0 0\nrise 1 0.5\nrise 1 1\nfall 0 1\nfall 1 0\n", 3, "times must increase"),
        ("rise 0 0.1\nrise 1 1\nfall 0 1\nfall 1 0\n", 1, "first fraction must be 0"),
        ("rise 0 0\nrise 1 1\nfall 0 1\nfall 1 0.2\n", 4, "last fraction must be 0"),
        ("rise 0 0\nrise 1 0.6\nrise 2 0.4\nrise 3 1\nfall 0 1\nfall 1 0\n", 1, "exactly once"),
        ("sink 0 0\n", 1, "expected 'rise|fall TIME FRACTION'"),
    ],
)
def test_a_bad_shape_file_is_named_with_its_line(tmp_path, text, line, says):
    (tmp_path / "edges.txt").write_text(text)
    extra = '[input_shape]\nkind = "file"\nfile = "edges.txt"\n'
    with pytest.raises(ConfigError) as err:
        _config(tmp_path, DATA / "small_l1.toml", extra)
    assert says in err.value.reason
    assert err.value.context["file"] == tmp_path / "edges.txt"
    assert err.value.context["line"] == line


def test_a_shape_file_without_a_fall_edge_is_refused(tmp_path):
    (tmp_path / "edges.txt").write_text("rise 0 0\nrise 1 1\n")
    with pytest.raises(ConfigError, match="fall edge needs at least two lines"):
        _config(
            tmp_path, DATA / "small_l1.toml", '[input_shape]\nkind = "file"\nfile = "edges.txt"\n'
        )


# A smooth edge (a logistic curve, cut to start at 0 and end at 1): not a ramp.
SMOOTH = np.linspace(-4.0, 4.0, 33)


def _smooth_file(path: Path) -> None:
    p = 1 / (1 + np.exp(-SMOOTH))
    p = (p - p[0]) / (p[-1] - p[0])
    rows = [f"rise {t:.6f} {v:.6f}" for t, v in zip(SMOOTH + 4, p, strict=True)]
    rows += [f"fall {t:.6f} {1 - v:.6f}" for t, v in zip(SMOOTH + 4, p, strict=True)]
    path.write_text("\n".join(rows) + "\n")


def _still(pulse: str) -> bool:
    v1, v2 = pulse.split()[1:3]
    return v1 == v2


def test_the_shape_reaches_a_flip_flop_setup_search(tmp_path, monkeypatch):
    _smooth_file(tmp_path / "edges.txt")
    extra = '[input_shape]\nkind = "file"\nfile = "edges.txt"\n'
    cfg = _config(tmp_path, DATA / "seq_l1.toml", extra)
    cell = cfg.cell("QDFFR_P1")
    slew = cfg.cell("QDFFR_P1").grid.constraint_slew[0]
    set_to: dict[str, list[stimulus.Wave]] = {}
    real = stimulus.set_source

    def spy(source: str, wave: stimulus.Wave) -> tuple[str, ...]:
        set_to.setdefault(source, []).append(wave)
        return real(source, wave)

    monkeypatch.setattr(stimulus, "set_source", spy)
    point = ConstraintPoint("QDFFR_P1", "D", "CLK", "setup", "rise", "rise", slew, slew)
    outcome = registry.measure(cfg, netlist.build_deck(cfg, cell), point)
    assert isinstance(outcome, SearchResult) and outcome.value is not None
    # Every clock and data wave of the search that moves is a shaped PWL, none a PULSE ramp
    # (a PULSE from a level to the same level holds a pin still).
    for pin in ("vin_clk", "vin_d"):
        moving = [w for w in set_to[pin] if not (isinstance(w, str) and _still(w))]
        assert moving and all(isinstance(w, stimulus.Pwl) for w in moving)
    # The clock's active edge as built for the search: its corners cross the slew thresholds
    # slew × derate apart (Liberty's slew convention, common practice).
    bench = Timeline(cfg, cell, 1e-9, (slew,))
    wave, event = bench.clock(slew, edges=2)
    assert isinstance(wave, stimulus.Pwl)
    t, v = (np.array(x) for x in zip(*wave.corners, strict=True))
    vdd = cfg.process.vdd
    inside = (t >= event.start - QUANTUM) & (t <= event.end + QUANTUM)  # the active edge
    lo, hi = (
        single_crossing(t[inside], v[inside], f * vdd, "rise", "clock")
        for f in cfg.thresholds.slew_band("rise")
    )
    assert hi - lo == pytest.approx(slew * cfg.thresholds.slew_derate, rel=SLEW_RTOL, abs=0)


def test_liberty_and_json_name_the_shape_and_parse(driven):
    cfg, folder = driven
    result = flow.characterize(cfg, cells=["QINV_P1"], jobs=1)
    assert not result.failures
    written = flow.write(cfg, result, folder / "out")
    lib = next(p for p in written if p.suffix == ".lib")
    text = lib.read_text()
    assert "input waveform: driver-shaped: output of QINV_P1 > QINV_P1" in text
    # The independent Liberty parser (liberty-parser on PyPI) reads the file.
    parsed = parse_liberty(text)
    assert [g.args[0] for g in parsed.get_groups("cell")] == ["QINV_P1"]
    doc = flow.to_json(cfg, result)
    assert doc["input_shape"]["kind"] == "driver"
    assert doc["input_shape"]["rise"] == [list(c) for c in cfg.input_shape.rise]


@pytest.mark.parametrize(
    ("section", "key"),
    [
        ('kind = "spline"', "input_shape.kind"),
        ('kind = "driver"', "input_shape.driver"),
        ('kind = "driver"\ndriver = ["QNOPE"]', "input_shape.driver"),
        (
            'kind = "driver"\ndriver = ["QINV_P1"]\nfanout_pin = "QINV_P1.Z"',
            "input_shape.fanout_pin",
        ),
        ('kind = "driver"\ndriver = ["QINV_P1"]\nfanout = 0', "input_shape.fanout"),
        ('kind = "file"', "input_shape.file"),
        ('kind = "linear"\ncurve = 2', "input_shape.curve"),
    ],
)
def test_a_bad_input_shape_section_names_its_key(tmp_path, section, key):
    with pytest.raises(ConfigError) as err:
        _config(tmp_path, DATA / "small_l1.toml", f"[input_shape]\n{section}\n")
    assert err.value.context["key"] == key


BACKEND_RTOL = 1e-3  # shared against subprocess ngspice on the same point (as test_timing)


def test_a_shaped_point_is_alike_on_both_backends_and_never_the_ramps(driven):
    # The same point and waveform through libngspice and through `ngspice -b` (the PWL's
    # vector composed in a .control block) agree; the ramp's result measured first in this
    # process (its grid corner is a cached probe) does not serve the shaped point.
    cfg, _ = driven
    deck = netlist.build_deck(cfg, cfg.cell("QINV_P1"))
    point = next(p for p in flow.select(cfg, ["QINV_P1"]).points if p.input_edge == "rise")
    ramp = combinational.measure_point(replace(cfg, input_shape=InputShape()), deck, point)
    shaped = combinational.measure_point(cfg, deck, point)
    batch = replace(cfg, simulation=replace(cfg.simulation, backend="subprocess"))
    alone = combinational.measure_point(batch, deck, point)
    assert alone.delay == pytest.approx(shaped.delay, rel=BACKEND_RTOL, abs=0)
    assert alone.transition == pytest.approx(shaped.transition, rel=BACKEND_RTOL, abs=0)
    assert abs(shaped.delay / ramp.delay - 1) > BACKEND_RTOL
