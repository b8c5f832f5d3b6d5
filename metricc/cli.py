"""Command line: ``metricc build | show | verify | integrate | render | connect``.

User mistakes (a bad spec, an unwritable folder) print one line and exit with status 1; only
bugs in metricc itself show a traceback.
"""
from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

from ._version import __version__
from .errors import BuildError, SpecError

TARGETS = ("c", "numpy", "cffi")
DEFAULT_TARGETS = ("c", "numpy")


def _parse_targets(text: str) -> tuple[str, ...]:
    targets = tuple(t.strip() for t in text.split(",") if t.strip())
    bad = [t for t in targets if t not in TARGETS]
    if bad or not targets:
        raise argparse.ArgumentTypeError(f"unknown target {', '.join(bad) or text!r}; "
                                         f"choose from {', '.join(TARGETS)}")
    return targets


def _parse_groups(text: str) -> tuple[str, ...]:
    from .spec import OPTIONAL_KERNELS
    groups = tuple(t.strip() for t in text.split(",") if t.strip())
    bad = [g for g in groups if g not in OPTIONAL_KERNELS]
    if bad:
        raise argparse.ArgumentTypeError(f"unknown kernel group {bad[0]!r}; choose from "
                                         f"{', '.join(OPTIONAL_KERNELS)}")
    return groups


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="metricc", description="Compile metric specs (TOML) into "
                                "geodesic kernels: standalone C99 and NumPy.")
    p.add_argument("--version", action="version", version=f"metricc {__version__}")
    sub = p.add_subparsers(dest="command", required=True)
    b = sub.add_parser("build", help="generate kernel sources for one or more specs")
    b.add_argument("specs", nargs="+", metavar="SPEC", help="spec files (.toml)")
    b.add_argument("--out", "-o", required=True, metavar="DIR", help="output folder")
    b.add_argument("--target", type=_parse_targets, default=DEFAULT_TARGETS, metavar="LIST",
                   help="comma-separated targets: c (NAME.h + NAME.c), numpy (NAME_numpy.py), "
                        "cffi (NAME_cffi_build.py + the C pair); default c,numpy")
    b.add_argument("--kernels", type=_parse_groups, default=(), metavar="LIST",
                   help="optional kernel groups to add: curvature (Riemann, Ricci, "
                        "Kretschmann), jacobian (of both right-hand sides)")
    b.add_argument("--depfile", metavar="FILE",
                   help="also write a Make-format dependency file (outputs depend on the spec "
                        "and on metricc itself), for Make, Ninja and CMake")
    b.add_argument("--check", action="store_true",
                   help="write nothing; exit 1 naming the files in DIR that are missing or "
                        "differ from what the specs generate now")
    b.add_argument("--quiet", "-q", action="store_true", help="print nothing on success")

    sh = sub.add_parser("show", help="print the metric and its Christoffel symbols as text "
                        "or LaTeX")
    sh.add_argument("spec", metavar="SPEC", help="spec file (.toml)")
    sh.add_argument("--format", choices=("text", "latex"), default="text",
                    help="text in the spec's expression syntax, or a LaTeX align* block "
                         "(default text)")
    sh.add_argument("--parts", default="metric,christoffel", metavar="LIST",
                    help="comma-separated: metric, inverse_metric, christoffel, conserved, "
                         "geodesic_rhs (default metric,christoffel; 'all' for every part)")

    v = sub.add_parser("verify", help="self-check a spec's kernels at random points inside "
                       "its domain; exit 1 on any failure")
    v.add_argument("specs", nargs="+", metavar="SPEC", help="spec files (.toml)")
    v.add_argument("--dir", metavar="DIR", default=None,
                   help="check the generated files in DIR (as written by metricc build) "
                        "instead of freshly generated ones")
    v.add_argument("--points", type=int, default=24, help="sample points (default 24)")
    v.add_argument("--seed", type=int, default=1,
                   help="seed of the random sample points and velocities, for reproducible "
                        "runs (default 1)")

    from . import cli_connect, render
    render.add_parser(sub)
    cli_connect.add_parser(sub)

    g = sub.add_parser("integrate", help="integrate a batch of geodesics from a file of states")
    g.add_argument("spec", metavar="SPEC", help="spec file (.toml)")
    g.add_argument("--input", "-i", required=True, metavar="FILE",
                   help="initial states: .npy, or text (.txt/.csv, one state per row), shape "
                        "(N, 2*dim); or .npz with key y0 (the states) and optionally "
                        "transport (N, m, dim: vectors to parallel-transport) and variations "
                        "(N, m, 2*dim: initial directions of the tangent equations)")
    g.add_argument("--lam-end", type=float, required=True, metavar="L",
                   help="affine parameter to integrate to (negative: backward)")
    g.add_argument("--output", "-o", required=True, metavar="FILE.npz",
                   help="results as a NumPy .npz archive (the name must end in .npz): y, lam, "
                        "status, steps, drift, invariant_drift_<name> for each of the "
                        "spec's [invariants] (and samples, sample_lam); with carried "
                        "quantities also transport, variations (and their _samples) and "
                        "param_variation_<name>")
    g.add_argument("--param", action="append", default=[], metavar="NAME=VALUE",
                   help="override a parameter (repeatable)")
    g.add_argument("--form", choices=("geodesic", "hamilton"), default="geodesic",
                   help="what the states hold: geodesic = [x, u] (velocities u^mu), hamilton = "
                        "[x, p] (covariant momenta p_mu); default geodesic")
    g.add_argument("--method", choices=("dop853", "dp5"), default=None,
                   help="Runge-Kutta pair: dop853 (Dormand-Prince 8(5,3), the default) or dp5 "
                        "(5(4))")
    g.add_argument("--rtol", type=float, default=1e-10,
                   help="relative tolerance of the local error per step (default 1e-10)")
    g.add_argument("--atol", type=float, default=1e-12,
                   help="absolute tolerance of the local error per step (default 1e-12)")
    g.add_argument("--max-steps", type=int, default=100000,
                   help="steps per state before it stops with status max_steps "
                        "(default 100000)")
    g.add_argument("--events", default=None, metavar="LIST",
                   help="comma-separated event names to use (default: all; '' for none)")
    g.add_argument("--samples", type=int, default=0, metavar="S",
                   help="also store S evenly spaced samples from 0 to lam_end")
    g.add_argument("--threads", type=int, default=None,
                   help="most threads the C integrator uses (default: as many as OpenMP "
                        "offers; the NumPy backend runs on one)")
    g.add_argument("--variations", choices=("all",), default=None,
                   help="all: carry the full state transition matrix; variations[i, j] = "
                        "d y_end_i / d y0_j (only when the input file holds no variations)")
    g.add_argument("--param-variations", default=None, metavar="LIST",
                   help="comma-separated parameter names, or all: write d y_end / d param "
                        "as param_variation_<name>")
    g.add_argument("--carried-error", action=argparse.BooleanOptionalAction, default=True,
                   help="carried quantities join the step-size control (default); with "
                        "--no-carried-error the steps are those of a plain run")
    g.add_argument("--backend", choices=("auto", "c", "numpy"), default="auto",
                   help="c (compiled), numpy, or auto: C where a compiler works, else NumPy "
                        "(default auto)")
    g.add_argument("--progress", action=argparse.BooleanOptionalAction, default=None,
                   help="progress bar on stderr (default: when stderr is a terminal)")
    return p


