"""Throughput of metricc's geodesic and Hamiltonian right-hand sides, one core.

For each of specs/kerr.toml and specs/kerr_schild.toml this times, on one batch of states:

  * the compiled C batch kernel, called directly through cffi with preallocated buffers
    (``lib.<name>_geodesic_rhs_batch(n, y, params, 0, out)``), and through the public wrapper
    ``k.geodesic_rhs(y)`` (input checks, output allocation);
  * the generated NumPy backend (``metricc.load(..., backend="numpy")``);
  * a baseline written here: the *naively derived* expressions passed to
    ``sympy.lambdify(..., modules="numpy")``. The geodesic baseline is the textbook
    Gamma^a_bc = 1/2 g^ad (d_b g_dc + d_c g_db - d_d g_bc) with g^-1 from sympy's symbolic
    ``Matrix.inv()``, no simplification and no CSE, RHS = [u, -Gamma^a_bc u^b u^c]; the
    Hamiltonian baseline is H = 1/2 g^ab p_a p_b with the same symbolic inverse, RHS =
    [dH/dp, -dH/dx] by sympy.diff. Where the symbolic inverse takes longer than
    --naive-timeout (Kerr-Schild: its metric is dense, the inverse did not finish in 5 min)
    the baseline is "lambdify + numeric inverse": g and d_k g lambdified (no CSE), g^-1 by
    numpy.linalg.inv per state, contractions by numpy.einsum. Each row says which it is.

Throughput is evaluations (states) per second: batch size / best time, over at least --repeats
timed runs and as many more as fit in --min-time seconds (time.perf_counter, garbage
collector off; the "runs" column gives the count). Before timing, every backend is checked against
the baseline (the maximum relative difference is printed). All figures come from one run on
one core (the process is pinned to one CPU and BLAS/OpenMP threads are set to 1), so compare
ratios within a run, not absolute numbers across machines.

    python benchmarks/bench_rhs.py            # batch 1e5, >= 7 runs and >= 1 s each
    python benchmarks/bench_rhs.py --quick    # smoke run: batch 1e4, >= 2 runs and >= 0.2 s
"""
from __future__ import annotations

import os

# one core: set before numpy is imported so that BLAS/OpenMP pools start with one thread
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS",
             "NUMEXPR_NUM_THREADS", "VECLIB_MAXIMUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import contextlib  # noqa: E402
import gc  # noqa: E402
import platform  # noqa: E402
import signal  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

from runinfo import cpu_model, tree_state  # noqa: E402

import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import sympy as sp  # noqa: E402

import metricc  # noqa: E402
from metricc import build  # noqa: E402
from metricc.geometry import derive  # noqa: E402

SPECS = ("kerr", "kerr_schild")
AGREE_RTOL = 1e-8      # "agrees": elementwise relative difference below this (the dp_r
                       # component of Kerr sees ~1e-10 from cancellation in every backend)


# -- states ------------------------------------------------------------------------------------
def _timelike(k, x, u_space):
    """u^t > 0 such that g(u, u) = -1, for spatial velocity components u_space."""
    g = k.metric(x)
    a = g[:, 0, 0]
    b = 2.0 * np.einsum("ni,ni->n", g[:, 0, 1:], u_space)
    c = np.einsum("ni,nij,nj->n", u_space, g[:, 1:, 1:], u_space) + 1.0
    # a < 0 and c > 0 in the sampled region, so exactly one root is positive
    ut = (-b - np.sqrt(b * b - 4.0 * a * c)) / (2.0 * a)
    return np.concatenate([x, ut[:, None], u_space], axis=1)


def sample_states(name, k, n, rng):
    """States y = [x, u] with timelike u, in a region well outside the horizon."""
    if name == "kerr":
        r = rng.uniform(3.0, 30.0, n)
        th = rng.uniform(0.3, np.pi - 0.3, n)
        x = np.stack([rng.uniform(0.0, 100.0, n), r, th, rng.uniform(0.0, 2 * np.pi, n)], axis=1)
        us = np.stack([rng.normal(0, 0.3, n), rng.normal(0, 0.3, n) / r,
                       rng.normal(0, 0.3, n) / (r * np.sin(th))], axis=1)
        where = "r in [3, 30], theta in [0.3, pi-0.3], phi in [0, 2pi)"
    elif name == "kerr_schild":
        d = rng.normal(size=(n, 3))
        d /= np.linalg.norm(d, axis=1, keepdims=True)
        rho = rng.uniform(3.0, 30.0, n)
        x = np.concatenate([rng.uniform(0.0, 100.0, n)[:, None], d * rho[:, None]], axis=1)
        us = rng.normal(0, 0.3, size=(n, 3))
        where = "sqrt(x^2+y^2+z^2) in [3, 30], isotropic directions"
    else:  # pragma: no cover
        raise ValueError(name)
    y = _timelike(k, x, us)
    return np.ascontiguousarray(y), where


