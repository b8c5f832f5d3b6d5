"""Initial data: normalising velocities, observers' orthonormal frames and a pinhole camera.

NumPy only; every function works on any spec through its metric kernel. Conventions: states
are [x^mu, u^mu]; for a Lorentzian metric of signature (-, +, ..., +) a timelike velocity has
g(u, u) = -1 and a null one g(u, u) = 0; tetrads are arrays [..., a, mu] = e_(a)^mu with
g(e_(a), e_(b)) = eta_ab = diag(-1, 1, ..., 1).
"""
from __future__ import annotations

import numpy as np


def _lorentzian(k) -> bool:
    neg, pos = k.signature
    return neg == 1 and pos == k.dim - 1


def _riemannian(k) -> bool:
    return k.signature[0] == 0


def time_index(k) -> int:
    """The time coordinate used by observers: the first ignorable coordinate (the time
    Killing vector of a stationary metric), else the first coordinate."""
    return k.coordinates.index(k.ignorable[0]) if k.ignorable else 0


def _coordinate_index(k, which) -> int:
    if isinstance(which, str):
        if which not in k.coordinates:
            raise ValueError(f"{k.name}: unknown coordinate {which!r}")
        return k.coordinates.index(which)
    i = int(which)
    if not 0 <= i < k.dim:
        raise ValueError(f"{k.name}: solve_for={which!r} is not a coordinate index 0..{k.dim - 1}")
    return i


def normalize(k, y, kind: str = "timelike", solve_for=0, params=None) -> np.ndarray:
    """States [x, u] whose velocity has g(u,u) = -1 ("timelike"), 0 ("null") or +1 ("unit").

    timelike/null (Lorentzian metrics): solve the quadratic g(u, u) = target for component
    ``solve_for`` (index or name; default 0, the first coordinate), keeping the others. The
    larger root is taken when the given component is >= 0 (for the time coordinate: the
    future-pointing one), the smaller root when it is negative. unit: rescale the velocity.
    Raises ValueError (naming the first failing state) where no real solution exists.
    """
    y = k._check_input("norm", y)
    dim = k.dim
    x, u = y[..., :dim], np.array(y[..., dim:], dtype=np.float64)
    g = k.metric(x, params)
    if kind == "unit":
        n = np.einsum("...ij,...i,...j->...", g, u, u)
        bad = ~(n > 0)
        if np.any(bad):
            first = np.argwhere(np.atleast_1d(bad))[0]
            raise ValueError(f"{k.name}.normalize: g(u,u) = {np.atleast_1d(n)[tuple(first)]:.3g} "
                             f"is not positive for state {tuple(first)}; kind='unit' needs a "
                             "spacelike velocity")
        return np.concatenate([x, u / np.sqrt(n)[..., None]], axis=-1)
    if kind not in ("timelike", "null"):
        raise ValueError(f"kind must be 'timelike', 'null' or 'unit', got {kind!r}")
    if not _lorentzian(k):
        raise ValueError(f"{k.name}.normalize: kind={kind!r} needs a Lorentzian metric of "
                         f"signature (-, +, ...); this one has {k.signature[0]} negative and "
                         f"{k.signature[1]} positive eigenvalues (use kind='unit')")
    s = _coordinate_index(k, solve_for)
    target = -1.0 if kind == "timelike" else 0.0
    others = u.copy()
    others[..., s] = 0.0
    a = g[..., s, s]
    b = 2.0 * np.einsum("...j,...j->...", g[..., s, :], others)
    c = np.einsum("...ij,...i,...j->...", g, others, others) - target
    with np.errstate(all="ignore"):
        disc = b * b - 4.0 * a * c
        scale = b * b + np.abs(4.0 * a * c)
        disc = np.where((disc < 0) & (disc > -1e-14 * scale), 0.0, disc)
        sq = np.sqrt(disc)
        # stable roots: q = -(b + sign(b) sqrt(disc)) / 2, roots q/a and c/q
        q = -0.5 * (b + np.where(b >= 0, 1.0, -1.0) * sq)
        r1 = q / a
        r2 = np.where(q != 0, c / q, -b / (2 * a))
        hi, lo = np.maximum(r1, r2), np.minimum(r1, r2)
        root = np.where(u[..., s] >= 0, hi, lo)
        linear = np.abs(a) <= 1e-14 * (np.abs(b) + np.abs(c) + 1e-300)
        root = np.where(linear, -c / b, root)
        # one Newton step polishes the root to rounding
        f = (a * root + b) * root + c
        df = 2 * a * root + b
        root = np.where(np.isfinite(f / df) & (df != 0), root - f / df, root)
    bad = ~np.isfinite(root) | ((disc < 0) & ~linear)
    if np.any(bad):
        first = tuple(np.argwhere(np.atleast_1d(bad))[0])
        raise ValueError(f"{k.name}.normalize: no real {kind} velocity solving for "
                         f"{k.coordinates[s]!r} in state {first} (the quadratic has no real "
                         "root); change the other components or solve_for")
    u[..., s] = root
    return np.concatenate([x, u], axis=-1)


