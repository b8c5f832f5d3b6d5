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
    # Kerr-Schild: every entry non-zero, but g = eta + F l l: a rank-one update of a
    # constant metric, inverted in closed form (Sherman-Morrison).
    assert kernelsets["kerr_schild"].inverse_strategy == "symbolic"
    assert [b["form"] for b in kernelsets["kerr_schild"].inverse_blocks] == ["rank-one"]
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


KERR_SCHILD_RESCALED = (SPECS / "kerr_schild.toml").read_text().replace(
    'name = "kerr_schild"', 'name = "ks_rescaled"').replace(
    "[define]", '[define]\nW = "1 + z^2/100"').replace(
    # every entry times W: no constant part is left, so no rank-one form: a numeric solve
    't.t = "-1 + F"', 't.t = "W*(-1 + F)"').replace('t.x = "F*lx"', 't.x = "W*F*lx"').replace(
    't.y = "F*ly"', 't.y = "W*F*ly"').replace('t.z = "F*lz"', 't.z = "W*F*lz"').replace(
    'x.x = "1 + F*lx^2"', 'x.x = "W*(1 + F*lx^2)"').replace(
    'x.y = "F*lx*ly"', 'x.y = "W*F*lx*ly"').replace('x.z = "F*lx*lz"', 'x.z = "W*F*lx*lz"').replace(
    'y.y = "1 + F*ly^2"', 'y.y = "W*(1 + F*ly^2)"').replace(
    'y.z = "F*ly*lz"', 'y.z = "W*F*ly*lz"').replace('z.z = "1 + F*lz^2"', 'z.z = "W*(1 + F*lz^2)"')


def test_kerr_schild_on_the_ergosurface():
    """g_tt = 0 on the equatorial ergosurface r = 2M (the static limit r = M + sqrt(M^2 -
    a^2 cos^2 theta), a closed form of the Kerr metric; x^2 + y^2 = 4 + a^2 at z = 0): the
    build-time pivot order of a numeric solve must not divide by it. A conformally rescaled
    Kerr-Schild metric (dense, no rank-one form) takes the numeric path. Checked against
    numpy.linalg.solve."""
    assert KERR_SCHILD_RESCALED.count("W*") == 10
    from metricc.spec import parse_spec
    ks = build_kernels(derive(parse_spec(KERR_SCHILD_RESCALED)))
    block = ks.inverse_blocks[0]
    assert block["strategy"] == "numeric"
    k = metricc.loads(KERR_SCHILD_RESCALED, backend="auto")
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


# A constant, non-diagonal C plus s l l^T with a non-null l (so the Sherman-Morrison
# denominator 1 + s l.C^-1.l is not 1), and the same with a second rank-one term, which
# must not be mistaken for the rank-one form.
_RANK_ONE = """
name = "{name}"
coordinates = ["t", "x", "y", "z"]
[parameters]
m = 0.7
[define]
s = "m*exp(-(x^2 + y^2 + z^2)/4)"
lx = "sin(x)/2"
ly = "y/3"
lz = "cos(z)/4"
k2 = "{second}"
[metric]
t.t = "-1 + s"
t.x = "0.5 + s*lx"
t.y = "s*ly"
t.z = "s*lz"
x.x = "1 + s*lx^2 + k2"
x.y = "s*lx*ly + k2"
x.z = "s*lx*lz"
y.y = "1 + s*ly^2 + k2"
y.z = "s*ly*lz"
z.z = "2 + s*lz^2"
"""


_TXYZ = sp.symbols("t x y z", real=True)


def _direct_reference(g: sp.Matrix, point, velocity):
    """g, the geodesic acceleration -Gamma^a_bc u^b u^c and the Hamiltonian force
    1/2 d_k g_ab u^a u^b of the sympy metric g(t, x, y, z) at point, from sympy's derivatives
    and numpy's inverse (no metricc code involved)."""
    at = dict(zip(_TXYZ, point))
    gnum = np.array(g.subs(at).evalf(), dtype=float)
    dg = np.array([[[float(sp.diff(g[i, j], _TXYZ[c]).subs(at)) for c in range(4)]
                    for j in range(4)] for i in range(4)])       # [i, j, c] = d_c g_ij
    first = 0.5 * (dg.transpose(0, 2, 1) + dg - dg.transpose(2, 0, 1))
    gamma = np.einsum("ad,dbc->abc", np.linalg.inv(gnum), first)
    u = np.asarray(velocity)
    force = 0.5 * np.einsum("ijk,i,j->k", dg, u, u)
    return gnum, -np.einsum("abc,b,c->a", gamma, u, u), force


