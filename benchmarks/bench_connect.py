"""Connecting two points: k.connect against the shooting code a user would otherwise write.

    python benchmarks/bench_connect.py [--quick] [--pairs N] [--scipy-pairs M] [--backend c]
    python benchmarks/bench_connect.py --lensing N [--scipy-sources M] [--backend c]
    python benchmarks/bench_connect.py --antipodal [--backend c]

WGS84 (specs/ellipsoid.toml, latitude/longitude in radians, metres): N random pairs (10^4;
1000 with --quick) go through one ``k.connect`` call. The baseline is the general-purpose path:
for each pair, ``scipy.optimize.root`` (hybr, finite-difference Jacobian) on u0, each residual
one ``scipy.integrate.solve_ivp`` (DOP853) of the generated NumPy right-hand side
(``k.ivp_rhs()`` of the NumPy backend) from lambda = 0 to 1, started from the coordinate
difference (longitude wrapped into (-pi, pi]); same rtol/atol as k.connect. The baseline is
timed on the first M pairs (50; 10 with --quick) and its time scaled to N: a full run would
take hours. Both are checked against geographiclib's Geodesic.WGS84.Inverse (Karney 2013): the
table gives the largest distance error of each and how many pairs are within 0.1 mm (the
connect path over all N pairs).

Pairs are drawn with |lat| <= 70 degrees and kept only when the geodesic line stays below 80
degrees of reduced latitude (Clairaut: cos(beta) sin(alpha) is constant, with alpha from
geographiclib), because the shipped chart excludes the poles (cos(lat) > 0). Wall-clock
times, one run; the machine is shared, so compare the ratio, not absolute figures.
"""
from __future__ import annotations

import argparse
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np
from runinfo import cpu_model, load_average, tree_state

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import metricc  # noqa: E402

# tolerances of both paths: 0.1 mm at 20,000 km needs the arrival to 5e-12 of the length
RTOL, ATOL, TOL = 1e-13, 1e-15, 1e-12
F = 1 / 298.257223563
VERTEX_MAX_DEG = 80.0
GOAL = 1000.0
DIST_TOL_M = 1e-4


def wrap(d):
    return (d + np.pi) % (2 * np.pi) - np.pi


def draw_pairs(n: int, seed: int):
    """(pairs (n, 2, 2) in radians, geographiclib s12 (n,)), off-pole geodesics only."""
    from geographiclib.geodesic import Geodesic
    g = Geodesic.WGS84
    rng = np.random.default_rng(seed)
    pairs, s12 = [], []
    while len(pairs) < n:
        lat1, lat2 = rng.uniform(-70, 70, 2)
        lon1, lon2 = rng.uniform(-180, 180, 2)
        r = g.Inverse(lat1, lon1, lat2, lon2)
        beta1 = np.arctan((1 - F) * np.tan(np.radians(lat1)))
        vertex = np.degrees(np.arccos(abs(np.cos(beta1) * np.sin(np.radians(r["azi1"])))))
        if vertex < VERTEX_MAX_DEG:
            pairs.append(np.radians([[lat1, lon1], [lat2, lon2]]))
            s12.append(r["s12"])
    return np.array(pairs), np.array(s12)


def scipy_path(k_np, pairs):
    """Shooting with solve_ivp inside optimize.root, one pair at a time: (lengths, seconds,
    right-hand-side calls)."""
    from scipy.integrate import solve_ivp
    from scipy.optimize import root
    fun = k_np.ivp_rhs()
    calls = 0
    lengths = np.full(len(pairs), np.nan)

    def arrival(x0, u):
        nonlocal calls
        sol = solve_ivp(fun, (0.0, 1.0), np.concatenate([x0, u]), method="DOP853",
                        rtol=RTOL, atol=ATOL)
        calls += sol.nfev
        return sol.y[:2, -1]

    t0 = time.perf_counter()
    for i, (x0, x1) in enumerate(pairs):
        def mismatch(u):
            d = arrival(x0, u) - x1
            d[1] = wrap(d[1])
            return d
        guess = np.array([x1[0] - x0[0], wrap(x1[1] - x0[1])])
        r = root(mismatch, guess, method="hybr", options={"xtol": TOL})
        if r.success:
            y0 = np.concatenate([x0, r.x])
            lengths[i] = np.sqrt(k_np.norm(y0))
    return lengths, time.perf_counter() - t0, calls