def write_if_changed(path: Path, text: str) -> bool:
    """Write atomically unless the file already holds exactly ``text``; True if written."""
    from .build import atomic_write
    try:
        if path.read_bytes() == text.encode("utf-8"):
            return False
    except OSError:
        pass
    atomic_write(path, text)
    return True


def cmd_build(args) -> int:
    from .pipeline import generate
    from .spec import load_spec
    out = Path(args.out)
    # Validate and generate everything first, so a bad spec leaves no output at all.
    results = []
    for path in args.specs:
        spec = load_spec(path)
        results.append(generate(spec, args.target, extra_kernels=args.kernels))
    names = [r.spec.name for r in results]
    dup = {n for n in names if names.count(n) > 1}
    if dup:
        raise SpecError(f"several specs are named {', '.join(sorted(dup))!r}; their files "
                        "would overwrite each other", path=args.specs[names.index(dup.pop())],
                        key="name")
    _refuse_symbol_clashes(results)
    if args.check:
        stale = []
        for r in results:
            for filename, text in sorted(r.sources.files.items()):
                try:
                    same = (out / filename).read_bytes() == text.encode("utf-8")
                except OSError:
                    same = False
                if not same:
                    stale.append(str(out / filename))
        for path in stale:
            print(f"{path}: stale (regenerate with metricc build)", file=sys.stderr)
        if not stale and not args.quiet:
            print(f"metricc: {sum(len(r.sources.files) for r in results)} generated files "
                  f"in {out} are up to date")
        return 1 if stale else 0
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise BuildError(f"cannot create output folder {out}: {exc.strerror or exc}") from None
    for r in results:
        written = []
        for filename, text in sorted(r.sources.files.items()):
            try:
                if write_if_changed(out / filename, text):
                    written.append(filename)
            except OSError as exc:
                raise BuildError(f"cannot write {out / filename}: {exc.strerror or exc}") from None
        if not args.quiet:
            _summary(r, out, written)
    if args.depfile:
        try:
            write_if_changed(Path(args.depfile), depfile_text(results, out))
        except OSError as exc:
            raise BuildError(f"cannot write {args.depfile}: {exc.strerror or exc}") from None
    return 0


