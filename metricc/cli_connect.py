"""``metricc connect``: the geodesic joining two points, for one pair or a file of pairs.

One pair (``--from x0,x1,... --to ...``) prints the status, the length, the initial velocity
u0 and the arrival point of each connecting geodesic found; ``-i pairs.npy -o result.npz``
(pairs of shape (N, 2, dim): [x_from, x_to] per row) runs a batch through ``k.connect`` with a
progress bar and writes y0, y1, length, status, iterations and residual. Mistakes in the
arguments are BuildErrors (one line, exit status 1).
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

from .errors import BuildError

KINDS = ("null", "timelike")


def add_parser(sub) -> None:
    c = sub.add_parser("connect", help="the geodesic joining two points (a boundary-value "
                       "problem), for one pair or a file of pairs")
    c.add_argument("spec", metavar="SPEC", help="spec file (.toml)")
    c.add_argument("--from", dest="x_from", metavar="X", default=None,
                   help="start point, one value per coordinate, comma-separated (pi/2 and "
                        "the like work; write --from=-1,2 when the first value is negative)")
    c.add_argument("--to", dest="x_to", metavar="X", default=None,
                   help="target point, as --from")
    c.add_argument("--input", "-i", metavar="FILE.npy", default=None,
                   help="a batch of pairs instead: .npy of shape (N, 2, dim), [x_from, x_to] "
                        "per row")
    c.add_argument("--output", "-o", metavar="FILE.npz", default=None,
                   help="with --input: results as a NumPy .npz archive: y0, y1, length, "
                        "status, iterations, residual (with --solutions n an axis of length "
                        "n after the pair axis)")
    c.add_argument("--free", default=None, metavar="LIST",
                   help="comma-separated coordinates left free on arrival (needs --kind)")
    c.add_argument("--kind", choices=KINDS, default=None,
                   help="null or timelike: the normalisation g(u0,u0) = 0 or -1 that goes with "
                        "a free coordinate; without --free it only checks the causal "
                        "character")
    c.add_argument("--solutions", type=int, default=1, metavar="N",
                   help="up to N distinct connecting geodesics, ordered by length (default 1)")
    c.add_argument("--param", action="append", default=[], metavar="NAME=VALUE",
                   help="override a parameter (repeatable)")
    c.add_argument("--rtol", type=float, default=1e-11,
                   help="relative tolerance of the integrator per step (default 1e-11)")
    c.add_argument("--atol", type=float, default=1e-13,
                   help="absolute tolerance of the integrator per step (default 1e-13)")
    c.add_argument("--tol", type=float, default=1e-10,
                   help="arrival mismatch relative to the path length at which Newton stops "
                        "(default 1e-10)")
    c.add_argument("--max-iter", type=int, default=50,
                   help="Newton iterations per candidate (default 50)")
    c.add_argument("--backend", choices=("auto", "c", "numpy"), default="auto",
                   help="c (compiled), numpy, or auto (default)")
    c.add_argument("--progress", action=argparse.BooleanOptionalAction, default=None,
                   help="progress bar on stderr for a batch (default: when stderr is a "
                        "terminal)")


def point(text: str, option: str, coordinates) -> list[float]:
    """The values of ``--from``/``--to``: one constant expression per coordinate."""
    from .expr import ExprError, constant_value
    parts = [p.strip() for p in text.split(",")]
    if len(parts) != len(coordinates):
        raise BuildError(f"{option} {text!r}: give {len(coordinates)} comma-separated values "
                         f"({', '.join(coordinates)}), got {len(parts)}")
    values = []
    for name, part in zip(coordinates, parts):
        try:
            values.append(constant_value(part))
        except ExprError as exc:
            raise BuildError(f"{option}: the value of {name} ({part!r}) is not a number: "
                             f"{exc.message}") from None
    return values


def read_pairs(path: str, dim: int):
    """(N, 2, dim) float array from a .npy file; BuildError naming the file otherwise."""
    import numpy as np
    if not path.lower().endswith(".npy"):
        raise BuildError(f"--input {path!r}: give a NumPy .npy file of shape (N, 2, {dim})")
    try:
        arr = np.load(path, allow_pickle=False)
    except (OSError, ValueError) as exc:
        raise BuildError(f"cannot read {path}: {getattr(exc, 'strerror', None) or exc}") \
            from None
    if arr.ndim != 3 or arr.shape[1:] != (2, dim):
        raise BuildError(f"{path}: pairs have shape {arr.shape}; expected (N, 2, {dim}) "
                         "([x_from, x_to] per row)")
    try:
        return np.asarray(arr, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise BuildError(f"{path}: not an array of numbers ({exc})") from None


def run(args) -> int:
    import numpy as np
    from . import load
    from .cli import ProgressBar, parse_params, write_npz
    params = parse_params(args.param)
    batch = args.input is not None
    if batch == (args.x_from is not None or args.x_to is not None):
        raise BuildError("give either --from and --to (one pair) or --input with --output "
                         "(a batch)")
    if batch and args.output is None:
        raise BuildError("--input needs --output FILE.npz")
    if not batch and (args.x_from is None or args.x_to is None):
        raise BuildError("give both --from and --to")
    if not batch and args.output is not None:
        raise BuildError("--output goes with --input (one pair prints its result)")
    if batch and Path(args.output).suffix.lower() != ".npz":
        raise BuildError(f"--output {args.output!r}: results are written as a NumPy .npz "
                         "archive; give a file name ending in .npz")
    if args.solutions < 1:
        raise BuildError(f"--solutions must be at least 1, got {args.solutions}")
    k = load(args.spec, backend=args.backend)
    free = None
    if args.free is not None:
        free = [f.strip() for f in args.free.split(",") if f.strip()]
        for name in free:
            if name not in k.coordinates:
                raise BuildError(f"--free: {name!r} is not a coordinate of {k.name} "
                                 f"({', '.join(k.coordinates)})")
    if batch:
        pairs = read_pairs(args.input, k.dim)
        x_from, x_to = pairs[:, 0], pairs[:, 1]
    else:
        x_from = np.array(point(args.x_from, "--from", k.coordinates))
        x_to = np.array(point(args.x_to, "--to", k.coordinates))
    show = sys.stderr.isatty() if args.progress is None else args.progress
    bar = ProgressBar(sys.stderr, k.name) if (batch and show) else None
    try:
        sol = k.connect(x_from, x_to, params=params or None, kind=args.kind, free=free,
                        solutions=args.solutions, rtol=args.rtol, atol=args.atol,
                        tol=args.tol, max_iter=args.max_iter, progress=bar)
    except (ValueError, TypeError) as exc:
        raise BuildError(str(exc)) from None
    fields = {name: getattr(sol, name) for name in
              ("y0", "y1", "length", "status", "iterations", "residual")}
    if batch:
        write_npz(Path(args.output), fields)
        names, counts = np.unique(sol.status, return_counts=True)
        n = len(pairs)
        print(f"{k.name}: {n} pair{'' if n == 1 else 's'}, "
              + ", ".join(f"{c} {s}" for s, c in zip(names, counts)) + f" -> {args.output}")
        return 0
    _print_one(k, fields, args.solutions)
    status = np.atleast_1d(sol.status)
    return 0 if status[0] == "converged" else 1


def _print_one(k, fields: dict, solutions: int) -> None:
    import numpy as np
    dim = k.dim
    rows = {name: np.reshape(v, (solutions,) + np.shape(v)[1:] if solutions > 1 else
                             (1,) + np.shape(v)) for name, v in fields.items()}
    for i in range(solutions):
        head = f"{k.name}: " + (f"solution {i + 1}: " if solutions > 1 else "")
        status = str(rows["status"][i])
        print(f"{head}{status} after {int(rows['iterations'][i])} iterations (residual "
              f"{float(rows['residual'][i]):.2e})")
        if status != "converged":
            continue
        y0, y1 = rows["y0"][i], rows["y1"][i]
        print(f"  length  {float(rows['length'][i]):.15g}")
        print("  u0      " + ", ".join(f"d{c} = {v:.15g}" for c, v in zip(k.coordinates,
                                                                          y0[dim:])))
        print("  arrival " + ", ".join(f"{c} = {v:.15g}" for c, v in zip(k.coordinates,
                                                                         y1[:dim])))
        print("  u1      " + ", ".join(f"d{c} = {v:.15g}" for c, v in zip(k.coordinates,
                                                                          y1[dim:])))
