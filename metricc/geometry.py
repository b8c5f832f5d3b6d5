"""Stage 2: Spec -> Geometry (sympy).

Turns the spec's expression trees into sympy objects (built node by node, never via sympify),
assembles the metric, differentiates it, picks how the inverse metric is obtained, and forms
the pieces every right-hand side is made of. It also checks the metric numerically at sample
points inside the domain (finite, symmetric by construction, non-singular, signature).

Index conventions: coordinates x^i, i = 0..dim-1 in spec order; ``dmetric[k][i, j]`` is
d g_{ij} / d x^k; ``christoffel_first[d][b][c]`` is Gamma_{d bc} (first kind).

Internal symbol names are mangled (``c0`` for coordinate 0, ``q0`` for parameter 0, ``v0`` for
velocity component 0, ``p0`` for momentum 0, ``g0_1`` for the metric entry g_01): no spec name
ever becomes an identifier in generated code.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, replace
from itertools import permutations
from fractions import Fraction

import numpy as np
import sympy as sp

from . import expr as ex
from .sampling import SIGNATURE_RTOL, SINGULAR_RTOL, evaluable, sample_inside, \
    scaled_spectrum
from .spec import Expression, Spec

MAX_EXPONENT = 64          # |n| for a numeric exponent
MAX_NUMBER_BITS = 20_000   # size of any exact number built while reading a spec
SAMPLE_POINTS = 32

_FUNCS = {
    "sin": sp.sin, "cos": sp.cos, "tan": sp.tan, "asin": sp.asin, "acos": sp.acos,
    "atan": sp.atan, "atan2": sp.atan2, "sinh": sp.sinh, "cosh": sp.cosh, "tanh": sp.tanh,
    "asinh": sp.asinh, "acosh": sp.acosh, "atanh": sp.atanh, "exp": sp.exp, "log": sp.log,
    "sqrt": sp.sqrt, "abs": sp.Abs,
}


def coordinate_symbols(dim: int) -> tuple[sp.Symbol, ...]:
    return tuple(sp.Symbol(f"c{i}", real=True) for i in range(dim))


def velocity_symbols(dim: int) -> tuple[sp.Symbol, ...]:
    return tuple(sp.Symbol(f"v{i}", real=True) for i in range(dim))


def momentum_symbols(dim: int) -> tuple[sp.Symbol, ...]:
    return tuple(sp.Symbol(f"p{i}", real=True) for i in range(dim))


def parameter_symbols(n: int) -> tuple[sp.Symbol, ...]:
    return tuple(sp.Symbol(f"q{j}", real=True) for j in range(n))


@dataclass(frozen=True)
class InverseBlock:
    """One diagonal block of the metric and how its inverse is obtained.

    indices: the coordinates of the block. strategy: ``"symbolic"`` (closed form in the metric
    entries, ``inverse`` holds it in terms of the entry symbols) or ``"numeric"`` (a small
    linear solve at run time). cost_symbolic / cost_numeric: estimated operations of each way.
    """
    indices: tuple[int, ...]
    strategy: str
    inverse: sp.ImmutableMatrix | None
    cost_symbolic: int | None
    cost_numeric: int
    # numeric blocks: a fixed elimination order (positions within the block) that needs no
    # pivoting at run time, when one was found safe at the sample points (else None)
    order: tuple[int, ...] | None = None
    # how a closed form was found: "adjugate" (over the determinant) or "rank-one" (the
    # whole metric is a constant matrix plus a rank-one term: see RankOneForm)
    form: str = ""


@dataclass(frozen=True)
class RankOneForm:
    """A metric of the form g = C + s l l^T (the Kerr-Schild form, for example): C a constant
    non-singular matrix, s a scalar function, l a covector with l[pivot] = 1.

    Then g^{-1} = C^{-1} - s m m^T / (1 + s l.m) with m = C^{-1} l (Sherman-Morrison), and
    d_k g_ab = d_k s l_a l_b + s (d_k l_a l_b + l_a d_k l_b), so the right-hand sides need
    O(dim^2) operations instead of O(dim^3). dscale[k] = d_k s; dvector[k][a] = d_k l_a.

    null: l.m = l^T C^{-1} l vanishes identically (as in the Kerr-Schild form of Kerr, where
    l is null for the flat metric); then the Sherman-Morrison denominator is 1 and
    g^{-1} = C^{-1} - s m m^T.
    """
    constant: sp.ImmutableMatrix
    constant_inverse: sp.ImmutableMatrix
    scale: sp.Expr
    vector: tuple[sp.Expr, ...]
    pivot: int
    dscale: tuple[sp.Expr, ...]
    dvector: tuple[tuple[sp.Expr, ...], ...]
    null: bool = False

    def raised_vector(self) -> list[sp.Expr]:
        """m = C^{-1} l."""
        n, ci = len(self.vector), self.constant_inverse
        return [sp.Add(*[ci[a, b] * self.vector[b] for b in range(n)]) for a in range(n)]

    def apply_inverse(self, column: list[sp.Expr]) -> list[sp.Expr]:
        """g^{-1} w for a column w (dim expressions)."""
        n = len(column)
        ci = self.constant_inverse
        m = self.raised_vector()
        mw = sp.Add(*[m[a] * column[a] for a in range(n)])
        if self.null:
            factor = self.scale * mw
        else:
            lm = sp.Add(*[self.vector[a] * m[a] for a in range(n)])
            factor = self.scale * mw / (1 + self.scale * lm)
        return [sp.Add(*[ci[a, b] * column[b] for b in range(n)]) - m[a] * factor
                for a in range(n)]


@dataclass(frozen=True)
class Geometry:
    """Symbolic geometry of one spec. All matrices are sympy ImmutableMatrix.

    metric: (dim, dim) g_{ij} in coordinates and parameters.
    metric_symbols: (dim, dim) symbols g{i}_{j} (shared for i, j and j, i) that stand for the
        metric entries inside inverse expressions.
    dmetric: tuple over k of (dim, dim) d_k g_{ij}.
    blocks: block-diagonal structure of the metric with the inverse strategy of each block.
    ignorable: coordinates the metric does not depend on (their momenta are conserved).
    signature: (negative, positive) eigenvalue counts seen at the sample points.
    """
    spec: Spec
    coords: tuple[sp.Symbol, ...]
    params: tuple[sp.Symbol, ...]
    velocity: tuple[sp.Symbol, ...]
    momentum: tuple[sp.Symbol, ...]
    metric: sp.ImmutableMatrix
    metric_symbols: sp.ImmutableMatrix
    dmetric: tuple[sp.ImmutableMatrix, ...]
    blocks: tuple[InverseBlock, ...]
    ignorable: tuple[int, ...]
    domain: tuple[tuple[str, sp.Expr], ...]
    events: tuple[tuple[str, sp.Expr], ...]
    signature: tuple[int, int]
    invariants: tuple[tuple[str, sp.Expr], ...] = ()
    norm_symbol: sp.Symbol = sp.Symbol("nrm", real=True)
    rank_one: RankOneForm | None = None

    @property
    def dim(self) -> int:
        return len(self.coords)

    @property
    def inverse_strategy(self) -> str:
        """"symbolic", "numeric" or "mixed" over the metric's diagonal blocks."""
        kinds = {b.strategy for b in self.blocks}
        return kinds.pop() if len(kinds) == 1 else "mixed"

    def second_derivative(self, i: int, j: int, c: int, d: int) -> sp.Expr:
        """d_c d_d g_{ij}."""
        return sp.diff(self.dmetric[c][i, j], self.coords[d])

    def christoffel_first(self, d: int, b: int, c: int) -> sp.Expr:
        """Gamma_{d bc} = 1/2 (d_b g_dc + d_c g_db - d_d g_bc)."""
        dg = self.dmetric
        return (dg[b][d, c] + dg[c][d, b] - dg[d][b, c]) / 2

    def geodesic_force(self) -> tuple[sp.Expr, ...]:
        """w_d = Gamma_{d bc} u^b u^c, so that du^a/dlambda = -g^{ad} w_d.

        Uses Gamma_{d bc} u^b u^c = (d_b g_dc - 1/2 d_d g_bc) u^b u^c, which needs one
        derivative term fewer than the textbook form. For a metric in rank-one form
        (g = C + s l l^T) the same sum is w_d = L l_d Ds + s L Dl_d + s l_d DLam
        - 1/2 L^2 d_d s - s L Lam_d, with L = l.u, Lam_k = d_k l.u and D = u^b d_b, written as
        w_d = l_d (L Ds + s DLam) + s L u^b (d_b l_d - d_d l_b) - 1/2 L^2 d_d s: Dl_d - Lam_d
        needs only the antisymmetric part of d_b l_d, half the products.
        """
        n, u, dg = self.dim, self.velocity, self.dmetric
        if self.rank_one is not None:
            ro = self.rank_one
            s, l, ds, dl = ro.scale, ro.vector, ro.dscale, ro.dvector
            L = sp.Add(*[l[a] * u[a] for a in range(n)])
            Ds = sp.Add(*[u[b] * ds[b] for b in range(n)])
            # Dl_d - Lam_d = u^b (d_b l_d - d_d l_b): only the antisymmetric part (the curl of
            # l) enters, and u^b u^d d_b l_d (DLam) only the symmetric one
            curl = {(b, d): dl[b][d] - dl[d][b] for b in range(n) for d in range(n)
                    if b < d}
            rot = [sp.Add(*[u[b] * (curl[(b, d)] if b < d else -curl[(d, b)])
                            for b in range(n) if b != d]) for d in range(n)]
            Dlam = sp.Add(*[u[b] * sp.Add(*[dl[b][a] * u[a] for a in range(n)])
                            for b in range(n)])
            return tuple(l[d] * (L * Ds + s * Dlam) + s * L * rot[d] - L**2 * ds[d] / 2
                         for d in range(n))
        out = []
        for d in range(n):
            total = sp.S.Zero
            for b in range(n):
                inner = sp.Add(*[dg[b][d, c] * u[c] for c in range(n)])
                total += u[b] * inner
            quad = sp.Add(*[dg[d][b, c] * u[b] * u[c] for b in range(n) for c in range(n)])
            out.append(total - quad / 2)
        return tuple(out)

    def hamilton_force(self) -> tuple[sp.Expr, ...]:
        """dp_k/dlambda = -1/2 d_k g^{ij} p_i p_j = +1/2 d_k g_{ij} u^i u^j with u = g^{-1} p.

        The right form avoids differentiating the inverse metric. For a metric in rank-one
        form (g = C + s l l^T): 1/2 d_k s (l.u)^2 + s (l.u) (d_k l.u).
        """
        n, u, dg = self.dim, self.velocity, self.dmetric
        if self.rank_one is not None:
            ro = self.rank_one
            L = sp.Add(*[ro.vector[a] * u[a] for a in range(n)])
            return tuple(ro.dscale[k] * L**2 / 2
                         + ro.scale * L * sp.Add(*[ro.dvector[k][a] * u[a] for a in range(n)])
                         for k in range(n))
        return tuple(sp.Add(*[dg[k][i, j] * u[i] * u[j] for i in range(n) for j in range(n)]) / 2
                     for k in range(n))

    def norm(self) -> sp.Expr:
        """g_{ij} u^i u^j in terms of the metric entry symbols and the velocity."""
        n, u, gs = self.dim, self.velocity, self.metric_symbols
        return sp.Add(*[gs[i, j] * u[i] * u[j] for i in range(n) for j in range(n)])


