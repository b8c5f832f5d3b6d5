"""Batch integration of geodesics: the NumPy backend and the shared result type.

The algorithm (documented in docs/integrator.md) is the same one the C backend generates:
embedded Runge-Kutta pairs (Dormand-Prince 5(4) and 8(5,3), Hairer, Norsett & Wanner 1993)
with Hairer's error norm, step-size controller, starting step and dense output; each state has
its own step and its own stop. Here it runs vectorised over the batch with masks: every
iteration advances all running states by one attempted step.

Shapes: N states of size n = 2*dim; S samples; J stop functions (events then domain).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from .tableaus import METHODS

RUNNING, DONE, DOMAIN, MAX_STEPS, STEP_UNDERFLOW, NOT_FINITE = -1, 0, 1, 2, 3, 4
# BAD_INPUT: the state cannot start (a non-finite component or parameter, or the right-hand
# side or a stop function is NaN there); INTERRUPTED: the C integrator's interrupt flag was
# raised before the state finished (Python turns that into KeyboardInterrupt).
BAD_INPUT, INTERRUPTED = 5, 6
EVENT_BASE = 16
BASE_STATUS = {DONE: "done", DOMAIN: "domain", MAX_STEPS: "max_steps",
               STEP_UNDERFLOW: "step_underflow", NOT_FINITE: "not_finite",
               BAD_INPUT: "bad_input", INTERRUPTED: "interrupted"}
ROOT_REL_TOL = 1e-12   # event location: |delta lambda| <= 1e-12 * max(1, |lambda|)
HMIN_REL = 1e-14       # smallest step relative to max(1, |lambda|)
# rtol below 100 ulp of 1 asks for more than double precision can give: the error estimate
# is then rounding noise and the step shrinks until it underflows (or, with atol = 0, the
# scaled error overflows); refused up front rather than clamped, so no run silently gets a
# tolerance other than the one asked for.
RTOL_MIN = 100 * np.finfo(np.float64).eps
# max_steps at or above this (and inf) mean "no limit": no state takes 2^62 steps, and the C
# integrator's count is a 64-bit long.
MAX_STEPS_UNLIMITED = 2 ** 62
# threads above this are a typo (the C integrator would start that many OpenMP threads).
THREADS_MAX = 4096


def check_options(rtol, atol, max_steps, threads):
    """Validate the integrator options shared by both backends.

    Returns (rtol, atol, max_steps, threads): floats, an int (inf and values >=
    MAX_STEPS_UNLIMITED become MAX_STEPS_UNLIMITED) and an int or None. Raises ValueError
    naming the argument."""
    try:
        rtol, atol = float(rtol), float(atol)
    except (TypeError, ValueError):
        raise ValueError(f"rtol and atol must be numbers, got rtol={rtol!r}, atol={atol!r}") \
            from None
    if not (np.isfinite(rtol) and rtol >= RTOL_MIN):
        raise ValueError(f"rtol must be a finite number >= {RTOL_MIN:.3g} (100 ulp of 1; "
                         f"smaller asks for more than double precision gives), got {rtol!r}")
    if not (np.isfinite(atol) and atol >= 0):
        raise ValueError(f"atol must be a finite number >= 0, got {atol!r}")
    max_steps = _whole("max_steps", max_steps, 0, MAX_STEPS_UNLIMITED, "(or inf: no limit)")
    if threads is not None:
        what = f"(at most {THREADS_MAX})"
        if _whole("threads", threads, 1, None, what) > THREADS_MAX:
            raise ValueError(f"threads must be a whole number >= 1 {what}, got {threads!r}")
        threads = int(threads)
    return rtol, atol, max_steps, threads


def _whole(name: str, value, low: int, cap: int | None, what: str) -> int:
    """value as an int >= low; with cap, inf and anything above cap become cap."""
    if isinstance(value, (bool, np.bool_, str, bytes)):
        value = None   # True or "100" is not a count
    try:
        v = float(value)
    except (TypeError, ValueError, OverflowError):
        v = np.nan
    if cap is not None and v == np.inf:
        return cap
    if not np.isfinite(v) or v != np.floor(v) or v < low:
        raise ValueError(f"{name} must be a whole number >= {low} {what}, got {value!r}")
    if cap is not None and v >= cap:
        return cap
    return int(value) if isinstance(value, (int, np.integer)) else int(v)


@dataclass(frozen=True)
class IntegrationResult:
    """Result of :meth:`metricc.MetricKernels.integrate`.

    y: (N, 2*dim) states where each integration stopped. lam: (N,) affine parameter reached.
    status: (N,) str array ("done", an event name, "domain", "max_steps", "step_underflow",
    "not_finite", "bad_input"). steps: (N,) accepted steps. samples: (N, S, 2*dim) or None. drift: (N,)
    |g(u,u)_end - g(u,u)_start| (Hamiltonian form: g^{mu nu} p_mu p_nu). invariant_drift:
    dict name -> (N,) |I_end - I_start| for the spec's [invariants]. status_code: (N,) the
    integer statuses (0 done, 1 domain, 2 max_steps, 3 step_underflow, 4 not_finite,
    5 bad_input, 16 + k event k).

    Carried quantities (None unless asked for; see MetricKernels.integrate): transport
    (N, m, dim) and transport_samples (N, S, m, dim); variations (N, m, 2*dim), or
    (N, 2*dim, 2*dim) = d y_end / d y0 for variations="all", and variations_samples
    (N, S, m, 2*dim) (resp. (N, S, 2*dim, 2*dim)); param_variations: dict name -> (N, 2*dim)
    d y_end / d param.
    """
    y: np.ndarray
    lam: np.ndarray
    status: np.ndarray
    steps: np.ndarray
    samples: np.ndarray | None
    drift: np.ndarray
    status_code: np.ndarray
    invariant_drift: dict = field(default_factory=dict)
    transport: np.ndarray | None = None
    transport_samples: np.ndarray | None = None
    variations: np.ndarray | None = None
    variations_samples: np.ndarray | None = None
    param_variations: dict | None = None


def status_names(codes: np.ndarray, event_names) -> np.ndarray:
    """Integer status codes -> strings (event k -> its name)."""
    names = dict(BASE_STATUS)
    names.update({EVENT_BASE + i: e for i, e in enumerate(event_names)})
    width = max(len(v) for v in names.values())
    out = np.empty(codes.shape, dtype=f"<U{width}")
    for code, name in names.items():
        out[codes == code] = name
    return out


class _Tableau:
    """A method's coefficients as float arrays."""

    def __init__(self, name: str):
        t = METHODS[name]
        self.name = name
        self.stages = t["stages"]
        self.a = [np.array([float(v) for v in row]) for row in t["a"]]
        self.c = np.array([float(v) for v in t["c"]])
        self.b = np.array([float(v) for v in t["b"]])
        self.safety, self.beta, self.expo1 = t["safety"], t["beta"], t["expo1"]
        self.predictive = t["predictive"]
        self.facc1, self.facc2 = 1.0 / t["fac_min"], 1.0 / t["fac_max"]
        self.order = t["order"]
        if name == "dp5":
            self.e = np.array([float(v) for v in t["e"]])
            self.d = np.array([float(v) for v in t["d"]])
        else:
            self.e5 = np.array(t["e5"])
            self.e3 = np.array(t["e3"])
            self.a_extra = [np.array(row) for row in t["a_extra"]]
            self.c_extra = np.array(t["c_extra"])
            self.dd = np.array(t["d"])


