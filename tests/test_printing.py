"""Exact-string tests of the expression printers and of the operation counter."""
import sympy as sp
import pytest

from metricc.printing import Printer, count_ops, number_literal

x, y, z = sp.symbols("x y z", real=True)
C, NP = Printer("c"), Printer("numpy")


@pytest.mark.parametrize("expr, c_text, np_text, ops", [
    (x**2 + 3*y/z, "x*x + 3.0*y/z", "x*x + 3.0*y/z", 4),
    (-x*y, "-x*y", "-x*y", 1),
    (1/(x*y**2), "1.0/(x*y*y)", "1.0/(x*y*y)", 3),
    (sp.sqrt(x)/y, "sqrt(x)/y", "np.sqrt(x)/y", 2),
    (x**sp.Rational(-3, 2), "1.0/(x*sqrt(x))", "1.0/(x*np.sqrt(x))", 3),
    (sp.Rational(1, 3)*x - y, "0.3333333333333333*x - y", "0.3333333333333333*x - y", 2),
    (sp.Abs(z) - 2*x/y, "-2.0*x/y + fabs(z)", "-2.0*x/y + np.abs(z)", 4),
    (x**y, "pow(x, y)", "np.power(x, y)", 1),
    (sp.atan2(y, x), "atan2(y, x)", "np.arctan2(y, x)", 1),
    (sp.asinh(x) + sp.acos(y), "acos(y) + asinh(x)", "np.arccos(y) + np.arcsinh(x)", 3),
    (1 - x, "1.0 - x", "1.0 - x", 1),
    (sp.pi * x, "3.141592653589793*x", "3.141592653589793*x", 1),
])
def test_printers(expr, c_text, np_text, ops):
    assert C(expr) == c_text
    assert NP(expr) == np_text
    assert count_ops(expr) == ops


def test_large_powers_use_pow():
    assert C(x**20) == "pow(x, 20.0)"
    assert count_ops(x**20) == 1
    assert C(x**16) == "*".join(["x"] * 16)


def test_sign_prints_without_branches_in_c():
    assert C(sp.sign(x)) == "((double)((x) > 0.0) - (double)((x) < 0.0))"
    assert NP(sp.sign(x)) == "np.sign(x)"


def test_number_literals_round_trip():
    for value in (2, sp.Rational(1, 3), sp.Rational(-7, 2), sp.Float(1e-300), 6.02214076e23):
        text = number_literal(value)
        assert float(text) == float(value)
        assert "." in text or "e" in text


def test_internal_expressions_never_parse_text():
    from metricc.printing import as_expr
    assert as_expr(2) == sp.Integer(2) and as_expr(x) is x
    with pytest.raises(TypeError):
        as_expr("x + 1")
    with pytest.raises(TypeError):
        C("__import__('os')")
