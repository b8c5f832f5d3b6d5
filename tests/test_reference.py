"""Christoffel symbols and metrics of every shipped spec against independent references.

References used here (none of them reads a spec file or uses metricc's parser):

* sympy.diffgeom (a reference library): each metric is written below by hand, from the
  physics formulas, as a sum of TensorProducts of coordinate one-forms on a CoordSystem, and
  ``metric_to_Christoffel_2nd`` differentiates and inverts it. Its output layout [a, b, c] is
  Gamma^a_{bc}, the same as ``MetricKernels.christoffel``.
* Kerr-Schild (dense 4x4 with nested square roots): ``metric_to_Christoffel_1st`` and the
  symbolic inverse of sympy.diffgeom do not finish in minutes on it (its ``is_symmetric``
  check simplifies every entry), so that reference falls back to plain sympy:
  Gamma_{dbc} = 1/2 (d_b g_dc + d_c g_db - d_d g_bc) by ``sympy.diff``, raised with the
  closed-form inverse g^{mu nu} = eta^{mu nu} - F l^mu l^nu of a Kerr-Schild metric.
* Closed forms from textbooks for Schwarzschild, flat space in spherical coordinates and the
  2-sphere; the geodesy radii of curvature M and N of the ellipsoid; geographiclib's
  geodesic solver (Karney 2013) for a short step on the ellipsoid.
"""
from __future__ import annotations

import functools
import math

import numpy as np
import pytest
import sympy as sp
from sympy.diffgeom import (CoordSystem, Manifold, Patch, TensorProduct,
                            metric_to_Christoffel_2nd, twoform_to_matrix)

from tests.conftest import SHIPPED
from tests.support import random_params, random_points

BACKENDS = ("c", "numpy")
N_POINTS = 40
REL = 1e-11   # observed agreement ~5e-15; the brief asks ~1e-10


def kernels_for(shipped, name, backend):
    k = shipped[name][backend]
    if k is None:
        pytest.skip("no C compiler: the C backend is not available")
    return k


# -- hand-written reference metrics (sympy.diffgeom) ----------------------------------------
def _coords(name, names):
    manifold = Manifold(f"{name}_manifold", len(names))
    patch = Patch(f"{name}_patch", manifold)
    return CoordSystem(f"{name}_coords", patch, sp.symbols(names, real=True))


def _diag_metric(cs, diag):
    forms = cs.base_oneforms()
    return sp.Add(*[c * TensorProduct(forms[i], forms[i]) for i, c in enumerate(diag)])


def ref_minkowski():
    # Flat spacetime, spherical coordinates: ds^2 = -dt^2 + dr^2 + r^2 dOmega^2.
    cs = _coords("minkowski", ["t", "r", "theta", "phi"])
    t, r, th, ph = cs.base_scalars()
    return cs, _diag_metric(cs, [-1, 1, r**2, r**2 * sp.sin(th)**2]), ()


def ref_sphere():
    # Round 2-sphere of radius R: ds^2 = R^2 (dtheta^2 + sin^2 theta dphi^2).
    cs = _coords("sphere", ["theta", "phi"])
    th, ph = cs.base_scalars()
    R = sp.Symbol("R", positive=True)
    return cs, _diag_metric(cs, [R**2, R**2 * sp.sin(th)**2]), (R,)


def ref_ellipsoid():
    # Oblate ellipsoid of revolution in geodetic latitude/longitude:
    # ds^2 = M^2 dlat^2 + (N cos lat)^2 dlon^2 with e^2 = f (2 - f),
    # M = a (1 - e^2) / (1 - e^2 sin^2 lat)^(3/2), N = a / (1 - e^2 sin^2 lat)^(1/2)
    # (Torge & Mueller, Geodesy, 4th ed. 2012, Sec. 4.1; the line element is the first
    # fundamental form in the principal directions, ibid.).
    cs = _coords("ellipsoid", ["lat", "lon"])
    lat, lon = cs.base_scalars()
    a, f = sp.symbols("a f", positive=True)
    e2 = f * (2 - f)
    w2 = 1 - e2 * sp.sin(lat)**2
    Mrad = a * (1 - e2) / w2**sp.Rational(3, 2)
    Nrad = a / sp.sqrt(w2)
    return cs, _diag_metric(cs, [Mrad**2, Nrad**2 * sp.cos(lat)**2]), (a, f)