def sqrt_depth(expo: float) -> int | None:
    """k when expo = 1/2^k (k = 1, 2, 3: x**expo is k nested square roots), else None. The C
    integrator (emit_integrator) takes the same decision."""
    return {0.5: 1, 0.25: 2, 0.125: 3}.get(expo)


def error_power(err: np.ndarray, expo: float) -> np.ndarray:
    """err**expo for the step-size controller. An exponent 1/2^k (DOP853's 1/8) is taken as
    k square roots: they are correctly rounded everywhere, so the C integrator computes the
    same bits, and in a vectorised loop instead of a pow call per state and step."""
    depth = sqrt_depth(expo)
    if depth is None:
        return np.power(err, expo)
    for _ in range(depth):
        err = np.sqrt(err)
    return err


def _combine(coeffs: np.ndarray, K: np.ndarray) -> np.ndarray:
    """sum_j coeffs[j] * K[j] over the stages present; K: (s, m, n) -> (m, n)."""
    out = np.zeros(K.shape[1:])
    for j, cj in enumerate(coeffs):
        if cj != 0.0:
            out += cj * K[j]
    return out


def integrate_numpy(rhs: Callable, stop: Callable | None, y0: np.ndarray, lam_end: float,
                    params: tuple, *, rtol: float, atol: float, max_steps: int, method: str,
                    samples: np.ndarray | None, stop_codes: np.ndarray,
                    progress: Callable | None = None, n_base: int | None = None,
                    n_control: int | None = None):
    """Integrate every row of y0 (N, n) from lambda = 0 to lam_end.

    rhs(y (m, n), params_subset) -> (m, n). stop(x (m, dim), params_subset) -> (m, J) values
    whose sign change to <= 0 stops a state with the matching entry of stop_codes (J,).
    params: tuple of (N,) arrays. Returns (y, lam, status codes, steps, samples or None).

    Carried quantities: a row may be an augmented state [base state (n_base = 2*dim),
    carried components (n - n_base)]; rhs then gets and returns the augmented rows, the stop
    functions read the first dim components, and samples, dense output and the placement at
    a stop include the carried part. The starting step comes from the base components only;
    the error norm (and the finiteness test of a step) covers the first n_control components
    (default n: all; n_base: the steps are those of the base state alone, bit for bit).
    n_base defaults to n (nothing carried).
    """
    tab = _Tableau(method)
    y = np.array(y0, dtype=np.float64, copy=True)
    N, n = y.shape
    n_base = n if n_base is None else int(n_base)
    n_control = n if n_control is None else int(n_control)
    if not (0 < n_base <= n and n_base % 2 == 0 and n_base <= n_control <= n):
        raise ValueError(f"n_base={n_base} and n_control={n_control} do not fit states of "
                         f"size {n} (need 0 < n_base <= n_control <= {n}, n_base even)")
    dim = n_base // 2
    direction = 1.0 if lam_end >= 0 else -1.0
    lam = np.zeros(N)
    status = np.full(N, RUNNING, dtype=np.int32)
    steps = np.zeros(N, dtype=np.int64)
    S = 0 if samples is None else len(samples)
    sample_out = np.full((N, S, n), np.nan) if S else None

    def sub(idx):
        return tuple(p[idx] for p in params)

    with np.errstate(all="ignore"):
        # a state that cannot start is "bad_input": a non-finite component or parameter,
        # a stop function that is NaN at the start (an out-of-range parameter typically
        # makes the horizon or domain expression NaN), or a non-finite f(y0) (below)
        finite0 = np.all(np.isfinite(y), axis=1)
        for p in params:
            finite0 &= np.isfinite(np.broadcast_to(p, (N,)))
        status[~finite0] = BAD_INPUT
        g_prev = np.zeros((N, len(stop_codes)))
        if stop is not None and len(stop_codes):
            idx = np.flatnonzero(status == RUNNING)
            g_prev[idx] = stop(y[idx, :dim], sub(idx))
            unknown = np.isnan(g_prev[idx]).any(axis=1)
            bad = ~(g_prev[idx] > 0)  # <= 0
            hit = bad.any(axis=1) & ~unknown
            first = np.argmax(bad, axis=1)
            status[idx[hit]] = stop_codes[first[hit]]
            status[idx[unknown]] = BAD_INPUT
        if S:
            at_zero = samples == 0.0
            if at_zero.any():
                sample_out[:, at_zero, :] = y[:, None, :]
        if lam_end == 0.0:
            status[status == RUNNING] = DONE
        f = np.zeros_like(y)
        h = np.zeros(N)
        idx = np.flatnonzero(status == RUNNING)
        if idx.size:
            f[idx] = rhs(y[idx], sub(idx))
            badf = ~np.all(np.isfinite(f[idx, :n_control]), axis=1)
            status[idx[badf]] = BAD_INPUT
            idx = idx[~badf]
        if idx.size:
            h[idx] = _initial_step(rhs, y[idx], f[idx], sub(idx), direction, abs(lam_end),
                                   tab.order, rtol, atol, n_base)
        facold = np.full(N, 1e-4)
        h_prev, err_prev = np.zeros(N), np.full(N, 1e-2)   # the last accepted step's
        last_rejected = np.zeros(N, dtype=bool)
        nonfinite_trouble = np.zeros(N, dtype=bool)
        total = N
        reported = -1
        # The running states, kept as a shrinking index array: each iteration costs in
        # proportion to the states still running, not to the batch (a long straggler among
        # many finished states runs as fast as alone).
        idx = np.flatnonzero(status == RUNNING)

        while True:
            idx = idx[status[idx] == RUNNING]
            if progress is not None:
                done = total - idx.size
                if done != reported:
                    progress(done, total)
                    reported = done
            if idx.size == 0:
                break
            over = steps[idx] >= max_steps
            if over.any():
                status[idx[over]] = MAX_STEPS
                idx = idx[~over]
                if idx.size == 0:
                    continue
            hi = h[idx]
            remaining = lam_end - lam[idx]
            hi = np.where(direction * (hi - remaining) > 0, remaining, hi)
            pi = sub(idx)
            yi, fi = y[idx], f[idx]
            K, y_new, err = _step(tab, rhs, yi, fi, hi, pi, rtol, atol, n_control)
            finite = np.isfinite(err) & np.all(np.isfinite(_first(y_new, n_control)), axis=1)
            accept = finite & (err <= 1.0)
            # step-size proposal (Hairer's controller)
            errc = np.where(finite, err, 1.0)
            fac11 = error_power(np.maximum(errc, 1e-300), tab.expo1)
            fac = fac11 / np.power(facold[idx], tab.beta)
            fac = np.clip(fac / tab.safety, tab.facc2, tab.facc1)
            h_rej = hi / np.minimum(tab.facc1, fac11 / tab.safety)
            h_rej = np.where(finite, h_rej, hi * 0.2)
            nonfinite_trouble[idx[~finite]] = True

            # rejected steps
            rej = ~accept
            if rej.any():
                r = idx[rej]
                h[r] = h_rej[rej]
                last_rejected[r] = True
                hmin = HMIN_REL * np.maximum(1.0, np.abs(lam[r]))
                small = np.abs(h[r]) < hmin
                if small.any():
                    rs = r[small]
                    status[rs] = np.where(nonfinite_trouble[rs], NOT_FINITE, STEP_UNDERFLOW)

            if not accept.any():
                continue
            a = idx[accept]
            ka = K[:, accept]
            ya, yn, ha = yi[accept], y_new[accept], hi[accept]
            lam_old = lam[a]
            lam_new = lam_old + ha
            at_end = direction * (lam_new - lam_end) >= 0
            lam_new = np.where(at_end, lam_end, lam_new)
            steps[a] += 1
            pa = sub(a)
            theta_stop = np.full(a.size, np.inf)
            code_stop = np.zeros(a.size, dtype=np.int32)
            # Which accepted steps need the dense output: a stop function crossed, or a
            # sample lies inside the step.
            need = np.zeros(a.size, dtype=bool)
            crossing = None
            if stop is not None and len(stop_codes):
                g_new = stop(yn[:, :dim], pa)
                crossing = ~(g_new > 0)
                need |= crossing.any(axis=1)
            if S:
                inside = _in_step(samples, lam_old, lam_new, direction)
                need |= inside.any(axis=1)
            drows = np.flatnonzero(need)
            dmap = np.full(a.size, -1)
            dense = None
            if drows.size:
                dmap[drows] = np.arange(drows.size)
                dense = _dense(tab, rhs, ya[drows], yn[drows], ka[:, drows], ha[drows],
                               tuple(p[drows] for p in pa))
            if crossing is not None:
                for j in range(len(stop_codes)):
                    rows = np.flatnonzero(crossing[:, j])
                    if rows.size == 0:
                        continue
                    th = _locate(tab, dense, dmap[rows], stop, tuple(p[rows] for p in pa), j,
                                 g_prev[a[rows], j], g_new[rows, j], ha[rows], lam_new[rows],
                                 dim)
                    better = th < theta_stop[rows]
                    theta_stop[rows[better]] = th[better]
                    code_stop[rows[better]] = stop_codes[j]
                g_prev[a] = g_new
            stopped = np.isfinite(theta_stop)
            lam_reached = np.where(stopped, lam_old + theta_stop * ha, lam_new)
            if S:
                inside = _in_step(samples, lam_old, lam_reached, direction)
                rr, cc = np.nonzero(inside)
                if rr.size:
                    th = (samples[cc] - lam_old[rr]) / ha[rr]
                    sample_out[a[rr], cc] = _dense_eval(tab, dense, dmap[rr], th)
            # stopped by an event or the domain: place the state on the crossing
            if stopped.any():
                rows = np.flatnonzero(stopped)
                yn = yn.copy()
                yn[rows] = _dense_eval(tab, dense, dmap[rows], theta_stop[rows])
                status[a[rows]] = code_stop[rows]
            y[a] = yn
            lam[a] = lam_reached
            f[a] = ka[tab.stages - 1]
            quot = fac[accept]
            if tab.predictive:
                quot = _predictive_quotient(tab, quot, steps[a] > 1, h_prev[a], err_prev[a], ha,
                                            err[accept])
                h_prev[a] = ha
                err_prev[a] = np.maximum(err[accept], 1e-2)
            h_new = ha / quot
            h[a] = np.where(last_rejected[a], direction * np.minimum(np.abs(h_new), np.abs(ha)),
                            h_new)
            facold[a] = np.maximum(err[accept], 1e-4)
            last_rejected[a] = False
            nonfinite_trouble[a] = False
            finished = at_end & ~stopped
            status[a[finished]] = DONE
    return y, lam, status, steps, sample_out


