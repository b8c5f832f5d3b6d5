"""The batch integrator ``k.integrate`` (docs/integrator.md) against external references.

Physics references (each value is cited where it is used):

* MTW: Misner, Thorne & Wheeler, *Gravitation* (1973), ch. 25 (Schwarzschild orbits).
* BPT: Bardeen, Press & Teukolsky (1972), ApJ 178, 347, eqs. 2.12-2.21 (Kerr equatorial
  circular orbits, photon orbit, ISCO).
* Carter (1968), Phys. Rev. 174, 1559 (the fourth constant of Kerr geodesics).
* Karney (2013), J. Geodesy 87, 43, through its reference implementation ``geographiclib``
  (geodesics on the WGS84 ellipsoid).
* scipy.integrate.solve_ivp (DOP853, Hairer's algorithm) as an independent integrator.

Units G = c = 1 and M = 1 unless stated. All initial data below are test inputs built from
those formulas; every expected value comes from a reference, never from metricc itself.
"""
from __future__ import annotations

import numpy as np
import pytest

import metricc
from tests.conftest import SPECS, have_compiler

PI = np.pi
BACKENDS = ["numpy", pytest.param("c", marks=pytest.mark.skipif(not have_compiler(),
                                                                 reason="no C compiler"))]
FIELDS = ("y", "lam", "status", "steps", "samples", "drift")


@pytest.fixture(params=BACKENDS)
def backend(request):
    return request.param


def _k(shipped, name, backend):
    return shipped[name][backend]


def status_list(res):
    return [str(s) for s in np.asarray(res.status).tolist()]


# -- initial data (test side) ---------------------------------------------------------------
def circular_equatorial(k, r, omega, params=None):
    """Timelike state at (t=0, r, theta=pi/2, phi=0) with u^r = u^theta = 0 and
    u^phi = omega u^t, u^t fixed by g(u, u) = -1 from the spec's own metric."""
    x = np.array([0.0, r, PI / 2, 0.0])
    g = k.metric(x, params)
    ut = 1.0 / np.sqrt(-(g[0, 0] + 2 * g[0, 3] * omega + g[3, 3] * omega ** 2))
    return np.array([0.0, r, PI / 2, 0.0, ut, 0.0, 0.0, omega * ut])


def timelike_from_spatial(k, x, u_spatial, params=None):
    """Future-directed state [x, u] with the given u^i and g(u, u) = -1 (solves the quadratic
    g_tt (u^t)^2 + 2 g_ti u^i u^t + g_ij u^i u^j + 1 = 0 for u^t; g_tt < 0 here)."""
    x = np.asarray(x, dtype=float)
    us = np.asarray(u_spatial, dtype=float)
    g = k.metric(x, params)
    A = g[0, 0]
    B = g[0, 1:] @ us
    C = us @ g[1:, 1:] @ us + 1.0
    ut = (-B - np.sqrt(B * B - A * C)) / A
    return np.concatenate([x, [ut], us])


def kerr_bound_states():
    """Inclined, eccentric bound Kerr orbits (a = 0.9): r roughly 8.9..11, theta 1.12..2.02
    (checked when choosing them); a few variations around one seed."""
    return [([0.0, 10.0, PI / 2, 0.0], [0.03, 0.015, 0.033]),
            ([0.0, 9.0, 1.3, 0.5], [-0.02, 0.01, 0.036]),
            ([0.0, 11.0, 1.9, -1.0], [0.01, -0.012, 0.027])]


def bound_batch(k, params=None):
    return np.array([timelike_from_spatial(k, x, u, params) for x, u in kerr_bound_states()])


# -- result contract ------------------------------------------------------------------------
def test_result_fields_shapes_and_drift(shipped, backend):
    k = _k(shipped, "kerr", backend)
    y0 = bound_batch(k)
    lam = np.array([0.0, 10.0, 25.0, 50.0])
    res = k.integrate(y0, 50.0, samples=lam)
    for f in FIELDS:
        assert hasattr(res, f), f
    assert res.y.shape == (3, 8)
    assert res.lam.shape == (3,) and res.steps.shape == (3,) and res.drift.shape == (3,)
    assert len(res.status) == 3
    assert status_list(res) == ["done"] * 3
    np.testing.assert_allclose(res.lam, 50.0, rtol=0, atol=1e-12)
    assert np.all(np.asarray(res.steps) >= 1)
    assert res.samples.shape == (3, 4, 8)
    # the sample at lambda = 0 is the initial state; the one at lam_end the final state
    np.testing.assert_allclose(res.samples[:, 0], y0, rtol=1e-13, atol=1e-13)
    np.testing.assert_allclose(res.samples[:, -1], res.y, rtol=1e-12, atol=1e-12)
    # drift is |g(u,u)_end - g(u,u)_start| (contract); tiny for a well-resolved orbit
    expect = np.abs(k.norm(res.y) - k.norm(y0))
    np.testing.assert_allclose(res.drift, expect, rtol=1e-6, atol=1e-15)
    assert np.all(res.drift < 1e-9)
    assert k.integrate(y0, 5.0).samples is None


