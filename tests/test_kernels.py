"""Geometry and kernel IR: inverse strategy, ignorable coordinates, scheduling, dimensions."""
from __future__ import annotations

import numpy as np
import pytest
import sympy as sp

import metricc
from metricc.geometry import derive
from metricc.kernels import Assign, build_kernels
from metricc.spec import load_spec
from tests.conftest import SHIPPED, SPECS


@pytest.fixture(scope="module")
def kernelsets():
    return {n: build_kernels(derive(load_spec(SPECS / f"{n}.toml"))) for n in SHIPPED}


def test_inverse_strategy_by_structure(kernelsets):
    # Boyer-Lindquist Kerr: a 2x2 (t, phi) block and two scalars, all in closed form.
    assert kernelsets["kerr"].inverse_strategy == "symbolic"
    assert [b["coordinates"] for b in kernelsets["kerr"].inverse_blocks] == [
        ["t", "phi"], ["r"], ["theta"]]
    # Kerr-Schild: every entry non-zero, the 4x4 is solved numerically at run time.
    assert kernelsets["kerr_schild"].inverse_strategy == "numeric"
    assert kernelsets["schwarzschild"].inverse_strategy == "symbolic"


def test_ignorable_coordinates(kernelsets):
    assert kernelsets["kerr"].ignorable == ("t", "phi")
    assert kernelsets["kerr_schild"].ignorable == ("t",)
    assert kernelsets["sphere"].ignorable == ("phi",)
    assert kernelsets["minkowski"].ignorable == ("t", "phi")
    assert kernelsets["ellipsoid"].ignorable == ("lon",)


def test_every_symbol_is_defined_before_use(kernelsets):
    for ks in kernelsets.values():
        for k in ks.kernels:
            defined = set(k.input_symbols) | set(ks.param_symbols)
            for st in k.steps:
                if isinstance(st, Assign):
                    assert st.expr.free_symbols <= defined, (ks.name, k.name, st)
                    defined.add(st.target)
                else:
                    uses = set().union(*[sp.sympify(e).free_symbols for e in st.matrix])
                    uses |= set().union(*[sp.sympify(e).free_symbols for c in st.rhs for e in c])
                    assert uses <= defined
                    defined |= {s for col in st.results for s in col}
            for o in k.outputs:
                assert sp.sympify(o).free_symbols <= defined


def test_optimisation_reduces_operations(kernelsets):
    for ks in kernelsets.values():
        for name in ("christoffel", "geodesic_rhs"):
            k = ks.kernel(name)
            assert k.ops_after <= k.ops_before
    # Kerr's Christoffel symbols: over a thousand operations as plain trees, ~130 emitted.
    k = kernelsets["kerr"].kernel("christoffel")
    assert k.ops_before > 5 * k.ops_after


def _dense_spec(n: int) -> str:
    coords = [f"x{i}" for i in range(n)]
    lines = [f'name = "dense{n}"', "coordinates = [" + ", ".join(f'"{c}"' for c in coords) + "]",
             "[parameters]", "eps = 0.1", "[metric]"]
    for i in range(n):
        for j in range(i, n):
            if i == j:
                lines.append(f'{coords[i]}.{coords[j]} = "2 + eps*sin({coords[(i + 1) % n]})^2"')
            else:
                lines.append(f'{coords[i]}.{coords[j]} = "eps*cos({coords[i]} + 2*{coords[j]})'
                             f'/{i + j + 2}"')
    return "\n".join(lines) + "\n"


