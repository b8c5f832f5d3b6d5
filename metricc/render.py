"""Pictures from a spec: ``metricc render shadow`` (a black-hole image) and ``metricc render
fan`` (a plot of a fan of geodesics).

* :func:`render_shadow` traces one null geodesic per pixel of a pinhole camera held by a static
  (or zero-angular-momentum) observer at (t, r, theta, phi) = (0, distance, inclination, 0),
  backwards into the scene. Rays stopped by one of the spec's ``[events]`` or by its
  ``[domain]`` are captured (black); rays that get far away show a procedural checkerboard sky.
  An optional thin disk in the plane theta = pi/2 (r_in < r < r_out) is made of gas on
  prograde circular geodesic orbits; it is shaded by g^4 and coloured by the redshift factor
  g = nu_obs / nu_em.
* :func:`render_fan` launches a fan of geodesics from one point in the plane of two chosen
  coordinates and plots those two coordinates (or, with ``polar``, r cos(phi), r sin(phi)).

Only numpy is needed to compute; matplotlib (optional: ``pip install matplotlib``) is imported
when a picture is written. Conventions follow :mod:`metricc.observers` (the camera's rays
point into the scene, so they are integrated with a positive affine parameter).
"""
from __future__ import annotations

import math
import re
import sys
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import BuildError

__all__ = ["ShadowImage", "FanPlot", "render_shadow", "render_fan", "circular_orbit", "isco",
           "add_parser", "run"]

# Colours (RGB in [0, 1]).
SKY_A = np.array([0.09, 0.11, 0.19])
SKY_B = np.array([0.19, 0.23, 0.34])
DISK_RED = np.array([1.00, 0.30, 0.08])     # g well below 1
DISK_WARM = np.array([1.00, 0.82, 0.55])    # g = 1
DISK_BLUE = np.array([0.55, 0.72, 1.00])    # g well above 1
# A tiny roll of the camera about its forward direction (radians), so that no pixel's ray
# lies exactly in a plane through the polar axis: such a ray has p_phi = 0 and runs into the
# coordinate singularity theta = 0 (the [domain] stops it there). With the roll, the ray
# passes the axis at an angle of about this size; the picture turns by 1e-4 rad, far below a
# pixel.
CAMERA_ROLL = 1e-4
PLANE_EVENTS = ("render_plane_upper", "render_plane_lower")


def _need_matplotlib():
    try:
        import matplotlib
    except ImportError:
        raise BuildError("writing pictures needs matplotlib, which is not installed: "
                         "pip install matplotlib") from None
    return matplotlib


# ------------------------------------------------------------------------------------------
# Geometry helpers
# ------------------------------------------------------------------------------------------
def _spherical_indices(k):
    """Indices (t, r, theta, phi) of a 4-D spec with coordinates named like (t, r, theta, phi)."""
    from .observers import time_index
    if k.dim != 4:
        raise ValueError(f"{k.name}: a shadow image needs a 4-dimensional spacetime with "
                         f"coordinates like (t, r, theta, phi); this spec has {k.dim} "
                         f"coordinates ({', '.join(k.coordinates)})")
    missing = [c for c in ("r", "theta") if c not in k.coordinates]
    if missing:
        raise ValueError(f"{k.name}: a shadow image needs spherical-like coordinates named "
                         f"r and theta (found {', '.join(k.coordinates)}; missing "
                         f"{' and '.join(missing)})")
    if k.signature != (1, 3):
        raise ValueError(f"{k.name}: a shadow image needs a Lorentzian metric (-, +, +, +)")
    t = time_index(k)
    r, th = k.coordinates.index("r"), k.coordinates.index("theta")
    if t in (r, th):
        raise ValueError(f"{k.name}: the time coordinate must not be r or theta")
    phi = ({0, 1, 2, 3} - {t, r, th}).pop()
    return t, r, th, phi


def _mass_scale(k, params):
    if params and "M" in params:
        return float(np.asarray(params["M"]))
    return float(k.parameters.get("M", 1.0))


def circular_orbit(k, r, params=None, prograde=True, rel_step=1e-5):
    """Angular velocity Omega = dphi/dt and u^t of circular geodesic orbits at radii ``r`` in
    the plane theta = pi/2 of a stationary, axisymmetric metric (coordinates like
    t, r, theta, phi).

    A circular orbit (u^r = u^theta = 0) is geodesic where d_r g_tt + 2 Omega d_r g_tphi +
    Omega^2 d_r g_phiphi = 0 (the radial geodesic equation), so
    Omega = (-d_r g_tphi +- sqrt(d_r g_tphi^2 - d_r g_tt d_r g_phiphi)) / d_r g_phiphi,
    + for the prograde orbit (co-rotating with a positive spin). The metric's r-derivatives are
    taken by central differences of k.metric with step rel_step * r. u = u^t (1, 0, 0, Omega)
    with g(u, u) = -1. Returns (Omega, u_t) arrays; NaN where no timelike orbit exists.
    """
    t, ri, th, ph = _spherical_indices(k)
    r = np.asarray(r, dtype=np.float64)

    def at(radius):
        x = np.zeros(radius.shape + (4,))
        x[..., ri] = radius
        x[..., th] = np.pi / 2
        return k.metric(x, params)

    h = rel_step * r
    dg = (at(r + h) - at(r - h)) / (2 * h)[..., None, None]
    g = at(r)
    a, b, c = dg[..., ph, ph], dg[..., t, ph], dg[..., t, t]
    sign = 1.0 if prograde else -1.0
    with np.errstate(invalid="ignore", divide="ignore"):
        omega = (-b + sign * np.sqrt(b * b - a * c)) / a
        n = g[..., t, t] + 2 * g[..., t, ph] * omega + g[..., ph, ph] * omega ** 2
        ut = np.where(n < 0, 1.0 / np.sqrt(-n), np.nan)
    omega = np.where(np.isfinite(ut), omega, np.nan)
    return omega, ut