# -- Schwarzschild ------------------------------------------------------------------------
@pytest.mark.parametrize("r", [10.0, 7.0])
def test_schwarzschild_circular_orbit_period(shipped, backend, r):
    """Circular timelike orbit: dphi/dt = sqrt(M/r^3), so the coordinate-time period is
    2 pi sqrt(r^3/M), exact in Schwarzschild coordinate time (MTW 1973, ch. 25; Kepler's
    third law holds exactly for Schwarzschild circular orbits). Both radii are above the
    ISCO at 6M (MTW ch. 25), so the orbit is stable and r must stay constant."""
    k = _k(shipped, "schwarzschild", backend)
    M = 1.0
    omega = np.sqrt(M / r ** 3)
    y0 = circular_equatorial(k, r, omega)[None]
    assert abs(k.norm(y0)[0] + 1) < 1e-14
    period_t = 2 * PI * np.sqrt(r ** 3 / M)
    period_lam = period_t / y0[0, 4]  # u^t = dt/dlam is constant on the orbit
    lam_end = 3.3 * period_lam
    samples = np.linspace(0.0, lam_end, 400)
    res = k.integrate(y0, lam_end, rtol=1e-12, atol=1e-12, samples=samples)
    assert status_list(res) == ["done"]
    rs = res.samples[0, :, 1]
    assert np.all(np.isfinite(rs))
    assert np.max(np.abs(rs / r - 1)) < 1e-8
    assert np.max(np.abs(res.samples[0, :, 2] - PI / 2)) < 1e-9
    # the coordinate time at which phi has advanced by 2 pi, 4 pi, 6 pi (interpolated in the
    # samples; phi grows monotonically)
    t, phi = res.samples[0, :, 0], res.samples[0, :, 3]
    for n in (1, 2, 3):
        t_n = np.interp(2 * PI * n, phi, t)
        assert t_n == pytest.approx(n * period_t, rel=1e-8)
    assert res.y[0, 0] / res.y[0, 3] * 2 * PI == pytest.approx(period_t, rel=1e-9)


def test_schwarzschild_photon_capture_threshold(shipped, backend):
    """Photons with impact parameter b < 3 sqrt(3) M are captured, b > 3 sqrt(3) M escape
    (MTW 1973, sec. 25.6: the peak of the photon effective potential at r = 3M).
    Initial data: E = 1, so u^t = 1/(1 - 2M/r), u^phi = b/r^2 and u^r from g(u,u) = 0,
    inward, at r = 1000 M in the equatorial plane."""
    k = _k(shipped, "schwarzschild", backend)
    M, r0 = 1.0, 1000.0
    bc = 3 * np.sqrt(3) * M
    f = 1 - 2 * M / r0
    y0 = []
    for b in (0.98 * bc, 1.02 * bc):
        ut, uph = 1 / f, b / r0 ** 2
        ur = -np.sqrt(1 - f * b ** 2 / r0 ** 2)  # (u^r)^2 = E^2 - f L^2/r^2 with L = b E
        y0.append([0.0, r0, PI / 2, 0.0, ut, ur, 0.0, uph])
    y0 = np.array(y0)
    np.testing.assert_allclose(k.norm(y0), 0.0, atol=1e-12)
    lam_end = 3000.0
    samples = np.linspace(0.0, lam_end, 61)
    res = k.integrate(y0, lam_end, samples=samples)
    assert status_list(res) == ["horizon", "done"]
    # captured: stopped on the spec's event r - 2.02 M = 0, located to |g| < 1e-8
    g = k.event_values(res.y[:, :4])[:, 0]
    assert abs(g[0]) < 1e-8
    assert res.y[0, 1] == pytest.approx(2.02 * M, abs=1e-8)
    assert 900 < res.lam[0] < lam_end
    # samples after the stop are NaN, those before are finite
    after = samples > res.lam[0]
    assert np.all(np.isnan(res.samples[0, after]))
    assert np.all(np.isfinite(res.samples[0, ~after]))
    # escaped: reached lam_end moving outward, beyond where it started
    assert res.lam[1] == pytest.approx(lam_end, abs=1e-9)
    assert res.y[1, 1] > r0 and res.y[1, 5] > 0
    assert np.min(res.samples[1, :, 1]) > 3 * M  # passed outside the photon sphere
    assert np.all(np.isfinite(res.samples[1]))


def _schwarzschild_bound_EL(p, e, M=1.0):
    """E^2, L^2 of the bound orbit with turning points r1 = p/(1+e), r2 = p/(1-e): both
    turning points solve E^2 = (1 - 2M/r)(1 + L^2/r^2) (MTW eq. 25.16 effective potential);
    two equations, linear in E^2 and L^2."""
    r1, r2 = p * M / (1 + e), p * M / (1 - e)
    f1, f2 = 1 - 2 * M / r1, 1 - 2 * M / r2
    L2 = (f2 - f1) / (f1 / r1 ** 2 - f2 / r2 ** 2)
    return f1 * (1 + L2 / r1 ** 2), L2, r1


