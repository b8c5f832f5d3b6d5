"""Build and load times of every shipped spec (specs/*.toml).

Each measurement runs in a fresh Python subprocess, so no module, cache entry or compiled
extension is warm in the interpreter:

  * cold build: ``metricc.load(spec)`` with METRICC_CACHE_DIR set to a new, empty folder, i.e.
    derive (sympy) + build kernels + emit sources + compile the C extension + import it. The
    cache entry's manifest.json splits it: ``derive_seconds`` is the whole symbolic stage
    (derive + CSE'd kernels + emitted text), ``binary.compile_seconds`` the C compiler run;
    "other" is the rest of the load (importing sympy and the generator, the cffi wrapper
    source, writing the cache entry, importing the extension).
  * warm load: ``metricc.load(spec)`` again in a new subprocess on the filled cache; the
    table says whether sympy was imported during it (``'sympy' in sys.modules`` afterwards;
    a warm load should not need it).
  * ``import metricc`` in a fresh interpreter, and for reference ``import sympy``.

Times are perf_counter inside the subprocess around the measured statement (interpreter
start-up excluded), best of --repeats (cold: --cold-repeats, each on its own empty cache).
"proc" is the wall time of the whole warm subprocess (start-up + import + load), what a
short script pays. The OS file cache and Python's bytecode caches are warm in every run,
so "cold" means cold for metricc, not for the machine. Machines are noisy; compare rows
within one run.

    python benchmarks/bench_build.py           # cold x3, warm x5 per spec
    python benchmarks/bench_build.py --quick   # smoke run: cold x1, warm x1
"""
from __future__ import annotations

import argparse
import json
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from runinfo import cpu_model, load_average, tree_state

ROOT = Path(__file__).resolve().parent.parent

CHILD_LOAD = r"""
import json, sys, time
t0 = time.perf_counter()
import metricc
t_import = time.perf_counter() - t0
sympy_after_import = "sympy" in sys.modules
t1 = time.perf_counter()
k = metricc.load(sys.argv[1], backend=sys.argv[2])
t_load = time.perf_counter() - t1
print("RESULT " + json.dumps({
    "import_s": t_import, "load_s": t_load, "backend": k.backend,
    "sympy_after_import": sympy_after_import, "sympy_after_load": "sympy" in sys.modules,
    "cache_dir": str(k.cache_dir), "inverse": k.inverse_strategy, "dim": k.dim}))
"""

CHILD_IMPORT = r"""
import json, sys, time
t0 = time.perf_counter()
import {module}
print("RESULT " + json.dumps({{"import_s": time.perf_counter() - t0,
                              "sympy": "sympy" in sys.modules, "numpy": "numpy" in sys.modules,
                              "cffi": "cffi" in sys.modules}}))
"""


def child_env(cache_dir: str | None) -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH")
                                     else "")
    if cache_dir is not None:
        env["METRICC_CACHE_DIR"] = cache_dir
    return env


def run_child(code: str, args: list[str], cache_dir: str | None) -> tuple[dict, float]:
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-c", code, *args], cwd=ROOT, env=child_env(cache_dir),
                          capture_output=True, text=True, timeout=1800)
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        raise RuntimeError(f"child failed ({proc.returncode}):\n{proc.stderr[-3000:]}")
    line = [ln for ln in proc.stdout.splitlines() if ln.startswith("RESULT ")][-1]
    return json.loads(line[len("RESULT "):]), wall


