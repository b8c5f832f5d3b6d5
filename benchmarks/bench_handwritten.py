"""Generated Kerr right-hand sides against hand-written C references, one core, batch 1e5.

    python benchmarks/bench_handwritten.py [--n 100000] [--repeats 60] [--numba]

Four kernels, each against a reference written by hand as an expert would (closed forms,
sin/cos once, reciprocals precomputed, the known sparsity or structure):

  Kerr (Boyer-Lindquist) geodesic_rhs      handwritten/kerr_rhs_hand.c       hand_kerr_geodesic_rhs
  Kerr (Boyer-Lindquist) hamilton_rhs      handwritten/kerr_hamilton_hand.c  hand_kerr_hamilton_rhs
  Kerr-Schild (Cartesian) geodesic_rhs     handwritten/kerr_schild_hand.c    hand_ks_geodesic_rhs
  Kerr-Schild (Cartesian) hamilton_rhs     handwritten/kerr_schild_hand.c    hand_ks_hamilton_rhs

The script generates specs/kerr.toml and specs/kerr_schild.toml with `metricc build` and
compiles one shared C timing driver, with the generated and the hand-written sources, twice:
with the cached build's flags (metricc.build.COMPILE_FLAGS plus OpenMP where the compiler has
it) and with those plus the vector-math flags (-D<NAME>_VECTOR_MATH ..., -DHAND_VECTOR_MATH,
-lmvec). Hand-written and generated code get the same flags. In each build it times, per
kernel, on the same states:
  - hand-written, one state per call: `hand_<...>_rhs_batch`, a plain loop over the
    single-state function;
  - hand-written, SIMD tiles: `hand_<...>_rhs_batch_simd`, tiles of 16 states transposed to
    structure-of-arrays, sin/cos in their own loop, the arithmetic in an `omp simd` loop,
    one clone per x86-64 vector width (see handwritten/hand_common.h);
  - generated batch kernel, array of structures: `<name>_<kernel>_batch`;
  - generated structure-of-arrays kernel: `<name>_<kernel>_soa`;
  - generated single-state kernel, one state per call: a plain loop over `<name>_<kernel>`,
    as an integrator of one state at a time calls it;
and reports evaluations per second and the ratio to both hand-written variants. Each figure is
the best of --repeats runs, the five variants interleaved, the process pinned to one core.
It checks that every hand-written output agrees with the generated AoS kernel's to 1e-12 (max
over states of the largest difference divided by the state's largest component) and exits 1
if not. It prints operation counts: generated from kernel_info[...]["ops_after"], hand-written
counted in the C source (binary + - * / and calls of sin, cos, sqrt in assignments, including
the helpers the single-state function calls).

With --numba it also times numba's njit on sympy.lambdify(cse=True) of naively derived
expressions (checked against the generated kernel to 1e-10). Compare ratios within one run.
"""
from __future__ import annotations

import argparse
import json
import os
import re
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

TOLERANCE = 1e-12          # hand-written vs generated
NUMBA_TOLERANCE = 1e-10    # numba on naive expressions vs generated (a sanity check)


@dataclass(frozen=True)
class Case:
    title: str
    spec: str           # specs/<spec>.toml, also the generated prefix
    kernel: str         # geodesic_rhs or hamilton_rhs
    source: str         # handwritten/<source>
    hand: str           # the single-state function; batches: <hand>_batch, <hand>_batch_simd


CASES = (
    Case("Kerr (Boyer-Lindquist) geodesic RHS", "kerr", "geodesic_rhs", "kerr_rhs_hand.c",
         "hand_kerr_geodesic_rhs"),
    Case("Kerr (Boyer-Lindquist) Hamiltonian RHS", "kerr", "hamilton_rhs",
         "kerr_hamilton_hand.c", "hand_kerr_hamilton_rhs"),
    Case("Kerr-Schild (Cartesian) geodesic RHS", "kerr_schild", "geodesic_rhs",
         "kerr_schild_hand.c", "hand_ks_geodesic_rhs"),
    Case("Kerr-Schild (Cartesian) Hamiltonian RHS", "kerr_schild", "hamilton_rhs",
         "kerr_schild_hand.c", "hand_ks_hamilton_rhs"),
)
SPECS = ("kerr", "kerr_schild")

