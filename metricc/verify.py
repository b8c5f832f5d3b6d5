"""Self-checks of a spec's kernels at random points inside its domain (``metricc verify``).

Each check compares the kernels with an independent route to the same quantity (finite
differences of the metric kernel, the other backend, algebraic identities), so a wrong or
corrupted generated file shows up as a failed row. A failed row must mean a wrong kernel, so
every tolerance is scale-free and carries an honest floor:

- derivatives of the metric come from fourth-order central differences over a ladder of
  steps, scaled to each coordinate of each point; per entry the step whose result agrees
  best with its neighbours on the ladder is kept, and that agreement (plus the rounding
  floor eps |g| / h) is the derivative's error bound;
- a comparison with differenced derivatives allows 1e-6 of the size of its terms (sums of
  |products|, never the result, which may cancel to 1e-16) plus ten times the propagated
  error bound of the differences;
- comparisons that involve the inverse metric scale with its conditioning: the Skeel
  number || |g^-1| |g| ||, which no diagonal change of units alters; C against NumPy allows
  each output a multiple of its own change when the inputs move by a few ulp.

NumPy only.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .sampling import SIGNATURE_RTOL, SINGULAR_RTOL, anchor_scales, evaluable, log_scales, \
    sample_inside, scaled_spectrum

EPS = float(np.finfo(float).eps)
FD_LEVELS = 40          # steps 0.2 s, 0.1 s, ... 0.2 s 2^-39 (s: the coordinate's size)
LOCAL_CHANGE = 0.1      # largest relative change of an entry across a step
FD_SLACK = 10.0         # allowed multiple of a difference's own error bound
TERM_RTOL = 1e-8        # allowed error relative to the size of the terms
AGREE_RTOL = 1e-11      # C against NumPy, relative to the point's largest output ...
AGREE_SLACK = 100.0     # ... plus this many times the output's change under ulp-sized inputs
PROBES = 4
HAMILTON_RTOL = 1e-10   # g^-1 (g u) = u, relative to |g^-1| |g| |u|


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


def region_of(k) -> list:
    """Per coordinate (lo, hi) from the spec's [sampling] table (carried in the manifest)."""
    manifest = getattr(k, "_manifest", None) or {}
    given = {name: (lo, hi) for name, lo, hi in manifest.get("sampling", ())}
    return [given.get(c) for c in k.coordinates]


def sample_states(k, n: int, seed: int = 1) -> np.ndarray:
    """(m, 2*dim) random states: positions inside the domain (moderate scales around 1 and the
    parameter defaults, or the spec's [sampling] table), velocities ~ N(0, 1)."""
    def accept(points):
        with np.errstate(all="ignore"):
            ok = k.inside(points) if k.domain_names else np.ones(len(points), dtype=bool)
            return ok & evaluable(k.metric(points))

    x = sample_inside(accept, k.dim, n, seed=seed, anchors=anchor_scales(
        list(k.parameters.values())), region=region_of(k))
    rng = np.random.default_rng(seed + 1)
    return np.concatenate([x, rng.normal(size=x.shape)], axis=1)


