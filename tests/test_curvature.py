"""Curvature and Jacobian kernels (opt-in: ``kernels = ["curvature", "jacobian"]``).

Conventions under test (the contract): ``k.riemann(x)[..., a, b, c, d] = R^a_{bcd}`` with
R^a_{bcd} = d_c Gamma^a_{db} - d_d Gamma^a_{cb} + Gamma^a_{ce} Gamma^e_{db}
- Gamma^a_{de} Gamma^e_{cb} (Misner, Thorne & Wheeler, *Gravitation*, 1973, eq. 11.12 -- equation number from memory),
``k.ricci(x)`` R_{bd} = R^a_{bad}, ``k.ricci_scalar(x)``, ``k.kretschmann(x)``
R_{abcd} R^{abcd}; ``k.geodesic_jacobian(y)`` / ``k.hamilton_jacobian(z)`` [..., i, j] =
d f_i / d y_j.

References (cited again where each value is used):

* MTW 1973: Misner, Thorne & Wheeler, *Gravitation* (Schwarzschild Kretschmann scalar
  48 M^2 / r^6, the vacuum Ricci tensor).
* Cherubini, Bini, Capozziello & Ruffini (2002), Int. J. Mod. Phys. D 11, 827: the Kerr
  Kretschmann scalar in Boyer-Lindquist coordinates.
* Carroll, *Spacetime and Geometry* (2004), sec. 3.6 / 3.7: the 2-sphere of radius R,
  R^theta_{phi theta phi} = sin^2(theta), Ricci scalar 2/R^2.
* Reissner-Nordstrom: Ricci tensor and Kretschmann scalar from an independent sympy
  computation written in this file (the closed forms R_tt = Q^2 f / r^4 and
  K = 8 (6 M^2 r^2 - 12 M Q^2 r + 7 Q^4) / r^8 are quoted from memory and checked against it).
* Gaussian curvature of an ellipsoid of revolution K = 1/(M N) with M, N the meridional and
  prime-vertical radii of curvature (standard geodesy, e.g. Torge & Mueller, *Geodesy*,
  4th ed. 2012 -- from memory; also checked by the sympy computation below); in 2-D the Ricci
  scalar is 2K.
* Finite differences (fourth-order central) of metricc's own first-order kernels
  (christoffel, geodesic_rhs, hamilton_rhs), which are verified elsewhere against references.
"""
from __future__ import annotations

import itertools

import numpy as np
import pytest

import metricc
from tests.conftest import SPECS, have_compiler, needs_cc
from tests.support import random_params, random_points, random_states

PI = np.pi
BACKENDS = ["numpy", pytest.param("c", marks=pytest.mark.skipif(not have_compiler(),
                                                                 reason="no C compiler"))]
LORENTZIAN = ("minkowski", "schwarzschild", "kerr", "kerr_schild", "reissner_nordstrom")
ALL = LORENTZIAN + ("sphere", "ellipsoid")
CURV = ("riemann", "ricci", "ricci_scalar", "kretschmann")
JAC = ("geodesic_jacobian", "hamilton_jacobian")


@pytest.fixture(params=BACKENDS)
def backend(request):
    return request.param


@pytest.fixture(scope="session")
def full():
    """get(name, backend) -> kernels of specs/<name>.toml built with curvature and jacobian
    kernels (loaded lazily and shared across the session)."""
    cache = {}

    def get(name, backend):
        key = (name, backend)
        if key not in cache:
            cache[key] = metricc.load(SPECS / f"{name}.toml", backend=backend,
                                      kernels=["curvature", "jacobian"])
        return cache[key]

    return get


def _setup(full, name, backend, n=6, seed=0):
    rng = np.random.default_rng(seed + 1000 * ALL.index(name))
    k = full(name, backend)
    return k, random_points(name, rng, n), random_params(name, rng, n), rng


def lower(k, x, R, params):
    """R_{abcd} = g_{ae} R^e_{bcd}."""
    return np.einsum("...ae,...ebcd->...abcd", k.metric(x, params), R)