def ref_schwarzschild():
    # Schwarzschild (1916); e.g. Carroll 2004, "Spacetime and Geometry", eq. 5.38 (equation
    # number from memory): ds^2 = -(1-2M/r) dt^2 + dr^2/(1-2M/r) + r^2 dOmega^2.
    cs = _coords("schwarzschild", ["t", "r", "theta", "phi"])
    t, r, th, ph = cs.base_scalars()
    M = sp.Symbol("M", positive=True)
    f = 1 - 2 * M / r
    return cs, _diag_metric(cs, [-f, 1 / f, r**2, r**2 * sp.sin(th)**2]), (M,)


def ref_reissner_nordstrom():
    # Reissner (1916), Nordstrom (1918); e.g. Carroll 2004, Sec. 6.5 (geometrised Gaussian
    # units): f = 1 - 2M/r + Q^2/r^2, ds^2 = -f dt^2 + dr^2/f + r^2 dOmega^2.
    cs = _coords("rn", ["t", "r", "theta", "phi"])
    t, r, th, ph = cs.base_scalars()
    M, Q = sp.symbols("M Q", real=True)
    f = 1 - 2 * M / r + Q**2 / r**2
    return cs, _diag_metric(cs, [-f, 1 / f, r**2, r**2 * sp.sin(th)**2]), (M, Q)


def ref_kerr():
    # Kerr (1963) in Boyer-Lindquist coordinates (Boyer & Lindquist 1967); e.g. MTW 1973
    # eq. 33.2 or Visser 2007, arXiv:0706.0622, eq. (29) (numbers from memory):
    # Sigma = r^2 + a^2 cos^2 th, Delta = r^2 - 2Mr + a^2,
    # ds^2 = -(1 - 2Mr/Sigma) dt^2 - (4 M a r sin^2 th / Sigma) dt dphi + Sigma/Delta dr^2
    #        + Sigma dth^2 + (r^2 + a^2 + 2 M a^2 r sin^2 th / Sigma) sin^2 th dphi^2.
    cs = _coords("kerr", ["t", "r", "theta", "phi"])
    t, r, th, ph = cs.base_scalars()
    dt, dr, dth, dph = cs.base_oneforms()
    M, a = sp.symbols("M a", real=True)
    sig = r**2 + a**2 * sp.cos(th)**2
    delta = r**2 - 2 * M * r + a**2
    s2 = sp.sin(th)**2
    g = (-(1 - 2 * M * r / sig) * TensorProduct(dt, dt)
         - 2 * M * a * r * s2 / sig * (TensorProduct(dt, dph) + TensorProduct(dph, dt))
         + sig / delta * TensorProduct(dr, dr) + sig * TensorProduct(dth, dth)
         + (r**2 + a**2 + 2 * M * a**2 * r * s2 / sig) * s2 * TensorProduct(dph, dph))
    return cs, g, (M, a)


DIFFGEOM_REFS = {"minkowski": ref_minkowski, "sphere": ref_sphere, "ellipsoid": ref_ellipsoid,
                 "schwarzschild": ref_schwarzschild, "kerr": ref_kerr,
                 "reissner_nordstrom": ref_reissner_nordstrom}


def _lambdify_array(symbols, exprs, shape):
    """A numpy function of (points (n, dim), params (n,) arrays) -> (n, *shape)."""
    flat = list(exprs)
    fn = sp.lambdify(symbols, flat, modules="numpy", cse=True)

    def call(x, params):
        args = [x[:, i] for i in range(x.shape[1])] + list(params)
        vals = fn(*args)
        n = x.shape[0]
        out = np.stack([np.broadcast_to(np.asarray(v, dtype=float), (n,)) for v in vals], axis=-1)
        return out.reshape((n,) + shape)
    return call


