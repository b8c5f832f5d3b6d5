"""Stage 3: Geometry -> KernelSet, the intermediate representation.

A :class:`Kernel` is a straight-line program: an ordered list of steps, each either an
:class:`Assign` of one expression to a fresh symbol or a :class:`Solve` of a small dense linear
system, followed by the output expressions (row-major over ``output_shape``). Backends print a
kernel statement by statement; no backend re-derives anything.

Optimisation happens here, once for all backends: constant metric entries are folded, repeated
reciprocals and square roots of a common base (of either sign) are hoisted into one symbol,
bases of integer powers are named and the powers of one symbol share their squarings, sympy's
common subexpression elimination runs in canonical order (deterministic output), then common
factors are pulled out of sums and a second CSE pass shares what that exposes. Finally every
library call (sin, exp, ...) gets a statement of its own, so backends can batch them.
"""
from __future__ import annotations

import heapq
import time
from dataclasses import dataclass, field, replace

import sympy as sp

from .geometry import Geometry, numeric_solve_cost
from .periods import period_table, periods_kernel
from .printing import as_expr, count_ops, is_library_call, library_calls


@dataclass(frozen=True)
class Assign:
    """``target = expr`` (a local double)."""
    target: sp.Symbol
    expr: sp.Expr


@dataclass(frozen=True)
class Solve:
    """Solve A X = B by Gaussian elimination with partial pivoting.

    matrix: n*n expressions, row-major. rhs: one tuple of n expressions per right-hand side.
    results: one tuple of n fresh symbols per right-hand side (X's columns).
    """
    matrix: tuple[sp.Expr, ...]
    rhs: tuple[tuple[sp.Expr, ...], ...]
    results: tuple[tuple[sp.Symbol, ...], ...]
    order: tuple[int, ...] | None = None   # static elimination order (no pivoting), if safe

    @property
    def n(self) -> int:
        return len(self.results[0])


@dataclass(frozen=True)
class Kernel:
    """One generated function.

    input_name: "x" (coordinates, length dim), "y" ([x^mu, u^mu], 2*dim) or "z"
        ([x^mu, p_mu], 2*dim). input_symbols[k] stands for element k of that array.
    outputs: flat row-major expressions over output_shape.
    ops_before / ops_after: operations before and after optimisation (see count_ops).
    seconds: time spent optimising it (reported by ``metricc build`` when slow).
    """
    name: str
    doc: str
    input_name: str
    input_symbols: tuple[sp.Symbol, ...]
    output_shape: tuple[int, ...]
    steps: tuple
    outputs: tuple[sp.Expr, ...]
    ops_before: int
    ops_after: int
    seconds: float = field(default=0.0, compare=False)
    # A directional kernel (metricc.tangent) also runs a second straight-line program once
    # per direction: direction_symbols[k] stands for component k of one direction (the
    # array ``direction_name``), direction_steps (Assigns only) may read them and anything
    # ``steps`` defined, and direction_outputs (row-major over direction_shape) is its
    # result. ``outputs`` are then the plain right-hand side f(y), printed by the same
    # statements as the RHS kernel's (so bit-identical to it).
    direction_name: str = ""
    direction_symbols: tuple = ()
    direction_steps: tuple = ()
    direction_outputs: tuple = ()
    direction_shape: tuple = ()

    @property
    def directional(self) -> bool:
        return bool(self.direction_symbols)

    @property
    def output_size(self) -> int:
        size = 1
        for s in self.output_shape:
            size *= s
        return size

    def used_symbols(self) -> set[sp.Symbol]:
        """Every symbol the steps and outputs read (inputs, parameters, temporaries), the
        per-direction program's included."""
        return symbols_read(self.steps + self.direction_steps,
                            self.outputs + self.direction_outputs)


@dataclass(frozen=True)
class KernelSet:
    """All kernels of one spec plus the facts the runtime and the emitters need."""
    name: str
    summary: str
    spec_sha256: str
    coordinates: tuple[str, ...]
    parameters: tuple[tuple[str, float], ...]
    param_symbols: tuple[sp.Symbol, ...]
    kernels: tuple[Kernel, ...]
    ignorable: tuple[str, ...]
    domain: tuple[str, ...]
    events: tuple[str, ...]
    signature: tuple[int, int]
    inverse_strategy: str
    inverse_blocks: tuple[dict, ...] = field(default=())
    invariants: tuple[str, ...] = ()
    groups: tuple[str, ...] = ()
    nan_where: tuple[str, ...] = ()    # see vanishing_radicands
    # (coordinate, period at the defaults, expression) per periodic coordinate, in
    # coordinate order (metricc.periods.period_table)
    periods: tuple[tuple[str, float, str], ...] = ()

    @property
    def periodic(self) -> tuple[str, ...]:
        """The periodic coordinates, in coordinate order."""
        return tuple(c for c, _, _ in self.periods)

    @property
    def dim(self) -> int:
        return len(self.coordinates)

    def kernel(self, name: str) -> Kernel:
        for k in self.kernels:
            if k.name == name:
                return k
        raise KeyError(name)


def sech2_form(expr: sp.Expr) -> sp.Expr:
    """``expr`` with every sum c - c*tanh(u)^2 written as c/cosh(u)^2.

    sympy differentiates tanh(u) as 1 - tanh(u)^2. Where tanh saturates that difference
    cancels: a 1-ulp change of tanh (C and NumPy may differ by one) changes it by 1e-16
    absolute against a value of 4 exp(-2u), so 1e-6 relative at u = 12 and nothing at all
    once tanh(u) rounds to 1 (u > 19). 1/cosh(u)^2 keeps full relative accuracy (and
    underflows to 0, not NaN, where cosh overflows)."""
    if not expr.has(sp.tanh):
        return expr

    def fix(add: sp.Add) -> sp.Expr:
        terms = list(add.args)
        for t in list(add.args):
            for f in (t.args if t.is_Mul else (t,)):
                if f.is_Pow and f.exp == 2 and isinstance(f.base, sp.tanh):
                    c = -t / f                  # t = -c tanh^2: look for the +c beside it
                    if t in terms and c in terms:
                        terms.remove(t)
                        terms.remove(c)
                        terms.append(c / sp.cosh(f.base.args[0]) ** 2)
                    break
        return sp.Add(*terms) if len(terms) != len(add.args) else add

    return expr.replace(lambda e: e.is_Add, fix)


