"""Forward-mode differentiation of kernels: the kernels that carry quantities along geodesics.

Each kernel here is derived from the already optimised straight-line program of another one
(its IR, :mod:`metricc.kernels`), statement by statement: for ``t = e(s1, s2, ...)`` the tangent
is ``dt = sum_k (de/ds_k) ds_k``, where the partial derivatives de/ds_k are expressions of the
program's own values (computed once per state and shared by every direction) and the sum is a
short linear statement (run once per direction). A linear solve ``A X = B`` gives
``dX = A^-1 (dB - dA X)`` with A^-1 computed once per state. Nothing is re-derived from the
metric, so every subexpression the plain kernel shares is shared here too, and the plain
outputs keep their exact statements.

Kernels (S = 2*dim, D = dim, NPAR parameters):
- ``<form>_tangent``: J(y) dy for m directions dy (S each), J = d f / d y of the form's RHS f;
- ``<form>_transport``: parallel transport of m vectors (D each): dV^a/dlambda =
  -Gamma^a_{bc} u^b V^c (geodesic form, contravariant), dV_a/dlambda = Gamma^c_{ab} u^b V_c
  (Hamiltonian form, covariant);
- ``<form>_param_derivative``: d f / d params, [NPAR][S];
- ``stops_gradient``: d stop_j / d [x, params], [nstop][D + NPAR].
"""
from __future__ import annotations

import time
import sympy as sp

from .kernels import Assign, Kernel, Solve, _forward_aliases, _schedule, live_steps
from .printing import as_expr, count_ops, is_library_call, library_calls
from .geometry import numeric_solve_cost