# -- naive baseline ----------------------------------------------------------------------------
class NaiveTimeout(Exception):
    pass


@contextlib.contextmanager
def time_limit(seconds):
    """Raise NaiveTimeout after `seconds` (SIGALRM; no limit where that is unavailable)."""
    if not seconds or not hasattr(signal, "SIGALRM"):
        yield
        return

    def handler(signum, frame):
        raise NaiveTimeout()

    old = signal.signal(signal.SIGALRM, handler)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old)


class Baseline:
    """Callables y -> (N, 2*dim) for the geodesic and Hamiltonian RHS, and how they were made."""

    def __init__(self, label, geodesic, hamilton, seconds, ops_geodesic=None, ops_hamilton=None):
        self.label = label
        self.geodesic = geodesic
        self.hamilton = hamilton
        self.seconds = seconds
        self.ops_geodesic = ops_geodesic
        self.ops_hamilton = ops_hamilton


def _columns_call(f, dim, n_out):
    """Wrap a lambdified f(*coords, *vel, *params) -> list of n_out into y -> (N, n_out)."""
    def call(y, params):
        cols = [y[:, i] for i in range(2 * dim)]
        vals = f(*cols, *params)
        out = np.empty((y.shape[0], n_out))
        for i, v in enumerate(vals):
            out[:, i] = v   # broadcasts constant entries
        return out
    return call


def naive_symbolic(geo, timeout):
    """Textbook expressions with sympy's symbolic inverse, lambdified (numpy, no CSE)."""
    t0 = time.perf_counter()
    dim = geo.dim
    x, u, p, q = geo.coords, geo.velocity, geo.momentum, geo.params
    g = sp.Matrix(geo.metric)
    with time_limit(timeout):
        ginv = g.inv()
        dg = [g.diff(xk) for xk in x]
        gamma = [[[sp.Rational(1, 2) * sum(ginv[a, d] * (dg[b][d, c] + dg[c][d, b] - dg[d][b, c])
                                           for d in range(dim))
                   for c in range(dim)] for b in range(dim)] for a in range(dim)]
        acc = [-sum(gamma[a][b][c] * u[b] * u[c] for b in range(dim) for c in range(dim))
               for a in range(dim)]
        geo_rhs = list(u) + acc
        ham = sp.Rational(1, 2) * sum(ginv[a, b] * p[a] * p[b]
                                      for a in range(dim) for b in range(dim))
        ham_rhs = [sp.diff(ham, pk) for pk in p] + [-sp.diff(ham, xk) for xk in x]
        f_geo = sp.lambdify(list(x) + list(u) + list(q), geo_rhs, modules="numpy")
        f_ham = sp.lambdify(list(x) + list(p) + list(q), ham_rhs, modules="numpy")
    seconds = time.perf_counter() - t0
    ops_g = sum(sp.count_ops(e) for e in geo_rhs)
    ops_h = sum(sp.count_ops(e) for e in ham_rhs)
    return Baseline("lambdify, symbolic Matrix.inv()", _columns_call(f_geo, dim, 2 * dim),
                    _columns_call(f_ham, dim, 2 * dim), seconds, ops_g, ops_h)