def vanishing_radicands(geo: Geometry) -> tuple[str, ...]:
    """Radicands s of square roots in the metric that are sums of squares of two or more
    affine functions of the coordinates, such as (x - v*t)^2 + y^2 + z^2: the distance to a
    point or a line (a warp bubble's centre, a polar axis), written with the spec's names.

    d sqrt(s) = ds / (2 sqrt(s)) is 0/0 where s = 0, so every kernel built from derivatives of
    the metric returns NaN there, also where the metric itself is smooth (a removable
    singularity, e.g. f(sqrt(s)) with an even f). ``metricc build`` says so rather than let
    the NaN surface unexplained."""
    coords = set(geo.coords)
    names = {c: sp.Symbol(n) for c, n in zip(geo.coords, geo.spec.coordinates)}
    names.update({p: sp.Symbol(n) for p, (n, _) in zip(geo.params, geo.spec.parameters)})

    def affine(b: sp.Expr) -> bool:
        try:
            return sp.Poly(b, *sorted(coords, key=str)).total_degree() == 1
        except sp.PolynomialError:
            return False

    def squares(e: sp.Expr) -> bool:
        if not e.is_Add or len(e.args) < 2:
            return False
        for t in e.args:
            c, rest = t.as_coeff_Mul()
            if not (c.is_positive and rest.is_Pow and rest.exp == 2 and affine(rest.base)):
                return False
        return True

    found = {}
    for e in set(geo.metric):
        for p in e.atoms(sp.Pow):
            if p.exp.is_Rational and p.exp.q == 2 and squares(p.base):
                text = str(p.base.xreplace(names)).replace("**", "^")
                found[text] = None
    return tuple(sorted(found))


def _with_accurate_derivatives(geo: Geometry) -> Geometry:
    """The geometry with its first derivatives (d_k g, and d_k s, d_k l of a rank-one form)
    passed through :func:`sech2_form`; every later derivative is taken of these."""
    if not any(m.has(sp.tanh) for m in geo.dmetric):
        return geo
    rank_one = geo.rank_one
    if rank_one is not None:
        rank_one = replace(rank_one, dscale=tuple(map(sech2_form, rank_one.dscale)),
                           dvector=tuple(tuple(map(sech2_form, v)) for v in rank_one.dvector))
    return replace(geo, dmetric=tuple(m.applyfunc(sech2_form) for m in geo.dmetric),
                   rank_one=rank_one)


def build_kernels(geo: Geometry, extra: tuple[str, ...] = ()) -> KernelSet:
    """Assemble and optimise every kernel of a geometry.

    extra: optional kernel groups to add ("curvature", "jacobian"), on top of those the spec
    asks for in its ``kernels`` key.
    """
    geo = _with_accurate_derivatives(geo)
    spec = geo.spec
    dim = geo.dim
    x, u = geo.coords, geo.velocity
    gsyms = geo.metric_symbols
    metric_defs = [(gsyms[i, j], geo.metric[i, j]) for i in range(dim) for j in range(i, dim)]

    kernels = [
        _metric_kernel(geo, metric_defs),
        _inverse_kernel(geo, metric_defs),
        _christoffel_kernel(geo, metric_defs),
        _geodesic_kernel(geo, metric_defs),
        _hamilton_kernel(geo, metric_defs),
        _make("norm", "g_{mu nu} u^mu u^nu", "y", x + u, (), [geo.norm()], metric_defs),
        _momentum_norm_kernel(geo, metric_defs),
    ]
    if geo.ignorable:
        outs = [sp.Add(*[gsyms[k, j] * u[j] for j in range(dim)]) for k in geo.ignorable]
        kernels.append(_make("conserved", "p_k = g_{k nu} u^nu for each ignorable coordinate k",
                             "y", x + u, (len(outs),), outs, metric_defs))
    if geo.invariants:
        kernels += _invariant_kernels(geo, metric_defs)
    groups = set(spec.kernels) | set(extra)
    if "curvature" in groups:
        kernels += _curvature_kernels(geo, metric_defs)
    if "jacobian" in groups:
        kernels += [_geodesic_jacobian(geo, metric_defs), _hamilton_jacobian(geo, metric_defs)]
    if geo.domain:
        kernels.append(_make("domain", "domain expressions (> 0 inside the chart)", "x", x,
                             (len(geo.domain),), [e for _, e in geo.domain], []))
    if geo.events:
        kernels.append(_make("events", "event expressions (a state stops where one is <= 0)",
                             "x", x, (len(geo.events),), [e for _, e in geo.events], []))
    if geo.events or geo.domain:
        # events then domain in one kernel, sharing subexpressions: what the integrator
        # evaluates after every step
        stops = [e for _, e in geo.events] + [e for _, e in geo.domain]
        kernels.append(_make("stops", "the events, then the domain expressions", "x", x,
                             (len(stops),), stops, []))
    if spec.periods:
        kernels.append(periods_kernel(geo, _make))
    # tangent, transport, parameter-derivative and stop-gradient kernels: forward mode on
    # the kernels above (metricc.tangent)
    from .tangent import carry_kernels
    kernels += carry_kernels(kernels, geo.params, dim,
                             _hamilton_transport_matrix(geo, metric_defs))
    blocks = tuple({"coordinates": [spec.coordinates[i] for i in b.indices],
                    "strategy": b.strategy, "form": b.form, "cost_symbolic": b.cost_symbolic,
                    "cost_numeric": b.cost_numeric} for b in geo.blocks)
    return KernelSet(name=spec.name, summary=spec.summary, spec_sha256=spec.sha256,
                     invariants=tuple(n for n, _ in geo.invariants),
                     groups=tuple(sorted(groups)), nan_where=vanishing_radicands(geo),
                     periods=period_table(spec),
                     coordinates=spec.coordinates, parameters=spec.parameters,
                     param_symbols=geo.params, kernels=tuple(kernels),
                     ignorable=tuple(spec.coordinates[k] for k in geo.ignorable),
                     domain=tuple(n for n, _ in geo.domain),
                     events=tuple(n for n, _ in geo.events), signature=geo.signature,
                     inverse_strategy=geo.inverse_strategy, inverse_blocks=blocks)