def _predictive_quotient(tab: _Tableau, quot, has_prev, h_prev, err_prev, h, err):
    """h / h_new after an accepted step, with Gustafsson's predictive controller (K.
    Gustafsson, ACM TOMS 20, 1994; as in Hairer & Wanner's RADAU5, Solving ODEs II, 1996):
    the factor (h_prev / h) (err^2 / err_prev)^(1/q) / safety extrapolates the error's trend
    from the last accepted step (h_prev, err_prev); the smaller of the two steps is taken.
    quot: the standard quotient; has_prev: a previous accepted step exists. (m,) arrays."""
    gus = (h_prev / h) * error_power(err * err / err_prev, tab.expo1) / tab.safety
    gus = np.clip(gus, tab.facc2, tab.facc1)
    return np.where(has_prev, np.maximum(quot, gus), quot)


def _in_step(samples, lam_from, lam_to, direction) -> np.ndarray:
    """(m, S) mask of samples in the half-open step (lam_from, lam_to] along direction."""
    s = samples[None, :]
    if direction > 0:
        return (s > lam_from[:, None]) & (s <= lam_to[:, None])
    return (s < lam_from[:, None]) & (s >= lam_to[:, None])


def _scale(sk: np.ndarray) -> np.ndarray:
    """Error scales atol + rtol * |y|, with 1 where that is 0 (atol = 0 and a component that
    is exactly 0): its error then counts as absolute, where 0 / 0 would make a finite state
    "not_finite". The C integrator does the same (a comparison and a select)."""
    return np.where(sk > 0, sk, 1.0)


