"""A whitelist parser for the spec's expression language.

Spec text is untrusted, so it is never handed to ``eval``, ``exec``, ``sympify`` or
``parse_expr``. This module tokenises and parses it by hand into a small immutable tree of
:class:`Node` objects; :mod:`metricc.geometry` turns that tree into sympy objects, and the spec
stage checks names on it without importing sympy (so a warm load stays light).

Grammar (``^`` and ``**`` are the same operator, right-associative, binding tighter than unary
minus, so ``-x^2`` is ``-(x^2)`` and ``2^-1`` is ``2^(-1)``)::

    expr   := term (('+' | '-') term)*
    term   := unary (('*' | '/') unary)*
    unary  := ('+' | '-') unary | power
    power  := atom (('^' | '**') unary)?
    atom   := NUMBER | NAME | NAME '(' expr (',' expr)* ')' | '(' expr ')'

Numbers are decimal literals (``2``, ``1.01``, ``6.67e-11``), kept exact as fractions.
"""
from __future__ import annotations

import math
import operator
import re
from dataclasses import dataclass
from fractions import Fraction

from .errors import quoted

# Functions of the language and their number of arguments.
FUNCTIONS: dict[str, int] = {
    "sin": 1, "cos": 1, "tan": 1, "asin": 1, "acos": 1, "atan": 1, "atan2": 2,
    "sinh": 1, "cosh": 1, "tanh": 1, "asinh": 1, "acosh": 1, "atanh": 1,
    "exp": 1, "log": 1, "sqrt": 1, "abs": 1,
}
CONSTANTS = ("pi",)

# The arithmetic node kinds and their operations (the float evaluator here and the sympy
# builder in metricc.geometry share them; "pow" and "neg" need care of their own).
ARITHMETIC = {"add": operator.add, "sub": operator.sub, "mul": operator.mul,
              "div": operator.truediv}

# Bounds that keep any spec from hanging or exhausting memory.
MAX_LENGTH = 20_000       # characters in one expression
MAX_DEPTH = 100           # nesting of parentheses, calls and operators
MAX_DIGITS = 40           # significant digits in one numeric literal
MAX_DECIMAL_EXPONENT = 300  # |e| in a literal such as 1e300


class ExprError(ValueError):
    """A syntax error in one expression; ``offset`` is the 0-based character position."""

    def __init__(self, message: str, offset: int):
        super().__init__(message)
        self.message = message
        self.offset = offset


@dataclass(frozen=True, slots=True)
class Node:
    """One node of an expression tree.

    kind: ``"num"`` (value: Fraction), ``"name"`` (value: str), ``"call"`` (value: function
    name), ``"neg"``, ``"add"``, ``"sub"``, ``"mul"``, ``"div"``, ``"pow"`` (value: None).
    args: child nodes. pos: 0-based offset of the node's first character in the source.
    """
    kind: str
    value: object
    args: tuple["Node", ...]
    pos: int


_TOKEN = re.compile(r"""
    (?P<ws>[ \t\r\n]+)
  | (?P<num>(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?)
  | (?P<name>[A-Za-z_][A-Za-z0-9_]*)
  | (?P<op>\*\*|[-+*/^(),])
""", re.VERBOSE | re.ASCII)


def _tokenize(text: str) -> list[tuple[str, str, int]]:
    tokens = []
    pos = 0
    while pos < len(text):
        m = _TOKEN.match(text, pos)
        if m is None:
            ch = text[pos]
            hint = ""
            if ch in "[]{}":
                hint = " (use parentheses for grouping)"
            elif ch in "=<>!&|%~;:'\"`\\.@#$?":
                hint = " (only + - * / ^ ** and function calls are allowed)"
            raise ExprError(f"unexpected character {ch!r}{hint}", pos)
        kind = m.lastgroup
        if kind != "ws":
            tokens.append((kind, m.group(), pos))
        pos = m.end()
    tokens.append(("end", "", len(text)))
    return tokens


def _number(text: str, pos: int) -> Fraction:
    """The exact value of a decimal literal. Leading zeros are not digits that count
    (``0000.10`` has two), so no long digit string ever reaches int() (which refuses more
    than 4300 digits), and the value's size is bounded however many zeros it carries."""
    mantissa, _, exponent = text.lower().partition("e")
    whole, _, frac = mantissa.partition(".")
    digits = (whole + frac).lstrip("0")
    if len(digits) > MAX_DIGITS:
        raise ExprError(f"number literal has more than {MAX_DIGITS} digits", pos)
    if not digits:
        return Fraction(0)
    if len(exponent.lstrip("+-").lstrip("0")) > 6:
        raise ExprError(f"number literal exponent beyond 1e±{MAX_DECIMAL_EXPONENT}", pos)
    exp = int(exponent) if exponent else 0
    if abs(exp) > MAX_DECIMAL_EXPONENT:
        raise ExprError(f"number literal exponent beyond 1e±{MAX_DECIMAL_EXPONENT}", pos)
    # value = digits * 10^scale; its size is 10^(scale + len(digits) - 1)
    scale = exp - len(frac)
    magnitude = scale + len(digits) - 1
    if abs(magnitude) > MAX_DECIMAL_EXPONENT:
        raise ExprError(f"number literal beyond 1e±{MAX_DECIMAL_EXPONENT}", pos)
    return Fraction(int(digits)) * Fraction(10) ** scale