def _refuse_symbol_clashes(results) -> None:
    """SpecError when two specs of one build would define the same C symbol (a name that is
    a prefix of another, such as kerr and kerr_gsl): their files could not link together."""
    from .emit import symbol_clashes
    headers = {r.spec.name: r.sources.files[f"{r.spec.name}.h"] for r in results
               if f"{r.spec.name}.h" in r.sources.files}
    clashes = symbol_clashes(headers)
    if clashes:
        a, b, common = clashes[0]
        shown = ", ".join(common[:3]) + (f" and {len(common) - 3} more" if len(common) > 3 else "")
        spec_b = next(r.spec for r in results if r.spec.name == b)
        raise spec_b.error(f"specs {a!r} and {b!r} would both define the C symbol(s) {shown}, "
                           "so their files cannot be linked into one program; rename one of "
                           "them (e.g. so that neither name followed by '_' starts the other)",
                           key="name")


def _make_escape(path: str) -> str:
    return path.replace("\\", "/").replace(" ", "\\ ").replace("#", "\\#").replace("$", "$$")


def depfile_text(results, out: Path) -> str:
    """Make-format rules: every generated file depends on its spec and on metricc itself
    (its version file, so an upgrade regenerates). Each prerequisite also gets an empty rule
    (as ``cc -MP`` writes), so a moved or deleted prerequisite never stops make."""
    from . import _version
    version_file = _make_escape(str(Path(_version.__file__).resolve()))
    lines = []
    prereqs = []
    for r in results:
        targets = " ".join(_make_escape(str(out / f)) for f in sorted(r.sources.files))
        spec_path = _make_escape(r.spec.path)
        lines.append(f"{targets}: {spec_path} {version_file}")
        prereqs.append(spec_path)
    lines.append("")
    for p in dict.fromkeys(prereqs + [version_file]):
        lines.append(f"{p}:")
    return "\n".join(lines) + "\n"


def _summary(r, out: Path, written: list[str]) -> None:
    ks = r.kernels
    blocks = " | ".join(f"{','.join(b['coordinates'])}: {b['strategy']}"
                        + (" rank-one update of a constant metric" if b.get("form") == "rank-one"
                           else "") for b in ks.inverse_blocks)
    print(f"{ks.name}: {r.spec.path} -> {out}{os.sep} ({r.seconds:.2f} s)")
    print(f"  {ks.summary}")
    print(f"  dimension {ks.dim}, parameters: {', '.join(p for p, _ in ks.parameters) or 'none'};"
          f" ignorable: {', '.join(ks.ignorable) or 'none'}")
    print(f"  inverse metric: {ks.inverse_strategy} ({blocks})")
    width = max([16] + [len(k.name) for k in ks.kernels])   # invariants_hamilton is 19
    print(f"  {'kernel':<{width}} {'operations (unoptimised -> emitted)'}")
    for k in ks.kernels:
        print(f"  {k.name:<{width}} {k.ops_before:>7} -> {k.ops_after}")
    files = sorted(r.sources.files)
    unchanged = [f for f in files if f not in written]
    print(f"  wrote: {', '.join(written) or 'nothing'}"
          + (f"; unchanged: {', '.join(unchanged)}" if unchanged else ""))
    for radicand in ks.nan_where:
        print(f"  note: where {radicand} = 0 the kernels that differentiate the metric "
              f"(christoffel, the right-hand sides, curvature, Jacobians) return NaN: the "
              f"derivative of its square root is 0/0 there, even where the metric is smooth; "
              f"integrations stop at such a point rather than pass through it")
    from .pipeline import slow_stages
    slow = slow_stages(r)
    if slow:
        print(f"  slow: {slow}")


class ProgressBar:
    """A one-line progress bar on a stream (stderr), redrawn at most ten times a second."""

    def __init__(self, stream, label: str, width: int = 30):
        self.stream, self.label, self.width = stream, label, width
        self.start = time.perf_counter()
        self.last = 0.0

    def __call__(self, done: int, total: int) -> None:
        now = time.perf_counter()
        if done < total and now - self.last < 0.1:
            return
        self.last = now
        frac = done / total if total else 1.0
        filled = int(round(frac * self.width))
        elapsed = now - self.start
        rate = done / elapsed if elapsed > 0 else 0.0
        self.stream.write(f"\r{self.label} [{'#' * filled}{'.' * (self.width - filled)}] "
                          f"{100 * frac:5.1f}% {done}/{total} ({rate:,.0f}/s, {elapsed:.1f} s)")
        if done >= total:
            self.stream.write("\n")
        self.stream.flush()