# -- independent sympy curvature (small diagonal metrics only) ----------------------------
def sympy_curvature(g, X, simplify=True):
    """Riemann R^a_{bcd} (MTW convention above), Ricci R_{bd} = R^a_{bad} and the
    Kretschmann scalar of a sympy metric matrix g in coordinates X, written from the
    definitions independently of metricc (``simplify=False`` for metrics whose
    simplification is slow; the results are then only evaluated numerically)."""
    import sympy as sp
    if not simplify:
        sp = _NoSimplify(sp)
    n = len(X)
    gi = sp.simplify(g.inv())
    G = [[[sp.simplify(sum(gi[a, e] * (sp.diff(g[e, b], X[c]) + sp.diff(g[e, c], X[b])
                                       - sp.diff(g[b, c], X[e])) for e in range(n)) / 2)
           for c in range(n)] for b in range(n)] for a in range(n)]
    R = {}
    for a, b, c, d in itertools.product(range(n), repeat=4):
        R[a, b, c, d] = sp.simplify(
            sp.diff(G[a][d][b], X[c]) - sp.diff(G[a][c][b], X[d])
            + sum(G[a][c][e] * G[e][d][b] - G[a][d][e] * G[e][c][b] for e in range(n)))
    ric = sp.Matrix(n, n, lambda b, d: sp.simplify(sum(R[a, b, a, d] for a in range(n))))
    low = {key: sum(g[key[0], e] * R[(e,) + key[1:]] for e in range(n)) for key in R}
    up = {}
    for a, b, c, d in itertools.product(range(n), repeat=4):
        up[a, b, c, d] = sum(gi[b, B] * gi[c, C] * gi[d, D] * R[a, B, C, D]
                             for B in range(n) for C in range(n) for D in range(n)
                             if gi[b, B] != 0 and gi[c, C] != 0 and gi[d, D] != 0)
    K = sp.simplify(sum(low[key] * up[key] for key in R))
    return R, ric, K


class _NoSimplify:
    """The sympy namespace with simplify() as the identity."""

    def __init__(self, sp):
        self._sp = sp

    def __getattr__(self, name):
        return getattr(self._sp, name)

    @staticmethod
    def simplify(e):
        return e


# -- finite differences (fourth order, central) ---------------------------------------------
def fd_jacobian(fun, y, rel=1e-4):
    """d fun_i / d y_j for a batch y (n, m) by the 4th-order central stencil, step
    rel*max(1, |y_j|) per component."""
    y = np.asarray(y, dtype=float)
    m = y.shape[-1]
    cols = []
    for j in range(m):
        h = rel * np.maximum(1.0, np.abs(y[..., j]))[..., None]
        e = np.zeros(m)
        e[j] = 1.0
        f = [fun(y + s * h * e) for s in (-2, -1, 1, 2)]
        cols.append((f[0] - 8 * f[1] + 8 * f[2] - f[3]) / (12 * h))
    return np.stack(cols, axis=-1)


def fd_riemann(k, x, params, rel=1e-3):
    """R^a_{bcd} from finite differences of k.christoffel (the MTW definition)."""
    dim = k.dim
    G = k.christoffel(x, params)
    dG = []  # dG[c][..., a, b, d] = d_c Gamma^a_{bd}
    for c in range(dim):
        h = rel * np.maximum(1.0, np.abs(x[..., c]))[..., None]
        e = np.zeros(dim)
        e[c] = 1.0
        f = [k.christoffel(x + s * h * e, params) for s in (-2, -1, 1, 2)]
        dG.append((f[0] - 8 * f[1] + 8 * f[2] - f[3]) / (12 * h[..., None, None]))
    dG = np.stack(dG, axis=-1)  # [..., a, b, d, c] = d_c Gamma^a_{bd}
    R = (np.einsum("...adbc->...abcd", dG) - np.einsum("...acbd->...abcd", dG)
         + np.einsum("...ace,...edb->...abcd", G, G) - np.einsum("...ade,...ecb->...abcd", G, G))
    scale = np.max(np.abs(dG), axis=(-4, -3, -2, -1)) + np.max(np.abs(G), axis=(-3, -2, -1)) ** 2
    return R, scale


