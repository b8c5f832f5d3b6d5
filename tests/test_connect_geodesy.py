"""The geodetic inverse problem on WGS84 through k.connect, against geographiclib.

Reference: geographiclib's ``Geodesic.WGS84.Inverse`` (C. F. F. Karney, "Algorithms for
geodesics", J. Geodesy 87, 43-55 (2013)), accurate to about 15 nm. Checked: the distance s12
within 0.1 mm, and both azimuths within 1e-9 rad: azi1 at the start, azi2 the forward azimuth
at the arrival point. On the shipped ellipsoid (specs/ellipsoid.toml: geodetic latitude and
longitude in radians, metres, WGS84 defaults) the azimuth of a velocity (dlat, dlon) is
alpha = atan2(N cos(lat) dlon, M dlat), its direction in the orthonormal (east, north) frame
(M, N the meridional and prime-vertical radii of curvature: the metric's own entries).

Domain: the chart excludes the poles (cos(lat) > 0), so every pair is chosen with a geodesic
that stays off them. By Clairaut's relation cos(beta) sin(alpha) is constant along a geodesic
(beta the reduced latitude, tan(beta) = (1 - f) tan(lat)), so the geodesic's highest reduced
latitude (its vertex) is acos(|cos(beta1) sin(alpha1)|); a pair is kept only when that is
below VERTEX_MAX_DEG with alpha1 from geographiclib. (The whole geodesic line then stays
below it, not only the arc between the points.)
"""
from __future__ import annotations

import numpy as np
import pytest

import metricc

from .conftest import SPECS

geodesic = pytest.importorskip("geographiclib.geodesic")
WGS84 = geodesic.Geodesic.WGS84
A, F = 6378137.0, 1 / 298.257223563     # WGS84 (NIMA TR8350.2), the spec's defaults
VERTEX_MAX_DEG = 80.0
# tolerances of k.connect for 0.1 mm at 20,000 km: the arrival mismatch bound tol is
# relative to the path length (1e-12 of 2e7 m is 20 um)
OPTIONS = dict(rtol=1e-13, atol=1e-15, tol=1e-12)
DIST_TOL_M = 1e-4
AZI_TOL_RAD = 1e-9


def vertex_deg(lat1_deg, azi1_deg):
    """Highest reduced latitude (degrees) of the geodesic line (Clairaut)."""
    beta1 = np.arctan((1 - F) * np.tan(np.radians(lat1_deg)))
    return np.degrees(np.arccos(np.abs(np.cos(beta1) * np.sin(np.radians(azi1_deg)))))


def reference_pairs(rng, n, draw):
    """n pairs (lat1, lon1, lat2, lon2) in degrees from draw(rng) whose geodesic stays below
    VERTEX_MAX_DEG, with geographiclib's s12, azi1, azi2."""
    rows = []
    while len(rows) < n:
        lat1, lon1, lat2, lon2 = draw(rng)
        r = WGS84.Inverse(lat1, lon1, lat2, lon2)
        if vertex_deg(lat1, r["azi1"]) < VERTEX_MAX_DEG:
            rows.append((lat1, lon1, lat2, lon2, r["s12"], r["azi1"], r["azi2"]))
    return np.array(rows)


def random_draw(rng):
    return (rng.uniform(-70, 70), rng.uniform(-180, 180), rng.uniform(-70, 70),
            rng.uniform(-180, 180))


def antipodal_draw(rng):
    # nearly antipodal: the second point within a degree or so of the first one's antipode,
    # near the equator (where the geodesic can stay off the poles); the hard case, where
    # many geodesics of nearly equal length join the points
    lat1 = rng.uniform(-3, 3)
    lon1 = rng.uniform(-180, 180)
    return (lat1, lon1, -lat1 + rng.uniform(-0.5, 0.5),
            lon1 + 180 - rng.uniform(0.3, 1.5))


