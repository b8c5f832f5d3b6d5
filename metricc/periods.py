"""Periodic coordinates: the spec's ``[periods]`` table as kernel, table and values.

A coordinate declared periodic (``phi = "2*pi"``) names the same point at phi and phi + k P
for every integer k. The period is an expression in numbers, pi and the parameters only (the
spec stage checks that), so it is a constant for one parameter vector; the generated
``periods`` kernel returns it for any parameters (its input x is not read).
"""
from __future__ import annotations

from . import expr as ex


def period_table(spec) -> tuple[tuple[str, float, str], ...]:
    """(coordinate, period at the default parameters, expression text) for each periodic
    coordinate, in the order of ``spec.coordinates`` (not file order)."""
    given = dict(spec.periods)
    defaults = dict(spec.parameters)
    return tuple((c, ex.constant_value(given[c].text, defaults), given[c].text)
                 for c in spec.coordinates if c in given)


def periods_kernel(geo, make):
    """The ``periods`` kernel: input x (dim,), output (n_periodic,) the period values in
    coordinate order (functions of the parameters only). ``make`` is kernels._make."""
    from .geometry import _to_sympy
    spec = geo.spec
    env = {name: s for (name, _), s in zip(spec.parameters, geo.params)}
    given = dict(spec.periods)
    outs = [_to_sympy(spec, given[c], env) for c in spec.coordinates if c in given]
    return make("periods", "periods of the periodic coordinates ("
                + ", ".join(c for c in spec.coordinates if c in given) + "); x is not read",
                "x", geo.coords, (len(outs),), outs, [])
