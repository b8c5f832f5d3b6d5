"""Expression printers: one sympy expression -> C99 or NumPy source text.

Printers only turn one expression into text; :mod:`metricc.emit` assembles whole files.
Both languages print the same operations in the same order (so the C and NumPy backends agree
to rounding): small integer powers become repeated multiplications, negative powers become
divisions, ``x**(1/2)`` becomes ``sqrt(x)``. :func:`count_ops` counts the operations of
exactly what is printed (additions, multiplications, divisions, function calls).
"""
from __future__ import annotations

import sympy as sp

MAX_UNROLLED_POWER = 16

_C_FUNCS = {
    "sin": "sin", "cos": "cos", "tan": "tan", "asin": "asin", "acos": "acos", "atan": "atan",
    "atan2": "atan2", "sinh": "sinh", "cosh": "cosh", "tanh": "tanh", "asinh": "asinh",
    "acosh": "acosh", "atanh": "atanh", "exp": "exp", "log": "log", "Abs": "fabs",
}
_NP_FUNCS = {
    "sin": "np.sin", "cos": "np.cos", "tan": "np.tan", "asin": "np.arcsin",
    "acos": "np.arccos", "atan": "np.arctan", "atan2": "np.arctan2", "sinh": "np.sinh",
    "cosh": "np.cosh", "tanh": "np.tanh", "asinh": "np.arcsinh", "acosh": "np.arccosh",
    "atanh": "np.arctanh", "exp": "np.exp", "log": "np.log", "Abs": "np.abs",
}

_PREC_ADD, _PREC_MUL, _PREC_NEG, _PREC_ATOM = 10, 20, 25, 100


def as_expr(e) -> sp.Basic:
    """A sympy object from an internal value: sympy objects pass through, Python numbers are
    wrapped. Text is refused: nothing here ever parses a string (spec text is parsed only by
    metricc.expr)."""
    if isinstance(e, sp.Basic):
        return e
    if isinstance(e, bool) or not isinstance(e, (int, float)):
        raise TypeError(f"expected a sympy expression or a number, got {type(e).__name__}")
    return sp.Integer(e) if isinstance(e, int) else sp.Float(e)


def number_literal(value) -> str:
    """A double literal that round-trips: 2 -> '2.0', 1/3 -> '0.3333333333333333'."""
    f = float(value)
    if f != f or f in (float("inf"), float("-inf")):
        raise ValueError(f"non-finite constant {value}")
    text = repr(f)
    if "e" not in text and "." not in text:
        text += ".0"
    return text


def _split_mul(expr: sp.Mul):
    """(sign, coefficient or None, numerator factors, denominator factors) of a product."""
    coeff, factors = expr.as_coeff_mul()
    sign = 1
    if coeff < 0:
        sign, coeff = -1, -coeff
    num, den = [], []
    for f in factors:
        if f.is_Pow and f.exp.is_Number and f.exp < 0:
            den.append(f.base if f.exp == -1 else sp.Pow(f.base, -f.exp, evaluate=False))
        else:
            num.append(f)
    return sign, (None if coeff == 1 else coeff), num, den