# -- the C driver --------------------------------------------------------------------------------
DRIVER = r"""
#define _POSIX_C_SOURCE 199309L
#include <stdio.h>
#include <stdlib.h>
#include <time.h>
@INCLUDES@
typedef void (*hand_fn)(size_t, const double *, const double *, double *);
typedef void (*gen_fn)(size_t, const double *, const double *, size_t, double *);
typedef void (*params_fn)(double *);
typedef void (*single_fn)(const double *, const double *, double *);
@PROTOTYPES@
static const struct {
    hand_fn hand, hand_simd; gen_fn aos, soa; params_fn defaults; single_fn single;
} CASES[] = {
@TABLE@
};
static double now(void)
{
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return t.tv_sec + 1e-9 * t.tv_nsec;
}
static int save(const char *dir, const char *name, const double *a, size_t count)
{
    char path[4096];
    FILE *f;
    snprintf(path, sizeof path, "%s/%s.bin", dir, name);
    f = fopen(path, "wb");
    if (!f || fwrite(a, sizeof(double), count, f) != count) return 1;
    return fclose(f) != 0;
}
/* driver CASE N STATES OUTDIR REPEATS: times CASE's five variants, interleaved, on the N
   states in STATES; prints the best times as JSON and writes the outputs to OUTDIR. */
int main(int argc, char **argv)
{
    int c, repeats, rep;
    size_t n, i, k;
    double *y, *ys, *o1, *o2, *o3, *o4, *o5, p[16];
    double best[5] = {1e30, 1e30, 1e30, 1e30, 1e30};
    FILE *f;
    if (argc != 6) return 2;
    c = atoi(argv[1]);
    n = (size_t)atol(argv[2]);
    repeats = atoi(argv[5]);
    y = malloc(8 * n * sizeof(double));
    ys = malloc(8 * n * sizeof(double));
    o1 = malloc(8 * n * sizeof(double));
    o2 = malloc(8 * n * sizeof(double));
    o3 = malloc(8 * n * sizeof(double));
    o4 = malloc(8 * n * sizeof(double));
    o5 = malloc(8 * n * sizeof(double));
    if (!y || !ys || !o1 || !o2 || !o3 || !o4 || !o5) return 2;
    f = fopen(argv[3], "rb");
    if (!f || fread(y, sizeof(double), 8 * n, f) != 8 * n) return 2;
    fclose(f);
    CASES[c].defaults(p);
    for (i = 0; i < n; ++i) for (k = 0; k < 8; ++k) ys[k * n + i] = y[8 * i + k];
    for (rep = 0; rep < repeats; ++rep) {
        double t = now(); CASES[c].hand(n, y, p, o1); t = now() - t; if (t < best[0]) best[0] = t;
        t = now(); CASES[c].aos(n, y, p, 0, o2); t = now() - t; if (t < best[1]) best[1] = t;
        t = now(); CASES[c].soa(n, ys, p, 0, o3); t = now() - t; if (t < best[2]) best[2] = t;
        t = now(); CASES[c].hand_simd(n, y, p, o4); t = now() - t; if (t < best[3]) best[3] = t;
        t = now();
        for (i = 0; i < n; ++i) CASES[c].single(y + 8 * i, p, o5 + 8 * i);
        t = now() - t; if (t < best[4]) best[4] = t;
    }
    if (save(argv[4], "hand", o1, 8 * n) || save(argv[4], "aos", o2, 8 * n)
        || save(argv[4], "soa", o3, 8 * n) || save(argv[4], "hand_simd", o4, 8 * n)
        || save(argv[4], "single", o5, 8 * n)) return 3;
    printf("{\"hand\": %.17g, \"aos\": %.17g, \"soa\": %.17g, \"hand_simd\": %.17g, "
           "\"single\": %.17g}\n", best[0], best[1], best[2], best[3], best[4]);
    return 0;
}
"""


