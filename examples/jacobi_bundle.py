"""Tidal stretching and squeezing of a small dust cloud falling into a Schwarzschild black hole,
from Jacobi fields (the variations of a geodesic family) carried by the integrator.

    python examples/jacobi_bundle.py [--r0 10] [--steps 6] [--backend auto|c|numpy]

A particle is dropped from rest at r0 (M = 1, geodesic form, affine parameter = proper time).
Two neighbours are followed through the linearised equations (``variations=``):

* transverse: released at the same r0 but at theta + dtheta; the direction is
  [xi, dxi/dtau] = [d_theta, 0]. Radial geodesics at different theta fall alike, so the
  physical separation is r(tau) dtheta exactly: it shrinks as r(tau)/r0 (tidal squeeze);
* radial: released from rest at r0 + dr; the direction [d_r, d(u^t)/dr] keeps the neighbour
  at rest (u^t = 1/sqrt(1 - 2M/r)). Its physical separation grows (tidal stretch); it is
  compared with the difference of two full integrations started dr = 1e-5 apart.

The physical separation is the length of xi's part orthogonal to u:
xi_perp = xi + g(xi, u) u (g(u, u) = -1), length sqrt(g(xi_perp, xi_perp)).
"""
from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np

import metricc

SPEC = Path(__file__).resolve().parent.parent / "specs" / "schwarzschild.toml"


def separation(k, y, xi):
    """Length of the part of xi (..., 4) orthogonal to the unit timelike u of y (..., 8)."""
    g = k.metric(y[..., :4])
    u = y[..., 4:]
    xi_perp = xi + np.einsum("...i,...ij,...j->...", xi, g, u)[..., None] * u
    return np.sqrt(np.einsum("...i,...ij,...j->...", xi_perp, g, xi_perp))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--r0", type=float, default=10.0, help="release radius in units of M")
    ap.add_argument("--steps", type=int, default=6, help="rows of the table")
    ap.add_argument("--backend", default="auto", choices=("auto", "c", "numpy"))
    args = ap.parse_args()
    k = metricc.load(SPEC, backend=args.backend)
    M, r0 = 1.0, args.r0
    f0 = 1.0 - 2.0 * M / r0
    y0 = np.array([0.0, r0, np.pi / 2, 0.0, 1.0 / np.sqrt(f0), 0.0, 0.0, 0.0])
    dut_dr = -(M / r0**2) * f0**-1.5                      # d/dr of 1/sqrt(1 - 2M/r)
    directions = np.array([[0, 0, 1, 0, 0, 0, 0, 0],     # transverse: d_theta
                           [0, 1, 0, 0, dut_dr, 0, 0, 0]], dtype=float)   # radial, at rest
    # proper time to fall from rest at r0 to r = 0: pi/2 sqrt(r0^3/2M) (MTW 1973, eq. 25.28);
    # stop well before the horizon event at 2.02 M
    tau = np.linspace(0.0, 0.9 * np.pi / 2 * np.sqrt(r0**3 / (2 * M)), args.steps + 1)[1:]
    res = k.integrate(y0, tau[-1], variations=directions, samples=tau, rtol=1e-11)
    ys, xis = res.samples, res.variations_samples[..., :4]        # (S, 8), (S, 2, 4)
    transverse = separation(k, ys, xis[:, 0]) / separation(k, y0, directions[0, :4])
    radial = separation(k, ys, xis[:, 1]) / separation(k, y0, directions[1, :4])
    # the radial neighbour the long way: two full integrations dr apart
    dr = 1e-5
    pair = np.stack([y0, y0])
    pair[:, 1] += [dr / 2, -dr / 2]
    pair[:, 4] = 1.0 / np.sqrt(1.0 - 2.0 * M / pair[:, 1])
    both = k.integrate(pair, tau[-1], samples=tau, rtol=1e-11).samples     # (2, S, 8)
    fd = separation(k, ys, (both[0, :, :4] - both[1, :, :4]) / dr) / separation(
        k, y0, directions[1, :4])
    print(f"Schwarzschild M = 1, dust dropped from rest at r0 = {r0:g} M ({k.backend} backend)")
    print(f"{'tau':>8} {'r':>8} {'transverse':>11} {'r/r0':>11} {'radial':>11} {'two runs':>11}")
    for i, t in enumerate(tau):
        print(f"{t:8.3f} {ys[i, 1]:8.4f} {transverse[i]:11.8f} {ys[i, 1] / r0:11.8f} "
              f"{radial[i]:11.6f} {fd[i]:11.6f}")


if __name__ == "__main__":
    main()