def scipy_lensing(k_np, obs, src, y0_connect):
    """The general-purpose path for each image k.connect found: ``optimize.root`` (hybr) on
    u0 = (u^t, u^r, u^theta, u^phi) with the equations [r_end - r_src, theta_end - theta_src,
    wrap(phi_end - phi_src), g(u0, u0)], each residual one ``solve_ivp`` (DOP853) of the NumPy
    right-hand side from lambda = 0 to 1 (any number of turns reaching the source is a root:
    the arrival-time check against k.connect catches a root on another image). Started from
    k.connect's u0 times (1 + 1e-3): generous to scipy, which a real user would first have to
    bring near the answer. src (I, 4), y0_connect (I, 8) for I images; returns (t_end (I,),
    root success (I,), seconds, right-hand-side calls)."""
    from scipy.integrate import solve_ivp
    from scipy.optimize import root
    fun = k_np.ivp_rhs()
    calls = 0
    t_end = np.full(len(src), np.nan)
    success = np.zeros(len(src), dtype=bool)

    def arrival(u):
        nonlocal calls
        sol = solve_ivp(fun, (0.0, 1.0), np.concatenate([obs, u]), method="DOP853",
                        rtol=1e-11, atol=1e-13)
        calls += sol.nfev
        return sol.y[:4, -1]

    t0 = time.perf_counter()
    for i, x1 in enumerate(src):
        def mismatch(u):
            x = arrival(u)
            return np.array([x[1] - x1[1], x[2] - x1[2], wrap(x[3] - x1[3]),
                             k_np.norm(np.concatenate([obs, u]))])
        r = root(mismatch, y0_connect[i, 4:] * (1 + 1e-3), method="hybr",
                 options={"xtol": 1e-10})
        success[i] = r.success
        # the arrival time is what lensing wants (time delays), so its integration is timed
        t_end[i] = arrival(r.x)[0]
    return t_end, success, time.perf_counter() - t0, calls


def lensing(n: int, backend: str, seed: int, m: int) -> None:
    """Schwarzschild lensing (helper "connect"): the direct and secondary images of n sources
    through one k.connect call (free t, kind null, solutions=2); observer at r = 1000 M in the
    equatorial plane, sources at r = 10..50 M, 0.02..0.3 rad off the line behind the hole in a
    random direction. Prints images per second and the statuses. Baseline: scipy_lensing on
    every image k.connect found converged among the first m sources, started 1e-3 off
    k.connect's own u0 (generous to scipy, so the ratio of images/s is a lower bound); its
    arrival times are checked against k.connect's (agreement: within 1e-6 M in t)."""
    k = metricc.load(ROOT / "specs" / "schwarzschild.toml", backend=backend)
    rng = np.random.default_rng(seed)
    obs = np.array([0.0, 1000.0, np.pi / 2, 0.0])
    off, turn = rng.uniform(0.02, 0.3, n), rng.uniform(0, 2 * np.pi, n)
    d = np.stack([-np.cos(off), np.sin(off) * np.cos(turn), np.sin(off) * np.sin(turn)], 1)
    src = np.stack([np.full(n, -1.0), rng.uniform(10, 50, n), np.arccos(d[:, 2]),
                    np.arctan2(d[:, 1], d[:, 0])], 1)
    t0 = time.perf_counter()
    sol = k.connect(obs, src, free=["t"], kind="null", solutions=2)
    dt = time.perf_counter() - t0
    conv = sol.status == "converged"
    both = np.all(conv, axis=1)
    words = ", ".join(f"{c} {w}" for w, c in zip(*np.unique(sol.status, return_counts=True)))
    print(f"Schwarzschild lensing, {k.backend} backend: {n} sources, {dt:.2f} s, "
          f"{n / dt:.1f} sources/s, {2 * n / dt:.1f} image slots/s; both images found for "
          f"{int(both.sum())}/{n}; slot statuses: {words}")
    # the baseline: converged image slots (direct and secondary) of the first m sources
    m = min(n, m)
    s_idx, j_idx = np.nonzero(conv[:m])
    if not s_idx.size:
        print(f"scipy baseline skipped: no converged image among the first {m} sources")
        return
    k_np = metricc.load(ROOT / "specs" / "schwarzschild.toml", backend="numpy")
    y0c, y1c = sol.y0[s_idx, j_idx], sol.y1[s_idx, j_idx]
    t_s, ok_s, t_scipy, calls = scipy_lensing(k_np, obs, src[s_idx], y0c)
    dt_end = np.abs(t_s - y1c[:, 0])
    agree = ok_s & (dt_end <= 1e-6)
    rate_c = conv.sum() / dt
    rate_s = s_idx.size / t_scipy
    print(f"scipy baseline (root hybr on u0, each residual one solve_ivp DOP853, NumPy RHS), "
          f"first {m} sources: {s_idx.size} images, {t_scipy:.2f} s, {rate_s:.3f} images/s, "
          f"{calls / s_idx.size:.0f} right-hand-side calls per image; root success "
          f"{int(ok_s.sum())}/{s_idx.size}; arrival t within 1e-6 M of k.connect's: "
          f"{int(agree.sum())}/{s_idx.size} (largest |dt| {np.nanmax(dt_end):.2e} M)")
    print(f"k.connect: {int(conv.sum())} converged image slots in {dt:.2f} s, {rate_c:.1f} "
          f"images/s; ratio k.connect / scipy {rate_c / rate_s:.0f}x images/s, a lower bound: "
          f"scipy was started 1e-3 off k.connect's answer, which a real user would first have "
          f"to find")