@functools.lru_cache(maxsize=None)
def diffgeom_reference(name):
    """(metric_fn, christoffel_fn, parameter names) for a spec from sympy.diffgeom."""
    cs, g, params = DIFFGEOM_REFS[name]()
    dim = cs.dim
    fields = dict(zip(cs.base_scalars(), cs.symbols))
    gamma = metric_to_Christoffel_2nd(g).subs(fields)
    # metric components g(e_i, e_j) of the same 2-form
    gmat = twoform_to_matrix(g).subs(fields)
    gmat = [gmat[i, j] for i in range(dim) for j in range(dim)]
    syms = list(cs.symbols) + list(params)
    metric_fn = _lambdify_array(syms, gmat, (dim, dim))
    gamma_fn = _lambdify_array(syms, [gamma[a, b, c] for a in range(dim) for b in range(dim)
                                      for c in range(dim)], (dim, dim, dim))
    return metric_fn, gamma_fn, tuple(str(p) for p in params)


@functools.lru_cache(maxsize=None)
def kerr_schild_reference():
    """(metric_fn, christoffel_fn, inverse_fn, parameter names) for Cartesian Kerr-Schild.

    Kerr (1963), Kerr & Schild (1965); e.g. Visser 2007, arXiv:0706.0622, Sec. 3.4 (from
    memory): g = eta + F l l with F = 2 M r^3 / (r^4 + a^2 z^2),
    l = (1, (r x + a y)/(r^2 + a^2), (r y - a x)/(r^2 + a^2), z/r) and r the Boyer-Lindquist
    radius, r^4 - (x^2 + y^2 + z^2 - a^2) r^2 - a^2 z^2 = 0. Because l is null for eta (and for
    g), the inverse is exactly g^{mu nu} = eta^{mu nu} - F l^mu l^nu with l^mu = eta^{mu nu} l_nu.
    Plain sympy (see the module docstring for why not sympy.diffgeom here).
    """
    t, x, y, z = X = sp.symbols("t x y z", real=True)
    M, a = sp.symbols("M a", real=True)
    rho2 = x**2 + y**2 + z**2
    r = sp.sqrt((rho2 - a**2) / 2 + sp.sqrt((rho2 - a**2)**2 / 4 + a**2 * z**2))
    F = 2 * M * r**3 / (r**4 + a**2 * z**2)
    low = [sp.S.One, (r * x + a * y) / (r**2 + a**2), (r * y - a * x) / (r**2 + a**2), z / r]
    eta = [-1, 1, 1, 1]
    up = [eta[i] * low[i] for i in range(4)]
    g = [[(eta[i] if i == j else 0) + F * low[i] * low[j] for j in range(4)] for i in range(4)]
    ginv = [[(eta[i] if i == j else 0) - F * up[i] * up[j] for j in range(4)] for i in range(4)]
    first = [[[(sp.diff(g[d][c], X[b]) + sp.diff(g[d][b], X[c]) - sp.diff(g[b][c], X[d])) / 2
               for c in range(4)] for b in range(4)] for d in range(4)]
    syms = list(X) + [M, a]
    metric_fn = _lambdify_array(syms, [g[i][j] for i in range(4) for j in range(4)], (4, 4))
    inverse_fn = _lambdify_array(syms, [ginv[i][j] for i in range(4) for j in range(4)], (4, 4))
    first_fn = _lambdify_array(syms, [first[d][b][c] for d in range(4) for b in range(4)
                                      for c in range(4)], (4, 4, 4))

    def gamma_fn(xs, params):
        return np.einsum("nad,ndbc->nabc", inverse_fn(xs, params), first_fn(xs, params))
    return metric_fn, gamma_fn, inverse_fn, ("M", "a")


def reference(name):
    if name == "kerr_schild":
        metric_fn, gamma_fn, _, pnames = kerr_schild_reference()
    else:
        metric_fn, gamma_fn, pnames = diffgeom_reference(name)
    return metric_fn, gamma_fn, pnames


