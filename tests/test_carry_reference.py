"""Carried quantities (parallel transport, variations, parameter sensitivities) against
references from outside the project.

References, each named again beside its check:

* Flat spacetime: parallel transport in Cartesian coordinates keeps every component constant
  (the Christoffel symbols vanish there); the shipped minkowski spec uses spherical
  coordinates, so the transported vector is converted with the Jacobian of
  (t, r, theta, phi) -> (t, X, Y, Z) at the start and at the end. Exact.
* Parallel transport preserves inner products: g(V, W) and g(V, u) are constant along a
  geodesic (Carroll 2004, Spacetime and Geometry, sec. 3.5; MTW 1973, sec. 10.3).
* Geodetic (de Sitter) precession on a circular orbit of Schwarzschild: de Sitter 1916,
  MNRAS 77, 155; Hartle 2003, Gravity, sec. 14.4 (eq. 14.17 and the text around it).
* Lyapunov exponent of the circular photon orbit of Schwarzschild, lambda_L = 1/(3 sqrt(3) M)
  per unit coordinate time: Cardoso, Miranda, Berti, Witek & Zanchin 2009, Phys. Rev. D 79,
  064016, eq. (3.6)-(3.7) and their Schwarzschild example.
* The transport right-hand side against its definition, dV^a/dlambda = -Gamma^a_bc u^b V^c
  (contravariant) and dV_a/dlambda = Gamma^c_ab u^b V_c (covariant), evaluated with the
  spec's own Christoffel kernel by numpy.einsum ("definition of parallel transport").
* C against NumPy: the two backends run the same algorithm; they must agree closely
  (common practice: two independent code paths).
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

import metricc
from tests.conftest import have_compiler
from tests.support import random_params, random_states

ROOT = Path(__file__).resolve().parent.parent
BACKENDS = ("c", "numpy")
FORMS = ("geodesic", "hamilton")
_LOADED: dict = {}

# A dense 4-D Riemannian metric (test input, invented): no block structure and no rank-one
# form, so its inverse is solved numerically at run time (inverse_strategy "numeric").
DENSE4 = """
name = "dense4"
summary = "dense 4-D Riemannian metric, numeric inverse"
coordinates = ["w", "x", "y", "z"]
signature = "++++"
[parameters]
a = 0.3
[metric]
w.w = "2 + sin(x)"
x.x = "2 + cos(y)"
y.y = "2 + sin(z)"
z.z = "2 + cos(w)"
w.x = "a*cos(y)"
w.y = "a*sin(z)"
w.z = "a*cos(x)"
x.y = "a*sin(w)"
x.z = "a*cos(z)"
y.z = "a*sin(x)"
"""


def kernels(name: str, backend: str):
    """The shipped spec `name` (or "dense4", above) on `backend`, loaded once per test session
    (only the specs these tests use, not every shipped one)."""
    if backend == "c" and not have_compiler():
        pytest.skip("no C compiler: the C backend is not available")
    key = (name, backend)
    if key not in _LOADED:
        if name == "dense4":
            _LOADED[key] = metricc.loads(DENSE4, backend=backend)
            assert _LOADED[key].inverse_strategy == "numeric"
        else:
            _LOADED[key] = metricc.load(ROOT / "specs" / f"{name}.toml", backend=backend)
    return _LOADED[key]


def states_and_params(name: str, rng, n: int):
    """(n, 8) states [x, u] and per-state parameters for the specs used below: Kerr outside
    r = 8M, half timelike and half null; dense4 anywhere, unit speed."""
    if name == "dense4":
        y = np.concatenate([rng.uniform(-3, 3, (n, 4)), rng.normal(size=(n, 4))], axis=1)
        params = {"a": rng.uniform(0.1, 0.4, n)}
        return kernels(name, "numpy").normalize(y, "unit", params=params), params
    k = kernels(name, "numpy")
    y = random_states(name, rng, n)
    params = random_params(name, rng, n)
    if name == "kerr":
        y[:, 1] = rng.uniform(8.0, 30.0, n) * params["M"]     # well outside the horizon
    h = n // 2
    y[:h] = k.normalize(y[:h], "timelike", params=_part(params, slice(0, h)))
    y[h:] = k.normalize(y[h:], "null", params=_part(params, slice(h, n)))
    return y, params


def start_state(k, y, form):
    """[x, u] -> the state of `form` ([x, p] for hamilton)."""
    return k.momenta(y) if form == "hamilton" else y


def velocity(k, state, form):
    """u^mu of a state of `form`, shape (..., dim)."""
    return (k.velocities(state) if form == "hamilton" else state)[..., k.dim:]


def inner(k, x, a, b, form, params=None, absolute=False):
    """g(a_m, b_n) at x, (..., m, n); a, b (..., m, dim) contravariant (geodesic form) or
    covariant (hamilton form, contracted with g^-1). absolute: the same sum of |terms|, the
    size a cancellation starts from (a scale for tolerances)."""
    g = k.inverse_metric(x, params) if form == "hamilton" else k.metric(x, params)
    if absolute:
        g, a, b = np.abs(g), np.abs(a), np.abs(b)
    return np.einsum("...ij,...mi,...nj->...mn", g, a, b)


# -- 1. flat spacetime in spherical coordinates ----------------------------------------------
def spherical_jacobian(x):
    """d(t, X, Y, Z) / d(t, r, theta, phi) at x (..., 4): (..., 4, 4), [I, a]."""
    _, r, th, ph = np.moveaxis(x, -1, 0)
    st, ct, sp, cp = np.sin(th), np.cos(th), np.sin(ph), np.cos(ph)
    J = np.zeros(x.shape[:-1] + (4, 4))
    J[..., 0, 0] = 1.0
    J[..., 1, 1:] = np.stack([st * cp, r * ct * cp, -r * st * sp], axis=-1)
    J[..., 2, 1:] = np.stack([st * sp, r * ct * sp, r * st * cp], axis=-1)
    J[..., 3, 1:] = np.stack([ct, -r * st, np.zeros_like(r)], axis=-1)
    return J


def cartesian(x, v, form):
    """Cartesian components of vectors v (..., m, 4) given at x (..., 4) in spherical
    coordinates: J v for contravariant components, J^-T v for covariant ones."""
    J = spherical_jacobian(x)
    if form == "hamilton":
        return np.einsum("...ai,...ma->...mi", np.linalg.inv(J), v)
    return np.einsum("...ia,...ma->...mi", J, v)


def straight_rays(rng, n, kind, lam_end):
    """n flat-spacetime states [x, u] (spherical) whose straight paths over [0, lam_end] keep
    at least 1.5 from the z axis (where the spherical chart is singular)."""
    out = []
    while len(out) < n:
        X0 = rng.uniform(-12, 12, 3)
        d = rng.normal(size=3)
        d *= (1.0 if kind == "null" else rng.uniform(0.2, 0.9)) / np.linalg.norm(d)
        ut = 1.0 / np.sqrt(1.0 - d @ d) if kind == "timelike" else 1.0
        s = np.linspace(0.0, lam_end, 400)[:, None]
        path = X0 + s * ut * d
        if np.min(np.hypot(path[:, 0], path[:, 1])) < 1.5:
            continue
        r = np.linalg.norm(X0)
        x = np.array([0.0, r, np.arccos(X0[2] / r), np.arctan2(X0[1], X0[0])])
        U = np.concatenate([[ut], ut * d])                       # Cartesian 4-velocity
        u = np.linalg.solve(spherical_jacobian(x), U)            # spherical components
        out.append(np.concatenate([x, u]))
    return np.array(out)


@pytest.mark.parametrize("form", FORMS)
@pytest.mark.parametrize("kind", ["timelike", "null"])
@pytest.mark.parametrize("backend", BACKENDS)
def test_flat_transport_keeps_cartesian_components(backend, kind, form):
    """Exact: in flat spacetime the Cartesian components of a parallel-transported vector
    are constant, at the end and at every sample, for random straight rays."""
    k = kernels("minkowski", backend)
    rng = np.random.default_rng(11)
    lam_end = 25.0
    y = straight_rays(rng, 6, kind, lam_end)
    z = start_state(k, y, form)
    V0 = rng.normal(size=(6, 3, 4))
    samples = np.linspace(0.0, lam_end, 7)[1:-1]
    res = k.integrate(z, lam_end, form=form, transport=V0, samples=samples, rtol=1e-11)
    assert np.all(res.status == "done"), res.status
    assert res.transport.shape == (6, 3, 4)
    assert res.transport_samples.shape == (6, len(samples), 3, 4)
    want = cartesian(z[:, :4], V0, form)                           # constant (exact)
    got = cartesian(res.y[:, :4], res.transport, form)
    scale = np.abs(want).max(axis=-1, keepdims=True)
    assert np.all(np.abs(got - want) <= 1e-9 * scale), np.abs(got - want).max()
    for s in range(len(samples)):
        got_s = cartesian(res.samples[:, s, :4], res.transport_samples[:, s], form)
        assert np.all(np.abs(got_s - want) <= 1e-9 * scale), (s, np.abs(got_s - want).max())


# -- 2. inner products -----------------------------------------------------------------------
@pytest.mark.parametrize("form", FORMS)
@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("name", ["kerr", "dense4"])
def test_transport_keeps_inner_products(name, backend, form):
    """Parallel transport is metric compatible: g(V_i, V_j) and g(V_i, u) keep their initial
    values along each geodesic (Carroll 2004, sec. 3.5), at the end and at every sample;
    hamilton form with covariant vectors and p, contracted with g^-1. Kerr (symbolic
    inverse) and dense4 (numeric inverse)."""
    k = kernels(name, backend)
    rng = np.random.default_rng(5)
    n = 8
    y, params = states_and_params(name, rng, n)
    z = k.momenta(y, params) if form == "hamilton" else y
    V0 = rng.normal(size=(n, 3, 4))
    lam_end = 15.0
    samples = np.linspace(0.0, lam_end, 6)[1:-1]
    res = k.integrate(z, lam_end, params=params, form=form, transport=V0, samples=samples)
    assert np.all(res.status == "done"), res.status

    def products(state, V, absolute=False):
        # [V_0, V_1, V_2, u] (p for hamilton): every g(V_i, V_j) and g(V_i, u)
        W = np.concatenate([V, state[..., None, 4:]], axis=-2)
        return inner(k, state[..., :4], W, W, form, params, absolute)

    want = products(z, V0)
    tol = 1e-8 * products(z, V0, absolute=True)
    got = products(res.y, res.transport)
    assert np.all(np.abs(got - want) <= tol), np.abs(got - want).max()
    for s in range(len(samples)):
        got = products(res.samples[:, s], res.transport_samples[:, s])
        assert np.all(np.abs(got - want) <= tol), (s, np.abs(got - want).max())


def _part(params, sl):
    return {key: v[sl] for key, v in params.items()}


# -- 3. geodetic (de Sitter) precession --------------------------------------------------------
def comoving_axes(k, state, form):
    """Unit radial and unit azimuthal vectors of the comoving orthonormal frame of an
    equatorial Schwarzschild orbit, (..., 2, 4), contravariant: e_r = sqrt(1 - 2M/r) d_r;
    e_phi = d_phi + g(d_phi, u) u, normalised (orthogonal to u, in the t-phi plane)."""
    x, u = state[..., :4], velocity(k, state, form)
    g = k.metric(x)
    e_r = np.zeros(x.shape)
    e_r[..., 1] = 1.0 / np.sqrt(g[..., 1, 1])
    d_phi = np.zeros(x.shape)
    d_phi[..., 3] = 1.0
    w = d_phi + np.einsum("...i,...ij,...j->...", d_phi, g, u)[..., None] * u
    w /= np.sqrt(np.einsum("...i,...ij,...j->...", w, g, w))[..., None]
    return np.stack([e_r, w], axis=-2)


def frame_angle(k, state, V, form):
    """Angle of V (..., dim) from e_r toward e_phi in the comoving orthonormal frame."""
    x = state[..., :4]
    axes = comoving_axes(k, state, form)
    if form == "hamilton":
        comps = np.einsum("...mi,...i->...m", axes, V)            # e_m^a V_a
    else:
        comps = np.einsum("...mi,...ij,...j->...m", axes, k.metric(x), V)
    return np.arctan2(comps[..., 1], comps[..., 0])


@pytest.mark.parametrize("form", FORMS)
@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("r", [6.0, 10.0, 20.0, 100.0])
def test_geodetic_precession(r, backend, form):
    """De Sitter (1916) precession; the derivation follows Hartle 2003, Gravity, sec. 14.4.

    Circular equatorial geodesic of Schwarzschild (M = 1): u = u^t (1, 0, 0, Omega) with
    Omega = sqrt(M/r^3), u^t = 1/sqrt(1 - 3M/r); proper time = affine parameter, so one orbit
    (coordinate time T = 2 pi/Omega) ends at lambda = T/u^t. A vector S orthogonal to u in the
    equatorial plane obeys dS^t/dtau = -Gamma^t_tr u^t S^r, dS^r/dtau = -Gamma^r_tt u^t S^t -
    Gamma^r_phiphi u^phi S^phi, dS^phi/dtau = -Gamma^phi_rphi u^phi S^r, whose solution
    (Hartle eq. 14.17) is S^r(t) = S^r(0) cos(Omega' t) with Omega' = Omega sqrt(1 - 3M/r).
    In the comoving orthonormal frame (e_r = sqrt(1 - 2M/r) d_r; e_phi the unit vector in
    the t-phi plane orthogonal to u) S has no theta part and, being transported, keeps
    g(S, S) = 1 and g(S, u) = 0; so S = cos(Omega' t) e_r - sin(Omega' t) e_phi when it starts
    as e_r: its angle from e_r toward e_phi is alpha(t) = -Omega' t (the sign is fixed by
    S^phi's equation: e_r turns forward with the orbit, S lags behind it). After one orbit
    alpha = -2 pi sqrt(1 - 3M/r), while e_r has turned by 2 pi against distant stars: the net
    advance per orbit is 2 pi (1 - sqrt(1 - 3M/r)) in the sense of the orbit.

    Checked: alpha at 24 samples over the orbit (unwrapped) against -Omega' t(sample), and the
    net advance after one orbit, to 1e-8 rad; a second vector started as e_phi keeps its
    quarter turn ahead of the first."""
    k = kernels("schwarzschild", backend)
    M = 1.0
    omega = math.sqrt(M / r**3)
    ut = 1.0 / math.sqrt(1.0 - 3.0 * M / r)
    y0 = np.array([0.0, r, np.pi / 2, 0.0, ut, 0.0, 0.0, omega * ut])
    state0 = k.momenta(y0) if form == "hamilton" else y0
    axes0 = comoving_axes(k, state0, form)                    # [e_r, e_phi] at the start
    if form == "hamilton":
        axes0 = np.einsum("ij,mj->mi", k.metric(y0[:4]), axes0)   # lower the index
    T = 2.0 * math.pi / omega
    lam_end = T / ut
    samples = np.linspace(0.0, lam_end, 25)[1:]
    res = k.integrate(state0, lam_end, form=form, transport=axes0, samples=samples,
                      rtol=1e-12, atol=1e-14)
    assert res.status == "done"
    assert abs(res.y[0] - T) < 1e-9 * T                       # one orbit in coordinate time
    alpha = np.unwrap(np.concatenate([
        [0.0], frame_angle(k, res.samples, res.transport_samples[:, 0], form)]))[1:]
    beta = np.unwrap(np.concatenate([
        [np.pi / 2], frame_angle(k, res.samples, res.transport_samples[:, 1], form)]))[1:]
    t = res.samples[:, 0]
    prime = omega * math.sqrt(1.0 - 3.0 * M / r)              # Omega' (Hartle eq. 14.17)
    assert np.allclose(alpha, -prime * t, rtol=0, atol=1e-8), np.abs(alpha + prime * t).max()
    assert np.allclose(beta - alpha, np.pi / 2, rtol=0, atol=1e-8)
    advance = 2.0 * math.pi + alpha[-1]                       # e_r itself turned by 2 pi
    assert abs(advance - 2.0 * math.pi * (1.0 - math.sqrt(1.0 - 3.0 * M / r))) < 1e-8


# -- 4. Lyapunov exponent of the photon sphere ------------------------------------------------
def photon_orbit(M):
    """The circular null geodesic of Schwarzschild at r = 3M, u^t = 1: u^phi = Omega =
    1/(3 sqrt(3) M) (MTW 1973, sec. 25.6). Affine parameter = coordinate time on it."""
    return np.array([0.0, 3.0 * M, np.pi / 2, 0.0, 1.0, 0.0, 0.0, 1.0 / (3.0 * math.sqrt(3.0) * M)])


def lyapunov_reference(M):
    """lambda_L = 1/(3 sqrt(3) M) per unit coordinate time (Cardoso et al. 2009, PRD 79,
    064016, Schwarzschild: lambda = sqrt(-V_r''/(2 t'^2)) at r = 3M)."""
    return 1.0 / (3.0 * math.sqrt(3.0) * M)


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("M", [1.0, 2.5])
def test_photon_sphere_lyapunov_growth(M, backend):
    """A radial perturbation of the circular photon orbit grows as exp(lambda_L t) (Cardoso,
    Miranda, Berti, Witek & Zanchin 2009). The initial direction keeps E = f u^t and
    L = r^2 u^phi fixed (delta u^t = -f'/f delta r, delta u^phi = -2 u^phi/r delta r with
    f = 1 - 2M/r, f' = 2M/r^2) and starts on the growing branch (delta u^r = lambda_L
    delta r, as u^t = 1): then delta r(t) = exp(lambda_L t) delta r(0) exactly in the
    linearised equations (the radial equation at fixed E, L is delta r'' = lambda_L^2 delta r
    at the photon sphere, and nothing else forces it). The slope of log|delta r| against t
    over 12 e-folds is fitted by least squares."""
    k = kernels("schwarzschild", backend)
    y0 = photon_orbit(M)
    r, lam_l = 3.0 * M, lyapunov_reference(M)
    f, df = 1.0 - 2.0 * M / r, 2.0 * M / r**2
    d0 = np.array([0.0, 1.0, 0.0, 0.0, -df / f, lam_l, 0.0, -2.0 * y0[7] / r])
    lam_end = 12.0 / lam_l
    samples = np.linspace(0.0, lam_end, 13)[1:]
    res = k.integrate(y0, lam_end, params={"M": M}, variations=d0[None], samples=samples,
                      rtol=1e-12, atol=1e-14)
    assert res.status == "done"
    assert res.variations.shape == (1, 8)
    t = res.samples[:, 0]
    dr = res.variations_samples[:, 0, 1]
    slope = np.polyfit(t, np.log(np.abs(dr)), 1)[0]
    assert abs(slope / lam_l - 1.0) < 1e-8, slope / lam_l - 1.0
    # and at the end point, from the un-sampled result
    assert abs(math.log(abs(res.variations[0, 1])) / res.y[0] / lam_l - 1.0) < 1e-8


@pytest.mark.parametrize("backend", BACKENDS)
def test_photon_sphere_transition_matrix(backend):
    """The full transition matrix (variations="all") of the circular photon orbit: the
    Christoffel symbols depend only on r and theta, constant on the orbit, so the linearised
    equations have constant coefficients and Phi(lambda) = exp(J lambda); its largest
    eigenvalue is exp(lambda_L t) (Cardoso et al. 2009), here after 8 e-folds."""
    k = kernels("schwarzschild", backend)
    M = 1.0
    lam_l = lyapunov_reference(M)
    lam_end = 8.0 / lam_l
    res = k.integrate(photon_orbit(M), lam_end, variations="all", rtol=1e-12, atol=1e-14)
    assert res.status == "done"
    assert res.variations.shape == (8, 8)
    top = np.max(np.abs(np.linalg.eigvals(res.variations)))
    assert abs(math.log(top) / res.y[0] / lam_l - 1.0) < 1e-8
    # and the determinant of Phi is 1 (the geodesic flow preserves phase-space volume in
    # [x, p]; in [x, u] det Phi = det(g(x_0))/det(g(x_end)) = 1 on this orbit, Liouville)
    assert abs(np.linalg.det(res.variations) - 1.0) < 1e-6


# -- 5. the two backends agree ---------------------------------------------------------------
def _carry_case(name, rng):
    """States, parameters and carried inputs for the backend comparison: Kerr with two
    states that fall into the horizon (event stop), the sphere with great circles."""
    n = 6
    y = random_states(name, rng, n)
    params = random_params(name, rng, n)
    if name == "kerr":
        y[:, 1] = rng.uniform(6.0, 12.0, n) * params["M"]
        y[:2, 1] = 3.0 * params["M"][:2]                          # plunging: the horizon event
        y[:2, 5] = -1.0 - np.abs(y[:2, 5])                        # (r_+ <= 2M < 3M)
        y = kernels(name, "numpy").normalize(y, "timelike", params=params)
        lam_end = 12.0
    else:
        lam_end = 4.0
    return y, params, lam_end


@pytest.mark.parametrize("form", FORMS)
@pytest.mark.parametrize("name", ["kerr", "sphere"])
def test_backends_agree_on_carried_quantities(name, form):
    """C and NumPy run the same algorithm (common practice: two code paths); transport,
    variations (given directions and "all") and parameter sensitivities agree to 1e-9
    relative to each state's largest entry, at the end and at the samples (NaN alike beyond
    a stop)."""
    kc, kn = kernels(name, "c"), kernels(name, "numpy")
    rng = np.random.default_rng(3)
    y, params, lam_end = _carry_case(name, rng)
    if name == "sphere":
        y = kn.normalize(y, "unit", params=params)
    z = kn.momenta(y, params) if form == "hamilton" else y
    n, S = z.shape
    D = S // 2
    V0 = rng.normal(size=(n, 2, D))
    D0 = rng.normal(size=(n, 3, S))
    samples = np.linspace(0.0, lam_end, 5)[1:-1]
    out = {}
    for label, k in (("c", kc), ("numpy", kn)):
        out[label] = (
            k.integrate(z, lam_end, params=params, form=form, transport=V0, variations=D0,
                        param_variations=True, samples=samples),
            k.integrate(z, lam_end, params=params, form=form, variations="all"))
    (rc, ac), (rn, an) = out["c"], out["numpy"]
    assert list(rc.status) == list(rn.status)
    if name == "kerr":
        assert list(rc.status[:2]) == ["horizon", "horizon"], rc.status

    def close(a, b, what):
        # samples beyond a stop are NaN: in both backends alike
        assert np.array_equal(np.isnan(a), np.isnan(b)), what
        a, b = np.nan_to_num(a), np.nan_to_num(b)
        # each state's largest entry (a row can be exactly 0: r at an event r = const)
        # (exactly 0 for both is agreement: the sphere's geodesics do not depend on R)
        scale = np.abs(a).max(axis=tuple(range(1, a.ndim)), keepdims=True)
        err = np.abs(a - b)
        assert np.all(err <= 1e-9 * scale), (what, (err / np.maximum(scale, 1e-300)).max())

    close(rc.transport, rn.transport, "transport")
    close(rc.variations, rn.variations, "variations")
    close(rc.transport_samples, rn.transport_samples, "transport_samples")
    close(rc.variations_samples, rn.variations_samples, "variations_samples")
    close(ac.variations, an.variations, "variations='all'")
    assert set(rc.param_variations) == set(kc.parameters) == set(rn.param_variations)
    for p in kc.parameters:
        close(rc.param_variations[p], rn.param_variations[p], p)


# -- 6. the transport kernel against the Christoffel symbols -----------------------------------
@pytest.mark.parametrize("form", FORMS)
@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("name", ["kerr", "kerr_schild", "dense4"])
def test_transport_rhs_is_christoffel_contraction(name, backend, form):
    """Definition of parallel transport: dV^a/dlambda = -Gamma^a_bc u^b V^c for contravariant
    V (geodesic form) and dV_a/dlambda = Gamma^c_ab u^b V_c with u = g^-1 p for covariant V
    (hamilton form), contracted here by numpy.einsum from the spec's own Christoffel and
    inverse-metric kernels. Kerr has a symbolic inverse, Kerr-Schild its rank-one form,
    dense4 a numeric solve."""
    k = kernels(name, backend)
    rng = np.random.default_rng(17)
    n, m = 20, 3
    if name == "dense4":
        y, params = states_and_params(name, rng, n)
    else:
        y, params = random_states(name, rng, n), random_params(name, rng, n)
    v = rng.normal(size=(n, m, 4))
    gamma = k.christoffel(y[:, :4], params)
    if form == "hamilton":
        z = k.momenta(y, params)
        u = np.einsum("nab,nb->na", k.inverse_metric(y[:, :4], params), z[:, 4:])
        want = np.einsum("ncab,nb,nmc->nma", gamma, u, v)
        got = k.transport_rhs(z, v, params, form="hamilton")
        size = np.einsum("ncab,nb,nmc->nma", np.abs(gamma), np.abs(u), np.abs(v))
    else:
        want = -np.einsum("nabc,nb,nmc->nma", gamma, y[:, 4:], v)
        got = k.transport_rhs(y, v, params)
        size = np.einsum("nabc,nb,nmc->nma", np.abs(gamma), np.abs(y[:, 4:]), np.abs(v))
    assert got.shape == (n, m, 4)
    assert np.all(np.abs(got - want) <= 1e-12 * size.max(axis=-1, keepdims=True)), \
        np.abs(got - want).max()


# -- the example script ------------------------------------------------------------------------
def test_jacobi_bundle_example():
    """examples/jacobi_bundle.py runs and prints what it claims: the transverse separation of
    a radially falling dust cloud is r(tau)/r0 of its start (exact: radial geodesics at
    different theta fall alike, by spherical symmetry), and the radial Jacobi field agrees
    with the difference of two full integrations (central differences, common practice)."""
    import subprocess
    import sys
    out = subprocess.run([sys.executable, str(ROOT / "examples" / "jacobi_bundle.py"),
                          "--r0", "12", "--steps", "4", "--backend", "numpy"], capture_output=True, text=True,
                         timeout=300, cwd=ROOT)
    assert out.returncode == 0, out.stderr
    rows = [list(map(float, line.split())) for line in out.stdout.splitlines()[2:]]
    assert len(rows) == 4 and all(len(r) == 6 for r in rows), out.stdout
    for tau, r, transverse, ratio, radial, two_runs in rows:
        assert r < 12.0 and abs(transverse - ratio) <= 2e-8, (tau, transverse, ratio)
        assert radial > 1.0 and abs(radial - two_runs) <= 1e-5 * radial, (tau, radial, two_runs)


# -- variations against finite differences, the other inverse strategies ----------------------
def _strategy_case(name):
    """Two states per spec (test inputs, default parameters): Kerr-Schild (rank-one inverse)
    with one photon falling through the horizon event and one passing; dense4 (numeric
    inverse) with two unit-speed geodesics."""
    k = kernels(name, "numpy")
    if name == "kerr_schild":
        y = np.array([[0.0, 6.0, 0.5, 0.3, 1.0, -1.0, 0.05, 0.0],
                      [0.0, 8.0, 1.0, -0.5, 1.0, 0.0, 0.6, 0.1]])
        return k.normalize(y, "null"), 12.0
    y = np.array([[0.3, -1.0, 0.5, 2.0, 1.0, 0.2, -0.4, 0.1],
                  [-2.0, 1.0, 0.0, -0.5, -0.3, 0.8, 0.1, 0.5]])
    return k.normalize(y, "unit"), 5.0


@pytest.mark.parametrize("form", FORMS)
@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("name", ["kerr_schild", "dense4"])
def test_strategies_match_finite_differences(name, backend, form):
    """variations="all" and param_variations=True against central differences of full
    integrations (common practice; helpers and tolerance 1e-4 of tests/test_carry_api.py)
    on the inverse strategies test_carry_api does not reach: Kerr-Schild's rank-one form
    (with a state stopped by the horizon event, whose expression depends on M and a) and a
    numeric solve (dense4)."""
    from tests.test_carry_api import assert_close_rows, fd_initial, fd_param
    k = kernels(name, backend)
    y0, lam_end = _strategy_case(name)
    if form == "hamilton":
        y0 = k.momenta(y0)
    res = k.integrate(y0, lam_end, form=form, variations="all", param_variations=True,
                      rtol=1e-11, atol=1e-13)
    fd, base = fd_initial(k, y0, lam_end, form)
    assert list(res.status) == list(base.status)
    if name == "kerr_schild":
        assert list(res.status) == ["horizon", "done"], res.status
    assert_close_rows(res.variations, fd)
    for p in k.parameters:
        assert_close_rows(res.param_variations[p], fd_param(k, y0, lam_end, p, form))