def _rank_one_reference(point, velocity, second: bool):
    """_direct_reference for the metric of _RANK_ONE, written out independently."""
    t, x, y, z = _TXYZ
    m = sp.Rational(7, 10)
    s = m * sp.exp(-(x**2 + y**2 + z**2) / 4)
    l = [1, sp.sin(x) / 2, y / 3, sp.cos(z) / 4]
    C = sp.Matrix([[-1, sp.Rational(1, 2), 0, 0], [sp.Rational(1, 2), 1, 0, 0],
                   [0, 0, 1, 0], [0, 0, 0, 2]])
    g = C + s * sp.Matrix(4, 4, lambda a, b: l[a] * l[b])
    if second:
        k2 = sp.sin(t + x) ** 2 / 5
        g += sp.Matrix(4, 4, lambda a, b: k2 if a in (1, 2) and b in (1, 2) else 0)
    return _direct_reference(g, point, velocity)


def test_rank_one_form_must_hold_for_other_parameter_values():
    """A second rank-one term whose weight is a parameter with default 0: the metric is of
    rank-one form only at the default, and parameters change per call, so the form must be
    refused; with q = 0.3 the kernels must match a direct inverse (numpy)."""
    text = _RANK_ONE.format(name="hidden_rank_two", second="q*sin(t + x)^2/5").replace(
        "m = 0.7", "m = 0.7\nq = 0.0")
    from metricc.spec import parse_spec
    assert derive(parse_spec(text)).rank_one is None
    k = metricc.loads(text, backend="auto")
    rng = np.random.default_rng(12)
    point, u = rng.uniform(-1.5, 1.5, 4), rng.normal(size=4)
    params = {"q": 0.3}
    g = k.metric(point, params=params)
    # reference: Christoffel symbols from central differences of the metric, numpy's inverse
    h = 1e-5
    dg = np.array([(k.metric(point + h * e, params=params) - k.metric(point - h * e, params=params))
                   / (2 * h) for e in np.eye(4)])                 # [c, i, j] = d_c g_ij
    first = 0.5 * (np.einsum("bdc->dbc", dg) + np.einsum("cdb->dbc", dg) - dg)
    expect = -np.einsum("ad,dbc,b,c->a", np.linalg.inv(g), first, u, u)
    np.testing.assert_allclose(k.geodesic_rhs(np.concatenate([point, u]), params=params)[4:],
                               expect, rtol=1e-6, atol=1e-8)


@pytest.mark.parametrize("second", [False, True])
def test_rank_one_form_against_a_direct_inverse(second):
    text = _RANK_ONE.format(name="rank_two" if second else "rank_one",
                            second="sin(t + x)^2/5" if second else "0")
    from metricc.spec import parse_spec
    geo = derive(parse_spec(text))
    assert (geo.rank_one is not None) == (not second)
    rng = np.random.default_rng(11)
    for backend in ("auto", "numpy"):
        k = metricc.loads(text, backend=backend)
        for _ in range(3):
            point = rng.uniform(-1.5, 1.5, 4)
            u = rng.normal(size=4)
            g, acc, force = _rank_one_reference(point, u, second)
            y = np.concatenate([point, u])
            np.testing.assert_allclose(k.metric(point), g, rtol=1e-13, atol=1e-14)
            np.testing.assert_allclose(k.inverse_metric(point), np.linalg.inv(g), rtol=1e-11,
                                       atol=1e-12)
            np.testing.assert_allclose(k.geodesic_rhs(y)[4:], acc, rtol=1e-10, atol=1e-12)
            # Hamiltonian form at p = g u: dx/dlambda = u, dp/dlambda = 1/2 d_k g_ab u^a u^b
            z = np.concatenate([point, g @ u])
            out = k.hamilton_rhs(z)
            np.testing.assert_allclose(out[:4], u, rtol=1e-11, atol=1e-12)
            np.testing.assert_allclose(out[4:], force, rtol=1e-10, atol=1e-12)