def isco(k, params=None, r_max=None):
    """Radius of the innermost stable prograde circular orbit in the plane theta = pi/2: the
    minimum of the specific energy E(r) = -u_t along the circular orbits (dE/dr = 0 there),
    found on a radial grid outside the spec's events and domain and refined by a parabola."""
    t, ri, th, ph = _spherical_indices(k)
    m = _mass_scale(k, params)
    r_max = 1000.0 * m if r_max is None else float(r_max)
    r = np.geomspace(1e-3 * m, r_max, 4000)
    x = _points(r, (t, ri, th, ph))
    with np.errstate(all="ignore"):
        ok = k.inside(x, params)
        if k.event_names:
            ev = k.event_values(x, params)
            ok &= np.all(ev > 0, axis=-1)
    # outside the outermost failure only
    bad = np.nonzero(~ok)[0]
    start = bad[-1] + 1 if bad.size else 0
    r = r[start:]
    omega, ut = circular_orbit(k, r, params)
    g = k.metric(_points(r, (t, ri, th, ph)), params)
    with np.errstate(invalid="ignore"):
        energy = -(g[:, t, t] + g[:, t, ph] * omega) * ut
    valid = np.isfinite(energy)
    if not valid.any():
        raise ValueError(f"{k.name}: found no timelike circular orbits in the plane "
                         "theta = pi/2")
    e = np.where(valid, energy, np.inf)
    i = int(np.argmin(e))
    if i == 0 or i == len(r) - 1 or not np.isfinite(e[i - 1]) or not np.isfinite(e[i + 1]):
        return float(r[i])
    # parabola through three points in log r
    lx = np.log(r[i - 1:i + 2])
    y = e[i - 1:i + 2]
    den = (lx[0] - lx[1]) * (lx[0] - lx[2]) * (lx[1] - lx[2])
    A = (lx[2] * (y[1] - y[0]) + lx[1] * (y[0] - y[2]) + lx[0] * (y[2] - y[1])) / den
    B = (lx[2] ** 2 * (y[0] - y[1]) + lx[1] ** 2 * (y[2] - y[0]) + lx[0] ** 2 * (y[1] - y[2])) / den
    return float(np.exp(-B / (2 * A))) if A > 0 else float(r[i])


def _points(r, idx):
    t, ri, th, ph = idx
    x = np.zeros(np.shape(r) + (4,))
    x[..., ri] = r
    x[..., th] = np.pi / 2
    return x


def _with_plane_events(source: str, theta: str, existing) -> str:
    """The spec text with two events added: cos(theta) and -cos(theta) (the equatorial plane
    crossed from either side)."""
    try:
        data = tomllib.loads(source)
    except tomllib.TOMLDecodeError as exc:
        raise BuildError(f"cannot read the spec text to add the disk's plane events: {exc}") \
            from None
    taken = set(existing) | set(data.get("coordinates", [])) | set(data.get("parameters", {})) \
        | set(data.get("define", {}))
    clash = [n for n in PLANE_EVENTS if n in taken]
    if clash:
        raise BuildError(f"the spec already uses the name {clash[0]!r}, which the disk "
                         "rendering needs for an event of its own")
    lines = (f'{PLANE_EVENTS[0]} = "cos({theta})"\n'
             f'{PLANE_EVENTS[1]} = "-cos({theta})"\n')
    if "events" not in data:
        return source.rstrip("\n") + "\n\n[events]\n" + lines
    m = re.search(r"^[ \t]*\[[ \t]*events[ \t]*\][ \t]*(#[^\n]*)?\r?\n", source, re.MULTILINE)
    if m is None:
        raise BuildError("cannot add the disk's plane events: the spec's [events] are not "
                         "written as a plain [events] table")
    return source[:m.end()] + lines + source[m.end():]


def _spec_text(source) -> str:
    from .spec import Spec
    if isinstance(source, Spec):
        return source.source
    if isinstance(source, Path):
        return source.read_text(encoding="utf-8")
    if isinstance(source, str):
        if "\n" not in source and Path(source).is_file():
            return Path(source).read_text(encoding="utf-8")
        return source
    raise TypeError("source must be a metricc.Spec, a path or the spec's TOML text")


# ------------------------------------------------------------------------------------------
# Shadow images
# ------------------------------------------------------------------------------------------
@dataclass
class ShadowImage:
    """An image computed by :func:`render_shadow`.

    rgb: (H, W, 3) floats in [0, 1]. captured: (H, W) rays stopped by a spec event or the
    domain. escaped: (H, W) rays that reached the far zone (they show the sky). disk_hit:
    (H, W). redshift: (H, W) g = nu_obs / nu_em on the disk, NaN elsewhere. disk_radius:
    (H, W) r where the ray meets the disk, NaN elsewhere. status: (H, W) the integrator's
    status of each ray's last segment ("disk" for disk hits). final: (H, W, 8) each ray's
    state where it ended (on the disk for disk hits; the rays are traced backwards in time,
    so u^t < 0 there). pixel_angle: radians per pixel
    at the image centre (2 tan(fov/2) / W). fov: horizontal field of view (radians).
    """
    rgb: np.ndarray
    captured: np.ndarray
    escaped: np.ndarray
    disk_hit: np.ndarray
    redshift: np.ndarray
    disk_radius: np.ndarray
    status: np.ndarray
    final: np.ndarray
    pixel_angle: float
    fov: float
    info: dict = field(default_factory=dict)

    @property
    def shape(self):
        return self.captured.shape

    def save(self, path) -> Path:
        """Write the image as a PNG (matplotlib's imsave); returns the path."""
        _need_matplotlib()
        from matplotlib.image import imsave
        path = Path(path)
        try:
            imsave(path, np.clip(self.rgb, 0.0, 1.0), format="png")
        except OSError as exc:
            raise BuildError(f"cannot write {path}: {exc.strerror or exc}") from None
        return path


