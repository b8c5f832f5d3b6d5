"""Readable and LaTeX forms of a spec's geometry (``metricc show``).

Expressions are printed in the spec's own names. The ``[define]`` helpers stay as names: they
are listed once, at the top, with the derivatives the Christoffel symbols need (``d_r(Sigma)``
in text, Sigma_{,r} in LaTeX; small derivatives such as 2*r are written out instead), and every
component is written in terms of them. Expanding the helpers instead makes Kerr-type output
run to hundreds of characters a line (90 KB for Kerr-Schild). Text uses the spec's expression
syntax (``^`` for powers); LaTeX typesets velocities as dotted coordinates and multi-letter
names upright. Light rational simplification (``cancel``/``factor``) is applied per
component, with a size guard; sympy's ``simplify`` is never called.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import sympy as sp
from sympy.printing.conventions import split_super_sub
from sympy.printing.latex import translate

from .geometry import Geometry, _metric_from_line_element, _to_sympy

SIMPLIFY_MAX_OPS = 150   # components larger than this are printed as derived
INLINE_OPS = 4           # a helper's derivative this small is written out, not named


@dataclass
class HelperForm:
    """The geometry of a spec with its ``[define]`` helpers kept as symbols.

    coords: display symbols of the coordinates (spec names). metric: (dim, dim) g_{ij} in
    coordinates, parameters and helper symbols. dmetric: tuple over k of (dim, dim) d_k g_{ij},
    by the chain rule, in terms of helpers and named helper derivatives. definitions: symbol ->
    its definition (helpers in terms of earlier ones; derivative symbols). helper_order: the
    defined symbols, helpers in spec order then derivatives by helper and coordinate, an order
    in which each refers only to those before it. latex: symbol -> LaTeX for every symbol.
    """
    coords: tuple
    metric: sp.ImmutableMatrix
    dmetric: tuple
    definitions: dict = field(default_factory=dict)
    helper_order: list = field(default_factory=list)
    latex: dict = field(default_factory=dict)

    def used_definitions(self, exprs) -> list[tuple[sp.Symbol, sp.Expr]]:
        """(symbol, definition) for every helper or derivative symbol the expressions need,
        directly or through other definitions; helpers first (spec order), then derivatives."""
        need, todo = set(), [s for e in exprs for s in e.free_symbols]
        while todo:
            s = todo.pop()
            if s in self.definitions and s not in need:
                need.add(s)
                todo.extend(self.definitions[s].free_symbols)
        return [(s, self.definitions[s]) for s in self.helper_order if s in need]

    def unfold(self, e: sp.Expr) -> sp.Expr:
        """e with every helper and derivative symbol replaced by its definition (for checks)."""
        for s in reversed(self.helper_order):
            if e.has(s):
                e = e.xreplace({s: self.definitions[s]})
        return e


def latex_name(name: str) -> str:
    """LaTeX for a spec name: Greek names as letters (theta -> \\theta), other multi-letter
    names upright (lat -> \\mathrm{lat}, so they do not read as products), ``_`` and trailing
    digits as subscripts (r_plus -> r_{\\mathrm{plus}}, x1 -> x_{1})."""
    def word(w: str) -> str:
        tex = translate(w)
        if tex != w or len(w) == 1 or w.isdigit():
            return tex
        return f"\\mathrm{{{w}}}"
    base, sups, subs = split_super_sub(name)
    out = word(base)
    if sups:
        out += "^{" + " ".join(word(s) for s in sups) + "}"
    if subs:
        out += "_{" + " ".join(word(s) for s in subs) + "}"
    return out


def helper_form(geo: Geometry) -> HelperForm:
    """Rebuild the metric from the spec's expression trees with helpers as symbols, and
    differentiate it by the chain rule, naming each helper derivative that is not tiny."""
    spec, dim = geo.spec, geo.dim
    coords = tuple(sp.Symbol(n, real=True) for n in spec.coordinates)
    env = {n: s for n, s in zip(spec.coordinates, coords)}
    env.update({n: sp.Symbol(n, real=True) for n, _ in spec.parameters})
    latex = {s: latex_name(str(s)) for s in env.values()}
    latex.update({sp.Symbol(f"d{n}", real=True): f"\\dot{{{latex_name(n)}}}"
                  for n in spec.coordinates})
    defs: dict = {}
    helpers = []
    for name, e in spec.defines:
        h = sp.Symbol(name, real=True)
        defs[h] = _to_sympy(spec, e, env)   # in terms of the helpers before it
        env[name] = h
        helpers.append(h)
        latex[h] = latex_name(name)
    if spec.line_element is not None:
        metric = _metric_from_line_element(spec, env, coords)
    else:
        entries = [[sp.S.Zero] * dim for _ in range(dim)]
        for (i, j), e in spec.metric:
            entries[i][j] = entries[j][i] = _to_sympy(spec, e, env)
        metric = sp.ImmutableMatrix(entries)

    derivs: dict = {}            # (helper, k) -> symbol, expression or 0

    def refold(e: sp.Expr) -> sp.Expr:
        # a helper's definition reappears in derivatives (d sqrt(u) = du/(2 sqrt(u))): name it
        for h in reversed(helpers):
            d = defs[h]
            e = e.xreplace({d: h})
            if d.is_Pow and d.exp.is_Rational and not d.exp.is_integer:
                b, q = d.base, d.exp
                e = e.replace(lambda x: x.is_Pow and x.base == b and (x.exp / q).is_integer,
                              lambda x: h ** (x.exp / q))
        return e

    def hderiv(h, k):
        if (h, k) not in derivs:
            d = _tidy(refold(deriv(defs[h], k)))
            if d != 0 and sp.count_ops(d) > INLINE_OPS:
                s = sp.Symbol(f"d_{spec.coordinates[k]}({h})", real=True)
                defs[s] = d
                latex[s] = f"{{{latex[h]}}}_{{,{latex[coords[k]]}}}"
                d = s
            derivs[(h, k)] = d
        return derivs[(h, k)]

    def deriv(e, k):
        out = sp.diff(e, coords[k])
        for h in helpers:
            if e.has(h):
                dh = hderiv(h, k)
                if dh != 0:
                    out += sp.diff(e, h) * dh
        return out

    dmetric = tuple(sp.ImmutableMatrix(dim, dim, lambda i, j, k=k: deriv(metric[i, j], k))
                    for k in range(dim))
    named = [derivs[(h, k)] for h in helpers for k in range(dim)
             if (h, k) in derivs and derivs[(h, k)] in defs]
    return HelperForm(coords=coords, metric=metric, dmetric=dmetric, definitions=defs,
                      helper_order=helpers + named, latex=latex)


def _tidy(e: sp.Expr) -> sp.Expr:
    if sp.count_ops(e) > SIMPLIFY_MAX_OPS:
        return e
    if any(p.exp.is_Rational and p.exp.q != 1 for p in e.atoms(sp.Pow)):
        return e  # radicals make cancel/factor slow and rarely help
    try:
        return sp.factor(sp.cancel(e))
    except (sp.PolynomialError, ValueError, TypeError):  # pragma: no cover - defensive
        return e


def _sin_squares(e: sp.Expr) -> sp.Expr:
    """sin(x)^(2n) -> (1 - cos(x)^2)^n, so that cancel/factor see sin^2 + cos^2 = 1."""
    return e.replace(lambda x: x.is_Pow and isinstance(x.base, sp.sin) and x.exp.is_Integer
                     and x.exp > 0 and x.exp % 2 == 0,
                     lambda x: (1 - sp.cos(x.base.args[0]) ** 2) ** (x.exp // 2))


def _sin_back(e: sp.Expr) -> sp.Expr:
    """(cos(x) - 1)^p (cos(x) + 1)^p -> (-sin(x)^2)^p inside products (undoes what factor
    makes of _sin_squares)."""
    def fold(m):
        powers = dict(m.as_powers_dict())
        for f in list(powers):
            if f.is_Add and len(f.args) == 2 and -1 in f.args:
                c = f + 1
                if isinstance(c, sp.cos) and powers.get(c + 1) == powers[f]:
                    p = powers.pop(f)
                    powers.pop(c + 1)
                    powers[-sp.sin(c.args[0]) ** 2] = p
        return sp.Mul(*[b ** q for b, q in powers.items()])
    return e.replace(lambda x: x.is_Mul, fold)


def _best(e: sp.Expr, hf: HelperForm) -> sp.Expr:
    """The shorter of two tidy forms: in helper names as derived, or simplified with every
    helper written out (where sin^2 + cos^2 = 1 and the helpers' own sums can cancel) and
    then folded back into helper names."""
    best = _tidy(e)
    if sp.count_ops(best) > SIMPLIFY_MAX_OPS or not any(s in hf.definitions
                                                        for s in e.free_symbols):
        return best   # written out it would only be larger
    u = hf.unfold(e)
    if sp.count_ops(u) > SIMPLIFY_MAX_OPS:
        return best
    alt = _sin_back(_tidy(_sin_squares(u)))
    for s in reversed(hf.helper_order):   # fold the helpers' sums back into their names
        alt = alt.xreplace({hf.unfold(hf.definitions[s]): s})
    return alt if len(sp.sstr(alt)) < len(sp.sstr(best)) else best


def components(geo: Geometry, what: str, hf: HelperForm | None = None
               ) -> list[tuple[str, tuple, sp.Expr]]:
    """(kind, index names, expression in spec and helper names) for the non-zero components.

    what: "metric", "inverse_metric", "christoffel" (second kind where the inverse is in
    closed form, else first kind Gamma_{d bc}), "conserved", "geodesic_rhs".
    """
    hf = hf or helper_form(geo)
    spec, dim = geo.spec, geo.dim
    cn = spec.coordinates
    g, dg = hf.metric, hf.dmetric

    def first(d, b, c):  # Gamma_{d bc} = 1/2 (d_b g_dc + d_c g_db - d_d g_bc)
        return (dg[b][d, c] + dg[c][d, b] - dg[d][b, c]) / 2

    out = []
    if what == "metric":
        for i in range(dim):
            for j in range(i, dim):
                if g[i, j] != 0:
                    out.append(("g", (cn[i], cn[j]), _tidy(g[i, j])))
        return out
    inverse = _inverse(geo, hf)
    if what == "inverse_metric":
        if inverse is None:
            return []
        for i in range(dim):
            for j in range(i, dim):
                if inverse[i, j] != 0:
                    out.append(("ginv", (cn[i], cn[j]), _tidy(inverse[i, j])))
        return out
    if what == "christoffel":
        for a in range(dim):
            for b in range(dim):
                for c in range(b, dim):
                    if inverse is None:
                        e = first(a, b, c)
                        kind = "Gamma_first"
                    else:
                        e = sp.Add(*[inverse[a, d] * first(d, b, c)
                                     for d in range(dim) if inverse[a, d] != 0])
                        kind = "Gamma"
                    e = _tidy(e)
                    if e != 0:
                        out.append((kind, (cn[a], cn[b], cn[c]), e))
        return out
    vel = [sp.Symbol(f"d{n}", real=True) for n in cn]
    if what == "geodesic_rhs":
        # du^a/dlambda = -g^{ad} w_d with w_d = Gamma_{d bc} u^b u^c, velocities as d<coord>
        w = [sp.Add(*[first(d, b, c) * vel[b] * vel[c] for b in range(dim)
                      for c in range(dim)]) for d in range(dim)]
        for a in range(dim):
            if inverse is None:
                e, kind = w[a], "w"
            else:
                e = -sp.Add(*[inverse[a, d] * w[d] for d in range(dim) if inverse[a, d] != 0])
                kind = "acc"
            e = _tidy(e)
            if e != 0:
                out.append((kind, (cn[a],), e))
        return out
    if what == "conserved":
        for k in geo.ignorable:
            e = sp.Add(*[g[k, j] * vel[j] for j in range(dim) if g[k, j] != 0])
            out.append(("p", (cn[k],), _tidy(e)))
        return out
    raise ValueError(f"unknown component set {what!r}")


def _inverse(geo: Geometry, hf: HelperForm):
    """The inverse metric in helper form if every block has a closed form, else None (numeric
    blocks; the rank-one form, whose expansion is no help). Each block is its adjugate over
    its determinant, the determinant in its shortest tidy form (for Kerr, t-phi:
    -Delta*sin(theta)^2), so the Christoffel symbols share its factors."""
    if geo.rank_one is not None or any(b.strategy != "symbolic" for b in geo.blocks):
        return None
    dim = geo.dim
    inv = sp.zeros(dim, dim)
    for b in geo.blocks:
        block = hf.metric.extract(list(b.indices), list(b.indices))
        det = _best(block.det(method="berkowitz"), hf)
        adj = block.adjugate(method="berkowitz")
        for ia, a in enumerate(b.indices):
            for id_, d in enumerate(b.indices):
                inv[a, d] = _tidy(adj[ia, id_] / det)
    return inv


def _inverse_note(geo: Geometry) -> str:
    if geo.rank_one is not None and geo.rank_one.null:
        return ("a rank-one update of a constant metric C + s l l^T with l null for C "
                "(l.m = 0 at every sample point), inverted in closed form as C^-1 - s m m^T, "
                "m = C^-1 l")
    if geo.rank_one is not None:
        return ("a rank-one update of a constant metric C + s l l^T, inverted in closed form "
                "as C^-1 - s m m^T/(1 + s l.m), m = C^-1 l")
    return "solved numerically at run time (dense block)"


def _text(e: sp.Expr) -> str:
    return sp.sstr(e).replace("**", "^")


_TITLES = {"metric": "metric g_{mu nu} (non-zero components)",
           "inverse_metric": "inverse metric g^{mu nu} (non-zero components)",
           "christoffel": "Christoffel symbols (non-zero, b <= c)",
           "conserved": "conserved momenta of ignorable coordinates",
           "geodesic_rhs": "geodesic equation: accelerations d^2 x^a/dlambda^2 "
                           "(velocities written d<coordinate>)"}


def render(geo: Geometry, parts: list[str], fmt: str = "text") -> str:
    """The requested parts as text or as LaTeX ``align*`` blocks, preceded by the helpers
    (and helper derivatives) they use, each defined once."""
    lines = []
    spec = geo.spec
    hf = helper_form(geo)
    found = [(part, components(geo, part, hf)) for part in parts]
    defs = hf.used_definitions(e for _, comps in found for _, _, e in comps)

    def tex(e):
        return sp.latex(e, symbol_names=hf.latex)

    if fmt == "latex":
        lines.append(f"% metricc show: {spec.name} ({', '.join(spec.coordinates)})")
        if any(part in ("conserved", "geodesic_rhs") for part in parts):
            lines.append("% velocities: \\dot{x} = dx/d\\lambda")
    else:
        lines.append(f"{spec.name}: {spec.summary}")
        lines.append(f"coordinates: {', '.join(spec.coordinates)}; parameters: "
                     f"{', '.join(n for n, _ in spec.parameters) or 'none'}")
    if spec.periods:
        # the period at the defaults beside its expression (the expression alone hides
        # what a parameter-dependent period comes to)
        from .periods import period_table
        shown = "; ".join(f"{c} ~ {c} + {text} (= {value!r})"
                          for c, value, text in period_table(spec))
        lines.append(("% " if fmt == "latex" else "") + f"periodic: {shown}")
    if defs:
        title = "helpers from [define], used below by name"
        if any(s not in hf.helper_order[:len(spec.defines)] for s, _ in defs):
            title += (", and their derivatives (X_{,c} = dX/dc)" if fmt == "latex" else
                      ", and their derivatives (d_c(X) = dX/dc)")
        if fmt == "latex":
            lines += [f"% {title}", "\\begin{align*}",
                      " \\\\\n".join(f"  {hf.latex[s]} &= {tex(d)}" for s, d in defs),
                      "\\end{align*}"]
        else:
            lines += ["", title + ":"] + [f"  {s} = {_text(d)}" for s, d in defs]
    for part, comps in found:
        title = _TITLES[part]
        how = _inverse_note(geo)
        if part == "inverse_metric" and _inverse(geo, hf) is None:
            title += f": {how}, not shown"
        if part == "geodesic_rhs" and comps and comps[0][0] == "w":
            title = ("geodesic equation: g_{ab} d^2 x^b/dlambda^2 = -w_a with w_a = "
                     f"Gamma_{{a bc}} u^b u^c shown (the inverse metric is {how})")
        if part == "christoffel" and comps and comps[0][0] == "Gamma_first":
            title = ("Christoffel symbols of the first kind Gamma_{d bc} (the inverse metric is "
                     f"{how})")
        if fmt == "latex":
            lines.append(f"% {title}")
            lines.append("\\begin{align*}")
            body = []
            for kind, idx, e in comps:
                body.append(f"  {_latex_lhs(kind, idx)} &= {tex(e)}")
            lines.append(" \\\\\n".join(body) if body else "  &\\text{(none)}")
            lines.append("\\end{align*}")
        else:
            lines.append("")
            lines.append(title + ":")
            for kind, idx, e in comps:
                lines.append(f"  {_text_lhs(kind, idx)} = {_text(e)}")
            if not comps:
                lines.append("  (none)")
    return "\n".join(lines) + "\n"


def _text_lhs(kind: str, idx: tuple) -> str:
    if kind == "acc":
        return f"d^2 {idx[0]}/dlambda^2"
    if kind == "w":
        return f"w_{idx[0]}"
    if kind == "g":
        return f"g_{{{idx[0]} {idx[1]}}}"
    if kind == "ginv":
        return f"g^{{{idx[0]} {idx[1]}}}"
    if kind == "Gamma":
        return f"Gamma^{idx[0]}_{{{idx[1]} {idx[2]}}}"
    if kind == "Gamma_first":
        return f"Gamma_{{{idx[0]} {idx[1]} {idx[2]}}}"
    return f"p_{idx[0]}"


def _latex_lhs(kind: str, idx: tuple) -> str:
    L = [latex_name(i) for i in idx]
    if kind == "acc":
        return f"\\frac{{d^2 {L[0]}}}{{d\\lambda^2}}"
    if kind == "w":
        return f"w_{{{L[0]}}}"
    if kind == "g":
        return f"g_{{{L[0]} {L[1]}}}"
    if kind == "ginv":
        return f"g^{{{L[0]} {L[1]}}}"
    if kind == "Gamma":
        return f"\\Gamma^{{{L[0]}}}_{{{L[1]} {L[2]}}}"
    if kind == "Gamma_first":
        return f"\\Gamma_{{{L[0]} {L[1]} {L[2]}}}"
    return f"p_{{{L[0]}}}"