def _first(a: np.ndarray, k: int) -> np.ndarray:
    """The first k columns of a (m, n) as a contiguous array (a itself when k = n): the sums
    over them then run exactly as over an array of width k, so a base state carried with
    extra components gets the same bits as alone."""
    return a if k == a.shape[1] else np.ascontiguousarray(a[:, :k])


def _initial_step(rhs, y, f, params, direction, hmax, order, rtol, atol, n_base=None):
    """Hairer's starting step size (HNW 1993, sec. II.4), per state, from the first n_base
    components (the base state; carried components take no part); rhs gets the full rows."""
    n = y.shape[1] if n_base is None else n_base
    y_full, f_full = y, f
    y, f = _first(y, n), _first(f, n)
    sk = _scale(atol + rtol * np.abs(y))
    dnf = np.sum((f / sk) ** 2, axis=1) / n
    dny = np.sum((y / sk) ** 2, axis=1) / n
    h = np.where((dnf <= 1e-10) | (dny <= 1e-10), 1e-6, np.sqrt(dny / np.maximum(dnf, 1e-300)) * 0.01)
    h = np.minimum(h, hmax) * direction
    # the trial Euler step moves the whole row (rhs takes full rows); only its base part counts
    y1 = y_full + h[:, None] * f_full
    f1 = _first(rhs(y1, params), n)
    der2 = np.sqrt(np.sum(((f1 - f) / sk) ** 2, axis=1) / n) / np.abs(h)
    der12 = np.maximum(np.abs(der2), np.sqrt(dnf))
    h1 = np.where(der12 <= 1e-15, np.maximum(1e-6, np.abs(h) * 1e-3),
                  np.power(0.01 / np.maximum(der12, 1e-300), 1.0 / order))
    h = np.minimum(np.minimum(100 * np.abs(h), h1), hmax)
    h = np.where(np.isfinite(h) & (h > 0), h, 1e-6)
    return direction * h