def metric_derivatives(k, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """d_c g_ab and an error bound of each, both (m, dim, dim, dim) as [m, c, a, b].

    Fourth-order central differences with steps h = 0.2 s 2^-j, j < FD_LEVELS, where s is
    the size of coordinate c at the point (|x_c|, at least 1e-3 of the spec's smallest scale,
    see sampling.anchor_scales). The
    rounding floor of a step is 8 eps (sqrt(d_a d_b) + |x_c| |D|) / h: sqrt(d_a d_b) is the
    natural size of g_ab (the equilibrating scaling, see sampling.log_scales), not the entry
    itself, which may be a cancellation far below its terms (a warp bubble's shape function
    outside the bubble), and |x_c| |D| covers the rounding of the abscissae. Only steps below
    the local length scale are used: from the smallest step up, until some entry at some
    stencil point differs from its value at x by more than LOCAL_CHANGE of its natural size
    (an angle sampled near 1e8 must not be differenced with steps of 1e7, where sin averages
    to about 0 at every step, nor with steps near a multiple of its period).
    Of those, per entry, the step whose value differs least from both ladder neighbours is
    kept; the bound is that difference plus the floor. Entries with no usable step get an
    infinite bound.
    """
    m, dim = x.shape
    # a coordinate near 0 is differenced on the spec's smallest scale (1e-3 of the smallest
    # anchor), never on another coordinate's: an angle of 0.04 beside r = 1e31
    floor_size = 1e-3 * float(np.min(anchor_scales(list(k.parameters.values()))))
    size = np.maximum(np.abs(x), floor_size)
    ladder = 0.2 * 2.0 ** -np.arange(FD_LEVELS)
    g0 = k.metric(x)
    ls = log_scales(g0)
    natural = np.exp((ls[:, :, None] + ls[:, None, :]) / 2)      # (m, dim, dim)
    der = np.zeros((m, dim, dim, dim))
    err = np.full((m, dim, dim, dim), np.inf)
    for c in range(dim):
        h = ladder[:, None] * size[None, :, c]                    # (L, m)
        shifts = np.array([2.0, 1.0, -1.0, -2.0])
        pts = np.broadcast_to(x, (4, FD_LEVELS, m, dim)).copy()
        pts[..., c] += shifts[:, None, None] * h[None]
        # the step actually taken (x + h - x), so rounding of the coordinate cancels
        h_eff = ((pts[1, ..., c] - pts[2, ..., c]) / 2)[..., None, None]
        with np.errstate(all="ignore"):
            g = k.metric(pts.reshape(-1, dim)).reshape(4, FD_LEVELS, m, dim, dim)
            d = (-g[0] + 8 * g[1] - 8 * g[2] + g[3]) / (12 * h_eff)
            floor = 8 * EPS * (natural[None] + np.abs(x[None, :, c, None, None] * d)) / h_eff
            d = np.where(np.isfinite(d) & np.isfinite(floor), d, np.nan)
            # the local length scale: steps up to the first (from the small end) over which
            # some entry at some stencil point differs from its value at x by more than
            # LOCAL_CHANGE of its natural size
            change = np.max(np.abs(g - g0[None, None]) / natural[None, None],
                            axis=(0, 3, 4))                                   # (L, m)
            small = np.where(np.isfinite(change), change <= LOCAL_CHANGE, False)
            within = np.flip(np.logical_and.accumulate(np.flip(small, 0), axis=0), 0)
            spread = np.maximum(np.abs(d[1:-1] - d[:-2]), np.abs(d[1:-1] - d[2:]))
            score = np.where(within[1:-1, :, None, None], spread + floor[1:-1], np.inf)
        score = np.where(np.isfinite(score), score, np.inf)
        best = np.argmin(score, axis=0)                            # (m, dim, dim)
        pick = np.take_along_axis(d[1:-1], best[None], axis=0)[0]
        bound = np.take_along_axis(score, best[None], axis=0)[0]
        der[:, c] = np.where(np.isfinite(bound), pick, 0.0)
        err[:, c] = bound
    return der, err


def _rel(a, b, scale=None) -> float:
    a, b = np.asarray(a), np.asarray(b)
    if scale is None:
        scale = np.maximum(np.abs(a), np.abs(b))
    scale = np.maximum(scale, 1e-300)
    with np.errstate(all="ignore"):
        r = np.abs(a - b) / scale
    return float(np.nanmax(r)) if r.size else 0.0


def _ratio(resid, allowed) -> float:
    """max |resid| / allowed (arrays of one shape); 0/0 counts as 0."""
    with np.errstate(all="ignore"):
        r = np.abs(resid) / allowed
    r = np.where((np.abs(resid) == 0) & (allowed == 0), 0.0, r)
    return float(np.nanmax(r)) if r.size else 0.0


def _agreement_allowed(kernel, arr: np.ndarray, out: np.ndarray) -> np.ndarray:
    """How far two backends may differ on each output of ``kernel`` at ``arr`` (m, n):
    AGREE_RTOL of the point's largest output, plus AGREE_SLACK times the largest change of
    that output when every input moves by a few ulp (PROBES random moves). The second term is
    the output's own rounding sensitivity: large where an inverse of a badly conditioned
    metric enters (u = g^-1 p), or where the output is a cancellation of larger terms."""
    rng = np.random.default_rng(17)
    m = len(arr)
    top = np.max(np.abs(out).reshape(m, -1), axis=1).reshape((m,) + (1,) * (out.ndim - 1))
    moved = np.zeros_like(out)
    with np.errstate(all="ignore"):
        for _ in range(PROBES):
            nudged = arr * (1 + 4 * EPS * rng.uniform(-1, 1, size=arr.shape))
            moved = np.maximum(moved, np.abs(kernel(nudged) - out))
    return AGREE_RTOL * top + AGREE_SLACK * np.where(np.isfinite(moved), moved, np.inf)


def skeel(g: np.ndarray, ginv: np.ndarray) -> np.ndarray:
    """(m,) || |g^-1| |g| ||_inf: how much rounding in g can move g^-1 g (>= 1), invariant
    under a diagonal change of units."""
    with np.errstate(all="ignore"):
        k = np.max(np.einsum("mab,mbc->mac", np.abs(ginv), np.abs(g)).sum(axis=2), axis=1)
    return np.where(np.isfinite(k), np.maximum(k, 1.0), np.inf)


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
    kappa = skeel(g, ginv)
    gscale = np.max(np.abs(g), axis=(1, 2))
    checks.append(Check("metric symmetric", _rel(g, np.swapaxes(g, 1, 2), gscale[:, None, None]),
                        0.0, "max |g_ab - g_ba| / max |g|"))
    eig, rel = scaled_spectrum(g)
    checks.append(Check("metric non-singular", float(np.max(SINGULAR_RTOL / np.maximum(rel, 1e-300))),
                        1.0, f"min |eig| / max |eig| of g scaled to unit rows = {np.min(rel):.2e} "
                             f"(>= {SINGULAR_RTOL:.0e})"))
    clear = rel > SIGNATURE_RTOL
    counts = {(int(np.sum(e < 0)), int(np.sum(e > 0))) for e in eig[clear]}
    want = expected_signature or tuple(k.signature)
    bad = sum(1 for c in counts if c != tuple(want))
    checks.append(Check("signature", float(bad), 0.0,
                        f"(negative, positive) seen {sorted(counts)} at {int(clear.sum())} "
                        f"clear points, expected {tuple(want)}"))
    eye = np.einsum("mab,mbc->mac", g, ginv)
    with np.errstate(all="ignore"):
        ab = np.einsum("mab,mbc->mac", np.abs(g), np.abs(ginv))
    checks.append(Check("inverse metric", _ratio(eye - np.eye(dim), np.max(ab, axis=2,
                                                                            keepdims=True)),
                        1e-10, "max |g g^-1 - I| relative to |g| |g^-1| in its row"))
    if other is not None:
        worst = 0.0
        for name in ("metric", "inverse_metric", "christoffel", "geodesic_rhs", "hamilton_rhs",
                     "norm"):
            arr = x if name in ("metric", "inverse_metric", "christoffel") else y
            a, b = getattr(k, name)(arr), getattr(other, name)(arr)
            worst = max(worst, _ratio(a - b, _agreement_allowed(getattr(k, name), arr, a)))
        # the forward-mode kernels (metricc.tangent), in fixed random directions
        dirs = np.random.default_rng(23).normal(size=(len(y), 2, 2 * dim))
        for name, d in (("tangent", dirs), ("transport_rhs", dirs[:, :, :dim])):
            for form in ("geodesic", "hamilton"):
                arr = y if form == "geodesic" else k.momenta(y)
                fn = (lambda f, d, form: lambda a: f(a, d, form=form))(getattr(k, name), d,
                                                                        form)
                a, b = fn(arr), getattr(other, name)(arr, d, form=form)
                worst = max(worst, _ratio(a - b, _agreement_allowed(fn, arr, a)))
        checks.append(Check(f"{k.backend} and {other.backend} agree", worst, 1.0,
                            f"max |difference| / ({AGREE_RTOL:.0e} max |output| + "
                            f"{AGREE_SLACK:g} x its change under rounding-sized input changes)"))
    dg, dg_err = metric_derivatives(k, x)
    usable = np.all(np.isfinite(dg_err), axis=(1, 2, 3))
    if not np.any(usable):
        checks.append(Check("finite differences possible", np.inf, 0.0,
                            "no point with a finite stencil"))
        return checks
    x, u, y, g, ginv, gam, kappa = (a[usable] for a in (x, u, y, g, ginv, gam, kappa))
    dg, dg_err = dg[usable], dg_err[usable]
    term_rtol = TERM_RTOL + 100 * EPS * kappa          # (m,) rounding of the inverse grows
    # Gamma^a_bc = 1/2 g^ad (d_b g_dc + d_c g_db - d_d g_bc), from the differenced metric
    first = 0.5 * (np.einsum("mbdc->mdbc", dg) + np.einsum("mcdb->mdbc", dg)
                   - np.einsum("mdbc->mdbc", dg))
    first_size = 0.5 * (np.einsum("mbdc->mdbc", np.abs(dg)) + np.einsum("mcdb->mdbc", np.abs(dg))
                        + np.abs(dg))
    first_err = 0.5 * (np.einsum("mbdc->mdbc", dg_err) + np.einsum("mcdb->mdbc", dg_err)
                       + dg_err)
    ref = np.einsum("mad,mdbc->mabc", ginv, first)
    size = np.einsum("mad,mdbc->mabc", np.abs(ginv), first_size)
    unc = np.einsum("mad,mdbc->mabc", np.abs(ginv), first_err)
    allowed = term_rtol[:, None, None, None] * size + FD_SLACK * unc
    checks.append(Check("Christoffel vs finite differences", _ratio(gam - ref, allowed), 1.0,
                        f"|Gamma - Gamma_fd| / ({TERM_RTOL:.0e} sum |g^ad||dg| + "
                        f"{FD_SLACK:g} x difference error bound)"))
    gscale = np.max(np.abs(gam).reshape(len(x), -1), axis=1)[:, None, None, None]
    checks.append(Check("Christoffel symmetric", _rel(gam, np.swapaxes(gam, 2, 3),
                                                      gscale), 0.0, "Gamma^a_bc - Gamma^a_cb"))
    rhs = k.geodesic_rhs(y)
    acc = rhs[:, dim:]
    uuu = np.einsum("mc,ma,mb->mcab", np.abs(u), np.abs(u), np.abs(u))
    # d/dlambda g(u,u) = d_c g_ab u^c u^a u^b + 2 g_ab u^a du^b/dlambda
    term1 = np.einsum("mcab,mc,ma,mb->m", dg, u, u, u)
    term2 = 2 * np.einsum("mab,ma,mb->m", g, u, acc)
    size = np.einsum("mcab,mcab->m", np.abs(dg), uuu) + \
        2 * np.einsum("mab,ma,mb->m", np.abs(g), np.abs(u), np.abs(acc))
    unc = np.einsum("mcab,mcab->m", dg_err, uuu)
    checks.append(Check("g(u,u) conserved by geodesic_rhs",
                        _ratio(term1 + term2, term_rtol * size + FD_SLACK * unc), 1.0,
                        "|d/dlambda g(u,u)| against the size of its terms"))
    uu = np.einsum("mc,mb->mcb", np.abs(u), np.abs(u))
    if k.ignorable:
        worst = 0.0
        for name in k.ignorable:
            kk = k.coordinates.index(name)
            # d/dlambda (g_kb u^b) = d_c g_kb u^c u^b + g_kb du^b/dlambda
            t1 = np.einsum("mcb,mc,mb->m", dg[:, :, kk, :], u, u)
            t2 = np.einsum("mb,mb->m", g[:, kk, :], acc)
            sz = np.einsum("mcb,mcb->m", np.abs(dg[:, :, kk, :]), uu) + \
                np.einsum("mb,mb->m", np.abs(g[:, kk, :]), np.abs(acc))
            un = np.einsum("mcb,mcb->m", dg_err[:, :, kk, :], uu)
            worst = max(worst, _ratio(t1 + t2, term_rtol * sz + FD_SLACK * un))
        checks.append(Check("ignorable momenta conserved", worst, 1.0,
                            f"d/dlambda p_k for k in {', '.join(k.ignorable)}, against the size "
                            "of its terms"))
    z = k.momenta(y)
    hz = k.hamilton_rhs(z)
    with np.errstate(all="ignore"):
        gu = np.einsum("mab,mbc,mc->ma", np.abs(ginv), np.abs(g), np.abs(u))
    checks.append(Check("Hamiltonian: dx/dlambda = u", _rel(hz[:, :dim], u,
                        np.max(gu, axis=1, keepdims=True)), HAMILTON_RTOL,
                        "hamilton_rhs position part vs the velocity, relative to |g^-1||g||u|"))
    # dp_a/dlambda = d/dlambda (g_ab u^b) = d_c g_ab u^c u^b + g_ab du^b/dlambda
    dp = np.einsum("mcab,mc,mb->ma", dg, u, u) + np.einsum("mab,mb->ma", g, acc)
    psize = np.einsum("mcab,mcb->ma", np.abs(dg), uu) + \
        np.einsum("mab,mb->ma", np.abs(g), np.abs(acc))
    punc = np.einsum("mcab,mcb->ma", dg_err, uu)
    pallowed = term_rtol[:, None] * np.max(psize, axis=1, keepdims=True) + FD_SLACK * punc
    checks.append(Check("Hamiltonian: dp/dlambda = d(g u)/dlambda",
                        _ratio(hz[:, dim:] - dp, pallowed), 1.0,
                        "hamilton_rhs momentum part vs differenced metric, against the size "
                        "of its terms"))
    checks += _carry_checks(k, y, z, gam, ginv, first_size, term_rtol)
    checks.insert(0, Check("points inside the domain", 0.0, 0.0,
                           f"{len(y)} sampled, {int(usable.sum())} with finite differences"))
    return checks


def _carry_checks(k, y, z, gam, ginv, first_size, term_rtol) -> list[Check]:
    """The transport kernels against the Christoffel symbols checked above (the definition
    of parallel transport), and the velocity part of the tangent kernel against transport
    (d a / d u V = -2 Gamma(u, V) for a = -Gamma(u, u)). Each allows term_rtol of the size
    of its terms: sum |g^ad| |first-kind terms| |u| |V|, or of |Gamma| |u| |V| where that is
    larger (far out on a tanh profile the differenced derivatives are exactly 0 while the
    kernels' are 1e-36: both are right)."""
    dim = k.dim
    m = len(y)
    u = y[:, dim:]
    V = np.random.default_rng(29).normal(size=(m, 2, dim))
    # size of Gamma's terms
    gsize = np.maximum(np.einsum("mad,mdbc->mabc", np.abs(ginv), first_size), np.abs(gam))
    size = np.einsum("mabc,mb,mkc->mka", gsize, np.abs(u), np.abs(V))
    allowed = term_rtol[:, None, None] * np.max(size, axis=2, keepdims=True)
    ref = -np.einsum("mabc,mb,mkc->mka", gam, u, V)
    out = [Check("transport = -Gamma(u, V)", _ratio(k.transport_rhs(y, V) - ref, allowed), 1.0,
                 "geodesic_transport vs the Christoffel symbols, against the size of the terms")]
    # covariant: dV_a = Gamma^c_ab u^b V_c; u = g^-1 p inside the kernel
    size_h = np.einsum("mcab,mb,mkc->mka", gsize, np.abs(u), np.abs(V))
    allowed_h = term_rtol[:, None, None] * np.max(size_h, axis=2, keepdims=True)
    ref_h = np.einsum("mcab,mb,mkc->mka", gam, u, V)
    out.append(Check("covariant transport = Gamma(u, V)",
                     _ratio(k.transport_rhs(z, V, form="hamilton") - ref_h, allowed_h), 1.0,
                     "hamilton_transport vs the Christoffel symbols, against the size of the "
                     "terms"))
    dirs = np.concatenate([np.zeros_like(V), V], axis=2)
    tan = k.tangent(y, dirs)[:, :, dim:]
    out.append(Check("tangent velocity part = 2 x transport",
                     _ratio(tan - 2 * ref, 2 * allowed), 1.0,
                     "geodesic_tangent in directions (0, V) vs -2 Gamma(u, V), against the size "
                     "of the terms"))
    return out


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