INPUT_KEYS = ("y0", "transport", "variations")   # what an .npz input file may hold


def _read_states(path: str):
    """(y0, {"transport": ..., "variations": ...}) from an input file; the dict is empty
    unless the file is an .npz archive holding carried vectors."""
    import numpy as np
    p = Path(path)
    try:
        if p.suffix == ".npz":
            return _read_archive(path)
        if p.suffix == ".npy":
            arr = np.load(p, allow_pickle=False)
        else:
            arr = np.loadtxt(p, delimiter="," if p.suffix == ".csv" else None, ndmin=2)
    except (OSError, ValueError) as exc:
        raise BuildError(f"cannot read states from {path}: {exc}") from None
    return np.asarray(arr, dtype=np.float64), {}


def _read_archive(path: str):
    import numpy as np
    with np.load(path, allow_pickle=False) as z:
        keys = list(z.files)
        extra = [key for key in keys if key not in INPUT_KEYS]
        if extra or "y0" not in keys:
            what = "no key 'y0' (the states)" if "y0" not in keys else \
                f"unknown key {extra[0]!r}"
            raise BuildError(f"{path}: {what}; an .npz input holds y0 and optionally "
                             "transport and variations")
        arrays = {}
        for key in keys:
            try:
                arrays[key] = np.asarray(z[key], dtype=np.float64)
            except (TypeError, ValueError) as exc:
                raise BuildError(f"{path}: key {key!r}: not an array of numbers ({exc})") \
                    from None
    return arrays.pop("y0"), arrays


def _check_carried(path: str, k, y0, carried: dict) -> None:
    """BuildError naming the file and key when a carried array's shape does not go with the
    states y0 (..., 2*dim): transport (..., m, dim), variations (..., m, 2*dim)."""
    for key, width in (("transport", k.dim), ("variations", 2 * k.dim)):
        arr = carried.get(key)
        if arr is None:
            continue
        lead = y0.shape[:-1]
        if arr.ndim != len(lead) + 2 or arr.shape[:-2] != lead or arr.shape[-1] != width:
            want = "(" + "".join(f"{n}, " for n in lead) + f"m, {width})"
            raise BuildError(f"{path}: key {key!r} has shape {arr.shape}; with states of "
                             f"shape {y0.shape} it must be {want}")


def parse_params(items) -> dict:
    """--param NAME=VALUE items -> {name: float}; BuildError for a malformed one."""
    from .expr import ExprError, constant_value
    params = {}
    for item in items:
        name, sep, value = item.partition("=")
        try:
            params[name.strip()] = constant_value(value)
        except ExprError:
            sep = ""
        if not sep:
            raise BuildError(f"--param expects NAME=VALUE with a number (pi/2 and the like "
                             f"work), got {item!r}")
    return params


def write_npz(out: Path, arrays: dict) -> None:
    """The arrays as one .npz archive, written atomically (temp file + rename)."""
    import io

    import numpy as np

    from .build import atomic_write
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    try:
        atomic_write(out, buf.getvalue())
    except OSError as exc:
        raise BuildError(f"cannot write {out}: {exc.strerror or exc}") from None


