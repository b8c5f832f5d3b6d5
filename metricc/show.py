"""Readable and LaTeX forms of a spec's geometry (``metricc show``).

Expressions are printed in the spec's own names (coordinates and parameters; helpers are
expanded), in the spec's expression syntax for text (``^`` for powers) or as LaTeX. Light
rational simplification (``cancel``/``factor``) is applied per component, with a size guard;
sympy's ``simplify`` is never called.
"""
from __future__ import annotations

import sympy as sp

from .geometry import Geometry

SIMPLIFY_MAX_OPS = 150   # components larger than this are printed as derived


def _names(geo: Geometry) -> dict:
    spec = geo.spec
    out = {c: sp.Symbol(n, real=True) for c, n in zip(geo.coords, spec.coordinates)}
    out.update({q: sp.Symbol(n, real=True) for q, (n, _) in zip(geo.params, spec.parameters)})
    return out


def _tidy(e: sp.Expr) -> sp.Expr:
    if sp.count_ops(e) > SIMPLIFY_MAX_OPS:
        return e
    if any(p.exp.is_Rational and p.exp.q != 1 for p in e.atoms(sp.Pow)):
        return e  # radicals make cancel/factor slow and rarely help
    try:
        return sp.factor(sp.cancel(e))
    except (sp.PolynomialError, ValueError, TypeError):  # pragma: no cover - defensive
        return e


def components(geo: Geometry, what: str) -> list[tuple[str, tuple, sp.Expr]]:
    """(kind, index names, expression in spec names) for the non-zero components.

    what: "metric", "inverse_metric", "christoffel" (second kind where the inverse is in
    closed form, else first kind Gamma_{d bc}), "conserved".
    """
    names = _names(geo)
    spec, dim = geo.spec, geo.dim
    cn = spec.coordinates
    out = []
    if what == "metric":
        for i in range(dim):
            for j in range(i, dim):
                if geo.metric[i, j] != 0:
                    out.append(("g", (cn[i], cn[j]), _tidy(geo.metric[i, j].xreplace(names))))
        return out
    inverse = _inverse(geo)
    if what == "inverse_metric":
        if inverse is None:
            return []
        for i in range(dim):
            for j in range(i, dim):
                if inverse[i, j] != 0:
                    out.append(("ginv", (cn[i], cn[j]), _tidy(inverse[i, j].xreplace(names))))
        return out
    if what == "christoffel":
        for a in range(dim):
            for b in range(dim):
                for c in range(b, dim):
                    if inverse is None:
                        e = geo.christoffel_first(a, b, c)
                        kind = "Gamma_first"
                    else:
                        e = sp.Add(*[inverse[a, d] * geo.christoffel_first(d, b, c)
                                     for d in range(dim) if inverse[a, d] != 0])
                        kind = "Gamma"
                    e = _tidy(e.xreplace(names))
                    if e != 0:
                        out.append((kind, (cn[a], cn[b], cn[c]), e))
        return out
    if what == "geodesic_rhs":
        # du^a/dlambda = -g^{ad} w_d with w_d = Gamma_{d bc} u^b u^c, velocities as d<coord>
        vel = {v: sp.Symbol(f"d{n}", real=True) for v, n in zip(geo.velocity, cn)}
        w = [e.xreplace(vel) for e in geo.geodesic_force()]
        for a in range(dim):
            if inverse is None:
                e, kind = w[a], "w"
            else:
                e = -sp.Add(*[inverse[a, d] * w[d] for d in range(dim) if inverse[a, d] != 0])
                kind = "acc"
            e = _tidy(e.xreplace(names))
            if e != 0:
                out.append((kind, (cn[a],), e))
        return out
    if what == "conserved":
        for k in geo.ignorable:
            e = sp.Add(*[geo.metric[k, j] * sp.Symbol(f"d{cn[j]}", real=True)
                         for j in range(dim) if geo.metric[k, j] != 0])
            out.append(("p", (cn[k],), _tidy(e.xreplace(names))))
        return out
    raise ValueError(f"unknown component set {what!r}")


def _inverse(geo: Geometry):
    """The inverse metric in coordinates if every block has a closed form in the metric's
    entries, else None (numeric blocks; the rank-one form, whose expansion is no help)."""
    if geo.rank_one is not None or any(b.strategy != "symbolic" for b in geo.blocks):
        return None
    dim = geo.dim
    inv = sp.zeros(dim, dim)
    subs = {geo.metric_symbols[i, j]: geo.metric[i, j] for i in range(dim) for j in range(dim)}
    for b in geo.blocks:
        for ia, a in enumerate(b.indices):
            for id_, d in enumerate(b.indices):
                inv[a, d] = b.inverse[ia, id_].xreplace(subs)
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
    """The requested parts as text or as a LaTeX ``align*`` block."""
    lines = []
    spec = geo.spec
    if fmt == "latex":
        lines.append(f"% metricc show: {spec.name} ({', '.join(spec.coordinates)})")
    else:
        lines.append(f"{spec.name}: {spec.summary}")
        lines.append(f"coordinates: {', '.join(spec.coordinates)}; parameters: "
                     f"{', '.join(n for n, _ in spec.parameters) or 'none'}")
    for part in parts:
        comps = components(geo, part)
        title = _TITLES[part]
        how = _inverse_note(geo)
        if part == "inverse_metric" and _inverse(geo) is None:
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
                body.append(f"  {_latex_lhs(kind, idx)} &= {sp.latex(e)}")
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


def _latex_name(n: str) -> str:
    return sp.latex(sp.Symbol(n))


def _latex_lhs(kind: str, idx: tuple) -> str:
    L = [_latex_name(i) for i in idx]
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
