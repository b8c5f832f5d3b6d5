"""Observers, initial data and invariants: ``k.normalize``, ``k.frame``, ``k.from_frame``,
``k.camera`` and the spec's ``[invariants]`` (``k.invariants``, ``res.invariant_drift``).

References (cited again where each value is used):

* Synge (1966), MNRAS 131, 463: angular radius of the Schwarzschild shadow seen by a static
  observer at r_o, sin(alpha) = 3 sqrt(3) M sqrt(1 - 2M/r_o) / r_o, measured from the inward
  radial direction.
* Carter (1968), Phys. Rev. 174, 1559 (also MTW 1973, eq. 33.31, number from memory): the fourth constant of Kerr
  geodesics, Q = p_theta^2 + cos^2(theta) (a^2 (mu^2 - E^2) + L_z^2 / sin^2(theta)), with
  mu^2 = -g(u, u), E = -p_t, L_z = p_phi.
* Bardeen, Press & Teukolsky (1972), ApJ 178, 347, sec. III: the zero-angular-momentum
  observer (ZAMO) of Kerr, angular velocity omega = -g_tphi/g_phiphi = 2 M a r / A with
  A = (r^2 + a^2)^2 - a^2 Delta sin^2(theta) (the closed form quoted from memory; it follows
  from the Boyer-Lindquist metric).
* Static observer of Schwarzschild u = (1/sqrt(f), 0, 0, 0), f = 1 - 2M/r, and its
  orthonormal frame e_r = sqrt(f) d_r, e_theta = d_theta / r, e_phi = d_phi / (r sin(theta)),
  read off the diagonal Schwarzschild line element (the static orthonormal frame of any GR
  text, e.g. MTW 1973, ch. 31).
* Minkowski light-cone coordinates ds^2 = -du dv + dx^2 + dy^2 (a test metric whose first
  coordinate has g_uu = 0).

Units G = c = 1. Expected values are computed here from those formulas, never by metricc.
"""
from __future__ import annotations

import numpy as np
import pytest

import metricc
from tests.conftest import SPECS, have_compiler
from tests.support import random_params, random_points, random_states

PI = np.pi
BACKENDS = ["numpy", pytest.param("c", marks=pytest.mark.skipif(not have_compiler(),
                                                                 reason="no C compiler"))]
LORENTZIAN = ("minkowski", "schwarzschild", "kerr", "kerr_schild", "reissner_nordstrom")
ETA = np.diag([-1.0, 1.0, 1.0, 1.0])


@pytest.fixture(params=BACKENDS)
def backend(request):
    return request.param


def _k(shipped, name, backend):
    return shipped[name][backend]


def rel_residual(k, y, target, params=None):
    """|g(u,u) - target| / sum_ij |g_ij u^i u^j| (the scale of the terms)."""
    d = k.dim
    g = k.metric(y[..., :d], params)
    u = y[..., d:]
    terms = g * u[..., :, None] * u[..., None, :]
    return np.abs(terms.sum(axis=(-2, -1)) - target) / np.abs(terms).sum(axis=(-2, -1))


def quadratic_roots(k, y, target, s, params=None):
    """Both roots (smaller, larger) of g(u, u) = target in u^s, others fixed (test side)."""
    d = k.dim
    g = k.metric(y[..., :d], params)
    u = y[..., d:].copy()
    u[..., s] = 0.0
    A = g[..., s, s]
    B = np.einsum("...j,...j->...", g[..., s, :], u)
    C = np.einsum("...i,...ij,...j->...", u, g, u) - target
    D = np.sqrt(B * B - A * C)
    r1, r2 = (-B - D) / A, (-B + D) / A
    return np.minimum(r1, r2), np.maximum(r1, r2)


LIGHTCONE = '''name = "lightcone"
summary = "Minkowski in light-cone coordinates"
coordinates = ["u", "v", "x", "y"]
signature = "-+++"
line_element = "-du*dv + dx^2 + dy^2"
'''


@pytest.fixture(scope="module")
def lightcone():
    out = {"numpy": metricc.loads(LIGHTCONE, backend="numpy")}
    out["c"] = metricc.loads(LIGHTCONE, backend="c") if have_compiler() else None
    return out