def driver_source() -> str:
    includes = "\n".join(f'#include "{s}.h"' for s in SPECS)
    protos = "\n".join(f"void {c.hand}{v}(size_t n, const double *y, const double *p, "
                       "double *out);" for c in CASES for v in ("_batch", "_batch_simd"))
    table = ",\n".join(f"    {{{c.hand}_batch, {c.hand}_batch_simd, {c.spec}_{c.kernel}_batch, "
                       f"{c.spec}_{c.kernel}_soa, {c.spec}_default_params, {c.spec}_{c.kernel}}}"
                       for c in CASES)
    return (DRIVER.replace("@INCLUDES@", includes).replace("@PROTOTYPES@", protos)
            .replace("@TABLE@", table))


def compile_flags() -> tuple[list[str], list[str]]:
    """(scalar, vector): the cached build's flags, and those plus every spec's vector math."""
    from metricc import build
    cc = build.compiler_command()
    scalar = list(build.COMPILE_FLAGS) + build.openmp_flags(cc)
    vector = list(scalar)
    for s in SPECS:
        vector += [f for f in build.vector_math_flags(s) if f not in vector]
    return scalar, vector + ["-DHAND_VECTOR_MATH"]


def compile_driver(tmp: Path, flags: list[str], tag: str) -> Path:
    from metricc import build
    exe = tmp / f"driver_{tag}"
    sources = [tmp / "driver.c"] + [tmp / f"{s}.c" for s in SPECS] + \
        sorted({HERE / "handwritten" / c.source for c in CASES})
    subprocess.run([*build.compiler_command(), *flags, "-I", str(tmp), *map(str, sources),
                    "-o", str(exe), "-lmvec", "-lm"], check=True)
    return exe


def run_case(exe: Path, index: int, data: Path, n: int, repeats: int, outdir: Path) -> dict:
    """Best times and outputs (n, 8) of the five variants of CASES[index]."""
    outdir.mkdir(exist_ok=True)
    text = subprocess.run([str(exe), str(index), str(n), str(data), str(outdir), str(repeats)],
                          check=True, capture_output=True, text=True).stdout
    res = json.loads(text)
    res["out_hand"] = np.fromfile(outdir / "hand.bin").reshape(n, 8)
    res["out_hand_simd"] = np.fromfile(outdir / "hand_simd.bin").reshape(n, 8)
    res["out_aos"] = np.fromfile(outdir / "aos.bin").reshape(n, 8)
    res["out_soa"] = np.fromfile(outdir / "soa.bin").reshape(8, n).T
    res["out_single"] = np.fromfile(outdir / "single.bin").reshape(n, 8)
    return res


# -- states and checks ---------------------------------------------------------------------------
def kerr_states(k, n: int, rng) -> np.ndarray:
    """Timelike Kerr states, r in [3, 30], theta in [0.3, pi - 0.3] (a = 0.9, M = 1)."""
    y = np.zeros((n, 8))
    y[:, 1] = rng.uniform(3.0, 30.0, n)
    y[:, 2] = rng.uniform(0.3, np.pi - 0.3, n)
    y[:, 3] = rng.uniform(-np.pi, np.pi, n)
    y[:, 5:] = rng.normal(scale=0.05, size=(n, 3))
    y[:, 4] = 1.0
    return k.normalize(y, "timelike")


def kerr_schild_states(k, n: int, rng) -> np.ndarray:
    """Kerr-Schild states at sqrt(x^2+y^2+z^2) in [3, 30] in isotropic directions, spatial
    velocity components N(0, 0.3); u^t solved for: the first half timelike, the rest null."""
    d = rng.normal(size=(n, 3))
    d /= np.linalg.norm(d, axis=1, keepdims=True)
    y = np.zeros((n, 8))
    y[:, 0] = rng.uniform(0.0, 100.0, n)
    y[:, 1:4] = d * rng.uniform(3.0, 30.0, n)[:, None]
    y[:, 4] = 1.0
    y[:, 5:] = rng.normal(scale=0.3, size=(n, 3))
    half = n // 2
    return np.concatenate([k.normalize(y[:half], "timelike"), k.normalize(y[half:], "null")])


