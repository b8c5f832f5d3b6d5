"""The expression language: a hand-written whitelist parser (metricc/expr.py).

Trees are compared through a small s-expression printer written here, so the tests state the
grammar (precedence, associativity) directly and do not depend on node positions.
"""
from __future__ import annotations

import time
from fractions import Fraction

import pytest

from metricc import expr as ex

# The function set promised by the spec format, with arities.
CONTRACT_FUNCTIONS = {
    "sin": 1, "cos": 1, "tan": 1, "asin": 1, "acos": 1, "atan": 1, "atan2": 2,
    "sinh": 1, "cosh": 1, "tanh": 1, "asinh": 1, "acosh": 1, "atanh": 1,
    "exp": 1, "log": 1, "sqrt": 1, "abs": 1,
}


def sx(node: ex.Node) -> str:
    """Tree as an s-expression: numbers as fractions, names bare, (op child...) otherwise."""
    if node.kind == "num":
        f = node.value
        return str(f.numerator) if f.denominator == 1 else f"{f.numerator}/{f.denominator}"
    if node.kind == "name":
        return node.value
    head = node.value if node.kind == "call" else node.kind
    return "(" + " ".join([head] + [sx(a) for a in node.args]) + ")"


def p(text: str) -> str:
    return sx(ex.parse(text))


def parse_error(text) -> ex.ExprError:
    with pytest.raises(ex.ExprError) as info:
        ex.parse(text)
    return info.value


# -- precedence and associativity ------------------------------------------------------------
@pytest.mark.parametrize("text, tree", [
    ("-x^2", "(neg (pow x 2))"),
    ("-x**2", "(neg (pow x 2))"),
    ("2^-1", "(pow 2 (neg 1))"),
    ("2**-1", "(pow 2 (neg 1))"),
    ("a^b^c", "(pow a (pow b c))"),
    ("a**b**c", "(pow a (pow b c))"),
    ("a^b**c", "(pow a (pow b c))"),
    ("(a^b)^c", "(pow (pow a b) c)"),
    ("2^-x^2", "(pow 2 (neg (pow x 2)))"),
    ("a^-b*c", "(mul (pow a (neg b)) c)"),
    ("a*b^c", "(mul a (pow b c))"),
    ("a-b-c", "(sub (sub a b) c)"),
    ("a/b/c", "(div (div a b) c)"),
    ("a/b*c", "(mul (div a b) c)"),
    ("a-b+c", "(add (sub a b) c)"),
    ("a+b*c", "(add a (mul b c))"),
    ("(a+b)*c", "(mul (add a b) c)"),
    ("a*-b", "(mul a (neg b))"),
    ("-a*b", "(mul (neg a) b)"),
    ("--a", "(neg (neg a))"),
    ("+a", "a"),
    ("a - -b", "(sub a (neg b))"),
    ("-(a+b)", "(neg (add a b))"),
    ("sin(x)^2", "(pow (sin x) 2)"),
    ("atan2(y, x + 1)", "(atan2 y (add x 1))"),
    ("2*pi*r", "(mul (mul 2 pi) r)"),
    ("  r  +\t1 ", "(add r 1)"),
])
def test_precedence_and_associativity(text, tree):
    assert p(text) == tree


def test_double_star_is_caret():
    for text in ("r^2", "a^b^c", "-x^2 + y^-3", "(1+r)^(1/2)", "2^-1^2"):
        assert p(text) == p(text.replace("^", "**"))


def test_unary_minus_binds_looser_than_power_but_tighter_than_product():
    # -x^2 must not be (-x)^2; 2*-x is allowed.
    assert p("-x^2") != p("(-x)^2")
    assert p("(-x)^2") == "(pow (neg x) 2)"
    assert p("2*-x") == "(mul 2 (neg x))"


# -- numbers ---------------------------------------------------------------------------------
@pytest.mark.parametrize("text, value", [
    ("2", Fraction(2)),
    ("0.1", Fraction(1, 10)),
    ("1.01", Fraction(101, 100)),
    ("6.67e-11", Fraction(667, 10 ** 13)),
    ("1e3", Fraction(1000)),
    ("1.5E+2", Fraction(150)),
    (".5", Fraction(1, 2)),
    ("5.", Fraction(5)),
    ("0003.250", Fraction(13, 4)),
    ("1e300", Fraction(10) ** 300),
    ("1e-300", Fraction(1, 10 ** 300)),
])
def test_numbers_are_exact_fractions(text, value):
    node = ex.parse(text)
    assert node.kind == "num"
    assert isinstance(node.value, Fraction)
    assert node.value == value


def test_decimal_fraction_is_not_rounded_through_float():
    node = ex.parse("0.1")
    assert node.value != Fraction(0.1)        # the binary double nearest to 0.1
    assert node.value * 10 == 1


