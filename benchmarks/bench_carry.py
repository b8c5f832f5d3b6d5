"""Carried quantities on Kerr: tangent kernels against the RHS, and integration with
transport, variations and the full transition matrix against plain integration.

    python benchmarks/bench_carry.py [--quick] [--part kernels|integration] [--states N]
                                     [--rays N] [--repeats R]

(a) Kernels, one core (the batch entry points are serial), on 4000 states (--states), small
    enough that m = 8 directions and their outputs stay in cache (at 1e5 states the m = 8
    call streams 100 MB and measures memory bandwidth instead): kerr_<form>_tangent_batch and
    _soa with m = 1, 2, 4, 8 directions, with the plain right-hand side returned in the same
    call (f given) and without it (f = NULL), against kerr_<form>_rhs_batch / _soa on the
    same states, called directly through cffi on preallocated buffers like bench_rhs.py;
    also the transport kernel with m = 2. Goal: tangent with f <= 1 + 1.5 m times the RHS.
(b) Integration, the photons of bench_integrate.py (Kerr a = 0.9, from r = 1000 M, rtol
    1e-10, lam_end 3000): plain against transport= with 2 vectors (goal <= 1.6x), through the
    public k.integrate, threads=1 and default threads; carried_error=True (the default) and
    False (the geodesic's steps those of the plain run).
(c) The same rays with variations="all" (the 8x8 state transition matrix; goal <= 6x).
(d) The transition matrix against central finite differences (16 extra plain integrations,
    y0 +- h_j e_j with h_j = 1e-4 max(|y0_j|, 1e-3)): time ratio, and each one's error against
    variations="all" at rtol 1e-13 (per ray, max |Phi - Phi_ref| / max |Phi_ref|).

Ratios are of best-of-R timings within this one run (time.perf_counter, garbage collector
off); the machine is shared, so compare ratios, never absolute figures across runs.
"""
from __future__ import annotations

import argparse
import os
import platform
import sys
import time
from pathlib import Path

from bench_integrate import best_time, photons
from runinfo import cpu_model, load_average, tree_state

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import metricc  # noqa: E402
from metricc import build  # noqa: E402

LAM_END = 3000.0
RTOL, ATOL = 1e-10, 1e-12