def cmd_integrate(args) -> int:
    import numpy as np
    from . import load
    params = parse_params(args.param)
    out = Path(args.output)
    if out.suffix.lower() != ".npz":
        # np.savez writes an .npz archive whatever the name says; a name like r.txt would
        # hide a binary file behind a text suffix
        raise BuildError(f"--output {args.output!r}: results are written as a NumPy .npz "
                         "archive; give a file name ending in .npz")
    k = load(args.spec, backend=args.backend)
    y0, carried = _read_states(args.input)
    _check_carried(args.input, k, y0, carried)
    if args.variations == "all":
        if "variations" in carried:
            raise BuildError(f"--variations all: {args.input} already holds variations; "
                             "give one or the other")
        carried["variations"] = "all"
    pv = args.param_variations
    if pv is not None:
        pv = True if pv.strip() == "all" else [p.strip() for p in pv.split(",") if p.strip()]
    events = None if args.events is None else [e for e in args.events.split(",") if e]
    samples = np.linspace(0.0, args.lam_end, args.samples) if args.samples > 0 else None
    show = sys.stderr.isatty() if args.progress is None else args.progress
    bar = ProgressBar(sys.stderr, f"{k.name}") if show else None
    try:
        res = k.integrate(y0, args.lam_end, params=params or None, rtol=args.rtol,
                          atol=args.atol, max_steps=args.max_steps, events=events,
                          samples=samples, form=args.form, method=args.method,
                          threads=args.threads, progress=bar, param_variations=pv,
                          carried_error=args.carried_error, **carried)
    except ValueError as exc:
        raise BuildError(str(exc)) from None
    arrays = {"y": res.y, "lam": res.lam, "status": res.status, "steps": res.steps,
              "drift": res.drift}
    for name in ("transport", "transport_samples", "variations", "variations_samples"):
        if getattr(res, name) is not None:
            arrays[name] = getattr(res, name)
    for name, value in (res.param_variations or {}).items():
        arrays[f"param_variation_{name}"] = value
    for name, value in res.invariant_drift.items():  # the spec's [invariants]
        arrays[f"invariant_drift_{name}"] = value
    if res.samples is not None:
        arrays["samples"] = res.samples
        arrays["sample_lam"] = samples
    write_npz(out, arrays)
    # a single state (input shape (2*dim,)) gives 0-d results: count them as one
    names, counts = np.unique(np.atleast_1d(res.status), return_counts=True)
    drift = np.atleast_1d(res.drift)
    n = np.size(res.lam)
    print(f"{k.name}: {n} state{'' if n == 1 else 's'}, " + ", ".join(f"{c} {s}" for s, c in
                                                                    zip(names, counts))
          + f"; {int(np.sum(res.steps))} steps; max drift "
          + f"{np.nanmax(drift) if drift.size else 0:.2e} -> {out}")
    return 0


SHOW_PARTS = ("metric", "inverse_metric", "christoffel", "conserved", "geodesic_rhs")


def cmd_show(args) -> int:
    from .geometry import derive
    from .show import render
    from .spec import load_spec
    parts = SHOW_PARTS if args.parts.strip() == "all" else tuple(
        p.strip() for p in args.parts.split(",") if p.strip())
    bad = [p for p in parts if p not in SHOW_PARTS]
    if bad or not parts:
        raise BuildError(f"unknown part {', '.join(bad) or args.parts!r}; choose from "
                         f"{', '.join(SHOW_PARTS)} or all")
    geo = derive(load_spec(args.spec))
    sys.stdout.write(render(geo, list(parts), args.format))
    return 0


def cmd_verify(args) -> int:
    import shutil
    import warnings
    from .errors import MetriccWarning
    from .runtime import open_generated, open_spec
    from .spec import load_spec
    from .verify import format_table, run_checks
    failed = 0
    for path in args.specs:
        spec = load_spec(path)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", MetriccWarning)
            backends = []
            if args.dir:
                backends.append(open_generated(spec, args.dir, "numpy"))
                try:
                    backends.insert(0, open_generated(spec, args.dir, "c"))
                except BuildError as exc:
                    print(f"metricc: note: C backend not checked ({str(exc).splitlines()[0]})",
                          file=sys.stderr)
            else:
                backends.append(open_spec(spec, "numpy"))
                c = open_spec(spec, "auto")
                if c.backend == "c":
                    backends.insert(0, c)
        main_k = backends[0]
        other = backends[1] if len(backends) > 1 else None
        want = None
        if spec.signature is not None:
            want = (spec.signature.count("-"), spec.signature.count("+"))
        checks = run_checks(main_k, other, n=args.points, seed=args.seed,
                            expected_signature=want)
        print(format_table(spec.name, "+".join(k.backend for k in backends), checks))
        failed += sum(not c.ok for c in checks)
        if args.dir:
            for k in backends:
                shutil.rmtree(k.cache_dir, ignore_errors=True)
    return 1 if failed else 0


def main(argv=None) -> int:
    args = _parser().parse_args(argv)
    try:
        if args.command == "build":
            return cmd_build(args)
        if args.command == "integrate":
            return cmd_integrate(args)
        if args.command == "show":
            return cmd_show(args)
        if args.command == "verify":
            return cmd_verify(args)
        if args.command == "render":
            from . import render
            return render.run(args)
        if args.command == "connect":
            from . import cli_connect
            return cli_connect.run(args)
    except (SpecError, BuildError) as exc:
        print(str(exc).splitlines()[0] if isinstance(exc, SpecError) else f"metricc: error: {exc}",
              file=sys.stderr)
        return 1
    except BrokenPipeError:  # output piped into head or similar
        return 0
    except KeyboardInterrupt:
        print("metricc: interrupted", file=sys.stderr)
        return 130
    return 2


if __name__ == "__main__":
    sys.exit(main())
