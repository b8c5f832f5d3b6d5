"""Dask scale-out: ray throughput with 1 and 2 local worker processes, and per-chunk overhead.

    python benchmarks/bench_dask.py [--quick]

Kerr (a = 0.9) photons from r = 1000 M toward the hole, rtol 1e-10, through
metricc.cluster.map_integrate on a dask.distributed LocalCluster (loopback only). Each worker
runs one thread (threads=1 in the kernels), so the ratio 2 workers / 1 worker measures
process-level scaling. The per-chunk overhead is the time of a chunk holding one ray minus
the time of that ray in-process. Machines here are noisy: compare figures within one run.
"""
from __future__ import annotations

import argparse
import time
from pathlib import Path

import numpy as np

import metricc
from metricc.cluster import map_integrate

ROOT = Path(__file__).resolve().parent.parent


def photons(k, n: int, rng) -> np.ndarray:
    r0 = 1000.0
    y = np.zeros((n, 8))
    y[:, 1], y[:, 2] = r0, np.pi / 2 + rng.uniform(-0.01, 0.01, n)
    b = rng.uniform(0.0, 10.0, n)
    y[:, 4], y[:, 7] = 1.0, b / r0**2
    y = k.normalize(y, "null", solve_for=1)  # solve the null condition for u^r
    y[:, 5] = -np.abs(y[:, 5])
    return y


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args()
    from dask.distributed import Client, LocalCluster
    k = metricc.load(ROOT / "specs" / "kerr.toml")
    rng = np.random.default_rng(1)
    n = 4000 if args.quick else 40000
    y = photons(k, n, rng)
    t = time.perf_counter()
    ref = k.integrate(y, 3000.0, threads=1)
    local = time.perf_counter() - t
    print(f"in-process, 1 thread: {n / local:,.0f} rays/s ({local:.2f} s for {n} rays)")
    rates = {}
    for workers in (1, 2):
        with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                          host="127.0.0.1", dashboard_address=None) as cl, Client(cl) as c:
            map_integrate(c, k, y[:10], 3000.0, chunk_size=5, threads=1)  # warm the workers
            t = time.perf_counter()
            res = map_integrate(c, k, y, 3000.0, chunk_size=max(n // 40, 1), threads=1)
            dt = time.perf_counter() - t
            assert np.array_equal(res.y, ref.y)
            rates[workers] = n / dt
            print(f"{workers} worker(s): {n / dt:,.0f} rays/s ({dt:.2f} s, {n // 40} rays/chunk)")
            if workers == 1:
                one = y[:1]
                t0 = time.perf_counter()
                for _ in range(20):
                    k.integrate(one, 3000.0, threads=1)
                inproc = (time.perf_counter() - t0) / 20
                t0 = time.perf_counter()
                for _ in range(20):
                    map_integrate(c, k, one, 3000.0, chunk_size=1, threads=1)
                remote = (time.perf_counter() - t0) / 20
                print(f"per-chunk overhead: {1e3 * (remote - inproc):.1f} ms "
                      f"(one-ray chunk {1e3 * remote:.1f} ms vs in-process {1e3 * inproc:.2f} ms)")
    print(f"speed-up 2 workers / 1 worker: {rates[2] / rates[1]:.2f}x")


if __name__ == "__main__":
    main()