def sample(name, kind, seed, k):
    """(points, params for metricc or None, params tuple for the reference)."""
    rng = np.random.default_rng(seed)
    x = random_points(name, rng, N_POINTS)
    if kind == "default":
        params = None
        pvals = {p: np.full(N_POINTS, v) for p, v in k.parameters.items()}
    else:
        params = random_params(name, rng, N_POINTS)
        pvals = params
    return x, params, pvals


def assert_close_scaled(got, want, rel, axes):
    """|got - want| <= rel * (max |want| over `axes` of each point), elementwise."""
    assert got.shape == want.shape
    assert np.all(np.isfinite(got))
    scale = np.max(np.abs(want), axis=axes, keepdims=True)
    err = np.abs(got - want)
    bad = err > rel * scale
    if np.any(bad):
        idx = tuple(np.argwhere(bad)[0])
        raise AssertionError(f"{np.count_nonzero(bad)} entries differ, e.g. at {idx}: got "
                             f"{got[idx]!r}, want {want[idx]!r} (scale {scale[idx[0]].max():.3g},"
                             f" max rel err {np.max(err / scale):.3g})")


# -- the sympy.diffgeom / sympy reference ---------------------------------------------------
@pytest.mark.parametrize("kind", ["default", "random"])
@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("name", SHIPPED)
def test_christoffel_matches_sympy_reference(shipped, name, backend, kind):
    k = kernels_for(shipped, name, backend)
    metric_fn, gamma_fn, pnames = reference(name)
    assert set(pnames) == set(k.parameters)
    x, params, pvals = sample(name, kind, 11 + SHIPPED.index(name), k)
    pargs = [pvals[p] for p in pnames]
    want_g = metric_fn(x, pargs)
    want = gamma_fn(x, pargs)
    assert_close_scaled(k.metric(x, params), want_g, REL, axes=(1, 2))
    assert_close_scaled(k.christoffel(x, params), want, REL, axes=(1, 2, 3))


@pytest.mark.parametrize("backend", BACKENDS)
def test_kerr_schild_inverse_matches_closed_form(shipped, backend):
    # metricc inverts this dense metric numerically at run time; the closed form
    # eta - F l l (Kerr-Schild property, see kerr_schild_reference) is independent of that.
    k = kernels_for(shipped, "kerr_schild", backend)
    _, _, inverse_fn, pnames = kerr_schild_reference()
    rng = np.random.default_rng(5)
    x = random_points("kerr_schild", rng, N_POINTS)
    params = random_params("kerr_schild", rng, N_POINTS)
    assert_close_scaled(k.inverse_metric(x, params), inverse_fn(x, [params[p] for p in pnames]),
                        1e-12, axes=(1, 2))


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("name", SHIPPED)
def test_inverse_times_metric_is_identity(shipped, name, backend):
    k = kernels_for(shipped, name, backend)
    rng = np.random.default_rng(23)
    x = random_points(name, rng, N_POINTS)
    params = random_params(name, rng, N_POINTS) or None
    g = k.metric(x, params)
    ginv = k.inverse_metric(x, params)
    eye = np.eye(k.dim)
    # rounding bound of a product with inverse: a few eps * |g| |g^-1| (common practice)
    scale = (np.linalg.norm(g, axis=(1, 2)) * np.linalg.norm(ginv, axis=(1, 2)))[:, None, None]
    for prod in (np.einsum("nij,njk->nik", ginv, g), np.einsum("nij,njk->nik", g, ginv)):
        assert np.all(np.abs(prod - eye) <= 1e-13 * scale)
    # the inverse is symmetric, like the metric
    np.testing.assert_allclose(ginv, np.swapaxes(ginv, 1, 2), rtol=0,
                               atol=1e-15 * np.max(np.abs(ginv)))