def derive(spec: Spec) -> Geometry:
    """Build the symbolic geometry of a validated spec; raises SpecError on bad metrics."""
    dim = spec.dim
    coords = coordinate_symbols(dim)
    params = parameter_symbols(len(spec.parameters))
    env: dict[str, sp.Expr] = {name: s for name, s in zip(spec.coordinates, coords)}
    env.update({name: s for (name, _), s in zip(spec.parameters, params)})
    budget = _Budget(spec)
    for name, e in spec.defines:
        env[name] = _to_sympy(spec, e, env)
        budget.check(e)

    if spec.line_element is not None:
        metric = _metric_from_line_element(spec, env, coords)
    else:
        entries = [[sp.S.Zero] * dim for _ in range(dim)]
        for (i, j), e in spec.metric:
            value = _to_sympy(spec, e, env)
            entries[i][j] = entries[j][i] = value
            budget.check(e)
        metric = sp.ImmutableMatrix(entries)

    dmetric = _derivatives(spec, metric, coords, budget)
    domain = tuple((name, _to_sympy(spec, e, env)) for name, e in spec.domain)
    events = tuple((name, _to_sympy(spec, e, env)) for name, e in spec.events)
    ignorable = tuple(k for k in range(dim)
                      if all(not metric[i, j].has(coords[k]) for i in range(dim) for j in range(dim)))
    gsyms = sp.ImmutableMatrix(dim, dim, lambda i, j: sp.Symbol(f"g{min(i, j)}_{max(i, j)}",
                                                                 real=True))
    blocks = _inverse_blocks(metric, gsyms)
    sampler = _Sampler(spec, metric, domain, coords, params)
    signature, samples = _check_numerically(spec, sampler)
    _check_events(spec, sampler, events, coords, params)
    rank_one = None
    if any(len(b.indices) >= 3 for b in blocks):
        rank_one = _rank_one_form(metric, coords, params, sampler)
        cost = _rank_one_cost(rank_one) if rank_one is not None else None
        if cost is not None and cost < sum(
                min(c for c in (b.cost_symbolic, b.cost_numeric) if c is not None)
                for b in blocks):
            blocks = (InverseBlock(tuple(range(dim)), "symbolic", None, cost,
                                   weighted_numeric_cost(dim, nrhs=1), form="rank-one"),)
        else:
            rank_one = None
    if any(b.strategy == "numeric" for b in blocks):
        samples = _pivot_samples(sampler, samples)
        blocks = tuple(replace(b, order=static_pivot_order(samples[:, b.indices][:, :, b.indices]))
                       if b.strategy == "numeric" else b for b in blocks)
    velocity, momentum = velocity_symbols(dim), momentum_symbols(dim)
    norm_symbol = sp.Symbol("nrm", real=True)
    state_env = dict(env)
    for name, v, pm in zip(spec.coordinates, velocity, momentum):
        state_env["d" + name] = v
        state_env["p_" + name] = pm
    state_env["norm"] = norm_symbol
    invariants = tuple((name, _to_sympy(spec, e, state_env)) for name, e in spec.invariants)
    return Geometry(spec=spec, coords=coords, params=params, velocity=velocity,
                    momentum=momentum, metric=metric, metric_symbols=gsyms,
                    dmetric=dmetric, blocks=blocks, ignorable=ignorable, domain=domain,
                    events=events, signature=signature, invariants=invariants,
                    norm_symbol=norm_symbol, rank_one=rank_one)


