"""Error bars (``[error_bars]``): every combinational grid value re-measured at tightened
settings. Held against the closed-form ramp response of a first-order RC, where the true
value is known; needs ngspice (fails without it)."""

from __future__ import annotations

import json
import logging
import math
import shutil
import tomllib
from pathlib import Path

import pytest
from scipy.optimize import brentq

from charflow.analysis import fidelity
from charflow.analysis import report as report_html
from charflow.config import library as config
from charflow.execution.store import FILE_NAME, Store
from charflow.flow import characterize as flow
from charflow.measurement import combinational as timing
from charflow.measurement import stepsize
from charflow.plan import arcs as planning
from charflow.plan import cellwork
from charflow.records.errors import ConfigError
from charflow.records.points import TIGHT_RELTOL, TIGHT_STEPS, TightPoint
from charflow.simulation import netlist

DATA = Path(__file__).parent / "data"
RC_CONFIG = DATA / "rc_cell.toml"
R_OHMS = 1e3  # R1 in tests/data/rc_cell.sp
# A denser grid than the file's: slews from a near step (RC/400 at the smallest load) to
# twenty RCs, loads over a factor of twenty.
RC_SLEWS = [0.005, 0.05, 0.5, 2.0]  # ns
RC_LOADS = [0.1, 0.5, 1.0, 2.0]  # pF
BRENTQ_XTOL = 1e-18  # s
# Refining the base step fourfold (samples_per_edge 20 -> 80) must shrink the largest error
# bar at least this much (measured: 6.7 times on the RC cell, its floor left).
SHRINK = 2.0
FINE_SAMPLES = 80
# On the RC cell every bar is at least the tightened run's reltol of the value, and the
# largest is below this (measured 0.17 %, the largest true error 0.13 %).
RC_LARGEST_BAR = 0.005


@pytest.fixture(scope="module", autouse=True)
def _needs_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not on PATH; these tests need it")


def _rc_doc(**sections: dict) -> dict:
    doc = tomllib.loads(RC_CONFIG.read_text(encoding="utf-8"))
    doc["grid"] = {"slew": RC_SLEWS, "load": RC_LOADS}
    doc.update(sections)
    return doc


def _rc(**sections: dict) -> config.LibraryConfig:
    return config.parse(_rc_doc(**sections), RC_CONFIG)


def _ramp_response(t: float, duration: float, tau: float) -> float:
    """A first-order RC's output, as a fraction of the swing, for a full-swing input ramp of
    ``duration`` starting at t = 0: the ramp convolved with the step response 1 - e^(-t/tau)
    (Rabaey, Chandrakasan & Nikolic, Digital Integrated Circuits, 2nd ed., 2003):
    (t - tau (1 - e^(-t/tau))) / T while the ramp lasts, 1 - (tau/T)(e^(T/tau) - 1) e^(-t/tau)
    after it."""
    if t <= duration:
        return (t + tau * math.expm1(-t / tau)) / duration
    return 1.0 - tau / duration * math.expm1(duration / tau) * math.exp(-t / tau)


def _truth(cfg: config.LibraryConfig, point) -> tuple[float, float]:
    """(delay, transition) of the RC cell at ``point`` from the ramp response. A falling
    edge mirrors the rising one: its thresholds are counted from the top."""
    thr = cfg.thresholds
    tau = R_OHMS * point.load
    lower, upper = thr.slew_band(point.input_edge)
    # A table slew s spends s * derate between the slew thresholds of a linear full swing.
    duration = point.slew * thr.slew_derate / (upper - lower)
    rising = point.output_edge == "rise"

    def crossing(fraction: float) -> float:
        level = fraction if rising else 1.0 - fraction
        end = duration + 50.0 * tau
        return brentq(lambda t: _ramp_response(t, duration, tau) - level, 0, end, xtol=BRENTQ_XTOL)

    along = thr.delay_input(point.input_edge)
    t_in = (along if point.input_edge == "rise" else 1.0 - along) * duration
    out_lower, out_upper = thr.slew_band(point.output_edge)
    edge = abs(crossing(out_upper) - crossing(out_lower))
    return crossing(thr.delay_output(point.output_edge)) - t_in, edge / thr.slew_derate


@pytest.fixture(scope="module")
def rc_run():
    cfg = _rc(error_bars={"points": "all"})
    return cfg, flow.characterize(cfg, jobs=1)


def test_rc_error_bars_hold_the_closed_form(rc_run):
    cfg, result = rc_run
    bars = {t.point.base: t for t in result.tight}
    assert len(bars) == len(result.measurements) == 2 * len(RC_SLEWS) * len(RC_LOADS)
    for m in result.measurements:
        t = bars[m.point]
        delay, transition = _truth(cfg, m.point)
        for what, value, tight, true in (
            ("delay", m.delay, t.delay, delay),
            ("transition", m.transition, t.transition, transition),
        ):
            bar = t.bar(value, tight)
            assert abs(value - true) <= bar, f"{m.point.label}: {what}"
            # Honest, and not vacuous: never below the tightened run's tolerance, and small.
            assert t.reltol * abs(tight) <= bar <= RC_LARGEST_BAR * abs(true), m.point.label


def test_the_bar_is_the_tightened_settings_of_the_flip_flop_checks(rc_run):
    # One definition of "tightened" (records.points), used by the flip-flop checks too.
    cfg, result = rc_run
    deck = netlist.build_deck(cfg, cfg.cell("RCCELL"))
    step, options = stepsize.tightened(deck, 1e-12)
    assert step == pytest.approx(1e-12 / TIGHT_STEPS, rel=1e-12, abs=0)
    # ngspice's default reltol, 1e-3 (the ngspice manual, .options), over TIGHT_RELTOL
    assert options == (f"reltol={1e-3 / TIGHT_RELTOL:.3g}",)
    assert {t.reltol for t in result.tight} == {1e-3 / TIGHT_RELTOL}