def disagreement(a: np.ndarray, ref: np.ndarray) -> float:
    """max over states of max_i |a_i - ref_i| / max_i |ref_i| (inf if anything is not finite)."""
    if not (np.all(np.isfinite(a)) and np.all(np.isfinite(ref))):
        return float("inf")
    scale = np.max(np.abs(ref), axis=1)
    scale = np.where(scale == 0.0, 1.0, scale)
    return float(np.max(np.max(np.abs(a - ref), axis=1) / scale))


# -- operation counts ----------------------------------------------------------------------------
def c_functions(src: str) -> dict[str, str]:
    """Bodies of the top-level functions of a C file (comments removed), by name."""
    src = re.sub(r"/\*.*?\*/", "", src, flags=re.S)
    bodies = {}
    for m in re.finditer(r"^(?:static\s+)?(?:inline\s+)?(?:void|double|struct\s+\w+)\s+(\w+)\s*\(",
                         src, flags=re.M):
        start = src.index("{", m.end())
        depth, i = 0, start
        while True:
            depth += {"{": 1, "}": -1}.get(src[i], 0)
            if depth == 0:
                break
            i += 1
        bodies[m.group(1)] = src[start:i + 1]
    return bodies


def count_ops(body: str) -> int:
    """Binary + - * / and calls of sin, cos, sqrt in the right-hand sides of assignments."""
    ops = 0
    for e in re.findall(r"=\s*([^;]+);", body):
        e = re.sub(r"\b[a-zA-Z_]\w*\[\d+\]", "X", e)
        ops += len(re.findall(r"(?<=[\w\)\.])\s*[-+*/]\s*(?=[\w\(\.])", e))
        ops += len(re.findall(r"\b(sin|cos|sqrt)\(", e))
    return ops


def handwritten_ops(source: str, function: str) -> int:
    """Operations of one hand-written function counted in its source, with those of the
    helpers it calls (and they call) added once per call."""
    bodies = c_functions((HERE / "handwritten" / source).read_text())

    def ops(name: str) -> int:
        body = bodies[name]
        calls = {h: len(re.findall(rf"\b{h}\(", body)) for h in bodies if h != name}
        return count_ops(body) + sum(k * ops(h) for h, k in calls.items() if k)
    return ops(function)


# -- numba -------------------------------------------------------------------------------------
def _float_tuple(exprs):
    """A sympy Tuple with constants as floats (so numba sees a homogeneous tuple)."""
    import sympy as sp
    return sp.Tuple(*(sp.Float(e) if e.is_number else e for e in exprs))


def numba_symbolic(geo, kernel: str):
    """Kerr: the whole RHS from sympy's Matrix.inv(), textbook formulas, lambdify(cse=True)."""
    import numba
    import sympy as sp
    dim, x, q = geo.dim, list(geo.coords), list(geo.params)
    ginv = sp.Matrix(geo.metric).inv()
    if kernel == "geodesic_rhs":
        v = list(geo.velocity)
        acc = [-sum(ginv[a, d] * geo.christoffel_first(d, b, c) * v[b] * v[c]
                    for d in range(dim) for b in range(dim) for c in range(dim))
               for a in range(dim)]
        exprs = v + acc
    else:
        v = list(geo.momentum)
        ham = sp.Rational(1, 2) * sum(ginv[a, b] * v[a] * v[b]
                                      for a in range(dim) for b in range(dim))
        exprs = [sp.diff(ham, pk) for pk in v] + [-sp.diff(ham, xk) for xk in x]
    fn = numba.njit(sp.lambdify(x + v + q, _float_tuple(exprs), cse=True, modules="math"))

    @numba.njit
    def batch(Y, M, a, O):
        for i in range(Y.shape[0]):
            r = fn(Y[i, 0], Y[i, 1], Y[i, 2], Y[i, 3], Y[i, 4], Y[i, 5], Y[i, 6], Y[i, 7], M, a)
            for k in range(8):
                O[i, k] = r[k]
    return batch, "lambdify(cse=True) of the whole RHS, g^-1 from sympy's Matrix.inv()"