# -- expression trees -> sympy -------------------------------------------------------------
# Work bounds of the symbolic stage. Sizes count an expression as a tree, a helper counted at
# every place it is used: that is what sympy's diff, its assumption queries and the printers
# traverse, and it grows exponentially when each helper uses the previous one twice (14 such
# levels took 27 s and 16 levels over 100 s before these limits). The shipped specs stay far
# below them (Kerr-Schild: 286 nodes per metric entry, 1,733 per derivative, depth 14).
MAX_TREE_SIZE = 4000       # nodes of one expression of the spec, helpers substituted
MAX_TREE_DEPTH = 60        # levels of one such expression (sympy recurses on depth)
MAX_DERIVED_SIZE = 40_000  # nodes of one first derivative of a metric entry
SYMBOLIC_BUDGET_S = 60.0   # wall clock for reading and differentiating the expressions
# (x^a)^b with a non-integer b: sympy's Pow asks about the base's sign and algebraicity on
# every level, which costs about 3.4 times more per level (10 levels 1 s, 12 levels 12 s,
# 14 over a minute; found by the fuzzer). 8 levels take 0.3 s.
MAX_POWER_CHAIN = 8
_SAFE_INTEGER = 2 ** 53    # beyond this an exact integer has no exact double


def tree_measure(value: sp.Basic, cap: int = 10 ** 9) -> tuple[int, int]:
    """(size, depth) of a sympy expression counted as a tree, in time proportional to its
    distinct subexpressions (shared ones are measured once); sizes saturate at ``cap``."""
    memo: dict[int, tuple[int, int]] = {}
    keep = []                       # ids stay valid while their objects are alive
    stack = [value]
    while stack:
        x = stack[-1]
        if id(x) in memo:
            stack.pop()
            continue
        pending = [a for a in x.args if id(a) not in memo]
        if pending:
            stack.extend(pending)
            continue
        stack.pop()
        size, depth = 1, 0
        for a in x.args:
            s, d = memo[id(a)]
            size, depth = min(size + s, cap), max(depth, d)
        memo[id(x)] = (size, depth + 1)
        keep.append(x)
    return memo[id(value)]


class _Budget:
    """The wall-clock backstop behind the size limits, checked between expressions."""

    def __init__(self, spec: Spec):
        self.spec = spec
        self.end = time.monotonic() + SYMBOLIC_BUDGET_S

    def check(self, e: Expression | None) -> None:
        if time.monotonic() <= self.end:
            return
        reason = (f"the symbolic stage took more than {SYMBOLIC_BUDGET_S:g} s; the expressions "
                  "are too large (introduce helpers, simplify by hand)")
        if e is not None:
            raise self.spec.expression_error(e, reason)
        raise self.spec.error(reason, None, "metric")


def _check_size(spec: Spec, e: Expression, value: sp.Basic, limit: int = MAX_TREE_SIZE,
                what: str = "") -> None:
    size, depth = tree_measure(value, cap=10 * limit)
    if size > limit:
        raise spec.expression_error(
            e, f"expression{what} too large: {size if size < 10 * limit else 'over %d' % size} "
               f"nodes with every helper written out (the limit is {limit}); helpers that use "
               "the previous one several times grow exponentially")
    if depth > MAX_TREE_DEPTH:
        raise spec.expression_error(
            e, f"expression{what} nested too deeply: {depth} levels with every helper written "
               f"out (the limit is {MAX_TREE_DEPTH})")


def _check_constants(spec: Spec, e: Expression, value: sp.Basic) -> None:
    """Every number in the result (after sympy's own expansion: (1e300*r)^2 holds 1e600)
    is zero or inside the range of double precision."""
    for atom in value.atoms(sp.Rational, sp.Float):
        if atom != 0 and not 1e-300 < abs(atom) < 1e300:
            raise spec.expression_error(
                e, f"builds the constant {sp.Float(atom, 3)}, outside the range of double "
                   "precision (1e-300 to 1e300)")


def _power_chain(x: sp.Basic) -> int:
    """How many powers with non-integer exponents are nested directly in each other at the
    top of x ((x^a)^b: 2)."""
    n = 0
    while x.is_Pow and not x.exp.is_integer:
        n, x = n + 1, x.base
    return n


