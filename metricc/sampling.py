"""Random points inside a spec's domain (NumPy only).

Coordinates carry no ranges in a spec, so points are drawn from a spread of scales (each
coordinate uniform in [-s, s] with s log-uniform between 0.3 and 3e7) and kept where every
domain expression is finite and > 0 and the metric is finite. The same sampler serves the build
stage (validating a metric numerically) and the runtime (self-checks, tests).
"""
from __future__ import annotations

from typing import Callable

import numpy as np


def candidate_points(rng: np.random.Generator, n: int, dim: int,
                     max_log_scale: float = 7.5) -> np.ndarray:
    """(n, dim) candidate points spread over scales 10^-0.5 .. 10^max_log_scale."""
    scale = 10.0 ** rng.uniform(-0.5, max_log_scale, size=(n, dim))
    # Half the candidates share one scale across coordinates, so typical spacetime points
    # (moderate r together with angles) are common.
    shared = rng.random(n) < 0.5
    scale[shared] = scale[shared, :1]
    return rng.uniform(-1.0, 1.0, size=(n, dim)) * scale


def sample_inside(accept: Callable[[np.ndarray], np.ndarray], dim: int, n: int,
                  seed: int = 20261201, max_rounds: int = 40,
                  moderate_first: bool = False) -> np.ndarray:
    """Up to ``n`` points (m, dim), m <= n, for which ``accept(points) -> bool (N,)`` is true.

    Deterministic for a given seed. Returns fewer points (possibly none) if the domain is hard
    to hit. ``moderate_first``: start with coordinates of order 0.3 to 30 (where finite
    differences with steps relative to the coordinate are meaningful, angles included) and
    widen the scales only if too few points are found.
    """
    rng = np.random.default_rng(seed)
    found: list[np.ndarray] = []
    count = 0
    for round_ in range(max_rounds):
        top = 7.5
        if moderate_first:
            top = 1.5 + 6.0 * max(0, round_ - max_rounds // 2) / (max_rounds // 2)
        cand = candidate_points(rng, max(4 * n, 64), dim, top)
        with np.errstate(all="ignore"):
            ok = np.asarray(accept(cand), dtype=bool)
        found.append(cand[ok])
        count += int(ok.sum())
        if count >= n:
            break
    pts = np.concatenate(found, axis=0) if found else np.empty((0, dim))
    return pts[:n]