# -- the kernels ---------------------------------------------------------------------------
def _metric_kernel(geo: Geometry, metric_defs) -> Kernel:
    dim = geo.dim
    outs = [geo.metric_symbols[i, j] for i in range(dim) for j in range(dim)]
    return _make("metric", "g_{mu nu}, [mu][nu]", "x", geo.coords, (dim, dim), outs, metric_defs)


def _apply_inverse(geo: Geometry, columns: list[list[sp.Expr]], tag: str):
    """g^{-1} times each column (lists of dim expressions) -> (solves, result columns)."""
    dim = geo.dim
    if geo.rank_one is not None:
        # g = C + s l l^T: Sherman-Morrison, in the expressions of s and l
        return [], [geo.rank_one.apply_inverse(list(col)) for col in columns]
    results = [[None] * dim for _ in columns]
    solves = []
    for bi, block in enumerate(geo.blocks):
        idx = block.indices
        if block.strategy == "symbolic" and len(idx) == 1:
            # A diagonal entry: divide by the entry's own expression rather than its symbol,
            # so the reciprocal is shared with the metric's other uses of the same base
            # (1/(Sigma/Delta) is Delta*(1/Sigma)) and common factors cancel term by term
            # (r^2 sin^2 / (r^2 sin^2 theta)) instead of costing a division each.
            (a,) = idx
            recip = 1 / geo.metric[a, a]
            for c, col in enumerate(columns):
                results[c][a] = _cheaper_product(col[a], recip)
        elif block.strategy == "symbolic":
            for c, col in enumerate(columns):
                for a_local, a in enumerate(idx):
                    results[c][a] = sp.Add(*[block.inverse[a_local, d_local] * col[d]
                                             for d_local, d in enumerate(idx)])
        else:
            n = len(idx)
            matrix = tuple(geo.metric_symbols[idx[r], idx[s]] for r in range(n) for s in range(n))
            live = [c for c, col in enumerate(columns) if any(col[d] != 0 for d in idx)]
            for c, col in enumerate(columns):
                if c not in live:
                    for a in idx:
                        results[c][a] = sp.S.Zero
            if not live:
                continue
            res_syms = tuple(tuple(sp.Symbol(f"s{tag}{bi}_{c}_{r}", real=True) for r in range(n))
                             for c in live)
            solves.append((matrix, tuple(tuple(columns[c][d] for d in idx) for c in live),
                           res_syms, block.order))
            for c, syms in zip(live, res_syms):
                for r, a in enumerate(idx):
                    results[c][a] = syms[r]
    return solves, results


def _cheaper_product(value: sp.Expr, factor: sp.Expr) -> sp.Expr:
    """value * factor, distributed over value's terms when that costs fewer operations
    (factors that cancel against a term's own powers disappear; sympy combines them)."""
    plain = as_expr(value) * factor
    if not as_expr(value).is_Add:
        return plain
    spread = sp.Add(*[term * factor for term in value.args])
    return spread if count_ops(spread) < count_ops(plain) else plain


def _inverse_kernel(geo: Geometry, metric_defs) -> Kernel:
    dim = geo.dim
    identity = [[sp.S.One if d == c else sp.S.Zero for d in range(dim)] for c in range(dim)]
    solves, cols = _apply_inverse(geo, identity, "i")
    outs = [cols[j][i] for i in range(dim) for j in range(dim)]
    return _make("inverse_metric", "g^{mu nu}, [mu][nu]", "x", geo.coords, (dim, dim), outs,
                 metric_defs, solves)


def _christoffel_kernel(geo: Geometry, metric_defs) -> Kernel:
    dim = geo.dim
    pairs = [(b, c) for b in range(dim) for c in range(b, dim)]
    columns = [[geo.christoffel_first(d, b, c) for d in range(dim)] for b, c in pairs]
    solves, cols = _apply_inverse(geo, columns, "c")
    table = {}
    for (b, c), col in zip(pairs, cols):
        for a in range(dim):
            table[a, b, c] = table[a, c, b] = col[a]
    outs = [table[a, b, c] for a in range(dim) for b in range(dim) for c in range(dim)]
    return _make("christoffel", "Gamma^a_{bc}, [a][b][c]", "x", geo.coords, (dim, dim, dim),
                 outs, metric_defs, solves)


def _geodesic_kernel(geo: Geometry, metric_defs) -> Kernel:
    dim = geo.dim
    w = geo.geodesic_force()
    solves, cols = _apply_inverse(geo, [[-wd for wd in w]], "g")
    outs = list(geo.velocity) + list(cols[0])
    return _make("geodesic_rhs", "d/dlambda [x^mu, u^mu] = [u^mu, -Gamma^mu_{ab} u^a u^b]",
                 "y", geo.coords + geo.velocity, (2 * dim,), outs, metric_defs, solves)