def _to_sympy(spec: Spec, e: Expression, env: dict[str, sp.Expr]) -> sp.Expr:
    """The sympy expression of ``e`` with names from ``env``; SpecError (located at the
    offending node where one is to blame) for values sympy or double precision cannot
    hold, and for results beyond MAX_TREE_SIZE / MAX_TREE_DEPTH."""
    def fail(reason, node):
        return spec.expression_error(e, reason, node.pos)

    def check_number(value, node):
        if value.is_Rational and max(abs(value.p).bit_length(), value.q.bit_length()) > MAX_NUMBER_BITS:
            raise fail("number too large (the expression builds an exact number of more than "
                       f"{MAX_NUMBER_BITS} bits)", node)
        if value.is_Rational and value != 0 and not 1e-300 < abs(value) < 1e300:
            raise fail("constant outside the range of double precision (1e-300 to 1e300)", node)
        if not value.is_Rational and not value.has(sp.I, sp.zoo, sp.oo, sp.nan):
            # a constant such as exp(1000) or cos(2): evaluated once, so one that overflows
            # or underflows double precision is named here rather than read as inf later
            approx = value.evalf(20)
            if approx.is_Float and approx != 0 and not 1e-300 < abs(approx) < 1e300:
                raise fail("constant outside the range of double precision (1e-300 to 1e300)",
                           node)
        return value

    # (size, depth) of each value built so far, as a tree: measured for the helpers, bounded
    # from the arguments for the rest, so that no sympy operation (whose assumption queries
    # walk the whole tree) ever starts on an operand far beyond the limits
    sizes: dict[int, tuple[sp.Basic, int, int]] = {}

    def measure(x: sp.Basic) -> tuple[int, int]:
        if id(x) not in sizes:
            sizes[id(x)] = (x, *tree_measure(x, cap=10 * MAX_TREE_SIZE))
        return sizes[id(x)][1:]

    def leaf(node: ex.Node) -> sp.Expr:
        if node.kind == "num":
            f: Fraction = node.value
            return check_number(sp.Rational(f.numerator, f.denominator), node)
        if node.value == "pi":
            return sp.pi
        return env[node.value]

    def bound(args: list) -> tuple[int, int]:
        return (1 + sum(measure(a)[0] for a in args), 1 + max(measure(a)[1] for a in args))

    def combine(node: ex.Node, args: list) -> sp.Expr:
        size, depth = bound(args)
        if size > 2 * MAX_TREE_SIZE or depth > 2 * MAX_TREE_DEPTH:
            # the bounds only grow; sympy flattens sums and collects powers, so measure
            # the operands themselves before blaming the expression
            for a in args:
                sizes[id(a)] = (a, *tree_measure(a, cap=10 * MAX_TREE_SIZE))
            size, depth = bound(args)
        if size > 2 * MAX_TREE_SIZE or depth > 2 * MAX_TREE_DEPTH:
            raise fail(f"expression too large: over {2 * MAX_TREE_SIZE} nodes or "
                       f"{2 * MAX_TREE_DEPTH} levels here with every helper written out (the "
                       f"limits are {MAX_TREE_SIZE} nodes and {MAX_TREE_DEPTH} levels)", node)
        out = _operation(node, args)
        sizes[id(out)] = (out, size, depth) if out.args else (out, 1, 1)
        return out

    def _operation(node: ex.Node, args: list) -> sp.Expr:
        k = node.kind
        if k == "call":
            # an exact integer beyond 2^53 inside a function has no double of its own (and
            # NumPy refuses cos of a Python int beyond 64 bits): take its nearest double
            args = [sp.Float(float(a)) if a.is_Integer and abs(a) > _SAFE_INTEGER else a
                    for a in args]
            out = _FUNCS[node.value](*args)
        elif k == "neg":
            out = -args[0]
        else:
            out = _binary(node, *args)
        if out.is_number:
            check_number(out, node)
        return out

    def _binary(node: ex.Node, a: sp.Expr, b: sp.Expr) -> sp.Expr:
        k = node.kind
        if k == "div" and b == 0:
            raise fail("division by zero", node.args[1])
        if k in ex.ARITHMETIC:
            return ex.ARITHMETIC[k](a, b)
        if k == "pow":
            if not b.is_integer and _power_chain(a) >= MAX_POWER_CHAIN:
                raise fail(f"powers of powers nested more than {MAX_POWER_CHAIN} deep "
                           "((x^a)^b...); write the exponent out as one, x^(a*b)", node)
            if b.is_number:
                if not b.is_real:
                    raise fail("exponent is not a real number", node.args[1])
                if abs(float(b)) > MAX_EXPONENT:
                    raise fail(f"exponent {float(b):g} is beyond ±{MAX_EXPONENT}",
                               node.args[1])
                if a.is_number and a.is_Rational and a != 0:
                    bits = max(abs(a.p).bit_length(), a.q.bit_length())
                    if bits * abs(float(b)) > MAX_NUMBER_BITS:
                        raise fail("number too large", node)
            if a == 0 and b.is_number and b.is_negative:
                raise fail("division by zero (zero to a negative power)", node)
            if a.is_number and a.is_negative and b.is_number and not b.is_integer:
                raise fail("a negative number to a non-integer power is not real", node)
            return a ** b
        raise fail(f"unsupported node {k}", node)  # pragma: no cover - parser makes no other

    try:
        value = ex.fold(e.tree, leaf, combine)
        _check_size(spec, e, value)
    except RecursionError:
        raise spec.expression_error(
            e, "expression nested too deeply for the symbolic stage (helpers within helpers); "
               f"the limit is {MAX_TREE_DEPTH} levels with every helper written out") from None
    if value.has(sp.zoo, sp.oo, -sp.oo, sp.nan):
        raise spec.expression_error(e, "expression is infinite or undefined (division by zero?)")
    if value.has(sp.I) or (value.is_number and value.is_real is False):
        raise spec.expression_error(e, "expression is not real (e.g. sqrt or log of a negative "
                                       "constant)")
    _check_constants(spec, e, value)
    return value


def _source_of(spec: Spec, i: int, j: int) -> Expression:
    """The spec expression that gives metric entry (i, j): its [metric] key, or line_element."""
    for pair, e in spec.metric:
        if pair == (min(i, j), max(i, j)):
            return e
    return spec.line_element if spec.line_element is not None else spec.metric[0][1]