def numba_numeric(geo, kernel: str):
    """Kerr-Schild: g and d_k g lambdified (cse=True); the 4x4 solve and contractions in numba
    (sympy's symbolic inverse of this metric does not finish in practical time)."""
    import numba
    import sympy as sp
    dim, x, q = geo.dim, list(geo.coords), list(geo.params)
    g = sp.Matrix(geo.metric)
    iu = [(i, j) for i in range(dim) for j in range(i, dim)]
    exprs = [g[i, j] for i, j in iu] + [sp.diff(g[i, j], xk) for xk in x for i, j in iu]
    fn = numba.njit(sp.lambdify(x + q, _float_tuple(exprs), cse=True, modules="math"))
    idx = np.array(iu, dtype=np.int64)
    geodesic = kernel == "geodesic_rhs"

    @numba.njit
    def solve4(A, b):
        """b <- A^-1 b, A overwritten: Gaussian elimination with partial pivoting."""
        for k in range(4):
            p = k
            for i in range(k + 1, 4):
                if abs(A[i, k]) > abs(A[p, k]):
                    p = i
            if p != k:
                for j in range(4):
                    A[k, j], A[p, j] = A[p, j], A[k, j]
                b[k], b[p] = b[p], b[k]
            for i in range(k + 1, 4):
                f = A[i, k] / A[k, k]
                for j in range(k + 1, 4):
                    A[i, j] -= f * A[k, j]
                b[i] -= f * b[k]
        for k in range(3, -1, -1):
            s = b[k]
            for j in range(k + 1, 4):
                s -= A[k, j] * b[j]
            b[k] = s / A[k, k]

    @numba.njit
    def batch(Y, M, a, O):
        G = np.empty((4, 4))
        dG = np.empty((4, 4, 4))     # [k, i, j] = d_k g_ij
        b = np.empty(4)
        for s in range(Y.shape[0]):
            r = fn(Y[s, 0], Y[s, 1], Y[s, 2], Y[s, 3], M, a)
            for e in range(10):
                i, j = idx[e, 0], idx[e, 1]
                G[i, j] = G[j, i] = r[e]
                for k in range(4):
                    dG[k, i, j] = dG[k, j, i] = r[10 * (k + 1) + e]
            if geodesic:      # g u' = -w, w_d = (d_b g_dc - 1/2 d_d g_bc) u^b u^c
                for d in range(4):
                    w = 0.0
                    for bb in range(4):
                        for c in range(4):
                            w += (dG[bb, d, c] - 0.5 * dG[d, bb, c]) * Y[s, 4 + bb] * Y[s, 4 + c]
                    b[d] = -w
                    O[s, d] = Y[s, 4 + d]
                solve4(G, b)
                for d in range(4):
                    O[s, 4 + d] = b[d]
            else:             # g v = p, dp_k = 1/2 v^a d_k g_ab v^b
                for d in range(4):
                    b[d] = Y[s, 4 + d]
                solve4(G, b)
                for k in range(4):
                    O[s, k] = b[k]
                    acc = 0.0
                    for i in range(4):
                        for j in range(4):
                            acc += b[i] * dG[k, i, j] * b[j]
                    O[s, 4 + k] = 0.5 * acc
    return batch, ("lambdify(cse=True) of g and d_k g; g^-1 applied numerically in numba "
                   "(4x4 Gaussian elimination, partial pivoting)")


def numba_rate(case: Case, y: np.ndarray, params: dict, ref: np.ndarray, repeats: int):
    """(evaluations/s, disagreement with ref, how) for numba on naively derived expressions."""
    from metricc.geometry import derive
    from metricc.spec import load_spec
    geo = derive(load_spec(ROOT / "specs" / f"{case.spec}.toml"))
    make = numba_symbolic if case.spec == "kerr" else numba_numeric
    batch, how = make(geo, case.kernel)
    M, a = params["M"], params["a"]
    out = np.empty_like(y)
    batch(y[:4], M, a, out[:4])     # compile
    best = 1e30
    for _ in range(repeats):
        t = time.perf_counter()
        batch(y, M, a, out)
        best = min(best, time.perf_counter() - t)
    return len(y) / best, disagreement(out, ref), how