def _hamilton_kernel(geo: Geometry, metric_defs) -> Kernel:
    dim = geo.dim
    solves, cols = _apply_inverse(geo, [list(geo.momentum)], "h")
    pinned = list(metric_defs)
    # u^mu = g^{mu nu} p_nu, named with the velocity symbols the force is written in.
    for a in range(dim):
        pinned.append((geo.velocity[a], cols[0][a]))
    outs = list(geo.velocity) + list(geo.hamilton_force())
    return _make("hamilton_rhs", "d/dlambda [x^mu, p_mu] = [dH/dp_mu, -dH/dx^mu], "
                 "H = 1/2 g^{ab} p_a p_b", "z", geo.coords + geo.momentum, (2 * dim,), outs,
                 pinned, solves)


def _hamilton_transport_matrix(geo: Geometry, metric_defs) -> Kernel:
    """M[a][c] = Gamma^c_{ab} u^b with u = g^-1 p, for states [x, p]: the matrix of
    covariant parallel transport, dV_a/dlambda = M[a][c] V_c (metricc.tangent)."""
    dim = geo.dim
    solves, cols = _apply_inverse(geo, [list(geo.momentum)], "tu")
    pins = list(metric_defs) + [(geo.velocity[a], cols[0][a]) for a in range(dim)]
    columns = [[sp.Add(*[geo.christoffel_first(d, a, b) * geo.velocity[b] for b in range(dim)])
                for d in range(dim)] for a in range(dim)]
    solves2, mcols = _apply_inverse(geo, columns, "tm")
    outs = [mcols[a][c] for a in range(dim) for c in range(dim)]
    return _make("hamilton_transport_matrix", "Gamma^c_{ab} u^b, [a][c]", "z",
                 geo.coords + geo.momentum, (dim, dim), outs, pins, solves + solves2)


def _momentum_norm_kernel(geo: Geometry, metric_defs) -> Kernel:
    dim = geo.dim
    solves, cols = _apply_inverse(geo, [list(geo.momentum)], "m")
    out = sp.Add(*[geo.momentum[a] * cols[0][a] for a in range(dim)])
    return _make("momentum_norm", "g^{mu nu} p_mu p_nu (= 2H)", "z", geo.coords + geo.momentum,
                 (), [out], metric_defs, solves)


def _pin(columns: list[list[sp.Expr]], prefix: str):
    """Name every compound entry of ``columns`` with a symbol: (definitions, atom columns)."""
    defs, out = [], []
    for c, col in enumerate(columns):
        new = []
        for r, e in enumerate(col):
            e = as_expr(e)
            if e.is_Atom:
                new.append(e)
            else:
                s = sp.Symbol(f"{prefix}{c}_{r}", real=True)
                defs.append((s, e))
                new.append(s)
        out.append(new)
    return defs, out


def _inverse_atoms(geo: Geometry, tag: str):
    """g^{ab} as atoms: (definitions, solves, dim x dim nested list [a][b])."""
    dim = geo.dim
    identity = [[sp.S.One if d == c else sp.S.Zero for d in range(dim)] for c in range(dim)]
    solves, cols = _apply_inverse(geo, identity, tag)
    defs, cols = _pin(cols, f"gi{tag}")
    inv = [[cols[b][a] for b in range(dim)] for a in range(dim)]
    return defs, solves, inv


def _invariant_kernels(geo: Geometry, metric_defs) -> list[Kernel]:
    dim = geo.dim
    x, u, p, gs = geo.coords, geo.velocity, geo.momentum, geo.metric_symbols
    outs = [e for _, e in geo.invariants]
    # [x, u] form: p_mu = g_{mu nu} u^nu, norm = g(u, u)
    pins = list(metric_defs) + [(p[a], sp.Add(*[gs[a, b] * u[b] for b in range(dim)]))
                                for a in range(dim)]
    pins.append((geo.norm_symbol, geo.norm()))
    k_y = _make("invariants", "the spec's [invariants] for states [x, u]", "y", x + u,
                (len(outs),), outs, pins)
    # [x, p] form: u^mu = g^{mu nu} p_nu, norm = g^{mu nu} p_mu p_nu
    solves, cols = _apply_inverse(geo, [list(p)], "v")
    pins = list(metric_defs) + [(u[a], cols[0][a]) for a in range(dim)]
    pins.append((geo.norm_symbol, sp.Add(*[p[a] * u[a] for a in range(dim)])))
    k_z = _make("invariants_hamilton", "the spec's [invariants] for states [x, p]", "z", x + p,
                (len(outs),), outs, pins, solves)
    return [k_y, k_z]