def _derivatives(spec: Spec, metric: sp.ImmutableMatrix, coords,
                 budget: _Budget) -> tuple[sp.ImmutableMatrix, ...]:
    """d_k g_ij for every k, each bounded by MAX_DERIVED_SIZE; SpecError at the entry."""
    dim = len(coords)
    out = []
    for k in range(dim):
        d = [[sp.S.Zero] * dim for _ in range(dim)]
        for i in range(dim):
            for j in range(i, dim):
                if metric[i, j] == 0:
                    continue
                e = _source_of(spec, i, j)
                try:
                    d[i][j] = d[j][i] = sp.diff(metric[i, j], coords[k])
                except RecursionError:
                    raise spec.expression_error(
                        e, "expression nested too deeply to differentiate") from None
                _check_size(spec, e, d[i][j], MAX_DERIVED_SIZE,
                            f"'s derivative by {spec.coordinates[k]}")
                budget.check(e)
        out.append(sp.ImmutableMatrix(d))
    return tuple(out)


def _check_events(spec: Spec, sampler: "_Sampler", events, coords, params) -> None:
    """An event that is NaN at every sample point inside the domain (with the parameter
    defaults) would stop every integration at lambda = 0: refuse it. Points where the metric
    is finite are the validation's own; an event that cannot be evaluated at all counts as
    NaN."""
    if not events:
        return
    points = sampler.sample(SAMPLE_POINTS, seed=20261201)
    if len(points) == 0:
        return
    values = np.asarray(sampler.defaults, dtype=float)
    for (name, value), (_, e) in zip(events, spec.events):
        f = sp.lambdify([coords, params], value, modules="numpy")
        try:
            with np.errstate(all="ignore"):
                out = np.broadcast_to(np.asarray(f(points.T, values), dtype=float),
                                      (len(points),))
        except (ArithmeticError, TypeError, ValueError):
            out = np.full(len(points), np.nan)
        if np.all(np.isnan(out)):
            raise spec.expression_error(
                e, "the event is NaN (undefined) at every sample point inside the domain"
                   + (" with the parameter defaults" if spec.parameters else "")
                   + "; it would stop every integration at once")


def _metric_from_line_element(spec: Spec, env: dict, coords) -> sp.ImmutableMatrix:
    """g_{ij} = 1/2 d^2 E / d(dx^i) d(dx^j) for a line element E homogeneous of degree 2."""
    e = spec.line_element
    dim = len(coords)
    dsyms = tuple(sp.Symbol(f"dd{i}", real=True) for i in range(dim))
    env = dict(env)
    env.update({"d" + name: s for name, s in zip(spec.coordinates, dsyms)})
    value = _to_sympy(spec, e, env)
    entries = [[None] * dim for _ in range(dim)]
    for i in range(dim):
        di = sp.diff(value, dsyms[i])
        for j in range(i, dim):
            h = sp.diff(di, dsyms[j]) / 2
            if h.has(*dsyms):
                raise spec.expression_error(
                    e, "line element is not a quadratic form in the differentials (the "
                       f"coefficient of d{spec.coordinates[i]}*d{spec.coordinates[j]} depends on "
                       "the differentials)")
            entries[i][j] = entries[j][i] = h
    zero = {s: 0 for s in dsyms}
    rest = [value.subs(zero)] + [sp.diff(value, s).subs(zero) for s in dsyms]
    for r in rest:
        if r != 0 and not _numerically_zero(r):
            raise spec.expression_error(
                e, "line element is not homogeneous of degree 2 in the differentials (it has "
                   "terms without a differential, or linear in one); every term must be "
                   "coefficient*dx*dy")
    if all(entries[i][j] == 0 for i in range(dim) for j in range(dim)):
        raise spec.expression_error(e, "line element contains no differentials")
    return sp.ImmutableMatrix(entries)


ZERO_RTOL = 1e-12   # a sum is zero when it is this small against the sum of its |terms|


def _numerically_zero(expr: sp.Expr) -> bool:
    """Is a sum that sympy did not cancel zero at random points (all symbols in 0.3 .. 3)?

    Judged against the size of its terms, not an absolute threshold: a leftover 1e-13*dt in
    a line element is a real linear term, while terms of 1e8 cancelling to 1e-8 are zero."""
    syms = sorted(expr.free_symbols, key=lambda s: s.name)
    f = sp.lambdify(syms, list(sp.Add.make_args(expr)), modules="numpy")
    rng = np.random.default_rng(7)
    try:
        with np.errstate(all="ignore"):
            terms = np.array([np.broadcast_to(np.asarray(v, dtype=float), (16,)) for v in
                              f(*rng.uniform(0.3, 3.0, size=(len(syms), 16)))])
    except (ArithmeticError, TypeError, ValueError):    # beyond double range: not zero
        return False
    with np.errstate(all="ignore"):
        total, size = terms.sum(axis=0), np.abs(terms).sum(axis=0)
    ok = np.isfinite(total) & np.isfinite(size)
    return bool(np.any(ok) and np.all(np.abs(total[ok]) <= ZERO_RTOL * size[ok]))


# -- inverse strategy ----------------------------------------------------------------------
def _blocks_of(metric: sp.ImmutableMatrix) -> list[tuple[int, ...]]:
    """Connected components of the metric's off-diagonal sparsity pattern, sorted."""
    n = metric.shape[0]
    parent = list(range(n))

    def find(i):
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    for i in range(n):
        for j in range(i + 1, n):
            if metric[i, j] != 0:
                parent[find(i)] = find(j)
    groups: dict[int, list[int]] = {}
    for i in range(n):
        groups.setdefault(find(i), []).append(i)
    return sorted(tuple(g) for g in groups.values())


DIVISION_WEIGHT = 4   # a division costs about four multiplications (latency, current x86)
PIVOT_WEIGHT = 4      # compare-and-swap of a pivot search step


def numeric_solve_cost(n: int, nrhs: int = 1) -> int:
    """Operations of Gaussian elimination with partial pivoting: factor plus nrhs solves.

    One reciprocal per pivot (reused by the elimination and back substitution).
    """
    factor = sum((n - k - 1) * (1 + 2 * (n - k - 1)) for k in range(n))
    solve = nrhs * (2 * n * n - n)
    return factor + solve + n