# -- output --------------------------------------------------------------------------------------
def header(argv: list[str], scalar: list[str], vector: list[str]) -> None:
    from metricc import build
    cc = " ".join(build.compiler_command())
    version = subprocess.run([*build.compiler_command(), "--version"], capture_output=True,
                             text=True).stdout.splitlines()[:1]
    try:
        head = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT,
                              capture_output=True, text=True).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--", "metricc", "templates",
                                "benchmarks"], cwd=ROOT, capture_output=True, text=True).stdout
    except OSError:
        head, dirty = "", ""
    print("command:  python benchmarks/bench_handwritten.py " + " ".join(argv))
    print(f"checkout: {head or 'not a git checkout'}"
          + (" + uncommitted changes in metricc/, templates/ or benchmarks/" if dirty else ""))
    print(f"compiler: {cc} ({version[0] if version else '?'})")
    print(f"scalar build flags: {' '.join(scalar)}")
    print(f"vector build flags: {' '.join(vector)} -lmvec")
    if hasattr(os, "getloadavg"):
        print("load average at start: " + " ".join(f"{x:.2f}" for x in os.getloadavg()))


def pin_one_core() -> str:
    if hasattr(os, "sched_setaffinity"):
        cpus = sorted(os.sched_getaffinity(0))
        os.sched_setaffinity(0, {cpus[-1]})
        return f"pinned to CPU {cpus[-1]} (of {len(cpus)} allowed)"
    return "not pinned"


VARIANTS = (("hand", "hand-written, one state per call"),
            ("hand_simd", "hand-written, SIMD tiles"),
            ("aos", "generated, batch (AoS)"),
            ("soa", "generated, SoA"),
            ("single", "generated, one state per call"))


def table(case: Case, n: int, where: str, builds: dict, ops: tuple[int, int], numba_row) -> None:
    """One kernel: rates and ratios per build, numba, agreement."""
    print(f"\n{case.title}: {case.spec}_{case.kernel} vs {case.hand} "
          f"(handwritten/{case.source})")
    print(f"  batch {n}, {where}")
    print(f"  operations: hand-written {ops[0]}, generated {ops[1]}")
    print(f"  {'':36}{'evals/s':>12}{'vs hand':>10}{'vs hand SIMD':>14}")
    for tag, label in (("scalar", "cached-build flags"), ("vector", "vector-math build (libmvec)")):
        r = builds[tag]
        print(f"  {label}")
        for key, name in VARIANTS:
            print(f"    {name:34}{n / r[key]:12.4g}{r['hand'] / r[key]:9.2f}x"
                  f"{r['hand_simd'] / r[key]:13.2f}x")
    if numba_row is not None:
        rate, dis, how = numba_row
        hand, simd = builds["scalar"]["hand"], builds["scalar"]["hand_simd"]
        print(f"  {'numba njit (vs cached-build flags)':38}{rate:12.4g}{rate * hand / n:9.2f}x"
              f"{rate * simd / n:13.2f}x")
        print(f"    numba: {how}; vs generated {dis:.1e}")
    print("  agreement with the generated AoS kernel of the same build (max over states of the "
          "largest difference / the state's largest component; hand-written limit "
          f"{TOLERANCE:g}):")
    for tag in ("scalar", "vector"):
        r = builds[tag]
        print(f"    {tag}: hand-written {r['hand_vs_aos']:.1e}, hand SIMD "
              f"{r['hand_simd_vs_aos']:.1e}, generated SoA {r['soa_vs_aos']:.1e}, "
              f"generated one state per call {r['single_vs_aos']:.1e}")