class _Parser:
    def __init__(self, text: str):
        self.tokens = _tokenize(text)
        self.i = 0
        self.depth = 0

    def peek(self) -> tuple[str, str, int]:
        return self.tokens[self.i]

    def take(self) -> tuple[str, str, int]:
        tok = self.tokens[self.i]
        self.i += 1
        return tok

    def expect(self, value: str, what: str) -> None:
        kind, text, pos = self.take()
        if text != value or kind != "op":
            found = "end of expression" if kind == "end" else repr(text)
            raise ExprError(f"expected {what}, found {found}", pos)

    def enter(self, pos: int) -> None:
        self.depth += 1
        if self.depth > MAX_DEPTH:
            raise ExprError(f"expression nested deeper than {MAX_DEPTH} levels", pos)

    def leave(self) -> None:
        self.depth -= 1

    def parse(self) -> Node:
        node = self.expr()
        kind, text, pos = self.peek()
        if kind != "end":
            if kind in ("name", "num") or text == "(":
                raise ExprError(f"unexpected {quoted(text)}: missing operator (write 2*r, "
                                "not 2r)", pos)
            raise ExprError(f"unexpected {quoted(text)}", pos)
        return node

    def expr(self) -> Node:
        node = self.term()
        while self.peek()[1] in ("+", "-") and self.peek()[0] == "op":
            _, op, pos = self.take()
            self.enter(pos)
            rhs = self.term()
            self.leave()
            node = Node("add" if op == "+" else "sub", None, (node, rhs), node.pos)
        return node

    def term(self) -> Node:
        node = self.unary()
        while self.peek()[1] in ("*", "/") and self.peek()[0] == "op":
            _, op, pos = self.take()
            self.enter(pos)
            rhs = self.unary()
            self.leave()
            node = Node("mul" if op == "*" else "div", None, (node, rhs), node.pos)
        return node

    def unary(self) -> Node:
        kind, text, pos = self.peek()
        if kind == "op" and text in ("+", "-"):
            self.take()
            self.enter(pos)
            operand = self.unary()
            self.leave()
            return operand if text == "+" else Node("neg", None, (operand,), pos)
        return self.power()

    def power(self) -> Node:
        base = self.atom()
        kind, text, pos = self.peek()
        if kind == "op" and text in ("^", "**"):
            self.take()
            self.enter(pos)
            exponent = self.unary()
            self.leave()
            return Node("pow", None, (base, exponent), base.pos)
        return base

    def atom(self) -> Node:
        kind, text, pos = self.take()
        if kind == "num":
            return Node("num", _number(text, pos), (), pos)
        if kind == "name":
            if self.peek()[1] == "(" and self.peek()[0] == "op":
                return self.call(text, pos)
            return Node("name", text, (), pos)
        if kind == "op" and text == "(":
            self.enter(pos)
            node = self.expr()
            self.leave()
            self.expect(")", "')'")
            return node
        if kind == "end":
            raise ExprError("expression ends where a value was expected", pos)
        raise ExprError(f"unexpected {quoted(text)} where a value was expected", pos)

    def call(self, fname: str, pos: int) -> Node:
        self.take()  # '('
        self.enter(pos)
        args = [self.expr()]
        while self.peek()[1] == "," and self.peek()[0] == "op":
            self.take()
            args.append(self.expr())
        self.leave()
        self.expect(")", "')' closing the call")
        return Node("call", fname, tuple(args), pos)


def parse(text: str) -> Node:
    """Parse one expression into a :class:`Node` tree; raises :class:`ExprError`.

    Only syntax is checked here; whether each name exists is the spec stage's job. Function
    names and argument counts are checked here because they are fixed by the language.
    """
    if not isinstance(text, str):
        raise ExprError("expected a string holding an expression", 0)
    if len(text) > MAX_LENGTH:
        raise ExprError(f"expression longer than {MAX_LENGTH} characters", MAX_LENGTH)
    if not text.strip():
        raise ExprError("empty expression", 0)
    tree = _Parser(text).parse()
    _check_calls(tree)
    return tree