# == normalize ================================================================================
@pytest.mark.parametrize("name", LORENTZIAN)
@pytest.mark.parametrize("kind,target", [("timelike", -1.0), ("null", 0.0)])
def test_normalize_time_component(shipped, backend, name, kind, target):
    k = _k(shipped, name, backend)
    rng = np.random.default_rng(5 + LORENTZIAN.index(name))
    n = 40
    y = random_states(name, rng, n)
    params = random_params(name, rng, n)
    y[: n // 2, k.dim] = np.abs(y[: n // 2, k.dim])
    y[n // 2:, k.dim] = -np.abs(y[n // 2:, k.dim])
    y[0, k.dim] = 0.0  # ">= 0" takes the larger root
    out = k.normalize(y, kind=kind, params=params)
    assert out.shape == y.shape
    assert np.all(rel_residual(k, out, target, params) < 1e-14)
    # only u^t changed
    np.testing.assert_array_equal(out[:, :k.dim], y[:, :k.dim])
    np.testing.assert_array_equal(out[:, k.dim + 1:], y[:, k.dim + 1:])
    # outside any ergoregion the roots have opposite signs: future-pointing for u^t >= 0
    small, large = quadratic_roots(k, y, target, 0, params)
    ut = out[:, k.dim]
    assert np.all(ut[: n // 2] > 0) and np.all(ut[n // 2:] < 0)
    np.testing.assert_allclose(ut[: n // 2], large[: n // 2], rtol=1e-12)
    np.testing.assert_allclose(ut[n // 2:], small[n // 2:], rtol=1e-12)
    # default kind is timelike, default solve_for is 0
    if kind == "timelike":
        np.testing.assert_allclose(k.normalize(y, params=params), out, rtol=1e-15, atol=0)


def test_normalize_default_and_batch_axes(shipped, backend):
    k = _k(shipped, "kerr", backend)
    rng = np.random.default_rng(2)
    y = random_states("kerr", rng, 12).reshape(3, 4, 8)
    p = {k_: v.reshape(3, 4) for k_, v in random_params("kerr", rng, 12).items()}
    out = k.normalize(y, "timelike", params=p)
    assert out.shape == (3, 4, 8)
    assert np.all(rel_residual(k, out, -1.0, p) < 1e-14)
    one = k.normalize(y[1, 2], params={q: v[1, 2] for q, v in p.items()})
    assert one.shape == (8,)
    np.testing.assert_allclose(one, out[1, 2], rtol=1e-15)


def test_normalize_schwarzschild_closed_form(shipped, backend):
    """At rest: u = (1/sqrt(f), 0, 0, 0) with f = 1 - 2M/r (static observer); a radial photon
    with u^r = 1 has u^t = 1/f (from ds^2 = 0)."""
    k = _k(shipped, "schwarzschild", backend)
    r = np.array([3.0, 10.0, 100.0])
    f = 1 - 2 / r
    y = np.zeros((3, 8))
    y[:, 1], y[:, 2] = r, PI / 2
    out = k.normalize(y, "timelike")
    np.testing.assert_allclose(out[:, 4], 1 / np.sqrt(f), rtol=1e-14)
    y[:, 5] = 1.0
    out = k.normalize(y, "null")
    np.testing.assert_allclose(out[:, 4], 1 / f, rtol=1e-14)


def test_normalize_solve_for_radial(shipped, backend):
    """solve_for=1 solves for u^r; the sign of the input u^r picks the root."""
    k = _k(shipped, "schwarzschild", backend)
    r, th = 8.0, 1.1
    f = 1 - 2 / r
    y = np.array([[0.0, r, th, 0.3, 3 / np.sqrt(f), 0.4, 0.01, 0.02],
                  [0.0, r, th, 0.3, 3 / np.sqrt(f), -0.4, 0.01, 0.02],
                  [0.0, r, th, 0.3, 3 / np.sqrt(f), 0.0, 0.01, 0.02]])
    out = k.normalize(y, "timelike", solve_for=1)
    assert np.all(rel_residual(k, out, -1.0) < 1e-14)
    # g_rr (u^r)^2 = -1 + 9 - r^2 (u^th)^2 - r^2 sin^2 (u^ph)^2 (Schwarzschild metric)
    ur = np.sqrt(f * (8 - r ** 2 * 0.01 ** 2 - r ** 2 * np.sin(th) ** 2 * 0.02 ** 2))
    np.testing.assert_allclose(out[:, 5], [ur, -ur, ur], rtol=1e-13)
    np.testing.assert_array_equal(np.delete(out, 5, axis=1), np.delete(y, 5, axis=1))


def test_normalize_ergoregion_frame_dragging(shipped, backend):
    """Inside the Kerr ergoregion (r = 1.8 M on the equator, a = 0.9: g_tt > 0) both roots of a
    co-rotating photon's u^t are positive; the larger is taken for u^t >= 0."""
    k = _k(shipped, "kerr", backend)
    y = np.array([0.0, 1.8, PI / 2, 0.0, 1.0, 0.0, 0.0, 0.5])
    g = k.metric(y[:4])
    assert g[0, 0] > 0  # inside the ergoregion
    out = k.normalize(y, "null")
    small, large = quadratic_roots(k, y[None], 0.0, 0)
    assert small[0] > 0
    assert out[4] == pytest.approx(large[0], rel=1e-12)
    assert rel_residual(k, out, 0.0) < 1e-14


def test_normalize_impossible(shipped, backend, lightcone):
    k = _k(shipped, "schwarzschild", backend)
    # u^r from g(u,u) = -1 with u^t = 0: g_rr (u^r)^2 = -1 - (positive): discriminant < 0
    y = np.array([0.0, 8.0, 1.0, 0.0, 0.0, 0.3, 0.01, 0.02])
    with pytest.raises(ValueError):
        k.normalize(y, "timelike", solve_for=1)
    # one bad state in a batch is enough
    good = k.normalize(np.array([0.0, 8.0, 1.0, 0.0, 1.0, 0.3, 0.01, 0.02]))
    with pytest.raises(ValueError):
        k.normalize(np.stack([good, y]), "timelike", solve_for=1)
    # Kerr ergoregion: no timelike or null u with u^phi = 0 (no static observers there)
    kk = _k(shipped, "kerr", backend)
    y = np.array([0.0, 1.8, PI / 2, 0.0, 1.0, 0.1, 0.0, 0.0])
    for kind in ("timelike", "null"):
        with pytest.raises(ValueError):
            kk.normalize(y, kind)
    # g_ss = 0 and no linear solution: light-cone u with u^v = 0: g(u,u) = x'^2 + y'^2
    kl = lightcone[backend]
    with pytest.raises(ValueError):
        kl.normalize(np.array([0.0, 0.0, 1.0, 0.0, 1.0, 0.0, 0.5, 0.0]), "timelike")
    with pytest.raises(ValueError):
        kl.normalize(np.array([0.0, 0.0, 1.0, 0.0, 1.0, 0.0, 0.5, 0.0]), "null")
    # unit on a timelike vector: no positive rescaling gives g(u,u) = +1
    with pytest.raises(ValueError):
        k.normalize(np.array([0.0, 8.0, 1.0, 0.0, 1.0, 0.0, 0.0, 0.0]), "unit")


def test_normalize_linear_case(lightcone, backend):
    """g_uu = 0: g(u,u) = -u^u u^v + (u^x)^2 + (u^y)^2 is linear in u^u (light-cone Minkowski),
    so u^u = ((u^x)^2 + (u^y)^2 - target) / u^v."""
    k = lightcone[backend]
    y = np.array([[0.0, 0.0, 1.0, 0.0, 7.0, 2.0, 1.0, 0.5],
                  [1.0, -1.0, 0.0, 2.0, -3.0, 0.5, 0.0, 0.0]])
    out = k.normalize(y, "timelike")
    np.testing.assert_allclose(out[:, 4], (y[:, 6] ** 2 + y[:, 7] ** 2 + 1) / y[:, 5], rtol=1e-14)
    assert np.all(rel_residual(k, out, -1.0) < 1e-14)
    out = k.normalize(y, "null")
    np.testing.assert_allclose(out[:, 4], (y[:, 6] ** 2 + y[:, 7] ** 2) / y[:, 5], rtol=1e-14,
                               atol=0)


@pytest.mark.parametrize("name", ["sphere", "ellipsoid", "schwarzschild", "kerr_schild"])
def test_normalize_unit(shipped, backend, name):
    """kind="unit": the whole velocity rescaled (direction kept) to g(u,u) = +1; for the
    Lorentzian specs the velocities here are spacelike (u^t = 0)."""
    k = _k(shipped, name, backend)
    rng = np.random.default_rng(17)
    y = random_states(name, rng, 20)
    params = random_params(name, rng, 20)
    if k.signature[0]:
        y[:, k.dim] = 0.0
    out = k.normalize(y, "unit", params=params)
    assert np.all(rel_residual(k, out, 1.0, params) < 1e-14)
    np.testing.assert_array_equal(out[:, :k.dim], y[:, :k.dim])
    first = k.dim
    if k.signature[0]:
        np.testing.assert_array_equal(out[:, k.dim], 0.0)
        first = k.dim + 1
    ratio = out[:, first:] / y[:, first:]
    assert np.all(ratio > 0)
    np.testing.assert_allclose(ratio, np.broadcast_to(ratio[:, :1], ratio.shape), rtol=1e-14)
    # the 2-sphere of radius R: |u| = R sqrt(u_th^2 + sin^2 th u_ph^2) (line element)
    if name == "sphere":
        R = params["R"]
        speed = R * np.hypot(y[:, 2], np.sin(y[:, 0]) * y[:, 3])
        np.testing.assert_allclose(ratio[:, 0], 1 / speed, rtol=1e-14)


@pytest.mark.parametrize("name", ["sphere", "ellipsoid"])
def test_normalize_riemannian_rejects_causal_kinds(shipped, backend, name):
    k = _k(shipped, name, backend)
    y = random_states(name, np.random.default_rng(1), 3)
    for kind in ("timelike", "null"):
        with pytest.raises(ValueError):
            k.normalize(y, kind)


# == frames ===================================================================================
def assert_orthonormal(k, x, e, params=None, tol=1e-13):
    g = k.metric(x, params)
    gram = np.einsum("...am,...mn,...bn->...ab", e, g, e)
    eta = ETA if k.signature[0] else np.eye(k.dim)
    assert np.max(np.abs(gram - eta)) < tol, np.max(np.abs(gram - eta))


@pytest.mark.parametrize("name", ["schwarzschild", "kerr", "kerr_schild", "reissner_nordstrom",
                                  "minkowski"])
def test_static_frame_orthonormal(shipped, backend, name):
    k = _k(shipped, name, backend)
    rng = np.random.default_rng(4)
    x = random_points(name, rng, 10)
    params = random_params(name, rng, 10)
    e = k.frame(x, observer="static", params=params)
    assert e.shape == (10, 4, 4)
    assert_orthonormal(k, x, e, params)
    # row 0: d_t / sqrt(-g_tt)
    g = k.metric(x, params)
    np.testing.assert_allclose(e[:, 0, 0], 1 / np.sqrt(-g[:, 0, 0]), rtol=1e-14)
    np.testing.assert_array_equal(e[:, 0, 1:], 0.0)
    # Gram-Schmidt of d_1, d_2, d_3 after u = e_0: e_(k) has no component along coordinates
    # after k, and a positive one along coordinate k
    for a in range(1, 4):
        np.testing.assert_allclose(e[:, a, a + 1:], 0.0, atol=1e-15)
        assert np.all(e[:, a, a] > 0)


def test_static_frame_schwarzschild_closed_form(shipped, backend):
    """u = (1/sqrt(f), 0, 0, 0); e_r = sqrt(f) d_r, e_th = d_th/r, e_ph = d_ph/(r sin th)."""
    k = _k(shipped, "schwarzschild", backend)
    rng = np.random.default_rng(8)
    x = random_points("schwarzschild", rng, 6)
    M = random_params("schwarzschild", rng, 6)["M"]
    r, th = x[:, 1], x[:, 2]
    f = 1 - 2 * M / r
    ref = np.zeros((6, 4, 4))
    ref[:, 0, 0] = 1 / np.sqrt(f)
    ref[:, 1, 1] = np.sqrt(f)
    ref[:, 2, 2] = 1 / r
    ref[:, 3, 3] = 1 / (r * np.sin(th))
    np.testing.assert_allclose(k.frame(x, "static", params={"M": M}), ref, rtol=1e-14, atol=1e-15)
    # default observer is static
    np.testing.assert_allclose(k.frame(x, params={"M": M}), ref, rtol=1e-14, atol=1e-15)
    # zamo = static without rotation
    np.testing.assert_allclose(k.frame(x, "zamo", params={"M": M}), ref, rtol=1e-14, atol=1e-15)


def test_static_frame_kerr_closed_form(shipped, backend):
    """Kerr static frame: e_r = d_r/sqrt(g_rr), e_th = d_th/sqrt(g_thth), and e_ph = d_ph
    made g-orthogonal to u: v = d_ph + g(d_ph, u) u = (g_tph/(-g_tt), 0, 0, 1), normalised by
    g(v, v) = g_phph + g_tph^2/(-g_tt)."""
    k = _k(shipped, "kerr", backend)
    x = np.array([[0.0, 6.0, 1.2, 0.4], [2.0, 4.0, 0.5, -1.0]])
    g = k.metric(x)
    e = k.frame(x, "static")
    gtt, gtp, gpp = g[:, 0, 0], g[:, 0, 3], g[:, 3, 3]
    np.testing.assert_allclose(e[:, 1, 1], 1 / np.sqrt(g[:, 1, 1]), rtol=1e-14)
    np.testing.assert_allclose(e[:, 2, 2], 1 / np.sqrt(g[:, 2, 2]), rtol=1e-14)
    nv = np.sqrt(gpp + gtp ** 2 / (-gtt))
    np.testing.assert_allclose(e[:, 3, 0], gtp / (-gtt) / nv, rtol=1e-13)
    np.testing.assert_allclose(e[:, 3, 3], 1 / nv, rtol=1e-13)
    np.testing.assert_allclose(e[:, 3, 1:3], 0.0, atol=1e-15)


def test_static_frame_fails_in_ergoregion(shipped, backend, lightcone):
    """No static observer where g_tt >= 0: inside the Kerr ergoregion (r = 1.8 M, equator,
    a = 0.9) and in light-cone coordinates (g_uu = 0)."""
    k = _k(shipped, "kerr", backend)
    x = np.array([0.0, 1.8, PI / 2, 0.0])
    with pytest.raises(ValueError):
        k.frame(x, "static")
    with pytest.raises(ValueError):
        k.from_frame(x, np.array([1.0, 0.0, 0.0, 0.0]), observer="static")
    with pytest.raises(ValueError):
        lightcone[backend].frame(np.zeros(4), "static")


@pytest.mark.parametrize("r", [1.8, 6.0, 20.0])
def test_zamo_kerr(shipped, backend, r):
    """ZAMO: p_phi = 0, angular velocity omega = 2 M a r / A (BPT 1972, sec. III), valid also
    inside the ergoregion (r = 1.8 M)."""
    k = _k(shipped, "kerr", backend)
    M, a = 1.0, 0.9
    th = np.array([0.4, 1.0, PI / 2])
    x = np.stack([np.zeros(3), np.full(3, r), th, np.full(3, 0.7)], axis=-1)
    e = k.frame(x, "zamo")
    assert_orthonormal(k, x, e)
    u = e[:, 0]
    assert np.all(u[:, 0] > 0)
    np.testing.assert_allclose(u[:, 1:3], 0.0, atol=1e-15)
    y = np.concatenate([x, u], axis=-1)
    p = k.conserved(y)
    assert np.all(np.abs(p["p_phi"]) < 1e-13 * np.abs(p["p_t"]))
    Delta = r ** 2 - 2 * M * r + a ** 2
    A = (r ** 2 + a ** 2) ** 2 - a ** 2 * Delta * np.sin(th) ** 2
    np.testing.assert_allclose(u[:, 3] / u[:, 0], 2 * M * a * r / A, rtol=1e-13)
    # d_ph is already orthogonal to the ZAMO: e_(3) = d_ph / sqrt(g_phph)
    g = k.metric(x)
    np.testing.assert_allclose(e[:, 3, 3], 1 / np.sqrt(g[:, 3, 3]), rtol=1e-13)
    np.testing.assert_allclose(e[:, 3, :3], 0.0, atol=1e-14)


@pytest.mark.parametrize("name", ["kerr", "kerr_schild", "schwarzschild"])
def test_user_observer_frame(shipped, backend, name):
    """A user 4-velocity becomes row 0; the rest is Gram-Schmidt of d_1, d_2, d_3: each e_(a)
    is u plus a combination of d_1..d_a, with a positive coefficient on d_a."""
    k = _k(shipped, name, backend)
    rng = np.random.default_rng(9)
    n = 8
    x = random_points(name, rng, n)
    params = random_params(name, rng, n)
    uspatial = 0.3 * rng.normal(size=(n, 3))
    y = np.concatenate([x, np.zeros((n, 1)), uspatial], axis=-1)
    _, ut = quadratic_roots(k, y, -1.0, 0, params)  # future-pointing, test-side
    u = np.concatenate([ut[:, None], uspatial], axis=-1)
    e = k.frame(x, observer=u, params=params)
    # (an implementation may renormalise u: rounding of g(u,u) near the horizon ~ 1e-14)
    np.testing.assert_allclose(e[:, 0], u, rtol=1e-12, atol=1e-15)
    assert_orthonormal(k, x, e, params, tol=1e-12)
    for a in range(1, 4):
        w = e[:, a] - (e[:, a, :1] / u[:, :1]) * u
        scale = np.abs(e[:, a]).max(axis=-1, keepdims=True)
        np.testing.assert_allclose(w[:, a + 1:], 0.0, atol=1e-13 * scale.max())
        assert np.all(w[:, a] > 0)


@pytest.mark.parametrize("name", ["sphere", "ellipsoid"])
def test_riemannian_frame(shipped, backend, name):
    """No observer: rows are Gram-Schmidt of the coordinate basis. Sphere: e_th = d_th/R,
    e_ph = d_ph/(R sin th); ellipsoid: e_lat = d_lat/M, e_lon = d_lon/(N cos lat) (the
    spec's line elements)."""
    k = _k(shipped, name, backend)
    rng = np.random.default_rng(10)
    x = random_points(name, rng, 6)
    params = random_params(name, rng, 6)
    e = k.frame(x, observer=None, params=params)
    assert e.shape == (6, 2, 2)
    assert_orthonormal(k, x, e, params)
    if name == "sphere":
        R = params["R"]
        d0, d1 = 1 / R, 1 / (R * np.sin(x[:, 0]))
    else:
        a, f = params["a"], params["f"]
        e2 = f * (2 - f)
        W = np.sqrt(1 - e2 * np.sin(x[:, 0]) ** 2)
        d0, d1 = W ** 3 / (a * (1 - e2)), W / (a * np.cos(x[:, 0]))
    np.testing.assert_allclose(e[:, 0, 0], d0, rtol=1e-13)
    np.testing.assert_allclose(e[:, 1, 1], d1, rtol=1e-13)
    assert np.all(np.abs(e[:, 0, 1]) <= 1e-13 * d1)
    assert np.all(np.abs(e[:, 1, 0]) <= 1e-13 * d0)
    v = rng.normal(size=(6, 2))
    s = k.from_frame(x, v, observer=None, params=params)
    np.testing.assert_allclose(k.norm(s, params), np.sum(v ** 2, axis=-1), rtol=1e-13)


@pytest.mark.parametrize("observer", ["static", "zamo"])
def test_from_frame(shipped, backend, observer):
    k = _k(shipped, "kerr", backend)
    rng = np.random.default_rng(12)
    x = random_points("kerr", rng, 7)
    params = random_params("kerr", rng, 7)
    e = k.frame(x, observer, params=params)
    y = k.from_frame(x, np.array([1.0, 0.0, 0.0, 0.0]), observer=observer, params=params)
    assert y.shape == (7, 8)
    np.testing.assert_array_equal(y[:, :4], x)
    np.testing.assert_allclose(y[:, 4:], e[:, 0], rtol=1e-15, atol=0)
    v = rng.normal(size=(7, 4))
    y = k.from_frame(x, v, observer=observer, params=params)
    np.testing.assert_allclose(y[:, 4:], np.einsum("na,nam->nm", v, e), rtol=1e-13, atol=1e-14)
    # g(u, u) = eta(v, v)
    vv = -v[:, 0] ** 2 + np.sum(v[:, 1:] ** 2, axis=-1)
    np.testing.assert_allclose(k.norm(y, params), vv, rtol=1e-12, atol=1e-13)
    # a unit local 3-direction with v^(0) = 1 gives a future null ray
    d = v[:, 1:] / np.linalg.norm(v[:, 1:], axis=-1, keepdims=True)
    y = k.from_frame(x, np.concatenate([np.ones((7, 1)), d], axis=-1), observer=observer,
                     params=params)
    assert np.all(rel_residual(k, y, 0.0, params) < 1e-13)
    assert np.all(y[:, 4] > 0)


def test_frame_batch_axes(shipped, backend):
    k = _k(shipped, "schwarzschild", backend)
    x = random_points("schwarzschild", np.random.default_rng(0), 6).reshape(2, 3, 4)
    assert k.frame(x).shape == (2, 3, 4, 4)
    assert k.frame(x[0, 0]).shape == (4, 4)
    assert k.from_frame(x, np.ones(4) * 0.5).shape == (2, 3, 8)


# == camera ===================================================================================
def schwarzschild_local(y, M=1.0):
    """Local components measured by the static Schwarzschild observer, from the closed-form
    static frame (module docstring): v^(0) = sqrt(f) u^t, v^(1) = u^r/sqrt(f),
    v^(2) = r u^th, v^(3) = r sin(th) u^ph."""
    r, th = y[..., 1], y[..., 2]
    f = 1 - 2 * M / r
    return np.stack([np.sqrt(f) * y[..., 4], y[..., 5] / np.sqrt(f), r * y[..., 6],
                     r * np.sin(th) * y[..., 7]], axis=-1)


def frame_local(k, y, observer="static"):
    """Local components v^(a) = eta_ab g(e_(b), u) using metricc's own frame."""
    x, u = y[..., :4], y[..., 4:]
    e = k.frame(x, observer)
    g = k.metric(x)
    return np.einsum("ab,...bm,...mn,...n->...a", ETA, e, g, u)


def unit(v):
    v = np.asarray(v, dtype=float)
    return v / np.linalg.norm(v)


@pytest.mark.parametrize("forward,up", [
    ((-1.0, 0.0, 0.0), (0.0, -1.0, 0.0)),
    (unit((-1.0, 0.3, 0.2)), unit(np.cross(unit((-1.0, 0.3, 0.2)), (0.0, 0.0, 1.0)))),
])
def test_camera_geometry(shipped, backend, forward, up):
    k = _k(shipped, "schwarzschild", backend)
    forward, up = np.array(forward), np.array(up)
    right = np.cross(forward, up)
    H, W, fov = 5, 7, 0.8
    x = np.array([0.0, 10.0, PI / 2, 0.0])
    cam = k.camera(x, forward, up, fov, (H, W), observer="static")
    assert cam.shape == (H, W, 8)
    np.testing.assert_array_equal(cam[..., :4], np.broadcast_to(x, (H, W, 4)))
    assert np.all(rel_residual(k, cam, 0.0) < 1e-13)
    v = schwarzschild_local(cam)
    np.testing.assert_allclose(v[..., 0], -1.0, rtol=1e-13)
    d = v[..., 1:] / -v[..., :1]  # local components (-1, d)
    np.testing.assert_allclose(np.linalg.norm(d, axis=-1), 1.0, rtol=1e-13)
    # the centre pixel looks along forward
    np.testing.assert_allclose(d[H // 2, W // 2], forward, atol=1e-13)
    # columns increase along forward x up, rows downward (opposite to up)
    dr, du, df = d @ right, d @ up, d @ forward
    assert np.all(np.diff(dr, axis=1) > 0)
    assert np.all(np.diff(du, axis=0) < 0)
    assert dr[0, 0] < 0 and du[0, 0] > 0  # pixel (0, 0) is top left
    # mirror symmetry about the centre column and row
    np.testing.assert_allclose(dr, -dr[:, ::-1], atol=1e-13)
    np.testing.assert_allclose(du, -du[::-1, :], atol=1e-13)
    np.testing.assert_allclose(df, df[:, ::-1], atol=1e-13)
    # the horizontal extent between the outer pixel centres is fov minus at most one pixel
    ext = np.arccos(np.clip(d[H // 2, 0] @ d[H // 2, -1], -1, 1))
    assert fov * (1 - 1 / W) - 1e-12 <= ext <= fov + 1e-12
    # rays start into the scene, backwards in time: from_frame with local (-1, d)
    ref = k.from_frame(np.broadcast_to(x, (H, W, 4)),
                       np.concatenate([-np.ones((H, W, 1)), d], axis=-1), observer="static")
    np.testing.assert_allclose(cam, ref, rtol=1e-13, atol=1e-15)


def test_camera_kerr_zamo(shipped, backend):
    """A camera carried by a ZAMO in Kerr: null, local components (-1, d) in the ZAMO frame."""
    k = _k(shipped, "kerr", backend)
    x = np.array([0.0, 12.0, 1.3, 0.0])
    fwd, up = np.array([-1.0, 0.0, 0.0]), np.array([0.0, -1.0, 0.0])
    cam = k.camera(x, fwd, up, 0.5, (3, 5), observer="zamo")
    assert cam.shape == (3, 5, 8)
    assert np.all(rel_residual(k, cam, 0.0) < 1e-13)
    v = frame_local(k, cam, "zamo")
    np.testing.assert_allclose(v[..., 0], -1.0, rtol=1e-12)
    np.testing.assert_allclose(v[1, 2, 1:], fwd, atol=1e-12)
    assert np.all(cam[..., 4] < 0)  # past-pointing: the time-reversed photon


@pytest.mark.parametrize("r_o", [15.0, 40.0])
def test_schwarzschild_shadow_edge(shipped, backend, r_o):
    """Synge (1966): a static observer at r_o sees the shadow edge at angle alpha from the
    inward radial direction, sin(alpha) = 3 sqrt(3) M sqrt(1 - 2M/r_o) / r_o. Pixels more than
    one pixel inside alpha are captured (event "horizon"), those more than one pixel outside
    escape (reach lam_end, "done")."""
    k = _k(shipped, "schwarzschild", backend)
    M = 1.0
    alpha = np.arcsin(3 * np.sqrt(3) * M * np.sqrt(1 - 2 * M / r_o) / r_o)
    x = np.array([0.0, r_o, PI / 2, 0.0])
    fwd, up = np.array([-1.0, 0.0, 0.0]), np.array([0.0, -1.0, 0.0])
    H, W = 5, 41
    cam = k.camera(x, fwd, up, 3 * alpha, (H, W), observer="static")
    v = schwarzschild_local(cam)
    d = v[..., 1:] / -v[..., :1]  # local components (-1, d)
    ang = np.arccos(np.clip(d @ fwd, -1, 1))
    # one pixel: the largest angle between horizontally neighbouring pixel centres
    pix = np.max(np.arccos(np.clip(np.sum(d[:, 1:] * d[:, :-1], axis=-1), -1, 1)))
    assert pix < 0.1 * alpha
    res = k.integrate(cam, 6 * r_o, events=["horizon"])
    status = np.asarray(res.status).astype(str)
    inside, outside = ang < alpha - pix, ang > alpha + pix
    assert inside.sum() >= 5 and outside.sum() >= 5
    assert np.all(status[inside] == "horizon"), ang[inside & (status != "horizon")]
    assert np.all(status[outside] == "done"), ang[outside & (status != "done")]
    assert np.all(res.y[outside][:, 1] > r_o)  # escaped outward


# == invariants ================================================================================
KERR_TEXT = (SPECS / "kerr.toml").read_text(encoding="utf-8").replace(
    'name = "kerr"', 'name = "kerr_carter"').split("\n[invariants]")[0]  # the shipped one
CARTER_SPEC = KERR_TEXT + '''
[invariants]
carter = "p_theta^2 + cos(theta)^2*(a^2*(-norm - p_t^2) + p_phi^2/sin(theta)^2)"
energy = "-p_t"
lz = "p_phi"
mass2 = "-norm"
ut = "dt"
radius = "r + 0*Sigma"
'''


@pytest.fixture(scope="module")
def carter():
    out = {"numpy": metricc.loads(CARTER_SPEC, backend="numpy")}
    out["c"] = metricc.loads(CARTER_SPEC, backend="c") if have_compiler() else None
    return out


def carter_reference(y, M, a):
    """Carter's Q (Carter 1968) from the Boyer-Lindquist metric in closed form."""
    t, r, th, ph, ut, ur, uth, uph = np.moveaxis(y, -1, 0)
    S = r ** 2 + a ** 2 * np.cos(th) ** 2
    D = r ** 2 - 2 * M * r + a ** 2
    s2 = np.sin(th) ** 2
    gtt, gtp = -(1 - 2 * M * r / S), -2 * M * a * r * s2 / S
    gpp = (r ** 2 + a ** 2 + 2 * M * a ** 2 * r * s2 / S) * s2
    pt, pph, pth = gtt * ut + gtp * uph, gtp * ut + gpp * uph, S * uth
    norm = gtt * ut ** 2 + 2 * gtp * ut * uph + S / D * ur ** 2 + S * uth ** 2 + gpp * uph ** 2
    Q = pth ** 2 + np.cos(th) ** 2 * (a ** 2 * (-norm - pt ** 2) + pph ** 2 / s2)
    return Q, {"energy": -pt, "lz": pph, "mass2": -norm, "ut": ut, "radius": r}


def kerr_bound_states(k, params=None):
    """Inclined eccentric bound orbits around a = 0.9 Kerr (checked when choosing them: they
    stay between r = 3.7 M and 11.1 M over lambda = 400); u^t from g(u,u) = -1 solved
    test-side."""
    seeds = [([0.0, 10.0, PI / 2, 0.0], [0.03, 0.015, 0.033]),
             ([0.0, 9.0, 1.3, 0.5], [-0.02, 0.01, 0.036]),
             ([0.0, 11.0, 1.9, -1.0], [0.01, -0.012, 0.027])]
    y = np.array([np.concatenate([x, [0.0], u]) for x, u in seeds])
    _, ut = quadratic_roots(k, y, -1.0, 0, params)
    y[:, 4] = ut
    return y


def test_invariants_values(carter, backend):
    k = carter[backend]
    rng = np.random.default_rng(21)
    y = random_states("kerr", rng, 10)
    params = random_params("kerr", rng, 10)
    inv = k.invariants(y, params=params)
    assert set(inv) == {"carter", "energy", "lz", "mass2", "ut", "radius"}
    Q, others = carter_reference(y, params["M"], params["a"])
    np.testing.assert_allclose(inv["carter"], Q, rtol=1e-11, atol=1e-12 * np.abs(Q).max())
    for name, ref in others.items():
        np.testing.assert_allclose(inv[name], ref, rtol=1e-12, atol=1e-14, err_msg=name)
    # geodesic form (y) and hamilton form (z = momenta(y)) agree
    z = k.momenta(y, params)
    inv_h = k.invariants(z, params=params, form="hamilton")
    for name in inv:
        np.testing.assert_allclose(inv_h[name], inv[name], rtol=1e-11,
                                   atol=1e-12 * np.abs(inv[name]).max(), err_msg=name)
    # batch axes kept
    assert k.invariants(y.reshape(2, 5, 8), params={q: v.reshape(2, 5) for q, v in
                                                   params.items()})["carter"].shape == (2, 5)
    # the conserved momenta agree with the kernels' own
    c = k.conserved(y, params)
    np.testing.assert_allclose(inv["lz"], c["p_phi"], rtol=1e-13, atol=1e-14)


@pytest.mark.parametrize("form", ["geodesic", "hamilton"])
def test_carter_constant_conserved(carter, backend, form):
    """Carter's constant (and E, L_z, mu^2) stay constant along integrated bound orbits;
    r does not (its drift is |r_end - r_start|, so the drift is really measured)."""
    k = carter[backend]
    y0 = kerr_bound_states(k)
    # also a null ray passing near the hole, and a second spin through params
    y0 = np.concatenate([y0, kerr_bound_states(k)[:1]])
    y0[3, 5:] = [-0.3, 0.02, 0.06]  # impact parameter ~ 9 M: passes the hole and escapes
    y0[3, 4] = quadratic_roots(k, y0[3:4], 0.0, 0)[1][0]
    Q0, _ = carter_reference(y0, 1.0, 0.9)
    assert np.all(np.abs(Q0) > 1.0)
    start = y0 if form == "geodesic" else k.momenta(y0)
    res = k.integrate(start, 400.0, rtol=1e-11, atol=1e-12, form=form, events=[])
    assert list(np.asarray(res.status).astype(str)) == ["done"] * 4
    drift = res.invariant_drift
    assert set(drift) == {"carter", "energy", "lz", "mass2", "ut", "radius"}
    assert drift["carter"].shape == (4,)
    assert np.all(drift["carter"] < 1e-8 * np.abs(Q0))
    for name in ("energy", "lz", "mass2"):
        assert np.all(drift[name] < 1e-9), (name, drift[name])
    # drift = |I_end - I_start| for the non-conserved ones
    y_end = res.y if form == "geodesic" else k.velocities(res.y)
    np.testing.assert_allclose(drift["radius"], np.abs(y_end[:, 1] - y0[:, 1]), rtol=1e-10,
                               atol=1e-12)
    assert np.max(drift["radius"]) > 0.1
    Qe, _ = carter_reference(y_end, 1.0, 0.9)
    np.testing.assert_allclose(drift["carter"], np.abs(Qe - Q0), rtol=1e-3, atol=1e-12)
