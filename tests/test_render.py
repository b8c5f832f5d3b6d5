"""metricc.render: black-hole images (``render shadow``) and fans of geodesics (``render fan``).

References (cited again where each value is used):

* Synge (1966), MNRAS 131, 463 (also MTW 1973, box 25.7): a static observer at r_o sees the
  Schwarzschild shadow with angular radius sin(alpha) = 3 sqrt(3) M sqrt(1 - 2M/r_o) / r_o,
  measured from the inward radial direction (critical impact parameter 3 sqrt(3) M).
* Equatorial circular photon orbits of Kerr: critical impact parameters
  b = -a +- 6M cos[(1/3) arccos(-+ a/M)] (upper signs prograde), the photon-orbit radii being
  r = 2M {1 + cos[(2/3) arccos(-+ a/M)]} (Bardeen, Press & Teukolsky 1972, eq. 2.18;
  Chandrasekhar 1983, The Mathematical Theory of Black Holes, ch. 7). Quoted from memory;
  checked here at a = 0 (b = 3 sqrt(3) M) and a = M (b = 2M and -7M).
* Bardeen, Press & Teukolsky (1972), ApJ 178, 347, eqs. 2.12-2.21: prograde circular
  equatorial orbits of Kerr, Omega = M^(1/2) / (r^(3/2) + a M^(1/2)),
  u^t = (r^(3/2) + a M^(1/2)) / (r^(3/4) sqrt(r^(3/2) - 3M r^(1/2) + 2a M^(1/2))), and the
  innermost stable orbit r_ms = M {3 + Z2 - sqrt((3 - Z1)(3 + Z1 + 2 Z2))},
  Z1 = 1 + (1 - a^2/M^2)^(1/3) [(1 + a/M)^(1/3) + (1 - a/M)^(1/3)], Z2 = sqrt(3 a^2/M^2 + Z1^2).
* Redshift of light from an emitter with 4-velocity u_em seen by an observer u_obs:
  g = nu_obs / nu_em = (p . u_obs) / (p . u_em) (MTW 1973, eq. 22.?; any GR text); with the
  conserved E = -p_t, L = p_phi and b = L / E, for a static observer at r_o on the equator
  g = 1 / (sqrt(-g_tt(r_o)) u^t (1 - Omega b)).

Camera convention (metricc.observers.camera and render_shadow): the camera sits at
phi = 0 and looks toward the hole (forward = -e_r); up = -e_theta points toward the spin axis,
and the column index increases along forward x up = +e_phi. With the hole (and the disk)
rotating toward +phi, a point on the +e_phi side of the image (right, large column) moves
away from the camera, and one on the -e_phi side (left, small column) moves toward it: the
LEFT side is the approaching one. Photons reaching the camera from the left carry
L_z = x p_y - y p_x > 0 (they pass at y < 0 moving toward +x): they are prograde, so the left
edge of the shadow sits at the prograde critical impact parameter (the smaller one), nearer
the image centre than the right edge (retrograde), and the dark region's centroid is
displaced to the right.
"""
from __future__ import annotations

import argparse
import contextlib
import io
import math
import sys

import numpy as np
import pytest

import metricc
from metricc import render
from tests.conftest import SPECS, have_compiler

BACKEND = "c" if have_compiler() else "numpy"
PI = math.pi


@pytest.fixture(scope="module")
def schw():
    return metricc.load(SPECS / "schwarzschild.toml", backend=BACKEND)


@pytest.fixture(scope="module")
def kerr():
    return metricc.load(SPECS / "kerr.toml", backend=BACKEND)


@pytest.fixture(scope="module")
def mink():
    return metricc.load(SPECS / "minkowski.toml", backend=BACKEND)


def column_of(sx, half, w):
    """Continuous column index (pixel centres at 0, 1, ...) of the image-plane coordinate sx
    (tangent of the angle from forward, as metricc.observers.camera lays pixels out)."""
    return (sx / half + 1.0) / 2.0 * w - 0.5


def dark_edges(row):
    """(left, right) edges of the single dark run in a boolean row, as continuous column
    positions halfway between the last bright and the first dark pixel centres."""
    cols = np.nonzero(row)[0]
    assert cols.size > 0, "no dark pixels"
    assert np.all(np.diff(cols) == 1), f"the dark region is not one run: {cols}"
    return cols[0] - 0.5, cols[-1] + 0.5


