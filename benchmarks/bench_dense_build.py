"""Build cost of a dense n-D metric with curvature and Jacobian kernels (default n = 8).

The metric is tests/test_build_scale.dense_spec(n): Minkowski plus 0.05 times a sine or
cosine of three coordinates in every entry (invented for this benchmark). Reports CPU
seconds (time.process_time, so a busy machine inflates them less than wall time) of the
symbolic stages, per kernel, and of the C compiler (all units together, from
getrusage(RUSAGE_CHILDREN)), with each unit's wall time and the compiler's peak memory.

    python benchmarks/bench_dense_build.py            # n = 8
    python benchmarks/bench_dense_build.py --dim 6
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--dim", type=int, default=8)
    args = ap.parse_args()
    os.environ["METRICC_CACHE_DIR"] = tempfile.mkdtemp(prefix="metricc-bench-dense-")
    from tests.test_build_scale import dense_spec
    from metricc import build, pipeline
    from metricc.emit import cdef_text, emit
    from metricc.geometry import derive
    from metricc.kernels import build_kernels
    from metricc.spec import parse_spec

    spec = parse_spec(dense_spec(args.dim))
    t = time.process_time()
    geo = derive(spec)
    print(f"derive   {time.process_time() - t:6.1f} s CPU")
    t = time.process_time()
    ks = build_kernels(geo, ("curvature", "jacobian"))
    print(f"kernels  {time.process_time() - t:6.1f} s CPU")
    for k in ks.kernels:
        print(f"  {k.name:<18} {k.ops_before:>7} -> {k.ops_after:>6} operations")
    t = time.process_time()
    sources = emit(ks, ("c", "numpy"))
    print(f"emit     {time.process_time() - t:6.1f} s CPU; C source "
          f"{len(sources.files[spec.name + '.c']):,} characters")
    # Publish these sources rather than derive them again.
    done = pipeline.Generated(spec, geo, ks, sources, cdef_text(ks), 0.0)
    pipeline.generate = lambda *a, **k: done
    entry = build.ensure_sources(spec, {"kernels": ["curvature", "jacobian"]})
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    entry = build.ensure_binary(entry)
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    print(f"compile  {cpu:6.1f} s CPU in all units; peak compiler memory "
          f"{after.ru_maxrss / 1024:.0f} MB")
    units = dict(build.kernel_units(entry.manifest))
    for unit, seconds in entry.manifest["binary"]["unit_seconds"].items():
        opt = next((f for f in units.get(unit, []) if f.startswith("-O")), "")
        print(f"  {unit:<18} {seconds:6.1f} s wall {opt}")
    print(json.dumps({"python": sys.version.split()[0], "cpus": os.cpu_count()}))


if __name__ == "__main__":
    main()