def test_schwarzschild_periapsis_advance(shipped, backend):
    """Periapsis advance per radial period of a wide bound orbit, p = 200 M, e = 0.3.

    Leading order 6 pi M / p (Einstein 1915; MTW 1973, sec. 25.5 / eq. 25.46 region);
    the relative correction is O(M/p), here about +2.3 %, so the tolerance is 4 %.
    Exact value: the orbit equation in the form dphi/dchi = sqrt(p/(p - 6 - 2 e cos chi)) with
    r = p M/(1 + e cos chi) (Cutler, Kennefick & Poisson 1994, Phys. Rev. D 50, 3816 -- quoted
    from memory, so it is cross-checked here against a direct quadrature of
    dphi/dr = (L/r^2)/sqrt(E^2 - V(r)) from the first principles above)."""
    from scipy.integrate import quad
    k = _k(shipped, "schwarzschild", backend)
    M, p, e = 1.0, 200.0, 0.3
    E2, L2, r1 = _schwarzschild_bound_EL(p, e, M)
    exact = quad(lambda c: np.sqrt(p / (p - 6 - 2 * e * np.cos(c))), 0, 2 * PI,
                 epsabs=1e-13, epsrel=1e-13)[0] - 2 * PI

    def dphi_dchi(c):  # first principles, variable chi to remove the endpoint singularities
        r = p / (1 + e * np.cos(c))
        drdc = p * e * np.sin(c) / (1 + e * np.cos(c)) ** 2
        rad = E2 - (1 - 2 / r) * (1 + L2 / r ** 2)
        return np.sqrt(L2) / r ** 2 / np.sqrt(rad) * drdc
    first_principles = 2 * quad(dphi_dchi, 1e-9, PI - 1e-9, epsabs=1e-14, limit=200)[0] - 2 * PI
    assert first_principles == pytest.approx(exact, rel=1e-6)

    # start at periapsis r1, u^r = 0, with E and L of the orbit
    f1 = 1 - 2 * M / r1
    y0 = np.array([[0.0, r1, PI / 2, 0.0, np.sqrt(E2) / f1, 0.0, 0.0, np.sqrt(L2) / r1 ** 2]])
    assert abs(k.norm(y0)[0] + 1) < 1e-12
    a_semi = p / (1 - e ** 2)
    t_radial = 2 * PI * a_semi ** 1.5  # Newtonian estimate, only to size the run
    lam_end = 1.15 * t_radial
    samples = np.linspace(0.0, lam_end, 2001)
    res = k.integrate(y0, lam_end, rtol=1e-12, atol=1e-12, samples=samples)
    assert status_list(res) == ["done"]
    ur = res.samples[0, :, 5]
    # the next periapsis: u^r changes sign from - to + (away from the start)
    idx = np.nonzero((ur[:-1] < 0) & (ur[1:] >= 0) & (samples[:-1] > 0.5 * t_radial))[0]
    assert len(idx) == 1
    state = res.samples[0, idx[0]][None]
    for _ in range(4):  # Newton on u^r(lam) = 0, stepping with the integrator itself
        dlam = -state[0, 5] / k.geodesic_rhs(state)[0, 5]
        if dlam == 0:
            break
        state = k.integrate(state, dlam, rtol=1e-13, atol=1e-14).y
    assert abs(state[0, 5]) < 1e-13
    assert state[0, 1] == pytest.approx(r1, rel=1e-8)
    advance = state[0, 3] - 2 * PI
    assert advance == pytest.approx(exact, rel=1e-6)
    assert advance == pytest.approx(6 * PI * M / p, rel=0.04)


# -- Kerr: BPT 1972 -------------------------------------------------------------------------
def bpt_omega(r, a, s, M=1.0):
    """BPT eq. 2.16: Omega = +-M^(1/2)/(r^(3/2) +- a M^(1/2)) (s = +1 prograde, -1 retro)."""
    return s * np.sqrt(M) / (r ** 1.5 + s * a * np.sqrt(M))


def bpt_energy_and_L(r, a, s, M=1.0):
    """BPT eqs. 2.12 and 2.13, per unit rest mass (upper sign prograde)."""
    den = r ** 0.75 * np.sqrt(r ** 1.5 - 3 * M * np.sqrt(r) + s * 2 * a * np.sqrt(M))
    E = (r ** 1.5 - 2 * M * np.sqrt(r) + s * a * np.sqrt(M)) / den
    L = s * np.sqrt(M) * (r ** 2 - s * 2 * a * np.sqrt(M * r) + a * a) / den
    return E, L


def bpt_isco(a, s, M=1.0):
    """BPT eq. 2.21: r_ms = M{3 + Z2 -+ [(3 - Z1)(3 + Z1 + 2 Z2)]^(1/2)}."""
    x = a / M
    Z1 = 1 + (1 - x * x) ** (1 / 3) * ((1 + x) ** (1 / 3) + (1 - x) ** (1 / 3))
    Z2 = np.sqrt(3 * x * x + Z1 * Z1)
    return M * (3 + Z2 - s * np.sqrt((3 - Z1) * (3 + Z1 + 2 * Z2)))


def bpt_photon_orbit(a, s, M=1.0):
    """BPT eq. 2.18: r_ph = 2M{1 + cos[(2/3) arccos(-+a/M)]}."""
    return 2 * M * (1 + np.cos(2 / 3 * np.arccos(-s * a / M)))


def test_kerr_reference_formulas_limits():
    """Self-check of the transcribed BPT formulas: a = 0 gives Schwarzschild, r_isco = 6M
    and r_ph = 3M (MTW ch. 25); a = M prograde gives r_isco = r_ph = M (BPT sec. II)."""
    assert bpt_isco(0.0, 1) == pytest.approx(6.0)
    assert bpt_isco(0.0, -1) == pytest.approx(6.0)
    assert bpt_isco(1.0, 1) == pytest.approx(1.0)
    assert bpt_isco(1.0, -1) == pytest.approx(9.0)
    assert bpt_photon_orbit(0.0, 1) == pytest.approx(3.0)
    assert bpt_photon_orbit(1.0, 1) == pytest.approx(1.0)
    assert bpt_photon_orbit(1.0, -1) == pytest.approx(4.0)


def test_kerr_circular_orbits_bpt(shipped, backend):
    """Prograde and retrograde equatorial circular orbits at r = 8M, a = 0.9M keep r constant
    and advance phi/t = Omega (BPT eq. 2.16); E = -p_t and L = p_phi (BPT eqs. 2.12-2.13)."""
    k = _k(shipped, "kerr", backend)
    r, a = 8.0, 0.9
    y0 = np.array([circular_equatorial(k, r, bpt_omega(r, a, s)) for s in (1, -1)])
    periods = 2 * PI / np.abs([bpt_omega(r, a, s) for s in (1, -1)]) / y0[:, 4]
    lam_end = 5.2 * periods.max()
    samples = np.linspace(0.0, lam_end, 300)
    res = k.integrate(y0, lam_end, rtol=1e-12, atol=1e-12, samples=samples)
    assert status_list(res) == ["done", "done"]
    assert np.max(np.abs(res.samples[:, :, 1] / r - 1)) < 1e-8
    # theta stays equatorial; the bound is set by atol/Omega (u^theta is controlled only to
    # ~atol, and the vertical oscillation has frequency ~Omega), not by roundoff
    assert np.max(np.abs(res.samples[:, :, 2] - PI / 2)) < 1e-9
    for i, s in enumerate((1, -1)):
        assert res.y[i, 3] / res.y[i, 0] == pytest.approx(bpt_omega(r, a, s), rel=1e-9)
        E, L = bpt_energy_and_L(r, a, s)
        for y in (y0[i], res.y[i]):
            c = k.conserved(y)
            assert -c["p_t"] == pytest.approx(E, rel=1e-10)
            assert c["p_phi"] == pytest.approx(L, rel=1e-10)
    assert res.y[0, 3] > 0 > res.y[1, 3]