# C = diag(-1, 1, 1, 1) plus s l l^T with l = (1, n) and n a unit 3-vector field, so l is null
# for C everywhere (l.C^-1.l = -1 + |n|^2 = 0), as in the Kerr-Schild form.
_NULL_RANK_ONE = """
name = "null_rank_one"
coordinates = ["t", "x", "y", "z"]
[parameters]
m = 0.6
[define]
s = "m*exp(-(x^2 + y^2 + z^2)/4)"
A = "x/3 + z/5"
B = "y/2"
[metric]
t.t = "-1 + s"
t.x = "s*sin(A)*cos(B)"
t.y = "s*sin(A)*sin(B)"
t.z = "s*cos(A)"
x.x = "1 + s*sin(A)^2*cos(B)^2"
x.y = "s*sin(A)^2*cos(B)*sin(B)"
x.z = "s*sin(A)*cos(B)*cos(A)"
y.y = "1 + s*sin(A)^2*sin(B)^2"
y.z = "s*sin(A)*sin(B)*cos(A)"
z.z = "1 + s*cos(A)^2"
"""


def test_null_rank_one_vector_is_detected_and_kernels_match_a_direct_inverse():
    """l null for C (checked at the samples) drops the Sherman-Morrison denominator; the
    kernels must still match numpy's inverse and sympy's derivatives of the metric written
    out independently. The non-null vector of _RANK_ONE must not be taken for null, and
    the Kerr-Schild l of Kerr is null (Kerr & Schild 1965; from memory)."""
    from metricc.spec import parse_spec
    assert derive(parse_spec(_NULL_RANK_ONE)).rank_one.null
    assert not derive(parse_spec(_RANK_ONE.format(name="rank_one", second="0"))).rank_one.null
    assert derive(load_spec(SPECS / "kerr_schild.toml")).rank_one.null
    t, x, y, z = _TXYZ
    s = sp.Rational(3, 5) * sp.exp(-(x**2 + y**2 + z**2) / 4)
    A, B = x / 3 + z / 5, y / 2
    l = [1, sp.sin(A) * sp.cos(B), sp.sin(A) * sp.sin(B), sp.cos(A)]
    g = sp.diag(-1, 1, 1, 1) + s * sp.Matrix(4, 4, lambda a, b: l[a] * l[b])
    rng = np.random.default_rng(14)
    for backend in ("auto", "numpy"):
        k = metricc.loads(_NULL_RANK_ONE, backend=backend)
        for _ in range(3):
            point, u = rng.uniform(-1.5, 1.5, 4), rng.normal(size=4)
            gnum, acc, force = _direct_reference(g, point, u)
            np.testing.assert_allclose(k.inverse_metric(point), np.linalg.inv(gnum),
                                       rtol=1e-11, atol=1e-12)
            np.testing.assert_allclose(k.geodesic_rhs(np.concatenate([point, u]))[4:], acc,
                                       rtol=1e-10, atol=1e-12)
            out = k.hamilton_rhs(np.concatenate([point, gnum @ u]))
            np.testing.assert_allclose(out[:4], u, rtol=1e-11, atol=1e-12)
            np.testing.assert_allclose(out[4:], force, rtol=1e-10, atol=1e-12)


def _fd_metric_derivative(k, x, h=1e-5):
    """[c, a, b] = d_c g_ab by central differences (test helper)."""
    out = []
    for c in range(len(x)):
        e = np.zeros_like(x)
        e[c] = h
        out.append((k.metric(x + e) - k.metric(x - e)) / (2 * h))
    return np.array(out)


TANH_SPEC = """
name = "tanh_wall"
coordinates = ["t", "x"]
[metric]
t.t = "-(2 + tanh(x))"
x.x = "1 + tanh(x)/2"
"""