# -- shapes and backends ----------------------------------------------------------------------
@pytest.mark.parametrize("name", ["schwarzschild", "kerr", "sphere"])
def test_shapes_and_batch_axes(full, backend, name):
    k, x, params, _ = _setup(full, name, backend, n=6)
    d = k.dim
    xb = x.reshape(2, 3, d)
    pb = {p: v.reshape(2, 3) for p, v in params.items()}
    assert k.riemann(xb, pb).shape == (2, 3, d, d, d, d)
    assert k.ricci(xb, pb).shape == (2, 3, d, d)
    assert k.ricci_scalar(xb, pb).shape == (2, 3)
    assert k.kretschmann(xb, pb).shape == (2, 3)
    assert k.riemann(x[0]).shape == (d, d, d, d)
    assert np.shape(k.kretschmann(x[0])) == ()
    # batched equals one at a time
    for i in range(6):
        one = k.riemann(x[i], {p: v[i] for p, v in params.items()})
        np.testing.assert_allclose(k.riemann(xb, pb).reshape(6, d, d, d, d)[i], one,
                                   rtol=1e-13, atol=1e-300)
    y = random_states(name, np.random.default_rng(3), 4)
    assert k.geodesic_jacobian(y).shape == (4, 2 * d, 2 * d)
    assert k.hamilton_jacobian(k.momenta(y)).shape == (4, 2 * d, 2 * d)
    assert k.geodesic_jacobian(y.reshape(2, 2, 2 * d)).shape == (2, 2, 2 * d, 2 * d)
    with pytest.raises(ValueError):
        k.riemann(np.zeros(d + 1))


@needs_cc
@pytest.mark.parametrize("name", ["kerr", "kerr_schild", "reissner_nordstrom", "ellipsoid"])
def test_backends_agree(full, name):
    rng = np.random.default_rng(7)
    kn, kc = full(name, "numpy"), full(name, "c")
    x = random_points(name, rng, 5)
    params = random_params(name, rng, 5)
    riem_scale = np.max(np.abs(kn.riemann(x, params)))
    for fn in CURV:
        a, b = getattr(kn, fn)(x, params), getattr(kc, fn)(x, params)
        # relative to Riemann for the (vacuum: rounding-level) Ricci tensor and scalar
        scale = np.max(np.abs(a)) if fn in ("riemann", "kretschmann") else riem_scale
        np.testing.assert_allclose(a, b, rtol=0, atol=1e-11 * scale, err_msg=fn)
    y = random_states(name, rng, 5)
    z = kn.momenta(y, params)
    for fn, arg in (("geodesic_jacobian", y), ("hamilton_jacobian", z)):
        a, b = getattr(kn, fn)(arg, params), getattr(kc, fn)(arg, params)
        np.testing.assert_allclose(a, b, rtol=0, atol=1e-11 * np.max(np.abs(a)), err_msg=fn)


# -- Kretschmann against closed forms ----------------------------------------------------------
def test_schwarzschild_kretschmann(full, backend):
    """K = 48 M^2 / r^6 (MTW 1973; closed form)."""
    k, x, params, _ = _setup(full, "schwarzschild", backend, n=20)
    M, r = params["M"], x[:, 1]
    np.testing.assert_allclose(k.kretschmann(x, params), 48 * M ** 2 / r ** 6, rtol=1e-11)
    # default parameters (M = 1)
    np.testing.assert_allclose(k.kretschmann(x), 48 / r ** 6, rtol=1e-11)


def kerr_kretschmann(M, a, r, cos_th):
    """Cherubini, Bini, Capozziello & Ruffini (2002), Int. J. Mod. Phys. D 11, 827:
    K = 48 M^2 (r^6 - 15 a^2 r^4 c^2 + 15 a^4 r^2 c^4 - a^6 c^6) / Sigma^6, c = cos(theta),
    Sigma = r^2 + a^2 c^2. Returns (K, scale) with scale = 48 M^2 / Sigma^3 (the size of the
    terms, for a tolerance that is meaningful where K crosses zero)."""
    c2 = cos_th ** 2
    S = r ** 2 + a ** 2 * c2
    num = r ** 6 - 15 * a ** 2 * r ** 4 * c2 + 15 * a ** 4 * r ** 2 * c2 ** 2 - a ** 6 * c2 ** 3
    return 48 * M ** 2 * num / S ** 6, 48 * M ** 2 / S ** 3