# ------------------------------------------------------------------------------------------
# Shadows
# ------------------------------------------------------------------------------------------
def test_schwarzschild_shadow_radius(schw):
    D, n = 1000.0, 101
    fov = 0.04   # rad: about 4 times the shadow's diameter 2 * 5.2 M / 1000
    img = render.render_shadow(schw, D, 90.0, math.degrees(fov), (n, n))
    half = math.tan(fov / 2)
    assert img.pixel_angle == pytest.approx(2 * half / n)
    # Synge (1966): sin(alpha) = 3 sqrt(3) M sqrt(1 - 2M/r_o) / r_o
    alpha = math.asin(3 * math.sqrt(3) * math.sqrt(1 - 2 / D) / D)
    expect_left = column_of(-math.tan(alpha), half, n)
    expect_right = column_of(math.tan(alpha), half, n)
    radius_px = math.tan(alpha) / img.pixel_angle
    assert 12 < radius_px < 14      # the shadow spans many pixels
    c = n // 2
    for line in (img.captured[c, :], img.captured[:, c]):
        left, right = dark_edges(line)
        assert abs(left - expect_left) <= 1.0
        assert abs(right - expect_right) <= 1.0
        assert abs((right - left) / 2 - radius_px) <= 1.0
    # captured pixels are black; the rest is the sky (not black)
    assert np.all(img.rgb[img.captured] == 0)
    assert np.all(img.escaped == ~img.captured)
    assert np.all(img.rgb[img.escaped].max(axis=-1) > 0.05)
    # the dark region is round and centred
    yy, xx = np.nonzero(img.captured)
    assert abs(xx.mean() - c) < 0.3 and abs(yy.mean() - c) < 0.3
    area_radius = math.sqrt(img.captured.sum() / PI)
    assert abs(area_radius - radius_px) < 0.7
    assert not img.disk_hit.any() and np.all(np.isnan(img.redshift))


def kerr_critical_b(a, M=1.0):
    """(prograde, retrograde) equatorial critical impact parameters L/E of Kerr
    (BPT 1972; Chandrasekhar 1983, ch. 7; from memory, checked at a = 0 and a = M below)."""
    pro = -a + 6 * M * math.cos(math.acos(-a / M) / 3)
    retro = -a - 6 * M * math.cos(math.acos(a / M) / 3)
    return pro, retro


def test_kerr_critical_impact_parameters_limits():
    assert kerr_critical_b(0.0) == pytest.approx((3 * math.sqrt(3), -3 * math.sqrt(3)))
    assert kerr_critical_b(1.0) == pytest.approx((2.0, -7.0))


def camera_sx_of_photon(k, x, b, params=None):
    """Image-plane coordinate sx (tangent of the angle from forward, positive to the right)
    at which a static camera at x on the equator sees an equatorial photon with E = 1,
    L_z = b arriving from the hole: the camera looks along d = -n, n the photon's local
    direction, and sx = (d . e_phi) / (d . (-e_r)) = -n_phi / n_r."""
    ginv = k.inverse_metric(x, params)
    # p = (-1, p_r, 0, b) with g^{mu nu} p_mu p_nu = 0 and p^r > 0 (outgoing at the camera)
    A = ginv[1, 1]
    rest = ginv[0, 0] - 2 * ginv[0, 3] * b + ginv[3, 3] * b * b
    p = np.array([-1.0, math.sqrt(-rest / A), 0.0, b])
    e = k.frame(x, "static", params)
    loc = e @ p                   # p_(a) = e_(a)^mu p_mu; spatial p^(a) = p_(a)
    return -loc[3] / loc[1]