def _reference_christoffel(n: int, point, eps: float) -> np.ndarray:
    """Gamma^a_bc from the textbook formula with sympy, independent of metricc's pipeline."""
    xs = sp.symbols(f"x0:{n}", real=True)
    g = sp.zeros(n, n)
    for i in range(n):
        for j in range(i, n):
            if i == j:
                g[i, i] = 2 + eps * sp.sin(xs[(i + 1) % n]) ** 2
            else:
                g[i, j] = g[j, i] = eps * sp.cos(xs[i] + 2 * xs[j]) / (i + j + 2)
    subs = dict(zip(xs, point))
    dg = [[[float(sp.diff(g[i, j], xs[c]).subs(subs)) for c in range(n)] for j in range(n)]
          for i in range(n)]
    dg = np.array(dg)  # [i, j, c] = d_c g_ij
    gnum = np.array(g.subs(subs).evalf(), dtype=float)
    # first[d, b, c] = 1/2 (d_b g_dc + d_c g_db - d_d g_bc)
    first = 0.5 * (dg.transpose(0, 2, 1) + dg - dg.transpose(2, 0, 1))
    return np.einsum("ad,dbc->abc", np.linalg.inv(gnum), first)


@pytest.mark.parametrize("n", [2, 3, 5, 8])
def test_dense_metrics_of_every_dimension(n):
    text = _dense_spec(n)
    k = metricc.loads(text, backend="auto")
    rng = np.random.default_rng(n)
    point = rng.uniform(-2, 2, n)
    expect = _reference_christoffel(n, point, 0.1)
    np.testing.assert_allclose(k.christoffel(point), expect, rtol=1e-11, atol=1e-13)
    if k.backend == "c":
        knp = metricc.loads(text, backend="numpy")
        np.testing.assert_allclose(knp.christoffel(point), expect, rtol=1e-11, atol=1e-13)


def test_static_pivot_order_avoids_pivots_that_change_sign():
    from metricc.geometry import static_pivot_order
    rng = np.random.default_rng(0)
    # g_00 takes both signs across the samples (an ergosurface in between) while det g keeps
    # its sign (g_01 = 2): g_00 may not be the first pivot, the positive spatial entries may,
    # and after d_1 the Schur complement g_00 - 4/g_11 < 0 is a safe pivot.
    g = np.zeros((50, 3, 3))
    g[:, 0, 0] = rng.uniform(-1, 1, 50)
    g[:, 1, 1] = g[:, 2, 2] = 1.0 + rng.uniform(0, 1, 50)
    g[:, 0, 1] = g[:, 1, 0] = 2.0
    order = static_pivot_order(g)
    assert order is not None and order[0] != 0
    # no safe order at all: every entry of a 1x1 block changes sign
    assert static_pivot_order(rng.uniform(-1, 1, (20, 1, 1))) is None


def test_kerr_schild_on_the_ergosurface():
    """g_tt = 0 on the equatorial ergosurface r = 2M (the static limit r = M + sqrt(M^2 -
    a^2 cos^2 theta), a closed form of the Kerr metric; x^2 + y^2 = 4 + a^2 at z = 0): the
    build-time pivot order must not divide by it. Checked against numpy.linalg.solve."""
    ks = build_kernels(derive(load_spec(SPECS / "kerr_schild.toml")))
    block = ks.inverse_blocks[0]
    assert block["strategy"] == "numeric"
    k = metricc.load(SPECS / "kerr_schild.toml", backend="auto")
    x = np.array([0.0, np.sqrt(4 + 0.81), 0.0, 0.0])
    g = k.metric(x)
    assert abs(g[0, 0]) < 1e-12
    y = np.concatenate([x, [1.0, 0.1, 0.2, -0.1]])
    rhs = k.geodesic_rhs(y)
    gam = np.einsum("ad,dbc->abc", np.linalg.inv(g), 0.5 * (
        np.einsum("bdc->dbc", _fd_metric_derivative(k, x)) + np.einsum("cdb->dbc",
        _fd_metric_derivative(k, x)) - np.einsum("dbc->dbc", _fd_metric_derivative(k, x))))
    expect = -np.einsum("abc,b,c->a", gam, y[4:], y[4:])
    assert np.all(np.isfinite(rhs))
    np.testing.assert_allclose(rhs[4:], expect, rtol=1e-6, atol=1e-9)


def _fd_metric_derivative(k, x, h=1e-5):
    """[c, a, b] = d_c g_ab by central differences (test helper)."""
    out = []
    for c in range(len(x)):
        e = np.zeros_like(x)
        e[c] = h
        out.append((k.metric(x + e) - k.metric(x - e)) / (2 * h))
    return np.array(out)