def test_negative_literal_is_negation_of_exact_number():
    node = ex.parse("-0.25")
    assert node.kind == "neg"
    assert node.args[0].value == Fraction(1, 4)


@pytest.mark.parametrize("text, offset", [
    ("1" * (ex.MAX_DIGITS + 1), 0),
    ("1" + "0" * 50, 0),
    ("0." + "3" * 60, 0),
    ("1e400", 0),
    ("1e-400", 0),
    (f"1e{ex.MAX_DECIMAL_EXPONENT + 1}", 0),
    ("r + 123456789012345678901234567890123456789012345", 4),
    ("2*(r - 1e999)", 7),
])
def test_huge_literals_rejected(text, offset):
    err = parse_error(text)
    assert "number" in err.message
    assert err.offset == offset


def test_literal_at_digit_limit_is_accepted():
    node = ex.parse("9" * ex.MAX_DIGITS)
    assert node.value == 10 ** ex.MAX_DIGITS - 1
    # leading zeros are not significant
    assert ex.parse("0" * 60 + "1").value == 1


# -- error offsets ---------------------------------------------------------------------------
@pytest.mark.parametrize("text, offset, fragment", [
    ("r + $", 4, "unexpected character '$'"),
    ("(r", 2, "expected ')'"),
    ("sin(r", 5, "')'"),
    ("r)", 1, "unexpected ')'"),
    ("r +", 3, "ends"),
    ("r^", 2, "ends"),
    ("sin()", 4, "where a value was expected"),
    ("r***2", 3, "'*'"),
    ("r ^ ^ 2", 4, "'^'"),
    ("r[0]", 1, "parentheses"),
    ("{r}", 0, "parentheses"),
    ("r; 1", 1, "';'"),
    ("r == 1", 2, "'='"),
    ("r.x", 1, "'.'"),
    ("r, r", 1, "','"),
    ("'r'", 0, "\"'\""),
    ("r % 2", 2, "'%'"),
    ("", 0, "empty"),
    ("   ", 0, "empty"),
])
def test_error_offsets(text, offset, fragment):
    err = parse_error(text)
    assert err.offset == offset, err.message
    assert fragment in err.message


def test_expr_error_is_value_error_with_message_and_offset():
    err = parse_error("1 + ?")
    assert isinstance(err, ValueError)
    assert err.offset == 4
    assert str(err) == err.message


@pytest.mark.parametrize("text, offset", [
    ("2r", 1),
    ("2 r", 2),
    ("3.5x + 1", 3),
    ("2(r+1)", 1),
    ("(r)(r)", 3),
    ("r 2", 2),
    ("x y", 2),
])
def test_implicit_multiplication_rejected_with_hint(text, offset):
    err = parse_error(text)
    assert err.offset == offset
    assert "missing operator" in err.message
    assert "2*r" in err.message          # the hint shows the explicit form


@pytest.mark.parametrize("text, offset, suggestion", [
    ("sinn(r)", 0, "sin"),
    ("r + Sqrt(r)", 4, "sqrt"),
    ("2*expp(r)", 2, "exp"),
    ("atn2(y, x)", 0, "atan2"),
    ("coss(r)^2", 0, "cos"),
])
def test_unknown_function_suggests_closest(text, offset, suggestion):
    err = parse_error(text)
    assert err.offset == offset
    assert "unknown function" in err.message
    assert f"did you mean '{suggestion}'?" in err.message


@pytest.mark.parametrize("text", ["frobnicate(r)", "eval(r)", "exec(r)", "open(r)",
                                  "__import__(r)", "getattr(r, r)", "sympify(r)", "r(2)"])
def test_unknown_function_without_plausible_suggestion(text):
    err = parse_error(text)
    assert "unknown function" in err.message
    name = text.split("(")[0]
    assert repr(name) in err.message


@pytest.mark.parametrize("text, offset, fname, want, got", [
    ("atan2(r)", 0, "atan2", 2, 1),
    ("sin(r, r)", 0, "sin", 1, 2),
    ("1 + exp(1, 2, 3)", 4, "exp", 1, 3),
    ("sqrt(atan2(1, 2, 3))", 5, "atan2", 2, 3),
])
def test_wrong_arity(text, offset, fname, want, got):
    err = parse_error(text)
    assert err.offset == offset
    assert fname in err.message
    assert str(want) in err.message and str(got) in err.message
    assert "argument" in err.message


@pytest.mark.parametrize("fname, arity", sorted(CONTRACT_FUNCTIONS.items()))
def test_every_contract_function_parses(fname, arity):
    args = ", ".join(["r"] * arity)
    node = ex.parse(f"{fname}({args})")
    assert node.kind == "call" and node.value == fname and len(node.args) == arity


