"""Property tests (hypothesis) of the kernels of every shipped spec.

Each example draws a seed; the seed draws a batch of states inside the spec's domain
(tests/support.py) and per-state random parameters. The identities checked are exact in
exact arithmetic, so every tolerance below is a rounding (or finite-difference) budget, scaled
by the magnitude of the terms that are summed (sums of absolute values), not by the result,
which may cancel to nearly zero.

Derivatives of the metric, where needed, come two ways:

* FD: fourth-order central differences of ``k.metric`` along each coordinate,
  d_r g ~ [g(x - 2h) - 8 g(x - h) + 8 g(x + h) - g(x + 2h)] / (12 h) with h = 1e-3 (every
  shipped chart has coordinates of order 1 to 30 away from its singularities). Truncation
  ~ h^4 g^(5) / 30 and rounding ~ eps |g| / h are both ~1e-12 of the scale (measured worst
  1.5e-12 over 1500 states per spec), so these checks use 1e-9: independent of the Christoffel
  kernel, and a relative error of 1e-6 in the geodesic RHS still fails them (by ~200x).
* Metric compatibility of the Levi-Civita connection, d_c g_ab = g_db Gamma^d_ac + g_ad Gamma^d_bc
  with Gamma from ``k.christoffel`` (itself checked against sympy.diffgeom in
  test_reference.py): no differences, so those checks hold to rounding (1e-12).
"""
from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tests.conftest import SHIPPED, needs_cc
from tests.support import random_params, random_states

BACKENDS = ("c", "numpy")
N = 12
SETTINGS = settings(max_examples=50, deadline=None)
seeds = st.integers(min_value=0, max_value=2**32 - 1)

FD_STEP = 1e-3
FD_REL = 1e-9
ROUND_REL = 1e-12


def kernels_for(shipped, name, backend):
    k = shipped[name][backend]
    if k is None:
        pytest.skip("no C compiler: the C backend is not available")
    return k


def draw(name, seed, n=N):
    rng = np.random.default_rng(seed)
    y = random_states(name, rng, n)
    params = random_params(name, rng, n) or None
    return y, params


def metric_derivative_fd(k, x, params):
    """(n, dim, dim, dim) array [n, c, a, b] = d_c g_ab by fourth-order central differences."""
    n, dim = x.shape
    out = np.empty((n, dim, dim, dim))
    for c in range(dim):
        e = np.zeros(dim)
        e[c] = FD_STEP
        gm2, gm1, gp1, gp2 = (k.metric(x + s * e, params) for s in (-2, -1, 1, 2))
        out[:, c] = (gm2 - 8 * gm1 + 8 * gp1 - gp2) / (12 * FD_STEP)
    return out


def metric_derivative_identity(g, gamma):
    """[n, c, a, b] = d_c g_ab = g_db Gamma^d_ac + g_ad Gamma^d_bc (metric compatibility)."""
    return (np.einsum("ndb,ndac->ncab", g, gamma) + np.einsum("nad,ndbc->ncab", g, gamma))


def metric_derivative_identity_abs(g, gamma):
    return (np.einsum("ndb,ndac->ncab", abs(g), abs(gamma))
            + np.einsum("nad,ndbc->ncab", abs(g), abs(gamma)))


def assert_small(residual, scale, rel, what):
    residual = np.asarray(residual)
    scale = np.broadcast_to(scale, residual.shape)
    assert np.all(np.isfinite(residual)), what
    bad = np.abs(residual) > rel * scale
    if np.any(bad):
        i = tuple(np.argwhere(bad)[0])
        raise AssertionError(f"{what}: residual {residual[i]:.3g} > {rel:g} * scale "
                             f"{scale[i]:.3g} at {i} ({np.count_nonzero(bad)} of {bad.size})")