def kernel_table(k, n: int, repeats: int, min_time: float) -> None:
    """(a): per-state cost of the tangent and transport kernels relative to the RHS."""
    ffi, lib = k._c.ffi, k._c.lib
    rng = np.random.default_rng(2)
    y = np.tile(photons(k, 1000), (-(-n // 1000), 1))[:n]
    y[:, 1] = rng.uniform(3.0, 30.0, n)                    # spread the states in r, theta
    y[:, 2] = rng.uniform(0.3, np.pi - 0.3, n)
    pvec = np.array(list(k.parameters.values()), dtype=np.float64)
    pp = ffi.from_buffer("double[]", pvec)
    print(f"\n(a) kernels, {n} Kerr states, one core, best of >= {repeats} runs and "
          f">= {min_time} s; time per state relative to the RHS kernel of the same layout")
    print(f"{'kernel':<38} {'m':>2} {'ns/state':>9} {'x RHS':>7} {'goal':>6}")
    for form in ("geodesic", "hamilton"):
        states = np.ascontiguousarray(k.momenta(y) if form == "hamilton" else y)
        cols = np.ascontiguousarray(states.T)
        f_out = np.empty_like(states)
        yp, cp, fp = (ffi.from_buffer("double[]", a) for a in (states, cols, f_out))
        base = {}
        for layout, src in (("batch", yp), ("soa", cp)):
            fn = getattr(lib, f"kerr_{form}_rhs_{layout}")
            base[layout], _ = best_time(lambda: fn(n, src, pp, 0, fp), repeats, min_time)
            print(f"{'kerr_' + form + '_rhs_' + layout:<38} {'':>2} "
                  f"{base[layout] / n * 1e9:9.2f} {1.0:7.2f}")
        def directional(kernel, m, width, goal):
            # one kernel with m directions of `width` components, both layouts, f or NULL
            d = rng.normal(size=(n, m, width))
            out = np.empty((n, m, 8))
            dp = ffi.from_buffer("double[]", np.ascontiguousarray(d))
            dsp = ffi.from_buffer("double[]", np.ascontiguousarray(d.transpose(1, 2, 0)))
            op = ffi.from_buffer("double[]", out)
            for layout, src, dirs in (("batch", yp, dp), ("soa", cp, dsp)):
                fn = getattr(lib, f"kerr_{form}_{kernel}_{layout}")
                for with_f in (True, False):
                    fo = fp if with_f else ffi.NULL
                    t, _ = best_time(lambda: fn(n, src, m, dirs, pp, 0, fo, op), repeats,
                                     min_time)
                    label = f"kerr_{form}_{kernel}_{layout}" + ("" if with_f else " (f=NULL)")
                    g = f"{goal:6.1f}" if with_f and goal else ""
                    print(f"{label:<38} {m:2d} {t / n * 1e9:9.2f} {t / base[layout]:7.2f} "
                          f"{g:>6}")

        for m in (1, 2, 4, 8):
            directional("tangent", m, 8, 1 + 1.5 * m)
        directional("transport", 2, 4, None)


def timed(fn, repeats: int):
    """Best wall time of `repeats` calls of fn() and the last call's result."""
    out = {}

    def call():
        out["r"] = fn()
    t, _ = best_time(call, repeats)
    return t, out["r"]


def integration_table(k, y, repeats: int) -> None:
    """(b), (c): carried integrations against plain ones, same rays."""
    n = len(y)
    rng = np.random.default_rng(4)
    V0 = rng.normal(size=(n, 2, 4))
    runs = [("plain", {}),
            ("transport, 2 vectors", {"transport": V0}),
            ("transport, 2 vectors, carried_error=False", {"transport": V0,
                                                          "carried_error": False}),
            ('variations="all" (8x8)', {"variations": "all"}),
            ('variations="all", carried_error=False', {"variations": "all",
                                                       "carried_error": False})]
    goals = {"transport, 2 vectors": "<= 1.6", 'variations="all" (8x8)': "<= 6"}
    print(f"\n(b, c) integration, {n} rays, best of {repeats}; time relative to the plain run "
          "with the same thread count")
    print(f"{'run':<44} {'threads':>7} {'s':>7} {'rays/s':>9} {'steps':>8} {'x plain':>8} "
          f"{'goal':>6}")
    for threads in (1, None):
        plain = None
        for label, extra in runs:
            t, res = timed(lambda: k.integrate(y, LAM_END, rtol=RTOL, atol=ATOL,
                                               threads=threads, **extra), repeats)
            plain = t if plain is None else plain
            print(f"{label:<44} {threads or 'default':>7} {t:7.3f} {n / t:9,.0f} "
                  f"{res.steps.mean():8.1f} {t / plain:8.2f} {goals.get(label, ''):>6}")


def finite_differences(k, y, repeats: int) -> None:
    """(d): the transition matrix from variations="all" against 16 extra integrations."""
    n = len(y)
    h = 1e-4 * np.maximum(np.abs(y), 1e-3)                     # (n, 8) per-component steps
    shifted = np.concatenate([y[:, None, :] + s * np.eye(8)[None] * h[:, None, :]
                              for s in (1.0, -1.0)], axis=1)   # (n, 16, 8)

    def fd():
        ends = k.integrate(shifted.reshape(-1, 8), LAM_END, rtol=RTOL, atol=ATOL).y
        ends = ends.reshape(n, 2, 8, 8)                        # [ray, sign, j, i]
        return np.swapaxes(ends[:, 0] - ends[:, 1], 1, 2) / (2.0 * h[:, None, :])

    t_all, res = timed(lambda: k.integrate(y, LAM_END, rtol=RTOL, atol=ATOL,
                                           variations="all"), repeats)
    t_fd, phi_fd = timed(fd, repeats)
    ref = k.integrate(y, LAM_END, rtol=1e-13, atol=1e-15, variations="all")
    scale = np.abs(ref.variations).max(axis=(1, 2))

    def err(phi):
        return np.abs(phi - ref.variations).max(axis=(1, 2)) / scale
    e_all, e_fd = err(res.variations), err(phi_fd)
    print(f"\n(d) full transition matrix, {n} rays, default threads, best of {repeats}")
    print(f'variations="all": {t_all:.3f} s; central differences, 16 extra integrations: '
          f"{t_fd:.3f} s; FD / carried = {t_fd / t_all:.2f}x")
    print("error against variations=\"all\" at rtol 1e-13 (per ray, max |dPhi| / max |Phi|):")
    for status in np.unique(res.status):
        sel = res.status == status
        print(f"  {status:<8} {sel.sum():6d} rays: carried median {np.median(e_all[sel]):.1e}, "
              f"max {e_all[sel].max():.1e}; finite differences median "
              f"{np.median(e_fd[sel]):.1e}, max {e_fd[sel].max():.1e}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true",
                    help="500 rays, 1 repeat, 0.2 s per kernel timing: a smoke run")
    ap.add_argument("--states", type=int, default=4000,
                    help="kernel batch (default 4000: with m = 8 the directions and outputs "
                         "take 0.5 MB each and stay in cache, as in the integrator's tiles)")
    ap.add_argument("--rays", type=int, default=None, help="rays (default 4000)")
    ap.add_argument("--repeats", type=int, default=None, help="best of (default 3)")
    ap.add_argument("--part", choices=("kernels", "integration"), default=None,
                    help="only (a), or only (b)-(d)")
    args = ap.parse_args()
    n_states = args.states
    n_rays = args.rays or (500 if args.quick else 4000)
    repeats = args.repeats or (1 if args.quick else 3)
    print(f"# command: python benchmarks/bench_carry.py {' '.join(sys.argv[1:])}".rstrip())
    print(f"# metricc {metricc.__version__}, Python {platform.python_version()}, numpy "
          f"{np.__version__}; CPU: {cpu_model()}, {os.cpu_count()} logical CPUs")
    print(f"# C compiler: {' '.join(build.compiler_command())} {' '.join(build.COMPILE_FLAGS)}")
    print(f"# tree: {tree_state()}; {load_average()} at start")
    k = metricc.load(ROOT / "specs" / "kerr.toml", backend="c")
    if args.part != "integration":
        kernel_table(k, n_states, max(repeats, 3), 0.2 if args.quick else 1.0)
    if args.part == "kernels":
        return
    y = photons(k, n_rays)
    print(f"\nKerr a=0.9, photons from r=1000 M, rtol {RTOL}, atol {ATOL}, lam_end {LAM_END}")
    integration_table(k, y, repeats)
    finite_differences(k, y, repeats)


if __name__ == "__main__":
    main()