def test_kerr_kretschmann(full, backend):
    k, x, params, _ = _setup(full, "kerr", backend, n=30)
    ref, scale = kerr_kretschmann(params["M"], params["a"], x[:, 1], np.cos(x[:, 2]))
    got = k.kretschmann(x, params)
    assert np.all(np.abs(got - ref) <= 1e-10 * scale)
    # a fixed grid at r = 1.8 M, a = 0.99 M (inside the ergoregion, outside r_+ = 1.14 M),
    # over theta, across which K changes sign (the numerator is < 0 at theta = 0.3 and > 0 on
    # the equator)
    th = np.linspace(0.3, PI / 2, 7)
    xs = np.stack([np.zeros(7), np.full(7, 1.8), th, np.zeros(7)], axis=-1)
    p = {"M": 1.0, "a": 0.99}
    ref, scale = kerr_kretschmann(1.0, 0.99, 1.8, np.cos(th))
    assert np.all(np.abs(k.kretschmann(xs, p) - ref) <= 1e-10 * scale)


def ks_to_bl(x, a):
    """Boyer-Lindquist r and cos(theta) of a Kerr-Schild event: r the positive root of
    r^4 - (rho^2 - a^2) r^2 - a^2 z^2 = 0 (the Kerr-Schild quadric, e.g. Visser 2007,
    arXiv:0706.0622, sec. 3), cos(theta) = z / r."""
    rho2 = np.sum(x[..., 1:] ** 2, axis=-1)
    z = x[..., 3]
    b = rho2 - a ** 2
    r = np.sqrt((b + np.sqrt(b * b + 4 * a ** 2 * z ** 2)) / 2)
    return r, z / r


def test_kerr_schild_kretschmann_equals_boyer_lindquist(full, backend):
    """The Kretschmann scalar is a scalar: at the same event it is the same in Kerr-Schild
    and Boyer-Lindquist coordinates (formula of Cherubini et al. 2002)."""
    k, x, params, _ = _setup(full, "kerr_schild", backend, n=30)
    r, c = ks_to_bl(x, params["a"])
    ref, scale = kerr_kretschmann(params["M"], params["a"], r, c)
    got = k.kretschmann(x, params)
    assert np.all(np.abs(got - ref) <= 1e-9 * scale)
    # and against metricc's own Boyer-Lindquist kernel at the same events
    kb = full("kerr", backend)
    xb = np.stack([x[:, 0], r, np.arccos(c), np.zeros(len(r))], axis=-1)
    assert np.all(np.abs(kb.kretschmann(xb, params) - got) <= 1e-9 * scale)


def test_sphere(full, backend):
    """2-sphere of radius R: R^theta_{phi theta phi} = sin^2(theta), Ricci scalar 2/R^2
    (Gaussian curvature 1/R^2), Kretschmann 4/R^4 (in 2-D R_{abcd} = K (g_ac g_bd - g_ad g_bc),
    so R_{abcd} R^{abcd} = 4 K^2) -- Carroll 2004, sec. 3.6-3.7."""
    k, x, params, _ = _setup(full, "sphere", backend, n=10)
    R, th = params["R"], x[:, 0]
    riem = k.riemann(x, params)
    np.testing.assert_allclose(riem[:, 0, 1, 0, 1], np.sin(th) ** 2, rtol=1e-12)
    np.testing.assert_allclose(riem[:, 0, 1, 1, 0], -np.sin(th) ** 2, rtol=1e-12)
    np.testing.assert_allclose(riem[:, 1, 0, 1, 0], 1.0, rtol=1e-12)  # R^phi_{theta phi theta}
    np.testing.assert_allclose(riem[:, 0, 0], 0.0, atol=1e-12)        # R^theta_{theta cd}
    np.testing.assert_allclose(k.ricci_scalar(x, params), 2 / R ** 2, rtol=1e-12)
    np.testing.assert_allclose(k.kretschmann(x, params), 4 / R ** 4, rtol=1e-12)
    # R_{bd} = K g_{bd} in 2-D
    np.testing.assert_allclose(k.ricci(x, params), k.metric(x, params) / R[:, None, None] ** 2,
                               rtol=1e-12, atol=1e-12)