def summary(rows: list) -> None:
    """Generated against hand-written, all kernels (ratios of evaluations/s; > 1: generated
    is faster)."""
    print("\nSummary: generated / hand-written evaluations per second (> 1: generated is "
          "faster), same run;\ncached-build flags except the last column (vector-math build)")
    print(f"  {'kernel':30}{'AoS/hand':>10}{'AoS/hand SIMD':>15}{'SoA/hand SIMD':>15}"
          f"{'libmvec SoA/hand SIMD':>23}")
    for case, b in rows:
        s, v = b["scalar"], b["vector"]
        print(f"  {case.spec + ' ' + case.kernel:30}{s['hand'] / s['aos']:9.2f}x"
              f"{s['hand_simd'] / s['aos']:14.2f}x{s['hand_simd'] / s['soa']:14.2f}x"
              f"{v['hand_simd'] / v['soa']:22.2f}x")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=100_000, help="states per batch (100000)")
    ap.add_argument("--repeats", type=int, default=60, help="timed runs per variant (60)")
    ap.add_argument("--numba", action="store_true",
                    help="also time numba njit on lambdify(cse=True) of naive expressions")
    ap.add_argument("--seed", type=int, default=7)
    args = ap.parse_args()
    import metricc
    scalar, vector = compile_flags()
    header(sys.argv[1:], scalar, vector)
    print(pin_one_core())
    if args.numba:
        try:
            import numba
            print(f"numba {numba.__version__}")
        except ImportError:
            print("numba: not installed (pip install numba); --numba ignored")
            args.numba = False
    rng = np.random.default_rng(args.seed)
    kernels = {s: metricc.load(ROOT / "specs" / f"{s}.toml", backend="numpy") for s in SPECS}
    ys = {"kerr": kerr_states(kernels["kerr"], args.n, rng),
          "kerr_schild": kerr_schild_states(kernels["kerr_schild"], args.n, rng)}
    where = {"kerr": "timelike, r in [3, 30], theta in [0.3, pi-0.3]",
             "kerr_schild": "sqrt(x^2+y^2+z^2) in [3, 30], isotropic; half timelike, half null"}
    failed, rows = [], []
    with tempfile.TemporaryDirectory() as tmpname:
        tmp = Path(tmpname)
        env = dict(os.environ, PYTHONPATH=str(ROOT))
        subprocess.run([sys.executable, "-m", "metricc", "build",
                        *[str(ROOT / "specs" / f"{s}.toml") for s in SPECS],
                        "--out", str(tmp), "--target", "c", "-q"], check=True, env=env)
        (tmp / "driver.c").write_text(driver_source())
        exes = {"scalar": compile_driver(tmp, scalar, "scalar"),
                "vector": compile_driver(tmp, vector, "vector")}
        for index, case in enumerate(CASES):
            y = ys[case.spec]
            if case.kernel == "hamilton_rhs":
                y = kernels[case.spec].momenta(y)
            y = np.ascontiguousarray(y, dtype=np.float64)
            data = tmp / f"states_{index}.bin"
            y.tofile(data)
            builds = {}
            for tag, exe in exes.items():
                r = run_case(exe, index, data, args.n, args.repeats, tmp / f"out_{tag}")
                for key in ("hand", "hand_simd", "soa", "single"):
                    r[f"{key}_vs_aos"] = disagreement(r[f"out_{key}"], r["out_aos"])
                builds[tag] = r
                worst = max(r["hand_vs_aos"], r["hand_simd_vs_aos"])
                if not worst <= TOLERANCE:
                    failed.append(f"{case.title}, {tag} build: hand-written and generated "
                                  f"disagree ({worst:.1e})")
            ops = (handwritten_ops(case.source, case.hand),
                   kernels[case.spec].kernel_info[case.kernel]["ops_after"])
            numba_row = numba_rate(case, y, kernels[case.spec].parameters,
                                   builds["scalar"]["out_aos"], args.repeats) \
                if args.numba else None
            table(case, args.n, where[case.spec], builds, ops, numba_row)
            if numba_row is not None and not numba_row[1] <= NUMBA_TOLERANCE:
                failed.append(f"{case.title}: numba and generated disagree ({numba_row[1]:.1e})")
            rows.append((case, builds))
    summary(rows)
    if failed:
        sys.exit("FAILED: " + "; ".join(failed))


if __name__ == "__main__":
    main()