# -- textbook closed forms ------------------------------------------------------------------
def schwarzschild_christoffel(x, M):
    """Non-zero Christoffel symbols of Schwarzschild, all others zero.

    Carroll 2004, "Spacetime and Geometry", eq. 5.15 for the general static spherical metric
    with e^{2 alpha} = e^{-2 beta} = 1 - 2M/r (equation number from memory); the same list is
    in MTW 1973, Exercise 14.13 / Box 14.5 (from memory). M = 0 gives flat space in spherical
    coordinates.
    """
    r, th = x[:, 1], x[:, 2]
    n = x.shape[0]
    G = np.zeros((n, 4, 4, 4))
    T, R, TH, PH = range(4)

    def put(a, b, c, v):
        G[:, a, b, c] = v
        G[:, a, c, b] = v
    put(T, T, R, M / (r * (r - 2 * M)))               # Gamma^t_tr
    put(R, T, T, M * (r - 2 * M) / r**3)              # Gamma^r_tt
    put(R, R, R, -M / (r * (r - 2 * M)))              # Gamma^r_rr
    put(R, TH, TH, -(r - 2 * M))                      # Gamma^r_thth
    put(R, PH, PH, -(r - 2 * M) * np.sin(th)**2)      # Gamma^r_phph
    put(TH, R, TH, 1 / r)                             # Gamma^th_rth
    put(TH, PH, PH, -np.sin(th) * np.cos(th))         # Gamma^th_phph
    put(PH, R, PH, 1 / r)                             # Gamma^ph_rph
    put(PH, TH, PH, np.cos(th) / np.sin(th))          # Gamma^ph_thph = cot th
    return G


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("kind", ["default", "random"])
def test_schwarzschild_closed_form(shipped, backend, kind):
    k = kernels_for(shipped, "schwarzschild", backend)
    x, params, pvals = sample("schwarzschild", kind, 3, k)
    assert_close_scaled(k.christoffel(x, params), schwarzschild_christoffel(x, pvals["M"]),
                        1e-12, axes=(1, 2, 3))


@pytest.mark.parametrize("backend", BACKENDS)
def test_minkowski_closed_form(shipped, backend):
    # Schwarzschild's list at M = 0: flat spacetime in spherical coordinates.
    k = kernels_for(shipped, "minkowski", backend)
    x = random_points("minkowski", np.random.default_rng(4), N_POINTS)
    assert_close_scaled(k.christoffel(x), schwarzschild_christoffel(x, 0.0), 1e-13,
                        axes=(1, 2, 3))


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("kind", ["default", "random"])
def test_sphere_closed_form(shipped, backend, kind):
    # 2-sphere of radius R: Gamma^theta_phiphi = -sin th cos th, Gamma^phi_thetaphi = cot th,
    # all others zero, independent of R (e.g. Carroll 2004, Sec. 3.2; also follows by hand from
    # Gamma = 1/2 g^-1 (dg + dg - dg) for g = R^2 diag(1, sin^2 th)).
    k = kernels_for(shipped, "sphere", backend)
    x, params, _ = sample("sphere", kind, 6, k)
    th = x[:, 0]
    want = np.zeros((N_POINTS, 2, 2, 2))
    want[:, 0, 1, 1] = -np.sin(th) * np.cos(th)
    want[:, 1, 0, 1] = want[:, 1, 1, 0] = np.cos(th) / np.sin(th)
    assert_close_scaled(k.christoffel(x, params), want, 1e-13, axes=(1, 2, 3))


