"""Boundary-value geodesics: the geodesic that joins two points (``MetricKernels.connect``).

Shooting on the initial velocity u0 with Newton's method. The affine parameter runs from 0
at x_from to 1 at the arrival point, so the unknowns are the dim components of u0 and the
equations are x_end(u0) = x_to for the constrained coordinates (periodic ones up to a chosen
winding) plus, with ``free`` coordinates, the normalisation g(u0, u0) = 0 (null) or -1
(timelike). The Jacobian's endpoint rows are d x_end / d u0, read from the integrator's
variations (issue 13) with the dim unit directions of the velocity part.

Everything is vectorised over all pairs and all candidates at once: one ``k.integrate`` call
per Newton iteration. Candidates come from

- coordinate differences: u0 = x_to + w P - x_from for windings w in {-1, 0, 1} of each
  periodic coordinate (P its period);
- where one guess is not enough (``solutions`` > 1, null with free coordinates, a Riemannian
  pair whose first guess fails): a fan of geodesics from x_from over unit directions
  (|g|-orthonormal at x_from), refined by zooming into the directions whose closest approach
  to x_to is a local minimum; each seed is the fan ray scaled so that lambda = 1 falls on
  its closest approach.

The shortest geodesic on a Riemannian spec (solutions=1) runs in two phases: Newton from the
unwound coordinate guess, then, where it converged with length L, a fan that only looks for
something shorter: rays 1.1 L long, 16 samples each, the known solution's own track left out
where its exponential map is far from singular, and rays dropped whose closest approach
cannot hide a hit between them and their neighbours (the closest approach is V-shaped around
a hit). Pairs whose first guess failed get all windings and the full fan.

Newton is damped and inexact: trial integrations run at rtol 1e-7 while the residual is
above 1e-5, then at the caller's rtol. The step is limited to the size of u0 (in the |g| norm
at x_from) and halved while the residual does not decrease or the trial integration stops
early. Candidates that stall get a second run that also accepts steps passing Deuflhard's
natural monotonicity test (ill-conditioned lensing rays), and on Riemannian specs a third
with polar steps: the direction turns on the sphere of directions while the length changes
separately, which keeps Newton off the conjugate point just beyond x_to for nearly
antipodal points. Every candidate that converges is checked again by a plain integration
(arrival within ``tol`` modulo the periods, normalisation, direction of the free
coordinates) before it counts.

Shapes: B = batch shape of the pairs, dim coordinates, S = 2*dim state components.

Limits, measured (C backend; ``python benchmarks/bench_connect.py --antipodal``):

- unit sphere, 60 random pairs per band of distance eps from the antipode, drawn as in
  tests/test_connect.py's near-antipodal test: eps in 1e-6..1e-5, 1e-5..1e-4, ...,
  1e-2..1e-1: 60 of 60 converge to the shortest in every band.
- WGS84: 60 pairs within 0.05 degrees of latitude and 0.3 of longitude of the antipode, and
  (by hand, with tests/test_connect_geodesy.py's draw) 120 nearly antipodal pairs: all
  within 0.1 mm of geographiclib.
- Lensing (bench_connect.py --lensing 10000, solutions=2): both images for 9,578 of 10,000
  sources; the missing secondary images end "not_found" (6 slots "no_convergence"). Near the Einstein ring every ray
  passes close to the source, the fan's seeds spread along the ring and most Newton runs
  from them find the direct image, so Lorentzian fans keep 8 seeds per solution asked for.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .integrate import DOMAIN, EVENT_BASE

STATUS_WORDS = ("converged", "no_convergence", "stopped", "outside_domain", "not_found",
                "bad_input", "wrong_kind")
STEP_MAX = 1.0        # Newton step at most this times |u0| (|g| norm at x_from)
ALPHA_MIN = 1.0 / 256  # backtracking gives up below this step fraction
U_CAP = 4.0           # a candidate whose |u0| grows past U_CAP times its pair's largest
                      # starting guess is diverging (trial refused)
STALL = 12            # a candidate gives up after STALL integrations without halving its
                      # residual (impossible windings would otherwise run to max_iter)
SCALE_FLOOR = 1e-4    # residual scale: path length + SCALE_FLOOR * |x_to| (rounding floor)
KIND_TOL = 1e-8       # causal character check without free coordinates: |g(u,u)| / |u|^2
SAME_TOL = 1e-6       # two solutions are one when their u0 differ by less (relative)
FAN_SAMPLES = 64      # samples along each fan ray (closest approach, parabola refined)
FAN_SAMPLES_SHORT = 16  # ... in a search for shorter geodesics (rays at most 1.1 L long)
FAN_REACH = 1.5       # fan rays run FAN_REACH * (coordinate distance + periods) far
FAN_BEYOND = 1.1      # ... or, looking for a geodesic shorter than one of length L, L * this
FAN_RTOL = 1e-6       # fan rays' rtol (at least the caller's): they only locate seeds
SPREAD = 3.0          # a search for shorter geodesics drops a ray whose closest approach
                      # misses x_to by more than SPREAD times the largest rise of the
                      # closest approach to a neighbouring ray (a hit between them puts the
                      # nearest ray within 1/2 of that rise)
KNOWN_COND = 0.15     # ... and the rays within 1.5 fan spacings of the known solution's
                      # direction where that solution's exponential map is far from
                      # singular: smallest singular value of d x_end / d u0 between
                      # orthonormal frames >= KNOWN_COND (1 in flat space, sin(s)/s on the
                      # unit sphere): one track there holds just the known solution
ZOOM_SHRINK = 0.5     # cone half-width factor per zoom level
ZOOM_MIN = 1e-4       # smallest cone half-width (radians of direction)
ZOOM_DONE = 1e-3      # a pair stops zooming once it has as many seeds as solutions asked
                      # for that pass within ZOOM_DONE * (their path length) of x_to
FAN_MEMORY = 2 ** 23  # doubles of samples per integrate call of the fan
LOOSE_RTOL = 1e-7     # inexact Newton: trial integrations run at max(rtol, LOOSE_RTOL) ...
LOOSE_UNTIL = 1e-5    # ... while the candidate's accepted residual is above this (the
                      # integration error, ~LOOSE_RTOL, stays far below the residual then;
                      # quadratic convergence takes the last steps at the full rtol)


@dataclass(frozen=True)
class Connection:
    """Result of :meth:`metricc.MetricKernels.connect`.

    y0: (B, S) [x_from, u0], the connecting geodesic's initial state (affine parameter 0 at
    x_from, 1 on arrival). y1: (B, S) the state on arrival. length: (B,) sqrt(|g(u0, u0)|)
    (length, proper time; 0 for null). status: (B,) str, see STATUS_WORDS. iterations: (B,)
    integrations Newton used for this solution. residual: (B,) the arrival mismatch
    sqrt(d^T |g| d) at x_to (d the coordinate difference over the constrained coordinates,
    periods wrapped) relative to (path length + 1e-4 |x_to|), the measure ``tol`` bounds; for
    free coordinates with a kind, the larger of that and |g(u0,u0) - target| / (u0^T |g| u0).
    With solutions=n an axis of length n comes before the last (y0 (B, n, S), length (B, n)).
    Entries without a solution hold NaN (iterations 0).
    """
    y0: np.ndarray
    y1: np.ndarray
    length: np.ndarray
    status: np.ndarray
    iterations: np.ndarray
    residual: np.ndarray


def _period_map(k, params_flat: dict, n: int) -> dict:
    """Coordinate index -> (n,) period values. Reads ``k.period_values`` (or ``k.periods``
    at the defaults) where the kernels have periodic coordinates; {} where they have none."""
    values = getattr(k, "period_values", None)
    if callable(values):
        got = values(params_flat or None)
    else:
        got = getattr(k, "periods", None) or {}
    return {k.coordinates.index(name): np.broadcast_to(np.asarray(v, dtype=np.float64),
                                                       (n,)).copy()
            for name, v in got.items()}


def _abs_sym(g: np.ndarray) -> np.ndarray:
    """|g| = V |Lambda| V^T of symmetric (..., m, m): the positive-definite metric used to
    measure distances and directions (g itself on Riemannian specs)."""
    lam, vec = np.linalg.eigh(g)
    return np.einsum("...ik,...k,...jk->...ij", vec, np.abs(lam), vec)


def _sqrt_sym(h: np.ndarray, inverse: bool = False) -> np.ndarray:
    lam, vec = np.linalg.eigh(h)
    lam = np.maximum(lam, 1e-300)
    s = 1.0 / np.sqrt(lam) if inverse else np.sqrt(lam)
    return np.einsum("...ik,...k,...jk->...ij", vec, s, vec)


class _Problem:
    """The flattened pairs to solve and everything that does not change during Newton.

    x_from, x_to: (P, dim); params: dict name -> (P,) or {}; periods: index -> (P,);
    cons: constrained coordinate indices; fi: free index with a kind (or None); target_n:
    the normalisation target; sign: (P,) wanted sign of u^free."""

    def __init__(self, k, x_from, x_to, params, cons, fi, kind, rtol, atol):
        self.k, self.dim = k, k.dim
        self.x_from, self.x_to, self.params = x_from, x_to, params
        self.cons, self.fi, self.kind = cons, fi, kind
        self.rtol, self.atol = rtol, atol
        P = x_from.shape[0]
        self.periods = _period_map(k, params, P)
        self.target_n = -1.0 if kind == "timelike" else 0.0
        self.sign = np.ones(P)
        if fi is not None:
            self.sign = np.where(x_to[:, fi] < x_from[:, fi], -1.0, 1.0)
        g_to = k.metric(x_to, params or None)
        self.H = _abs_sym(g_to[:, cons][:, :, cons])         # (P, nc, nc) at x_to
        self.W = _sqrt_sym(self.H)                            # whitening: |W d| = dist
        self.g_from = k.metric(x_from, params or None)        # (P, dim, dim)
        self.habs_from = _abs_sym(self.g_from)
        xt = x_to[:, cons]
        self.floor = SCALE_FLOOR * np.sqrt(np.abs(np.einsum("pi,pij,pj->p", xt, self.H, xt)))

    # -- per-candidate helpers (idx: (M,) pair of each candidate) -------------------------
    def take_params(self, idx):
        return {n: v[idx] for n, v in self.params.items()} or None

    def unorm(self, idx, u):
        """u^T |g| u at x_from: (M,)."""
        return np.einsum("mi,mij,mj->m", u, self.habs_from[idx], u)

    def gnorm(self, idx, u):
        return np.einsum("mi,mij,mj->m", u, self.g_from[idx], u)

    def wrap(self, idx, d):
        """Coordinate differences (M, dim) with periodic components in [-P/2, P/2)."""
        d = d.copy()
        for i, p in self.periods.items():
            per = p[idx]
            d[:, i] = d[:, i] - per * np.floor(d[:, i] / per + 0.5)
        return d

    def residual(self, idx, u, x_end, target):
        """Scaled system F (M, dim) (whitened endpoint rows / scale, then the normalisation
        row), the relative residual (M,), the row scale (M,)."""
        d = (x_end - target)[:, self.cons]
        n_u = self.unorm(idx, u)
        scale = np.sqrt(n_u) + self.floor[idx]
        scale = np.where(scale > 0, scale, 1.0)
        F = np.einsum("mij,mj->mi", self.W[idx], d) / scale[:, None]
        if self.fi is not None:
            nrow = (self.gnorm(idx, u) - self.target_n) / np.where(n_u > 0, n_u, 1.0)
            F = np.concatenate([F, nrow[:, None]], axis=1)
        with np.errstate(invalid="ignore"):
            res = np.sqrt(np.sum(F * F, axis=1))
        return F, np.where(np.isfinite(res), res, np.inf), scale

    def jacobian(self, idx, u, var, scale):
        """J (M, dim, dim) of F: var (M, dim, S) rows = d y_end / d u0_k."""
        dx = np.swapaxes(var[:, :, :self.dim], 1, 2)[:, self.cons, :]   # (M, nc, dim)
        J = np.einsum("mij,mjk->mik", self.W[idx], dx) / scale[:, None, None]
        if self.fi is not None:
            n_u = self.unorm(idx, u)
            row = 2.0 * np.einsum("mij,mj->mi", self.g_from[idx], u) / np.where(
                n_u > 0, n_u, 1.0)[:, None]
            J = np.concatenate([J, row[:, None, :]], axis=1)
        return J

    def integrate(self, idx, u, variations: bool, loose=None):
        """Integrate [x_from, u] to lambda = 1 (with the velocity variations when asked).
        loose: (M,) bool rows to run at the inexact-Newton tolerance (None: none). Returns
        (y_end (M, S), status (M,) str, status_code (M,), variations (M, dim, S) or None)."""
        y0 = np.concatenate([self.x_from[idx], u], axis=1)
        D = None
        if variations:
            D = np.zeros((len(idx), self.dim, 2 * self.dim))
            D[:, np.arange(self.dim), self.dim + np.arange(self.dim)] = 1.0
        M = len(idx)
        y = np.full((M, 2 * self.dim), np.nan)
        status = np.full(M, "", dtype=object)
        code = np.zeros(M, dtype=np.int64)
        var = np.full((M, self.dim, 2 * self.dim), np.nan) if variations else None
        loose = np.zeros(M, dtype=bool) if loose is None else loose
        for rows, rtol in ((~loose, self.rtol), (loose, max(self.rtol, LOOSE_RTOL))):
            r = np.flatnonzero(rows)
            if not r.size:
                continue
            # carried_error=False: the geodesic itself is a plain run's, bit for bit, so
            # the final plain verification integration arrives at exactly the same point
            out = self.k.integrate(y0[r], 1.0, params=self.take_params(idx[r]), rtol=rtol,
                                   atol=self.atol, variations=None if D is None else D[r],
                                   carried_error=False)
            y[r], status[r], code[r] = out.y, out.status, out.status_code
            if variations:
                var[r] = out.variations
        return y, status, code, var

    def solve_free(self, idx, u):
        """u with the free component solving g(u,u) = target (root of the wanted sign);
        NaN where no real root exists."""
        if self.fi is None:
            return u
        f, g = self.fi, self.g_from[idx]
        o = u.copy()
        o[:, f] = 0.0
        a = g[:, f, f]
        b = 2.0 * np.einsum("mj,mj->m", g[:, f, :], o)
        c = np.einsum("mi,mij,mj->m", o, g, o) - self.target_n
        with np.errstate(all="ignore"):
            disc = b * b - 4 * a * c
            sq = np.sqrt(np.where(disc < 0, np.nan, disc))
            r1, r2 = (-b + sq) / (2 * a), (-b - sq) / (2 * a)
            s = self.sign[idx]
            root = np.where(s * r1 >= s * r2, r1, r2)
            root = np.where(s * root > 0, root, np.nan)
        u = u.copy()
        u[:, f] = root
        return u


def _newton(prob: _Problem, idx, u, target, tol, max_iter, tick, cond=None, natural=False,
            polar=False):
    """Damped Newton for M candidates. Returns u (M, dim), residual (M,), iterations (M,),
    converged (M,) bool, stopped (M,) bool (some trial integration ended on an event or a
    [domain] boundary before lambda = 1: the candidate ran into a stop). cond: an (M,)
    array to fill with the smallest singular value of d x_end / d u0 between orthonormal
    frames at the last accepted point (all coordinates constrained only). natural: also
    accept trials that pass the natural monotonicity test (below). polar: move along the
    sphere of directions (_polar_step) rather than in a straight line in u0."""
    M, dim = u.shape
    res = np.full(M, np.inf)
    F = np.zeros((M, dim))
    du = np.zeros((M, dim))
    alpha = np.ones(M)
    iters = np.zeros(M, dtype=np.int64)
    stopped = np.zeros(M, dtype=bool)
    alive = np.all(np.isfinite(u), axis=1)
    have = np.zeros(M, dtype=bool)          # an accepted point exists
    exact = np.zeros(M, dtype=bool)         # ... and its integration ran at the full rtol
    u_acc = u.copy()
    with np.errstate(invalid="ignore"):
        n0 = np.sqrt(prob.unorm(idx, np.where(np.isfinite(u), u, 0.0)))
    pair_max = np.zeros(int(idx.max()) + 1 if M else 0)
    np.maximum.at(pair_max, idx, np.where(np.isfinite(n0), n0, 0.0))
    u_cap = U_CAP * (pair_max[idx] + prob.floor[idx])
    ref = np.full(M, np.inf)                # residual to halve
    since = np.zeros(M, dtype=np.int64)
    J_acc = np.zeros((M, dim, dim))         # the Jacobian at the accepted point
    full = np.full(M, np.inf)               # |full Newton step| there (|g| norm at x_from)
    frac = np.ones(M)                       # fraction of it that du holds (the step cap)
    for _ in range(max_iter + 1):
        conv = have & exact & (res <= tol)
        run = alive & ~conv
        if not run.any():
            break
        r = np.flatnonzero(run)
        if polar:
            trial = np.where(have[r, None], _polar_step(prob, idx[r], u_acc[r],
                                                        alpha[r, None] * du[r]), u_acc[r])
        else:
            trial = np.where(have[r, None], u_acc[r] + alpha[r, None] * du[r], u_acc[r])
        loose = res[r] > LOOSE_UNTIL
        y_end, st, code, var = prob.integrate(idx[r], trial, variations=True, loose=loose)
        iters[r] += 1
        done = st == "done"
        stopped[r] |= (code == DOMAIN) | (code >= EVENT_BASE)
        Ft, rt, scale = prob.residual(idx[r], trial, y_end[:, :dim], target[r])
        with np.errstate(invalid="ignore"):
            wild = ~(np.sqrt(prob.unorm(idx[r], trial)) <= u_cap[r])
        if prob.fi is not None:
            # the free coordinate must keep its direction: the normalisation row is also
            # solved by the other root (for a static metric the same path with the time
            # reversed), which Newton would otherwise happily jump to
            wild |= ~(prob.sign[idx[r]] * trial[:, prob.fi] > 0)
        rt = np.where(done & ~wild, rt, np.inf)
        # natural monotonicity (Deuflhard 2004, Newton Methods for Nonlinear Problems,
        # sec. 3.1.4): the simplified Newton correction J_acc^-1 F(trial) must be shorter
        # than the step by 1 - lambda/4 (lambda: the fraction of the full step taken). It is
        # affine invariant: where J is ill-conditioned (rays that pass near a photon
        # sphere) the residual norm of plain Newton can rise on the way to convergence.
        # It also lets a candidate wander into another solution's basin, so it is the
        # second attempt for candidates the residual test left unconverged
        nat = np.zeros(len(r), dtype=bool)
        if natural:
            with np.errstate(all="ignore"):
                simple = np.sqrt(prob.unorm(idx[r], _solve(J_acc[r], -np.where(
                    np.isfinite(Ft), Ft, 0.0))))
                nat = have[r] & (simple <= (1 - 0.25 * alpha[r] * frac[r]) * full[r])
        # the first full-rtol trial after loose ones is taken as it comes: the accepted
        # residual it would have to beat holds the loose integration's error
        better = np.isfinite(rt) & (~have[r] | (rt <= tol) | (~exact[r] & ~loose) | nat
                                    | (rt < (1 - 1e-4 * alpha[r]) * res[r]))
        a = r[better]
        if a.size:
            u_acc[a], res[a], F[a], have[a] = trial[better], rt[better], Ft[better], True
            exact[a] = ~loose[better]
            J = prob.jacobian(idx[a], trial[better], var[better], scale[better])
            if cond is not None:
                Jn = np.einsum("mij,mjk->mik", J, _sqrt_sym(prob.habs_from[idx[a]], inverse=True))
                with np.errstate(all="ignore"):
                    cond[a] = np.linalg.svd(np.where(np.isfinite(Jn), Jn, 0.0) * scale[better][
                        :, None, None], compute_uv=False)[:, -1]
            step = _solve(J, -Ft[better])
            cap = STEP_MAX * (np.sqrt(prob.unorm(idx[a], trial[better])) + prob.floor[idx[a]])
            size = np.sqrt(prob.unorm(idx[a], step))
            with np.errstate(invalid="ignore", divide="ignore"):
                shrink = np.where(size > cap, cap / size, 1.0)
            du[a] = step * shrink[:, None]
            J_acc[a], full[a], frac[a] = J, size, shrink
            alpha[a] = 1.0
            alive[a] &= np.all(np.isfinite(du[a]), axis=1)
        halved = better & (rt <= 0.5 * ref[r])
        ref[r[halved]] = rt[halved]
        since[r] = np.where(halved, 0, since[r] + 1)
        alive[r[since[r] > STALL]] = False
        b = r[~better]
        # the first integration of a candidate failed: nothing to backtrack from
        alive[b[~have[b]]] = False
        alpha[b] *= 0.5
        alive[b[alpha[b] < ALPHA_MIN]] = False
        tick()
    return u_acc, res, iters, have & exact & (res <= tol), stopped


def _polar_step(prob: _Problem, idx, u, du):
    """u (M, dim) moved by the Newton step du in polar form: with w = |g|^(1/2) u = s e at
    x_from (s the length, e the unit direction), the step's radial part changes s and its
    tangential part t turns e by the angle |t| / s towards t. To first order this is
    u + du; near a conjugate point of nearly antipodal points, where the arrival turns
    about the far point as the direction turns, a straight step that turns the direction
    also lengthens the geodesic past the conjugate point and lands on the other side."""
    h = prob.habs_from[idx]
    root, inv = _sqrt_sym(h), _sqrt_sym(h, inverse=True)
    w = np.einsum("mij,mj->mi", root, u)
    dw = np.einsum("mij,mj->mi", root, du)
    with np.errstate(all="ignore"):
        s = np.linalg.norm(w, axis=1)
        e = w / s[:, None]
        ds = np.einsum("mi,mi->m", e, dw)
        t = dw - ds[:, None] * e
        tn = np.linalg.norm(t, axis=1)
        ang = tn / s
        turned = np.cos(ang)[:, None] * e + np.sin(ang)[:, None] * np.where(
            tn[:, None] > 0, t / tn[:, None], 0.0)
        w_new = (s + ds)[:, None] * turned
        # a step through the origin or a non-finite one falls back to the straight step
        bad = ~(s + ds > 0) | ~np.all(np.isfinite(w_new), axis=1)
    out = np.einsum("mij,mj->mi", inv, w_new)
    return np.where(bad[:, None], u + du, out)


def _solve(J, rhs):
    """Least-squares solution of J x = rhs, stacked, through the SVD (singular directions
    below 1e-13 of the largest are dropped, so a singular Jacobian gives a finite step)."""
    with np.errstate(all="ignore"):
        U, s, Vt = np.linalg.svd(np.where(np.isfinite(J), J, 0.0))
        keep = s > 1e-13 * s[:, :1]
        coef = np.einsum("mji,mj->mi", U, rhs)
        coef = np.where(keep, coef / np.where(keep, s, 1.0), 0.0)
        return np.einsum("mji,mj->mi", Vt, coef)


# -- candidates -------------------------------------------------------------------------------
def _windings(prob: _Problem):
    """Winding offsets (C, dim) tried for the periodic coordinates' periods: all
    combinations of -1, 0, 1, the unwound one first."""
    per = sorted(prob.periods)
    combos = np.zeros((1, prob.dim))
    for i in per:
        rows = []
        for w in (0.0, -1.0, 1.0):
            c = combos.copy()
            c[:, i] = w
            rows.append(c)
        combos = np.concatenate(rows)
    return combos


def _coordinate_guesses(prob: _Problem, pidx):
    """u0 (P, C, dim) and targets (P, C, dim) from coordinate differences over windings."""
    P, dim = len(pidx), prob.dim
    d = prob.wrap(pidx, prob.x_to[pidx] - prob.x_from[pidx])
    wind = _windings(prob)
    C = wind.shape[0]
    per = np.zeros((P, dim))
    for i, p in prob.periods.items():
        per[:, i] = p[pidx]
    off = wind[None, :, :] * per[:, None, :]                        # (P, C, dim)
    target = (prob.x_from[pidx] + d)[:, None, :] + off
    u = target - prob.x_from[pidx][:, None, :]
    flat = np.repeat(pidx, C)
    u = prob.solve_free(flat, u.reshape(-1, dim)).reshape(P, C, dim)
    return u, target


def _sphere_points(m: int):
    """Level-0 fan directions (n, m) on the unit sphere, their neighbour lists (n, q) and
    spacing (radians)."""
    if m == 1:
        return np.array([[1.0], [-1.0]]), np.array([[0], [1]]), np.pi
    if m == 2:
        n = 64
        a = 2 * np.pi * np.arange(n) / n
        nb = np.stack([(np.arange(n) - 1) % n, (np.arange(n) + 1) % n], axis=1)
        return np.stack([np.cos(a), np.sin(a)], axis=1), nb, 2 * np.pi / n
    if m == 3:
        n = 192
        i = np.arange(n) + 0.5
        z = 1 - 2 * i / n
        phi = np.pi * (1 + 5 ** 0.5) * i
        r = np.sqrt(1 - z * z)
        pts = np.stack([r * np.cos(phi), r * np.sin(phi), z], axis=1)
        q = 6
    else:
        n = 64 * m
        pts = np.random.default_rng(0).standard_normal((n, m))
        pts /= np.linalg.norm(pts, axis=1, keepdims=True)
        q = 2 * m
    nb = np.argsort(-(pts @ pts.T), axis=1)[:, 1:q + 1]
    spacing = float(np.median(np.arccos(np.clip(np.sum(pts * pts[nb[:, 0]], 1), -1, 1))))
    return pts, nb, spacing


def _pattern(m: int):
    """Zoom pattern: offsets (n, m-1) in [-1, 1] on a grid, neighbour lists (n, q) (self
    where missing), grid spacing in units of the half-width."""
    # q = 5 (spacing w/5) with the half-width halved per level: some level's cone both
    # holds a second minimum near a track and resolves it (needs q/2 > 1/ZOOM_SHRINK)
    q = 5 if m <= 3 else 1
    axes = np.meshgrid(*[np.arange(-q, q + 1)] * (m - 1), indexing="ij")
    grid = np.stack([a.ravel() for a in axes], axis=1)
    n = grid.shape[0]
    nb = []
    for p in grid:
        diff = np.abs(grid - p).max(axis=1)
        nb.append(np.flatnonzero(diff == 1))
    width = max(len(x) for x in nb)
    nbm = np.array([np.concatenate([x, np.full(width - len(x), i)]) for i, x in enumerate(nb)])
    return grid / q, nbm, 1.0 / q


class _Fan:
    """Fan rays from x_from: directions e (unit, m = dim or dim - 1 components) mapped to
    velocities through B = |g|^(-1/2) at x_from over the direction components."""

    def __init__(self, prob: _Problem, pidx, known=None, known_cond=None):
        """known: (P, dim) u0 of a solution already found per pair (NaN rows: none), or
        None. Pairs with one search only for shorter geodesics: their rays run
        FAN_BEYOND times its length, no farther, and rays whose closest approach is their
        far end leave no seed (nothing shorter lies there)."""
        self.prob, self.pidx = prob, pidx
        dim = prob.dim
        self.comps = [i for i in range(dim) if i != prob.fi]
        c = self.comps
        self.B = _sqrt_sym(prob.habs_from[pidx][:, c][:, :, c], inverse=True)
        # reach: coordinate distance plus one period of each periodic coordinate, measured
        # with |g| at x_from, the midpoint and x_to (the largest), times FAN_REACH
        d = prob.wrap(pidx, prob.x_to[pidx] - prob.x_from[pidx])
        per = np.zeros_like(d)
        for i, p in prob.periods.items():
            per[:, i] = p[pidx]
        reach = np.zeros(len(pidx))
        pts = (prob.x_from[pidx], prob.x_from[pidx] + 0.5 * d, prob.x_to[pidx])
        params = prob.take_params(pidx)
        for x in pts:
            h = _abs_sym(prob.k.metric(x, params))[:, c][:, :, c]
            with np.errstate(all="ignore"):
                dd = np.einsum("pi,pij,pj->p", d[:, c], h, d[:, c])
                pp = np.einsum("pi,pij,pj->p", per[:, c], h, per[:, c])
                r = np.sqrt(dd) + np.sqrt(pp)
            reach = np.fmax(reach, r)
        self.reach = FAN_REACH * reach
        self.short = np.zeros(len(pidx), dtype=bool)
        self.known_e = np.full((len(pidx), len(c)), np.nan)
        if known is not None:
            with np.errstate(invalid="ignore"):
                length = np.sqrt(np.abs(prob.unorm(pidx, np.where(np.isfinite(known), known, 0))))
            self.short = np.all(np.isfinite(known), axis=1) & (length > 0)
            self.reach = np.where(self.short, np.minimum(self.reach, FAN_BEYOND * length),
                                  self.reach)
            if known_cond is not None:
                # the known solution's direction e (unit): u = B e |u| -> e ~ B^-1 u
                Binv = _sqrt_sym(prob.habs_from[pidx][:, c][:, :, c])
                ke = np.einsum("pij,pj->pi", Binv, np.where(np.isfinite(known), known, 0)[:, c])
                with np.errstate(invalid="ignore", divide="ignore"):
                    ke /= np.linalg.norm(ke, axis=1, keepdims=True)
                use = self.short & (known_cond >= KNOWN_COND)
                self.known_e = np.where(use[:, None], ke, np.nan)

    def hopeless(self, dist, nb, pairs=None):
        """Short-search rays that cannot hold a shorter geodesic nearby: dist (P, Q) closest
        approaches (rows: the pairs ``pairs``, all by default), nb (Q, q) neighbour lists
        -> (P, Q) bool. The closest approach D(e) is
        continuous in the direction and V-shaped around a direction that hits x_to, where
        the sample nearest the zero has D <= 1/2 of the largest rise to a neighbour."""
        with np.errstate(invalid="ignore"):
            rise = np.max(np.where(np.isfinite(dist[:, nb]), dist[:, nb], -np.inf), axis=2) - dist
            out = dist > SPREAD * rise
        short = self.short if pairs is None else self.short[pairs]
        return short[:, None] & np.isfinite(dist) & out

    def velocities(self, sel, e):
        """u (R, dim) for pair rows sel (R,) and unit directions e (R, m)."""
        u = np.zeros((len(sel), self.prob.dim))
        u[:, self.comps] = np.einsum("rij,rj->ri", self.B[sel], e) * self.reach[sel, None]
        return self.prob.solve_free(self.pidx[sel], u)

    def closest(self, sel, e, refine=None):
        """Closest approach of rays (R,) to x_to: distance (R,), lambda (R,) in [0, 1], the
        state there (R, S). Two passes: FAN_SAMPLES samples over the whole ray
        (FAN_SAMPLES_SHORT for pairs searching for a shorter geodesic), then FAN_SAMPLES/2
        over the two intervals around the chosen sample (from the state at
        the sample before), each refined by a parabola through three samples. refine: None
        (every ray takes the second pass) or a callable mapping the first pass's distances
        (R,) to the (R,) bool rays that take it (the others keep the first pass's values)."""
        prob, dim = self.prob, self.prob.dim
        R = len(sel)
        dist = np.full(R, np.inf)
        lam_c = np.zeros(R)
        xc = np.zeros((R, 2 * dim))
        y_mid = np.full((R, 2 * dim), np.nan)
        spacing = np.ones(R)      # the first pass's sample spacing in lambda
        start = np.zeros(R, dtype=np.int64)
        u = self.velocities(sel, e)
        n_samp = np.where(self.short[sel], FAN_SAMPLES_SHORT, FAN_SAMPLES)
        chunks = []
        for S in np.unique(n_samp):
            group = np.flatnonzero((n_samp == S) & np.all(np.isfinite(u), axis=1))
            step = max(1, FAN_MEMORY // ((S + 1) * 2 * dim))
            chunks += [(int(S), group[c:c + step]) for c in range(0, len(group), step)]
        def run(chunk):
            S, rows = chunk
            pid = self.pidx[sel[rows]]
            y0 = np.concatenate([prob.x_from[pid], u[rows]], axis=1)
            return self._run(pid, y0, 1.0, S)

        # a pipeline: the next chunk integrates (C, GIL released) while this one's samples
        # are scanned (NumPy), so the cores are not idle during the scan
        from concurrent.futures import ThreadPoolExecutor
        pool = ThreadPoolExecutor(max_workers=1) if len(chunks) > 1 else None
        ahead = pool.submit(run, chunks[0]) if pool is not None else None
        for c, (S, rows) in enumerate(chunks):
            if pool is not None:
                samp = ahead.result()
                if c + 1 < len(chunks):
                    ahead = pool.submit(run, chunks[c + 1])
            else:
                samp = run((S, rows))
            pid = self.pidx[sel[rows]]
            j, shift, fmin, samp = self._scan(pid, samp, S, first=self.reach[sel[rows]] / S)
            # a ray closest at its start never comes nearer: no seed (and no plateau of
            # equal minima crowding out real ones); in a search for shorter geodesics, nor
            # does one closest at its far end
            far = (j == S) & self.short[sel[rows]]
            ar = np.arange(len(rows))
            start[rows] = np.where(j > 0, j - 1, 0)
            y_mid[rows] = samp[ar, start[rows]]
            fmin = np.where((j > 0) & ~far & np.all(np.isfinite(y_mid[rows]), axis=1), fmin,
                            np.inf)
            with np.errstate(invalid="ignore"):
                dist[rows] = np.where(np.isfinite(fmin), np.sqrt(fmin), np.inf)
            lam_c[rows] = (j + shift) / S
            xc[rows] = samp[ar, j]
            spacing[rows] = 1.0 / S
        if pool is not None:
            pool.shutdown()
        again = np.isfinite(dist) if refine is None else np.isfinite(dist) & refine(dist)
        fine = max(8, FAN_SAMPLES // 2)
        chunk = max(1, FAN_MEMORY // ((fine + 1) * 2 * dim))
        for h in np.unique(spacing[again]):
            todo = np.flatnonzero(again & (spacing == h))
            for s in range(0, len(todo), chunk):
                rows = todo[s:s + chunk]
                pid = self.pidx[sel[rows]]
                jj, shift, fmin, samp2 = self._pass(pid, y_mid[rows], 2.0 * h, fine, first=None)
                with np.errstate(invalid="ignore"):
                    dist[rows] = np.where(np.isfinite(fmin), np.sqrt(fmin), np.inf)
                lam_c[rows] = (start[rows] + (jj + shift) * 2.0 / fine) * h
                xc[rows] = samp2[np.arange(len(rows)), jj]
        return dist, lam_c, xc

    def _pass(self, pid, y0, lam_end, S, first):
        """Integrate y0 (r, S) to lam_end with S+1 samples; the chosen sample index (r,),
        the parabola's shift (in samples) and minimum of the squared distance, the samples.
        first: None (the closest sample) or the path length between samples (r,): then the
        first local minimum within 2x of the closest, or within a sample spacing of it."""
        return self._scan(pid, self._run(pid, y0, lam_end, S), S, first)

    def _run(self, pid, y0, lam_end, S):
        """The samples (r, S+1, 2 dim) of the rays y0 (r, 2 dim) at S+1 equal steps."""
        prob = self.prob
        lam = np.linspace(0.0, lam_end, S + 1)
        return prob.k.integrate(y0, lam_end, params=prob.take_params(pid), samples=lam,
                                rtol=max(prob.rtol, FAN_RTOL), atol=prob.atol).samples

    def _scan(self, pid, samp, S, first):
        """_pass on integrated samples."""
        prob, dim = self.prob, self.prob.dim
        d = samp[:, :, :dim] - prob.x_to[pid][:, None, :]
        for i, p in prob.periods.items():
            per = p[pid][:, None]
            d[:, :, i] -= per * np.floor(d[:, :, i] / per + 0.5)
        H = prob.H[pid]
        d2 = np.zeros(d.shape[:2])
        with np.errstate(invalid="ignore", over="ignore"):
            # d^T H d term by term (H symmetric): einsum over (r, s, i, j) is several times
            # slower for the small dims here, and this runs over every sample of every ray
            for a, i in enumerate(prob.cons):
                d2 += H[:, a, a, None] * d[:, :, i] ** 2
                for b in range(a + 1, len(prob.cons)):
                    d2 += 2.0 * H[:, a, b, None] * (d[:, :, i] * d[:, :, prob.cons[b]])
        d2 = np.where(np.isfinite(d2), d2, np.inf)
        r = len(pid)
        if first is not None:
            # the first local minimum along the ray within 2x of the closest (or within a
            # sample spacing: coarse samples can make the first pass look farther): a ray
            # that passes x_to again (a great circle, an orbit) seeds the shorter path
            lo = 4 * np.min(d2, axis=1, keepdims=True) + first[:, None] ** 2
            left = np.concatenate([np.full((r, 1), np.inf), d2[:, :-1]], axis=1)
            right = np.concatenate([d2[:, 1:], np.full((r, 1), np.inf)], axis=1)
            near = (d2 <= left) & (d2 <= right) & (d2 <= lo) & np.isfinite(d2)
            j = np.where(near.any(axis=1), np.argmax(near, axis=1), np.argmin(d2, axis=1))
        else:
            j = np.argmin(d2, axis=1)
        ar = np.arange(r)
        f0 = d2[ar, j]
        jm, jp = np.clip(j - 1, 0, S), np.clip(j + 1, 0, S)
        fm, fp = d2[ar, jm], d2[ar, jp]
        with np.errstate(all="ignore"):
            den = fm - 2 * f0 + fp
            shift = np.where((jm < j) & (jp > j) & np.isfinite(den) & (den > 0),
                             0.5 * (fm - fp) / den, 0.0)
            shift = np.clip(shift, -1, 1)
            fmin = f0 - 0.25 * (fm - fp) * shift
            # a negative estimate means the parabola does not fit the samples: keep the
            # sample (clipping to 0 made such rays look like exact hits)
            fmin = np.where((fmin >= 0) & (fmin <= f0), fmin, f0)
        return j, shift, np.where(np.isfinite(f0) & np.isfinite(fmin), fmin, np.inf), samp

    def seeds(self, K: int, wanted: int, tick):
        """K candidates per pair: u0 (P, K, dim), targets (P, K, dim) (windings from the
        closest approach), found (P, K) bool. A pair zooms until ``wanted`` seeds pass
        within ZOOM_DONE of their path length of x_to, or the cone is ZOOM_MIN wide."""
        P = len(self.pidx)
        m = len(self.comps)
        pts, nb0, spacing = _sphere_points(m)
        n0 = pts.shape[0]
        sel = np.repeat(np.arange(P), n0)
        e = np.tile(pts, (P, 1))
        def worth(d):
            # short searches refine only the rays that may seed something
            d = d.reshape(P, n0)
            keep = (d <= np.min(d[:, nb0], axis=2)) & ~self.hopeless(d, nb0)
            return (keep | ~self.short[:, None]).ravel()

        dist, lam, xc = self.closest(sel, e, refine=worth)
        dist = dist.reshape(P, n0)
        is_min = dist <= np.min(dist[:, nb0], axis=2)
        is_min &= ~self.hopeless(dist, nb0)
        with np.errstate(invalid="ignore"):
            near_known = np.einsum("pm,nm->pn", self.known_e, pts) > np.cos(1.5 * spacing)
        is_min &= ~near_known
        pool = _select(np.where(is_min, dist, np.inf), e.reshape(P, n0, m),
                       lam.reshape(P, n0), xc.reshape(P, n0, -1), K, spacing)
        tick()
        if m >= 2:
            grid, nbp, step = _pattern(m)
            rng = np.random.default_rng(1)
            fill = rng.standard_normal((m, m - 1))
            w = spacing
            while w > ZOOM_MIN:
                cd, ce = pool[0], pool[1]                           # (P, K), (P, K, m)
                close = cd <= ZOOM_DONE * pool[2] * self.reach[:, None]
                done = np.sum(close, axis=1) >= wanted
                if done.all():
                    break
                # only the pairs still zooming with a track left: the others keep their pool
                act = np.flatnonzero(~done & np.isfinite(cd).any(axis=1))
                if not act.size:
                    break
                A_ = len(act)
                ce = ce[act]
                # orthonormal tangent basis at each centre
                A = np.concatenate([ce[..., None], np.broadcast_to(fill, ce.shape[:2] + (m, m - 1))],
                                   axis=-1)
                Q, _ = np.linalg.qr(A)
                T = Q[..., 1:]                                      # (A, K, m, m-1)
                dirs = ce[:, :, None, :] + w * np.einsum("pkij,nj->pkni", T, grid)
                dirs /= np.linalg.norm(dirs, axis=-1, keepdims=True)
                npt = grid.shape[0]
                live = np.isfinite(cd[act])
                rows = np.flatnonzero(np.repeat(live.ravel(), npt))
                dd = np.full(A_ * K * npt, np.inf)
                ll = np.zeros(A_ * K * npt)
                xx = np.zeros((A_ * K * npt, 2 * self.prob.dim))
                if rows.size:
                    s2 = np.repeat(act, K * npt)[rows]
                    dd[rows], ll[rows], xx[rows] = self.closest(s2, dirs.reshape(-1, m)[rows])
                dd = dd.reshape(A_, K, npt)
                dd = np.where(self.hopeless(dd.reshape(A_, K * npt),
                                            (nbp[None, :, :] + npt * np.arange(K)[:, None, None])
                                            .reshape(K * npt, -1), pairs=act).reshape(A_, K, npt),
                              np.inf, dd)
                is_min = dd <= np.min(dd[:, :, nbp], axis=3)
                # each track's own best point first (a track is never crowded out by the
                # other minima of a better one), then the other minima fill free slots
                # (where one cone resolves into two images)
                own = np.zeros((A_, K, npt), dtype=bool)
                pk = np.indices((A_, K))
                own[pk[0], pk[1], np.argmin(dd, axis=2)] = True
                new = _select(np.where(is_min | own, dd, np.inf).reshape(A_, K * npt),
                              dirs.reshape(A_, K * npt, m), ll.reshape(A_, K * npt),
                              xx.reshape(A_, K * npt, -1), K, w * step,
                              first=own.reshape(A_, K * npt))
                pool = tuple(a.copy() for a in pool)
                for a, b in zip(pool, new):
                    a[act] = b
                w *= ZOOM_SHRINK
                tick()
        dist, e, lam, xc = pool
        found = np.isfinite(dist)
        sel = np.repeat(np.arange(P), K)
        u = self.velocities(sel, e.reshape(-1, m)) * lam.reshape(-1, 1)
        u = self.prob.solve_free(self.pidx[sel], u)   # scaling keeps g(u,u) = 0 only for null
        u = u.reshape(P, K, -1)
        target = np.broadcast_to(self.prob.x_to[self.pidx][:, None, :], u.shape).copy()
        xc = xc.reshape(P, K, -1)
        for i, p in self.prob.periods.items():
            per = p[self.pidx][:, None]
            target[:, :, i] += per * np.round((xc[:, :, i] - target[:, :, i]) / per)
        u = np.where(found[..., None], u, np.nan)
        return u, target, found


def _select(d, e, lam, xc, K, sep, first=None):
    """The K smallest d per row with directions at least ``sep`` radians apart (entries
    marked ``first`` before the others): (d (P, K), e (P, K, m), lam (P, K), xc (P, K,
    dim)); missing entries have d = inf."""
    P, Q = d.shape
    some = np.isfinite(d).any(axis=1)
    if not some.all():
        # rows without a finite entry (most pairs of a search for something shorter) have
        # nothing to select: the loop below runs over the others only
        out = (np.full((P, K), np.inf), np.zeros((P, K, e.shape[-1])), np.zeros((P, K)),
               np.zeros((P, K, xc.shape[-1])))
        out[1][..., 0] = 1.0
        if some.any():
            part = _select(d[some], e[some], lam[some], xc[some], K, sep,
                           None if first is None else first[some])
            for o, v in zip(out, part):
                o[some] = v
        return out
    if first is None:
        order = np.argsort(d, axis=1, kind="stable")[:, :4 * K]
    else:
        order = np.lexsort((d, ~first), axis=1)[:, :4 * K]
    ar = np.arange(P)[:, None]
    d, e, lam, xc = d[ar, order], e[ar, order], lam[ar, order], xc[ar, order]
    out_d = np.full((P, K), np.inf)
    out_e = np.zeros((P, K, e.shape[-1]))
    out_e[..., 0] = 1.0
    out_l = np.zeros((P, K))
    out_x = np.zeros((P, K, xc.shape[-1]))
    count = np.zeros(P, dtype=np.int64)
    cos_sep = np.cos(sep)
    p = np.arange(P)
    for j in range(d.shape[1]):
        cand = np.isfinite(d[:, j]) & (count < K)
        taken = np.isfinite(out_d)
        close = np.any(taken & (np.einsum("pkm,pm->pk", out_e, e[:, j]) > cos_sep), axis=1)
        put = cand & ~close
        slot = count[put]
        out_d[p[put], slot] = d[put, j]
        out_e[p[put], slot] = e[put, j]
        out_l[p[put], slot] = lam[put, j]
        out_x[p[put], slot] = xc[put, j]
        count[put] += 1
    return out_d, out_e, out_l, out_x


# -- the driver -------------------------------------------------------------------------------
def connect(k, x_from, x_to, params=None, kind=None, free=None, solutions=1, rtol=1e-11,
            atol=1e-13, tol=1e-10, max_iter=50, progress=None) -> Connection:
    """See MetricKernels.connect."""
    dim = k.dim
    riemannian = k.signature[0] == 0
    if kind not in (None, "null", "timelike"):
        raise ValueError(f"kind must be None, 'null' or 'timelike', got {kind!r}")
    if kind is not None and riemannian:
        raise ValueError(f"{k.name}: kind={kind!r} needs a Lorentzian metric; this one is "
                         "Riemannian (leave kind=None)")
    free = [] if free is None else ([free] if isinstance(free, str) else list(free))
    for name in free:
        if name not in k.coordinates:
            raise ValueError(f"{k.name}: unknown free coordinate {name!r} (coordinates: "
                             f"{', '.join(k.coordinates)})")
    if len(set(free)) != len(free):
        raise ValueError(f"free names a coordinate twice: {free}")
    n_eq = dim - len(free) + (1 if (free and kind) else 0)
    if n_eq != dim:
        raise ValueError(f"{k.name}: {dim} unknowns (u0) but {n_eq} equations: "
                         f"{dim - len(free)} arrival coordinates"
                         + (" + 1 normalisation" if free and kind else "")
                         + "; free coordinates need kind='null' or 'timelike', one at most")
    if isinstance(solutions, bool) or int(solutions) != solutions or solutions < 1:
        raise ValueError(f"solutions must be a whole number >= 1, got {solutions!r}")
    solutions = int(solutions)
    if isinstance(max_iter, bool) or int(max_iter) != max_iter or max_iter < 1:
        raise ValueError(f"max_iter must be a whole number >= 1, got {max_iter!r}")
    tol = float(tol)
    if not (np.isfinite(tol) and tol > 0):
        raise ValueError(f"tol must be a positive finite number, got {tol!r}")
    if progress is not None and not callable(progress):
        raise TypeError("progress must be a callable progress(done, total)")
    from .integrate import check_options
    rtol, atol, _, _ = check_options(rtol, atol, 1, None)

    x_from = k._check_input("metric", x_from)
    x_to = k._check_input("metric", x_to)
    given = k._params(params, np.broadcast_shapes(x_from.shape[:-1], x_to.shape[:-1]))
    batch = np.broadcast_shapes(x_from.shape[:-1], x_to.shape[:-1],
                                *[v.shape for v in given.values()])
    N = int(np.prod(batch, dtype=np.int64))
    xf = np.broadcast_to(x_from, batch + (dim,)).reshape(N, dim).copy()
    xt = np.broadcast_to(x_to, batch + (dim,)).reshape(N, dim).copy()
    pf = {n: np.broadcast_to(v, batch).reshape(N).copy() for n, v in given.items()}

    status = np.full((N, solutions), "", dtype="<U14")
    finite = np.all(np.isfinite(xf), axis=1) & np.all(np.isfinite(xt), axis=1)
    for v in pf.values():
        finite &= np.isfinite(v)
    status[~finite] = "bad_input"
    good = np.flatnonzero(finite)
    if good.size:
        sub = {n: v[good] for n, v in pf.items()} or None
        with np.errstate(all="ignore"):
            inside = k.inside(xf[good], sub) & k.inside(xt[good], sub)
        status[good[~inside]] = "outside_domain"
        good = good[inside]

    S = 2 * dim
    y0 = np.full((N, solutions, S), np.nan)
    y1 = np.full((N, solutions, S), np.nan)
    length = np.full((N, solutions), np.nan)
    iters = np.zeros((N, solutions), dtype=np.int64)
    resid = np.full((N, solutions), np.nan)
    if good.size:
        fi = k.coordinates.index(free[0]) if (free and kind) else None
        cons = [i for i in range(dim) if k.coordinates[i] not in free]
        prob = _Problem(k, xf[good], xt[good], {n: v[good] for n, v in pf.items()}, cons, fi,
                        kind, rtol, atol)
        use_fan = riemannian or solutions > 1 or (kind == "null" and fi is not None)
        out = _solve_pairs(prob, solutions, use_fan, tol, int(max_iter), progress)
        for arr, val in zip((y0, y1, length, status, iters, resid), out):
            arr[good] = val
    if solutions == 1:
        y0, y1, length, status, iters, resid = (a[:, 0] for a in
                                                (y0, y1, length, status, iters, resid))
        shape = batch
    else:
        shape = batch + (solutions,)
    return Connection(y0=y0.reshape(shape + (S,)), y1=y1.reshape(shape + (S,)),
                      length=length.reshape(shape), status=status.reshape(shape),
                      iterations=iters.reshape(shape), residual=resid.reshape(shape))


def _retry(prob: _Problem, idx, seeds, targets, out, tol, max_iter, tick, cond=None, **how):
    """Newton again, with the options ``how`` (natural=True, polar=True), from the seeds
    (M, dim) of the candidates that stalled (unconverged, not stopped, more than one
    integration); out = (u, res, it, conv, stopped) (M, ...) is updated in place where the
    second run converges (its integrations are added to it everywhere it ran), and so is
    cond (M,) (see _newton) when given."""
    u, res, it, conv, stopped = out
    rows = np.flatnonzero(~conv & ~stopped & (it > 1))
    if not rows.size:
        return
    sub = None if cond is None else np.zeros(len(rows))
    more = _newton(prob, idx[rows], seeds[rows], targets[rows], tol, max_iter, tick,
                   cond=sub, **how)
    it[rows] += more[2]
    took = more[3]
    u[rows[took]], res[rows[took]], conv[rows[took]] = more[0][took], more[1][took], True
    if cond is not None:
        cond[rows[took]] = sub[took]


def _distinct(prob: _Problem, uu, okm):
    """(P, C) bool: the candidates okm (P, C) whose u0 uu (P, C, dim) differ from every
    earlier kept one of their pair by more than SAME_TOL (relative, |g| norm at x_from)."""
    P, C = okm.shape
    kept = np.zeros((P, C), dtype=bool)
    habs = prob.habs_from
    for j in range(C):
        cand = okm[:, j].copy()
        for i in range(j):
            dv = uu[:, j] - uu[:, i]
            with np.errstate(invalid="ignore"):
                dn = np.sqrt(np.abs(np.einsum("pi,pij,pj->p", dv, habs, dv)))
                un = np.sqrt(np.abs(np.einsum("pi,pij,pj->p", uu[:, i], habs, uu[:, i])))
            same = kept[:, i] & (dn <= SAME_TOL * un + prob.floor)
            cand &= ~same
        kept[:, j] = cand
    return kept


def _solve_pairs(prob: _Problem, n_sol: int, use_fan: bool, tol: float, max_iter: int,
                 progress):
    """Solve the P pairs of ``prob``: (y0, y1, length, status, iterations, residual) with
    shapes (P, n_sol, ...)."""
    P, dim = prob.x_from.shape
    pidx = np.arange(P)
    levels = 0
    if use_fan:
        m = dim - (prob.fi is not None)
        levels = 1 + (int(np.ceil(np.log(np.pi / ZOOM_MIN) / np.log(1 / ZOOM_SHRINK)))
                      if m >= 2 else 0)
    total = levels + max_iter + 2
    state = {"done": 0}

    def tick():
        state["done"] += 1
        if progress is not None:
            progress(min(state["done"], total), total)

    u, target = _coordinate_guesses(prob, pidx)
    riemannian = prob.k.signature[0] == 0
    if use_fan and riemannian and n_sol == 1:
        # the shortest geodesic: Newton from the unwound coordinate guess first; where it
        # converges, the fan only looks for something shorter (rays as long as the
        # solution, which is far cheaper than the full fan); elsewhere all windings and
        # the full fan as below
        cond = np.zeros(P)
        first = _newton(prob, pidx, u[:, 0], target[:, 0], tol, max_iter, tick, cond=cond)
        # a stalled first guess is retried with polar steps before the pair falls back to
        # the full fan (rays over all windings, several times as long)
        _retry(prob, pidx, u[:, 0], target[:, 0], first, tol, max_iter, tick, cond=cond,
               polar=True)
        known = np.where(first[3][:, None], first[0], np.nan)
        K = n_sol + 5
        fu, ft, _ = _Fan(prob, pidx, known=known, known_cond=cond).seeds(K, n_sol, tick)
        again = ~first[3]
        u = np.concatenate([np.where(again[:, None, None], u, np.nan), fu], axis=1)[:, 1:]
        target = np.concatenate([target, ft], axis=1)[:, 1:]
        C2 = u.shape[1]
        seeds, targets = u.reshape(-1, dim), target.reshape(-1, dim)
        second = _newton(prob, np.repeat(pidx, C2), seeds, targets, tol, max_iter, tick)
        _retry(prob, np.repeat(pidx, C2), seeds, targets, second, tol, max_iter, tick,
               polar=True)
        C = 1 + C2
        u, res, it, conv, stopped = (
            np.concatenate([a[:, None], b.reshape((P, C2) + a.shape[1:])], axis=1)
            .reshape((P * C,) + a.shape[1:]) for a, b in zip(first, second))
        idx = np.repeat(pidx, C)
    else:
        if use_fan:
            # Riemannian: the shortest of many; Lorentzian: near an Einstein ring every ray
            # passes close to the source and the seeds spread along it, so many are needed
            # for Newton to reach each image (bench_connect.py --lensing 200, solutions=2:
            # both images for 159 sources with 4 seeds, 187 with 12, 193 with 16 or 24)
            K = n_sol + 5 if riemannian else 8 * n_sol
            fu, ft, _ = _Fan(prob, pidx).seeds(K, n_sol, tick)
            u = np.concatenate([u, fu], axis=1)
            target = np.concatenate([target, ft], axis=1)
        C = u.shape[1]
        idx = np.repeat(pidx, C)
        seeds, targets = u.reshape(-1, dim), target.reshape(-1, dim)
        out = _newton(prob, idx, seeds, targets, tol, max_iter, tick)
        # candidates that stalled: once more with natural monotonicity; on Riemannian
        # specs then with polar steps
        _retry(prob, idx, seeds, targets, out, tol, max_iter, tick, natural=True)
        if riemannian:
            _retry(prob, idx, seeds, targets, out, tol, max_iter, tick, polar=True)
        u, res, it, conv, stopped = out
    # verification: a plain integration from each converged u0 (the same steps Newton's
    # base state took), the arrival compared modulo the periods, normalisation, direction
    y1 = np.full((P * C, 2 * dim), np.nan)
    vres = np.full(P * C, np.inf)
    ok = conv.copy()
    wrong_kind = np.zeros(P * C, dtype=bool)
    if ok.any():
        r = np.flatnonzero(ok)
        y_end, st, _, _ = prob.integrate(idx[r], u[r], variations=False)
        x_end = y_end[:, :dim]
        d = prob.wrap(idx[r], x_end - prob.x_to[idx[r]])
        _, vr, _ = prob.residual(idx[r], u[r], prob.x_to[idx[r]] + d, prob.x_to[idx[r]])
        good = (st == "done") & (vr <= tol)
        gn = prob.gnorm(idx[r], u[r])
        un = prob.unorm(idx[r], u[r])
        if prob.fi is not None:
            good &= prob.sign[idx[r]] * u[r, prob.fi] > 0
        elif prob.kind is not None:
            rel = gn / np.where(un > 0, un, 1.0)
            fits = np.abs(rel) <= KIND_TOL if prob.kind == "null" else rel < -KIND_TOL
            wrong_kind[r] = good & ~fits
            good &= fits
        ok[r] = good
        y1[r] = y_end
        vres[r] = vr
    tick()
    # per pair: distinct verified solutions, ordered
    okm = ok.reshape(P, C)
    uu = u.reshape(P, C, dim)
    with np.errstate(invalid="ignore"):
        lengths = np.sqrt(np.abs(prob.gnorm(idx, u))).reshape(P, C)
    if prob.kind == "null":
        # a null geodesic has length 0; sqrt|g(u0, u0)| would be the normalisation's
        # residual, of order sqrt(tol) |u0|
        lengths = np.where(np.isfinite(lengths), 0.0, lengths)
    y1 = y1.reshape(P, C, -1)
    swept = np.zeros((P, C))
    for i in prob.periods:
        swept += np.abs(y1[:, :, i] - prob.x_from[:, None, i])
    if prob.kind == "null" and prob.fi is not None:
        # light travel time (the change of the free coordinate), then the angle swept
        key1 = np.abs(y1[:, :, prob.fi] - prob.x_from[:, None, prob.fi])
    else:
        key1 = lengths
    key1 = np.where(okm, key1, np.inf)
    ar = np.arange(P)[:, None]
    # duplicates (seeds that ran to the same solution) are represented by the one with the
    # smallest verified residual, then the distinct ones are ordered by the key
    by_res = np.argsort(np.where(okm, vres.reshape(P, C), np.inf), axis=1, kind="stable")
    best = np.zeros((P, C), dtype=bool)
    best[ar, by_res] = _distinct(prob, uu[ar, by_res], okm[ar, by_res])
    order = np.lexsort((swept, key1, ~best), axis=1)
    kept = best[ar, order]
    # the first n_sol kept entries per pair
    rank = np.cumsum(kept, axis=1) - 1
    out_y0 = np.full((P, n_sol, 2 * dim), np.nan)
    out_y1 = np.full((P, n_sol, 2 * dim), np.nan)
    out_len = np.full((P, n_sol), np.nan)
    out_it = np.zeros((P, n_sol), dtype=np.int64)
    out_res = np.full((P, n_sol), np.nan)
    out_st = np.full((P, n_sol), "not_found", dtype="<U14")
    flat_order = (order + (np.arange(P) * C)[:, None])
    pi, cj = np.nonzero(kept & (rank < n_sol))
    src = flat_order[pi, cj]
    slot = rank[pi, cj]
    out_y0[pi, slot] = np.concatenate([prob.x_from[pi], u[src]], axis=1)
    out_y1[pi, slot] = y1.reshape(P * C, -1)[src]
    out_len[pi, slot] = lengths.reshape(-1)[src]
    out_it[pi, slot] = it[src]
    out_res[pi, slot] = vres[src]
    out_st[pi, slot] = "converged"
    none = ~kept.any(axis=1)
    # every candidate ran into a stop (event, domain) before reaching x_to: "stopped"
    ran = it.reshape(P, C) > 0                # candidates without a seed never ran
    all_stopped = np.all(stopped.reshape(P, C) | ~ran, axis=1) & ran.any(axis=1)
    wk = wrong_kind.reshape(P, C).any(axis=1)
    word = np.where(wk, "wrong_kind", np.where(all_stopped, "stopped", "no_convergence"))
    out_st[none] = word[none, None]
    # the best unconverged attempt's residual where nothing converged
    best = np.min(np.where(np.isfinite(res), res, np.inf).reshape(P, C), axis=1)
    out_res[none, 0] = np.where(np.isfinite(best), best, np.nan)[none]
    return out_y0, out_y1, out_len, out_st, out_it, out_res
