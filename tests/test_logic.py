"""Tests of charflow.logic against independent references.

References: Python's own Boolean operators (written with explicit parentheses, since Python's
precedence differs from Liberty's), and the independent Liberty function parser in the
liberty-parser package (T. Kramer, liberty-parser 0.0.29, PyPI, module boolean_functions).
Gate functions (INV, NAND2, AOI21, ...) and their timing senses are common practice.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable, Sequence

import pytest
import sympy
from hypothesis import given
from hypothesis import strategies as st
from liberty.boolean_functions import parse_boolean_function

from charflow.records.errors import FunctionSyntaxError
from charflow.records.logic import (
    And,
    Const,
    Expr,
    Not,
    Or,
    Sensitization,
    Var,
    Xor,
    parse,
    sdf_condition,
    sensitizations,
    timing_sense,
    truth_table,
    when_condition,
)

CELL, PIN = "VL_NAND2_X1", "ZN"


def outputs(text: str, inputs: Sequence[str]) -> list[bool]:
    return [out for _, out in truth_table(parse(text), inputs)]


def reference(fn: Callable[..., bool], n: int) -> list[bool]:
    return [bool(fn(*values)) for values in itertools.product((False, True), repeat=n)]


def kramer(text: str, inputs: Sequence[str]) -> list[bool]:
    """Truth table as read by the independent liberty-parser package."""
    formula = parse_boolean_function(text)
    return [
        bool(formula.subs({sympy.Symbol(p): v for p, v in zip(inputs, values, strict=True)}))
        for values in itertools.product((False, True), repeat=len(inputs))
    ]


# Reference functions of common cells; common practice.
GATES = [
    ("!A", ("A",), lambda a: not a),
    ("A'", ("A",), lambda a: not a),
    ("!(A&B)", ("A", "B"), lambda a, b: not (a and b)),
    ("(A*B)'", ("A", "B"), lambda a, b: not (a and b)),
    ("!(A|B)", ("A", "B"), lambda a, b: not (a or b)),
    ("!(A+B)", ("A", "B"), lambda a, b: not (a or b)),
    ("!((A1&A2)|B)", ("A1", "A2", "B"), lambda a1, a2, b: not ((a1 and a2) or b)),
    ("!((A1|A2)&B)", ("A1", "A2", "B"), lambda a1, a2, b: not ((a1 or a2) and b)),
    ("A^B", ("A", "B"), lambda a, b: a != b),
    ("(S&B)|(!S&A)", ("A", "B", "S"), lambda a, b, s: b if s else a),
]


@pytest.mark.parametrize(("text", "inputs", "fn"), GATES)
def test_gate_truth_tables_match_python(
    text: str, inputs: tuple[str, ...], fn: Callable[..., bool]
) -> None:
    assert outputs(text, inputs) == reference(fn, len(inputs))


@pytest.mark.parametrize(("text", "inputs", "fn"), GATES)
def test_gate_truth_tables_match_liberty_parser(
    text: str, inputs: tuple[str, ...], fn: Callable[..., bool]
) -> None:
    assert outputs(text, inputs) == kramer(text, inputs)


PRECEDENCE = [
    ("A|B&C", lambda a, b, c: a or (b and c)),
    ("!A&B", lambda a, b, c: (not a) and b),
    ("A^B|C", lambda a, b, c: (a != b) or c),
    ("A|B^C", lambda a, b, c: a or (b != c)),
    # Liberty binds XOR tighter than AND (Liberty Reference Manual, from memory; liberty-parser
    # agrees), unlike Python and C.
    ("A&B^C", lambda a, b, c: a and (b != c)),
    ("A^B&C", lambda a, b, c: (a != b) and c),
    ("A B^C", lambda a, b, c: a and (b != c)),
    ("!A^B", lambda a, b, c: (not a) != b),
    ("A'&B", lambda a, b, c: (not a) and b),
    ("!A'", lambda a, b, c: a),
    ("A B", lambda a, b, c: a and b),
    ("A B C", lambda a, b, c: a and b and c),
    ("A !B", lambda a, b, c: a and not b),
    ("(A|B) C", lambda a, b, c: (a or b) and c),
    ("A B|C", lambda a, b, c: (a and b) or c),
    ("A' B", lambda a, b, c: (not a) and b),
    ("(A&B)'|C", lambda a, b, c: (not (a and b)) or c),
    ("A&1|0", lambda a, b, c: a),
]


@pytest.mark.parametrize(("text", "fn"), PRECEDENCE)
def test_precedence_juxtaposition_and_postfix(text: str, fn: Callable[..., bool]) -> None:
    inputs = ("A", "B", "C")
    assert outputs(text, inputs) == reference(fn, 3)
    assert outputs(text, inputs) == kramer(text, inputs)


def test_parse_builds_the_expected_tree() -> None:
    assert parse("A|B&C") == Or(Var("A"), And(Var("B"), Var("C")))
    assert parse("A&B^C") == And(Var("A"), Xor(Var("B"), Var("C")))
    assert parse("A'") == Not(Var("A"))
    assert parse(" 1 ") == Const(True)


def test_variables_and_evaluate() -> None:
    expr = parse("!((A1&A2)|B)")
    assert expr.variables() == frozenset({"A1", "A2", "B"})
    assert expr.evaluate({"A1": True, "A2": True, "B": False}) is False
    assert parse("0|1").variables() == frozenset()


def test_truth_table_follows_the_given_input_order() -> None:
    rows = truth_table(parse("A&!B"), ["B", "A"])
    assert [list(assign) for assign, _ in rows] == [["B", "A"]] * 4
    assert [tuple(assign.values()) for assign, _ in rows] == list(
        itertools.product((False, True), repeat=2)
    )
    assert [out for _, out in rows] == [False, True, False, False]


def exprs() -> st.SearchStrategy[Expr]:
    leaves = st.one_of(st.sampled_from("ABCD").map(Var), st.booleans().map(Const))
    return st.recursive(
        leaves,
        lambda kids: st.one_of(
            kids.map(Not),
            st.builds(And, kids, kids),
            st.builds(Or, kids, kids),
            st.builds(Xor, kids, kids),
        ),
        max_leaves=12,
    )


@given(exprs())
def test_round_trip_is_equivalent(expr: Expr) -> None:
    inputs = sorted(expr.variables())
    text = expr.to_liberty()
    again = parse(text)
    assert truth_table(again, inputs) == truth_table(expr, inputs)
    # Canonical text is a fixed point of parse and print.
    assert again.to_liberty() == text


@given(exprs())
def test_canonical_text_reads_the_same_in_liberty_parser(expr: Expr) -> None:
    inputs = sorted(expr.variables())
    assert kramer(expr.to_liberty(), inputs) == [out for _, out in truth_table(expr, inputs)]


def test_to_liberty_uses_minimal_parentheses() -> None:
    assert parse("((A)&(B))|(C)").to_liberty() == "A&B|C"
    assert parse("(A|B)&C").to_liberty() == "(A|B)&C"
    assert parse("(A B)'").to_liberty() == "!(A&B)"
    assert parse("A*(B+C)^D").to_liberty() == "A&(B|C)^D"


def test_nand2_related_a_is_negative_unate_with_b_high() -> None:
    expr, inputs = parse("!(A&B)"), ("A", "B")
    assert sensitizations(expr, inputs, "A") == (
        Sensitization("A", (("B", True),), "negative_unate"),
    )
    assert timing_sense(expr, inputs, "A") == "negative_unate"


def test_aoi21_related_b_needs_a1_and_a2_false() -> None:
    expr, inputs = parse("!((A1&A2)|B)"), ("A1", "A2", "B")
    found = sensitizations(expr, inputs, "B")
    assert [s.side for s in found] == [
        (("A1", False), ("A2", False)),
        (("A1", False), ("A2", True)),
        (("A1", True), ("A2", False)),
    ]
    assert {s.sense for s in found} == {"negative_unate"}
    assert {s.related_pin for s in found} == {"B"}


def test_xor2_is_non_unate() -> None:
    expr, inputs = parse("A^B"), ("A", "B")
    assert sensitizations(expr, inputs, "A") == (
        Sensitization("A", (("B", False),), "positive_unate"),
        Sensitization("A", (("B", True),), "negative_unate"),
    )
    assert timing_sense(expr, inputs, "A") == "non_unate"


def test_mux2_select_is_sensitized_when_data_differ() -> None:
    expr, inputs = parse("(S&B)|(!S&A)"), ("A", "B", "S")
    assert sensitizations(expr, inputs, "S") == (
        Sensitization("S", (("A", False), ("B", True)), "positive_unate"),
        Sensitization("S", (("A", True), ("B", False)), "negative_unate"),
    )
    assert timing_sense(expr, inputs, "S") == "non_unate"
    assert timing_sense(expr, inputs, "A") == "positive_unate"
    assert [s.side for s in sensitizations(expr, inputs, "A")] == [
        (("B", False), ("S", False)),
        (("B", True), ("S", False)),
    ]


@pytest.mark.parametrize("text", ["A", "A&(B|!B)", "A|B&0"])
def test_pin_the_function_ignores_has_no_arc(text: str) -> None:
    expr = parse(text)
    assert sensitizations(expr, ("A", "B"), "B") == ()
    assert timing_sense(expr, ("A", "B"), "B") is None


def test_sdf_condition() -> None:
    # SDF's COND takes a Verilog-style expression of equalities to 1'b0 / 1'b1 joined by &&
    # (IEEE Std 1497-2001, Standard Delay Format, section on conditions).
    assert sdf_condition((("B", True), ("C", False))) == "B == 1'b1 && C == 1'b0"
    assert sdf_condition(()) == ""


def test_when_condition() -> None:
    assert when_condition((("B", True), ("C", False))) == "B&!C"
    assert when_condition(()) == ""
    for s in sensitizations(parse("!((A1&A2)|B)"), ("A1", "A2", "B"), "B"):
        assert parse(when_condition(s.side)).evaluate(dict(s.side)) is True


@pytest.mark.parametrize(
    ("text", "where"),
    [
        ("", "empty"),
        ("   ", "empty"),
        ("(A&B", "'(' is never closed at column 1"),
        ("A&(B|C", "'(' is never closed at column 3"),
        ("A&B)", "unexpected ')' at column 4"),
        ("()", "unexpected ')' at column 2"),
        ("A&", "unexpected end at column 3"),
        ("&A", "unexpected '&' at column 1"),
        ("A|", "unexpected end"),
        ("!", "unexpected end"),
        ("A&&B", "unexpected '&' at column 3"),
        ("A^|B", "unexpected '|' at column 3"),
        ("A$B", "'$' is not a pin name, constant or operator at column 2"),
        ("A&10", "'10' is not a pin name"),
        ("1A", "'1A' is not a pin name"),
    ],
)
def test_syntax_errors_name_cell_pin_and_position(text: str, where: str) -> None:
    with pytest.raises(FunctionSyntaxError) as info:
        parse(text, cell=CELL, pin=PIN)
    message = str(info.value)
    assert f"cell {CELL}" in message
    assert f"pin {PIN}" in message
    assert where in message
    assert repr(text) in message


def test_unknown_pin_in_truth_table_is_named() -> None:
    with pytest.raises(FunctionSyntaxError) as info:
        truth_table(parse("A&C"), ["A", "B"], cell=CELL, pin=PIN)
    message = str(info.value)
    assert f"cell {CELL}" in message
    assert f"pin {PIN}" in message
    assert "uses C," in message


def test_bad_inputs_for_sensitization_are_errors() -> None:
    with pytest.raises(FunctionSyntaxError, match=f"cell {CELL}, pin {PIN}: related pin X"):
        sensitizations(parse("A&B"), ("A", "B"), "X", cell=CELL, pin=PIN)
    with pytest.raises(FunctionSyntaxError, match="repeat a pin"):
        truth_table(parse("A"), ("A", "A"))
