"""Second-order and Hamiltonian forms along whole trajectories (scipy.integrate.solve_ivp).

Both forms are integrated with DOP853 (rtol 1e-11, atol 1e-12) from the same initial state,
[x, u] and [x, p = g u]; they are different ODE systems, so agreement of the positions at
several outputs checks geodesic_rhs against hamilton_rhs globally, not only pointwise.
Closed forms: great circles on the sphere (Napier's rules), circular orbits in Schwarzschild
(Kepler's law in coordinate time) and Kerr (Bardeen, Press & Teukolsky 1972), geodesics on
the WGS84 ellipsoid against geographiclib (Karney 2013), Carter's constant in Kerr.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp

BACKENDS = ("c", "numpy")
RTOL, ATOL = 1e-11, 1e-12
WGS84_A, WGS84_F = 6378137.0, 1 / 298.257223563     # NIMA TR8350.2 (2000), Table 3.1


def kernels_for(shipped, name, backend):
    k = shipped[name][backend]
    if k is None:
        pytest.skip("no C compiler: the C backend is not available")
    return k


def timelike(k, x, spatial, params=None):
    """[x, u] with u = (u^t, spatial) and u^t > 0 solving g(u, u) = -1 (quadratic in u^t)."""
    g = k.metric(np.asarray(x, float), params)
    s = np.asarray(spatial, float)
    A = g[0, 0]
    B = 2 * g[0, 1:] @ s
    C = s @ g[1:, 1:] @ s + 1.0
    ut = (-B - math.sqrt(B * B - 4 * A * C)) / (2 * A)     # A < 0 outside the ergoregion
    assert ut > 0
    return np.concatenate([x, [ut], s])


def solve(fun, y0, lam, atol=ATOL):
    sol = solve_ivp(lambda _, y: fun(y), (lam[0], lam[-1]), y0, method="DOP853", t_eval=lam,
                    rtol=RTOL, atol=atol)
    assert sol.success, sol.message
    return sol.y.T


def ellipsoid_state(lat, lon, azimuth_deg, a=WGS84_A, f=WGS84_F):
    """Unit-speed [x, u] on the ellipsoid (lambda = arc length in metres): u = (cos az / M,
    sin az / (N cos lat)) with the radii of Torge & Mueller, Geodesy, 4th ed. 2012, Sec. 4.1."""
    e2 = f * (2 - f)
    w2 = 1 - e2 * math.sin(lat)**2
    M, N = a * (1 - e2) / w2**1.5, a / math.sqrt(w2)
    az = math.radians(azimuth_deg)
    return np.array([lat, lon, math.cos(az) / M, math.sin(az) / (N * math.cos(lat))])


# Cases: (spec, initial state builder, lambda outputs, atol per component of [x, u] and of
# [x, p], params). The ellipsoid in metres has u ~ 1/a and p = g u ~ a, so a scalar atol of
# 1e-12 would be meaningless for one and too strict for the other: its atol is scaled by the
# size of each component (1e-12 rad on positions, 1e-12/a on u, 1e-12*a on p).
def case(name, k):
    if name == "schwarzschild":
        # eccentric, inclined bound orbit, 10.3 M < r < 12.6 M (several radial periods)
        y0 = timelike(k, np.array([0.0, 12.0, 1.2, 0.3]), [0.02, 0.008, 0.028])
        return y0, np.linspace(0.0, 1500.0, 7), ATOL, ATOL, None
    if name == "kerr":
        # eccentric, inclined bound prograde orbit reaching in to r ~ 4 M
        y0 = timelike(k, np.array([0.0, 9.0, 1.1, -0.5]), [0.02, 0.01, 0.04])
        return y0, np.linspace(0.0, 1200.0, 7), ATOL, ATOL, None
    if name == "sphere":
        y0 = np.array([1.0, 0.2, 0.3, -0.45])
        y0[2:] /= math.sqrt(k.norm(y0, {"R": 2.0}))       # unit speed: lambda = arc length
        return y0, np.linspace(0.0, 40.0, 9), ATOL, ATOL, {"R": 2.0}
    if name == "ellipsoid":
        y0 = ellipsoid_state(0.5, 0.1, 60.0)
        au = np.array([ATOL, ATOL, ATOL / WGS84_A, ATOL / WGS84_A])
        ap = np.array([ATOL, ATOL, ATOL * WGS84_A, ATOL * WGS84_A])
        return y0, np.linspace(0.0, 1.5e7, 7), au, ap, None
    raise KeyError(name)


FORMS = ("schwarzschild", "kerr", "sphere", "ellipsoid")


@pytest.fixture(scope="module")
def trajectories(shipped):
    """(name, backend) -> (kernels, params, y(lambda) geodesic form, z(lambda) Hamiltonian)."""
    cache = {}

    def get(name, backend):
        if (name, backend) not in cache:
            k = kernels_for(shipped, name, backend)
            y0, lam, au, ap, params = case(name, k)
            z0 = k.momenta(y0, params)
            ys = solve(lambda y: k.geodesic_rhs(y, params), y0, lam, au)
            zs = solve(lambda z: k.hamilton_rhs(z, params), z0, lam, ap)
            cache[name, backend] = (k, params, y0, ys, zs)
        return cache[name, backend]
    return get


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("name", FORMS)
def test_second_order_and_hamiltonian_forms_agree(trajectories, name, backend):
    k, params, y0, ys, zs = trajectories(name, backend)
    d = k.dim
    np.testing.assert_array_equal(ys[0], y0)
    # the orbit really moves: every coordinate changes by much more than the tolerance
    assert np.all(np.ptp(ys[:, :d], axis=0) > 1e-3)
    np.testing.assert_allclose(zs[:, :d], ys[:, :d], rtol=1e-8, atol=1e-8)
    # the velocities agree too (u = g^-1 p on the Hamiltonian side)
    uz = k.velocities(zs, params)[:, d:]
    scale = np.max(np.abs(ys[:, d:]))
    np.testing.assert_allclose(uz, ys[:, d:], rtol=1e-7, atol=1e-8 * scale)


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("name", FORMS)
def test_conservation_along_trajectories(trajectories, name, backend):
    k, params, y0, ys, zs = trajectories(name, backend)
    d = k.dim
    g = k.metric(ys[:, :d], params)
    u = ys[:, d:]
    norm_scale = np.einsum("nij,ni,nj->n", abs(g), abs(u), abs(u))
    n0 = k.norm(y0, params)
    assert abs(n0 - (1.0 if k.signature[0] == 0 else -1.0)) < 1e-13 * norm_scale[0]
    assert np.all(np.abs(k.norm(ys, params) - n0) <= 1e-9 * norm_scale)
    # 2H = g^{ab} p_a p_b along the Hamiltonian trajectory
    assert np.all(np.abs(k.momentum_norm(zs, params) - n0) <= 1e-9 * norm_scale)
    c0, cy = k.conserved(y0, params), k.conserved(ys, params)
    cz = k.conserved(k.velocities(zs, params), params)
    assert set(c0) == {f"p_{c}" for c in k.ignorable} and c0
    for key, p0 in c0.items():
        i = k.coordinates.index(key[2:])
        scale = np.einsum("nj,nj->n", abs(g[:, i]), abs(u))
        assert np.all(np.abs(cy[key] - p0) <= 1e-9 * scale), key
        assert np.all(np.abs(cz[key] - p0) <= 1e-9 * scale), key
        # on the Hamiltonian side p_k is a state variable with dp_k/dlambda = 0 exactly
        np.testing.assert_allclose(zs[:, d + i], p0, rtol=1e-14, atol=0)


@pytest.mark.parametrize("backend", BACKENDS)
def test_kerr_carter_constant(trajectories, backend):
    # Carter (1968), Phys. Rev. 174, 1559; e.g. MTW 1973 eq. 33.31 (from memory):
    # Q = p_theta^2 + cos^2 th (a^2 (mu^2 - E^2) + L_z^2 / sin^2 th), mu^2 = -g(u,u), E = -p_t,
    # L_z = p_phi. Not an ignorable momentum, so metricc's conserved() does not know it.
    k, params, y0, ys, zs = trajectories("kerr", backend)
    a = k.parameters["a"]

    def carter(z):
        th = z[:, 2]
        pt, pth, pph = z[:, 4], z[:, 6], z[:, 7]
        mu2 = -k.momentum_norm(z)
        return pth**2 + np.cos(th)**2 * (a**2 * (mu2 - pt**2) + pph**2 / np.sin(th)**2)
    for z in (k.momenta(ys), zs):
        q = carter(z)
        assert abs(q[0]) > 1.0        # an inclined orbit: Q is not trivially zero
        np.testing.assert_allclose(q, q[0], rtol=1e-9)


# -- closed forms ---------------------------------------------------------------------------
@pytest.mark.parametrize("backend", BACKENDS)
def test_great_circle_on_the_sphere(shipped, backend):
    # Start on the equator heading north-east (azimuth alpha = 45 deg from north; north is
    # decreasing colatitude). The right spherical triangle (node, point, foot on the equator)
    # with hypotenuse sigma = s/R and angle 90 deg - alpha at the node gives, by Napier's rules
    # (e.g. Todhunter & Leathem, Spherical Trigonometry, 1901, ch. IV; Smart, Textbook on
    # Spherical Astronomy, 6th ed. 1977, ch. I):
    #   sin(latitude) = sin(sigma) cos(alpha),  tan(dlon) = tan(sigma) sin(alpha).
    k = kernels_for(shipped, "sphere", backend)
    R, alpha, phi0 = 2.0, math.radians(45.0), 0.4
    params = {"R": R}
    y0 = np.array([math.pi / 2, phi0, -math.cos(alpha) / R, math.sin(alpha) / R])   # unit speed
    s = np.linspace(0.0, 2 * math.pi * R, 13)                 # one full great circle
    sigma = s / R
    lat = np.arcsin(np.sin(sigma) * math.cos(alpha))
    lon = phi0 + np.arctan2(np.sin(sigma) * math.sin(alpha), np.cos(sigma))

    def unit(theta, phi):
        return np.stack([np.sin(theta) * np.cos(phi), np.sin(theta) * np.sin(phi),
                         np.cos(theta)], axis=-1)
    want = unit(math.pi / 2 - lat, lon)
    ys = solve(lambda y: k.geodesic_rhs(y, params), y0, s)
    zs = solve(lambda z: k.hamilton_rhs(z, params), k.momenta(y0, params), s)
    for traj in (ys, zs):
        np.testing.assert_allclose(unit(traj[:, 0], traj[:, 1]), want, rtol=0, atol=1e-9)
    np.testing.assert_allclose(k.norm(ys, params), 1.0, rtol=1e-10)


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("M", [1.0, 2.5])
def test_schwarzschild_circular_orbit_kepler(shipped, backend, M):
    # Circular timelike orbits of Schwarzschild obey Kepler's third law exactly in coordinate
    # time, dphi/dt = sqrt(M / r^3) (MTW 1973, ch. 25, eq. 25.18 region, from memory; follows
    # from the radial geodesic equation with dr = 0), and -(1-2M/r) + r^2 Omega^2 = -(1-3M/r)
    # gives u^t = 1/sqrt(1 - 3M/r). r = 10 M is outside the ISCO (6 M), so it is stable.
    k = kernels_for(shipped, "schwarzschild", backend)
    params = {"M": M}
    r = 10.0 * M
    omega = math.sqrt(M / r**3)
    y0 = np.array([0.0, r, math.pi / 2, 0.1, 1.0, 0.0, 0.0, omega])
    y0[4:] /= math.sqrt(-k.norm(y0, params))
    np.testing.assert_allclose(y0[4], 1 / math.sqrt(1 - 3 * M / r), rtol=1e-14)
    # pointwise: a circular orbit has no radial acceleration
    acc = k.geodesic_rhs(y0, params)[4:]
    assert np.all(np.abs(acc) <= 1e-15 * np.max(np.abs(y0[4:])) / M)
    period = 2 * math.pi / omega / y0[4]                      # in proper time
    lam = np.linspace(0.0, 3 * period, 10)
    for traj in (solve(lambda y: k.geodesic_rhs(y, params), y0, lam),
                 k.velocities(solve(lambda z: k.hamilton_rhs(z, params),
                                    k.momenta(y0, params), lam), params)):
        np.testing.assert_allclose(traj[:, 1], r, rtol=1e-9)
        # cos(pi/2) ~ 6e-17 in doubles, so theta drifts by ~1e-12 (not a bug)
        np.testing.assert_allclose(traj[:, 2], math.pi / 2, rtol=0, atol=1e-10)
        np.testing.assert_allclose(traj[:, 0], y0[4] * lam, rtol=1e-9)
        np.testing.assert_allclose(traj[1:, 3] - y0[3], omega * traj[1:, 0], rtol=1e-9)


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("spin", [0.9, -0.5])
def test_kerr_circular_equatorial_orbit(shipped, backend, spin):
    # Bardeen, Press & Teukolsky 1972, ApJ 178, 347, eqs. 2.12-2.16 (numbers from memory),
    # prograde for a > 0 (retrograde is the same with a -> -a): Omega = M^1/2 / (r^3/2 + a M^1/2),
    # E = (r^3/2 - 2M r^1/2 + a M^1/2) / D, L = M^1/2 (r^2 - 2a M^1/2 r^1/2 + a^2) / D,
    # u^t = (r^3/2 + a M^1/2) / D, D = r^3/4 (r^3/2 - 3M r^1/2 + 2a M^1/2)^1/2.
    k = kernels_for(shipped, "kerr", backend)
    M, a, r = 1.0, spin, 10.0
    params = {"M": M, "a": a}
    sq = math.sqrt(M)
    D = r**0.75 * math.sqrt(r**1.5 - 3 * M * math.sqrt(r) + 2 * a * sq)
    omega = sq / (r**1.5 + a * sq)
    ut = (r**1.5 + a * sq) / D
    y0 = np.array([0.0, r, math.pi / 2, 0.0, ut, 0.0, 0.0, omega * ut])
    np.testing.assert_allclose(k.norm(y0, params), -1.0, rtol=1e-13)
    cons = k.conserved(y0, params)
    np.testing.assert_allclose(-cons["p_t"], (r**1.5 - 2 * M * math.sqrt(r) + a * sq) / D,
                               rtol=1e-13)
    np.testing.assert_allclose(cons["p_phi"], sq * (r**2 - 2 * a * sq * math.sqrt(r) + a**2) / D,
                               rtol=1e-13)
    assert np.all(np.abs(k.geodesic_rhs(y0, params)[4:]) <= 1e-15 * ut)
    lam = np.linspace(0.0, 3 * 2 * math.pi / omega / ut, 8)
    traj = solve(lambda y: k.geodesic_rhs(y, params), y0, lam)
    np.testing.assert_allclose(traj[:, 1], r, rtol=1e-9)
    np.testing.assert_allclose(traj[1:, 3], omega * traj[1:, 0], rtol=1e-9)


@pytest.mark.parametrize("backend", BACKENDS)
def test_ellipsoid_geodesic_matches_geographiclib(trajectories, backend):
    # The solve_ivp geodesic on WGS84 (lambda = arc length in metres) against geographiclib's
    # direct problem (Karney 2013, J. Geodesy 87, 43; accurate to ~15 nm) at every output.
    geodesic = pytest.importorskip("geographiclib.geodesic")
    k, params, y0, ys, zs = trajectories("ellipsoid", backend)
    lam = case("ellipsoid", k)[1]
    azimuth = 60.0      # as in case("ellipsoid")
    for s, y, z in zip(lam, ys, zs):
        out = geodesic.Geodesic.WGS84.Direct(math.degrees(y0[0]), math.degrees(y0[1]),
                                             azimuth, float(s))
        want = np.radians([out["lat2"], out["lon2"]])
        for got in (y[:2], z[:2]):
            dlon = (got[1] - want[1] + math.pi) % (2 * math.pi) - math.pi
            # 1e-10 rad ~ 0.6 mm on the ground after up to 15000 km (observed ~2e-12)
            assert abs(got[0] - want[0]) < 1e-10 and abs(dlon) < 1e-10, (s, got, want)
