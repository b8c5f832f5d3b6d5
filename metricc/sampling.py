"""Random points inside a spec's domain (NumPy only).

A spec may say where each coordinate is sampled (its ``[sampling]`` table: ``r = [2.5, 50]``);
coordinates without one are drawn uniform in [-s, s] around the spec's own scales: s is an
anchor (1 or the magnitude of a parameter default, so a mass of 1e8 puts points near 1e8)
times 10^u with u uniform in [-0.5, 1.5]. Only if too few points land inside the domain are
the scales widened, gradually, up to 10^-6 .. 10^7.5 times the anchor. Moderate scales come
first because a metric is judged where it is meant to be used: exp(t) or r^40 overflow far
out, and neither proves a metric singular. Points are kept where every domain expression is
finite and > 0 and the metric is finite. The same sampler serves the build stage (validating
a metric numerically) and the runtime (``metricc verify``).
"""
from __future__ import annotations

from typing import Callable, Sequence

import numpy as np

MODERATE = (-0.5, 1.5)     # log10 of the spread around an anchor scale, first rounds
WIDEST = (-6.0, 7.5)       # log10 of the spread after every widening round


def anchor_scales(defaults: Sequence[float] = ()) -> np.ndarray:
    """1 and the magnitudes of the non-zero parameter defaults (within 1e-100 .. 1e100)."""
    mags = [abs(float(v)) for v in defaults if 1e-100 <= abs(float(v)) <= 1e100]
    return np.unique(np.array([1.0] + mags))


def candidate_points(rng: np.random.Generator, n: int, dim: int,
                     log_spread: tuple[float, float] = MODERATE,
                     anchors: np.ndarray | None = None,
                     region: Sequence[tuple[float, float] | None] | None = None) -> np.ndarray:
    """(n, dim) candidate points: coordinate c uniform in region[c] = (lo, hi) when given
    (half of them log-uniform when lo and hi have one sign and span over two decades), else
    uniform in [-s, s], s = anchor * 10^U(log_spread)."""
    anchors = anchor_scales() if anchors is None else np.asarray(anchors, dtype=float)
    scale = anchors[rng.integers(len(anchors), size=(n, dim))] * \
        10.0 ** rng.uniform(*log_spread, size=(n, dim))
    # Half the candidates share one scale across coordinates, so typical spacetime points
    # (moderate r together with angles) are common.
    shared = rng.random(n) < 0.5
    scale[shared] = scale[shared, :1]
    pts = rng.uniform(-1.0, 1.0, size=(n, dim)) * scale
    for c, span in enumerate(region or ()):
        if span is None:
            continue
        lo, hi = float(span[0]), float(span[1])
        pts[:, c] = rng.uniform(lo, hi, size=n)
        if lo * hi > 0 and hi / lo > 100:
            # spread over decades as well, so the small end is not left out
            logs = rng.uniform(np.log(abs(lo)), np.log(abs(hi)), size=n)
            use = rng.random(n) < 0.5
            pts[use, c] = np.sign(lo) * np.exp(logs[use])
    return pts