def test_ellipsoid_gaussian_curvature(full, backend):
    """Ellipsoid of revolution: Gaussian curvature K = 1/(M N) (standard geodesy; from memory,
    e.g. Torge & Mueller 2012), Ricci scalar 2K in 2-D. M = a (1 - e^2)/W^3, N = a/W,
    W = sqrt(1 - e^2 sin^2(lat)), e^2 = f (2 - f) (the spec's own definitions of the radii)."""
    k, x, params, _ = _setup(full, "ellipsoid", backend, n=10)
    a, f, lat = params["a"], params["f"], x[:, 0]
    e2 = f * (2 - f)
    W = np.sqrt(1 - e2 * np.sin(lat) ** 2)
    Mr, Nr = a * (1 - e2) / W ** 3, a / W
    np.testing.assert_allclose(k.ricci_scalar(x, params), 2 / (Mr * Nr), rtol=1e-10)
    np.testing.assert_allclose(k.kretschmann(x, params), 4 / (Mr * Nr) ** 2, rtol=1e-10)


def test_ellipsoid_curvature_sympy():
    """The Gaussian curvature formula above, checked independently with sympy (evaluated at
    WGS84 numbers, exact rationals, 30 digits)."""
    import sympy as sp
    lat, lon = sp.symbols("lat lon")
    a, f = sp.Integer(6378137), 1 / sp.Rational("298.257223563")
    e2 = f * (2 - f)
    W = sp.sqrt(1 - e2 * sp.sin(lat) ** 2)
    Mr, Nr = a * (1 - e2) / W ** 3, a / W
    g = sp.diag(Mr ** 2, Nr ** 2 * sp.cos(lat) ** 2)
    _, ric, K = sympy_curvature(g, [lat, lon], simplify=False)
    scal = sum(g.inv()[i, i] * ric[i, i] for i in range(2))
    for v in (sp.Rational(7, 10), sp.Rational(-13, 10)):
        ref = (2 / (Mr * Nr)).subs(lat, v)
        assert sp.N(scal.subs(lat, v) / ref, 30) == pytest.approx(1.0, rel=1e-20)
        assert sp.N(K.subs(lat, v) / ref ** 2, 30) == pytest.approx(1.0, rel=1e-20)


def test_minkowski_flat(full, backend):
    """Flat spacetime in spherical coordinates: every curvature component vanishes, though the
    Christoffel symbols do not."""
    k, x, params, _ = _setup(full, "minkowski", backend, n=10)
    assert np.max(np.abs(k.christoffel(x))) > 0.1
    np.testing.assert_allclose(k.riemann(x), 0.0, atol=1e-13)
    np.testing.assert_allclose(k.ricci(x), 0.0, atol=1e-13)
    np.testing.assert_allclose(k.ricci_scalar(x), 0.0, atol=1e-13)
    np.testing.assert_allclose(k.kretschmann(x), 0.0, atol=1e-13)


# -- Ricci -----------------------------------------------------------------------------------------
@pytest.mark.parametrize("name", ["schwarzschild", "kerr", "kerr_schild"])
def test_vacuum_ricci_vanishes(full, backend, name):
    """Schwarzschild and Kerr are vacuum solutions: R_{bd} = 0 (MTW 1973, ch. 31 and 33),
    relative to the size of the (non-zero) Riemann tensor."""
    k, x, params, _ = _setup(full, name, backend, n=12)
    riem = np.abs(k.riemann(x, params)).max(axis=(-4, -3, -2, -1))
    assert np.all(riem > 1e-6)
    ric = np.abs(k.ricci(x, params)).max(axis=(-2, -1))
    assert np.all(ric <= 1e-10 * riem)
    assert np.all(np.abs(k.ricci_scalar(x, params)) <= 1e-10 * riem)


@pytest.fixture(scope="module")
def rn_sympy():
    """Reissner-Nordstrom curvature from the independent sympy computation, lambdified."""
    import sympy as sp
    t, r, th, ph, M, Q = sp.symbols("t r theta phi M Q")
    f = 1 - 2 * M / r + Q ** 2 / r ** 2
    g = sp.diag(-f, 1 / f, r ** 2, r ** 2 * sp.sin(th) ** 2)
    R, ric, K = sympy_curvature(g, [t, r, th, ph])
    args = (t, r, th, ph, M, Q)
    riem = sp.lambdify(args, sp.Array([[[[R[a, b, c, d] for d in range(4)] for c in range(4)]
                                        for b in range(4)] for a in range(4)]), "numpy")
    return {"riemann": riem, "ricci": sp.lambdify(args, ric, "numpy"),
            "K": sp.lambdify(args, K, "numpy")}