def _christoffel_mpmath(x: float):
    """Gamma^a_{bc} = 1/2 g^{ad} (d_b g_dc + d_c g_db - d_d g_bc) at 50 digits, with the
    derivatives by mpmath's numerical differentiation (mpmath.diff), independent of sympy."""
    import mpmath as mp
    mp.mp.dps = 50
    g = [lambda s: -(2 + mp.tanh(s)), lambda s: 1 + mp.tanh(s) / 2]     # diagonal, in x only
    gx = mp.mpf(x)
    dg = [[mp.diff(g[0], gx), 0], [0, mp.diff(g[1], gx)]]   # d_x g_aa (d_t g = 0)
    inv = [1 / g[0](gx), 1 / g[1](gx)]
    out = np.zeros((2, 2, 2))
    for a in range(2):
        for b in range(2):
            for c in range(2):
                # d_b g_ac: only b = x (index 1) and a = c is non-zero
                term = (dg[a][a] if (b == 1 and a == c) else 0) + \
                    (dg[a][a] if (c == 1 and a == b) else 0) - \
                    (dg[b][b] if (a == 1 and b == c) else 0)
                out[a, b, c] = float(inv[a] * term / 2)
    return out


@pytest.mark.parametrize("backend", ["numpy", "c"])
def test_tanh_derivative_keeps_relative_accuracy_where_tanh_saturates(backend):
    """sympy differentiates tanh as 1 - tanh^2, which loses every digit once tanh rounds to
    1 (|x| > 19) and most of them before; the kernels must use 1/cosh^2 instead."""
    if backend == "c":
        from tests.conftest import have_compiler
        if not have_compiler():
            pytest.skip("no C compiler")
    k = metricc.loads(TANH_SPEC, backend=backend)
    xs = [15.0, 16.5, 17.0, 18.0, 19.0, 25.0]
    got = np.array([k.christoffel([0.0, x]) for x in xs])
    want = np.array([_christoffel_mpmath(x) for x in xs])
    assert np.all((want != 0) == (got != 0))
    nz = want != 0
    np.testing.assert_allclose(got[nz], want[nz], rtol=1e-13, atol=0)


WARP_SPEC = """
name = "bubble"
coordinates = ["t", "x", "y", "z"]
[parameters]
v = 0.5
[define]
rs = "sqrt((x - v*t)^2 + y^2 + z^2)"
f = "(tanh(8*(rs + 1)) - tanh(8*(rs - 1)))/(2*tanh(8))"
[metric]
t.t = "-1 + v^2*f^2"
t.x = "-v*f"
x.x = "1"
y.y = "1"
z.z = "1"
"""


def test_removable_singularity_is_reported_not_hidden(tmp_path, capsys):
    """A warp bubble (Alcubierre's form, shape function even in rs, so the metric is smooth
    at the centre, Alcubierre 1994): the derivative of rs = sqrt(...) is 0/0 at the centre.
    The kernels give NaN there (documented), metricc build names the place, and shipped
    metrics with other square roots (Kerr-Schild's r) get no such note."""
    from metricc.cli import main
    k = metricc.loads(WARP_SPEC, backend="numpy")
    centre = [2.0, 1.0, 0.0, 0.0]                  # x = v t
    assert np.all(np.isfinite(k.metric(centre)))
    assert np.isnan(k.christoffel(centre)).any()
    assert np.all(np.isfinite(k.christoffel([2.0, 1.0, 1e-3, 0.0])))
    (tmp_path / "bubble.toml").write_text(WARP_SPEC)
    assert main(["build", str(tmp_path / "bubble.toml"), "--out", str(tmp_path / "o")]) == 0
    notes = [line for line in capsys.readouterr().out.splitlines() if "note:" in line]
    assert len(notes) == 1 and "y^2 + z^2 + (-t*v + x)^2 = 0" in notes[0] and "NaN" in notes[0]
    for name in ("kerr_schild", "kerr", "ellipsoid"):
        assert main(["build", str(SPECS / f"{name}.toml"), "--out", str(tmp_path / "o")]) == 0
        assert "note:" not in capsys.readouterr().out