def _curvature_kernels(geo: Geometry, metric_defs) -> list[Kernel]:
    """Riemann R^a_{bcd}, Ricci R_{bd} = R^a_{bad}, R = g^{bd} R_{bd} and R_{abcd} R^{abcd}.

    R_{abcd} = 1/2 (g_ad,bc + g_bc,ad - g_ac,bd - g_bd,ac)
               + Gamma_{f bc} Gamma^f_{ad} - Gamma_{f bd} Gamma^f_{ac}
    (the coordinate form of R^a_{bcd} = d_c Gamma^a_{db} - d_d Gamma^a_{cb}
    + Gamma^a_{ce} Gamma^e_{db} - Gamma^a_{de} Gamma^e_{cb}, the sign convention of
    Misner, Thorne & Wheeler 1973), with g^{-1} as atoms so nothing is differentiated twice
    through an inverse.
    """
    dim = geo.dim
    x = geo.coords
    inv_defs, solves, inv = _inverse_atoms(geo, "r")
    pins = list(metric_defs) + inv_defs
    second: dict = {}

    def dd(i, j, c, d):
        key = (min(i, j), max(i, j), min(c, d), max(c, d))
        if key not in second:
            second[key] = geo.second_derivative(key[0], key[1], key[2], key[3])
        return second[key]

    g1 = {}
    for d in range(dim):
        for b in range(dim):
            for c in range(b, dim):
                e = geo.christoffel_first(d, b, c)
                if e != 0:
                    s = sp.Symbol(f"cf{d}_{b}_{c}", real=True)
                    pins.append((s, e))
                    g1[d, b, c] = g1[d, c, b] = s
                else:
                    g1[d, b, c] = g1[d, c, b] = sp.S.Zero
    g2 = {}
    for f in range(dim):
        for a in range(dim):
            for d in range(a, dim):
                e = sp.Add(*[inv[f][q] * g1[q, a, d] for q in range(dim)])
                if e != 0:
                    s = sp.Symbol(f"cs{f}_{a}_{d}", real=True)
                    pins.append((s, e))
                    g2[f, a, d] = g2[f, d, a] = s
                else:
                    g2[f, a, d] = g2[f, d, a] = sp.S.Zero
    pairs = [(a, b) for a in range(dim) for b in range(a + 1, dim)]
    low = {}
    for i, (a, b) in enumerate(pairs):
        for j, (c, d) in enumerate(pairs):
            if j < i:
                low[i, j] = low[j, i]
                continue
            e = (dd(a, d, b, c) + dd(b, c, a, d) - dd(a, c, b, d) - dd(b, d, a, c)) / 2
            e += sp.Add(*[g1[f, b, c] * g2[f, a, d] - g1[f, b, d] * g2[f, a, c]
                          for f in range(dim)])
            if e != 0:
                s = sp.Symbol(f"rl{i}_{j}", real=True)
                pins.append((s, e))
                low[i, j] = s
            else:
                low[i, j] = sp.S.Zero
    index = {pr: i for i, pr in enumerate(pairs)}

    def R(a, b, c, d):
        """R_{abcd} from the stored pairs a<b, c<d (antisymmetric in each pair)."""
        if a == b or c == d:
            return sp.S.Zero
        sign = 1
        if a > b:
            a, b, sign = b, a, -sign
        if c > d:
            c, d, sign = d, c, -sign
        return sign * low[index[a, b], index[c, d]]

    riemann = [sp.Add(*[inv[a][e] * R(e, b, c, d) for e in range(dim)])
               for a in range(dim) for b in range(dim) for c in range(dim) for d in range(dim)]
    ricci_e = [[sp.Add(*[inv[a][e] * R(e, b, a, d) for a in range(dim) for e in range(dim)])
                for d in range(dim)] for b in range(dim)]
    ric_defs, ric = _pin(ricci_e, "ri")
    scalar = sp.Add(*[inv[b][d] * ric[b][d] for b in range(dim) for d in range(dim)])
    # Kretschmann R_{abcd} R^{abcd} = 4 tr(M B M B) over bivectors (a<b), with
    # M = R_{(ab)(cd)} and B^{(ab)(pq)} = g^{ap} g^{bq} - g^{aq} g^{bp}.
    npairs = len(pairs)
    bdefs, B = _pin([[inv[a][p] * inv[b][q] - inv[a][q] * inv[b][p] for (p, q) in pairs]
                     for (a, b) in pairs], "bv")
    xdefs, X = _pin([[sp.Add(*[low[i, m] * B[m][j] for m in range(npairs)])
                      for j in range(npairs)] for i in range(npairs)], "mb")
    kretsch = 4 * sp.Add(*[X[i][j] * X[j][i] for i in range(npairs) for j in range(npairs)])
    n4 = (dim, dim, dim, dim)
    return [
        _make("riemann", "Riemann tensor R^a_{bcd}, [a][b][c][d] (MTW sign convention)", "x",
              x, n4, riemann, pins, solves),
        _make("ricci", "Ricci tensor R_{bd} = R^a_{bad}, [b][d]", "x", x, (dim, dim),
              [ric[b][d] for b in range(dim) for d in range(dim)], pins + ric_defs, solves),
        _make("ricci_scalar", "Ricci scalar g^{bd} R_{bd}", "x", x, (), [scalar],
              pins + ric_defs, solves),
        _make("kretschmann", "Kretschmann scalar R_{abcd} R^{abcd}", "x", x, (), [kretsch],
              pins + bdefs + xdefs, solves),
    ]


def _geodesic_jacobian(geo: Geometry, metric_defs) -> Kernel:
    """d f_i / d y_j of the geodesic RHS f = [u, a], a = -g^{-1} w:
    da/dx^k = -g^{-1} (d_k w + d_k g a), da/du^j = -g^{-1} dw/du^j."""
    dim = geo.dim
    x, u, dg = geo.coords, geo.velocity, geo.dmetric
    w = geo.geodesic_force()
    solves1, cols = _apply_inverse(geo, [[-wd for wd in w]], "ja")
    adefs, acols = _pin(cols, "ac")
    acc = acols[0]
    columns = []
    for k in range(dim):
        columns.append([-(sp.diff(w[d], x[k]) + sp.Add(*[dg[k][d, b] * acc[b] for b in range(dim)]))
                        for d in range(dim)])
    for j in range(dim):
        columns.append([-sp.diff(w[d], u[j]) for d in range(dim)])
    solves2, dcols = _apply_inverse(geo, columns, "jb")
    n = 2 * dim
    outs = []
    for i in range(n):
        for j in range(n):
            if i < dim:
                outs.append(sp.S.One if j == dim + i else sp.S.Zero)
            else:
                outs.append(dcols[j][i - dim])
    return _make("geodesic_jacobian", "d f_i / d y_j of geodesic_rhs, [i][j]", "y", x + u,
                 (n, n), outs, list(metric_defs) + adefs, solves1 + solves2)