def test_function_table_matches_contract():
    assert ex.FUNCTIONS == CONTRACT_FUNCTIONS
    assert "pi" in ex.CONSTANTS


def test_pi_is_a_name():
    node = ex.parse("2*pi")
    assert sx(node) == "(mul 2 pi)"


def test_function_names_are_case_sensitive():
    err = parse_error("Sin(r)")
    assert "did you mean 'sin'?" in err.message


# -- names -----------------------------------------------------------------------------------
def test_names_in_source_order_with_offsets():
    assert ex.names(ex.parse("b + a*sin(c) + a")) == [("b", 0), ("a", 4), ("c", 10), ("a", 15)]


def test_names_excludes_function_names():
    assert [n for n, _ in ex.names(ex.parse("sqrt(x) + atan2(y, z)"))] == ["x", "y", "z"]


def test_node_positions():
    node = ex.parse("1 + foo*bar")
    assert node.pos == 0
    mul = node.args[1]
    assert mul.kind == "mul" and mul.pos == 4
    assert mul.args[1].pos == 8


# -- closest ---------------------------------------------------------------------------------
def test_closest():
    assert ex.closest("Sigmq", ["Sigma", "Delta"]) == "Sigma"
    assert ex.closest("Delt", {"Sigma", "Delta"}) == "Delta"
    assert ex.closest("sigma", ["Sigma"]) == "Sigma"        # case-insensitive, keeps spelling
    assert ex.closest("theta", ["t", "r", "theta", "phi"]) == "theta"
    assert ex.closest("thet", ["t", "r", "theta", "phi"]) == "theta"
    assert ex.closest("zzzzzz", ["sin", "cos"]) is None
    assert ex.closest("anything", []) is None


def test_closest_is_deterministic():
    # Ties are broken the same way whatever the order of the candidates.
    a = ex.closest("ab", ["ac", "ad", "ae"])
    b = ex.closest("ab", ["ae", "ad", "ac"])
    assert a == b is not None


# -- resource bounds -------------------------------------------------------------------------
@pytest.mark.parametrize("text", [
    "(" * 1000 + "r" + ")" * 1000,
    "-" * 5000 + "r",
    "+" * 5000 + "r",
    "r^" * 2000 + "r",
    "sin(" * 500 + "r" + ")" * 500,
    "-(" * 300 + "r" + ")" * 300,
])
def test_deep_nesting_is_an_expr_error_not_a_crash(text):
    t0 = time.perf_counter()
    err = parse_error(text)
    assert "nested" in err.message
    assert time.perf_counter() - t0 < 10


def test_moderate_nesting_is_fine():
    assert p("(" * 50 + "r" + ")" * 50) == "r"


def test_overlong_expression_rejected():
    text = "+".join(["r"] * (ex.MAX_LENGTH // 2 + 10))
    assert len(text) > ex.MAX_LENGTH
    t0 = time.perf_counter()
    err = parse_error(text)
    assert "longer" in err.message
    assert time.perf_counter() - t0 < 10


def test_long_flat_sum_within_limit_parses():
    text = "+".join(["r"] * 2000)
    node = ex.parse(text)
    assert node.kind == "add"


@pytest.mark.parametrize("value", [None, 3, 2.5, b"r", ["r"]])
def test_non_string_rejected(value):
    err = parse_error(value)
    assert "string" in err.message


# -- things that are not in the language ------------------------------------------------------
@pytest.mark.parametrize("text", [
    "__import__('os').system('touch MARKER')",
    "open('MARKER', 'w')",
    "eval(\"1\")",
    "exec('x=1')",
    "lambda: 0",
    "r.__class__",
    "f'{r}'",
    "`r`",
    "r; r",
    "r if r else 0",
    "[r for r in r]",
    "(x := 1)",
    "r @ r",
    "r & r",
    "r | r",
    "~r",
    "!r",
    "r < 1",
    "r\\\n+1",
    "0x10",
    "1_000",
    "1j",
    "r # comment",
    "$r",
])
def test_non_language_constructs_rejected(text):
    with pytest.raises(ex.ExprError):
        ex.parse(text)


def test_constant_value():
    from metricc.expr import ExprError, constant_value
    assert constant_value("pi/2") == pytest.approx(3.141592653589793 / 2)
    assert constant_value("-pi/4") == pytest.approx(-3.141592653589793 / 4)
    assert constant_value("2*sqrt(2)^2") == pytest.approx(4.0)
    assert constant_value("1.5e3") == 1500.0
    for bad in ("r", "1/0", "2^2^2^2^2^2", "sqrt(-1)", "__import__('os')", "pie"):
        with pytest.raises(ExprError):
            constant_value(bad)
