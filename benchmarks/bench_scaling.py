"""How build time and operation count grow with dimension, for dense metrics (2 to 8).

    python benchmarks/bench_scaling.py [--max-dim 8]

Each metric has every entry non-zero (diagonal 2 + eps sin(x_{i+1})^2, off-diagonal
eps cos(x_i + 2 x_j)/(i + j + 2)), so its inverse is solved numerically and every Christoffel
symbol is present: a worst case for size. Reported per dimension n: the time to derive and
emit (sympy, CSE, printing; no compiler), and the emitted operations of the geodesic RHS and
the Christoffel kernel, with the growth exponent between successive dimensions
(log ratio / log ratio of n).
"""
from __future__ import annotations

import argparse
import math
import time

import metricc
from metricc.pipeline import generate


def dense_spec(n: int) -> str:
    coords = [f"x{i}" for i in range(n)]
    lines = [f'name = "dense{n}"', "coordinates = [" + ", ".join(f'"{c}"' for c in coords) + "]",
             "[parameters]", "eps = 0.1", "[metric]"]
    for i in range(n):
        for j in range(i, n):
            if i == j:
                lines.append(f'{coords[i]}.{coords[j]} = "2 + eps*sin({coords[(i + 1) % n]})^2"')
            else:
                lines.append(f'{coords[i]}.{coords[j]} = "eps*cos({coords[i]} + 2*{coords[j]})'
                             f'/{i + j + 2}"')
    return "\n".join(lines) + "\n"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--max-dim", type=int, default=8)
    args = ap.parse_args()
    print(f"{'dim':>3} {'derive+emit s':>13} {'rhs ops':>8} {'growth':>7} "
          f"{'christoffel ops':>15} {'growth':>7}")
    prev = None
    for n in range(2, args.max_dim + 1):
        spec = metricc.parse_spec(dense_spec(n))
        t = time.perf_counter()
        g = generate(spec)
        dt = time.perf_counter() - t
        rhs = g.kernels.kernel("geodesic_rhs").ops_after
        chr_ = g.kernels.kernel("christoffel").ops_after
        if prev:
            pn, prhs, pchr = prev
            gr = math.log(rhs / prhs) / math.log(n / pn)
            gc = math.log(chr_ / pchr) / math.log(n / pn)
            growth = f"{gr:7.2f} {chr_:15d} {gc:7.2f}"
        else:
            growth = f"{'':>7} {chr_:15d} {'':>7}"
        print(f"{n:3d} {dt:13.2f} {rhs:8d} {growth}")
        prev = (n, rhs, chr_)


if __name__ == "__main__":
    main()