def test_kerr_edge_on_shadow_is_asymmetric(kerr):
    a, D = 0.9, 1000.0
    h, w = 81, 121
    fov = 0.024
    img = render.render_shadow(kerr, D, 90.0, math.degrees(fov), (h, w), params={"a": a})
    half = math.tan(fov / 2)
    x = np.array([0.0, D, PI / 2, 0.0])
    b_pro, b_retro = kerr_critical_b(a)
    assert b_pro == pytest.approx(2.846, abs=2e-3) and b_retro == pytest.approx(-6.832, abs=2e-3)
    # prograde photons (L_z > 0) arrive from the left (see the module docstring)
    left_expect = column_of(camera_sx_of_photon(kerr, x, b_pro, {"a": a}), half, w)
    right_expect = column_of(camera_sx_of_photon(kerr, x, b_retro, {"a": a}), half, w)
    centre = (w - 1) / 2
    assert left_expect < centre < right_expect
    assert centre - left_expect < right_expect - centre     # approaching edge nearer centre
    left, right = dark_edges(img.captured[h // 2])
    assert abs(left - left_expect) <= 1.5
    assert abs(right - right_expect) <= 1.5
    # the dark region's centroid is displaced horizontally toward the receding (right) side
    yy, xx = np.nonzero(img.captured)
    shift = (left_expect + right_expect) / 2 - centre    # about 1.99 M = 10 pixels
    assert shift > 8
    assert xx.mean() - centre > 0.6 * shift
    assert abs(yy.mean() - (h - 1) / 2) < 0.3               # and symmetric up-down


def test_kerr_image_mirrors_with_the_spin(kerr):
    """a -> -a mirrors the image left-right (a check that the spin enters the rays)."""
    kw = dict(distance=1000.0, inclination=90.0, fov=math.degrees(0.024), shape=(9, 121))
    plus = render.render_shadow(kerr, params={"a": 0.9}, **kw).captured[4]
    minus = render.render_shadow(kerr, params={"a": -0.9}, **kw).captured[4]
    assert np.array_equal(plus, minus[::-1])
    assert not np.array_equal(plus, plus[::-1])


# ------------------------------------------------------------------------------------------
# Circular orbits, ISCO and the disk
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("a", [0.0, 0.5, 0.9, 0.99, -0.6])
def test_circular_orbits_match_bpt(kerr, a):
    M = 1.3
    # from just outside the prograde photon orbit r = 2M {1 + cos[(2/3) arccos(-a/M)]} (BPT)
    r_ph = 2 * (1 + math.cos(2 / 3 * math.acos(-a)))
    r = np.array([1.05 * r_ph, 2.0 * r_ph, 6.0, 20.0, 150.0]) * M
    omega, ut = render.circular_orbit(kerr, r, {"M": M, "a": a * M})
    # BPT (1972) eqs. 2.16 and 2.12-2.13 (Omega > 0 orbits; for a < 0 these are retrograde)
    sm = math.sqrt(M)
    om_bpt = sm / (r ** 1.5 + a * M * sm)
    ut_bpt = (r ** 1.5 + a * M * sm) / (r ** 0.75 * np.sqrt(r ** 1.5 - 3 * M * r ** 0.5
                                                           + 2 * a * M * sm))
    np.testing.assert_allclose(omega, om_bpt, rtol=1e-8)
    np.testing.assert_allclose(ut, ut_bpt, rtol=1e-8)


def test_no_circular_orbit_inside_the_photon_orbit(schw):
    omega, ut = render.circular_orbit(schw, np.array([2.5, 2.9, 3.1]))
    assert np.isnan(ut[0]) and np.isnan(ut[1]) and np.isfinite(ut[2])


@pytest.mark.parametrize("a", [0.0, 0.5, 0.9])
def test_isco_matches_bpt(kerr, a):
    Z1 = 1 + (1 - a * a) ** (1 / 3) * ((1 + a) ** (1 / 3) + (1 - a) ** (1 / 3))
    Z2 = math.sqrt(3 * a * a + Z1 * Z1)
    r_ms = 3 + Z2 - math.sqrt((3 - Z1) * (3 + Z1 + 2 * Z2))     # BPT (1972) eq. 2.21
    assert render.isco(kerr, {"a": a}) == pytest.approx(r_ms, rel=1e-3)


def test_isco_schwarzschild_scales_with_mass(schw):
    assert render.isco(schw, {"M": 1.5}) == pytest.approx(9.0, rel=1e-3)    # 6 M


@pytest.fixture(scope="module")
def disk_image(kerr):
    a = 0.9
    r_in = render.isco(kerr, {"a": a})
    img = render.render_shadow(kerr, 200.0, 80.0, None, (41, 81), disk=(r_in, 12.0),
                               params={"a": a}, source=SPECS / "kerr.toml")
    return img, a, r_in


def test_disk_redshift_sides(disk_image):
    img, a, r_in = disk_image
    h, w = img.shape
    assert img.disk_hit.sum() > 0.2 * h * w
    g = img.redshift
    assert np.all(np.isfinite(g[img.disk_hit])) and np.all(np.isnan(g[~img.disk_hit]))
    left, right = g[:, : w // 2 - 2], g[:, w // 2 + 3:]
    # the left side approaches the camera (module docstring): blueshift somewhere there,
    # redshift on the receding right side
    assert np.nanmax(left) > 1.1
    assert np.nanmin(right) < 0.9
    assert np.nanmax(right) < 1.0
    assert np.nanmax(left) > np.nanmax(right) + 0.2
    # colours: bluer where g > 1, redder where g < 1
    rgb = img.rgb[img.disk_hit]
    gh = g[img.disk_hit]
    blue = gh > 1.15
    red = gh < 0.85
    assert blue.any() and red.any()
    ratio = rgb[:, 2] / rgb[:, 0]          # blue / red, independent of the brightness
    assert ratio[blue].min() > ratio[red].max()
    # the disk hits lie in the disk
    r_hit = img.disk_radius[img.disk_hit]
    assert np.all((r_hit > r_in) & (r_hit < 12.0))
    th = img.final[img.disk_hit][:, 2]
    np.testing.assert_allclose(np.cos(th), 0.0, atol=1e-8)


def test_disk_redshift_values(kerr, disk_image):
    """g of every disk pixel against g = 1 / (sqrt(-g_tt(r_o)) u^t (1 - Omega b)) with BPT's
    Omega and u^t and b = L / E of the photon (conserved, read from the ray's state)."""
    img, a, r_in = disk_image
    D = 200.0
    y = img.final[img.disk_hit]
    r = y[:, 1]
    c = kerr.conserved(y, {"a": a})
    # the physical photon's momentum is future-pointing: p = sign(u^t) p_ray
    sign = np.sign(y[:, 4])
    E, L = -sign * c["p_t"], sign * c["p_phi"]
    assert np.all(E > 0)
    b = L / E
    om = 1 / (r ** 1.5 + a)
    ut = (r ** 1.5 + a) / (r ** 0.75 * np.sqrt(r ** 1.5 - 3 * r ** 0.5 + 2 * a))
    g_expect = 1 / (math.sqrt(1 - 2 / D) * ut * (1 - om * b))
    np.testing.assert_allclose(img.redshift[img.disk_hit], g_expect, rtol=1e-6)


def test_plane_events_are_added_to_spec_text():
    for name in ("minkowski", "kerr"):
        text = (SPECS / f"{name}.toml").read_text()
        k_events = metricc.load_spec(SPECS / f"{name}.toml").events
        new = render._with_plane_events(text, "theta", [e for e, _ in k_events])
        spec = metricc.parse_spec(new)
        names = [e for e, _ in spec.events]
        assert names[: len(k_events)] == [e for e, _ in k_events] or \
            set(names) >= {e for e, _ in k_events}
        assert set(render.PLANE_EVENTS) <= set(names)


def test_shadow_errors(kerr, mink):
    sphere = metricc.load(SPECS / "sphere.toml", backend=BACKEND)
    with pytest.raises(ValueError, match="4-dimensional"):
        render.render_shadow(sphere, 100, 80, 10, (4, 4))
    with pytest.raises(ValueError, match="inclination"):
        render.render_shadow(kerr, 100, 0.0, 10, (4, 4))
    with pytest.raises(ValueError, match="circular orbit"):
        render.render_shadow(kerr, 100, 80, 10, (4, 4), disk=(1.5, 10), params={"a": 0.0},
                             source=SPECS / "kerr.toml")
    with pytest.raises(ValueError, match="source"):
        render.render_shadow(kerr, 100, 80, 10, (4, 4), disk=(6, 10))
    ks = metricc.load(SPECS / "kerr_schild.toml", backend=BACKEND)
    with pytest.raises(ValueError, match="named r and theta"):
        render.render_shadow(ks, 100, 80, 10, (4, 4))


def test_shadow_png_and_progress(schw, tmp_path):
    pytest.importorskip("matplotlib")
    from matplotlib.image import imread
    calls = []
    img = render.render_shadow(schw, 100.0, 60.0, 30.0, (15, 21),
                               progress=lambda d, t: calls.append((d, t)))
    assert calls and calls[-1] == (15 * 21, 15 * 21)
    assert all(d < t for d, t in calls[:-1])
    out = img.save(tmp_path / "s.png")
    back = imread(out)
    assert back.shape[:2] == (15, 21)
    np.testing.assert_allclose(back[7, 10, :3], 0.0)                    # the shadow
    np.testing.assert_allclose(back[..., :3], img.rgb, atol=1 / 255 + 1e-9)


# ------------------------------------------------------------------------------------------
# Fans
# ------------------------------------------------------------------------------------------
def test_minkowski_fan_is_straight(mink, tmp_path):
    pytest.importorskip("matplotlib")
    from matplotlib.image import imread
    at = (0.0, 5.0, PI / 2, 0.0)
    fan = render.render_fan(mink, at, ("r", "phi"), True, 12, 10.0, "null", samples=200)
    assert len(fan.xy) == 12
    straight = 0
    for psi, pts, status in zip(fan.launch, fan.xy, fan.status):
        assert np.all(np.isfinite(pts)) and len(pts) >= 2
        # a straight line from (5, 0) along (cos psi, sin psi) (e_r = x, e_phi = y at phi = 0)
        rel = pts - np.array([5.0, 0.0])
        along = rel @ np.array([math.cos(psi), math.sin(psi)])
        across = rel @ np.array([-math.sin(psi), math.cos(psi)])
        assert np.max(np.abs(across)) < 1e-7
        assert np.all(np.diff(along) > 0)
        if status == "done":
            straight += 1
            assert along[-1] == pytest.approx(10.0, rel=1e-8)   # null: distance = lambda
            np.testing.assert_allclose(along, fan.lam[: len(along)], atol=1e-7)
    assert straight >= 11        # only the ray aimed at r = 0 may stop
    out = fan.save(tmp_path / "fan.png")
    assert imread(out).shape[0] > 100
    ax = fan.figure().axes[0]
    assert ax.get_xlabel() == "r cos(phi)" and ax.get_ylabel() == "r sin(phi)"


def test_sphere_fan_great_circles(tmp_path):
    pytest.importorskip("matplotlib")
    sphere = metricc.load(SPECS / "sphere.toml", backend=BACKEND)
    fan = render.render_fan(sphere, (1.0, 0.3), None, False, 6, 2.5, None, samples=100)
    assert fan.kind == "unit" and fan.axes == ("theta", "phi")
    for pts in fan.trajectories:
        th, ph = pts[:, 0], pts[:, 1]
        X = np.stack([np.sin(th) * np.cos(ph), np.sin(th) * np.sin(ph), np.cos(th)], -1)
        n = np.cross(X[0], X[len(X) // 2])
        n /= np.linalg.norm(n)
        np.testing.assert_allclose(X @ n, 0.0, atol=1e-8)       # a great circle
    ax = fan.figure().axes[0]
    assert (ax.get_xlabel(), ax.get_ylabel()) == ("theta", "phi")


def test_schwarzschild_fan_stops_at_horizon(schw):
    fan = render.render_fan(schw, (0, 6.0, PI / 2, 0), ("r", "phi"), True, 8, 60.0, "null",
                            samples=300)
    assert "horizon" in set(fan.status) and "done" in set(fan.status)
    for pts, st in zip(fan.trajectories, fan.status):
        if st == "horizon":
            assert pts[-1, 1] == pytest.approx(2.02, rel=1e-6)   # plotted up to the stop
    assert fan.stop_radius == pytest.approx(2.02, abs=0.01)
    # timelike fan along the time axis: speeds spread over (-speed, speed)
    tf = render.render_fan(schw, (0, 10.0, PI / 2, 0), ("r", "t"), False, 5, 5.0, "timelike",
                           speed=0.4, samples=20)
    np.testing.assert_allclose(tf.launch, np.linspace(-0.4, 0.4, 5))
    np.testing.assert_allclose(schw.norm(tf.samples[:, 0]), -1.0, atol=1e-12)


def test_fan_errors(mink):
    with pytest.raises(ValueError, match="unknown coordinate"):
        render.render_fan(mink, (0, 5, 1.5, 0), ("r", "psi"), False, 3, 1.0, None)
    with pytest.raises(ValueError, match="outside"):
        render.render_fan(mink, (0, -5, 1.5, 0), ("r", "phi"), False, 3, 1.0, None)
    with pytest.raises(ValueError, match="4 coordinates"):
        render.render_fan(mink, (0, 5), ("r", "phi"), False, 3, 1.0, None)
    sphere = metricc.load(SPECS / "sphere.toml", backend=BACKEND)
    with pytest.raises(ValueError, match="Riemannian"):
        render.render_fan(sphere, (1.0, 0.3), None, False, 3, 1.0, "null")


# ------------------------------------------------------------------------------------------
# Command line
# ------------------------------------------------------------------------------------------
def _cli_has_render():
    from metricc import cli
    parser = cli._parser()
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction) and "render" in action.choices:
            return True
    return False


def run_cli(argv):
    """Run ``metricc render ...`` through metricc.cli.main when the lead has wired it, else
    through metricc.render's own parser; returns (status, stdout, stderr)."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        if _cli_has_render():
            from metricc import cli
            rc = cli.main(argv)
        else:
            rc = render.main(argv)
    return rc, out.getvalue(), err.getvalue()


def test_cli_shadow_and_fan(tmp_path):
    pytest.importorskip("matplotlib")
    from matplotlib.image import imread
    png = tmp_path / "hole.png"
    rc, out, err = run_cli(["render", "shadow", str(SPECS / "kerr.toml"), "--out", str(png),
                            "--distance", "60", "--inclination", "85", "--size", "33x21",
                            "--disk", "--param", "a=0.7", "--no-progress"])
    assert rc == 0, err
    assert out.strip().endswith(str(png))
    assert "disk" in out
    img = imread(png)
    assert img.shape[:2] == (21, 33)
    fan_png = tmp_path / "fan.png"
    rc, out, err = run_cli(["render", "fan", str(SPECS / "schwarzschild.toml"), "--out",
                            str(fan_png), "--at", "0,20,pi/2,0", "--axes", "r,phi", "--polar",
                            "--kind", "timelike", "--rays", "3", "--speed", "0.2",
                            "--lam", "300", "--samples", "50"])
    assert rc == 0, err
    assert out.strip().endswith(str(fan_png)) and fan_png.stat().st_size > 1000


def test_cli_errors(tmp_path):
    rc, out, err = run_cli(["render", "shadow", str(SPECS / "kerr.toml"), "--out",
                            str(tmp_path / "x.png"), "--size", "big"])
    assert rc == 1 and "--size" in err and "Traceback" not in err
    rc, out, err = run_cli(["render", "shadow", str(SPECS / "sphere.toml"), "--out",
                            str(tmp_path / "x.png")])
    assert rc == 1 and "4-dimensional" in err and len(err.strip().splitlines()) == 1
    rc, out, err = run_cli(["render", "fan", str(SPECS / "minkowski.toml"), "--out",
                            str(tmp_path / "x.png"), "--at", "0,1,2"])
    assert rc == 1 and "4 coordinates" in err
    rc, out, err = run_cli(["render", "fan", str(SPECS / "minkowski.toml"), "--out",
                            str(tmp_path / "x.png"), "--at", "0,5,pi/2,0", "--param", "M"])
    assert rc == 1 and "NAME=VALUE" in err
    assert not (tmp_path / "x.png").exists()


def test_missing_matplotlib_is_a_clear_error(monkeypatch, tmp_path, schw):
    monkeypatch.setitem(sys.modules, "matplotlib", None)
    img = render.render_shadow(schw, 100.0, 60.0, 30.0, (3, 3))     # computing needs no mpl
    with pytest.raises(metricc.BuildError, match="pip install matplotlib"):
        img.save(tmp_path / "x.png")
    rc, out, err = run_cli(["render", "shadow", str(SPECS / "schwarzschild.toml"), "--out",
                            str(tmp_path / "x.png")])
    assert rc == 1 and "pip install matplotlib" in err


def test_number_parser():
    assert render._number("pi/2") == pytest.approx(PI / 2)
    assert render._number("-pi/4") == pytest.approx(-PI / 4)
    assert render._number("2*pi") == pytest.approx(2 * PI)
    assert render._number("1.5") == 1.5
    with pytest.raises(ValueError):
        render._number("pie")


# -- fan defaults from the spec's scale, degrees, wrapping (issue 12) ------------------------
def test_fan_default_lam_follows_the_spec_scale():
    # The old fixed default (lam = 20) drew 20-metre geodesics on the WGS84 ellipsoid. The
    # default is now twice the start's length scale: sqrt(g_ii) * max(|x_i|, 1).
    ell = metricc.load(SPECS / "ellipsoid.toml", backend="numpy")
    fan = render.render_fan(ell, (0.5, 0.2), None, False, 4, samples=20)
    # one radian of latitude is the meridional radius of curvature, 6,335 to 6,400 km on
    # WGS84 (common practice): lam = 2 * M(0.5) ~ 12,700 km, a third of a meridian
    assert 1.2e7 < fan.lam[-1] < 1.3e7
    assert np.max(np.abs(fan.xy[0][:, 0] - 0.5)) > 0.1           # moves by > 0.1 rad
    schw = metricc.load(SPECS / "schwarzschild.toml", backend="numpy")
    fan = render.render_fan(schw, (0, 10.0, PI / 2, 0), ("r", "phi"), True, 4, samples=20)
    # 2 * sqrt(g_rr) * r0 = 2 * 10 / sqrt(1 - 2/10) = 22.36 (M = 1)
    assert fan.lam[-1] == pytest.approx(20 / math.sqrt(0.8), rel=1e-12)


def test_fan_wraps_azimuths_and_breaks_lines_at_the_seam():
    sphere = metricc.load(SPECS / "sphere.toml", backend="numpy")
    fan = render.render_fan(sphere, (1.0, 3.0), None, False, 6, 20.0, samples=400)
    assert fan.wrapped == ("phi",)
    raw = np.concatenate([p[:, 1] for p in fan.trajectories])
    assert raw.max() > np.pi or raw.min() < -np.pi               # the geodesics go round
    for pts in fan.xy:
        phi = pts[:, 1][np.isfinite(pts[:, 1])]
        assert np.all((-np.pi <= phi) & (phi < np.pi))
        step = np.abs(np.diff(pts[:, 1]))
        assert np.all(step[np.isfinite(step)] < np.pi)           # no line across the plot
    assert any(np.isnan(p[:, 1]).any() for p in fan.xy)
    off = render.render_fan(sphere, (1.0, 3.0), None, False, 6, 20.0, samples=400, wrap=())
    assert max(np.nanmax(np.abs(p[:, 1])) for p in off.xy) > np.pi


def test_fan_degrees_and_plain_tick_labels(tmp_path):
    pytest.importorskip("matplotlib")
    png = tmp_path / "ell.png"
    rc, out, err = run_cli(["render", "fan", str(SPECS / "ellipsoid.toml"), "--out", str(png),
                            "--at", "30,10", "--degrees", "lat,lon", "--rays", "3",
                            "--samples", "20", "--no-progress"])
    assert rc == 0, err
    ell = metricc.load(SPECS / "ellipsoid.toml", backend="numpy")
    fan = render.render_fan(ell, (math.radians(30), math.radians(10)), None, False, 3,
                            samples=20, degrees=("lat", "lon"))
    np.testing.assert_allclose(fan.xy[0][0], [30.0, 10.0], rtol=1e-12)
    ax = fan.figure().axes[0]
    assert ax.get_xlabel() == "lat (degrees)" and ax.get_ylabel() == "lon (degrees)"
    # no "1e-6 + 0.5" offset on the axes
    assert not ax.xaxis.get_major_formatter().get_useOffset()
    assert not ax.yaxis.get_major_formatter().get_useOffset()
    rc, out, err = run_cli(["render", "fan", str(SPECS / "ellipsoid.toml"), "--out", str(png),
                            "--at", "30,10", "--degrees", "height"])
    assert rc == 1 and "--degrees" in err and "Traceback" not in err