def test_reissner_nordstrom(full, backend, rn_sympy):
    """Reissner-Nordstrom: traceless electromagnetic stress, so R = 0 but R_{bd} != 0.
    R_tt = Q^2 f / r^4 with f = 1 - 2M/r + Q^2/r^2 (from memory; follows from
    R_{mu nu} = 8 pi T_{mu nu} for the Coulomb field) and K = 8 (6 M^2 r^2 - 12 M Q^2 r
    + 7 Q^4) / r^8 (from memory); both confirmed by the independent sympy computation, which
    also gives the full Riemann and Ricci tensors compared here."""
    k, x, params, _ = _setup(full, "reissner_nordstrom", backend, n=8)
    M, Q = params["M"], params["Q"]
    t, r, th, ph = x.T
    f = 1 - 2 * M / r + Q ** 2 / r ** 2
    ric = k.ricci(x, params)
    np.testing.assert_allclose(ric[:, 0, 0], Q ** 2 * f / r ** 4, rtol=1e-10)
    np.testing.assert_allclose(ric[:, 1, 1], -Q ** 2 / (f * r ** 4), rtol=1e-10)
    np.testing.assert_allclose(ric[:, 2, 2], Q ** 2 / r ** 2, rtol=1e-10)
    np.testing.assert_allclose(ric[:, 3, 3], Q ** 2 * np.sin(th) ** 2 / r ** 2, rtol=1e-10)
    scale = np.abs(ric).max(axis=(-2, -1))
    assert np.all(np.abs(k.ricci_scalar(x, params)) <= 1e-10 * scale)
    Kref = 8 * (6 * M ** 2 * r ** 2 - 12 * M * Q ** 2 * r + 7 * Q ** 4) / r ** 8
    np.testing.assert_allclose(k.kretschmann(x, params), Kref, rtol=1e-10)
    riem = k.riemann(x, params)
    for i in range(len(r)):
        args = (t[i], r[i], th[i], ph[i], M[i], Q[i])
        np.testing.assert_allclose(rn_sympy["K"](*args), Kref[i], rtol=1e-12)
        np.testing.assert_allclose(np.asarray(rn_sympy["ricci"](*args), dtype=float), ric[i],
                                   rtol=1e-10, atol=1e-12 * scale[i])
        ref = np.asarray(rn_sympy["riemann"](*args), dtype=float)
        np.testing.assert_allclose(riem[i], ref, rtol=1e-10, atol=1e-12 * np.abs(ref).max())


# -- structure ----------------------------------------------------------------------------------
@pytest.mark.parametrize("name", ALL)
def test_riemann_symmetries(full, backend, name):
    """R^a_{bcd} = -R^a_{bdc}; R_{abcd} = -R_{bacd} = R_{cdab}; R^a_{[bcd]} = 0 (first Bianchi
    identity): the standard symmetries of the Riemann tensor (e.g. Carroll 2004, sec. 3.6;
    section from memory)."""
    k, x, params, _ = _setup(full, name, backend, n=8)
    R = k.riemann(x, params)
    low = lower(k, x, R, params)
    s = np.abs(low).max(axis=(-4, -3, -2, -1))[:, None, None, None, None] + 1e-300
    su = np.abs(R).max(axis=(-4, -3, -2, -1))[:, None, None, None, None] + 1e-300
    if name != "minkowski":
        assert np.all(su > 1e-20)
    tol = 1e-10
    assert np.all(np.abs(R + np.swapaxes(R, -1, -2)) <= tol * su + 1e-14)
    assert np.all(np.abs(low + np.swapaxes(low, -4, -3)) <= tol * s + 1e-14)
    assert np.all(np.abs(low - np.einsum("...abcd->...cdab", low)) <= tol * s + 1e-14)
    bianchi = R + np.einsum("...abcd->...acdb", R) + np.einsum("...abcd->...adbc", R)
    assert np.all(np.abs(bianchi) <= tol * su + 1e-14)