def weighted_numeric_cost(n: int, nrhs: int = 1) -> int:
    """numeric_solve_cost with divisions and pivoting weighted (the basis of the choice)."""
    return (numeric_solve_cost(n, nrhs) + (DIVISION_WEIGHT - 1) * n
            + PIVOT_WEIGHT * n * (n - 1) // 2)


def _inverse_blocks(metric: sp.ImmutableMatrix, gsyms: sp.ImmutableMatrix) -> tuple[InverseBlock, ...]:
    """Choose, per diagonal block of the metric, a closed-form or a numeric inverse.

    Both costs are counted on the metric entries as atoms, for one matrix-vector product
    (the geodesic right-hand side's need), divisions and pivoting weighted: the closed form
    is the adjugate over the determinant (only tried up to 4x4: its size grows as n!).
    """
    from .printing import count_ops
    blocks = []
    for idx in _blocks_of(metric):
        n = len(idx)
        numeric = weighted_numeric_cost(n, nrhs=1)
        sym_inverse, sym_cost = None, None
        if n <= 4:
            m = sp.Matrix(n, n, lambda a, b: gsyms[idx[a], idx[b]])
            det = m.det(method="berkowitz") if n > 1 else m[0, 0]
            adj = m.adjugate() if n > 1 else sp.Matrix([[1]])
            repl, reduced = sp.cse([det] + list(adj), order="canonical")
            sym_cost = sum(count_ops(r) for _, r in repl) + sum(count_ops(r) for r in reduced)
            # one reciprocal of the determinant, n*n scalings, one matrix-vector product
            sym_cost += DIVISION_WEIGHT + (n * n if n > 1 else 0) + n * (2 * n - 1)
            sym_inverse = sp.ImmutableMatrix(n, n, lambda a, b: adj[a, b] / det)
        if sym_cost is not None and sym_cost <= numeric:
            blocks.append(InverseBlock(idx, "symbolic", sym_inverse, sym_cost, numeric,
                                       form="adjugate"))
        else:
            blocks.append(InverseBlock(idx, "numeric", None, sym_cost, numeric))
    return tuple(blocks)


# -- rank-one (Kerr-Schild) form -------------------------------------------------------------
RANK_ONE_TOLERANCE = 1e-9   # |g - (C + s l l^T)| relative to |g| at the sample points
RANK_ONE_SAMPLES = 400


def _rank_one_form(metric: sp.ImmutableMatrix, coords, params, sampler: "_Sampler"):
    """g = C + s l l^T with C the coordinate-free part of each entry, if that holds.

    C must be non-singular; s is the rank-one part's diagonal entry at a pivot p and
    l_a = D_ap / D_pp, which must simplify (sympy cancels common factors on its own, as in
    F*l_x / F = l_x); the cheapest pivot is taken. The form is accepted only if it
    reproduces the metric at sample points inside the domain. Returns RankOneForm or None.
    """
    from .printing import count_ops
    n = metric.shape[0]
    const = sp.ImmutableMatrix(n, n, lambda i, j: sp.Add(*[
        t for t in sp.Add.make_args(metric[i, j]) if not t.has(*coords)]))
    rest = metric - const
    if const.has(*coords) or all(e == 0 for e in rest):
        return None
    cdet = const.det(method="berkowitz")
    if cdet == 0:
        return None
    candidates = []
    for p in range(n):
        s = rest[p, p]
        if s == 0:
            continue
        # powsimp (top level only, cheap) cancels what Mul does not: exp(A)*exp(-A)
        vector = tuple(sp.S.One if a == p else sp.powsimp(rest[a, p] / s, deep=False)
                       for a in range(n))
        if any(count_ops(vector[a]) > count_ops(rest[a, p]) for a in range(n) if a != p):
            continue    # the division did not cancel: l would divide by s
        candidates.append((sum(count_ops(e) for e in vector) + count_ops(s), p, s, vector))
    if not candidates:
        return None
    points = sampler.sample(RANK_ONE_SAMPLES, seed=13)
    if len(points) == 0:
        return None
    # Parameters can be changed at every call, so the form is checked at the defaults and at
    # two shifted parameter sets (a term that vanishes only at the default values, such as
    # q*k k^T with q = 0, must not pass).
    defaults = np.asarray(sampler.defaults, dtype=float)
    shift = 0.05 * (np.abs(defaults) + 1.0)
    param_sets = [defaults, defaults + shift, defaults - shift * np.where(
        np.arange(len(defaults)) % 2 == 0, 1.0, -1.0)]
    const_f = sp.lambdify([params], const, modules="numpy")
    try:
        with np.errstate(all="ignore"):
            c_nums = [np.array(const_f(list(q)), dtype=float) for q in param_sets]
    except (ArithmeticError, TypeError, ValueError):    # beyond double range: no form
        return None
    if not np.all(np.isfinite(c_nums[0])) or abs(np.linalg.det(c_nums[0])) < 1e-12:
        return None
    metrics = [sampler.metric(points, list(q)) for q in param_sets]
    for _, p, s, vector in sorted(candidates, key=lambda c: (c[0], c[1])):
        f = sp.lambdify([coords, params], [s, *vector], modules="numpy")
        if all(_reproduces(f, points, list(q), c_num, g, strict=k == 0)
               for k, (q, c_num, g) in enumerate(zip(param_sets, c_nums, metrics))):
            inverse = sp.ImmutableMatrix(const.inv(method="LU"))
            null = all(_null_at(f, points, list(q), c_num)
                       for q, c_num in zip(param_sets, c_nums))
            return RankOneForm(
                constant=const, constant_inverse=inverse, scale=s, vector=vector, pivot=p,
                dscale=tuple(sp.diff(s, x) for x in coords),
                dvector=tuple(tuple(sp.diff(e, x) for e in vector) for x in coords),
                null=null)
    return None


NULL_TOLERANCE = 1e-11      # |l^T C^-1 l| relative to sum |l_a C^-1_ab l_b|


def _null_at(f, points, values, c_num) -> bool:
    """Is l^T C^{-1} l zero (to rounding) at every finite sample point, for parameter values?

    sympy cannot always prove it (in Kerr-Schild coordinates r is a root of a quartic), and
    an expression that is not identically zero is not this small at hundreds of random
    points of the domain, so the samples decide; an exact symbolic zero passes too."""
    vals = _evaluate_list(f, points, values)
    if vals is None:
        return False
    with np.errstate(all="ignore"):
        l_num = np.stack(vals[1:], axis=-1)
        try:
            ci = np.linalg.inv(c_num)
        except np.linalg.LinAlgError:   # C singular at shifted parameters: not known null
            return False
        lm = np.einsum("ma,ab,mb->m", l_num, ci, l_num)
        size = np.einsum("ma,ab,mb->m", np.abs(l_num), np.abs(ci), np.abs(l_num))
        finite = np.isfinite(lm) & np.isfinite(size)
    return bool(np.any(finite) and np.all(np.abs(lm[finite]) <= NULL_TOLERANCE * size[finite]))


def _reproduces(f, points, values, c_num, g, strict: bool) -> bool:
    """Does C + s l l^T match the metric g (m, dim, dim) at points for parameter values?
    f(points.T, values) gives [s, l_0, ..., l_dim-1]; c_num is C at these values.

    strict (the spec's defaults): every point must be finite and match. Otherwise points
    where either side is not finite (shifted parameters may leave the chart) are skipped,
    and a check with no finite point passes vacuously."""
    vals = _evaluate_list(f, points, values)
    if vals is None:
        return False
    with np.errstate(all="ignore"):
        s_num, l_num = vals[0], np.stack(vals[1:], axis=-1)
        model = c_num + s_num[:, None, None] * l_num[:, :, None] * l_num[:, None, :]
        finite = np.all(np.isfinite(model), axis=(1, 2)) & np.all(np.isfinite(g), axis=(1, 2))
        if strict and not np.all(finite):
            return False
        scale = np.max(np.abs(g[finite]), axis=(1, 2))
        err = np.max(np.abs(model[finite] - g[finite]), axis=(1, 2))
    return bool(np.all(err <= RANK_ONE_TOLERANCE * scale))


def _evaluate_list(f, points, values):
    """f(points.T, values) -> list of (m,) float arrays, or None where evaluating raises (an
    exact integer beyond double range in the printed code)."""
    try:
        with np.errstate(all="ignore"):
            return [np.broadcast_to(np.asarray(v, dtype=float), (len(points),))
                    for v in f(points.T, values)]
    except (ArithmeticError, TypeError, ValueError):
        return None


def _rank_one_cost(form: RankOneForm) -> int:
    """Weighted operations of g^{-1} w in rank-one form (s, l, w as atoms), as for blocks."""
    from .printing import count_ops
    n = len(form.vector)
    w = [sp.Symbol(f"w{a}") for a in range(n)]
    dummy = RankOneForm(form.constant, form.constant_inverse, sp.Symbol("s"),
                        tuple(sp.S.One if a == form.pivot else sp.Symbol(f"l{a}")
                              for a in range(n)), form.pivot, (), ())
    repl, reduced = sp.cse(dummy.apply_inverse(w), order="canonical")
    ops = sum(count_ops(e) for _, e in repl) + sum(count_ops(e) for e in reduced)
    return ops + DIVISION_WEIGHT - 1


# -- numerical checks of the metric --------------------------------------------------------
PIVOT_RATIO_MIN = 0.05   # a static pivot must be >= this fraction of its column's largest


def static_pivot_order(blocks: np.ndarray) -> tuple[int, ...] | None:
    """An elimination order for the sampled matrices ``blocks`` (m, n, n) that is safe
    without run-time pivoting, or None.

    Symmetric orders (pivoting on the diagonal) are tried, n <= 5; an order is safe when at
    every sample and every step the pivot is at least PIVOT_RATIO_MIN times the largest
    entry of its column, so the straight-line solve grows errors no faster than a partially
    pivoted one by more than that factor per step. Of the safe orders the best is taken.
    """
    m, n, _ = blocks.shape
    if n > 5 or m == 0:
        return None
    best, best_ratio = None, 0.0
    for order in permutations(range(n)):
        a = blocks[:, list(order)][:, :, list(order)].copy()
        worst = np.inf
        for c in range(n):
            col = np.abs(a[:, c:, c])
            ratio = np.min(col[:, 0] / np.maximum(np.max(col, axis=1), 1e-300))
            # a pivot whose sign differs between samples passes through zero somewhere in
            # between (e.g. g_tt on an ergosurface): never safe, whatever the ratios
            signs = np.sign(a[:, c, c])
            if not (np.all(signs > 0) or np.all(signs < 0)):
                ratio = 0.0
            worst = min(worst, ratio)
            if not worst >= PIVOT_RATIO_MIN:
                break
            f = a[:, c + 1:, c] / a[:, c, c][:, None]
            a[:, c + 1:, c:] -= f[:, :, None] * a[:, c, c:][:, None, :]
        if worst >= PIVOT_RATIO_MIN and worst > best_ratio:
            best, best_ratio = tuple(order), worst
    return best


PIVOT_SAMPLES = 4000


def _evaluate(f, cols, values, n: int) -> np.ndarray:
    """f(cols, values) as floats (n,). Parameters arrive as NumPy scalars, so 1/a with a = 0
    or a^2 with a = 1e200 give inf, not a Python exception; what still raises (an exact
    integer beyond double range in the printed code) reads as not finite."""
    try:
        with np.errstate(all="ignore"):
            out = np.asarray(f(cols, values), dtype=float)
    except (ArithmeticError, TypeError, ValueError):
        return np.full(n, np.nan)
    return np.broadcast_to(out, (n,)) if out.size in (1, n) else np.full(n, np.nan)


class _Sampler:
    """The metric and the domain test as NumPy functions (default parameters), vectorised
    over points (m, dim). Built once per derivation and shared by every numerical check.

    anchors: the scales points are drawn around (1 and the parameter defaults); region: per
    coordinate (lo, hi) or None, from the spec's [sampling] table."""

    def __init__(self, spec: Spec, metric, domain, coords, params):
        from .sampling import anchor_scales
        self.dim = len(coords)
        self.defaults = np.array([v for _, v in spec.parameters], dtype=float)
        self.anchors = anchor_scales(self.defaults)
        self.region = region_spans(spec)
        self._drawn: dict[tuple[int, int], np.ndarray] = {}
        self.entries = [[sp.lambdify([coords, params], metric[i, j], modules="numpy")
                         for j in range(self.dim)] for i in range(self.dim)]
        self.domain = [sp.lambdify([coords, params], d, modules="numpy") for _, d in domain]

    def metric(self, points, params=None) -> np.ndarray:
        """g (m, dim, dim) at points (m, dim); params: parameter values (default: the spec's)."""
        cols, n = points.T, len(points)
        values = self.defaults if params is None else np.asarray(params, dtype=float)
        g = np.empty((n, self.dim, self.dim))
        for i in range(self.dim):
            for j in range(self.dim):
                g[:, i, j] = _evaluate(self.entries[i][j], cols, values, n)
        return g

    def inside(self, points) -> np.ndarray:
        """(m,) bool: every [domain] expression finite and > 0."""
        ok = np.ones(len(points), dtype=bool)
        for f in self.domain:
            val = _evaluate(f, points.T, self.defaults, len(points))
            with np.errstate(invalid="ignore"):
                ok &= np.isfinite(val) & (val > 0)
        return ok

    def accept(self, points) -> np.ndarray:
        """Inside every [domain] expression (finite, > 0) with a metric that evaluates there
        (finite, no row underflowed to zero: sampling.evaluable)."""
        return self.inside(points) & evaluable(self.metric(points))

    def sample(self, n: int, seed: int) -> np.ndarray:
        """Up to n accepted points (m, dim), moderate scales first (see sampling.py); drawn
        once per (n, seed): the metric and the event checks share their points."""
        if (n, seed) not in self._drawn:
            self._drawn[(n, seed)] = sample_inside(self.accept, self.dim, n, seed=seed,
                                                   anchors=self.anchors, region=self.region)
        return self._drawn[(n, seed)]


def region_spans(spec: Spec) -> list:
    """Per coordinate (lo, hi) from the spec's [sampling] table, or None."""
    given = {name: (lo, hi) for name, lo, hi in spec.sampling}
    return [given.get(c) for c in spec.coordinates]


def _pivot_samples(sampler: _Sampler, first) -> np.ndarray:
    """The metric (m, dim, dim) at many points inside the domain (moderate coordinates first,
    where sign changes of entries such as g_tt live), plus the validation samples."""
    pts = sampler.sample(PIVOT_SAMPLES, seed=11)
    more = sampler.metric(pts) if len(pts) else np.empty((0, sampler.dim, sampler.dim))
    return np.concatenate([first, more], axis=0)


NEIGHBOURS = 6               # nearby points that confirm a finding holds on an open set


def _counts(eig: np.ndarray) -> list[tuple[int, int]]:
    return [(int(np.sum(e < 0)), int(np.sum(e > 0))) for e in eig]


def _on_open_set(sampler: _Sampler, point, test, seed: int) -> bool:
    """Does test(g (k, n, n)) -> bool (k,) hold at every finite nearby point (and at least
    one)? A finding at one point that fails nearby lies on a surface (a horizon, an axis) or
    is rounding: it is not held against the metric."""
    from .sampling import neighbours
    pts = neighbours(np.random.default_rng(seed), point, NEIGHBOURS, sampler.region)
    pts = pts[sampler.accept(pts)]
    return len(pts) > 0 and bool(np.all(test(sampler.metric(pts))))


def _check_numerically(spec: Spec, sampler: _Sampler):
    """Check the metric at points inside the domain; return the (negative, positive)
    eigenvalue counts and the metric at the sample points (m, dim, dim).

    Singular (to rounding, on the scaled matrix) or of the wrong signature is an error only
    where it holds on an open set: at a sample point and at every nearby point checked."""
    dim = sampler.dim
    points = sampler.sample(SAMPLE_POINTS, seed=20261201)
    where = "[metric]" if spec.line_element is None else "line_element"
    table, key = (None, "line_element") if spec.line_element is not None else (None, "metric")
    if len(points) == 0:
        raise _no_points_error(spec, sampler)
    g = sampler.metric(points)
    eig, rel = scaled_spectrum(g)
    counts = _counts(eig)

    def at(p):
        return ", ".join(f"{c}={v:.6g}" for c, v in zip(spec.coordinates, p))

    singular = np.flatnonzero(rel <= SINGULAR_RTOL)
    for i in singular[:4]:
        if len(singular) > len(points) // 2 or _on_open_set(
                sampler, points[i], lambda gg: scaled_spectrum(gg)[1] <= SINGULAR_RTOL, 31 + i):
            raise spec.error(
                f"metric is singular at {at(points[i])} and nearby inside the domain (scaled "
                f"to unit rows, its smallest |eigenvalue| is {rel[i]:.2g} of the largest); "
                f"{where} must be invertible inside the domain", table, key)
    clear = [c for c, r in zip(counts, rel) if r > SIGNATURE_RTOL]
    pool = clear or [counts[int(np.argmax(rel))]]
    seen = max(sorted(set(pool)), key=pool.count)
    if spec.signature is not None:
        want = (spec.signature.count("-"), spec.signature.count("+"))
        for i in range(len(points)):
            if rel[i] <= SIGNATURE_RTOL or counts[i] == want:
                continue

            def same(gg, c=counts[i]):
                e, r = scaled_spectrum(gg)
                return (r > SIGNATURE_RTOL) & np.array([x == c for x in _counts(e)])
            if clear.count(counts[i]) > len(points) // 2 or \
                    _on_open_set(sampler, points[i], same, 53 + i):
                raise spec.error(
                    f"metric has {counts[i][0]} negative and {counts[i][1]} positive "
                    f"eigenvalues at {at(points[i])}, but signature \"{spec.signature}\" asks "
                    f"for {want[0]} and {want[1]}", None, "signature")
        seen = want
    return seen, g