def _hamilton_jacobian(geo: Geometry, metric_defs) -> Kernel:
    """d f_i / d z_j of the Hamiltonian RHS f = [u, F], u = g^{-1} p,
    F_k = 1/2 d_k g_ab u^a u^b: du/dx^l = -g^{-1} d_l g u, du/dp_j = g^{-1} e_j."""
    dim = geo.dim
    x, u, p, dg = geo.coords, geo.velocity, geo.momentum, geo.dmetric
    solves1, cols = _apply_inverse(geo, [list(p)], "hu")
    pins = list(metric_defs) + [(u[a], cols[0][a]) for a in range(dim)]
    columns = [[-sp.Add(*[dg[l][d, b] * u[b] for b in range(dim)]) for d in range(dim)]
               for l in range(dim)]
    columns += [[sp.S.One if d == j else sp.S.Zero for d in range(dim)] for j in range(dim)]
    solves2, dcols = _apply_inverse(geo, columns, "hd")
    ddefs, du = _pin(dcols, "du")
    n = 2 * dim
    outs = []
    for i in range(dim):
        outs += [du[j][i] for j in range(n)]
    for k in range(dim):
        for j in range(n):
            e = sp.Add(*[dg[k][a, b] * u[a] * du[j][b] for a in range(dim) for b in range(dim)])
            if j < dim:
                e += sp.Add(*[geo.second_derivative(a, b, k, j) * u[a] * u[b]
                              for a in range(dim) for b in range(dim)]) / 2
            outs.append(e)
    return _make("hamilton_jacobian", "d f_i / d z_j of hamilton_rhs, [i][j]", "z", x + p,
                 (n, n), outs, pins + ddefs, solves1 + solves2)


# -- optimisation and scheduling -----------------------------------------------------------
FACTOR_MAX_STATEMENTS = 3000


def _make(name, doc, input_name, input_symbols, shape, outputs, pinned, solves=()) -> Kernel:
    """Optimise one kernel: fold constants, hoist powers, CSE, schedule, drop dead code."""
    t0 = time.perf_counter()
    outputs = [as_expr(o) for o in outputs]
    pinned = [(s, as_expr(e)) for s, e in pinned]
    solves = [(tuple(as_expr(m) for m in mat), tuple(tuple(as_expr(e) for e in col)
               for col in rhs), res, order) for mat, rhs, res, order in solves]

    # Keep only the definitions the outputs need (transitively).
    # (large trees before CSE: symbols are collected over the DAG, not the tree)
    needed = _symbols_in(outputs)
    for mat, rhs, res, _ in solves:
        needed |= _symbols_in(list(mat) + [e for col in rhs for e in col])
    pin_map = dict(pinned)
    live_pins = set()
    frontier = set(needed)
    while frontier:
        s = frontier.pop()
        if s in pin_map and s not in live_pins:
            live_pins.add(s)
            frontier |= _symbols_in([pin_map[s]])
    pinned = [(s, e) for s, e in pinned if s in live_pins]

    memo: dict = {}
    ops_before = (sum(count_ops(e, memo) for _, e in pinned)
                  + sum(count_ops(o, memo) for o in outputs)
                  + sum(count_ops(e, memo) for mat, _, _, _ in solves for e in mat)
                  + sum(count_ops(e, memo) for _, rhs, _, _ in solves for col in rhs for e in col)
                  + sum(numeric_solve_cost(len(res[0]), len(res)) for _, _, res, _ in solves))

    # Fold pinned definitions that are constants or bare symbols into their uses.
    fold = {}
    for s, e in pinned:
        e = e.xreplace(fold)
        if e.is_Number or e.is_Symbol:
            fold[s] = e
    pinned = [(s, e.xreplace(fold)) for s, e in pinned if s not in fold]
    outputs = [o.xreplace(fold) for o in outputs]
    solves = [(tuple(m.xreplace(fold) for m in mat),
               tuple(tuple(e.xreplace(fold) for e in col) for col in rhs), res, order)
              for mat, rhs, res, order in solves]

    # One flat list of expressions to optimise together.
    flat: list[sp.Expr] = [e for _, e in pinned] + outputs
    for mat, rhs, _, _ in solves:
        flat += list(mat) + [e for col in rhs for e in col]
    hoisted, flat = _hoist_powers(_canonical_signs(flat))
    hoisted, flat = _power_ladders(hoisted, flat)
    # The hoisted definitions join the same CSE pass, so a named base shares its
    # subexpressions with every other use.
    flat = [e for _, e in hoisted] + flat
    replacements, reduced = sp.cse(flat, symbols=sp.numbered_symbols("t", real=True),
                                   order="canonical", list=True)
    # Factoring after CSE exposes new common sums (q*a - q*b and b - a both become a - b):
    # a second, cheap CSE pass over the now small statements shares them. Above
    # FACTOR_MAX_STATEMENTS (a dense 8-D curvature tensor) both passes cost more than the
    # first CSE and save a few per cent of the operations: skipped.
    nrep = len(replacements)
    if nrep + len(reduced) <= FACTOR_MAX_STATEMENTS:
        again = [_factor_common(e) for _, e in replacements] + [_factor_common(e) for e in reduced]
        extra, again = sp.cse(again, symbols=sp.numbered_symbols("t", start=nrep, real=True),
                              order="canonical", list=True)
        replacements = extra + [(sym, e) for (sym, _), e in zip(replacements, again[:nrep])]
        reduced = again[nrep:]
    hoisted_red = [(s, e) for (s, _), e in zip(hoisted, reduced)]
    reduced = reduced[len(hoisted):]

    pos = 0
    pinned_red = []
    for s, _ in pinned:
        pinned_red.append((s, reduced[pos]))
        pos += 1
    outputs_red = reduced[pos:pos + len(outputs)]
    pos += len(outputs)
    solves_red = []
    for mat, rhs, res, order in solves:
        m = tuple(reduced[pos:pos + len(mat)])
        pos += len(mat)
        cols = []
        for col in rhs:
            cols.append(tuple(reduced[pos:pos + len(col)]))
            pos += len(col)
        solves_red.append(Solve(m, tuple(cols), res, order))

    items: list = ([Assign(s, e) for s, e in replacements]
                   + [Assign(s, e) for s, e in hoisted_red]
                   + [Assign(s, e) for s, e in pinned_red] + solves_red)
    steps = _schedule(items, set(input_symbols))
    steps, outputs_red = _forward_aliases(steps, outputs_red)
    steps, outputs_red = _name_calls(steps, outputs_red)
    steps = _drop_dead(steps, outputs_red)
    ops_after = sum(count_ops(st.expr) if isinstance(st, Assign) else
                    numeric_solve_cost(st.n, len(st.results)) + sum(count_ops(e) for e in st.matrix)
                    + sum(count_ops(e) for col in st.rhs for e in col) for st in steps)
    ops_after += sum(count_ops(o) for o in outputs_red)
    return Kernel(name=name, doc=doc, input_name=input_name,
                  input_symbols=tuple(input_symbols), output_shape=tuple(shape),
                  steps=tuple(steps), outputs=tuple(outputs_red), ops_before=ops_before,
                  ops_after=ops_after, seconds=time.perf_counter() - t0)