def _tangent_photon(k, r, s):
    """Null state at (0, r, pi/2, 0) with u^r = u^theta = 0, u^t = 1 and u^phi = w from
    g_tt + 2 g_tphi w + g_phiphi w^2 = 0 (s = +1: the co-rotating root)."""
    x = np.array([0.0, r, PI / 2, 0.0])
    g = k.metric(x)
    A, B, C = g[3, 3], g[0, 3], g[0, 0]
    w = (-B + s * np.sqrt(B * B - A * C)) / A
    return np.concatenate([x, [1.0, 0.0, 0.0, w]])


@pytest.mark.parametrize("s", [1, -1], ids=["prograde", "retrograde"])
def test_kerr_circular_photon_orbit(shipped, backend, s):
    """The equatorial circular photon orbit at r_ph (BPT eq. 2.18): a photon launched
    tangentially there (dr/dlam = 0) has d^2r/dlam^2 = 0, and stays at r_ph (the orbit is
    unstable, so only for a while); one launched tangentially 0.1 % further out does not."""
    from scipy.optimize import brentq
    k = _k(shipped, "kerr", backend)
    a = 0.9
    rph = bpt_photon_orbit(a, s)
    accel = lambda r: k.geodesic_rhs(_tangent_photon(k, r, s))[5]  # noqa: E731
    r_root = brentq(accel, 0.97 * rph, 1.03 * rph, xtol=1e-14, rtol=1e-14)
    assert r_root == pytest.approx(rph, rel=1e-10)
    y0 = np.array([_tangent_photon(k, rph, s), _tangent_photon(k, 1.001 * rph, s)])
    assert np.max(np.abs(k.norm(y0))) < 1e-12
    lam_end = 60.0  # about 3.4 (prograde) or 1.4 (retrograde) turns in phi
    samples = np.linspace(0.0, lam_end, 121)
    res = k.integrate(y0, lam_end, rtol=1e-12, atol=1e-12, samples=samples)
    assert res.status[0] == "done"
    assert abs(res.y[0, 3]) > 2 * PI
    assert np.max(np.abs(res.samples[0, :, 1] / rph - 1)) < 1e-6
    dev = np.abs(res.samples[1, :, 1] / rph - 1)
    assert np.nanmax(dev) > 1e-2  # the neighbour escapes or falls


def test_kerr_isco_stability(shipped, backend):
    """Circular-orbit E, L just outside the ISCO (1.05 r_isco, BPT eq. 2.21) stay bound near
    r; just inside (0.95 r_isco), with the same small inward kick u^r = -1e-4, the orbit
    plunges to the horizon event. Both spin directions, a = 0.9 M."""
    k = _k(shipped, "kerr", backend)
    a = 0.9
    y0, radii, periods = [], [], []
    for s in (1, -1):
        for fac in (1.05, 0.95):
            r = fac * bpt_isco(a, s)
            om = bpt_omega(r, a, s)
            x = np.array([0.0, r, PI / 2, 0.0])
            g = k.metric(x)
            ur = -1e-4
            circ = g[0, 0] + 2 * g[0, 3] * om + g[3, 3] * om ** 2  # u^phi = om u^t, g(u,u) = -1
            ut = np.sqrt((-1 - g[1, 1] * ur ** 2) / circ)
            y0.append([0.0, r, PI / 2, 0.0, ut, ur, 0.0, om * ut])
            radii.append(r)
            periods.append(2 * PI / abs(om) / ut)
    y0, radii = np.array(y0), np.array(radii)
    np.testing.assert_allclose(k.norm(y0), -1.0, rtol=1e-13)
    lam_end = 30 * max(periods)
    samples = np.linspace(0.0, lam_end, 600)
    res = k.integrate(y0, lam_end, samples=samples)
    assert status_list(res) == ["done", "horizon", "done", "horizon"]
    for i in (0, 2):
        rel = res.samples[i, :, 1] / radii[i] - 1
        assert np.max(np.abs(rel)) < 3e-3
        assert abs(res.y[i, 3]) > 2 * PI * 29  # many orbits
    for i in (1, 3):
        assert abs(k.event_values(res.y[i, :4])[0]) < 1e-8


def carter_constants(k, y):
    """E = -p_t, L = p_phi, Q = p_theta^2 + cos^2(theta)(a^2 (mu^2 - E^2) + L^2/sin^2(theta))
    with mu^2 = -g(u, u) (Carter 1968)."""
    a = k.parameters["a"]
    c = k.conserved(y)
    E, L = -c["p_t"], c["p_phi"]
    pth = k.momenta(y)[..., 6]  # [x^mu, p_mu]: p_theta
    th = y[..., 2]
    mu2 = -k.norm(y)
    Q = pth ** 2 + np.cos(th) ** 2 * (a * a * (mu2 - E * E) + L * L / np.sin(th) ** 2)
    return np.stack([E, L, Q], axis=-1)


