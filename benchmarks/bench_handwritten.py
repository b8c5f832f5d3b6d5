"""Generated Kerr geodesic RHS against a hand-written C reference, one core, batch 1e5.

    python benchmarks/bench_handwritten.py [--n 100000] [--numba]

benchmarks/handwritten/kerr_rhs_hand.c is written by hand as an expert would (sin/cos once,
Sigma, Delta and reciprocals precomputed, only the non-zero Christoffel symbols). This script
generates the Kerr kernels with `metricc build`, compiles both into small C timing drivers
with the same flags the cached build uses (-O2 -fno-math-errno -ffp-contract=off), checks
that they agree to 1e-12 (relative to each state's largest component), and reports
evaluations per second of:
  - the hand-written reference (array of structures);
  - the generated batch kernel (array of structures);
  - the generated structure-of-arrays kernel, scalar build (bit-identical to the above);
  - the generated structure-of-arrays kernel, vector-math build (-DKERR_VECTOR_MATH -O3
    -fopenmp-simd, glibc's libmvec, one clone per x86-64 vector width);
and with --numba, numba's njit on sympy.lambdify of the same expressions after sympy's cse.
Each figure is the best of 15 runs; compare ratios within one run (machines here are noisy).
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent

DRIVER = r"""
#define _POSIX_C_SOURCE 199309L
#include <stdio.h>
#include <stdlib.h>
#include <math.h>
#include <time.h>
#include "kerr.h"
void hand_kerr_geodesic_rhs_batch(size_t n, const double *y, const double *p, double *out);
static double now(void) { struct timespec t; clock_gettime(CLOCK_MONOTONIC, &t); return t.tv_sec + 1e-9 * t.tv_nsec; }
int main(int argc, char **argv)
{
    size_t n = (size_t)atol(argv[1]), i, k;
    double *y = malloc(8 * n * sizeof(double)), *ys = malloc(8 * n * sizeof(double));
    double *o1 = malloc(8 * n * sizeof(double)), *o2 = malloc(8 * n * sizeof(double));
    double *o3 = malloc(8 * n * sizeof(double)), p[2];
    double best[3] = {1e30, 1e30, 1e30}, worst = 0.0, worst_soa = 0.0;
    FILE *f = fopen(argv[2], "rb");
    if (!f || fread(y, sizeof(double), 8 * n, f) != 8 * n) return 2;
    fclose(f);
    kerr_default_params(p);
    for (i = 0; i < n; ++i) for (k = 0; k < 8; ++k) ys[k * n + i] = y[8 * i + k];
    for (int rep = 0; rep < 15; ++rep) {
        double t = now(); hand_kerr_geodesic_rhs_batch(n, y, p, o1); t = now() - t; if (t < best[0]) best[0] = t;
        t = now(); kerr_geodesic_rhs_batch(n, y, p, 0, o2); t = now() - t; if (t < best[1]) best[1] = t;
        t = now(); kerr_geodesic_rhs_soa(n, ys, p, 0, o3); t = now() - t; if (t < best[2]) best[2] = t;
    }
    for (i = 0; i < n; ++i) {
        double scale = 0.0;
        for (k = 0; k < 8; ++k) scale = fmax(scale, fabs(o2[8 * i + k]));
        for (k = 0; k < 8; ++k) {
            worst = fmax(worst, fabs(o1[8 * i + k] - o2[8 * i + k]) / scale);
            worst_soa = fmax(worst_soa, fabs(o3[k * n + i] - o2[8 * i + k]) / scale);
        }
    }
    printf("{\"hand\": %.17g, \"aos\": %.17g, \"soa\": %.17g, \"hand_vs_generated\": %.3g, \"soa_vs_aos\": %.3g}\n",
           n / best[0], n / best[1], n / best[2], worst, worst_soa);
    return 0;
}
"""

BASE = ["-std=c99", "-O2", "-fno-math-errno", "-ffp-contract=off"]
VECTOR = ["-std=c99", "-O3", "-fno-math-errno", "-ffp-contract=off", "-fopenmp-simd",
          "-DKERR_VECTOR_MATH", "-fno-builtin-sin", "-fno-builtin-cos"]


def states(n: int) -> np.ndarray:
    """Timelike Kerr states, r in [3, 30], theta in [0.3, pi - 0.3] (a = 0.9, M = 1)."""
    import metricc
    k = metricc.load(ROOT / "specs" / "kerr.toml", backend="numpy")
    rng = np.random.default_rng(7)
    y = np.zeros((n, 8))
    y[:, 1] = rng.uniform(3.0, 30.0, n)
    y[:, 2] = rng.uniform(0.3, np.pi - 0.3, n)
    y[:, 3] = rng.uniform(-np.pi, np.pi, n)
    y[:, 5:] = rng.normal(scale=0.05, size=(n, 3))
    y[:, 4] = 1.0
    return k.normalize(y, "timelike")


def run_driver(tmp: Path, flags: list[str], n: int, data: Path, tag: str) -> dict:
    cc = os.environ.get("CC", "cc")
    exe = tmp / f"driver_{tag}"
    subprocess.run([cc, *flags, "-I", str(tmp), str(tmp / "driver.c"), str(tmp / "kerr.c"),
                    str(HERE / "handwritten" / "kerr_rhs_hand.c"), "-o", str(exe), "-lmvec",
                    "-lm"], check=True)
    out = subprocess.run(["taskset", "-c", "0", str(exe), str(n), str(data)]
                         if shutil.which("taskset") else [str(exe), str(n), str(data)],
                         check=True, capture_output=True, text=True).stdout
    return json.loads(out)


def numba_rate(y: np.ndarray) -> float | None:
    try:
        import numba
    except ImportError:
        return None
    import time
    import sympy as sp
    from metricc.geometry import derive
    from metricc.spec import load_spec
    geo = derive(load_spec(ROOT / "specs" / "kerr.toml"))
    dim = geo.dim
    g = sp.Matrix(geo.metric)
    ginv = g.inv()
    acc = []
    for a in range(dim):
        e = 0
        for b in range(dim):
            for c in range(dim):
                gam = sum(ginv[a, d] * geo.christoffel_first(d, b, c) for d in range(dim))
                e -= gam * geo.velocity[b] * geo.velocity[c]
        acc.append(e)
    exprs = sp.Tuple(*(list(geo.velocity) + acc))
    args = list(geo.coords) + list(geo.velocity) + list(geo.params)
    body = sp.lambdify(args, exprs, cse=True, modules="math")  # sympy's cse inside
    fn = numba.njit(body)

    @numba.njit
    def batch(Y, M, a, out):
        for i in range(Y.shape[0]):
            r = fn(Y[i, 0], Y[i, 1], Y[i, 2], Y[i, 3], Y[i, 4], Y[i, 5], Y[i, 6], Y[i, 7], M, a)
            for k in range(8):
                out[i, k] = r[k]
    out = np.empty_like(y)
    batch(y[:10], 1.0, 0.9, out[:10])
    best = 1e30
    for _ in range(15):
        t = time.perf_counter()
        batch(y, 1.0, 0.9, out)
        best = min(best, time.perf_counter() - t)
    return len(y) / best


def handwritten_ops() -> int:
    """Operations in the hand-written kernel: binary + - * / and calls, counted in its source."""
    import re
    src = (HERE / "handwritten" / "kerr_rhs_hand.c").read_text()
    start = src.index("{", src.index("void hand_kerr_geodesic_rhs("))
    body = re.sub(r"/\*.*?\*/", "", src[start:src.index("void hand_kerr_geodesic_rhs_batch")],
                  flags=re.S)
    ops = 0
    for e in re.findall(r"=\s*([^;]+);", body):
        e = re.sub(r"\b[a-zA-Z_]\w*\[\d+\]", "X", e)
        ops += len(re.findall(r"(?<=[\w\)\.])\s*[-+*/]\s*(?=[\w\(\.])", e))
        ops += len(re.findall(r"\b(sin|cos|sqrt)\(", e))
    return ops


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=100_000)
    ap.add_argument("--numba", action="store_true", help="also time numba on lambdify + CSE")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmpname:
        tmp = Path(tmpname)
        env = dict(os.environ, PYTHONPATH=str(ROOT))
        subprocess.run([sys.executable, "-m", "metricc", "build", str(ROOT / "specs" / "kerr.toml"),
                        "--out", str(tmp), "--target", "c", "-q"], check=True, env=env)
        (tmp / "driver.c").write_text(DRIVER)
        y = states(args.n)
        data = tmp / "states.bin"
        y.astype(np.float64).tofile(data)
        scalar = run_driver(tmp, BASE, args.n, data, "scalar")
        vector = run_driver(tmp, VECTOR, args.n, data, "vector")
    hand = scalar["hand"]
    print(f"Kerr geodesic RHS, batch {args.n}, one core (evaluations/s; ratio to hand-written)")
    print(f"  hand-written reference      {hand:12.4g}   1.00x")
    print(f"  generated, batch (AoS)      {scalar['aos']:12.4g}   {scalar['aos'] / hand:.2f}x")
    print(f"  generated, SoA scalar       {scalar['soa']:12.4g}   {scalar['soa'] / hand:.2f}x")
    print(f"  generated, SoA libmvec      {vector['soa']:12.4g}   {vector['soa'] / vector['hand']:.2f}x"
          f"  (hand-written in the same -O3 build: {vector['hand']:.4g})")
    print(f"  agreement: hand vs generated {scalar['hand_vs_generated']:.1e}; SoA scalar vs AoS "
          f"{scalar['soa_vs_aos']:.1e}; SoA libmvec vs AoS {vector['soa_vs_aos']:.1e} "
          "(relative to each state's largest component)")
    import metricc
    gen_ops = metricc.load(ROOT / "specs" / "kerr.toml", backend="numpy").kernel_info[
        "geodesic_rhs"]["ops_after"]
    print(f"  operations: generated {gen_ops}, hand-written {handwritten_ops()}")
    if scalar["hand_vs_generated"] > 1e-12:
        sys.exit("hand-written and generated kernels disagree")
    if args.numba:
        rate = numba_rate(y)
        if rate is None:
            print("  numba: not installed (pip install numba)")
        else:
            print(f"  numba njit on lambdify + cse {rate:12.4g}   generated AoS is "
                  f"{scalar['aos'] / rate:.2f}x, SoA libmvec {vector['soa'] / rate:.2f}x")


if __name__ == "__main__":
    main()