def geodesy_radii(lat, a, f):
    """Meridional (M) and prime-vertical (N) radii of curvature of an ellipsoid of revolution:
    M = a (1 - e^2) / (1 - e^2 sin^2 lat)^(3/2), N = a / sqrt(1 - e^2 sin^2 lat), e^2 = f(2-f)
    (Torge & Mueller, Geodesy, 4th ed. 2012, Sec. 4.1)."""
    e2 = f * (2 - f)
    w2 = 1 - e2 * np.sin(lat)**2
    return a * (1 - e2) / w2**1.5, a / np.sqrt(w2)


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("kind", ["default", "random"])
def test_ellipsoid_radii_of_curvature(shipped, backend, kind):
    k = kernels_for(shipped, "ellipsoid", backend)
    x, params, pvals = sample("ellipsoid", kind, 8, k)
    lat = x[:, 0]
    Mrad, Nrad = geodesy_radii(lat, pvals["a"], pvals["f"])
    g = k.metric(x, params)
    # arc length along a meridian is M dlat, along a parallel N cos(lat) dlon
    np.testing.assert_allclose(np.sqrt(g[:, 0, 0]), Mrad, rtol=1e-13)
    np.testing.assert_allclose(np.sqrt(g[:, 1, 1]), Nrad * np.cos(lat), rtol=1e-13)
    np.testing.assert_array_equal(g[:, 0, 1], 0.0)
    np.testing.assert_array_equal(g[:, 1, 0], 0.0)
    # WGS84 values at the equator and the pole, from the defining constants
    # a = 6378137 m, 1/f = 298.257223563 (NIMA TR8350.2, 3rd ed. 2000, Table 3.1):
    # M(0) = a (1 - e^2), N(0) = a; at the pole M = N = a / sqrt(1 - e^2) = a^2 / b.
    if kind == "default":
        a, f = 6378137.0, 1 / 298.257223563
        e2 = f * (2 - f)
        g0 = k.metric(np.array([[0.0, 0.3]]))[0]
        np.testing.assert_allclose(np.sqrt(g0[0, 0]), a * (1 - e2), rtol=1e-14)
        np.testing.assert_allclose(np.sqrt(g0[1, 1]), a, rtol=1e-14)
        b = a * (1 - f)
        gp = k.metric(np.array([[math.pi / 2, 0.3]]))[0]
        np.testing.assert_allclose(np.sqrt(gp[0, 0]), a**2 / b, rtol=1e-13)


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("kind", ["wgs84", "random"])
def test_ellipsoid_short_geodesic_step_matches_geographiclib(shipped, backend, kind):
    # geographiclib (Karney 2013, J. Geodesy 87, 43) solves the direct geodesic problem to
    # ~15 nm. A step of s = 100 m from (lat1, lon1) with azimuth azi1 must satisfy
    # s^2 = g_ij(midpoint) dx^i dx^j up to O((s/a)^2) ~ 1e-10 relative (midpoint rule).
    geographiclib = pytest.importorskip("geographiclib.geodesic")
    k = kernels_for(shipped, "ellipsoid", backend)
    rng = np.random.default_rng(31)
    n = 24
    lat1 = rng.uniform(-1.4, 1.4, n)
    lon1 = rng.uniform(-3.0, 3.0, n)
    azi1 = np.concatenate([[0.0, 90.0, 180.0, -90.0], rng.uniform(-180, 180, n - 4)])
    if kind == "wgs84":
        a = np.full(n, 6378137.0)
        f = np.full(n, 1 / 298.257223563)
        params = None
    else:
        params = random_params("ellipsoid", rng, n)
        a, f = params["a"], params["f"]
    s = 100.0
    dx = np.empty((n, 2))
    for i in range(n):
        geod = (geographiclib.Geodesic.WGS84 if kind == "wgs84"
                else geographiclib.Geodesic(float(a[i]), float(f[i])))
        out = geod.Direct(math.degrees(lat1[i]), math.degrees(lon1[i]), azi1[i], s)
        dlon = (out["lon2"] - math.degrees(lon1[i]) + 180.0) % 360.0 - 180.0
        dx[i] = np.radians([out["lat2"] - math.degrees(lat1[i]), dlon])
    mid = np.stack([lat1, lon1], axis=-1) + dx / 2
    g = k.metric(mid, params)
    ds2 = np.einsum("nij,ni,nj->n", g, dx, dx)
    np.testing.assert_allclose(ds2, s**2, rtol=1e-7)
    # north-south steps test M alone, east-west steps N cos(lat) alone
    np.testing.assert_allclose(np.sqrt(g[:4:2, 0, 0]) * np.abs(dx[:4:2, 0]), s, rtol=1e-7)
    np.testing.assert_allclose(np.sqrt(g[1:4:2, 1, 1]) * np.abs(dx[1:4:2, 1]), s, rtol=1e-7)