def _carter_drift(k, orbits):
    y0 = bound_batch(k)[:1]
    period = 2 * PI * 10.0 ** 1.5 / y0[0, 4]  # Kepler estimate at r ~ 10, to size the run
    res = k.integrate(y0, orbits * period, rtol=1e-12, atol=1e-12, max_steps=10 ** 6)
    assert status_list(res) == ["done"]
    assert res.y[0, 3] > 2 * PI * 0.8 * orbits
    c0, c1 = carter_constants(k, y0), carter_constants(k, res.y)
    assert c0[0, 2] > 0.5  # genuinely inclined orbit
    return np.abs(c1 / c0 - 1)[0], res


def test_kerr_carter_constant_10_orbits(shipped, backend):
    k = _k(shipped, "kerr", backend)
    drift, res = _carter_drift(k, 10)
    assert np.all(drift < 1e-9), drift
    assert res.drift[0] < 1e-9


@pytest.mark.slow
def test_kerr_carter_constant_100_orbits(shipped, backend):
    k = _k(shipped, "kerr", backend)
    drift, res = _carter_drift(k, 100)
    assert np.all(drift < 1e-9), drift


def test_kerr_spin_scan_per_state_params(shipped, backend):
    """params as per-state arrays: circular prograde orbits at r = 8M for a scan of spins, each
    with Omega(a) from BPT eq. 2.16; and each equals a run with that spin as a scalar."""
    k = _k(shipped, "kerr", backend)
    r = 8.0
    spins = np.array([-0.9, -0.5, 0.0, 0.5, 0.9])
    y0 = np.array([circular_equatorial(k, r, bpt_omega(r, a, 1), params={"a": a})
                   for a in spins])
    lam_end = 400.0
    res = k.integrate(y0, lam_end, params={"a": spins}, rtol=1e-12, atol=1e-12)
    assert status_list(res) == ["done"] * len(spins)
    np.testing.assert_allclose(res.y[:, 1], r, rtol=1e-9)
    np.testing.assert_allclose(res.y[:, 3] / res.y[:, 0], bpt_omega(r, spins, 1), rtol=1e-9)
    for i in (0, 4):
        one = k.integrate(y0[i:i + 1], lam_end, params={"a": float(spins[i])}, rtol=1e-12,
                          atol=1e-12)
        np.testing.assert_allclose(one.y[0], res.y[i], rtol=1e-12, atol=1e-12)


# -- ellipsoid: Karney / geographiclib -----------------------------------------------------
ELLIPSOID_CASES = [  # (lat1 deg, lon1 deg, azi1 deg, s12 m); max latitudes from Clairaut
    (1.0, 0.0, 85.0, 15.0e6),     # near-equatorial, long
    (0.0, 10.0, 30.0, 15.0e6),    # starts on the equator, reaches ~60 deg
    (-30.0, 40.0, 45.0, 10.0e6),
    (60.0, -70.0, 120.0, 15.0e6),
    (75.0, 100.0, 70.0, 5.0e6),   # high latitude, peaks near 76 deg
    (45.0, 0.0, 10.0, 15.0e6),    # passes near 83 deg
    (-80.0, 0.0, 100.0, 1.0e6),
]


def test_ellipsoid_geodesics_match_geographiclib(shipped, backend):
    """WGS84 geodesics against Geodesic.WGS84.Direct (Karney 2013): end points within 1 mm
    after up to 15 000 km. The spec's defaults are the WGS84 a and f."""
    gl = pytest.importorskip("geographiclib.geodesic")
    geod = gl.Geodesic.WGS84
    k = _k(shipped, "ellipsoid", backend)
    assert k.parameters["a"] == geod.a and k.parameters["f"] == pytest.approx(geod.f, rel=1e-15)
    y0 = []
    for lat1, lon1, azi1, _ in ELLIPSOID_CASES:
        x = np.radians([lat1, lon1])
        g = k.metric(x)
        M_rad = np.sqrt(g[0, 0])
        N_cos = np.sqrt(g[1, 1])  # N(lat) cos(lat)
        az = np.radians(azi1)
        y0.append([x[0], x[1], np.cos(az) / M_rad, np.sin(az) / N_cos])
    y0 = np.array(y0)
    np.testing.assert_allclose(k.norm(y0), 1.0, rtol=1e-14)
    mask = gl.Geodesic.LATITUDE | gl.Geodesic.LONGITUDE | gl.Geodesic.LONG_UNROLL
    for i, (lat1, lon1, azi1, s12) in enumerate(ELLIPSOID_CASES):
        res = k.integrate(y0[i:i + 1], s12, rtol=1e-12, atol=1e-22)
        assert status_list(res) == ["done"], ELLIPSOID_CASES[i]
        ref = geod.Direct(lat1, lon1, azi1, s12, mask)
        x2 = np.radians([ref["lat2"], ref["lon2"]])
        g2 = k.metric(x2)
        d = res.y[0, :2] - x2
        metres = np.hypot(np.sqrt(g2[0, 0]) * d[0], np.sqrt(g2[1, 1]) * d[1])
        assert metres < 1e-3, (ELLIPSOID_CASES[i], metres)
        assert abs(k.norm(res.y)[0] - 1) < 1e-10


