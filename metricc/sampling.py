"""Random points inside a spec's domain (NumPy only).

Coordinates carry no ranges in a spec, so points are drawn from a spread of scales (each
coordinate uniform in [-s, s] with s log-uniform between 0.3 and 3e7) and kept where every
domain expression is finite and > 0 and the metric is finite. The same sampler serves the build
stage (validating a metric numerically) and the runtime (self-checks, tests).
"""
from __future__ import annotations

from typing import Callable

import numpy as np


def candidate_points(rng: np.random.Generator, n: int, dim: int) -> np.ndarray:
    """(n, dim) candidate points spread over many scales."""
    scale = 10.0 ** rng.uniform(-0.5, 7.5, size=(n, dim))
    # Half the candidates share one scale across coordinates, so typical spacetime points
    # (moderate r together with angles) are common.
    shared = rng.random(n) < 0.5
    scale[shared] = scale[shared, :1]
    return rng.uniform(-1.0, 1.0, size=(n, dim)) * scale


def sample_inside(accept: Callable[[np.ndarray], np.ndarray], dim: int, n: int,
                  seed: int = 20261201, max_rounds: int = 40) -> np.ndarray:
    """Up to ``n`` points (m, dim), m <= n, for which ``accept(points) -> bool (N,)`` is true.

    Deterministic for a given seed. Returns fewer points (possibly none) if the domain is hard
    to hit.
    """
    rng = np.random.default_rng(seed)
    found: list[np.ndarray] = []
    count = 0
    for _ in range(max_rounds):
        cand = candidate_points(rng, max(4 * n, 64), dim)
        with np.errstate(all="ignore"):
            ok = np.asarray(accept(cand), dtype=bool)
        found.append(cand[ok])
        count += int(ok.sum())
        if count >= n:
            break
    pts = np.concatenate(found, axis=0) if found else np.empty((0, dim))
    return pts[:n]