def naive_numeric_inverse(geo):
    """g and d_k g lambdified (numpy, no CSE); inverse and contractions numerically."""
    t0 = time.perf_counter()
    dim = geo.dim
    x, q = geo.coords, geo.params
    g = sp.Matrix(geo.metric)
    iu = [(i, j) for i in range(dim) for j in range(i, dim)]
    flat = [g[i, j] for i, j in iu] + [sp.diff(g[i, j], xk) for xk in x for i, j in iu]
    f = sp.lambdify(list(x) + list(q), flat, modules="numpy")
    m = len(iu)

    def metric_and_derivatives(y, params):
        n = y.shape[0]
        vals = f(*[y[:, i] for i in range(dim)], *params)
        gm = np.empty((n, dim, dim))
        dgm = np.empty((n, dim, dim, dim))     # [n, k, i, j] = d_k g_ij
        for s, (i, j) in enumerate(iu):
            gm[:, i, j] = gm[:, j, i] = vals[s]
            for k in range(dim):
                dgm[:, k, i, j] = dgm[:, k, j, i] = vals[m * (k + 1) + s]
        return gm, dgm

    def geodesic(y, params):
        gm, dgm = metric_and_derivatives(y, params)
        ginv = np.linalg.inv(gm)
        # Gamma_{d bc} = 1/2 (d_b g_dc + d_c g_db - d_d g_bc)
        first = 0.5 * (np.einsum("nbdc->ndbc", dgm) + np.einsum("ncdb->ndbc", dgm) - dgm)
        gamma = np.einsum("nad,ndbc->nabc", ginv, first)
        uvec = y[:, dim:]
        acc = -np.einsum("nabc,nb,nc->na", gamma, uvec, uvec)
        return np.concatenate([uvec, acc], axis=1)

    def hamilton(z, params):
        gm, dgm = metric_and_derivatives(z, params)
        ginv = np.linalg.inv(gm)
        pvec = z[:, dim:]
        uvec = np.einsum("nab,nb->na", ginv, pvec)
        # dp_k = -1/2 d_k g^ab p_a p_b with d_k g^-1 = -g^-1 (d_k g) g^-1
        dp = 0.5 * np.einsum("na,nkab,nb->nk", uvec, dgm, uvec)
        return np.concatenate([uvec, dp], axis=1)

    seconds = time.perf_counter() - t0
    return Baseline("lambdify + numeric inverse (np.linalg.inv)", geodesic, hamilton, seconds)


# -- timing and checks -------------------------------------------------------------------------
def best_time(fn, repeats, min_total):
    """Best of at least `repeats` timed calls, more until they add up to `min_total` seconds
    (so that fast kernels get enough samples to see past a noisy neighbour).

    Returns (best perf_counter seconds, number of runs, best process_time seconds); the CPU
    time is a cross-check on a shared machine (time spent descheduled does not count)."""
    fn()   # warm-up (page faults, caches, lazy imports)
    times, cpu = [], []
    enabled = gc.isenabled()
    gc.disable()
    try:
        while len(times) < repeats or (sum(times) < min_total and len(times) < 10_000):
            c0 = time.process_time()
            t0 = time.perf_counter()
            fn()
            times.append(time.perf_counter() - t0)
            cpu.append(time.process_time() - c0)
    finally:
        if enabled:
            gc.enable()
    return min(times), len(times), min(cpu)


def max_rel_diff(a, ref):
    """max |a - ref| / |ref|, entries smaller than 1e-12 of their column's max taken at that
    floor (so components that are zero up to rounding do not divide by ~0)."""
    ref = np.asarray(ref)
    floor = 1e-12 * np.max(np.abs(ref), axis=0, keepdims=True)
    floor = np.where(floor == 0, 1e-300, floor)
    with np.errstate(invalid="ignore", divide="ignore"):
        r = np.abs(a - ref) / np.maximum(np.abs(ref), floor)
    return float(np.nanmax(r)) if np.all(np.isfinite(a)) else float("inf")


def c_direct(k, kernel):
    """A zero-argument callable running lib.<name>_<kernel>_batch on preallocated buffers."""
    ffi, lib = k._c.ffi, k._c.lib
    fn = getattr(lib, f"{k.name}_{kernel}_batch")
    pvec = np.array(list(k.parameters.values()) or [0.0], dtype=np.float64)
    pp = ffi.from_buffer("double[]", pvec)

    def bind(y):
        y = np.ascontiguousarray(y, dtype=np.float64)
        out = np.empty_like(y)
        yp, op = ffi.from_buffer("double[]", y), ffi.from_buffer("double[]", out)
        n = y.shape[0]

        def run():
            fn(n, yp, pp, 0, op)
            return out
        return run, (y, out, pvec)   # keep buffers alive
    return bind