# -- numerics: backends, scipy, options -----------------------------------------------------
def scatter_states(k):
    """Bound orbits plus one plunging photon (b ~ 1.5 M from r = 30) and one escaping
    timelike state, all around a = 0.9 Kerr."""
    y = list(bound_batch(k))
    y.append(timelike_from_spatial(k, [0.0, 20.0, 1.0, 0.3], [0.3, 0.0, 0.002]))
    x = np.array([0.0, 30.0, PI / 2, 0.0])
    g = k.metric(x)
    uph = 1.5 / 30.0 ** 2  # impact parameter ~1.5 M: well inside the capture cross-section
    ut = 1.0
    # g_tt ut^2 + 2 g_tphi ut uph + g_phph uph^2 + g_rr ur^2 = 0, inward
    ur = -np.sqrt(-(g[0, 0] + 2 * g[0, 3] * uph + g[3, 3] * uph ** 2) / g[1, 1])
    y.append([0.0, 30.0, PI / 2, 0.0, ut, ur, 0.0, uph])
    return np.array(y)


@pytest.mark.skipif(not have_compiler(), reason="no C compiler")
def test_c_and_numpy_integrators_agree(shipped):
    kc, kn = shipped["kerr"]["c"], shipped["kerr"]["numpy"]
    y0 = scatter_states(kn)
    samples = np.linspace(0.0, 150.0, 16)
    out = {}
    for name, k in (("c", kc), ("numpy", kn)):
        out[name] = k.integrate(y0, 150.0, rtol=1e-10, samples=samples)
    rc, rn = out["c"], out["numpy"]
    assert status_list(rc) == status_list(rn)
    assert "horizon" in status_list(rc) and "done" in status_list(rc)
    np.testing.assert_allclose(rc.lam, rn.lam, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(rc.y, rn.y, rtol=1e-7, atol=1e-9)
    np.testing.assert_array_equal(np.isnan(rc.samples), np.isnan(rn.samples))
    ok = np.isfinite(rc.samples)
    np.testing.assert_allclose(rc.samples[ok], rn.samples[ok], rtol=1e-7, atol=1e-9)
    assert np.all(np.abs(np.asarray(rc.steps) - np.asarray(rn.steps)) <= 3)


def test_samples_match_scipy_dop853(shipped, backend):
    """Dense-output samples against scipy.integrate.solve_ivp (DOP853, rtol 1e-12) using the
    spec's own right-hand side; also the stop on the horizon against a scipy event."""
    from scipy.integrate import solve_ivp
    k = _k(shipped, "kerr", backend)
    y0 = scatter_states(k)
    lam_end = 150.0
    samples = np.linspace(0.0, lam_end, 37)
    res = k.integrate(y0, lam_end, rtol=1e-10, samples=samples)
    for i in range(len(y0)):
        horizon = lambda lam, y: k.event_values(y[:4])[0]  # noqa: E731
        horizon.terminal, horizon.direction = True, -1
        ref = solve_ivp(lambda lam, y: k.geodesic_rhs(y), (0.0, lam_end), y0[i],
                        method="DOP853", rtol=1e-12, atol=1e-14, dense_output=True,
                        events=horizon)
        stop = ref.t[-1]
        if ref.status == 1:
            assert res.status[i] == "horizon"
            assert res.lam[i] == pytest.approx(stop, rel=1e-7)
        else:
            assert res.status[i] == "done"
        reached = samples <= stop
        want = ref.sol(samples[reached]).T
        got = res.samples[i, reached]
        scale = np.maximum(np.abs(want), 1.0)
        assert np.max(np.abs(got - want) / scale) < 1e-7, i
        assert np.all(np.isnan(res.samples[i, ~reached]))
        np.testing.assert_allclose(res.y[i], ref.y[:, -1], rtol=1e-7, atol=1e-7)


def test_tolerance_controls_error(shipped, backend):
    """A loose rtol gives a visibly larger (but bounded) error than a tight one: the error
    control is active. Reference: a solve_ivp DOP853 run at rtol 1e-13."""
    from scipy.integrate import solve_ivp
    k = _k(shipped, "kerr", backend)
    y0 = bound_batch(k)[:1]
    ref = solve_ivp(lambda lam, y: k.geodesic_rhs(y), (0.0, 400.0), y0[0], method="DOP853",
                    rtol=1e-13, atol=1e-14).y[:, -1]
    errs = {}
    for rtol in (1e-5, 1e-11):
        res = k.integrate(y0, 400.0, rtol=rtol, atol=rtol * 1e-2)
        errs[rtol] = np.max(np.abs(res.y[0] - ref) / np.maximum(np.abs(ref), 1.0))
    assert errs[1e-11] < 1e-8
    assert errs[1e-5] < 1e-2
    assert errs[1e-5] > 10 * errs[1e-11]


def test_unsorted_samples_and_leading_axes(shipped, backend):
    """Samples in any order come back in the order given; a (2, 2, 8) batch keeps its axes
    and equals the flat (4, 8) run."""
    k = _k(shipped, "kerr", backend)
    y0 = scatter_states(k)[:4]
    lam = np.array([0.0, 20.0, 40.0, 60.0, 80.0])
    perm = np.array([3, 0, 4, 1, 2])
    flat = k.integrate(y0, 80.0, samples=lam)
    shuffled = k.integrate(y0, 80.0, samples=lam[perm])
    np.testing.assert_allclose(shuffled.samples, flat.samples[:, perm], rtol=1e-13, atol=1e-13)
    boxed = k.integrate(y0.reshape(2, 2, 8), 80.0, samples=lam)
    assert boxed.y.shape == (2, 2, 8) and boxed.lam.shape == (2, 2)
    assert boxed.samples.shape == (2, 2, 5, 8)
    np.testing.assert_allclose(boxed.y.reshape(4, 8), flat.y, rtol=1e-13, atol=1e-13)


def test_nan_state_does_not_affect_others(shipped, backend):
    k = _k(shipped, "kerr", backend)
    y0 = scatter_states(k)
    bad = y0.copy()
    bad[2, 1] = np.nan
    samples = np.linspace(0.0, 80.0, 9)
    clean = k.integrate(y0, 80.0, samples=samples)
    mixed = k.integrate(bad, 80.0, samples=samples)
    assert mixed.status[2] == "bad_input"
    assert np.all(np.isnan(mixed.samples[2, 1:]))
    keep = [i for i in range(len(y0)) if i != 2]
    assert [status_list(mixed)[i] for i in keep] == [status_list(clean)[i] for i in keep]
    np.testing.assert_allclose(mixed.y[keep], clean.y[keep], rtol=1e-13, atol=1e-13)
    np.testing.assert_allclose(mixed.lam[keep], clean.lam[keep], rtol=1e-13, atol=1e-13)
    np.testing.assert_array_equal(np.asarray(mixed.steps)[keep], np.asarray(clean.steps)[keep])
    np.testing.assert_allclose(mixed.samples[keep], clean.samples[keep], rtol=1e-13, atol=1e-13)


def test_max_steps_is_honoured_and_run_continues(shipped, backend):
    k = _k(shipped, "kerr", backend)
    y0 = bound_batch(k)
    lam_end = 2000.0
    cut = k.integrate(y0, lam_end, max_steps=7)
    assert status_list(cut) == ["max_steps"] * 3
    np.testing.assert_array_equal(np.asarray(cut.steps), 7)
    assert np.all((cut.lam > 0) & (cut.lam < lam_end))
    # continuing from res.y with the rest of the interval matches a single run
    full = k.integrate(y0, lam_end, rtol=1e-12, atol=1e-12)
    for i in range(3):
        rest = k.integrate(cut.y[i:i + 1], lam_end - cut.lam[i], rtol=1e-12, atol=1e-12)
        assert rest.status[0] == "done"
        np.testing.assert_allclose(rest.y[0], full.y[0 + i], rtol=1e-8, atol=1e-8)


def test_backward_integration_returns_to_start(shipped, backend):
    k = _k(shipped, "kerr", backend)
    y0 = bound_batch(k)
    fwd = k.integrate(y0, 300.0, rtol=1e-12, atol=1e-12)
    samples = np.linspace(0.0, -300.0, 7)
    back = k.integrate(fwd.y, -300.0, rtol=1e-12, atol=1e-12, samples=samples)
    assert status_list(back) == ["done"] * 3
    np.testing.assert_allclose(back.lam, -300.0, atol=1e-9)
    np.testing.assert_allclose(back.y, y0, rtol=1e-8, atol=1e-8)
    # the backward samples retrace the forward trajectory
    fwd_s = k.integrate(y0, 300.0, rtol=1e-12, atol=1e-12, samples=300.0 + samples)
    np.testing.assert_allclose(back.samples, fwd_s.samples, rtol=1e-8, atol=1e-8)


def test_hamilton_form_matches_geodesic_form(shipped, backend):
    k = _k(shipped, "kerr", backend)
    y0 = scatter_states(k)
    z0 = k.momenta(y0)
    lam_end = 120.0
    rg = k.integrate(y0, lam_end, rtol=1e-11, atol=1e-12)
    rh = k.integrate(z0, lam_end, rtol=1e-11, atol=1e-12, form="hamilton")
    assert status_list(rg) == status_list(rh)
    np.testing.assert_allclose(rh.lam, rg.lam, rtol=1e-8, atol=1e-9)
    np.testing.assert_allclose(rh.y[:, :4], rg.y[:, :4], rtol=1e-8, atol=1e-8)
    np.testing.assert_allclose(k.velocities(rh.y)[:, 4:], rg.y[:, 4:], rtol=1e-7, atol=1e-8)
    # hamilton drift is measured with g^{mu nu} p_mu p_nu
    np.testing.assert_allclose(rh.drift, np.abs(k.momentum_norm(rh.y) - k.momentum_norm(z0)),
                               rtol=1e-6, atol=1e-15)
    # p_t and p_phi are exactly components of the Hamiltonian state
    done = np.asarray(rh.status) == "done"
    np.testing.assert_allclose(rh.y[done][:, [4, 7]], z0[done][:, [4, 7]], rtol=1e-9, atol=1e-12)


def test_dp5_and_dop853_agree_and_dop853_is_cheaper(shipped, backend):
    k = _k(shipped, "kerr", backend)
    y0 = bound_batch(k)
    r8 = k.integrate(y0, 300.0, rtol=1e-10, method="dop853")
    r5 = k.integrate(y0, 300.0, rtol=1e-10, method="dp5")
    rd = k.integrate(y0, 300.0, rtol=1e-10)  # default is dop853 (contract)
    np.testing.assert_array_equal(rd.y, r8.y)
    assert status_list(r5) == ["done"] * 3 == status_list(r8)
    np.testing.assert_allclose(r5.y, r8.y, rtol=1e-6, atol=1e-7)
    assert np.all(np.asarray(r8.steps) < np.asarray(r5.steps))


def test_progress_callback(shipped, backend):
    k = _k(shipped, "kerr", backend)
    y0 = np.concatenate([bound_batch(k)] * 3)
    calls = []
    k.integrate(y0, 20.0, progress=lambda done, total: calls.append((done, total)))
    assert calls
    assert all(total == len(y0) for _, total in calls)
    dones = [d for d, _ in calls]
    assert dones == sorted(dones) and dones[-1] == len(y0)


def test_event_selection(shipped, backend):
    """events=None: the spec's horizon event; ["horizon"] the same; [] none, so the photon
    runs past where the horizon event fired."""
    k = _k(shipped, "kerr", backend)
    y0 = scatter_states(k)[-1:]  # the plunging photon
    default = k.integrate(y0, 200.0)
    named = k.integrate(y0, 200.0, events=["horizon"])
    none = k.integrate(y0, 200.0, events=[])
    assert default.status[0] == "horizon" and named.status[0] == "horizon"
    np.testing.assert_array_equal(named.y, default.y)
    assert none.status[0] != "horizon"
    assert none.lam[0] > default.lam[0]
    r_plus = 1 + np.sqrt(1 - 0.9 ** 2)
    assert none.y[0, 1] < 1.01 * r_plus
    assert np.all(np.isfinite(none.y))  # the stopped state is the last finite accepted one


def test_start_on_event_or_outside_domain(shipped, backend):
    """A state that starts with an event expression <= 0 stops at lam = 0 with that status;
    one that starts outside the domain stops with "domain" (contract)."""
    k = _k(shipped, "kerr", backend)
    r_plus = 1 + np.sqrt(1 - 0.9 ** 2)
    y0 = np.array([[0.0, 1.005 * r_plus, 1.0, 0.0, 5.0, -0.1, 0.0, 0.1],  # event g < 0
                   [0.0, 10.0, 0.0, 0.0, 1.2, 0.0, 0.01, 0.0],           # on the axis
                   bound_batch(k)[0]])
    res = k.integrate(y0, 10.0)
    assert status_list(res) == ["horizon", "domain", "done"]
    np.testing.assert_array_equal(res.lam[:2], 0.0)
    np.testing.assert_array_equal(np.asarray(res.steps)[:2], 0)
    np.testing.assert_array_equal(res.y[:2], y0[:2])


@pytest.mark.parametrize("kwargs", [{"events": ["no_such_event"]}, {"method": "rk4"},
                                    {"form": "lagrange"}])
def test_bad_options_raise_value_error(shipped, backend, kwargs):
    k = _k(shipped, "kerr", backend)
    with pytest.raises(ValueError):
        k.integrate(bound_batch(k), 1.0, **kwargs)


@pytest.mark.skipif(not have_compiler(), reason="no C compiler")
def test_thread_count_does_not_change_results(shipped):
    k = shipped["kerr"]["c"]
    y0 = np.concatenate([scatter_states(k)] * 4)
    one = k.integrate(y0, 100.0, threads=1)
    many = k.integrate(y0, 100.0, threads=4)
    np.testing.assert_array_equal(one.y, many.y)
    np.testing.assert_array_equal(np.asarray(one.steps), np.asarray(many.steps))
    assert status_list(one) == status_list(many)


def test_error_power_matches_mpmath():
    """The step-size factor err^expo: DOP853's 1/8 by three square roots stays within 2 ulp
    of the exact root (mpmath), and other exponents go through pow."""
    import mpmath
    from metricc.integrate import error_power
    rng = np.random.default_rng(21)
    err = 10.0 ** rng.uniform(-300, 10, 2000)
    got = error_power(err, 0.125)
    mpmath.mp.prec = 120
    for e, g in zip(err, got):
        exact = mpmath.root(mpmath.mpf(float(e)), 8)
        assert abs(mpmath.mpf(float(g)) - exact) <= 2 * np.spacing(float(exact)), e
    np.testing.assert_array_equal(error_power(err, 0.17), np.power(err, 0.17))


def _infalling_photons(k, n: int) -> np.ndarray:
    """Photons from r = 1000 M in the equatorial plane, aimed almost at the hole (impact
    parameters below 3 M), so they fall in: test inputs of our own."""
    y = np.zeros((n, 8))
    y[:, 1], y[:, 2] = 1000.0, np.pi / 2
    y[:, 4], y[:, 7] = 1.0, np.linspace(0.0, 3.0, n) / 1000.0**2
    y = k.normalize(y, "null", solve_for=1)
    y[:, 5] = -np.abs(y[:, 5])
    return y


def test_step_control_rarely_rejects_on_an_infall():
    """On an infall the error at a fixed step size grows from step to step; DOP853's
    memoryless controller then alternates accepted and rejected steps (about one rejection
    per accepted step here without the predictive factor). With Gustafsson's predictive
    factor (K. Gustafsson, ACM TOMS 20, 1994) fewer than 10% of the attempts are rejected,
    counted by the right-hand-side evaluations (12 per DOP853 attempt)."""
    from metricc.integrate import integrate_numpy
    k = metricc.load(SPECS / "schwarzschild.toml", backend="numpy")
    y0 = _infalling_photons(k, 8)
    rows = []

    def rhs(y, p):
        rows.append(len(y))
        return k.geodesic_rhs(y)

    _, _, status, steps, _ = integrate_numpy(
        rhs, None, y0, 985.0, (), rtol=1e-10, atol=1e-12, max_steps=100000, method="dop853",
        samples=None, stop_codes=np.zeros(0, dtype=np.int32))
    assert np.all(status == 0) and np.all(steps >= 20)
    attempts = (sum(rows) - 2 * len(y0)) / 12      # minus f(y0) and the starting-step probe
    assert attempts < 1.1 * steps.sum(), (attempts, steps.sum())


@pytest.mark.skipif(not have_compiler(), reason="no C compiler")
def test_c_and_numpy_integrators_take_the_same_steps():
    """Both backends run the same algorithm (controller included): the same accepted steps
    and the same end points to the tolerance."""
    kc = metricc.load(SPECS / "kerr.toml", backend="c")
    kn = metricc.load(SPECS / "kerr.toml", backend="numpy")
    y0 = _infalling_photons(kn, 8)
    for method in ("dop853", "dp5"):
        rc = kc.integrate(y0, 990.0, rtol=1e-9, atol=1e-11, method=method)
        rn = kn.integrate(y0, 990.0, rtol=1e-9, atol=1e-11, method=method)
        np.testing.assert_array_equal(rc.steps, rn.steps)
        np.testing.assert_array_equal(rc.status, rn.status)
        np.testing.assert_allclose(rc.y, rn.y, rtol=1e-7, atol=1e-7)