def azimuth(lat, dlat, dlon):
    """Azimuth (radians, clockwise from north) of the velocity (dlat, dlon) at latitude lat
    on the ellipsoid: atan2(N cos(lat) dlon, M dlat)."""
    e2 = F * (2 - F)
    w = np.sqrt(1 - e2 * np.sin(lat) ** 2)
    n, m = A / w, A * (1 - e2) / w ** 3
    return np.arctan2(n * np.cos(lat) * dlon, m * dlat)


def wrapped(d):
    return (d + np.pi) % (2 * np.pi) - np.pi


def check_against_geographiclib(k, rows):
    a = np.radians(rows[:, [0, 1]])
    b = np.radians(rows[:, [2, 3]])
    b[:, 1] = wrapped(b[:, 1])          # the period, not the reference, brings it round
    sol = k.connect(a, b, **OPTIONS)
    assert list(sol.status) == ["converged"] * len(rows)
    dist_err = np.abs(sol.length - rows[:, 4])
    azi1 = azimuth(a[:, 0], sol.y0[:, 2], sol.y0[:, 3])
    azi2 = azimuth(sol.y1[:, 0], sol.y1[:, 2], sol.y1[:, 3])
    azi1_err = np.abs(wrapped(azi1 - np.radians(rows[:, 5])))
    azi2_err = np.abs(wrapped(azi2 - np.radians(rows[:, 6])))
    assert dist_err.max() < DIST_TOL_M, (dist_err.max(), np.argmax(dist_err))
    assert azi1_err.max() < AZI_TOL_RAD, azi1_err.max()
    assert azi2_err.max() < AZI_TOL_RAD, azi2_err.max()
    # the arrival point is the target (longitude modulo 2 pi), to 1e-11 rad (64 um): tol
    # bounds the mismatch relative to the length, 1e-12 of up to 2e7 m
    assert np.abs(sol.y1[:, 0] - b[:, 0]).max() < 1e-11
    assert np.abs(wrapped(sol.y1[:, 1] - b[:, 1])).max() < 1e-11


@pytest.fixture(scope="module")
def ellipsoid():
    return metricc.load(SPECS / "ellipsoid.toml")


def test_random_pairs_against_geographiclib(ellipsoid):
    check_against_geographiclib(ellipsoid, reference_pairs(np.random.default_rng(2013), 120,
                                                           random_draw))


def test_nearly_antipodal_pairs_against_geographiclib(ellipsoid):
    rows = reference_pairs(np.random.default_rng(43), 12, antipodal_draw)
    assert np.all(rows[:, 4] > 19.8e6)       # nearly half a meridian ellipse: the hard case
    check_against_geographiclib(ellipsoid, rows)


def test_the_domain_rule_keeps_pairs_off_the_poles():
    # Clairaut's vertex against geographiclib's own geodesic lines: the highest reduced
    # latitude over a whole circuit (sampled every 10 km) matches the formula, so the arc
    # between the points of a kept pair stays below VERTEX_MAX_DEG too
    rng = np.random.default_rng(7)
    for _ in range(10):
        lat1, azi1 = rng.uniform(-70, 70), rng.uniform(-180, 180)
        line = WGS84.Line(lat1, 0.0, azi1)
        lats = np.array([line.Position(s)["lat2"] for s in np.arange(0, 40_100e3, 10e3)])
        beta = np.degrees(np.arctan((1 - F) * np.tan(np.radians(np.abs(lats)))))
        assert beta.max() == pytest.approx(vertex_deg(lat1, azi1), abs=1e-3)
    rows = reference_pairs(np.random.default_rng(7), 10, random_draw)
    for lat1, lon1, lat2, lon2, s12, _, _ in rows:
        line = WGS84.InverseLine(lat1, lon1, lat2, lon2)
        lats = [line.Position(s)["lat2"] for s in np.linspace(0, s12, 50)]
        assert max(abs(v) for v in lats) < VERTEX_MAX_DEG