@pytest.mark.parametrize("name", ALL)
def test_riemann_matches_christoffel_finite_differences(full, backend, name):
    """R^a_{bcd} from its definition with d_c Gamma by 4th-order central differences of
    k.christoffel: checks the index convention and every component (incl. kerr_schild, whose
    inverse metric is numeric)."""
    k, x, params, _ = _setup(full, name, backend, n=5)
    ref, scale = fd_riemann(k, x, params)
    got = k.riemann(x, params)
    err = np.abs(got - ref).max(axis=(-4, -3, -2, -1))
    assert np.all(err <= 1e-7 * scale), (err / scale)


@pytest.mark.parametrize("name", ALL)
def test_contractions_consistent(full, backend, name):
    """ricci, ricci_scalar and kretschmann are the stated contractions of riemann."""
    k, x, params, _ = _setup(full, name, backend, n=6)
    R = k.riemann(x, params)
    gi = k.inverse_metric(x, params)
    ric = np.einsum("...abad->...bd", R)
    sR = np.abs(R).max() + 1e-300
    np.testing.assert_allclose(k.ricci(x, params), ric, rtol=0, atol=1e-11 * sR)
    scal = np.einsum("...bd,...bd->...", gi, ric)
    scale_s = np.einsum("...bd,...bd->...", np.abs(gi), np.abs(ric))
    assert np.all(np.abs(k.ricci_scalar(x, params) - scal) <= 1e-9 * scale_s + 1e-13)
    low = lower(k, x, R, params)
    up = np.einsum("...bB,...cC,...dD,...aBCD->...abcd", gi, gi, gi, R)
    K = np.einsum("...abcd,...abcd->...", low, up)
    Ks = np.einsum("...abcd,...abcd->...", np.abs(low), np.abs(up))
    assert np.all(np.abs(k.kretschmann(x, params) - K) <= 1e-9 * Ks + 1e-13)


# -- Jacobians ------------------------------------------------------------------------------------
def _check_jacobian(J, Jfd, y):
    """Column-scaled comparison: entry (i, j) times the step scale of y_j, tolerance relative
    to the largest such entry in row i (plus a tiny fraction of the whole matrix)."""
    s = np.maximum(1.0, np.abs(y))[..., None, :]
    A, B = J * s, Jfd * s
    row = np.abs(B).max(axis=-1, keepdims=True)
    whole = np.abs(B).max(axis=(-2, -1), keepdims=True)
    bad = np.abs(A - B) > 1e-8 * row + 1e-12 * whole + 1e-300
    assert not np.any(bad), np.argwhere(bad)[:5]


@pytest.mark.parametrize("name", ALL)
def test_geodesic_jacobian_finite_differences(full, backend, name):
    k = full(name, backend)
    rng = np.random.default_rng(11 + ALL.index(name))
    y = random_states(name, rng, 5)
    params = random_params(name, rng, 5)
    J = k.geodesic_jacobian(y, params)
    Jfd = fd_jacobian(lambda v: k.geodesic_rhs(v, params), y)
    _check_jacobian(J, Jfd, y)
    # the top-right block is d u / d u = identity, the top-left zero (exact structure)
    d = k.dim
    np.testing.assert_allclose(J[:, :d, d:], np.broadcast_to(np.eye(d), (5, d, d)), atol=1e-15)
    np.testing.assert_allclose(J[:, :d, :d], 0.0, atol=1e-15)


@pytest.mark.parametrize("name", ALL)
def test_hamilton_jacobian_finite_differences(full, backend, name):
    k = full(name, backend)
    rng = np.random.default_rng(23 + ALL.index(name))
    params = random_params(name, rng, 5)
    z = k.momenta(random_states(name, rng, 5), params)
    J = k.hamilton_jacobian(z, params)
    Jfd = fd_jacobian(lambda v: k.hamilton_rhs(v, params), z)
    _check_jacobian(J, Jfd, z)
    # Hamiltonian flow f = Omega grad H with Omega = [[0, I], [-I, 0]]: J = Omega Hess(H), so
    # Omega^T J (the Hessian of H) is symmetric
    d = k.dim
    omega = np.block([[np.zeros((d, d)), np.eye(d)], [-np.eye(d), np.zeros((d, d))]])
    hess = np.einsum("ij,...jk->...ik", omega.T, J)
    sc = np.abs(hess).max(axis=(-2, -1), keepdims=True)
    assert np.all(np.abs(hess - np.swapaxes(hess, -1, -2)) <= 1e-10 * sc)