def test_error_bars_shrink_as_the_base_step_is_refined():
    largest = []
    for samples in (None, FINE_SAMPLES):
        sim = {} if samples is None else {"samples_per_edge": samples}
        cfg = _rc(simulation=sim)
        deck = netlist.build_deck(cfg, cfg.cell("RCCELL"))
        bars = {}
        for p in planning.plan(cfg).points:
            m = timing.measure_point(cfg, deck, p)
            t = timing.measure_tight(cfg, deck, TightPoint(p))
            bars[p.coordinates, p.input_edge] = max(
                t.bar(m.delay, t.delay) / abs(t.delay),
                t.bar(m.transition, t.transition) / t.transition,
            )
        largest.append(bars)
    coarse, fine = largest
    for where, bar in coarse.items():
        assert fine[where] < bar, where
    assert max(fine.values()) * SHRINK < max(coarse.values())


def test_json_fidelity_and_store(rc_run, tmp_path):
    cfg, result = rc_run
    doc = flow.to_json(cfg, result)  # conftest validates it against the schema
    point = doc["points"]["RCCELL"][0]
    assert point["delay_error_s"] > 0 and point["transition_error_s"] > 0
    arc = doc["cells"][0]["arcs"][0]
    assert [t["quantity"] for t in arc["error_tables"]] == [t["quantity"] for t in arc["tables"]]
    assert doc["cells"][0]["inputs"][0]["rise_capacitance_error_F"] > 0
    assert doc["error_bars"]["points"] == "all" and doc["error_bars"]["unbarred"] == []
    # The fidelity report's per-table summary reads the tables' error bars.
    cell = result.cells[0]
    checks = [
        fidelity.error_bar_stats(t, e, cfg.fidelity.rel_floor, cfg.error_bars.warn_above)
        for st in cell.arcs[0].states
        for t, e in zip(st.tables, st.errors, strict=True)
    ]
    assert all(0 < c.median_rel <= c.max_rel < RC_LARGEST_BAR for c in checks)
    # A rerun from the store simulates nothing and gives the same bars.
    with Store(tmp_path / FILE_NAME) as store:
        first = flow.characterize(cfg, jobs=1, store=store)
        again = flow.characterize(cfg, jobs=1, store=store)
    assert first.simulations > 0 and again.simulations == 0
    assert again.tight == first.tight
    written = json.dumps(flow.to_json(cfg, again)["cells"])
    assert written == json.dumps(flow.to_json(cfg, first)["cells"])


def test_off_by_default_and_warned_over_the_limit(caplog):
    assert _rc().error_bars == config.ErrorBars("none", 0.001)
    off = _rc()
    assert cellwork.tight_points(off, planning.plan(off).points) == ()
    # Every bar is at least the tightened reltol (0.01 %) of its value: all are over 0.001 %.
    limit = {"points": "all", "warn_above": 0.001}
    cfg = _rc(grid={"slew": [2.0], "load": [1.0]}, error_bars=limit)
    with caplog.at_level(logging.WARNING, logger="charflow"):
        flow.characterize(cfg, jobs=1)
    said = [r.getMessage() for r in caplog.records if "error bar" in r.getMessage()]
    # Cell, arc with its edges, and the point in the library's units (ns, pF).
    assert any(
        "cell RCCELL" in s and "arc A->Y (A rise, Y rise)" in s and "slew 2 ns, load 1 pf" in s
        for s in said
    ), said
    assert len(said) == 4  # cell_rise, rise_transition, cell_fall, fall_transition


@pytest.mark.parametrize(
    ("section", "key", "says"),
    [
        ({"points": "some"}, "error_bars.points", "must be 'none' or 'all'"),
        ({"points": True}, "error_bars.points", "must be str"),
        ({"warn_above": -1}, "error_bars.warn_above", "greater than 0"),
        ({"warn_above": 150}, "error_bars.warn_above", "at most 100"),
        ({"warn_above": "0.1"}, "error_bars.warn_above", "must be float"),
        ({"every": "all"}, "error_bars.every", "unknown key"),
    ],
)
def test_config_errors_name_the_key(section, key, says):
    with pytest.raises(ConfigError) as caught:
        config.parse(_rc_doc(error_bars=section), RC_CONFIG)
    assert key in str(caught.value) and says in str(caught.value)
    assert str(RC_CONFIG) in str(caught.value)


def test_warn_above_is_a_percentage():
    assert _rc(error_bars={"warn_above": 0.5}).error_bars.warn_above == pytest.approx(0.005)


def test_fidelity_report_summarises_each_tables_error_bars(rc_run):
    cfg, result = rc_run
    report = fidelity.check(cfg, result.cells, jobs=1)
    barred = [c for c in report.checks if c.error_bars is not None]
    assert len(barred) == len(report.checks) == 4
    largest, median, over = report.bar_spread() or (0.0, 0.0, -1)
    assert 0 < median <= largest < RC_LARGEST_BAR and over >= 0
    doc = fidelity.to_json(cfg, report)
    assert doc["summary"]["error_bars"]["worst_max_rel"] == largest
    table = doc["cells"][0]["arcs"][0]["states"][0]["tables"][0]
    assert table["error_bars"]["max_rel"] >= table["error_bars"]["median_rel"] > 0
    lines = "\n".join(fidelity.summary_lines(cfg, report))
    assert "error bars" in lines and "RCCELL A->Y cell_rise" in lines
    assert "median error bar" in report_html.fidelity_html(cfg, report, jobs=1)