def _step(tab: _Tableau, rhs, y, f, h, params, rtol, atol, n_control=None):
    """One attempted step for every row: (stages K (s, m, n), y_new, error norm (m,)). The
    norm covers the first n_control components (default all)."""
    m, n = y.shape
    nc = n if n_control is None else n_control
    K = np.empty((tab.stages, m, n))
    K[0] = f
    hcol = h[:, None]
    for s in range(1, tab.stages - 1):
        K[s] = rhs(y + hcol * _combine(tab.a[s], K[:s]), params)
    y_new = y + hcol * _combine(tab.b, K[:tab.stages - 1])
    K[tab.stages - 1] = rhs(y_new, params)
    sk = _scale(atol + rtol * np.maximum(np.abs(y), np.abs(y_new)))
    if tab.name == "dp5":
        e = _first(hcol * _combine(tab.e, K) / sk, nc)
        err = np.sqrt(np.sum(e * e, axis=1) / nc)
    else:
        e5 = _first(_combine(tab.e5, K) / sk, nc)
        e3 = _first(_combine(tab.e3, K) / sk, nc)
        err5 = np.sum(e5 * e5, axis=1)
        err3 = np.sum(e3 * e3, axis=1)
        deno = err5 + 0.01 * err3
        deno = np.where(deno > 0, deno, 1.0)
        err = np.abs(h) * err5 / np.sqrt(deno * nc)
    return K, y_new, err


