"""Random states and parameters inside each shipped spec's domain (test-side knowledge).

The ranges are chosen by hand from the physics of each metric (outside horizons, away from
coordinate axes); they are test inputs, not reference values.
"""
from __future__ import annotations

import numpy as np

PI = np.pi


def random_params(name: str, rng: np.random.Generator, n: int) -> dict:
    """Per-state parameter arrays (n,) inside the physically valid range of each spec."""
    if name in ("kerr", "kerr_schild"):
        M = rng.uniform(0.5, 1.5, n)
        return {"M": M, "a": rng.uniform(-0.99, 0.99, n) * M}
    if name == "schwarzschild":
        return {"M": rng.uniform(0.5, 1.5, n)}
    if name == "reissner_nordstrom":
        M = rng.uniform(0.5, 1.5, n)
        return {"M": M, "Q": rng.uniform(-0.99, 0.99, n) * M}
    if name == "sphere":
        return {"R": rng.uniform(0.5, 3.0, n)}
    if name == "ellipsoid":
        return {"a": rng.uniform(6.0e6, 7.0e6, n), "f": rng.uniform(0.0, 0.01, n)}
    return {}


def random_points(name: str, rng: np.random.Generator, n: int) -> np.ndarray:
    """(n, dim) coordinates inside the domain for any parameters from random_params."""
    if name in ("kerr", "schwarzschild", "reissner_nordstrom", "minkowski"):
        t = rng.uniform(-10, 10, n)
        r = rng.uniform(3.5, 30.0, n)
        th = rng.uniform(0.2, PI - 0.2, n)
        ph = rng.uniform(-PI, PI, n)
        return np.stack([t, r, th, ph], axis=-1)
    if name == "kerr_schild":
        t = rng.uniform(-10, 10, n)
        d = rng.normal(size=(n, 3))
        d /= np.linalg.norm(d, axis=1, keepdims=True)
        xyz = d * rng.uniform(3.5, 30.0, (n, 1))
        return np.concatenate([t[:, None], xyz], axis=1)
    if name == "sphere":
        return np.stack([rng.uniform(0.2, PI - 0.2, n), rng.uniform(-PI, PI, n)], axis=-1)
    if name == "ellipsoid":
        return np.stack([rng.uniform(-1.4, 1.4, n), rng.uniform(-PI, PI, n)], axis=-1)
    raise KeyError(name)


def random_states(name: str, rng: np.random.Generator, n: int) -> np.ndarray:
    """(n, 2*dim) states [x, u] with random velocities of order one."""
    x = random_points(name, rng, n)
    u = rng.normal(size=x.shape)
    return np.concatenate([x, u], axis=-1)