def antipodal(backend: str) -> None:
    """Nearly antipodal pairs, the hard case of the shortest geodesic. Unit sphere: 60 pairs
    per band of distance eps from the antipode (x1 at colatitude 0.4..pi-0.4, x2 = its
    antipode moved by eps in colatitude and eps/2 in longitude), each length against the
    haversine great-circle angle (closed form; shortest: within 1e-8). WGS84: 60 pairs near
    the equator within 0.05 deg of latitude and 0.01..0.3 deg of longitude of the antipode,
    distances against geographiclib (Karney 2013; within 0.1 mm)."""
    k = metricc.load(ROOT / "specs" / "sphere.toml", backend=backend)

    def angle(x1, x2):
        t1, p1 = 0.5 * np.pi - x1[:, 0], x1[:, 1]
        t2, p2 = 0.5 * np.pi - x2[:, 0], x2[:, 1]
        h = np.sin((t2 - t1) / 2) ** 2 + np.cos(t1) * np.cos(t2) * np.sin((p2 - p1) / 2) ** 2
        return 2 * np.arcsin(np.sqrt(np.clip(h, 0, 1)))
    for lo, hi in ((1e-6, 1e-5), (1e-5, 1e-4), (1e-4, 1e-3), (1e-3, 1e-2), (1e-2, 1e-1)):
        rng = np.random.default_rng(7)
        x1 = np.stack([rng.uniform(0.4, np.pi - 0.4, 60), rng.uniform(-np.pi, np.pi, 60)], 1)
        eps = rng.uniform(lo, hi, 60)
        x2 = np.stack([np.pi - x1[:, 0] + eps, x1[:, 1] + np.pi - 0.5 * eps], 1)
        t0 = time.perf_counter()
        sol = k.connect(x1, x2)
        dt = time.perf_counter() - t0
        conv = sol.status == "converged"
        short = conv & (np.abs(sol.length - angle(x1, x2)) <= 1e-8)
        print(f"unit sphere, eps {lo:g}..{hi:g} rad from antipodal: {int(conv.sum())}/60 "
              f"converged, {int(short.sum())}/60 the shortest, {dt:.2f} s")
    from geographiclib.geodesic import Geodesic
    ke = metricc.load(ROOT / "specs" / "ellipsoid.toml", backend=backend)
    rng = np.random.default_rng(5)
    lat1, lon1 = rng.uniform(-3, 3, 60), rng.uniform(-180, 180, 60)
    lat2, lon2 = -lat1 + rng.uniform(-0.05, 0.05, 60), lon1 + 180 - rng.uniform(0.01, 0.3, 60)
    ref = np.array([Geodesic.WGS84.Inverse(*v)["s12"] for v in zip(lat1, lon1, lat2, lon2)])
    sol = ke.connect(np.radians(np.stack([lat1, lon1], 1)), np.radians(np.stack([lat2, lon2], 1)),
                     rtol=RTOL, atol=ATOL, tol=TOL)
    err = np.abs(sol.length - ref)
    print(f"WGS84, 60 pairs within 0.05 deg lat / 0.3 deg lon of antipodal: "
          f"{int(np.sum((sol.status == 'converged') & (err <= DIST_TOL_M)))}/60 within 0.1 mm of "
          f"geographiclib (largest error {np.nanmax(err):.2e} m)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="1000 pairs, baseline on 10")
    ap.add_argument("--pairs", type=int, default=None, help="pairs through k.connect")
    ap.add_argument("--scipy-pairs", type=int, default=None,
                    help="pairs through the scipy path (timed, then scaled)")
    ap.add_argument("--backend", default="c", choices=("c", "numpy"))
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--lensing", type=int, default=None, metavar="N",
                    help="only the Schwarzschild lensing part, N sources")
    ap.add_argument("--antipodal", action="store_true",
                    help="only the nearly antipodal accuracy check (sphere bands, WGS84)")
    ap.add_argument("--scipy-sources", type=int, default=10, metavar="M",
                    help="lensing: sources whose converged images go through the scipy path")
    args = ap.parse_args()
    print("command: python " + " ".join([sys.argv[0]] + sys.argv[1:]))
    print(f"python {platform.python_version()}, numpy {np.__version__}, {cpu_model()}, "
          f"{os.cpu_count()} CPUs, {load_average()} at start, checkout {tree_state()}")
    if args.antipodal:
        return antipodal(args.backend)
    if args.lensing:
        return lensing(args.lensing, args.backend, args.seed, args.scipy_sources)
    n = args.pairs or (1000 if args.quick else 10_000)
    m = min(n, args.scipy_pairs or (10 if args.quick else 50))
    spec = ROOT / "specs" / "ellipsoid.toml"
    k = metricc.load(spec, backend=args.backend)
    k_np = metricc.load(spec, backend="numpy")
    pairs, s12 = draw_pairs(n, args.seed)
    print(f"WGS84: {n} random pairs (|lat| <= 70 deg, geodesic vertex < {VERTEX_MAX_DEG:g} "
          f"deg), rtol {RTOL:g}, atol {ATOL:g}, connect tol {TOL:g}")

    t0 = time.perf_counter()
    sol = k.connect(pairs[:, 0], pairs[:, 1], rtol=RTOL, atol=ATOL, tol=TOL)
    t_connect = time.perf_counter() - t0
    err = np.abs(sol.length - s12)
    ok = (sol.status == "converged") & (err <= DIST_TOL_M)

    lengths, t_scipy, calls = scipy_path(k_np, pairs[:m])
    err_s = np.abs(lengths - s12[:m])
    ok_s = err_s <= DIST_TOL_M
    rate_c = n / t_connect
    rate_s = m / t_scipy
    print(f"\n{'path':<44} {'pairs':>6} {'seconds':>9} {'pairs/s':>10} {'max err m':>10} "
          f"{'<= 0.1 mm':>10}")
    print(f"{'k.connect (' + k.backend + ' backend, one call)':<44} {n:>6} {t_connect:9.2f} "
          f"{rate_c:10.1f} {np.nanmax(err):10.2e} {int(ok.sum()):>6}/{n}")
    print(f"{'solve_ivp DOP853 in optimize.root (NumPy RHS)':<44} {m:>6} {t_scipy:9.2f} "
          f"{rate_s:10.3f} {np.nanmax(err_s):10.2e} {int(ok_s.sum()):>6}/{m}")
    print(f"\nscipy path scaled to {n} pairs: {t_scipy / m * n:.0f} s (timed on the first {m} "
          f"pairs; {calls / m:.0f} right-hand-side calls per pair)")
    print(f"throughput ratio k.connect / scipy: {rate_c / rate_s:.0f}x (goal {GOAL:g}x: "
          f"{'met' if rate_c / rate_s >= GOAL else 'NOT met'})")
    statuses = ", ".join(f"{c} {s}" for s, c in zip(*np.unique(sol.status, return_counts=True)))
    print(f"k.connect statuses: {statuses}; distances within 0.1 mm of geographiclib: "
          f"{int(ok.sum())}/{n}" + ("" if ok.all() else " (NOT all)"))
    if not ok.all():
        bad = np.flatnonzero(~ok)[:5]
        print("first pairs outside 0.1 mm (index, error m, status): "
              + ", ".join(f"({i}, {err[i]:.3g}, {sol.status[i]})" for i in bad))


if __name__ == "__main__":
    main()