class _Forward:
    """Forward-mode propagation through one kernel's steps.

    ``dot`` maps a symbol to its tangent (an expression: a direction symbol, a shared value,
    a number). Tangents of assignments become new statements in the list given to
    :meth:`run`; the partial derivatives they multiply are named once, in ``partials``
    (shared by every run), and the inverse matrices of solves in ``inverses``."""

    def __init__(self, kernel: Kernel, tag: str):
        self.kernel = kernel
        self.tag = tag
        self.partials: list[tuple[sp.Symbol, sp.Expr]] = []
        self._partial_of: dict = {}
        self.inverses: dict[int, tuple] = {}
        self.solves: list[Solve] = []
        self._count = 0
        # e -> its symbol, for the values the kernel already computes: d exp(s)/ds is
        # exp(s), d sqrt(s)/ds = 1/(2 sqrt(s)), which then cost nothing new
        self._known = {st.expr: st.target for st in kernel.steps
                       if isinstance(st, Assign) and (st.expr.is_Pow or st.expr.is_Function)}

    def _fresh(self, kind: str) -> sp.Symbol:
        self._count += 1
        return sp.Symbol(f"{kind}{self.tag}{self._count}", real=True)

    def _partial(self, expr: sp.Expr) -> sp.Expr:
        """A shared name for the partial derivative ``expr`` (atoms stay as they are)."""
        expr = expr.xreplace(self._known) if self._known else expr
        if expr.is_Atom:
            return expr
        neg = expr.could_extract_minus_sign()
        key = -expr if neg else expr
        sym = self._partial_of.get(key)
        if sym is None:
            sym = self._fresh("pd")
            self._partial_of[key] = sym
            self.partials.append((sym, key))
        return -sym if neg else sym

    def tangent(self, e: sp.Expr, dot: dict) -> sp.Expr:
        """sum_s (de/ds) dot[s] over the symbols s of e with a tangent (sorted: deterministic)."""
        terms = []
        for s in sorted(e.free_symbols & dot.keys(), key=lambda q: q.name):
            d = sp.diff(e, s)
            if d != 0:
                terms.append(self._partial(d) * dot[s])
        return sp.Add(*terms)

    def _inverse(self, index: int, st: Solve) -> tuple:
        """Symbols of A^-1 (row-major) for solve ``index``, solved once per state."""
        if index not in self.inverses:
            n = st.n
            cols = tuple(tuple(sp.S.One if r == c else sp.S.Zero for r in range(n))
                         for c in range(n))
            res = tuple(tuple(self._fresh("ai") for _ in range(n)) for _ in range(n))
            self.solves.append(Solve(st.matrix, cols, res, st.order))
            # res[c][r] = (A^-1)[r][c]
            self.inverses[index] = tuple(tuple(res[c][r] for c in range(n)) for r in range(n))
        return self.inverses[index]

    def run(self, dot: dict, out: list, kind: str) -> dict:
        """Propagate ``dot`` (symbol -> tangent) through the kernel's steps, appending the
        tangent statements (named ``<kind>...``) to ``out``. Returns the tangents of every
        value reached (the kernel's outputs are then tangent(output, dot))."""
        dot = {s: v for s, v in dot.items() if v != 0}
        for index, st in enumerate(self.kernel.steps):
            if isinstance(st, Assign):
                t = self.tangent(st.expr, dot)
                if t == 0:
                    continue
                if t.is_Symbol:
                    dot[st.target] = t
                    continue
                sym = self._fresh(kind)
                out.append(Assign(sym, t))
                dot[st.target] = sym
                continue
            dA = [self.tangent(m, dot) for m in st.matrix]
            dB = [[self.tangent(e, dot) for e in col] for col in st.rhs]
            if all(v == 0 for v in dA) and all(v == 0 for col in dB for v in col):
                continue
            inv = self._inverse(index, st)
            n = st.n
            for c, res in enumerate(st.results):
                # dX = A^-1 (dB - dA X)
                rhs = [dB[c][r] - sp.Add(*[dA[r * n + q] * res[q] for q in range(n)])
                       for r in range(n)]
                named = []
                for r in range(n):
                    if rhs[r] == 0 or rhs[r].is_Symbol:
                        named.append(rhs[r])
                    else:
                        s = self._fresh(kind)
                        out.append(Assign(s, rhs[r]))
                        named.append(s)
                for r in range(n):
                    t = sp.Add(*[inv[r][q] * named[q] for q in range(n) if named[q] != 0])
                    if t == 0:
                        continue
                    s = self._fresh(kind)
                    out.append(Assign(s, t))
                    dot[res[r]] = s
        return dot

    def shared_steps(self) -> list:
        """The partial derivatives (common subexpressions shared) and the inverse solves."""
        if not self.partials:
            return list(self.solves)
        syms = [s for s, _ in self.partials]
        repl, reduced = sp.cse([e for _, e in self.partials],
                               symbols=sp.numbered_symbols(f"pc{self.tag}_", real=True),
                               order="canonical", list=True)
        steps = [Assign(s, e) for s, e in repl] + [Assign(s, e) for s, e in zip(syms, reduced)]
        return self._name_calls(steps) + list(self.solves)

    def _name_calls(self, steps: list) -> list:
        """Every library call of ``steps`` (cos, exp, ...: printing.is_library_call) as a
        statement of its own, named lq<tag><n>, as the plain kernels have theirs
        (kernels._name_calls): the tiled batch code runs calls and arithmetic in separate
        loops."""
        out, names = [], {}

        def lift(e):
            for c in reversed([c for c in library_calls([e]) if c not in names]):
                sym = sp.Symbol(f"lq{self.tag}{len(names)}", real=True)
                out.append(Assign(sym, c.xreplace(names)))     # innermost calls first
                names[c] = sym
            return e.xreplace(names)

        for st in steps:
            if is_library_call(st.expr) and st.expr not in names:
                # the statement is a call itself: only its arguments need naming
                out.append(Assign(st.target, st.expr.func(*[lift(a) for a in st.expr.args])))
                names[st.expr] = st.target
            else:
                out.append(Assign(st.target, lift(st.expr)))
        return out


def _ops(steps, outputs) -> int:
    n = 0
    for st in steps:
        if isinstance(st, Assign):
            n += count_ops(st.expr)
        else:
            n += numeric_solve_cost(st.n, len(st.results)) + sum(count_ops(e) for e in st.matrix)
            n += sum(count_ops(e) for col in st.rhs for e in col)
    return n + sum(count_ops(o) for o in outputs)


