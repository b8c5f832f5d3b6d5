"""Batch integrator throughput: Kerr photons, C integrator vs scipy solve_ivp, 1 vs 2 threads.

    python benchmarks/bench_integrate.py [--quick] [--rays N] [--repeats R]

Kerr (a = 0.9) photons from r = 1000 M toward the hole, equatorial-ish, impact parameters
spread over capture and escape (0 to 10 M), rtol 1e-10, atol 1e-12, lam_end 3000 M. The
baseline is what a user would otherwise write: scipy.integrate.solve_ivp(method="DOP853")
per ray with the generated NumPy right-hand side (k.ivp_rhs()) and a terminal horizon
event; it is timed on a sample of rays and compared as rays per second in the same run.
Also: the NumPy batch integrator, and the C integrator with 1 and 2 OpenMP threads (best of
--repeats runs each, through the public k.integrate).

    python benchmarks/bench_integrate.py --straggler N_FAST [--long-steps S]

NumPy backend only: one state running to max_steps among N_FAST that stop after a few steps,
timed together and apart (what finished states cost a long run).

Integrator overhead: the right-hand-side evaluations per second inside the C integrator
(1 thread) against the raw batch kernel's rate. The raw rate is timed like bench_rhs.py's
"C batch, direct cffi call": lib.kerr_geodesic_rhs_batch on 1e5 preallocated states, best
of >= 7 runs and >= 1 s of runs (the public k.geodesic_rhs adds input checks and an output
allocation, which understate the kernel's rate; it is printed for reference). The
evaluations per ray are counted with the NumPy integrator, which runs the same algorithm
(same steps, rejections and dense-output stages), on a subset of the rays: its evaluations
per accepted step times the C integrator's mean accepted steps over all rays.
"""
from __future__ import annotations

import argparse
import gc
import os
import platform
import sys
import time
from pathlib import Path

from runinfo import cpu_model, tree_state

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import metricc  # noqa: E402
from metricc import build  # noqa: E402

CHUNK = 2000   # rays per timed call in the overhead measurement


def photons(k, n: int, seed: int = 1) -> np.ndarray:
    rng = np.random.default_rng(seed)
    r0 = 1000.0
    y = np.zeros((n, 8))
    y[:, 1] = r0
    y[:, 2] = np.pi / 2 + rng.uniform(-0.05, 0.05, n)
    b = rng.uniform(0.0, 10.0, n)
    y[:, 4], y[:, 7] = 1.0, b / r0**2
    y = k.normalize(y, "null", solve_for=1)
    y[:, 5] = -np.abs(y[:, 5])
    return y


def best_time(fn, repeats: int, min_total: float = 0.0) -> tuple[float, int]:
    """Best perf_counter time of at least `repeats` calls (more until they add up to
    `min_total` seconds), after one warm-up call, garbage collector off."""
    fn()
    times = []
    enabled = gc.isenabled()
    gc.disable()
    try:
        while len(times) < repeats or (sum(times) < min_total and len(times) < 10_000):
            t0 = time.perf_counter()
            fn()
            times.append(time.perf_counter() - t0)
    finally:
        if enabled:
            gc.enable()
    return min(times), len(times)


def straggler(n_fast: int, long_steps: int, repeats: int, at_once: bool = False) -> None:
    """NumPy backend: one state that runs to max_steps among n_fast that stop within a few
    steps (at_once: at lambda = 0, so that the fast group costs next to nothing itself),
    against the two groups integrated apart. What the fast states add to the straggler's run
    is the cost of keeping finished states in the batch."""
    k = metricc.load(ROOT / "specs" / "kerr.toml", backend="numpy")
    x = np.array([0.0, 10.0, np.pi / 2, 0.0])
    g = k.metric(x)
    omega = 1.0 / (10.0 ** 1.5 + 0.9)          # prograde circular orbit (Bardeen et al. 1972)
    ut = 1.0 / np.sqrt(-(g[0, 0] + 2 * g[0, 3] * omega + g[3, 3] * omega ** 2))
    slow = np.array([[0.0, 10.0, np.pi / 2, 0.0, ut, 0.0, 0.0, omega * ut]])
    fast = np.zeros((n_fast, 8))                # photons falling in from r = 3..4 M
    fast[:, 1] = np.linspace(3.0, 4.0, n_fast)
    fast[:, 2] = np.pi / 2
    fast[:, 4] = 1.0
    fast = k.normalize(fast, "null", solve_for=1)
    fast[:, 5] = -np.abs(fast[:, 5])
    if at_once:
        fast[:, 1] = 1.44       # r+ = 1.436 < r < 1.01 r+: the horizon event stops them at 0
    lam_end = 1e6

    def run(y):
        return k.integrate(y, lam_end, max_steps=long_steps)

    both = np.concatenate([slow, fast])
    mixed = run(both)
    print(f"# command: python benchmarks/bench_integrate.py --straggler {n_fast} "
          f"--long-steps {long_steps} --repeats {repeats}{' --at-once' if at_once else ''}")
    print(f"NumPy backend, Kerr a=0.9: 1 circular orbit to max_steps={long_steps} "
          f"(status {mixed.status[0]}) + {n_fast} infalling photons (mean "
          f"{mixed.steps[1:].mean():.1f} steps, statuses {sorted(set(mixed.status[1:]))})")
    # interleaved, so that a busy spell on a shared machine hits all three alike
    times = [[_timed(lambda: run(y)) for y in (both, slow, fast)] for _ in range(repeats)]
    t_mixed, t_slow, t_fast = np.min(times, axis=0)
    print(f"together {t_mixed:.3f} s; apart: straggler {t_slow:.3f} s + fast {t_fast:.3f} s = "
          f"{t_slow + t_fast:.3f} s; together / apart {t_mixed / (t_slow + t_fast):.3f} "
          f"(CPU seconds, best of {repeats})")