# -- C and NumPy agree ----------------------------------------------------------------------
@needs_cc
@pytest.mark.parametrize("name", SHIPPED)
@SETTINGS
@given(seed=seeds)
def test_c_and_numpy_agree(shipped, name, seed):
    kc, kn = shipped[name]["c"], shipped[name]["numpy"]
    y, params = draw(name, seed)
    d = kc.dim
    x, u = y[:, :d], y[:, d:]
    z = kn.momenta(y, params)
    g = kn.metric(x, params)
    ginv = kn.inverse_metric(x, params)

    def per_point_max(a):
        return np.max(np.abs(a), axis=tuple(range(1, a.ndim)), keepdims=True)

    for kernel, arg in (("metric", x), ("inverse_metric", x), ("christoffel", x),
                        ("geodesic_rhs", y), ("hamilton_rhs", z)):
        a, b = getattr(kc, kernel)(arg, params), getattr(kn, kernel)(arg, params)
        assert a.shape == b.shape
        assert_small(a - b, per_point_max(b), 1e-12, kernel)
    # bilinear forms may cancel: scale by the sum of the absolute values of their terms
    assert_small(kc.norm(y, params) - kn.norm(y, params),
                 np.einsum("nij,ni,nj->n", abs(g), abs(u), abs(u)), 1e-12, "norm")
    p = z[:, d:]
    assert_small(kc.momentum_norm(z, params) - kn.momentum_norm(z, params),
                 np.einsum("nij,ni,nj->n", abs(ginv), abs(p), abs(p)), 1e-12, "momentum_norm")
    cc, cn = kc.conserved(y, params), kn.conserved(y, params)
    assert set(cc) == set(cn) == {f"p_{c}" for c in kc.ignorable}
    for key in cc:
        i = kc.coordinates.index(key[2:])
        assert_small(cc[key] - cn[key], np.einsum("nj,nj->n", abs(g[:, i]), abs(u)), 1e-12, key)


# -- symmetry and metric compatibility of the connection ------------------------------------
@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("name", SHIPPED)
@SETTINGS
@given(seed=seeds)
def test_christoffel_symmetric_and_metric_compatible(shipped, name, backend, seed):
    k = kernels_for(shipped, name, backend)
    y, params = draw(name, seed)
    x = y[:, :k.dim]
    gamma = k.christoffel(x, params)
    scale = np.max(np.abs(gamma), axis=(1, 2, 3), keepdims=True)
    # torsion-free: Gamma^a_bc = Gamma^a_cb (to rounding; exact if the kernel copies)
    assert_small(gamma - np.swapaxes(gamma, 2, 3), scale, 1e-14, "Gamma^a_bc - Gamma^a_cb")
    # metric compatible: the connection's d_c g_ab equals finite differences of k.metric
    g = k.metric(x, params)
    dg_fd = metric_derivative_fd(k, x, params)
    dg_id = metric_derivative_identity(g, gamma)
    # scale: the size of the connection terms, plus |g| (FD rounding is ~ eps |g| / h, and
    # the charts' length scale is ~1)
    scale = (metric_derivative_identity_abs(g, gamma).max(axis=(1, 2, 3), keepdims=True)
             + np.max(np.abs(g), axis=(1, 2))[:, None, None, None])
    assert_small(dg_id - dg_fd, scale, FD_REL, "d_c g_ab")