def _free(exprs) -> set:
    out: set = set()
    for e in exprs:
        out |= as_expr(e).free_symbols
    return out


def _defines(item) -> tuple:
    return (item.target,) if isinstance(item, Assign) else tuple(s for col in item.results for s in col)


def _uses(item) -> set:
    if isinstance(item, Assign):
        return item.expr.free_symbols
    return _free(item.matrix) | _free(e for col in item.rhs for e in col)


def _schedule(items: list, inputs: set) -> list:
    """Topological order of items by data dependence, stable in the given order."""
    producer = {}
    for i, item in enumerate(items):
        for s in _defines(item):
            producer[s] = i
    deps = []
    for i, item in enumerate(items):
        d = {producer[s] for s in _uses(item) if s in producer}
        d.discard(i)
        deps.append(d)
    users: dict[int, list[int]] = {i: [] for i in range(len(items))}
    for i, d in enumerate(deps):
        for j in d:
            users[j].append(i)
    remaining = [len(d) for d in deps]
    ready = [i for i, r in enumerate(remaining) if r == 0]
    heapq.heapify(ready)
    order = []
    while ready:
        i = heapq.heappop(ready)
        order.append(items[i])
        for j in users[i]:
            remaining[j] -= 1
            if remaining[j] == 0:
                heapq.heappush(ready, j)
    if len(order) != len(items):  # pragma: no cover - would be a bug in the IR builder
        raise RuntimeError("cyclic dependencies in kernel")
    return order


def _forward_aliases(steps: list, outputs):
    """Replace ``a = b`` (b a symbol or number) by b in every later use."""
    alias: dict = {}
    kept = []
    for st in steps:
        if isinstance(st, Assign):
            e = st.expr.xreplace(alias) if alias else st.expr
            if e.is_Symbol or e.is_Number:
                alias[st.target] = e
                continue
            kept.append(Assign(st.target, e))
        else:
            if alias:
                st = Solve(tuple(m.xreplace(alias) for m in st.matrix),
                           tuple(tuple(e.xreplace(alias) for e in col) for col in st.rhs),
                           st.results, st.order)
            kept.append(st)
    return kept, [o.xreplace(alias) for o in outputs]


def _name_calls(steps: list, outputs):
    """Give every library call (sin, exp, pow, ...; see printing.is_library_call) a step of
    its own, ``lcK = call``, right before the step that first uses it.

    Backends can then run the calls of many states in one loop and the arithmetic in
    another (emit's tiled batch kernels) while printing every expression exactly as the
    single-state kernel does, so both give bit-identical results."""
    names: dict = {}
    counter = iter(range(10 ** 9))
    out_steps: list = []

    def lift(e):
        """e with its calls (innermost first) replaced by named symbols."""
        calls = [c for c in library_calls([e]) if c not in names]
        for c in reversed(calls):        # preorder lists outer calls first
            arg = c.xreplace(names)
            sym = sp.Symbol(f"lc{next(counter)}", real=True)
            out_steps.append(Assign(sym, arg))
            names[c] = sym
        return e.xreplace(names)

    for st in steps:
        if isinstance(st, Assign):
            if is_library_call(st.expr):
                # already a step of its own: only its arguments may need naming
                inner = st.expr.func(*[lift(a) for a in st.expr.args])
                out_steps.append(Assign(st.target, inner))
                names[st.expr] = st.target
            else:
                out_steps.append(Assign(st.target, lift(st.expr)))
        else:
            mat = tuple(lift(m) for m in st.matrix)
            rhs = tuple(tuple(lift(e) for e in col) for col in st.rhs)
            out_steps.append(Solve(mat, rhs, st.results, st.order))
    outputs = [lift(o) for o in outputs]
    return out_steps, outputs


def _drop_dead(steps: list, outputs) -> list:
    return live_steps(steps, _free(outputs))


def live_steps(steps, live: set) -> list:
    """The steps that (transitively) produce the symbols in ``live``, in their order."""
    live = set(live)
    kept = []
    for st in reversed(steps):
        if any(s in live for s in _defines(st)):
            kept.append(st)
            live |= _uses(st)
    return list(reversed(kept))


def symbols_read(steps, outputs) -> set:
    """Every symbol that ``steps`` and the ``outputs`` expressions read."""
    used = _free(outputs)
    for st in steps:
        used |= _uses(st)
    return used


def _symbols_in(exprs) -> set:
    """The symbols of ``exprs`` (free_symbols, found in one walk of the shared DAG)."""
    return {node for node in _dag_nodes(exprs) if node.is_Symbol}


def _dag_nodes(exprs) -> set:
    """Every distinct node of ``exprs``, atoms included (a walk of the DAG, not the tree:
    the expressions before CSE share most of their subtrees)."""
    seen: set = set()
    stack = list(exprs)
    while stack:
        node = stack.pop()
        if node in seen:
            continue
        seen.add(node)
        if not node.is_Atom:
            stack.extend(node.args)
    return seen


def _factor_common(e: sp.Expr) -> sp.Expr:
    """Pull factors shared by the terms of a sum out of it (q*a - q*b -> q*(a - b)), at
    every level, when that saves operations; CSE leaves such sums alone."""
    if e.is_Atom:
        return e
    factored = sp.factor_terms(e)
    return factored if count_ops(factored) < count_ops(e) else e


