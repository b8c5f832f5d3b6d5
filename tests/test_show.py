"""``metricc show``: helpers by name (defined once), faithful to the kernels, LaTeX names.

The shown formulas are checked against the generated NumPy kernels, not against themselves:
every helper is written out again and the result evaluated at random points.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import sympy as sp

import metricc
from metricc import show
from metricc.cli import main
from metricc.geometry import derive
from metricc.spec import load_spec
from tests.support import random_points

SPECS = Path(__file__).resolve().parent.parent / "specs"


def _show(capsys, *args) -> str:
    assert main(["show", *map(str, args)]) == 0
    return capsys.readouterr().out


def test_kerr_schild_is_shown_in_a_few_kilobytes(capsys):
    # With every helper expanded this printed 89,882 bytes, lines up to 6,023 characters.
    text = _show(capsys, SPECS / "kerr_schild.toml")
    assert len(text.encode()) < 12_000
    assert max(len(line) for line in text.splitlines()) < 400
    assert text.count("\n  F = ") == 1                # each helper defined once, at the top
    assert text.index("\n  F = ") < text.index("metric g_{mu nu}")
    assert "g_{t x} = F*lx" in text                    # the spec's own entry, by name


def test_kerr_is_shown_in_terms_of_sigma_and_delta(capsys):
    # Expanded: 7,502 bytes, lines up to 836 characters.
    text = _show(capsys, SPECS / "kerr.toml")
    assert len(text.encode()) < 4_000
    assert max(len(line) for line in text.splitlines()) < 400
    assert "  Sigma = a^2*cos(theta)^2 + r^2\n" in text
    assert "g_{r r} = Sigma/Delta" in text
    # Boyer-Lindquist closed forms (from memory, e.g. Chandrasekhar 1983, ch. 6):
    # Gamma^r_{theta theta} = -r Delta/Sigma, Gamma^theta_{r theta} = r/Sigma.
    assert "Gamma^r_{theta theta} = -Delta*r/Sigma" in text
    assert "Gamma^theta_{r theta} = r/Sigma" in text


def _numbers(name, n=6):
    k = metricc.load(SPECS / f"{name}.toml", backend="numpy")
    x = random_points(name, np.random.default_rng(5), n)
    u = np.random.default_rng(6).normal(size=x.shape)
    return k, x, u


@pytest.mark.parametrize("name", ["kerr", "kerr_schild", "reissner_nordstrom", "ellipsoid"])
def test_shown_formulas_match_the_kernels(name):
    spec = load_spec(SPECS / f"{name}.toml")
    geo = derive(spec)
    hf = show.helper_form(geo)
    k, x, u = _numbers(name)
    dim = len(spec.coordinates)
    coords = [sp.Symbol(c, real=True) for c in spec.coordinates]
    vel = [sp.Symbol(f"d{c}", real=True) for c in spec.coordinates]
    params = {sp.Symbol(p, real=True): v for p, v in k.parameters.items()}

    g = k.metric(x)
    gamma = k.christoffel(x)                            # [a, b, c] = Gamma^a_{bc}
    acc = k.geodesic_rhs(np.concatenate([x, u], axis=1))[:, dim:]
    want = {"g": lambda i: g[:, i[0], i[1]],
            "ginv": lambda i: np.linalg.inv(g)[:, i[0], i[1]],
            "Gamma": lambda i: gamma[:, i[0], i[1], i[2]],
            # Gamma_{d bc} = g_{da} Gamma^a_{bc}; g_{ab} acc^b = -w_a; p_k = g_{k nu} u^nu
            "Gamma_first": lambda i: np.einsum("pa,pa->p", g[:, i[0]], gamma[:, :, i[1], i[2]]),
            "acc": lambda i: acc[:, i[0]],
            "w": lambda i: -np.einsum("pa,pa->p", g[:, i[0]], acc),
            "p": lambda i: np.einsum("pa,pa->p", g[:, i[0]], u)}
    scale = np.abs(g).max(axis=(1, 2)) * (1 + np.abs(u).max(axis=1) ** 2)
    checked = 0
    for part in ("metric", "inverse_metric", "christoffel", "geodesic_rhs", "conserved"):
        for kind, idx, e in show.components(geo, part, hf):
            f = sp.lambdify(coords + vel, hf.unfold(e).xreplace(params), "numpy")
            got = np.broadcast_to(f(*x.T, *u.T), len(x))
            ref = want[kind]([spec.coordinates.index(i) for i in idx])
            np.testing.assert_array_less(np.abs(got - ref), 1e-10 * (np.abs(ref) + 1e-6 * scale),
                                         err_msg=f"{kind} {idx}")
            checked += 1
    assert checked > 5


def test_latex_velocities_are_dotted_and_names_upright(capsys):
    text = _show(capsys, SPECS / "kerr.toml", "--format", "latex", "--parts", "conserved")
    # u^phi is \dot{\phi}; the bare name dphi would typeset as the product d p h i
    assert "\\dot{\\phi}" in text and "\\dot{t}" in text
    assert "dphi" not in text and "dt " not in text
    assert "\\Sigma" in text and "\\theta" in text
    text = _show(capsys, SPECS / "ellipsoid.toml", "--format", "latex")
    assert "\\mathrm{lat}" in text                     # not l a t
    assert "\\cos^{2}{\\left(\\mathrm{lat} \\right)}" in text or "\\mathrm{lat} \\right)" in text


@pytest.mark.parametrize("name, tex", [("theta", "\\theta"), ("lat", "\\mathrm{lat}"),
                                       ("r_plus", "r_{\\mathrm{plus}}"), ("x1", "x_{1}"),
                                       ("M", "M"), ("Sigma", "\\Sigma")])
def test_latex_name(name, tex):
    assert show.latex_name(name) == tex
