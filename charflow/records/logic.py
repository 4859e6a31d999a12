"""Boolean functions in Liberty syntax: parsing, evaluation, truth tables and arc sensitization.

The grammar, loosest binding first::

    or   := and (("|" | "+") and)*
    and  := xor (("&" | "*")? xor)*          juxtaposition ``A B`` is AND
    xor  := not ("^" not)*
    not  := "!" not | atom "'"*
    atom := NAME | "0" | "1" | "(" or ")"

Binding order NOT > XOR > AND > OR: the Liberty Reference Manual's order for the ``function``
attribute ("inversion first, then XOR, then AND, then OR"; from memory), also the order of the
independent liberty-parser package. It differs from C and Python, where AND binds tighter than XOR.
"""

from __future__ import annotations

import itertools
import re
from abc import ABC, abstractmethod
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import ClassVar, Literal

from charflow.records.errors import FunctionSyntaxError

Sense = Literal["positive_unate", "negative_unate"]
TimingSense = Literal["positive_unate", "negative_unate", "non_unate"]

# Binding strength of each node kind; a child binding looser than its parent needs parentheses.
_OR, _AND, _XOR, _NOT, _ATOM = range(5)

_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
# A digit run swallows trailing name characters so that "1A" is one bad token, not "1 A".
_TOKEN = re.compile(r"[A-Za-z_][A-Za-z0-9_]*|[0-9][A-Za-z0-9_]*|\S")
_OPERATORS = frozenset("!'&*|+^()")


class Expr(ABC):
    """A node of a Boolean function tree."""

    __slots__ = ()
    prec: ClassVar[int]

    @abstractmethod
    def evaluate(self, assign: Mapping[str, bool]) -> bool: ...

    @abstractmethod
    def variables(self) -> frozenset[str]: ...

    @abstractmethod
    def to_liberty(self) -> str:
        """Canonical Liberty text: ``!``, ``&``, ``|``, ``^`` and only the needed parentheses."""

    def _operand(self, parent_prec: int) -> str:
        text = self.to_liberty()
        return f"({text})" if self.prec < parent_prec else text


@dataclass(frozen=True, slots=True)
class Var(Expr):
    name: str
    prec: ClassVar[int] = _ATOM

    def evaluate(self, assign: Mapping[str, bool]) -> bool:
        try:
            return bool(assign[self.name])
        except KeyError as exc:
            raise FunctionSyntaxError("no value given for this input", pin=self.name) from exc

    def variables(self) -> frozenset[str]:
        return frozenset((self.name,))

    def to_liberty(self) -> str:
        return self.name


@dataclass(frozen=True, slots=True)
class Const(Expr):
    value: bool
    prec: ClassVar[int] = _ATOM

    def evaluate(self, assign: Mapping[str, bool]) -> bool:
        return self.value

    def variables(self) -> frozenset[str]:
        return frozenset()

    def to_liberty(self) -> str:
        return "1" if self.value else "0"


@dataclass(frozen=True, slots=True)
class Not(Expr):
    operand: Expr
    prec: ClassVar[int] = _NOT

    def evaluate(self, assign: Mapping[str, bool]) -> bool:
        return not self.operand.evaluate(assign)

    def variables(self) -> frozenset[str]:
        return self.operand.variables()

    def to_liberty(self) -> str:
        return "!" + self.operand._operand(_NOT)


@dataclass(frozen=True, slots=True)
class _Binary(Expr):
    left: Expr
    right: Expr
    symbol: ClassVar[str]

    def variables(self) -> frozenset[str]:
        return self.left.variables() | self.right.variables()

    def to_liberty(self) -> str:
        # AND, OR and XOR are associative, so an equal-strength child on either side needs no
        # parentheses for the text to stay equivalent.
        return self.left._operand(self.prec) + self.symbol + self.right._operand(self.prec)


@dataclass(frozen=True, slots=True)
class And(_Binary):
    prec: ClassVar[int] = _AND
    symbol: ClassVar[str] = "&"

    def evaluate(self, assign: Mapping[str, bool]) -> bool:
        return self.left.evaluate(assign) & self.right.evaluate(assign)


@dataclass(frozen=True, slots=True)
class Or(_Binary):
    prec: ClassVar[int] = _OR
    symbol: ClassVar[str] = "|"

    def evaluate(self, assign: Mapping[str, bool]) -> bool:
        return self.left.evaluate(assign) | self.right.evaluate(assign)


@dataclass(frozen=True, slots=True)
class Xor(_Binary):
    prec: ClassVar[int] = _XOR
    symbol: ClassVar[str] = "^"

    def evaluate(self, assign: Mapping[str, bool]) -> bool:
        return self.left.evaluate(assign) ^ self.right.evaluate(assign)