# -- pointwise conservation under the geodesic RHS ------------------------------------------
def conservation_terms(k, y, params, dg):
    """(d/dlambda g(u,u), d/dlambda (g u)_a (n, dim), and the scale of each per point) for the
    geodesic RHS, given the metric derivative dg[n, c, a, b] = d_c g_ab.

    The scale is the sum of the absolute values of the terms, maximised over the components
    of a point, plus |u|_max * sum |g_ab| |u^a| |u^b| (the size of u^c d_c g when the chart's
    length scale is ~1), which bounds finite-difference rounding eps |g| / h as well.
    """
    d = k.dim
    x, u = y[:, :d], y[:, d:]
    rhs = k.geodesic_rhs(y, params)
    np.testing.assert_array_equal(rhs[:, :d], u)          # dx/dlambda = u exactly
    acc = rhs[:, d:]
    g = k.metric(x, params)
    umax = np.max(np.abs(u), axis=1)
    gsize = umax * np.einsum("nab,na,nb->n", abs(g), abs(u), abs(u))
    # d/dlambda (g_ab u^b) = u^c d_c g_ab u^b + g_ab du^b/dlambda
    dp = np.einsum("nc,ncab,nb->na", u, dg, u) + np.einsum("nab,nb->na", g, acc)
    dp_scale = (np.einsum("nc,ncab,nb->na", abs(u), abs(dg), abs(u))
                + np.einsum("nab,nb->na", abs(g), abs(acc))).max(axis=1)
    dp_scale = dp_scale + gsize / np.maximum(umax, 1e-300)
    # d/dlambda g(u,u) = u^c d_c g_ab u^a u^b + 2 g_ab u^a du^b/dlambda
    dn = (np.einsum("nc,ncab,na,nb->n", u, dg, u, u) + 2 * np.einsum("nab,na,nb->n", g, u, acc))
    dn_scale = (np.einsum("nc,ncab,na,nb->n", abs(u), abs(dg), abs(u), abs(u))
                + 2 * np.einsum("nab,na,nb->n", abs(g), abs(u), abs(acc))) + gsize
    return dn, dn_scale, dp, dp_scale[:, None]


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("name", SHIPPED)
@SETTINGS
@given(seed=seeds)
def test_norm_conserved_pointwise(shipped, name, backend, seed):
    k = kernels_for(shipped, name, backend)
    y, params = draw(name, seed)
    x = y[:, :k.dim]
    g, gamma = k.metric(x, params), k.christoffel(x, params)
    # (1) with the compatibility identity: exact to rounding
    dn, scale, _, _ = conservation_terms(k, y, params, metric_derivative_identity(g, gamma))
    assert_small(dn, scale, ROUND_REL, "d/dlambda g(u,u) (identity)")
    # (2) with finite differences of k.metric: independent of k.christoffel
    dn, scale, _, _ = conservation_terms(k, y, params, metric_derivative_fd(k, x, params))
    assert_small(dn, scale, FD_REL, "d/dlambda g(u,u) (finite differences)")


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("name", SHIPPED)
@SETTINGS
@given(seed=seeds)
def test_ignorable_momenta_conserved_pointwise(shipped, name, backend, seed):
    k = kernels_for(shipped, name, backend)
    assert k.ignorable, "every shipped spec has an ignorable coordinate"
    y, params = draw(name, seed)
    d = k.dim
    x, u = y[:, :d], y[:, d:]
    g, gamma = k.metric(x, params), k.christoffel(x, params)
    cons = k.conserved(y, params)
    for c in k.ignorable:
        i = k.coordinates.index(c)
        # the conserved momentum is p_k = g_{k nu} u^nu
        assert_small(cons[f"p_{c}"] - np.einsum("nj,nj->n", g[:, i], u),
                     np.einsum("nj,nj->n", abs(g[:, i]), abs(u)), 1e-14, f"p_{c}")
    _, _, dp_id, sc_id = conservation_terms(k, y, params, metric_derivative_identity(g, gamma))
    _, _, dp_fd, sc_fd = conservation_terms(k, y, params, metric_derivative_fd(k, x, params))
    for c in k.ignorable:
        i = k.coordinates.index(c)
        assert_small(dp_id[:, i], sc_id[:, 0], ROUND_REL, f"d p_{c}/dlambda (identity)")
        assert_small(dp_fd[:, i], sc_fd[:, 0], FD_REL, f"d p_{c}/dlambda (finite differences)")


# -- the Hamiltonian RHS is the geodesic RHS mapped through p = g u --------------------------
@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("name", SHIPPED)
@SETTINGS
@given(seed=seeds)
def test_hamilton_rhs_is_geodesic_rhs_through_p_equals_gu(shipped, name, backend, seed):
    k = kernels_for(shipped, name, backend)
    y, params = draw(name, seed)
    d = k.dim
    x, u = y[:, :d], y[:, d:]
    z = k.momenta(y, params)
    g, ginv = k.metric(x, params), k.inverse_metric(x, params)
    np.testing.assert_array_equal(z[:, :d], x)
    np.testing.assert_allclose(z[:, d:], np.einsum("nab,nb->na", g, u), rtol=1e-15, atol=0)
    h = k.hamilton_rhs(z, params)
    # dx/dlambda = g^{-1} p = u
    p = z[:, d:]
    assert_small(h[:, :d] - u, np.einsum("nab,nb->na", abs(ginv), abs(p)), 1e-12, "dx/dlambda")
    # velocities() inverts momenta()
    assert_small(k.velocities(z, params)[:, d:] - u,
                 np.einsum("nab,nb->na", abs(ginv), abs(p)), 1e-12, "velocities(momenta(y))")
    # dp/dlambda = d/dlambda (g u) along the geodesic
    gamma = k.christoffel(x, params)
    _, _, dp, scale = conservation_terms(k, y, params, metric_derivative_identity(g, gamma))
    assert_small(h[:, d:] - dp, scale, ROUND_REL, "dp/dlambda (identity)")
    _, _, dp, scale = conservation_terms(k, y, params, metric_derivative_fd(k, x, params))
    assert_small(h[:, d:] - dp, scale, FD_REL, "dp/dlambda (finite differences)")
    # and H = 1/2 g^{ab} p_a p_b = 1/2 g(u, u)
    assert_small(k.momentum_norm(z, params) - k.norm(y, params),
                 np.einsum("nij,ni,nj->n", abs(g), abs(u), abs(u)), 1e-12, "2H - g(u,u)")


