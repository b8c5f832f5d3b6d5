"""Batch integrator throughput: Kerr photons, C integrator vs scipy solve_ivp, 1 vs 2 threads.

    python benchmarks/bench_integrate.py [--quick] [--rays N]

Kerr (a = 0.9) photons from r = 1000 M toward the hole, equatorial-ish, impact parameters
spread over capture and escape (0 to 10 M), rtol 1e-10, atol 1e-12, lam_end 3000 M. The
baseline is what a user would otherwise write: scipy.integrate.solve_ivp(method="DOP853")
per ray with the generated NumPy right-hand side (k.ivp_rhs()) and a terminal horizon
event; it is timed on a sample of rays and compared as rays per second in the same run.
Also: the NumPy batch integrator, and the C integrator with 1 and 2 OpenMP threads.
"""
from __future__ import annotations

import argparse
import time
from pathlib import Path

import numpy as np

import metricc

ROOT = Path(__file__).resolve().parent.parent


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


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--rays", type=int, default=None)
    args = ap.parse_args()
    n = args.rays or (10_000 if args.quick else 100_000)
    n_scipy = 20 if args.quick else 100
    k = metricc.load(ROOT / "specs" / "kerr.toml", backend="c")
    knp = metricc.load(ROOT / "specs" / "kerr.toml", backend="numpy")
    y = photons(k, n)
    lam_end = 3000.0
    print(f"Kerr a=0.9, {n} photons from r=1000 M, rtol 1e-10, atol 1e-12, lam_end {lam_end}")
    rates = {}
    for threads in (1, 2):
        t = time.perf_counter()
        res = k.integrate(y, lam_end, rtol=1e-10, atol=1e-12, threads=threads)
        dt = time.perf_counter() - t
        rates[threads] = n / dt
        names, counts = np.unique(res.status, return_counts=True)
        print(f"C integrator, {threads} thread(s): {n / dt:12,.0f} rays/s  ({dt:.2f} s; "
              f"{ {str(a): int(b) for a, b in zip(names, counts)} }; mean {res.steps.mean():.0f} steps)")
    m = min(n, 2000 if args.quick else 5000)
    # The same algorithm in NumPy, with its RHS wrapped in a counter: evaluations per ray.
    from metricc.integrate import EVENT_BASE, DOMAIN, integrate_numpy
    calls = [0]

    def counted(states, params):
        calls[0] += len(states)
        return knp._np.geodesic_rhs(states, params)

    def stop(x, params):
        return np.concatenate([knp._np.events(x, params), knp._np.domain(x, params)], axis=1)
    codes = np.array([EVENT_BASE, DOMAIN, DOMAIN], dtype=np.int32)
    params = tuple(np.full(m, v) for v in knp.parameters.values())
    t = time.perf_counter()
    integrate_numpy(counted, stop, y[:m], lam_end, params, rtol=1e-10, atol=1e-12,
                    max_steps=100000, method="dop853", samples=None, stop_codes=codes)
    dt = time.perf_counter() - t
    per_ray = calls[0] / m
    print(f"NumPy batch integrator:     {m / dt:12,.0f} rays/s  ({m} rays, {dt:.2f} s; "
          f"{per_ray:.0f} RHS evaluations per ray)")
    raw_states = np.tile(y[:min(n, 20000)], (5, 1))
    best = 1e30
    for _ in range(7):
        t = time.perf_counter()
        k.geodesic_rhs(raw_states)
        best = min(best, time.perf_counter() - t)
    raw = len(raw_states) / best
    inside = rates[1] * per_ray
    print(f"RHS evaluations/s inside the C integrator (1 thread): {inside:.3e}; raw batch "
          f"k.geodesic_rhs: {raw:.3e}; ratio {inside / raw:.2f}")

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
