"""Waveform measurements and input ramps, against analytic waveforms; no simulator needed."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from charflow.config.library import Thresholds
from charflow.measurement.waves import (
    crossings,
    crossings_loop,
    integral,
    single_crossing,
    supply_energy,
    transition,
)
from charflow.records.errors import MeasurementError
from charflow.simulation import stimulus

# The twins do the same floating-point operations in the same order: equal to the last bit.
TWIN_RTOL = 0.0
TWIN_ATOL = 0.0
# Linear interpolation on an exponential sampled at tau/2000: a time error near (h/tau)^2 / 8.
EXP_RTOL = 1e-6
# Trapezoids of tau/114 on a smooth pulse (about 3e-6 off), and one static step between samples.
PULSE_RTOL = 2e-5
# Sums of a few hundred products: rounding only.
ROUND_RTOL = 1e-12
VDD = 1.2


@st.composite
def waveforms(draw):
    """Increasing sample times, values often exactly on the level, a level and a direction."""
    n = draw(st.integers(2, 40))
    steps = draw(st.lists(st.floats(1e-3, 10.0), min_size=n - 1, max_size=n - 1))
    t = draw(st.floats(-10.0, 10.0)) + np.concatenate(([0.0], np.cumsum(steps)))
    level = draw(st.floats(-2.0, 2.0))
    value = st.one_of(st.just(level), st.sampled_from([-1.0, 0.0, 1.0]), st.floats(-3.0, 3.0))
    v = np.array(draw(st.lists(value, min_size=n, max_size=n)))
    return t, v, level, draw(st.sampled_from([-1, 0, 1]))


@settings(max_examples=400)
@given(waveforms())
def test_crossings_equal_the_loop_twin(case):
    t, v, level, direction = case
    got = crossings(t, v, level, direction)
    want = np.asarray(crossings_loop(t, v, level, direction), dtype=float)
    assert got.shape == want.shape
    np.testing.assert_allclose(got, want, rtol=TWIN_RTOL, atol=TWIN_ATOL)


@settings(max_examples=400)
@given(waveforms())
def test_single_crossing_equals_the_vectorised_crossing(case):
    # A waveform that crosses once: single_crossing's scalar interpolation to the bit.
    t, v, level, _ = case
    found = crossings(t, v, level, 0)
    if len(found) != 1 or v[-1] == v[0]:
        return
    edge = "rise" if v[-1] > v[0] else "fall"
    assert single_crossing(t, v, level, edge, "v") == float(found[0])


def integral_by_mask(t, y, lo, hi):
    """The plain way, kept only to check ``integral``: numpy's own trapezoid rule on the
    samples a mask keeps strictly inside (lo, hi), the ends interpolated."""
    inside = (t > lo) & (t < hi)
    ts = np.concatenate(([lo], t[inside], [hi]))
    ys = np.concatenate(([np.interp(lo, t, y)], y[inside], [np.interp(hi, t, y)]))
    return float(np.trapezoid(ys, ts))


@settings(max_examples=400)
@given(waveforms(), st.floats(-0.2, 1.2), st.floats(-0.2, 1.2), st.booleans())
def test_integral_equals_numpys_trapezoid_to_the_bit(case, a, b, on_samples):
    # Bounds between samples, on them (the mask's strict ends), before the first or past the last.
    t, v, _, _ = case
    if on_samples:
        lo, hi = (t[int(x * (len(t) - 1))] for x in (min(max(a, 0.0), 1.0), min(max(b, 0.0), 1.0)))
    else:
        lo, hi = (t[0] + x * (t[-1] - t[0]) for x in (a, b))
    got = integral(t, v, lo, hi)
    want = integral_by_mask(t, v, lo, hi)
    np.testing.assert_allclose(got, want, rtol=TWIN_RTOL, atol=TWIN_ATOL)
    assert integral(t, v) == integral_by_mask(t, v, t[0], t[-1])


@pytest.mark.parametrize(
    ("v", "direction", "want"),
    [
        ([0.0, 0.5, 1.0], 1, [1.0]),  # rising through a sample on the level: once, at it
        ([1.0, 0.5, 0.0], -1, [1.0]),  # falling through it: once, at it
        ([1.0, 0.5, 1.0], 0, []),  # touching from above and turning back
        ([0.0, 1.0, 0.0], 1, [0.5]),
        ([0.0, 1.0, 0.0], -1, [1.5]),
    ],
)
def test_crossings_on_the_level(v, direction, want):
    t = np.arange(3.0)
    got = crossings(t, np.array(v), 0.5, direction)
    np.testing.assert_allclose(got, want, rtol=TWIN_RTOL, atol=TWIN_ATOL)


def test_single_crossing_without_a_crossing():
    t = np.linspace(0.0, 1.0, 11)
    with pytest.raises(MeasurementError, match="never crosses"):
        single_crossing(t, 0.4 * t, 0.6, "rise", "output Y")


def test_single_crossing_of_a_glitch():
    t = np.linspace(0.0, 2.0, 21)
    v = VDD * np.sin(np.pi * t / 2.0)  # up to the rail and back: crosses the half twice
    with pytest.raises(MeasurementError, match="2 times"):
        single_crossing(t, v, 0.5 * VDD, "rise", "output Y")


def test_single_crossing_the_wrong_way():
    t = np.linspace(0.0, 1.0, 11)
    with pytest.raises(MeasurementError, match="wrong way"):
        single_crossing(t, VDD * (1.0 - t), 0.5 * VDD, "rise", "output Y")


@pytest.mark.parametrize("edge", ["rise", "fall"])
def test_exponential_edge_gives_the_rc_values(edge):
    # First-order RC step response v = V(1 - e^(-t/tau)): 50 % at ln2 tau, 20-80 % in ln4 tau
    # (Rabaey, Chandrakasan & Nikolic, Digital Integrated Circuits, 2nd ed., 2003).
    tau = 1e-9
    t = np.linspace(0.0, 20.0 * tau, 40001)
    rise = VDD * -np.expm1(-t / tau)
    v = rise if edge == "rise" else VDD - rise
    assert transition(t, v, VDD, (0.2, 0.8), edge, "output Y") == pytest.approx(
        math.log(4.0) * tau, rel=EXP_RTOL, abs=0
    )
    assert single_crossing(t, v, 0.5 * VDD, edge, "output Y") == pytest.approx(
        math.log(2.0) * tau, rel=EXP_RTOL, abs=0
    )


def test_integral_of_a_cubic_within_the_trapezoid_bound():
    # Composite trapezoid rule: |error| <= (b - a) h^2 / 12 max|f''| (Burden & Faires,
    # Numerical Analysis); the exact value from the polynomial's antiderivative.
    poly = np.polynomial.Polynomial([0.3, -2.0, 1.5, 4.0])
    t = np.linspace(0.0, 2.0, 401)
    lo, hi = t[40], t[360]
    h = t[1] - t[0]
    exact = poly.integ()(hi) - poly.integ()(lo)
    xs = np.linspace(lo, hi, 1001)
    bound = (hi - lo) * h**2 / 12.0 * np.max(np.abs(poly.deriv(2)(xs)))
    got = integral(t, poly(t), lo, hi)
    assert abs(got - exact) <= bound
    assert got != pytest.approx(exact, abs=bound / 100.0)  # the bound is not vacuous here


def test_integral_of_a_line_between_samples_is_exact():
    # The trapezoid rule integrates a line exactly, ends interpolated between samples included.
    poly = np.polynomial.Polynomial([-0.7, 3.0])
    t = np.sort(np.random.default_rng(7).uniform(0.0, 1.0, 300))
    lo, hi = 0.123456, 0.876543
    exact = poly.integ()(hi) - poly.integ()(lo)
    assert integral(t, poly(t), lo, hi) == pytest.approx(exact, rel=ROUND_RTOL, abs=0)
    whole = poly.integ()(t[-1]) - poly.integ()(t[0])
    assert integral(t, poly(t)) == pytest.approx(whole, rel=ROUND_RTOL, abs=0)


def test_supply_energy_is_the_charge_beyond_the_static_current():
    # A static current i0 before the switch and i1 after it, plus a charge q delivered as the
    # pulse q x e^-x / tau, x = (t - ts) / tau: the energy beyond the static draw up to ts + X tau
    # is vdd q (1 - (1 + X) e^-X), the pulse's integral. Trapezoids of h = tau/114 err by some
    # (h/tau)^2 / 12 ~ 6e-6 relative; the static step between two samples by far less.
    tau, q, i0, i1, ts = 20e-12, 3e-15, 2e-9, 5e-9, 100e-12
    t = np.linspace(0.0, ts + 30.0 * tau, 4001)
    x = np.maximum(t - ts, 0.0) / tau
    current = np.where(t >= ts, i1, i0) + q / tau * x * np.exp(-x)
    for end in (2.0, 30.0):
        want = VDD * q * (1.0 - (1.0 + end) * np.exp(-end))
        got = supply_energy(t, current, VDD, ts, (i0, i1), ts + end * tau)
        assert got == pytest.approx(want, rel=PULSE_RTOL, abs=0), end
    assert supply_energy(t, current, VDD, ts, (i0, i1)) == got


THRESHOLDS = Thresholds(
    slew_lower_rise=0.3,
    slew_upper_rise=0.7,
    slew_lower_fall=0.1,
    slew_upper_fall=0.9,
    slew_derate=0.5,
)


@pytest.mark.parametrize("edge", ["rise", "fall"])
@pytest.mark.parametrize("slew", [1e-12, 3.7e-11, 2e-9])
def test_ramp_spends_slew_times_derate_between_the_thresholds(edge, slew):
    # An input for table slew s spends s x derate between the slew thresholds, so a full swing
    # lasts s x derate / (upper - lower) (/work/shared/design.md; Liberty's
    # slew_derate_from_library convention: measured = stored x derate).
    lower, upper = THRESHOLDS.slew_band(edge)
    ramp = stimulus.ramp(slew, edge, THRESHOLDS, VDD)
    derated = slew * THRESHOLDS.slew_derate
    assert ramp.duration == pytest.approx(derated / (upper - lower), rel=ROUND_RTOL, abs=0)
    between = ramp.time_at(upper) - ramp.time_at(lower)
    assert (between if edge == "rise" else -between) == pytest.approx(
        derated, rel=ROUND_RTOL, abs=0
    )
    assert ramp.time_at(1.0 if edge == "rise" else 0.0) == pytest.approx(
        ramp.end, rel=ROUND_RTOL, abs=0
    )
