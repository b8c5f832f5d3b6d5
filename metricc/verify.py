"""Self-checks of a spec's kernels at random points inside its domain (``metricc verify``).

Each check compares the kernels with an independent route to the same quantity (central
finite differences of the metric kernel, the other backend, algebraic identities), so a wrong
or corrupted generated file shows up as a failed row. NumPy only.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .sampling import sample_inside


@dataclass(frozen=True)
class Check:
    """One row of the verification table: the worst value seen and its tolerance."""
    name: str
    value: float
    tolerance: float
    detail: str = ""

    @property
    def ok(self) -> bool:
        return bool(np.isfinite(self.value) and self.value <= self.tolerance)


def sample_states(k, n: int, seed: int = 1) -> np.ndarray:
    """(m, 2*dim) random states: positions inside the domain, velocities ~ N(0, 1)."""
    def accept(points):
        with np.errstate(all="ignore"):
            ok = k.inside(points) if k.domain_names else np.ones(len(points), dtype=bool)
            g = k.metric(points)
            return ok & np.all(np.isfinite(g), axis=(1, 2))

    x = sample_inside(accept, k.dim, n, seed=seed, moderate_first=True)
    rng = np.random.default_rng(seed + 1)
    return np.concatenate([x, rng.normal(size=x.shape)], axis=1)


def _metric_derivatives(k, x: np.ndarray) -> np.ndarray:
    """d_c g_ab by fourth-order central differences: (m, dim, dim, dim) as [m, c, a, b]."""
    m, dim = x.shape
    out = np.empty((m, dim, dim, dim))
    for c in range(dim):
        h = 1e-4 * np.maximum(1.0, np.abs(x[:, c]))
        e = np.zeros_like(x)
        e[:, c] = h
        g2p, gp, gm, g2m = (k.metric(x + s * e) for s in (2, 1, -1, -2))
        out[:, c] = (-g2p + 8 * gp - 8 * gm + g2m) / (12 * h[:, None, None])
    return out


def _rel(a, b, scale=None) -> float:
    a, b = np.asarray(a), np.asarray(b)
    if scale is None:
        scale = np.maximum(np.abs(a), np.abs(b))
    scale = np.maximum(scale, 1e-300)
    with np.errstate(all="ignore"):
        r = np.abs(a - b) / scale
    return float(np.nanmax(r)) if r.size else 0.0


def run_checks(k, other=None, n: int = 24, seed: int = 1, expected_signature=None) -> list[Check]:
    """Run every check on kernels ``k`` (and compare with ``other``, the other backend)."""
    y = sample_states(k, n, seed)
    checks: list[Check] = []
    if len(y) == 0:
        return [Check("points inside the domain", np.inf, 0.0, "none found")]
    dim = k.dim
    x, u = y[:, :dim], y[:, dim:]
    g = k.metric(x)
    ginv = k.inverse_metric(x)
    gam = k.christoffel(x)
    gscale = np.max(np.abs(g), axis=(1, 2))
    checks.append(Check("metric symmetric", _rel(g, np.swapaxes(g, 1, 2), gscale[:, None, None]),
                        0.0, "max |g_ab - g_ba| / max |g|"))
    hadamard = np.abs(np.linalg.det(g)) / np.prod(np.linalg.norm(g, axis=2), axis=1)
    checks.append(Check("metric non-singular", float(np.max(1e-12 / np.maximum(hadamard, 1e-300))),
                        1.0, f"min |det g| / prod |row| = {np.min(hadamard):.2e} (>= 1e-12)"))
    eig = np.linalg.eigvalsh(g)
    counts = {(int(np.sum(e < 0)), int(np.sum(e > 0))) for e in eig}
    want = expected_signature or tuple(k.signature)
    bad = sum(1 for c in counts if c != tuple(want))
    checks.append(Check("signature", float(bad), 0.0,
                        f"(negative, positive) seen {sorted(counts)}, expected {tuple(want)}"))
    eye = np.einsum("mab,mbc->mac", g, ginv)
    checks.append(Check("inverse metric", _rel(eye, np.broadcast_to(np.eye(dim), eye.shape), 1.0),
                        1e-10, "max |g g^-1 - I|"))
    if other is not None:
        worst = 0.0
        for name in ("metric", "inverse_metric", "christoffel", "geodesic_rhs", "hamilton_rhs",
                     "norm"):
            arr = x if name in ("metric", "inverse_metric", "christoffel") else y
            a, b = getattr(k, name)(arr), getattr(other, name)(arr)
            scale = np.max(np.abs(a).reshape(len(arr), -1), axis=1)
            worst = max(worst, _rel(a, b, scale.reshape((-1,) + (1,) * (a.ndim - 1))))
        checks.append(Check(f"{k.backend} and {other.backend} agree", worst, 1e-11,
                            "max relative difference over all kernels"))
    dg = _metric_derivatives(k, x)
    # Gamma^a_bc = 1/2 g^ad (d_b g_dc + d_c g_db - d_d g_bc), from the differenced metric
    first = 0.5 * (np.einsum("mbdc->mdbc", dg) + np.einsum("mcdb->mdbc", dg)
                   - np.einsum("mdbc->mdbc", dg))
    ref = np.einsum("mad,mdbc->mabc", ginv, first)
    scale = np.max(np.abs(ref).reshape(len(x), -1), axis=1)[:, None, None, None] + 1e-300
    checks.append(Check("Christoffel vs finite differences", _rel(gam, ref, scale), 1e-6,
                        "max |Gamma - Gamma_fd| / max |Gamma_fd| (4th-order central differences)"))
    checks.append(Check("Christoffel symmetric", _rel(gam, np.swapaxes(gam, 2, 3),
                                                      scale), 0.0, "Gamma^a_bc - Gamma^a_cb"))
    rhs = k.geodesic_rhs(y)
    acc = rhs[:, dim:]
    # d/dlambda g(u,u) = d_c g_ab u^c u^a u^b + 2 g_ab u^a du^b/dlambda
    term1 = np.einsum("mcab,mc,ma,mb->m", dg, u, u, u)
    term2 = 2 * np.einsum("mab,ma,mb->m", g, u, acc)
    size = np.abs(np.einsum("mcab,mc,ma,mb->mcab", dg, u, u, u)).sum(axis=(1, 2, 3)) + \
        np.abs(term2) + 1e-300
    checks.append(Check("g(u,u) conserved by geodesic_rhs", float(np.max(np.abs(term1 + term2)
                                                                            / size)), 1e-6,
                        "|d/dlambda g(u,u)| relative to its terms"))
    if k.ignorable:
        worst = 0.0
        for name in k.ignorable:
            kk = k.coordinates.index(name)
            # d/dlambda (g_kb u^b) = d_c g_kb u^c u^b + g_kb du^b/dlambda
            t1 = np.einsum("mcb,mc,mb->m", dg[:, :, kk, :], u, u)
            t2 = np.einsum("mb,mb->m", g[:, kk, :], acc)
            sz = np.abs(np.einsum("mcb,mc,mb->mcb", dg[:, :, kk, :], u, u)).sum(axis=(1, 2)) + \
                np.abs(t2) + 1e-300
            worst = max(worst, float(np.max(np.abs(t1 + t2) / sz)))
        checks.append(Check("ignorable momenta conserved", worst, 1e-6,
                            f"d/dlambda p_k for k in {', '.join(k.ignorable)}"))
    z = k.momenta(y)
    hz = k.hamilton_rhs(z)
    checks.append(Check("Hamiltonian: dx/dlambda = u", _rel(hz[:, :dim], u,
                        np.max(np.abs(u), axis=1, keepdims=True)), 1e-11,
                        "hamilton_rhs position part vs the velocity"))
    # dp_a/dlambda = d/dlambda (g_ab u^b) = d_c g_ab u^c u^b + g_ab du^b/dlambda
    dp = np.einsum("mcab,mc,mb->ma", dg, u, u) + np.einsum("mab,mb->ma", g, acc)
    pscale = np.abs(np.einsum("mcab,mc,mb->mcab", dg, u, u)).sum(axis=(1, 3)) + 1e-300
    checks.append(Check("Hamiltonian: dp/dlambda = d(g u)/dlambda",
                        float(np.max(np.abs(hz[:, dim:] - dp) / np.max(pscale, axis=1,
                                                                       keepdims=True))),
                        1e-6, "hamilton_rhs momentum part vs differenced metric"))
    checks.insert(0, Check("points inside the domain", 0.0, 0.0, f"{len(y)} sampled"))
    return checks


def format_table(spec_name: str, backend: str, checks: list[Check]) -> str:
    width = max(len(c.name) for c in checks)
    lines = [f"metricc verify: {spec_name} ({backend} backend)",
             f"  {'check':<{width}}  {'worst':>10}  {'tolerance':>9}  result  detail"]
    for c in checks:
        lines.append(f"  {c.name:<{width}}  {c.value:>10.2e}  {c.tolerance:>9.1e}  "
                     f"{'ok' if c.ok else 'FAIL':<6}  {c.detail}")
    failed = sum(not c.ok for c in checks)
    lines.append(f"  {len(checks) - failed} of {len(checks)} checks passed"
                 + (f"; FAILED: {', '.join(c.name for c in checks if not c.ok)}" if failed else ""))
    return "\n".join(lines)