def _power_ladders(defs: list[tuple[sp.Symbol, sp.Expr]], exprs: list[sp.Expr]):
    """Share the squarings between the integer powers of one symbol.

    b^3 and b^4 in one kernel would print as b*b*b and b*b*b*b (5 multiplications); naming
    b2 = b*b (and b4 = b2*b2, ...) turns every b^n into a product of the binary ladder, so
    the same powers cost 1 + 1 + 1. Only symbols raised to some |n| >= 3 get a ladder.
    Returns (defs + ladder definitions, rewritten defs and exprs).
    """
    everything = [e for _, e in defs] + list(exprs)
    powers: dict = {}
    nodes = _dag_nodes(everything)
    for node in nodes:
        if node.is_Pow and node.base.is_Symbol and node.exp.is_Integer and abs(node.exp) >= 2:
            powers.setdefault(node.base, set()).add(abs(int(node.exp)))
    bases = sorted((b for b, ns in powers.items() if max(ns) >= 3),
                   key=sp.default_sort_key)
    if not bases:
        return defs, exprs
    new_defs: list = []
    rungs: dict = {}
    for i, b in enumerate(bases):
        prev, k = b, 1
        while 2 * k <= max(powers[b]):
            sym = sp.Symbol(f"w{i}_{2 * k}", real=True)
            new_defs.append((sym, sp.Pow(prev, 2)))
            rungs[b, 2 * k] = prev = sym
            k *= 2

    def ladder(b, n):
        factors, k = [], 1
        while n:
            if n & 1:
                factors.append(b if k == 1 else rungs[b, k])
            n >>= 1
            k *= 2
        return sp.Mul(*factors)

    ladder_bases = set(bases)
    mapping = {}
    for node in nodes:
        if node.is_Pow and node.base in ladder_bases and node.exp.is_Integer \
                and abs(node.exp) >= 2:
            n = int(node.exp)
            mapping[node] = ladder(node.base, n) if n > 0 else 1 / ladder(node.base, -n)
    rewritten = [e.xreplace(mapping) for e in everything]
    out_defs = [(s, e) for (s, _), e in zip(defs, rewritten[:len(defs)])] + new_defs
    return out_defs, rewritten[len(defs):]


def _canonical_signs(exprs: list[sp.Expr]) -> list[sp.Expr]:
    """Write integer powers of a sum with the sum's sign canonical: (2M/r - 1)^-1 becomes
    -(1 - 2M/r)^-1, so a base and its negative share one reciprocal (or one named base)."""
    memo: dict = {}

    def walk(e):
        if e.is_Atom or not e.args:
            return e
        hit = memo.get(e)
        if hit is not None:
            return hit
        args = [walk(a) for a in e.args]
        out = e.func(*args) if args != list(e.args) else e
        if (out.is_Pow and out.base.is_Add and out.exp.is_Integer
                and out.base.could_extract_minus_sign()):
            out = (-1) ** int(out.exp) * sp.Pow(-out.base, out.exp)
        memo[e] = out
        return out

    return [walk(e) for e in exprs]


def _hoist_powers(exprs: list[sp.Expr]) -> tuple[list[tuple[sp.Symbol, sp.Expr]], list[sp.Expr]]:
    """Name the bases of powers so each power costs a few multiplications of one value.

    - a base raised to half-integer powers in two or more places gets one ``sqrt``;
    - a base raised to negative powers in two or more places gets one reciprocal;
    - a compound base of an integer power is named, so ``(a+b)^2`` is ``h*h``.
    Returns the new definitions (in dependency order) and the rewritten expressions.
    """
    neg_uses: dict = {}
    half_uses: dict = {}
    # Count distinct power nodes per base (a node repeated verbatim is CSE's business).
    seen: set = set()
    stack = list(exprs)
    while stack:
        node = stack.pop()
        if node in seen or node.is_Atom:
            continue
        seen.add(node)
        if node.is_Pow and node.exp.is_Rational and not node.base.is_Number:
            if node.exp.q == 2:
                half_uses[node.base] = half_uses.get(node.base, 0) + 1
            if node.exp < 0:
                neg_uses[node.base] = neg_uses.get(node.base, 0) + 1
        stack.extend(node.args)
    defs: list[tuple[sp.Symbol, sp.Expr]] = []
    names: dict = {}
    counter = iter(range(10 ** 9))
    memo: dict = {}

    def named(key, make):
        if key not in names:
            value = make()
            sym = sp.Symbol(f"h{next(counter)}", real=True)
            names[key] = sym
            defs.append((sym, value))
        return names[key]

    def rewrite(e):
        if e in memo:
            return memo[e]
        if e.is_Atom or not e.args:
            out = e
        elif e.is_Pow and e.exp.is_Rational and not e.base.is_Number:
            b0, q = e.base, e.exp
            b = rewrite(b0)
            if q.q == 2 and half_uses.get(b0, 0) >= 2:
                root = named(("sqrt", b0), lambda: sp.sqrt(b))
                if q.p < 0 and neg_uses.get(b0, 0) >= 2:
                    inv = named(("rsqrt", b0), lambda: 1 / root)
                    out = inv ** (-q.p)
                else:
                    out = root ** q.p
            elif q.q == 1 and q < 0 and neg_uses.get(b0, 0) >= 2:
                base = b if b.is_Symbol else named(("base", b0), lambda: b)
                inv = named(("inv", b0), lambda: 1 / base)
                out = inv ** (-q.p)
            elif q.q == 1 and abs(q.p) >= 2 and not b.is_Symbol:
                base = named(("base", b0), lambda: b)
                out = base ** q
            else:
                out = b ** q
        else:
            out = e.func(*[rewrite(a) for a in e.args])
        memo[e] = out
        return out

    new = [rewrite(e) for e in exprs]
    return defs, new