def _timed(fn) -> float:
    """CPU seconds of fn() (the NumPy integrator is single-threaded; CPU time is less at the
    mercy of other processes on a shared machine than wall time)."""
    t0 = time.process_time()
    fn()
    return time.process_time() - t0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--straggler", type=int, default=None, metavar="N_FAST",
                    help="only the NumPy straggler measurement: 1 long state among N_FAST "
                         "fast ones")
    ap.add_argument("--at-once", action="store_true",
                    help="with --straggler: the fast states stop at lambda = 0")
    ap.add_argument("--long-steps", type=int, default=2000,
                    help="max_steps of the straggler (with --straggler; default 2000)")
    ap.add_argument("--quick", action="store_true", help="10^4 rays, one run per thread count")
    ap.add_argument("--rays", type=int, default=None, help="rays (default 10^5)")
    ap.add_argument("--repeats", type=int, default=None,
                    help="timed C integrator runs per thread count, best taken (default 2; "
                         "1 with --quick)")
    args = ap.parse_args()
    if args.straggler is not None:
        straggler(args.straggler, args.long_steps, args.repeats or 3, args.at_once)
        return
    n = args.rays or (10_000 if args.quick else 100_000)
    repeats = args.repeats or (1 if args.quick else 2)
    n_scipy = 20 if args.quick else 100
    print(f"# command: python benchmarks/bench_integrate.py {' '.join(sys.argv[1:])}".rstrip())
    print(f"# metricc {metricc.__version__}, Python {platform.python_version()}, numpy "
          f"{np.__version__}; CPU: {cpu_model()}, {os.cpu_count()} logical CPUs")
    print(f"# C compiler: {' '.join(build.compiler_command())} {' '.join(build.COMPILE_FLAGS)}")
    try:
        load = "load average %.2f %.2f %.2f" % os.getloadavg()
    except (OSError, AttributeError):
        load = "load average unknown"
    print(f"# tree: {tree_state()}; {load} at start")
    k = metricc.load(ROOT / "specs" / "kerr.toml", backend="c")
    knp = metricc.load(ROOT / "specs" / "kerr.toml", backend="numpy")
    y = photons(k, n)
    lam_end = 3000.0
    print(f"Kerr a=0.9, {n} photons from r=1000 M, rtol 1e-10, atol 1e-12, lam_end {lam_end}")
    rates = {}
    for threads in (1, 2):
        out = {}

        def run():
            out["res"] = k.integrate(y, lam_end, rtol=1e-10, atol=1e-12, threads=threads)
        t0 = time.perf_counter()
        run()                               # first run: also the result used below
        dt = time.perf_counter() - t0
        for _ in range(repeats - 1):
            t0 = time.perf_counter()
            run()
            dt = min(dt, time.perf_counter() - t0)
        res = out["res"]
        rates[threads] = n / dt
        names, counts = np.unique(res.status, return_counts=True)
        print(f"C integrator, {threads} thread(s): {n / dt:12,.0f} rays/s  (best {dt:.2f} s of "
              f"{repeats}; { {str(a): int(b) for a, b in zip(names, counts)} }; mean "
              f"{res.steps.mean():.1f} steps)")
    steps_c = np.asarray(res.steps, dtype=float)

    m = min(n, 2000 if args.quick else 5000)
    # The same algorithm in NumPy, with its RHS wrapped in a counter: evaluations per step.
    from metricc.integrate import DOMAIN, EVENT_BASE, integrate_numpy
    calls = [0]

    def counted(states, params):
        calls[0] += len(states)
        return knp._np.geodesic_rhs(states, params)

    def stop(x, params):
        return np.concatenate([knp._np.events(x, params), knp._np.domain(x, params)], axis=1)
    codes = np.array([EVENT_BASE, DOMAIN, DOMAIN], dtype=np.int32)
    params = tuple(np.full(m, v) for v in knp.parameters.values())
    t = time.perf_counter()
    _, _, _, steps_np, _ = integrate_numpy(counted, stop, y[:m], lam_end, params, rtol=1e-10,
                                           atol=1e-12, max_steps=100000, method="dop853",
                                           samples=None, stop_codes=codes)
    dt = time.perf_counter() - t
    per_step = calls[0] / steps_np.sum()
    per_ray = per_step * steps_c.mean()
    print(f"NumPy batch integrator:     {m / dt:12,.0f} rays/s  ({m} rays, {dt:.2f} s; "
          f"{calls[0] / m:.1f} RHS evaluations per ray, {per_step:.3f} per accepted step)")
    print(f"  same {m} rays, mean accepted steps: NumPy {steps_np.mean():.3f}, C "
          f"{steps_c[:m].mean():.3f}; C over all {n} rays: {steps_c.mean():.3f} -> "
          f"{per_ray:.1f} RHS evaluations per ray")

    # Overhead: the 1-thread integrator against the raw batch kernel, both as best-of timings
    # (a long single run is at the mercy of a noisy neighbour, a best-of is not): the rays in
    # chunks of CHUNK, each chunk's best of `rounds` runs, summed; each round also times the
    # raw kernel, called directly through cffi on preallocated buffers (as bench_rhs.py).
    ffi, lib = k._c.ffi, k._c.lib
    src = y[:min(n, 20000)]
    raw_states = np.ascontiguousarray(np.tile(src, (-(-100_000 // len(src)), 1))[:100_000])
    raw_out = np.empty_like(raw_states)
    pvec = np.array(list(k.parameters.values()), dtype=np.float64)
    yp, op, pp = (ffi.from_buffer("double[]", a) for a in (raw_states, raw_out, pvec))
    fn = lib.kerr_geodesic_rhs_batch
    nraw = len(raw_states)
    fn(nraw, yp, pp, 0, op)
    np.testing.assert_array_equal(raw_out[:50], k.geodesic_rhs(raw_states[:50]))
    rounds = max(3, repeats + 1)
    chunks = [y[i:i + CHUNK] for i in range(0, n, CHUNK)]
    best_chunk = [np.inf] * len(chunks)
    best_raw, runs_raw = np.inf, 0
    for _ in range(rounds):
        for c, yc in enumerate(chunks):
            t0 = time.perf_counter()
            k.integrate(yc, lam_end, rtol=1e-10, atol=1e-12, threads=1)
            best_chunk[c] = min(best_chunk[c], time.perf_counter() - t0)
        b, r = best_time(lambda: fn(nraw, yp, pp, 0, op), 7, 1.0 / rounds)
        best_raw, runs_raw = min(best_raw, b), runs_raw + r
    raw = nraw / best_raw
    best_w, _ = best_time(lambda: k.geodesic_rhs(raw_states), 7, 0.3)
    # for reference: the structure-of-arrays kernel the integrator calls for its stages
    cols = np.ascontiguousarray(raw_states.T)
    cp, cop = ffi.from_buffer("double[]", cols), ffi.from_buffer("double[]", raw_out)
    best_s, _ = best_time(lambda: lib.kerr_geodesic_rhs_soa(nraw, cp, pp, 0, cop), 7, 0.3)
    inside = n / sum(best_chunk) * per_ray
    print(f"raw batch kernel, direct cffi call ({nraw} states, best of {runs_raw} runs): "
          f"{raw:.3e} evaluations/s (through k.geodesic_rhs: {nraw / best_w:.3e}; "
          f"kerr_geodesic_rhs_soa: {nraw / best_s:.3e})")
    print(f"C integrator, 1 thread, chunks of {CHUNK} rays, best of {rounds} each: "
          f"{n / sum(best_chunk):,.0f} rays/s -> {inside:.3e} RHS evaluations/s; "
          f"ratio to the raw batch kernel {inside / raw:.2f}")

    from scipy.integrate import solve_ivp
    fun = knp.ivp_rhs()
    r_plus = 1 + np.sqrt(1 - 0.81)

    def horizon(s, state):
        return state[1] - 1.01 * r_plus
    horizon.terminal = True
    t = time.perf_counter()
    worst = 0.0
    for i in range(n_scipy):
        sol = solve_ivp(fun, (0.0, lam_end), y[i], method="DOP853", rtol=1e-10, atol=1e-12,
                        events=horizon)
        worst = max(worst, abs(sol.y[1, -1] - res.y[i, 1]) / max(1.0, abs(res.y[i, 1])))
    dt = time.perf_counter() - t
    scipy_rate = n_scipy / dt
    print(f"scipy solve_ivp DOP853:     {scipy_rate:12,.0f} rays/s  ({n_scipy} rays, {dt:.2f} s;"
          f" final r agrees to {worst:.1e} relative)")
    print(f"ratio C (1 thread) / solve_ivp: {rates[1] / scipy_rate:,.0f}x; "
          f"2 threads / 1 thread: {rates[2] / rates[1]:.2f}x")


if __name__ == "__main__":
    main()