class Printer:
    """Print sympy expressions in ``lang`` = "c" or "numpy".

    ``functions`` renames functions in the output, e.g. ``{"sin": "kerr_sin"}`` for the
    generated C files' own sin (see metricc.emit_trig); the names not given keep the table's.
    """

    def __init__(self, lang: str, functions: dict | None = None):
        if lang not in ("c", "numpy"):
            raise ValueError(lang)
        self.lang = lang
        table = _NP_FUNCS if lang == "numpy" else _C_FUNCS
        self._functions = {**table, **(functions or {})}

    def __call__(self, expr) -> str:
        return self._print(as_expr(expr), 0)

    def _wrap(self, text: str, prec: int, outer: int) -> str:
        return f"({text})" if prec < outer else text

    def _print(self, e, outer: int) -> str:
        if e.is_Symbol:
            return e.name
        if e.is_Number:
            text = number_literal(e)
            return self._wrap(text, _PREC_NEG if text.startswith("-") else _PREC_ATOM, outer)
        if e.is_NumberSymbol:
            return number_literal(sp.N(e, 20))
        if e.is_Add:
            return self._wrap(self._print_add(e), _PREC_ADD, outer)
        if e.is_Mul:
            text, prec = self._print_mul(e)
            return self._wrap(text, prec, outer)
        if e.is_Pow:
            text, prec = self._print_pow(e)
            return self._wrap(text, prec, outer)
        return self._print_function(e)

    def _print_add(self, e: sp.Add) -> str:
        terms = e.as_ordered_terms()
        parts = []
        for i, term in enumerate(terms):
            negative = term.could_extract_minus_sign()
            body = self._print(-term if negative else term, _PREC_ADD + 1 if i else _PREC_ADD)
            if i == 0:
                parts.append(("-" + self._print(-term, _PREC_MUL)) if negative else body)
            else:
                parts.append((" - " if negative else " + ") + body)
        return "".join(parts)

    def _print_mul(self, e: sp.Mul) -> tuple[str, int]:
        sign, coeff, num, den = _split_mul(e)
        factors = [] if coeff is None else [number_literal(coeff)]
        factors += [self._print(f, _PREC_MUL) for f in sp.Mul(*num).as_ordered_factors()] \
            if num else []
        text = "*".join(factors) if factors else "1.0"
        if den:
            den_expr = den[0] if len(den) == 1 else sp.Mul(*den, evaluate=False)
            if len(den) == 1:
                den_text = self._print(den_expr, _PREC_ATOM)
            else:
                den_text = "(" + "*".join(self._print(f, _PREC_MUL) for f in
                                          sorted(den, key=sp.default_sort_key)) + ")"
            text = f"{text}/{den_text}"
        if sign < 0:
            return "-" + text, _PREC_NEG
        return text, _PREC_MUL

    def _print_pow(self, e: sp.Pow) -> tuple[str, int]:
        base, exp = e.base, e.exp
        if exp.is_Integer:
            n = int(exp)
            if n < 0:
                inner, _ = self._print_pow(sp.Pow(base, -n, evaluate=False)) if n != -1 else (
                    self._print(base, _PREC_ATOM), _PREC_ATOM)
                return f"1.0/{self._wrap(inner, _PREC_ATOM, _PREC_ATOM) if n == -1 else '(' + inner + ')'}", _PREC_MUL
            if n == 0:
                return "1.0", _PREC_ATOM
            if n == 1:
                return self._print(base, _PREC_ATOM), _PREC_ATOM
            if n <= MAX_UNROLLED_POWER:
                b = self._print(base, _PREC_MUL + 1)
                return "*".join([b] * n), _PREC_MUL
            return self._call("pow", [base, sp.Integer(n)]), _PREC_ATOM
        if exp.is_Rational and exp.q == 2:
            if exp.p < 0:
                inner, prec = self._print_pow(sp.Pow(base, -exp, evaluate=False))
                return f"1.0/{self._wrap(inner, prec, _PREC_ATOM)}", _PREC_MUL
            root = self._call("sqrt", [base])
            whole = exp.p // 2
            if whole == 0:
                return root, _PREC_ATOM
            if whole == 1:
                return f"{self._print(base, _PREC_MUL + 1)}*{root}", _PREC_MUL
            powtext, _ = self._print_pow(sp.Pow(base, whole, evaluate=False))
            return f"{powtext}*{root}", _PREC_MUL
        return self._call("pow", [base, exp]), _PREC_ATOM

    def _call(self, name: str, args) -> str:
        inner = ", ".join(self._print(a, 0) for a in args)
        if self.lang == "numpy":
            name = {"pow": "np.power", "sqrt": "np.sqrt"}.get(name, name)
        return f"{name}({inner})"

    def _print_function(self, e) -> str:
        fname = type(e).__name__
        if fname == "sign":
            x = self._print(e.args[0], 0)
            return f"np.sign({x})" if self.lang == "numpy" else \
                f"((double)(({x}) > 0.0) - (double)(({x}) < 0.0))"
        if fname == "DiracDelta":
            return "0.0"
        if fname == "Heaviside":
            x = self._print(e.args[0], 0)
            return f"np.heaviside({x}, 0.5)" if self.lang == "numpy" else \
                f"(({x}) > 0.0 ? 1.0 : (({x}) < 0.0 ? 0.0 : 0.5))"
        if fname not in self._functions:
            raise NotImplementedError(f"cannot print function {fname}")
        args = ", ".join(self._print(a, 0) for a in e.args)
        return f"{self._functions[fname]}({args})"


# Printed as libm calls a compiler cannot vectorise without a vector math library; sqrt and
# fabs are single instructions and vectorise everywhere.
_SCALAR_CALLS = frozenset(_C_FUNCS) - {"Abs"}


def is_library_call(e) -> bool:
    """True when the printers write ``e`` as a libm call other than sqrt or fabs (sin, exp,
    pow with a non-integer exponent, ...): the calls that keep a loop scalar."""
    if e.is_Pow:
        exp = e.exp
        if exp.is_Integer:
            return abs(int(exp)) > MAX_UNROLLED_POWER
        return not (exp.is_Rational and exp.q == 2)
    return isinstance(e, sp.Function) and type(e).__name__ in _SCALAR_CALLS


def library_calls(exprs) -> list:
    """The distinct library-call nodes (see is_library_call) of ``exprs``, in first-seen
    preorder; a call nested in another call's argument is listed too."""
    seen: dict = {}
    for e in exprs:
        for node in sp.preorder_traversal(as_expr(e)):
            if not node.is_Atom and node not in seen and is_library_call(node):
                seen[node] = None
    return list(seen)


def count_ops(e, memo: dict | None = None) -> int:
    """Floating-point operations of ``e`` as the printers write it (calls count as one).

    Counts the expression as a tree (a repeated subexpression counts each time); ``memo``
    caches per distinct node, so the cost is linear in the expression's DAG size.
    """
    e = as_expr(e)
    if memo is None:
        memo = {}
    return _count(e, memo)


def _count(e, memo: dict) -> int:
    if e.is_Atom or e.is_NumberSymbol:
        return 0
    hit = memo.get(e)
    if hit is not None:
        return hit
    if e.is_Add:
        ops = len(e.args) - 1 + sum(_count(a, memo) for a in e.args)
    elif e.is_Mul:
        sign, coeff, num, den = _split_mul(e)
        n_num = len(num) + (coeff is not None)
        ops = max(n_num - 1, 0) + sum(_count(f, memo) for f in num)
        if den:
            ops += 1 + (len(den) - 1) + sum(_count(f, memo) for f in den)
    elif e.is_Pow:
        base, exp = e.base, e.exp
        inner = _count(base, memo)
        if exp.is_Integer:
            n = abs(int(exp))
            ops = inner + (n - 1 if 1 <= n <= MAX_UNROLLED_POWER else 1) + (1 if exp < 0 else 0)
        elif exp.is_Rational and exp.q == 2:
            whole = abs(exp.p) // 2
            ops = inner + 1 + (whole if whole else 0) + (1 if exp < 0 else 0)
        else:
            ops = inner + 1 + _count(exp, memo)
    else:
        ops = 1 + sum(_count(a, memo) for a in e.args)
    memo[e] = ops
    return ops