def observer_velocity(k, x, observer, params=None) -> np.ndarray:
    """The observer's unit timelike velocity (..., dim) at x."""
    x = k._check_input("metric", x)
    g = k.metric(x, params)
    t = time_index(k)
    if isinstance(observer, str):
        if observer == "static":
            gtt = g[..., t, t]
            if np.any(~(gtt < 0)):
                raise ValueError(f"{k.name}: no static observer where g_{k.coordinates[t]}"
                                 f"{k.coordinates[t]} >= 0 (the time Killing vector is not "
                                 "timelike there, e.g. inside an ergoregion); use "
                                 "observer='zamo'")
            u = np.zeros(x.shape)
            u[..., t] = 1.0 / np.sqrt(-gtt)
            return u
        if observer == "zamo":
            # the observer normal to the slices t = const: u^mu = -g^{mu t} / sqrt(-g^{tt});
            # for a stationary axisymmetric metric, u = (d_t + omega d_phi) / norm with
            # omega = -g_tphi / g_phiphi, and zero angular momentum.
            ginv = k.inverse_metric(x, params)
            gtt = ginv[..., t, t]
            if np.any(~(gtt < 0)):
                raise ValueError(f"{k.name}: no zero-angular-momentum observer where "
                                 f"g^{k.coordinates[t]}{k.coordinates[t]} >= 0")
            return -ginv[..., :, t] / np.sqrt(-gtt)[..., None]
        raise ValueError(f"observer must be 'static', 'zamo', None or a velocity array, got "
                         f"{observer!r}")
    u = np.broadcast_to(np.asarray(observer, dtype=np.float64), x.shape)
    n = np.einsum("...ij,...i,...j->...", g, u, u)
    if np.any(~(n < 0)):
        raise ValueError(f"{k.name}: the observer velocity must be timelike (g(u,u) < 0)")
    return u / np.sqrt(-n)[..., None]


def frame(k, x, observer="static", params=None) -> np.ndarray:
    """Orthonormal tetrad (..., dim, dim) with [..., a, mu] = e_(a)^mu.

    Lorentzian metrics: row 0 is the observer's velocity, rows 1.. come from Gram-Schmidt
    (with respect to g) of the coordinate basis vectors other than the time coordinate, in
    coordinate order. Riemannian metrics (observer None or "static"): Gram-Schmidt of all
    coordinate basis vectors in order.
    """
    x = k._check_input("metric", x)
    g = k.metric(x, params)
    dim = k.dim
    rows = []
    eta = []
    if _riemannian(k):
        if observer not in (None, "static"):
            raise ValueError(f"{k.name}: a Riemannian metric has no observers; use "
                             "observer=None")
        candidates = list(range(dim))
    else:
        if not _lorentzian(k):
            raise ValueError(f"{k.name}: frames need a Lorentzian (-, +, ...) or Riemannian "
                             "metric")
        if observer is None:
            raise ValueError(f"{k.name}: a Lorentzian metric needs an observer")
        u = observer_velocity(k, x, observer, params)
        rows.append(u)
        eta.append(-1.0)
        t = time_index(k)
        candidates = [i for i in range(dim) if i != t]
    for i in candidates:
        v = np.zeros(x.shape)
        v[..., i] = 1.0
        for e, s in zip(rows, eta):
            v = v - s * np.einsum("...ij,...i,...j->...", g, v, e)[..., None] * e
        n = np.einsum("...ij,...i,...j->...", g, v, v)
        if np.any(~(n > 0)):
            raise ValueError(f"{k.name}: Gram-Schmidt failed on the basis vector "
                             f"d_{k.coordinates[i]} (not spacelike after projection)")
        rows.append(v / np.sqrt(n)[..., None])
        eta.append(1.0)
    return np.stack(rows, axis=-2)