class _Parser:
    def __init__(self, text: str, cell: str | None, pin: str | None) -> None:
        self.text, self.cell, self.pin = text, cell, pin
        self.tokens = [(m.group(), m.start()) for m in _TOKEN.finditer(text)]
        self.i = 0

    def error(self, reason: str, pos: int) -> FunctionSyntaxError:
        return FunctionSyntaxError(
            f"{reason} at column {pos + 1} of function {self.text!r}", cell=self.cell, pin=self.pin
        )

    def peek(self) -> str:
        return self.tokens[self.i][0] if self.i < len(self.tokens) else ""

    def unexpected(self) -> FunctionSyntaxError:
        if self.i == len(self.tokens):
            return self.error("unexpected end", len(self.text))
        tok, pos = self.tokens[self.i]
        return self.error(f"unexpected {tok!r}", pos)

    def parse(self) -> Expr:
        if not self.tokens:
            raise FunctionSyntaxError(f"empty function {self.text!r}", cell=self.cell, pin=self.pin)
        for tok, pos in self.tokens:
            if tok not in _OPERATORS and tok not in ("0", "1") and not _NAME.fullmatch(tok):
                raise self.error(f"{tok!r} is not a pin name, constant or operator", pos)
        expr = self.or_()
        if self.i < len(self.tokens):
            raise self.unexpected()
        return expr

    def or_(self) -> Expr:
        expr = self.and_()
        while self.peek() in ("|", "+"):
            self.i += 1
            expr = Or(expr, self.and_())
        return expr

    def and_(self) -> Expr:
        expr = self.xor()
        while True:
            tok = self.peek()
            if tok in ("&", "*"):
                self.i += 1
            elif not (tok in ("(", "!", "0", "1") or _NAME.fullmatch(tok)):
                return expr
            expr = And(expr, self.xor())

    def xor(self) -> Expr:
        expr = self.not_()
        while self.peek() == "^":
            self.i += 1
            expr = Xor(expr, self.not_())
        return expr

    def not_(self) -> Expr:
        if self.peek() == "!":
            self.i += 1
            return Not(self.not_())
        expr = self.atom()
        while self.peek() == "'":
            self.i += 1
            expr = Not(expr)
        return expr

    def atom(self) -> Expr:
        tok = self.peek()
        if tok == "(":
            opened = self.tokens[self.i][1]
            self.i += 1
            expr = self.or_()
            if self.peek() != ")":
                if self.i == len(self.tokens):
                    raise self.error("'(' is never closed", opened)
                raise self.unexpected()
            self.i += 1
            return expr
        if tok in ("0", "1"):
            self.i += 1
            return Const(tok == "1")
        if _NAME.fullmatch(tok):
            self.i += 1
            return Var(tok)
        raise self.unexpected()


def parse(text: str, *, cell: str | None = None, pin: str | None = None) -> Expr:
    """Parse a Liberty ``function`` string; ``cell`` and ``pin`` locate errors."""
    return _Parser(text, cell, pin).parse()


def _check_inputs(expr: Expr, inputs: Sequence[str], cell: str | None, pin: str | None) -> None:
    if len(set(inputs)) != len(inputs):
        raise FunctionSyntaxError(f"inputs {', '.join(inputs)} repeat a pin", cell=cell, pin=pin)
    unknown = expr.variables() - set(inputs)
    if unknown:
        raise FunctionSyntaxError(
            f"function {expr.to_liberty()!r} uses {', '.join(sorted(unknown))}, "
            f"which is not among the inputs {', '.join(inputs)}",
            cell=cell,
            pin=pin,
        )


def truth_table(
    expr: Expr, inputs: Sequence[str], *, cell: str | None = None, pin: str | None = None
) -> list[tuple[dict[str, bool], bool]]:
    """All 2^n input vectors, counting up with the first input as the most significant bit."""
    _check_inputs(expr, inputs, cell, pin)
    rows = []
    for values in itertools.product((False, True), repeat=len(inputs)):
        assign = dict(zip(inputs, values, strict=True))
        rows.append((assign, expr.evaluate(assign)))
    return rows


@dataclass(frozen=True, slots=True)
class Sensitization:
    """Side-input values under which a toggle of ``related_pin`` toggles the output."""

    related_pin: str
    side: tuple[tuple[str, bool], ...]
    sense: Sense


def sensitizations(
    expr: Expr,
    inputs: Sequence[str],
    related: str,
    *,
    cell: str | None = None,
    pin: str | None = None,
) -> tuple[Sensitization, ...]:
    """Every sensitizing side assignment, sorted by side values (False before True, input order)."""
    _check_inputs(expr, inputs, cell, pin)
    if related not in inputs:
        raise FunctionSyntaxError(
            f"related pin {related} is not among the inputs {', '.join(inputs)}", cell=cell, pin=pin
        )
    side_pins = [p for p in inputs if p != related]
    found = []
    # itertools.product counts up, so the result comes out already sorted.
    for values in itertools.product((False, True), repeat=len(side_pins)):
        side = tuple(zip(side_pins, values, strict=True))
        low = expr.evaluate({**dict(side), related: False})
        high = expr.evaluate({**dict(side), related: True})
        if low != high:
            found.append(
                Sensitization(related, side, "positive_unate" if high else "negative_unate")
            )
    return tuple(found)


def timing_sense(
    expr: Expr,
    inputs: Sequence[str],
    related: str,
    *,
    cell: str | None = None,
    pin: str | None = None,
) -> TimingSense | None:
    """Liberty ``timing_sense`` of the arc from ``related``; None if the output ignores it."""
    senses = {s.sense for s in sensitizations(expr, inputs, related, cell=cell, pin=pin)}
    if len(senses) > 1:
        return "non_unate"
    return senses.pop() if senses else None


def when_condition(side: Sequence[tuple[str, bool]]) -> str:
    """Liberty ``when`` string for a side assignment, e.g. ``B&!C``; empty for no side inputs."""
    return "&".join(name if value else f"!{name}" for name, value in side)


def sdf_condition(side: Sequence[tuple[str, bool]]) -> str:
    """The same side assignment as an SDF condition (``sdf_cond``), e.g.
    ``B == 1'b1 && C == 1'b0``; empty for no side inputs."""
    return " && ".join(f"{name} == 1'b{int(value)}" for name, value in side)