def _dense(tab: _Tableau, rhs, y, y_new, K, h, params):
    """Dense-output coefficients for the accepted steps: (y_old, F (m, p, n))."""
    hcol = h[:, None]
    ydiff = y_new - y
    if tab.name == "dp5":
        bspl = hcol * K[0] - ydiff
        r4 = ydiff - hcol * K[6] - bspl
        r5 = hcol * _combine(tab.d, K)
        return y, np.stack([ydiff, bspl, r4, r5], axis=1)
    Kx = np.concatenate([K, np.empty((3,) + K.shape[1:])], axis=0)
    for i, (arow, c) in enumerate(zip(tab.a_extra, tab.c_extra)):
        s = 13 + i
        Kx[s] = rhs(y + hcol * _combine(arow, Kx[:s]), params)
    F0 = ydiff
    F1 = hcol * K[0] - ydiff
    F2 = 2 * ydiff - hcol * (K[12] + K[0])
    rest = [hcol * _combine(tab.dd[i], Kx) for i in range(4)]
    return y, np.stack([F0, F1, F2] + rest, axis=1)


def _dense_eval(tab: _Tableau, dense, rows: np.ndarray, theta: np.ndarray) -> np.ndarray:
    """States at fractions theta (k,) of the step for dense rows ``rows`` (k,)."""
    y_old, F = dense
    y_old, F = y_old[rows], F[rows]
    th = theta[:, None]
    if tab.name == "dp5":
        ydiff, bspl, r4, r5 = (F[:, i] for i in range(4))
        t1 = 1.0 - th
        return y_old + th * (ydiff + t1 * (bspl + th * (r4 + t1 * r5)))
    out = np.zeros_like(y_old)
    for i, fi in enumerate(reversed(range(F.shape[1]))):
        out = out + F[:, fi]
        out = out * (th if i % 2 == 0 else (1.0 - th))
    return out + y_old


def _locate(tab, dense, rows, stop, params, j, g_lo, g_hi, h, lam_new, dim):
    """Fraction theta in (0, 1] of the step where stop function j crosses zero (Illinois).

    rows: indices into the dense output; params: parameter arrays for those rows."""
    lo = np.zeros(rows.size)
    hi = np.ones(rows.size)
    glo = np.where(np.isfinite(g_lo), g_lo, 1.0)
    ghi = np.where(np.isfinite(g_hi), g_hi, -1.0)
    side = np.zeros(rows.size, dtype=np.int8)
    tol = ROOT_REL_TOL * np.maximum(1.0, np.abs(lam_new)) / np.maximum(np.abs(h), 1e-300)
    for _ in range(200):
        active = (hi - lo) > tol
        if not active.any():
            break
        denom = glo - ghi
        th = np.where(denom > 0, lo + (hi - lo) * glo / np.where(denom > 0, denom, 1.0),
                      0.5 * (lo + hi))
        th = np.where((th <= lo) | (th >= hi) | ~np.isfinite(th), 0.5 * (lo + hi), th)
        ys = _dense_eval(tab, dense, rows, th)
        g = stop(ys[:, :dim], params)[:, j]
        g = np.where(np.isfinite(g), g, -1.0)
        pos = (g > 0) & active
        neg = ~(g > 0) & active
        # Illinois: halve the value kept on the side that did not move twice in a row
        lo = np.where(pos, th, lo)
        glo = np.where(pos, g, np.where(neg & (side == -1), glo * 0.5, glo))
        hi = np.where(neg, th, hi)
        ghi = np.where(neg, g, np.where(pos & (side == 1), ghi * 0.5, ghi))
        side = np.where(pos, 1, np.where(neg, -1, side)).astype(np.int8)
    return hi