def _check_calls(node: Node) -> None:
    stack = [node]
    while stack:
        n = stack.pop()
        if n.kind == "call":
            arity = FUNCTIONS.get(n.value)
            if arity is None:
                hint = closest(n.value, FUNCTIONS)
                raise ExprError(f"unknown function {quoted(n.value)}"
                                + (f" (did you mean {hint!r}?)" if hint else ""), n.pos)
            if len(n.args) != arity:
                raise ExprError(f"{n.value}() takes {arity} argument{'s' * (arity > 1)}, "
                                f"got {len(n.args)}", n.pos)
        stack.extend(n.args)


def fold(tree: Node, leaf, combine):
    """Evaluate a tree bottom-up without recursion (a flat sum of thousands of terms is a
    tree thousands of levels deep): leaf(node) for "num" and "name" nodes, combine(node,
    [values of its args]) for the others. Returns the root's value."""
    stack: list[tuple[Node, bool]] = [(tree, False)]
    values: list = []
    while stack:
        node, ready = stack.pop()
        if not node.args:
            values.append(leaf(node))
        elif not ready:
            stack.append((node, True))
            stack.extend((a, False) for a in reversed(node.args))
        else:
            n = len(node.args)
            args = values[-n:]
            del values[-n:]
            values.append(combine(node, args))
    return values[0]


def names(node: Node) -> list[tuple[str, int]]:
    """All names used in a tree (not function names), as (name, offset), in source order."""
    found = []
    stack = [node]
    while stack:
        n = stack.pop()
        if n.kind == "name":
            found.append((n.value, n.pos))
        stack.extend(reversed(n.args))
    return sorted(found, key=lambda item: item[1])


# Longest word "did you mean" looks at: names are at most 64 characters, and the edit
# distance costs len(word) * len(candidate) per candidate.
MAX_SUGGEST_LENGTH = 128


def closest(word: str, candidates) -> str | None:
    """The candidate nearest to ``word`` by edit distance, if it is plausibly a typo.

    Bounded work: words longer than MAX_SUGGEST_LENGTH get no suggestion, and a candidate
    whose length differs by more than the allowed distance is skipped without computing it."""
    if len(word) > MAX_SUGGEST_LENGTH:
        return None
    limit = max(1, len(word) // 3)
    best, best_d = None, None
    for cand in sorted(candidates):
        if abs(len(cand) - len(word)) > limit:
            continue
        d = _edit_distance(word.lower(), cand.lower())
        if best_d is None or d < best_d:
            best, best_d = cand, d
    if best is None or best_d > limit:
        return None
    return best


def _edit_distance(a: str, b: str) -> int:
    prev = list(range(len(b) + 1))
    for i, ca in enumerate(a, 1):
        cur = [i]
        for j, cb in enumerate(b, 1):
            cur.append(min(prev[j] + 1, cur[j - 1] + 1, prev[j - 1] + (ca != cb)))
        prev = cur
    return prev[-1]


_MATH = {"sin": math.sin, "cos": math.cos, "tan": math.tan, "asin": math.asin,
         "acos": math.acos, "atan": math.atan, "atan2": math.atan2, "sinh": math.sinh,
         "cosh": math.cosh, "tanh": math.tanh, "asinh": math.asinh, "acosh": math.acosh,
         "atanh": math.atanh, "exp": math.exp, "log": math.log, "sqrt": math.sqrt,
         "abs": abs}


def constant_value(text: str, values: dict[str, float] | None = None) -> float:
    """The value of a constant expression in the spec language (``pi/2``, ``2*sqrt(2)``,
    ``6.674e-11``): numbers, ``pi``, operators and functions, and the names in ``values``
    (name -> float, e.g. parameter defaults), no other names. Evaluated in floating point on
    the parsed tree; raises ExprError for a bad or non-finite value."""
    tree = parse(text)
    values = values or {}

    def leaf(n: Node) -> float:
        if n.kind == "num":
            return float(n.value)
        if n.value == "pi":
            return math.pi
        if n.value in values:
            return float(values[n.value])
        raise ExprError(f"unknown name {quoted(n.value)} (only numbers and pi here)", n.pos)

    def combine(n: Node, args: list[float]) -> float:
        k = n.kind
        if k == "call":
            return _MATH[n.value](*args)
        if k == "neg":
            return -args[0]
        if k in ARITHMETIC:
            return ARITHMETIC[k](*args)
        return math.pow(*args)

    try:
        result = fold(tree, leaf, combine)
    except (ValueError, ZeroDivisionError, OverflowError, TypeError) as exc:
        if isinstance(exc, ExprError):
            raise
        raise ExprError(f"cannot evaluate {quoted(text)}: {exc}", 0) from None
    if not math.isfinite(result):
        raise ExprError(f"{quoted(text)} is not finite", 0)
    return result