def sample_inside(accept: Callable[[np.ndarray], np.ndarray], dim: int, n: int,
                  seed: int = 20261201, max_rounds: int = 40,
                  anchors: np.ndarray | None = None,
                  region: Sequence[tuple[float, float] | None] | None = None) -> np.ndarray:
    """Up to ``n`` points (m, dim), m <= n, for which ``accept(points) -> bool (N,)`` is true.

    Deterministic for a given seed. Returns fewer points (possibly none) if the domain is hard
    to hit. The first half of the rounds draw moderate scales around the anchors; later rounds
    widen the spread step by step towards WIDEST (for domains far from every anchor).
    Coordinates with a region are always drawn from it. Of the accepted points (about 2n are
    gathered) the n that go least beyond the moderate range are kept: a large mass needs r
    near 1e30, but the angles beside it are better near 1 (at 1e30 no step resolves sin).
    """
    rng = np.random.default_rng(seed)
    found: list[np.ndarray] = []
    count = 0
    half = max(1, max_rounds // 2)
    for round_ in range(max_rounds):
        w = max(0, round_ - half) / half
        spread = (MODERATE[0] + w * (WIDEST[0] - MODERATE[0]),
                  MODERATE[1] + w * (WIDEST[1] - MODERATE[1]))
        cand = candidate_points(rng, max(4 * n, 64), dim, spread, anchors, region)
        with np.errstate(all="ignore"):
            ok = np.asarray(accept(cand), dtype=bool)
        found.append(cand[ok])
        count += int(ok.sum())
        if count >= 2 * n:
            break
    pts = np.concatenate(found, axis=0) if found else np.empty((0, dim))
    with np.errstate(divide="ignore"):
        excess = np.maximum(np.log10(np.abs(pts)) - MODERATE[1], 0.0)
    for c, span in enumerate(region or ()):
        if span is not None:
            excess[:, c] = 0.0
    order = np.argsort(excess.sum(axis=1), kind="stable")
    return pts[order[:n]]


UNDERFLOW_NEAR = 1e-100     # a row whose entries come this near to 0 somewhere can underflow


def evaluable(g: np.ndarray) -> np.ndarray:
    """(m,) bool for a batch of metrics g (m, n, n): finite, and no row that underflowed.

    A row that is exactly zero at a point, while the same row is non-zero but below
    UNDERFLOW_NEAR in size at another point of the batch, is an entry that underflowed far
    out (exp(2 H t) with H = 100 is exactly 0 below t = -3.8): it would make a valid metric
    look singular, so the point is skipped, not blamed. A row that is zero everywhere (a
    missing entry) or zero on an open set with ordinary sizes elsewhere (r + abs(r)) is the
    metric's own, and is still found singular."""
    finite = np.all(np.isfinite(g), axis=(1, 2))
    mag = np.where(finite[:, None, None], np.abs(g), np.inf)
    zero_row = np.all(mag == 0, axis=2)                                 # (m, n)
    with np.errstate(invalid="ignore"):
        row_size = np.max(np.where(np.isfinite(mag), mag, 0.0), axis=2)   # (m, n)
    tiny = (row_size > 0) & (row_size < UNDERFLOW_NEAR)
    prone = np.any(tiny & finite[:, None], axis=0)                       # (n,)
    return finite & ~np.any(zero_row & prone[None, :], axis=1)


def neighbours(rng: np.random.Generator, point: np.ndarray, k: int,
               region: Sequence[tuple[float, float] | None] | None = None) -> np.ndarray:
    """(k, dim) points near ``point``: each coordinate moved by up to 1e-3 of its own size
    (or of the point's size when it is near 0), kept inside the region. Used to tell a
    property that holds on an open set from one that holds only on a surface."""
    size = np.maximum(np.abs(point), 1e-3 * max(float(np.max(np.abs(point))), 1e-300))
    pts = point + rng.uniform(-1e-3, 1e-3, size=(k, len(point))) * size
    for c, span in enumerate(region or ()):
        if span is not None:
            pts[:, c] = np.clip(pts[:, c], span[0], span[1])
    return pts


# A metric is judged on S = D^-1/2 g D^-1/2, the diagonal scaling that brings every row's
# largest entry to 1 (Ruiz's equilibration, computed from log|g| so that no product of
# entries can overflow or underflow). Scaling changes neither singularity nor the signature
# (Sylvester's law of inertia), but it removes the spread of sizes between coordinates: a
# plane wave [[H, 1], [1, 0]] scales to [[1, 1], [1, 0]] whatever H, the rotating Goedel
# block to a constant matrix.
EQUILIBRATE_STEPS = 30
SINGULAR_RTOL = 1e-12        # min |eig S| / max |eig S| at or below: singular to rounding
SIGNATURE_RTOL = 1e-9        # below this the sign of the smallest eigenvalue is not trusted


def log_scales(g: np.ndarray) -> np.ndarray:
    """log d (m, n) of the equilibrating scaling of finite symmetric g (m, n, n): the rows of
    D^-1/2 g D^-1/2 have largest |entry| 1 (Ruiz's iteration, in logs). sqrt(d_a d_b) is the
    natural size of entry g_ab, the yardstick for its rounding. Zero rows get log d = 0."""
    with np.errstate(divide="ignore"):
        lg = np.log(np.abs(g))
    s = np.max(lg, axis=2)
    s = np.where(np.isfinite(s), s, 0.0)
    with np.errstate(invalid="ignore"):
        for _ in range(EQUILIBRATE_STEPS):
            r = np.max(lg - s[:, :, None] / 2 - s[:, None, :] / 2, axis=2)
            r = np.where(np.isfinite(r), r, 0.0)
            s = s + r
            if np.all(np.abs(r) < 1e-6):
                break
    return s


def equilibrate(g: np.ndarray) -> np.ndarray:
    """S (m, n, n) = D^-1/2 g D^-1/2 with each row of S having largest |entry| 1, for finite
    symmetric g (m, n, n). Zero rows stay zero."""
    s = log_scales(g)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.sign(g) * np.exp(np.log(np.abs(g)) - s[:, :, None] / 2 - s[:, None, :] / 2)


def scaled_spectrum(g: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(eigenvalues of S (m, n) ascending, min |eig| / max |eig| (m,)) for finite g."""
    eig = np.linalg.eigvalsh(equilibrate(g))
    mags = np.abs(eig)
    top = np.max(mags, axis=1)
    return eig, np.where(top > 0, np.min(mags, axis=1) / np.where(top > 0, top, 1.0), 0.0)