# -- opting in ----------------------------------------------------------------------------------
@pytest.mark.parametrize("fn", CURV + JAC)
def test_not_built_by_default(shipped, fn):
    """The shipped kernels are built without the opt-in kernels: asking for one says how to
    enable it."""
    k = shipped["kerr"]["numpy"]
    arg = np.array([0.0, 6.0, 1.2, 0.0]) if fn in CURV else \
        np.array([0.0, 6.0, 1.2, 0.0, 1.2, -0.1, 0.0, 0.03])
    with pytest.raises(ValueError, match="kernels"):
        getattr(k, fn)(arg)


SPHERE_TEXT = (SPECS / "sphere.toml").read_text(encoding="utf-8")


def _with_top_key(text, line):
    """Insert a top-level TOML line right after the ``name = ...`` line (before any table)."""
    out = []
    for ln in text.splitlines():
        out.append(ln)
        if ln.startswith("name ="):
            out.append(line)
    return "\n".join(out) + "\n"


def test_only_requested_kernels(backend):
    """kernels=["curvature"] builds curvature only; jacobians still raise, naming `kernels`."""
    k = metricc.load(SPECS / "sphere.toml", backend=backend, kernels=["curvature"])
    x = np.array([1.0, 0.3])
    assert k.ricci_scalar(x) == pytest.approx(2.0, rel=1e-12)  # R = 1: 2/R^2 (Carroll 2004)
    with pytest.raises(ValueError, match="kernels"):
        k.geodesic_jacobian(np.array([1.0, 0.3, 0.2, 0.1]))
    kj = metricc.load(SPECS / "sphere.toml", backend=backend, kernels=["jacobian"])
    assert kj.geodesic_jacobian(np.array([1.0, 0.3, 0.2, 0.1])).shape == (4, 4)
    with pytest.raises(ValueError, match="kernels"):
        kj.riemann(x)


def test_spec_key_kernels(backend):
    """A top-level spec key ``kernels = ["curvature", "jacobian"]`` enables both."""
    text = _with_top_key(SPHERE_TEXT, 'kernels = ["curvature", "jacobian"]')
    k = metricc.loads(text, backend=backend)
    x = np.array([1.0, 0.3])
    assert k.riemann(x)[0, 1, 0, 1] == pytest.approx(np.sin(1.0) ** 2, rel=1e-12)
    y = np.array([1.0, 0.3, 0.2, 0.1])
    Jfd = fd_jacobian(k.geodesic_rhs, y[None])[0]
    np.testing.assert_allclose(k.geodesic_jacobian(y), Jfd, rtol=1e-8, atol=1e-10)
    z = k.momenta(y)
    Jfd = fd_jacobian(k.hamilton_rhs, z[None])[0]
    np.testing.assert_allclose(k.hamilton_jacobian(z), Jfd, rtol=1e-8, atol=1e-10)


def test_cli_build_kernels(tmp_path, capsys):
    """``metricc build --kernels curvature,jacobian`` emits the extra kernels into the
    generated files; without the option they are absent."""
    from metricc.cli import main
    plain, extra = tmp_path / "plain", tmp_path / "extra"
    assert main(["build", str(SPECS / "sphere.toml"), "--out", str(plain), "-q"]) == 0
    assert main(["build", str(SPECS / "sphere.toml"), "--out", str(extra), "-q",
                 "--kernels", "curvature,jacobian"]) == 0
    for kernel in ("riemann", "ricci", "kretschmann", "geodesic_jacobian", "hamilton_jacobian"):
        assert f"sphere_{kernel}" in (extra / "sphere.h").read_text(), kernel
        assert f"sphere_{kernel}" in (extra / "sphere.c").read_text(), kernel
        assert f"def {kernel}" in (extra / "sphere_numpy.py").read_text(), kernel
        assert f"sphere_{kernel}" not in (plain / "sphere.h").read_text(), kernel
        assert f"def {kernel}" not in (plain / "sphere_numpy.py").read_text(), kernel
