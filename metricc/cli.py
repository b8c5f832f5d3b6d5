"""Command line: ``metricc build SPEC... --out DIR [--target c,numpy]``.

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

TARGETS = ("c", "numpy")


def _parse_targets(text: str) -> tuple[str, ...]:
    targets = tuple(t.strip() for t in text.split(",") if t.strip())
    bad = [t for t in targets if t not in TARGETS]
    if bad or not targets:
        raise argparse.ArgumentTypeError(f"unknown target {', '.join(bad) or text!r}; "
                                         f"choose from {', '.join(TARGETS)}")
    return targets


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="metricc", description="Compile metric specs (TOML) into "
                                "geodesic kernels: standalone C99 and NumPy.")
    p.add_argument("--version", action="version", version=f"metricc {__version__}")
    sub = p.add_subparsers(dest="command", required=True)
    b = sub.add_parser("build", help="generate kernel sources for one or more specs")
    b.add_argument("specs", nargs="+", metavar="SPEC", help="spec files (.toml)")
    b.add_argument("--out", "-o", required=True, metavar="DIR", help="output folder")
    b.add_argument("--target", type=_parse_targets, default=TARGETS, metavar="LIST",
                   help="comma-separated targets: c (NAME.h + NAME.c), numpy (NAME_numpy.py); "
                        "default c,numpy")
    b.add_argument("--quiet", "-q", action="store_true", help="print nothing on success")
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
        results.append(generate(spec, args.target))
    names = [r.spec.name for r in results]
    dup = {n for n in names if names.count(n) > 1}
    if dup:
        raise SpecError(f"several specs are named {', '.join(sorted(dup))!r}; their files "
                        "would overwrite each other", path=args.specs[names.index(dup.pop())],
                        key="name")
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
    return 0


def _summary(r, out: Path, written: list[str]) -> None:
    ks = r.kernels
    blocks = " | ".join(f"{','.join(b['coordinates'])}: {b['strategy']}" for b in ks.inverse_blocks)
    print(f"{ks.name}: {r.spec.path} -> {out}{os.sep} ({r.seconds:.2f} s)")
    print(f"  {ks.summary}")
    print(f"  dimension {ks.dim}, parameters: {', '.join(p for p, _ in ks.parameters) or 'none'};"
          f" ignorable: {', '.join(ks.ignorable) or 'none'}")
    print(f"  inverse metric: {ks.inverse_strategy} ({blocks})")
    print(f"  {'kernel':<16} {'operations (unoptimised -> emitted)'}")
    for k in ks.kernels:
        print(f"  {k.name:<16} {k.ops_before:>7} -> {k.ops_after}")
    files = sorted(r.sources.files)
    unchanged = [f for f in files if f not in written]
    print(f"  wrote: {', '.join(written) or 'nothing'}"
          + (f"; unchanged: {', '.join(unchanged)}" if unchanged else ""))


def main(argv=None) -> int:
    args = _parser().parse_args(argv)
    try:
        if args.command == "build":
            return cmd_build(args)
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