# -- per-state parameter arrays equal a loop with scalar parameters -------------------------
KERNELS = (("metric", "x"), ("inverse_metric", "x"), ("christoffel", "x"),
           ("geodesic_rhs", "y"), ("hamilton_rhs", "z"), ("norm", "y"),
           ("momentum_norm", "z"), ("conserved", "y"), ("momenta", "y"), ("velocities", "z"))


def call(k, kernel, arg, params):
    out = getattr(k, kernel)(arg, params)
    if kernel == "conserved":
        return np.stack([out[key] for key in sorted(out)], axis=-1)
    return out


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("name", [s for s in SHIPPED if s != "minkowski"])
@SETTINGS
@given(seed=seeds)
def test_params_per_state_equal_scalar_loop(shipped, name, backend, seed):
    k = kernels_for(shipped, name, backend)
    n = 6
    y, params = draw(name, seed, n)
    d = k.dim
    z = y.copy()
    z[:, d:] *= np.linspace(0.5, 2.0, d)     # some momenta: any values will do here
    args = {"x": y[:, :d], "y": y, "z": z}
    for kernel, which in KERNELS:
        batched = call(k, kernel, args[which], params)
        looped = np.stack([call(k, kernel, args[which][i],
                                {p: float(v[i]) for p, v in params.items()}) for i in range(n)])
        np.testing.assert_allclose(batched, looped, rtol=1e-14, atol=0, err_msg=kernel)


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("name", ["kerr", "ellipsoid"])
@settings(max_examples=20, deadline=None)
@given(seed=seeds)
def test_params_broadcast_over_a_two_axis_batch(shipped, name, backend, seed):
    # states (3, 4, 2*dim); one parameter varies along axis 0 (shape (3, 1)), the other along
    # axis 1 (shape (4,)): every result must equal the loop over (i, j) with scalars.
    k = kernels_for(shipped, name, backend)
    y, params = draw(name, seed, 12)
    y = y.reshape(3, 4, -1)
    p0, p1 = list(k.parameters)
    params = {p0: params[p0][:3].reshape(3, 1), p1: params[p1][:4]}
    if name == "kerr":   # keep |a| < M for every pair
        params["a"] = params["a"] * 0.5 / np.max(np.abs(params["a"]))
    for kernel, which in KERNELS[:6]:
        arg = y[..., :k.dim] if which == "x" else y
        if which == "z":
            arg = k.momenta(y, params)
        batched = call(k, kernel, arg, params)
        for i in range(3):
            for j in range(4):
                one = call(k, kernel, arg[i, j], {p0: float(params[p0][i, 0]),
                                                  p1: float(params[p1][j])})
                np.testing.assert_allclose(batched[i, j], one, rtol=1e-14, atol=0,
                                           err_msg=f"{kernel} at {(i, j)}")


# -- points drawn as floats, right up to the edges of the Kerr domain -----------------------
@pytest.mark.parametrize("backend", BACKENDS)
@SETTINGS
@given(spin=st.floats(-0.999, 0.999), r_over_horizon=st.floats(1.01, 200.0),
       theta=st.floats(0.01, np.pi - 0.01), ut=st.floats(-3, 3), ur=st.floats(-3, 3),
       uth=st.floats(-3, 3), uph=st.floats(-3, 3))
def test_kerr_conservation_near_the_horizon_and_axis(shipped, backend, spin, r_over_horizon,
                                                     theta, ut, ur, uth, uph):
    k = kernels_for(shipped, "kerr", backend)
    M = 1.0
    r = r_over_horizon * (M + np.sqrt(M**2 - spin**2))      # Kerr outer horizon r_+
    y = np.array([[0.0, r, theta, 0.3, ut, ur, uth, uph]])
    params = {"M": M, "a": spin}
    g, gamma = k.metric(y[:, :4], params), k.christoffel(y[:, :4], params)
    dg = metric_derivative_identity(g, gamma)
    dn, scale, dp, dp_scale = conservation_terms(k, y, params, dg)
    assert_small(dn, scale, ROUND_REL, "d/dlambda g(u,u)")
    assert_small(dp[:, 0], dp_scale[:, 0], ROUND_REL, "d p_t/dlambda")
    assert_small(dp[:, 3], dp_scale[:, 0], ROUND_REL, "d p_phi/dlambda")
