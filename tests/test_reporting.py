"""The units reports give table axes in, and the percent they give errors in.

Each Liberty index variable names what it indexes: ``*_transition`` / ``*_transition_time``
are times, ``*_capacitance`` are capacitances (the lu_table_template ``variable_N`` values of the
open Liberty standard's reference manual; from memory). A report gives a time in the library's
time_unit and a capacitance in its capacitive_load_unit.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from charflow.analysis import reporting
from charflow.config import library as config
from charflow.records.units import index_unit
from charflow.tables.table import Axis
from charflow.tables.tabulate import LOAD_AXIS, OTHER_LOAD_AXIS, SLEW_AXIS

ROOT = Path(__file__).resolve().parents[1]
SMALL_L1 = ROOT / "tests" / "data" / "small_l1.toml"  # time_unit ns, cap_unit pf
NS, PF = 1e-9, 1e-12

TIME_VARIABLES = (
    "input_net_transition",
    "constrained_pin_transition",
    "related_pin_transition",
    "input_transition_time",
)
CAP_VARIABLES = ("total_output_net_capacitance", "related_out_total_output_net_capacitance")


@pytest.mark.parametrize("variable", TIME_VARIABLES)
def test_a_transition_index_is_in_the_time_unit(variable: str) -> None:
    assert index_unit(variable, config.load(SMALL_L1)) == (NS, "ns")


@pytest.mark.parametrize("variable", CAP_VARIABLES)
def test_a_capacitance_index_is_in_the_capacitance_unit(variable: str) -> None:
    assert index_unit(variable, config.load(SMALL_L1)) == (PF, "pf")


def test_a_point_is_stated_in_library_units() -> None:
    cfg = config.load(SMALL_L1)
    axes = (Axis(SLEW_AXIS, (0.0, 1.0)), Axis(LOAD_AXIS, (0.0, 1.0)), Axis(OTHER_LOAD_AXIS, (0.0,)))
    at = reporting.where(cfg, axes, (0.0123 * NS, 0.004 * PF, 0.01 * PF))
    assert at == "slew 0.0123 ns, load 0.004 pf, other load 0.01 pf"


def test_an_error_is_given_in_percent_to_three_digits() -> None:
    assert reporting.pct(0.042249) == "4.22 %"
    assert reporting.pct(0.5) == "50 %"
    assert reporting.pct(None) == "failed"