def from_frame(k, x, v, observer="static", params=None) -> np.ndarray:
    """[x, v^(a) e_(a)^mu] (..., 2*dim) for local components v (..., dim)."""
    x = k._check_input("metric", x)
    e = frame(k, x, observer, params)
    v = np.asarray(v, dtype=np.float64)
    if v.shape[-1:] != (k.dim,):
        raise ValueError(f"{k.name}.from_frame: v must have last axis {k.dim}, got {v.shape}")
    u = np.einsum("...a,...am->...m", v, e)
    x = np.broadcast_to(x, u.shape)
    return np.concatenate([x, u], axis=-1)


def camera(k, x, forward, up, fov, shape, observer="static", params=None) -> np.ndarray:
    """Null states (height, width, 2*dim) for a pinhole camera at the point x (dim,).

    forward, up: spatial directions in the observer's frame (components along e_(1), e_(2),
    e_(3)); fov: full horizontal angle (radians); shape: (height, width). Pixel (0, 0) is top
    left; columns run along forward x up (to the right), rows opposite to up. Each state's
    velocity has local components (-1, d) with d the unit direction through the pixel centre:
    the photon that reaches the camera from direction d has momentum k = e_(0) - d, and the
    state carries -k, which points from the camera into the scene and backwards in time.
    Integrate with lam_end > 0: the physical photon travels the reversed path, with
    momentum p_mu = -(g u)_mu (which matters for redshift). Taking -k rather than e_(0) + d
    matters in rotating spacetimes: reversing time reverses the rotation.
    """
    if k.dim != 4 or not _lorentzian(k):
        raise ValueError(f"{k.name}: the camera needs a 4-dimensional Lorentzian metric")
    x = np.asarray(x, dtype=np.float64)
    if x.shape != (4,):
        raise ValueError(f"camera position must be one point of shape (4,), got {x.shape}")
    h, w = (int(s) for s in shape)
    if h < 1 or w < 1:
        raise ValueError(f"shape must be (height, width) >= 1, got {shape}")
    if not 0 < fov < np.pi:
        raise ValueError(f"fov must be in (0, pi) radians, got {fov}")
    f = np.asarray(forward, dtype=np.float64)
    upv = np.asarray(up, dtype=np.float64)
    f = f / np.linalg.norm(f)
    upv = upv - np.dot(upv, f) * f
    nu = np.linalg.norm(upv)
    if nu < 1e-12:
        raise ValueError("up must not be parallel to forward")
    upv = upv / nu
    right = np.cross(f, upv)
    half = np.tan(fov / 2)
    sx = ((np.arange(w) + 0.5) / w * 2 - 1) * half
    sy = (1 - (np.arange(h) + 0.5) / h * 2) * half * h / w
    d = f + sx[None, :, None] * right + sy[:, None, None] * upv
    d /= np.linalg.norm(d, axis=-1, keepdims=True)
    local = np.concatenate([-np.ones((h, w, 1)), d], axis=-1)
    e = frame(k, x, observer, params)
    u = np.einsum("hwa,am->hwm", local, e)
    return np.concatenate([np.broadcast_to(x, (h, w, 4)), u], axis=-1)