def _finish(base: Kernel, name: str, doc: str, shared: list, outputs: list, shape: tuple,
            t0: float, direction=None) -> Kernel:
    """Schedule and prune the shared program (base steps + new ones) and build the kernel.

    direction: None, or (direction name, direction symbols, direction steps, direction
    outputs, direction shape)."""
    items = list(base.steps) + shared
    inputs = set(base.input_symbols)
    steps = _schedule(items, inputs)
    if direction is None:
        steps, outputs = _forward_aliases(steps, outputs)
        steps = live_steps(steps, set().union(*[as_expr(o).free_symbols for o in outputs]))
        return Kernel(name=name, doc=doc, input_name=base.input_name,
                      input_symbols=base.input_symbols, output_shape=shape, steps=tuple(steps),
                      outputs=tuple(outputs), ops_before=base.ops_before,
                      ops_after=_ops(steps, outputs), seconds=time.perf_counter() - t0)
    dname, dsyms, dsteps, douts, dshape = direction
    live = set()
    for o in list(base.outputs) + list(douts):
        live |= as_expr(o).free_symbols
    for st in dsteps:
        live |= st.expr.free_symbols
    steps = live_steps(steps, live)
    dsteps = live_steps(dsteps, set().union(*[as_expr(o).free_symbols for o in douts]))
    return Kernel(name=name, doc=doc, input_name=base.input_name,
                  input_symbols=base.input_symbols, output_shape=base.output_shape,
                  steps=tuple(steps), outputs=base.outputs, ops_before=base.ops_before,
                  ops_after=_ops(steps, base.outputs) + _ops(dsteps, douts),
                  seconds=time.perf_counter() - t0, direction_name=dname,
                  direction_symbols=tuple(dsyms), direction_steps=tuple(dsteps),
                  direction_outputs=tuple(douts), direction_shape=dshape)


def tangent_kernel(rhs: Kernel, form: str) -> Kernel:
    """J(y) dy for each direction dy (S components), J the Jacobian of ``rhs``."""
    t0 = time.perf_counter()
    fw = _Forward(rhs, "t")
    dsyms = tuple(sp.Symbol(f"dv{i}", real=True) for i in range(len(rhs.input_symbols)))
    dsteps: list = []
    dot = fw.run(dict(zip(rhs.input_symbols, dsyms)), dsteps, "dt")
    douts = [fw.tangent(o, dot) for o in rhs.outputs]
    state = "y" if rhs.input_name == "y" else "z"
    doc = (f"J({state}) d{state} for m directions, J = d f / d {state} of {form}_rhs; f(y) too "
           "(optional)")
    return _finish(rhs, f"{form}_tangent", doc, fw.shared_steps(), [], (), t0,
                   (f"d{state}", dsyms, dsteps, douts, (len(rhs.outputs),)))


def geodesic_transport_kernel(rhs: Kernel, dim: int) -> Kernel:
    """dV^a/dlambda = -Gamma^a_{bc} u^b V^c, from the geodesic RHS a^a = -Gamma^a_{bc} u^b u^c:
    -Gamma^a_{bc} u^b = 1/2 d a^a / d u^c, so the matrix M[a][c] = d a^a / d u^c comes from
    forward mode with unit directions on u (computed once per state) and each vector costs
    dim^2 multiply-adds: dV = 1/2 M V."""
    t0 = time.perf_counter()
    fw = _Forward(rhs, "r")
    shared: list = []
    u = rhs.input_symbols[dim:]
    M = []
    for c in range(dim):
        dot = fw.run({u[c]: sp.S.One}, shared, f"mu{c}_")
        M.append([fw.tangent(rhs.outputs[dim + a], dot) for a in range(dim)])
    pinned = []
    Msym = [[None] * dim for _ in range(dim)]
    for c in range(dim):
        for a in range(dim):
            e = M[c][a]
            if e.is_Atom:
                Msym[a][c] = e
            else:
                s = sp.Symbol(f"tm{a}_{c}", real=True)
                pinned.append(Assign(s, e))
                Msym[a][c] = s
    vsyms = tuple(sp.Symbol(f"vv{i}", real=True) for i in range(dim))
    douts = [sp.Rational(1, 2) * sp.Add(*[Msym[a][c] * vsyms[c] for c in range(dim)])
             for a in range(dim)]
    doc = ("parallel transport dV^a/dlambda = -Gamma^a_{bc} u^b V^c of m vectors V "
           "(contravariant); f(y) too (optional)")
    return _finish(rhs, "geodesic_transport", doc, fw.shared_steps() + shared + pinned, [], (),
                   t0, ("v", vsyms, [], douts, (dim,)))