def fmt_rate(x):
    return f"{x:,.0f}" if x >= 100 else f"{x:.3g}"


# -- main --------------------------------------------------------------------------------------
def pin_one_core():
    if hasattr(os, "sched_getaffinity"):
        cpus = sorted(os.sched_getaffinity(0))
        os.sched_setaffinity(0, {cpus[-1]})
        return f"pinned to CPU {cpus[-1]} (of {len(cpus)} allowed)"
    return "not pinned (no sched_setaffinity on this platform)"


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true",
                    help="smoke run: batch 1e4, >= 2 repeats, --min-time 0.2, naive timeout 15 s")
    ap.add_argument("--batch", type=int, default=None, help="states per batch (default 1e5)")
    ap.add_argument("--repeats", type=int, default=None, help="least number of timed runs, best taken (default 7; 2 with --quick)")
    ap.add_argument("--naive-timeout", type=float, default=None,
                    help="seconds allowed for each symbolic naive derivation before falling "
                         "back to the numeric-inverse baseline (default 120; 15 with --quick; "
                         "0 = no limit)")
    ap.add_argument("--skip-naive-ks", action="store_true",
                    help="do not attempt the symbolic naive derivation for kerr_schild (its "
                         "symbolic 4x4 inverse runs for minutes); use the numeric-inverse "
                         "baseline directly")
    ap.add_argument("--min-time", type=float, default=None,
                    help="keep repeating each implementation until its timed runs add up to "
                         "this many seconds (default 1.0; 0.2 with --quick)")
    ap.add_argument("--specs", nargs="+", default=list(SPECS), choices=SPECS)
    ap.add_argument("--seed", type=int, default=20240601)
    ap.add_argument("--no-pin", action="store_true", help="do not pin the process to one CPU")
    args = ap.parse_args(argv)
    n = args.batch or (10_000 if args.quick else 100_000)
    repeats = args.repeats or (2 if args.quick else 7)
    min_total = args.min_time if args.min_time is not None else (0.2 if args.quick else 1.0)
    timeout = args.naive_timeout if args.naive_timeout is not None else (15 if args.quick else 120)

    pin = "not pinned (--no-pin)" if args.no_pin else pin_one_core()
    cmd = "python benchmarks/bench_rhs.py " + " ".join(sys.argv[1:] if argv is None else argv)
    print(f"# command: {cmd.strip()}")
    print(f"# metricc {metricc.__version__}, Python {platform.python_version()}, numpy "
          f"{np.__version__}, sympy {sp.__version__}")
    print(f"# CPU: {cpu_model()}; {pin}")
    print(f"# C compiler: {' '.join(build.compiler_command())} {' '.join(build.COMPILE_FLAGS)}")
    try:
        load = "load average %.2f %.2f %.2f" % os.getloadavg()
    except (OSError, AttributeError):
        load = "load average unknown"
    print(f"# tree: {tree_state()}; generator fingerprint {build.generator_fingerprint()[:12]}; "
          f"{load} at start")
    print(f"# batch {n:,} states; best of >= {repeats} timed runs and >= {min_total:g} s of runs "
          "per implementation (+1 warm-up), perf_counter, gc off")
    print(f"# cache: {build.cache_root()}")
    print()

    rng = np.random.default_rng(args.seed)
    summary = []
    failures = []
    for name in args.specs:
        path = ROOT / "specs" / f"{name}.toml"
        kc = metricc.load(path, backend="c")
        kn = metricc.load(path, backend="numpy")
        y, where = sample_states(name, kc, n, rng)
        z = kc.momenta(y)
        norm = kc.norm(y)
        params = tuple(kc.parameters.values())
        print(f"== {name}: {kc.summary}")
        print(f"   states: {where}; timelike u, max |g(u,u)+1| = {np.max(np.abs(norm + 1)):.1e};"
              f" params {kc.parameters}; inverse strategy {kc.inverse_strategy!r}")

        geo = derive(metricc.load_spec(path))
        baselines = []
        if name == "kerr_schild" and args.skip_naive_ks:
            print("   naive symbolic baseline: SKIPPED (--skip-naive-ks)")
        else:
            try:
                b = naive_symbolic(geo, timeout)
                baselines.append(b)
                print(f"   naive symbolic baseline: derived + lambdified in {b.seconds:.1f} s "
                      f"(count_ops: geodesic {b.ops_geodesic:,}, hamilton {b.ops_hamilton:,})")
            except NaiveTimeout:
                sp.core.cache.clear_cache()
                gc.collect()
                print(f"   naive symbolic baseline: TIMED OUT after {timeout:g} s "
                      "(--naive-timeout); using the numeric-inverse baseline instead")
        bn = naive_numeric_inverse(geo)
        baselines.append(bn)
        ref = baselines[0]
        info = kc.kernel_info
        print(f"   metricc ops after CSE (manifest): geodesic {info['geodesic_rhs']['ops_after']}"
              f" (before {info['geodesic_rhs']['ops_before']:,}), hamilton "
              f"{info['hamilton_rhs']['ops_after']} (before {info['hamilton_rhs']['ops_before']:,})")

        for kernel, state, attr in (("geodesic_rhs", y, "geodesic"), ("hamilton_rhs", z, "hamilton")):
            ref_out = getattr(ref, attr)(state, params)
            run_c, keep = c_direct(kc, kernel)(state)
            candidates = [
                ("C batch, direct cffi call", run_c),
                (f"C via k.{kernel}(y)", lambda s=state, f=getattr(kc, kernel): f(s)),
                ("NumPy backend (generated)", lambda s=state, f=getattr(kn, kernel): f(s)),
            ] + [(b.label, lambda s=state, b=b, a=attr: getattr(b, a)(s, params))
                 for b in baselines]
            print()
            print(f"   {kernel}: reference for the check = {ref.label}")
            head = f"   {'implementation':<44} {'max rel diff':>12} {'best s':>10} {'runs':>6} {'evals/s':>14}" \
                   f" {'C-direct speedup':>16} {'best cpu s':>10} {'cpu ratio':>9}"
            print(head)
            print("   " + "-" * (len(head) - 3))
            rows = []
            for label, fn in candidates:
                diff = max_rel_diff(np.asarray(fn()), ref_out)
                rows.append([label, diff, None, 0, None])
                if diff > AGREE_RTOL:
                    failures.append(f"{name} {kernel}: {label} differs from {ref.label} "
                                    f"by {diff:.2e}")
            for row, (label, fn) in zip(rows, candidates):
                row[2], row[3], row[4] = best_time(fn, repeats, min_total)
            t_c = rows[0][2]
            cpu_c = rows[0][4]
            for label, diff, t, count, cpu in rows:
                tag = "" if diff <= AGREE_RTOL else "  <-- MISMATCH"
                print(f"   {label:<44} {diff:>12.1e} {t:>10.4g} {count:>6} {fmt_rate(n / t):>14} "
                      f"{t / t_c:>15.1f}x {cpu:>10.4g} {cpu / cpu_c:>8.1f}x{tag}")
            for b, (label, diff, t, _, cpu) in zip(baselines, rows[3:]):
                summary.append((name, kernel, n / t_c, n / rows[2][2], b.label, n / t, t / t_c,
                                rows[2][2] / t_c, cpu / cpu_c))
            del keep
        print()

    print("== summary (evals/s; ratios measured in this run)")
    head = (f"{'spec':<12} {'kernel':<13} {'C direct':>12} {'NumPy gen.':>12} {'baseline':>12} "
            f"{'C/baseline':>11} {'(cpu)':>7} {'C/NumPy':>8}  baseline kind")
    print(head)
    print("-" * (len(head) + 30))
    for name, kernel, rc, rnp, label, rb, ratio, ratio_np, ratio_cpu in summary:
        print(f"{name:<12} {kernel:<13} {fmt_rate(rc):>12} {fmt_rate(rnp):>12} {fmt_rate(rb):>12} "
              f"{ratio:>10.1f}x {ratio_cpu:>6.1f}x {ratio_np:>7.1f}x  {label}")
    print("(evals/s and ratios from perf_counter wall time; '(cpu)' is the same ratio from "
          "process_time, less sensitive to other load on the machine)")
    if failures:
        print()
        print("DISAGREEMENT (relative difference above %.0e):" % AGREE_RTOL)
        for f in failures:
            print("  " + f)
        return 1
    print()
    print(f"all backends agree with the baseline to within {AGREE_RTOL:.0e} (relative)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