def measure_spec(spec: Path, backend: str, cold_repeats: int, warm_repeats: int,
                 keep: bool) -> dict:
    colds = []
    cache = None
    for i in range(cold_repeats):
        cache = tempfile.mkdtemp(prefix=f"metricc-bench-{spec.stem}-")
        res, wall = run_child(CHILD_LOAD, [str(spec), backend], cache)
        manifest = json.loads((Path(res["cache_dir"]) / "manifest.json").read_text())
        res["derive_s"] = manifest["derive_seconds"]
        res["compile_s"] = (manifest.get("binary") or {}).get("compile_seconds") or 0.0
        res["wall_s"] = wall
        res["cache"] = cache
        colds.append(res)
        if i < cold_repeats - 1:
            shutil.rmtree(cache, ignore_errors=True)
    cold = min(colds, key=lambda r: r["load_s"])
    warms = [run_child(CHILD_LOAD, [str(spec), backend], cache) for _ in range(warm_repeats)]
    for res, wall in warms:
        res["wall_s"] = wall
    # a warm load that lands in another folder missed the cache (the spec key hashes metricc's
    # own sources, so editing metricc during the run causes this): keep hits when there are
    last = colds[-1]   # the cold build whose cache the warm loads use
    hits = [r for r, _ in warms if r["cache_dir"] == last["cache_dir"]] or [r for r, _ in warms]
    warm = min(hits, key=lambda r: r["load_s"])
    warm_wall = min(r["wall_s"] for r, _ in warms)
    if not keep:
        for c in {r["cache"] for r in colds}:
            shutil.rmtree(c, ignore_errors=True)
    misses = sum(r["cache_dir"] != last["cache_dir"] for r, _ in warms)
    return {"cold": cold, "warm": warm, "warm_wall": warm_wall, "misses": misses,
            "sympy_warm_any": any(r["sympy_after_load"] for r, _ in warms),
            "import_s": min(r["import_s"] for r, _ in warms)}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="smoke run: cold x1, warm x1")
    ap.add_argument("--cold-repeats", type=int, default=None,
                    help="cold builds per spec, each in a new empty cache (default 3)")
    ap.add_argument("--repeats", type=int, default=None,
                    help="warm loads and import timings, each in a fresh process (default 5)")
    ap.add_argument("--backend", default="auto", choices=("auto", "c", "numpy"))
    ap.add_argument("--specs", nargs="+", default=None,
                    help="spec names (default: every specs/*.toml)")
    ap.add_argument("--keep", action="store_true", help="keep the temporary cache folders")
    args = ap.parse_args(argv)
    cold_repeats = args.cold_repeats or (1 if args.quick else 3)
    repeats = args.repeats or (1 if args.quick else 5)
    specs = sorted((ROOT / "specs").glob("*.toml"))
    if args.specs:
        specs = [s for s in specs if s.stem in set(args.specs)]

    sys.path.insert(0, str(ROOT))
    from metricc import __version__, build
    cmd = "python benchmarks/bench_build.py " + " ".join(sys.argv[1:] if argv is None else argv)
    print(f"# command: {cmd.strip()}")
    print(f"# metricc {__version__}, Python {platform.python_version()}, {cpu_model()}, "
          f"{os.cpu_count()} CPUs")
    print(f"# C compiler: {' '.join(build.compiler_command())} {' '.join(build.COMPILE_FLAGS)}")
    print(f"# tree: {tree_state()}; generator fingerprint "
          f"{build.generator_fingerprint()[:12]}; {load_average()} at start"
          + ("; PYTHONDONTWRITEBYTECODE is set" if os.environ.get("PYTHONDONTWRITEBYTECODE")
             else ""))
    print(f"# backend={args.backend}; cold: best of {cold_repeats} (fresh empty "
          f"METRICC_CACHE_DIR each), warm: best of {repeats} fresh processes")
    print()

    imports = {}
    for module in ("metricc", "sympy", "numpy", "cffi"):
        runs = [run_child(CHILD_IMPORT.format(module=module), [], None)[0] for _ in range(repeats)]
        imports[module] = min(runs, key=lambda r: r["import_s"])
    startup = min(run_child("print('RESULT {}')", [], None)[1] for _ in range(repeats))

    sys.stdout.flush()
    rows = []
    for spec in specs:
        r = measure_spec(spec, args.backend, cold_repeats, repeats, args.keep)
        rows.append((spec.stem, r))
        c = r["cold"]
        print(f"  measured {spec.stem:<20} cold {c['load_s']:.2f} s, warm "
              f"{r['warm']['load_s'] * 1e3:.1f} ms", file=sys.stderr)

    head = (f"{'spec':<19} {'dim':>3} {'inverse':<9} {'backend':<7} | {'cold s':>7} "
            f"{'derive+emit':>11} {'compile':>8} {'other':>6} | {'warm load ms':>12} "
            f"{'warm proc ms':>12} {'sympy?':>6}")
    print(head)
    print("-" * len(head))
    for name, r in rows:
        c, w = r["cold"], r["warm"]
        other = c["load_s"] - c["derive_s"] - c["compile_s"]
        print(f"{name:<19} {c['dim']:>3} {c['inverse']:<9} {c['backend']:<7} | "
              f"{c['load_s']:>7.2f} {c['derive_s']:>11.2f} {c['compile_s']:>8.2f} {other:>6.2f} | "
              f"{w['load_s'] * 1e3:>12.2f} {r['warm_wall'] * 1e3:>12.0f} "
              f"{'yes' if r['sympy_warm_any'] else 'no':>6}")
    total_cold = sum(r["cold"]["load_s"] for _, r in rows)
    print("-" * len(head))
    print(f"{'all specs':<19} {'':>3} {'':<9} {'':<7} | {total_cold:>7.2f}")
    print()
    print("cold s = metricc.load() on an empty cache; derive+emit = manifest derive_seconds; "
          "compile = manifest binary.compile_seconds;")
    print("other = cold s - derive+emit - compile (sympy/generator import, cffi source, cache "
          "writes, extension import);")
    print("warm load = metricc.load() on the filled cache in a fresh process; warm proc = wall "
          "time of that whole process;")
    print("sympy? = 'sympy' in sys.modules after any warm load (a cache miss counts).")
    print()
    print(f"{'fresh-process import':<24} {'ms':>8}  pulls in")
    for module, r in imports.items():
        pulled = ", ".join(m for m in ("numpy", "sympy", "cffi") if r[m] and m != module) or "-"
        print(f"{'import ' + module:<24} {r['import_s'] * 1e3:>8.1f}  {pulled}")
    print(f"{'python -c (start-up)':<24} {startup * 1e3:>8.1f}  (wall time of a trivial process)")
    bad = [name for name, r in rows if r["sympy_warm_any"]]
    missed = [f"{name} ({r['misses']} of {repeats})" for name, r in rows if r["misses"]]
    if missed:
        print("\nNOTE: warm loads missed the cache (regenerated) for: " + ", ".join(missed)
              + "; the cache key hashes metricc's sources, so metricc/ or templates/ changed "
              "during the run: rerun on a quiet tree")
    if imports["metricc"]["sympy"]:
        print("\nNOTE: `import metricc` imported sympy")
    if bad:
        print(f"\nNOTE: sympy was imported during a warm load of: {', '.join(bad)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