def hamilton_transport_kernel(rhs: Kernel, matrix: Kernel, dim: int) -> Kernel:
    """dV_a/dlambda = Gamma^c_{ab} u^b V_c of covectors V, u = g^-1 p. ``matrix`` is a kernel
    of the same inputs whose outputs are M[a][c] = Gamma^c_{ab} u^b (kernels.py builds it
    from the geometry); its statements are renamed and joined to the RHS kernel's, which keep
    theirs (f stays bit-identical to hamilton_rhs)."""
    t0 = time.perf_counter()
    inputs = set(matrix.input_symbols)
    rename = {}
    for st in matrix.steps:
        targets = (st.target,) if isinstance(st, Assign) else \
            tuple(s for col in st.results for s in col)
        for s in targets:
            rename[s] = sp.Symbol(f"hm_{s.name}", real=True)
    steps = []
    for st in matrix.steps:
        if isinstance(st, Assign):
            steps.append(Assign(rename[st.target], st.expr.xreplace(rename)))
        else:
            steps.append(Solve(tuple(m.xreplace(rename) for m in st.matrix),
                               tuple(tuple(e.xreplace(rename) for e in col) for col in st.rhs),
                               tuple(tuple(rename[s] for s in col) for col in st.results),
                               st.order))
    outs = [o.xreplace(rename) for o in matrix.outputs]
    assert not (inputs - set(rhs.input_symbols))
    pinned, Msym = [], []
    for a in range(dim):
        row = []
        for c in range(dim):
            e = outs[a * dim + c]
            if e.is_Atom:
                row.append(e)
            else:
                s = sp.Symbol(f"hm{a}_{c}", real=True)
                pinned.append(Assign(s, e))
                row.append(s)
        Msym.append(row)
    vsyms = tuple(sp.Symbol(f"vv{i}", real=True) for i in range(dim))
    douts = [sp.Add(*[Msym[a][c] * vsyms[c] for c in range(dim)]) for a in range(dim)]
    doc = ("parallel transport dV_a/dlambda = Gamma^c_{ab} u^b V_c of m covectors V, "
           "u = g^-1 p; f(z) too (optional)")
    return _finish(rhs, "hamilton_transport", doc, steps + pinned, [], (), t0,
                   ("v", vsyms, [], douts, (dim,)))


def param_derivative_kernel(rhs: Kernel, form: str, params: tuple) -> Kernel:
    """d f / d param_q for every parameter: out[q][i], forward mode with unit directions."""
    t0 = time.perf_counter()
    fw = _Forward(rhs, "q")
    shared: list = []
    outs = []
    for q, p in enumerate(params):
        dot = fw.run({p: sp.S.One}, shared, f"dp{q}_")
        outs += [fw.tangent(o, dot) for o in rhs.outputs]
    doc = f"d f / d params of {form}_rhs, [param][component]"
    return _finish(rhs, f"{form}_param_derivative", doc, fw.shared_steps() + shared, outs,
                   (len(params), len(rhs.outputs)), t0)


def stops_gradient_kernel(stops: Kernel, params: tuple) -> Kernel:
    """d stop_j / d [x, params]: out[j][k], k < dim the coordinates, then the parameters."""
    t0 = time.perf_counter()
    fw = _Forward(stops, "g")
    shared: list = []
    columns = []
    for k, s in enumerate(tuple(stops.input_symbols) + tuple(params)):
        dot = fw.run({s: sp.S.One}, shared, f"dg{k}_")
        columns.append([fw.tangent(o, dot) for o in stops.outputs])
    nstop, ncol = len(stops.outputs), len(columns)
    outs = [columns[k][j] for j in range(nstop) for k in range(ncol)]
    doc = ("d/d[x, params] of the stops (events, then domain expressions), [stop][k]: "
           "k < dim the coordinates, then the parameters")
    return _finish(stops, "stops_gradient", doc, fw.shared_steps() + shared, outs,
                   (nstop, ncol), t0)


def carry_kernels(kernels: list, param_symbols: tuple, dim: int, hamilton_matrix: Kernel
                  ) -> list:
    """The kernels derived from ``kernels`` (the spec's others, by name) by forward mode."""
    by_name = {k.name: k for k in kernels}
    out = []
    for form in ("geodesic", "hamilton"):
        out.append(tangent_kernel(by_name[f"{form}_rhs"], form))
    out.append(geodesic_transport_kernel(by_name["geodesic_rhs"], dim))
    out.append(hamilton_transport_kernel(by_name["hamilton_rhs"], hamilton_matrix, dim))
    if param_symbols:
        for form in ("geodesic", "hamilton"):
            out.append(param_derivative_kernel(by_name[f"{form}_rhs"], form, param_symbols))
    if "stops" in by_name:
        out.append(stops_gradient_kernel(by_name["stops"], param_symbols))
    return out