def _no_points_error(spec: Spec, sampler: _Sampler):
    """Why no sample point was found: an entry that is never finite (named by its key), a
    domain expression that is never > 0, or else both together."""
    from .sampling import MODERATE, WIDEST, candidate_points
    rng = np.random.default_rng(5)
    cand = np.concatenate([candidate_points(rng, 512, sampler.dim, spread, sampler.anchors,
                                            sampler.region) for spread in (MODERATE, WIDEST)])
    g = sampler.metric(cand)
    at_defaults = " with the parameter defaults" if spec.parameters else ""
    names = spec.coordinates
    for i in range(sampler.dim):
        for j in range(i, sampler.dim):
            if np.any(np.isfinite(g[:, i, j])):
                continue
            # (an absent [metric] pair is 0, always finite: the entry here has a source)
            what = "" if spec.line_element is None else \
                f" (the coefficient of d{names[i]}*d{names[j]})"
            return spec.expression_error(
                _source_of(spec, i, j), f"evaluates to infinity or NaN at every sample "
                f"point{what}{at_defaults} (a constant beyond double range, or a division by "
                "a zero?)")
    inside = sampler.inside(cand)
    for (name, _), f in zip(spec.domain, sampler.domain):
        val = _evaluate(f, cand.T, sampler.defaults, len(cand))
        with np.errstate(invalid="ignore"):
            if not np.any(np.isfinite(val) & (val > 0)):
                return spec.error(f"is never finite and > 0 at the sample points{at_defaults}; "
                                  "each [domain] expression must be > 0 inside the chart "
                                  "(a [sampling] table can say where to look)", "domain", name)
    key = "line_element" if spec.line_element is not None else "metric"
    reason = ("no point inside [domain] where the metric is finite was found" if np.any(inside)
              else "could not find points inside [domain]")
    return spec.error(f"{reason}; check the domain expressions (each must be > 0 inside the "
                      "chart) and the metric, or give a [sampling] table", None, key)