def _sky(n, roll_frame, cell):
    """Checkerboard colours for escape directions n (..., 3), in celestial coordinates
    aligned with the camera: latitude asin(n . up), longitude atan2(n . right, n . forward),
    so that undeflected rays draw a regular grid of cells of ``cell`` radians."""
    fwd, up, right = roll_frame
    lat = np.arcsin(np.clip(n @ up, -1, 1))
    lon = np.arctan2(n @ right, n @ fwd)
    i = np.floor(lat / cell).astype(np.int64)
    j = np.floor(lon / cell).astype(np.int64)
    odd = ((i + j) % 2).astype(bool)
    # a soft brightening toward the celestial "equator" of the camera, so the sky has depth
    shade = 0.85 + 0.15 * np.cos(lat)
    col = np.where(odd[..., None], SKY_B, SKY_A) * shade[..., None]
    return col


def _cartesian_direction(y, idx):
    """Unit direction of motion (N, 3) in the flat-space Cartesian picture of (r, theta, phi)."""
    t, ri, th, ph = idx
    r, th_, ph_ = y[:, ri], y[:, th], y[:, ph]
    ur, uth, uph = y[:, 4 + ri], y[:, 4 + th], y[:, 4 + ph]
    st, ct, sp, cp = np.sin(th_), np.cos(th_), np.sin(ph_), np.cos(ph_)
    rhat = np.stack([st * cp, st * sp, ct], -1)
    thhat = np.stack([ct * cp, ct * sp, -st], -1)
    phhat = np.stack([-sp, cp, np.zeros_like(sp)], -1)
    v = ur[:, None] * rhat + (r * uth)[:, None] * thhat + (r * st * uph)[:, None] * phhat
    nv = np.linalg.norm(v, axis=-1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        return v / nv


def _disk_colour(g, radius, r_in):
    """Disk colours: intensity ~ g^4 times an emissivity falling as (r_in / r)^2, colour by g
    (bluer for g > 1, redder for g < 1)."""
    intensity = g ** 4 * (r_in / radius) ** 2
    ref = np.quantile(intensity, 0.97) if intensity.size else 1.0
    v = np.clip(intensity / ref, 0, 1) ** 0.5
    s = np.clip((g - 1.0) / 0.35, -1.0, 1.0)[..., None]
    col = np.where(s < 0, DISK_WARM + (-s) * (DISK_RED - DISK_WARM),
                   DISK_WARM + s * (DISK_BLUE - DISK_WARM))
    return np.clip(col * (0.08 + 0.92 * v)[..., None], 0, 1)


class _Progress:
    """Maps the rounds of a render onto one progress(done, total) over the pixels."""

    def __init__(self, callback, total):
        self.cb, self.total = callback, max(int(total), 1)
        self.base = 0.0
        self.span = 0.9

    def round(self, span):
        def inner(done, total):
            if self.cb is not None:
                frac = self.base + self.span * (done / total if total else 1.0)
                self.cb(min(int(frac * self.total), self.total - 1), self.total)
        self.span = span
        return inner

    def advance(self):
        self.base += self.span

    def finish(self):
        if self.cb is not None:
            self.cb(self.total, self.total)


def render_shadow(k, distance=500.0, inclination=80.0, fov=None, shape=(240, 320), disk=None,
                  observer="static", params=None, rtol=1e-8, progress=None, source=None,
                  threads=None, max_crossings=4, lam_end=None, cell=None) -> ShadowImage:
    """Image of a black hole (any 4-D spec with coordinates like t, r, theta, phi).

    k: MetricKernels. distance: the camera's r. inclination: its theta in degrees (from the
    axis theta = 0). fov: horizontal field of view in degrees (default: about 2.3 times the
    scene radius: 10 M, or the disk's outer radius). shape: (height, width). disk: None or
    (r_in, r_out) for a thin disk in the plane theta = pi/2; needs ``source`` (the spec's
    path, text or metricc.Spec), because the plane crossings are found by events added to the
    spec. observer: "static" or "zamo" (the camera's frame). params: spec parameters.
    progress: callable progress(done, total). max_crossings: how many crossings of the plane
    a ray may make before it is followed without looking for the disk (higher-order images).
    cell: the sky's checkerboard cell in radians (default 10 degrees: 18 x 36 cells).

    Camera: at x = (0, distance, inclination, 0), forward = -e_(1) (toward the hole), up =
    -e_(2) (toward decreasing theta, i.e. toward the spin axis), so columns run along +phi.
    """
    idx = _spherical_indices(k)
    t_i, r_i, th_i, ph_i = idx
    distance = float(distance)
    if not (np.isfinite(distance) and distance > 0):
        raise ValueError(f"distance must be positive, got {distance}")
    inclination = float(inclination)
    if not 0.0 < inclination < 180.0:
        raise ValueError(f"inclination must be strictly between 0 and 180 degrees (theta = 0 "
                         f"and 180 are the axis, outside the chart), got {inclination}")
    h, w = (int(s) for s in shape)
    if h < 1 or w < 1:
        raise ValueError(f"shape must be (height, width) >= 1, got {shape}")
    m = _mass_scale(k, params)
    if disk is not None:
        r_in, r_out = (float(v) for v in disk)
        if not (0 < r_in < r_out):
            raise ValueError(f"the disk needs 0 < inner radius < outer radius, got {r_in}, "
                             f"{r_out}")
        if r_out >= distance:
            raise ValueError(f"the disk's outer radius {r_out} must be inside the camera's "
                             f"distance {distance}")
        om, ut = circular_orbit(k, np.array([r_in]), params)
        if not np.isfinite(ut[0]):
            raise ValueError(f"{k.name}: no timelike circular orbit at the disk's inner radius "
                             f"r = {r_in:g} (inside the photon orbit?); choose a larger inner "
                             f"radius, e.g. the innermost stable orbit r = "
                             f"{isco(k, params):.4g}")
        if source is None:
            raise ValueError("a disk needs the spec's source (path, text or metricc.Spec) to "
                             "add its plane-crossing events: pass source=")
    if fov is None:
        scene = 1.15 * (disk[1] if disk is not None else 10.0 * m)
        fov = 2.0 * math.degrees(math.atan(scene / distance))
    fov = math.radians(float(fov))
    if not 0 < fov < math.pi:
        raise ValueError(f"fov must be between 0 and 180 degrees, got {math.degrees(fov)}")
    cell = math.pi / 18 if cell is None else float(cell)

    x_cam = np.zeros(4)
    x_cam[r_i], x_cam[th_i] = distance, math.radians(inclination)
    # forward, up in frame components (e_(1), e_(2), e_(3)) = (d_r, d_theta, d_phi) after
    # Gram-Schmidt; the tiny roll keeps rays off planes through the axis (see CAMERA_ROLL).
    order = [i for i in range(4) if i != t_i]
    if [order.index(r_i), order.index(th_i)] != [0, 1]:
        raise ValueError(f"{k.name}: the camera needs the coordinates ordered with r before "
                         "theta before the azimuth (as in t, r, theta, phi)")
    forward = np.array([-1.0, 0.0, 0.0])
    up = np.array([0.0, -math.cos(CAMERA_ROLL), math.sin(CAMERA_ROLL)])
    y0 = k.camera(x_cam, forward, up, fov, (h, w), observer=observer, params=params)
    # k.camera's states carry the time-reversed photon (-e_(0) + d: past-pointing, into the
    # scene), integrated with a positive affine parameter; the physical photon momentum is
    # minus the state's.
    flat = y0.reshape(-1, 8).copy()
    N = flat.shape[0]
    lam_end = 2.0 * distance + 100.0 * m if lam_end is None else float(lam_end)

    status = np.empty(N, dtype=object)
    final = flat.copy()
    hit = np.zeros(N, dtype=bool)
    prog = _Progress(progress, N)
    spec_events = list(k.event_names)
    if disk is None:
        res = k.integrate(flat, lam_end, params=params, rtol=rtol, events=spec_events,
                          threads=threads, progress=prog.round(0.999))
        final[:] = res.y
        status[:] = res.status
    else:
        text = _with_plane_events(_spec_text(source), k.coordinates[th_i], k.event_names)
        from . import loads
        k2 = loads(text, backend=k.backend, path=f"<{k.name} with plane events>")
        push = 1e-6 * max(distance, 1.0)
        state = flat.copy()
        active = np.ones(N, dtype=bool)
        crossings = np.zeros(N, dtype=np.int64)
        share = 0.6
        for rnd in range(max_crossings + 1):
            ids = np.nonzero(active)[0]
            if ids.size == 0:
                break
            last = rnd == max_crossings
            side = np.cos(state[ids, th_i]) > 0
            groups = [(ids, spec_events)] if last else [
                (ids[side], spec_events + [PLANE_EVENTS[0]]),
                (ids[~side], spec_events + [PLANE_EVENTS[1]])]
            span = share if rnd == 0 else 0.4 / max_crossings
            for gi, (sel, evs) in enumerate(groups):
                if sel.size == 0:
                    continue
                frac = sel.size / ids.size
                res = k2.integrate(state[sel], lam_end, params=params, rtol=rtol, events=evs,
                                   threads=threads, progress=prog.round(span * frac))
                prog.advance()
                on_plane = np.isin(res.status, PLANE_EVENTS)
                r_stop = res.y[:, r_i]
                in_disk = on_plane & (r_stop > r_in) & (r_stop < r_out)
                done = ~on_plane | in_disk
                final[sel[done]] = res.y[done]
                status[sel[done]] = np.where(in_disk[done], "disk", res.status[done])
                hit[sel[in_disk]] = True
                active[sel[done]] = False
                cont = sel[on_plane & ~in_disk]
                if cont.size:
                    crossings[cont] += 1
                    pushed = k2.integrate(res.y[on_plane & ~in_disk], push, params=params,
                                          rtol=rtol, events=[], threads=threads)
                    state[cont] = pushed.y
                    stopped = pushed.status != "done"
                    if np.any(stopped):
                        final[cont[stopped]] = pushed.y[stopped]
                        status[cont[stopped]] = pushed.status[stopped]
                        active[cont[stopped]] = False
        # rays still active after the loop cannot happen (the last round has no plane events)
    prog.finish()

    status = status.astype(str)
    captured = np.isin(status, spec_events + ["domain"])
    r_end = final[:, r_i]
    escaped = (status == "done") & (r_end > 0.5 * distance)
    rgb = np.zeros((N, 3))
    # sky
    if np.any(escaped):
        n = _cartesian_direction(final[escaped], idx)
        inc = math.radians(inclination)
        fwd = -np.array([math.sin(inc), 0.0, math.cos(inc)])
        upc = np.array([-math.cos(inc), 0.0, math.sin(inc)])
        upc = math.cos(CAMERA_ROLL) * upc + math.sin(CAMERA_ROLL) * np.array([0.0, 1.0, 0.0])
        right = np.cross(fwd, upc)
        rgb[escaped] = _sky(n, (fwd, upc, right), cell)
    redshift = np.full(N, np.nan)
    radius = np.full(N, np.nan)
    if np.any(hit):
        yh = final[hit]
        r_h = yh[:, r_i]
        om, ut = circular_orbit(k, r_h, params)
        p = k.momenta(yh, params)[:, 4:]
        p_dot_em = ut * (p[:, t_i] + om * p[:, ph_i])
        u_obs = k.frame(x_cam, observer, params)[0]
        p0 = k.momenta(flat[hit], params)[:, 4:]
        p_dot_obs = p0 @ u_obs
        g = p_dot_obs / p_dot_em
        redshift[hit] = g
        radius[hit] = r_h
        rgb[hit] = _disk_colour(g, r_h, disk[0])
    info = {"distance": distance, "inclination": inclination, "observer": observer,
            "disk": None if disk is None else (float(disk[0]), float(disk[1])),
            "lam_end": lam_end, "counts": dict(zip(*np.unique(status, return_counts=True)))}
    info["counts"] = {str(a): int(b) for a, b in info["counts"].items()}
    return ShadowImage(rgb=rgb.reshape(h, w, 3), captured=captured.reshape(h, w),
                       escaped=escaped.reshape(h, w), disk_hit=hit.reshape(h, w),
                       redshift=redshift.reshape(h, w), disk_radius=radius.reshape(h, w),
                       status=status.reshape(h, w), final=final.reshape(h, w, 8),
                       pixel_angle=2 * math.tan(fov / 2) / w,
                       fov=fov, info=info)


# ------------------------------------------------------------------------------------------
# Fans of geodesics
# ------------------------------------------------------------------------------------------
@dataclass
class FanPlot:
    """Geodesics computed by :func:`render_fan`.

    start: (dim,) the launch point. axes: the two coordinate names plotted. polar: whether
    (axes[0], axes[1]) were drawn as (radius, angle). kind: "null", "timelike" or "unit".
    launch: (rays,) the launch angle in radians (or the speed, for a fan along the time axis).
    lam: (S,) affine parameters of the samples. samples: (rays, S, 2*dim) states, NaN after a
    stop. status: (rays,) how each ray ended. final: (rays, 2*dim) the states where they
    ended. trajectories: per ray, the (n, dim) positions up to its stop (the stop included),
    in the spec's units (radians). xy: per ray, the (n, 2) plotted points: in degrees for the
    axes in ``degrees``, wrapped into [-180, 180) degrees (or [-pi, pi)) for the axes in
    ``wrapped``, with a NaN row where a wrapped line crosses the seam.
    """
    name: str
    coordinates: tuple
    start: np.ndarray
    axes: tuple
    polar: bool
    kind: str
    launch: np.ndarray
    lam: np.ndarray
    samples: np.ndarray
    status: np.ndarray
    final: np.ndarray
    trajectories: list
    xy: list
    stop_radius: float | None = None
    degrees: tuple = ()     # plotted axes drawn in degrees
    wrapped: tuple = ()     # plotted axes wrapped into one turn (lines broken at the seam)

    def figure(self):
        """A matplotlib Figure (no pyplot state) with the plot."""
        _need_matplotlib()
        from matplotlib.figure import Figure
        fig = Figure(figsize=(6.4, 6.0), dpi=100)
        ax = fig.add_subplot(1, 1, 1)
        cmap = _colormap()
        n = len(self.xy)
        for i, pts in enumerate(self.xy):
            colour = cmap(i / max(n - 1, 1)) if n > 1 else "C0"
            ax.plot(pts[:, 0], pts[:, 1], color=colour, lw=1.1)
            if self.status[i] != "done" and len(pts):
                ax.plot(pts[-1, 0], pts[-1, 1], "x", color=colour, ms=4)
        a, b = self.axes
        if self.polar:
            r0, f0 = self.start[self.coordinates.index(a)], self.start[self.coordinates.index(b)]
            sx, sy = r0 * math.cos(f0), r0 * math.sin(f0)
            if self.stop_radius:
                from matplotlib.patches import Circle
                ax.add_patch(Circle((0, 0), self.stop_radius, color="0.15", zorder=0))
            ax.set_aspect("equal", adjustable="datalim")
            ax.set_xlabel(f"{a} cos({b})")
            ax.set_ylabel(f"{a} sin({b})")
        else:
            sx, sy = (_plotted(self.start[self.coordinates.index(c)], c in self.degrees,
                               c in self.wrapped) for c in (a, b))
            ax.set_xlabel(a + (" (degrees)" if a in self.degrees else ""))
            ax.set_ylabel(b + (" (degrees)" if b in self.degrees else ""))
        # plain tick values: an offset such as "1e-6 + 0.5" hides the coordinates themselves
        ax.ticklabel_format(useOffset=False)
        ax.plot([sx], [sy], "o", color="k", ms=5, zorder=5)
        ax.grid(True, lw=0.4, alpha=0.5)
        where = ", ".join(f"{c}={math.degrees(v):.4g} deg" if c in self.degrees else
                          f"{c}={v:.4g}" for c, v in zip(self.coordinates, self.start))
        ax.set_title(f"{self.name}: {n} {self.kind} geodesic{'s' if n != 1 else ''} "
                     f"from ({where})", fontsize=9)
        fig.tight_layout()
        return fig

    def save(self, path) -> Path:
        """Write the plot (PNG, or any format matplotlib knows by the suffix); returns path."""
        fig = self.figure()
        path = Path(path)
        try:
            fig.savefig(path)
        except OSError as exc:
            raise BuildError(f"cannot write {path}: {exc.strerror or exc}") from None
        return path


def _colormap():
    from matplotlib import colormaps
    return colormaps["viridis"]


# Coordinate names that conventionally denote an azimuth (one turn = 2 pi): wrapped by default
# when plotted as a plain (not polar) axis.
AZIMUTH_NAMES = ("phi", "varphi", "lon", "longitude", "azimuth")
LAM_FACTOR = 2.0   # default affine length: this many times the start's length scale


def _plotted(value, degrees: bool, wrap: bool):
    """A coordinate value (radians) as plotted: wrapped into [-pi, pi), then in degrees."""
    v = np.asarray(value, dtype=np.float64)
    if wrap:
        v = (v + np.pi) % (2 * np.pi) - np.pi
    return np.degrees(v) if degrees else v


def _break_at_seams(pts: np.ndarray, cols) -> np.ndarray:
    """(n, 2) points with a NaN row inserted wherever a wrapped column jumps by more than half
    a turn (matplotlib leaves a gap there instead of a line across the plot)."""
    if len(pts) < 2 or not cols:
        return pts
    jump = np.zeros(len(pts) - 1, dtype=bool)
    for c, turn in cols:
        jump |= np.abs(np.diff(pts[:, c])) > turn / 2
    where = np.nonzero(jump)[0] + 1
    return np.insert(pts, where, np.nan, axis=0)


def default_lam(k, at, ia, ib, params=None) -> float:
    """The default affine length of a fan: LAM_FACTOR times the larger of the two axes' length
    scales at the start, sqrt(|g_ii|) * max(|x_i|, 1): the proper length of the start's own
    coordinate value (r0 for a radius), or of one coordinate unit (one radian of an angle),
    whichever is longer. Kerr at r = 10: about 22 M; the WGS84 ellipsoid: about 12,700 km
    (one radian of latitude is 6,357 to 6,400 km); the unit sphere: 2 to 3 radii."""
    g = np.asarray(k.metric(np.asarray(at, dtype=np.float64), params), dtype=np.float64)
    scale = max(math.sqrt(abs(g[i, i])) * max(abs(float(at[i])), 1.0) for i in (ia, ib))
    if not (math.isfinite(scale) and scale > 0):
        raise ValueError(f"{k.name}: cannot choose a default lam at the start point (the "
                         "metric has no finite length scale there); give lam")
    return LAM_FACTOR * scale


def render_fan(k, at, axes=None, polar=False, rays=16, lam=None, kind=None, params=None,
               progress=None, samples=400, speed=0.5, angles=None, observer="static",
               rtol=1e-10, degrees=(), wrap=None) -> FanPlot:
    """A fan of geodesics from the point ``at`` (dim,), in the plane of two coordinates.

    axes: two coordinate names (default: the first two coordinates other than time). kind:
    "null", "timelike" or "unit" (default: null for a Lorentzian metric, unit for a Riemannian
    one). Directions: the frame (k.frame with ``observer``; none for a Riemannian metric)
    gives unit vectors e_A, e_B along the two axes' coordinates (Gram-Schmidt in coordinate
    order); ray i leaves along cos(psi_i) e_A + sin(psi_i) e_B, psi over ``angles`` (degrees,
    (first, last); default the full circle). Timelike rays move with local ``speed`` (< 1);
    null rays are u = e_0 + direction; "unit" rays are spacelike unit vectors. If one axis is
    the time coordinate, timelike rays get speeds spread over (-speed, speed) along the other
    axis and null and unit rays are the two directions +-e. Integrated to affine parameter
    ``lam`` (default: :func:`default_lam`, from the metric's length scale at the start) with
    ``samples`` samples per ray and the spec's events.

    degrees: names of plotted coordinates to draw in degrees (``at`` stays in the spec's
    units, radians). wrap: names of plotted coordinates to wrap into one turn; default the
    plotted coordinates named like an azimuth (AZIMUTH_NAMES); not used for polar plots,
    whose angle is periodic anyway.
    """
    from .observers import _lorentzian, _riemannian, time_index
    at = np.asarray(at, dtype=np.float64)
    if at.shape != (k.dim,):
        raise ValueError(f"{k.name}: the start point needs {k.dim} coordinates "
                         f"({', '.join(k.coordinates)}), got {at.size}")
    if not np.all(np.isfinite(at)):
        raise ValueError("the start point must be finite")
    if not bool(k.inside(at, params)):
        raise ValueError(f"{k.name}: the start point {tuple(float(v) for v in at)} is outside "
                         "the spec's [domain]")
    lorentz, riem = _lorentzian(k), _riemannian(k)
    if not (lorentz or riem):
        raise ValueError(f"{k.name}: fans need a Lorentzian (-, +, ...) or Riemannian metric")
    t_i = time_index(k) if lorentz else None
    if axes is None:
        axes = tuple(c for i, c in enumerate(k.coordinates) if i != t_i)[:2]
    axes = tuple(axes)
    if len(axes) != 2 or axes[0] == axes[1]:
        raise ValueError(f"axes must be two different coordinate names, got {axes}")
    for a in axes:
        if a not in k.coordinates:
            raise ValueError(f"{k.name}: unknown coordinate {a!r} in axes (coordinates: "
                             f"{', '.join(k.coordinates)})")
    ia, ib = (k.coordinates.index(a) for a in axes)
    degrees = tuple(degrees)
    wrap = tuple(c for c in axes if c in AZIMUTH_NAMES) if wrap is None else tuple(wrap)
    for c in degrees + wrap:
        if c not in axes:
            raise ValueError(f"{c!r} is not one of the plotted coordinates "
                             f"({', '.join(axes)}); degrees and wrapping apply to those")
    if polar:
        wrap = ()
    if kind is None:
        kind = "null" if lorentz else "unit"
    if kind not in ("null", "timelike", "unit"):
        raise ValueError(f"kind must be 'timelike', 'null' or 'unit', got {kind!r}")
    if riem and kind != "unit":
        raise ValueError(f"{k.name}: a Riemannian metric has only kind='unit' geodesics")
    rays = int(rays)
    if rays < 1:
        raise ValueError(f"rays must be at least 1, got {rays}")
    lam = default_lam(k, at, ia, ib, params) if lam is None else float(lam)
    if not np.isfinite(lam) or lam == 0:
        raise ValueError(f"lam must be a finite, non-zero affine parameter, got {lam}")
    if int(samples) < 2:
        raise ValueError("samples must be at least 2")
    speed = float(speed)
    if kind == "timelike" and not 0 <= speed < 1:
        raise ValueError(f"speed must be in [0, 1) for timelike geodesics, got {speed}")
    if angles is None:
        psi = np.linspace(0.0, 2 * np.pi, rays, endpoint=False)
    else:
        a0, a1 = (math.radians(float(v)) for v in angles)
        psi = np.linspace(a0, a1, rays) if rays > 1 else np.array([a0])

    e = k.frame(at, observer if lorentz else None, params)
    if lorentz:
        spatial = [i for i in range(k.dim) if i != t_i]
        row = {c: 1 + spatial.index(c) for c in spatial}
        e0 = e[0]
        if t_i in (ia, ib):
            other = ib if ia == t_i else ia
            ev = e[row[other]]
            if kind == "timelike":
                launch = np.linspace(-speed, speed, rays) if rays > 1 else np.array([speed])
                gam = 1 / np.sqrt(1 - launch ** 2)
                u = gam[:, None] * (e0[None] + launch[:, None] * ev[None])
            else:
                launch = np.array([1.0, -1.0])
                u = (e0[None] if kind == "null" else 0) + launch[:, None] * ev[None]
        else:
            d = np.cos(psi)[:, None] * e[row[ia]][None] + np.sin(psi)[:, None] * e[row[ib]][None]
            launch = psi
            if kind == "null":
                u = e0[None] + d
            elif kind == "timelike":
                gam = 1 / math.sqrt(1 - speed ** 2)
                u = gam * (e0[None] + speed * d)
            else:
                u = d
    else:
        d = np.cos(psi)[:, None] * e[ia][None] + np.sin(psi)[:, None] * e[ib][None]
        launch, u = psi, d
    y0 = np.concatenate([np.broadcast_to(at, u.shape), u], axis=-1)
    lam_s = np.linspace(0.0, lam, int(samples))
    res = k.integrate(y0, lam, params=params, rtol=rtol, samples=lam_s, progress=progress)
    S = res.samples
    trajectories, xy = [], []
    for i in range(S.shape[0]):
        ok = np.all(np.isfinite(S[i, :, :k.dim]), axis=-1)
        n_ok = int(np.argmin(ok)) if not ok.all() else ok.size
        pts = S[i, :n_ok, :k.dim]
        if res.status[i] != "done" or n_ok < ok.size:
            pts = np.vstack([pts, res.y[i, :k.dim][None]])
        trajectories.append(pts)
        if polar:
            xy.append(np.stack([pts[:, ia] * np.cos(pts[:, ib]), pts[:, ia] * np.sin(pts[:, ib])],
                               axis=-1))
        else:
            cols = [_plotted(pts[:, i], c in degrees, c in wrap) for i, c in ((ia, axes[0]),
                                                                             (ib, axes[1]))]
            seams = [(j, 360.0 if axes[j] in degrees else 2 * np.pi) for j in (0, 1)
                     if axes[j] in wrap]
            xy.append(_break_at_seams(np.stack(cols, axis=-1), seams))
    stop_radius = _stop_radius(k, at, ia, params) if polar else None
    return FanPlot(name=k.name, coordinates=k.coordinates, start=at, axes=axes, polar=polar,
                   kind=kind, launch=np.asarray(launch), lam=lam_s, samples=S,
                   status=res.status, final=res.y, trajectories=trajectories, xy=xy,
                   stop_radius=stop_radius, degrees=degrees, wrapped=wrap)


def _stop_radius(k, at, ia, params):
    """The largest radius below the start where a spec event or the domain stops geodesics
    (drawn as a dark disk in polar plots), or None."""
    r0 = at[ia]
    if not r0 > 0:
        return None
    r = np.linspace(0.0, r0, 2001)[1:]
    x = np.broadcast_to(at, (r.size, k.dim)).copy()
    x[:, ia] = r
    with np.errstate(all="ignore"):
        ok = k.inside(x, params)
        if k.event_names:
            ok &= np.all(k.event_values(x, params) > 0, axis=-1)
    bad = np.nonzero(~ok)[0]
    if bad.size == 0 or r[bad[-1]] < 1e-6 * r0:
        return None
    return float(r[bad[-1]])


# ------------------------------------------------------------------------------------------
# Command line
# ------------------------------------------------------------------------------------------
def _number(text: str) -> float:
    """A number given on the command line: any constant of the spec language (pi/2, -pi/4,
    2*pi, 1.5e3, sqrt(2)), evaluated by metricc's own whitelist parser."""
    from .expr import ExprError, constant_value
    try:
        return constant_value(text)
    except ExprError as exc:
        raise ValueError(f"not a number: {text!r} ({exc.message})") from None


def _parse_size(text):
    m = re.fullmatch(r"\s*(\d+)\s*[xX]\s*(\d+)\s*", text)
    if not m or int(m.group(1)) < 1 or int(m.group(2)) < 1:
        raise BuildError(f"--size expects WIDTHxHEIGHT such as 320x240, got {text!r}")
    return int(m.group(2)), int(m.group(1))


def _parse_params(items):
    params = {}
    for item in items or ():
        name, sep, value = item.partition("=")
        try:
            params[name.strip()] = _number(value.strip())
        except ValueError:
            sep = ""
        if not sep or not name.strip():
            raise BuildError(f"--param expects NAME=VALUE, got {item!r}")
    return params


def add_parser(subparsers):
    """Register ``metricc render shadow|fan`` on an argparse subparsers object."""
    import argparse
    r = subparsers.add_parser("render", help="draw a black-hole image or a fan of geodesics "
                              "(PNG; needs matplotlib)")
    kinds = r.add_subparsers(dest="render_kind", required=True, metavar="KIND")

    def common(p):
        p.add_argument("spec", metavar="SPEC", help="spec file (.toml)")
        p.add_argument("--out", "-o", required=True, metavar="FILE", help="output PNG")
        p.add_argument("--param", action="append", default=[], metavar="NAME=VALUE",
                       help="override a spec parameter (repeatable)")
        p.add_argument("--backend", choices=("auto", "c", "numpy"), default="auto",
                       help="c (compiled), numpy, or auto: C where a compiler works, else "
                            "NumPy (default auto)")
        p.add_argument("--progress", action=argparse.BooleanOptionalAction, default=None,
                       help="progress bar on stderr (default: when stderr is a terminal)")

    s = kinds.add_parser("shadow", help="image of a black hole (coordinates t, r, theta, phi) "
                         "with an optional thin disk")
    common(s)
    s.add_argument("--distance", type=float, default=500.0, metavar="R",
                   help="the camera's radius r (default 500)")
    s.add_argument("--inclination", type=float, default=80.0, metavar="DEG",
                   help="the camera's theta in degrees, from the axis (default 80)")
    s.add_argument("--fov", type=float, default=None, metavar="DEG",
                   help="horizontal field of view in degrees (default: fits 10 M or the disk)")
    s.add_argument("--size", default="320x240", metavar="WxH", help="pixels (default 320x240)")
    s.add_argument("--disk", action="store_true", help="add a thin disk in the plane theta = 90 deg")
    s.add_argument("--disk-inner", type=float, default=None, metavar="R",
                   help="inner radius of the disk (default: the innermost stable circular orbit)")
    s.add_argument("--disk-outer", type=float, default=None, metavar="R",
                   help="outer radius of the disk (default 20 M)")
    s.add_argument("--observer", choices=("static", "zamo"), default="static",
                   help="whose frame the camera uses (default static)")
    s.add_argument("--rtol", type=float, default=1e-8, help="integrator tolerance (default 1e-8)")
    s.add_argument("--threads", type=int, default=None, help="OpenMP threads (C backend)")

    f = kinds.add_parser("fan", help="plot a fan of geodesics launched from one point")
    common(f)
    f.add_argument("--at", required=True, metavar="X0,X1,...",
                   help="the start point, one value per coordinate (pi/2 and the like work)")
    f.add_argument("--axes", default=None, metavar="NAME,NAME",
                   help="the two coordinates to plot (default: the first two spatial ones)")
    f.add_argument("--polar", action="store_true",
                   help="plot the axes as (radius, angle): x = r cos(angle), y = r sin(angle)")
    f.add_argument("--rays", type=int, default=16, metavar="N", help="number of geodesics")
    f.add_argument("--lam", type=float, default=None, metavar="L",
                   help="affine parameter to integrate to (default: twice the start's length "
                        "scale along the plotted axes, sqrt(g_ii) * max(|x_i|, 1): about 22 "
                        "for Kerr at r = 10 M, 12,700 km on the WGS84 ellipsoid)")
    f.add_argument("--degrees", default="", metavar="NAME,NAME",
                   help="coordinates given in --at and plotted in degrees instead of radians "
                        "(e.g. lat,lon)")
    f.add_argument("--wrap", default=None, metavar="NAME,NAME",
                   help="plotted coordinates to wrap into one turn, [-180, 180) degrees or "
                        "[-pi, pi), breaking lines at the seam (default: those named phi, "
                        "varphi, lon, longitude or azimuth; --wrap= for none)")
    f.add_argument("--kind", choices=("timelike", "null", "unit"), default=None,
                   help="default: null (Lorentzian metric) or unit (Riemannian)")
    f.add_argument("--speed", type=float, default=0.5,
                   help="local speed of timelike geodesics (default 0.5)")
    f.add_argument("--angles", default=None, metavar="DEG0,DEG1",
                   help="launch angles from the first axis toward the second (default: the "
                        "full circle; write --angles=-60,60 when the first is negative)")
    f.add_argument("--samples", type=int, default=400, help="samples per geodesic (default 400)")
    f.add_argument("--rtol", type=float, default=1e-10,
                   help="integrator tolerance (default 1e-10)")
    return r


def run(args) -> int:
    """Run ``metricc render`` from parsed arguments; prints the output path."""
    from . import load
    try:
        _need_matplotlib()
        params = _parse_params(args.param)
        out = Path(args.out)
        if out.parent and not out.parent.exists():
            raise BuildError(f"cannot write {out}: folder {out.parent} does not exist")
        k = load(args.spec, backend=args.backend)
        show = sys.stderr.isatty() if args.progress is None else args.progress
        bar = None
        if show:
            from .cli import ProgressBar
            bar = ProgressBar(sys.stderr, f"{k.name} {args.render_kind}")
        if args.render_kind == "shadow":
            h, w = _parse_size(args.size)
            disk = None
            if args.disk or args.disk_inner is not None or args.disk_outer is not None:
                r_in = args.disk_inner if args.disk_inner is not None else isco(k, params or None)
                r_out = (args.disk_outer if args.disk_outer is not None
                         else 20.0 * _mass_scale(k, params))
                disk = (r_in, r_out)
            img = render_shadow(k, args.distance, args.inclination, args.fov, (h, w), disk=disk,
                                observer=args.observer, params=params or None, rtol=args.rtol,
                                progress=bar, source=args.spec, threads=args.threads)
            img.save(out)
            counts = ", ".join(f"{v} {s}" for s, v in sorted(img.info["counts"].items()))
            extra = ""
            if disk is not None:
                g = img.redshift[img.disk_hit]
                if g.size:
                    extra = (f"; disk {disk[0]:.4g} < r < {disk[1]:.4g}, "
                             f"g from {g.min():.3f} to {g.max():.3f}")
            print(f"{k.name}: {w}x{h} image ({counts}{extra}) -> {out}")
        elif args.render_kind == "fan":
            at = [_number(v) for v in args.at.split(",") if v.strip()]
            axes = None
            if args.axes:
                axes = tuple(a.strip() for a in args.axes.split(",") if a.strip())
            degrees = tuple(c.strip() for c in args.degrees.split(",") if c.strip())
            wrap = None if args.wrap is None else tuple(
                c.strip() for c in args.wrap.split(",") if c.strip())
            for c in degrees:
                if c not in k.coordinates:
                    raise BuildError(f"--degrees: {c!r} is not a coordinate of {k.name} "
                                     f"({', '.join(k.coordinates)})")
                if len(at) == k.dim:      # --at gives these in degrees
                    at[k.coordinates.index(c)] = math.radians(at[k.coordinates.index(c)])
            angles = None
            if args.angles:
                angles = tuple(float(v) for v in args.angles.split(","))
                if len(angles) != 2:
                    raise BuildError(f"--angles expects DEG0,DEG1, got {args.angles!r}")
            fan = render_fan(k, at, axes, args.polar, args.rays, args.lam, args.kind,
                             params=params or None, progress=bar, samples=args.samples,
                             speed=args.speed, angles=angles, rtol=args.rtol,
                             degrees=degrees, wrap=wrap)
            fan.save(out)
            names, counts = np.unique(fan.status, return_counts=True)
            summary = ", ".join(f"{c} {n}" for n, c in zip(names, counts))
            n = len(fan.status)
            print(f"{k.name}: {n} geodesic{'' if n == 1 else 's'} to lambda = {fan.lam[-1]:.4g}"
                  f" ({summary}) -> {out}")
        else:  # pragma: no cover - argparse restricts the kinds
            raise BuildError(f"unknown render kind {args.render_kind!r}")
    except ValueError as exc:
        from .errors import SpecError
        if isinstance(exc, SpecError):
            raise
        raise BuildError(str(exc)) from None
    return 0


def main(argv=None) -> int:
    """``python -m metricc.render ...`` (the same as ``metricc render ...``)."""
    import argparse
    from .errors import SpecError
    p = argparse.ArgumentParser(prog="metricc")
    sub = p.add_subparsers(dest="command", required=True)
    add_parser(sub)
    args = p.parse_args(argv)
    try:
        return run(args)
    except (SpecError, BuildError) as exc:
        print(str(exc).splitlines()[0] if isinstance(exc, SpecError) else f"metricc: error: {exc}",
              file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
