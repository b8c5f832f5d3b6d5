"""Large kernels: per-group translation units, heavy kernels' structure-of-arrays entries,
the slow-stage report of ``metricc build``, and (slow) a dense 8-D metric with curvature and
Jacobians.

Reference values: the NumPy backend of the same spec (an independent code path: generated
Python, numpy's libm), the algebraic symmetries of the Riemann tensor R_{abcd} = -R_{bacd} =
R_{cdab} and the first Bianchi identity R_{a[bcd]} = 0 (Misner, Thorne & Wheeler 1973, eq.
8.45), and R = g^{bd} R_{bd} (definition).
"""
from __future__ import annotations

import json

import numpy as np
import pytest

import metricc
from metricc import emit
from tests.conftest import SPECS, needs_cc

SMALL = (SPECS / "schwarzschild.toml").read_text()
X = np.array([[0.1, 6.0, 1.1, 0.3], [0.0, 9.5, 0.7, 2.0], [1.0, 4.2, 2.0, -1.0]])


def dense_spec(n: int, eps: float = 0.05) -> str:
    """A dense n-D metric: Minkowski plus eps times a sine or cosine of three coordinates in
    every entry (|perturbation| <= n*eps < 1 in norm for n <= 8, eps = 0.05, so it is never
    singular and keeps the signature). Invented for build-scale tests."""
    lines = [f'name = "dense{n}"', "coordinates = [" + ", ".join(f'"x{i}"' for i in range(n))
             + "]", 'signature = "-' + "+" * (n - 1) + '"', "[parameters]", f"e = {eps}",
             "[metric]"]
    for i in range(n):
        for j in range(i, n):
            k = (i + j + 1) % n
            eta = "-1 + " if i == j == 0 else ("1 + " if i == j else "")
            f = (f"sin(x{i} + 2*x{j} + x{k})" if (i + j) % 2 == 0
                 else f"cos(x{i} - x{j} + 0.5*x{k})")
            lines.append(f'x{i}.x{j} = "{eta}e*{f}"')
    return "\n".join(lines) + "\n"


def test_build_names_slow_stages_and_kernels(tmp_path, monkeypatch, capsys):
    from metricc import pipeline
    from metricc.cli import main
    monkeypatch.setattr(pipeline, "SLOW_STAGE_SECONDS", -1.0)   # every stage counts as slow
    (tmp_path / "p.toml").write_text(SMALL)
    assert main(["build", str(tmp_path / "p.toml"), "--out", str(tmp_path / "out"),
                 "--kernels", "curvature"]) == 0
    slow = [line for line in capsys.readouterr().out.splitlines() if "slow:" in line]
    assert len(slow) == 1
    assert "derive" in slow[0] and "emit" in slow[0]
    assert "kernels" in slow[0] and ("riemann" in slow[0] or "kretschmann" in slow[0])
    monkeypatch.setattr(pipeline, "SLOW_STAGE_SECONDS", 1e9)
    assert main(["build", str(tmp_path / "p.toml"), "--out", str(tmp_path / "out")]) == 0
    assert "slow:" not in capsys.readouterr().out


def test_group_guards_split_the_source():
    """Each optional group is a separate unit: NAME_SKIP_CORE keeps only groups' kernels."""
    from metricc.pipeline import generate
    from metricc.spec import parse_spec
    src = generate(parse_spec(SMALL), extra_kernels=("curvature", "jacobian")).sources
    c = src["schwarzschild.c"]
    for guard in ("SCHWARZSCHILD_SKIP_CORE", "SCHWARZSCHILD_SKIP_CURVATURE",
                  "SCHWARZSCHILD_SKIP_JACOBIAN"):
        assert f"#ifndef {guard}" in c
    core = c.index("#ifndef SCHWARZSCHILD_SKIP_CORE")
    curv = c.index("#ifndef SCHWARZSCHILD_SKIP_CURVATURE")
    assert c.index("schwarzschild_riemann(const") > curv > c.index("schwarzschild_metric(const") > core


@needs_cc
def test_group_units_and_heavy_soa_entries(tmp_path, monkeypatch):
    """Compiled as separate units (recorded in the manifest) and linked into one module; with
    every kernel counted as heavy, the _soa entries call the single-state function and give
    its results bit for bit."""
    monkeypatch.setenv("METRICC_CACHE_DIR", str(tmp_path / "cache"))
    monkeypatch.setattr(emit, "HEAVY_OPS", 0)
    k = metricc.loads(SMALL, backend="c", kernels=["curvature", "jacobian"])
    manifest = json.loads((k.cache_dir / "manifest.json").read_text())
    assert set(manifest["binary"]["unit_seconds"]) == {"wrappers", "kernels", "curvature",
                                                      "jacobian", "carry", "integrator"}
    source = (k.cache_dir / "schwarzschild.c").read_text()
    assert "schwarzschild_riemann(in_, params + i * params_stride, out_);" in source
    ref = metricc.loads(SMALL, backend="numpy", kernels=["curvature", "jacobian"])
    for name in ("riemann", "kretschmann", "christoffel"):
        single = np.array([getattr(k, name)(x) for x in X])
        soa = k.soa(name, np.ascontiguousarray(X.T))
        soa = np.moveaxis(np.asarray(soa), -1, 0).reshape(single.shape)
        assert np.array_equal(single, soa), name
        np.testing.assert_allclose(single, np.array([getattr(ref, name)(x) for x in X]),
                                   rtol=1e-12, atol=1e-14 * np.abs(single).max())


def _riemann_checks(k, x):
    """Symmetries and the first Bianchi identity of R_{abcd} = g_{ae} R^e_{bcd}, and the
    Ricci scalar as the trace of the Ricci tensor; tolerances relative to max |R|."""
    g = k.metric(x)
    R = np.einsum("ae,ebcd->abcd", g, k.riemann(x))
    scale = np.abs(R).max()
    tol = 1e-11 * scale
    assert np.abs(R + R.transpose(1, 0, 2, 3)).max() < tol
    assert np.abs(R + R.transpose(0, 1, 3, 2)).max() < tol
    assert np.abs(R - R.transpose(2, 3, 0, 1)).max() < tol
    bianchi = R + R.transpose(0, 2, 3, 1) + R.transpose(0, 3, 1, 2)
    assert np.abs(bianchi).max() < tol
    ric = k.ricci(x)
    assert abs(np.einsum("bd,bd->", np.linalg.inv(g), ric) - k.ricci_scalar(x)) < \
        1e-10 * np.abs(ric).max()


@pytest.mark.slow
@needs_cc
def test_dense_8d_curvature_and_jacobians_build_and_agree(tmp_path, monkeypatch):
    """The full dense 8-D build (about 95 s of CPU on a 2-core machine, 2 to 3 minutes of
    wall time: benchmarks/bench_dense_build.py) compiles, and C agrees with NumPy."""
    monkeypatch.setenv("METRICC_CACHE_DIR", str(tmp_path / "cache"))
    text = dense_spec(8)
    k = metricc.loads(text, backend="c", kernels=["curvature", "jacobian"])
    manifest = json.loads((k.cache_dir / "manifest.json").read_text())
    # the two largest curvature kernels are units of their own (at -O0, build.GROUP_OPT)
    assert {"riemann", "kretschmann", "jacobian"} <= set(manifest["binary"]["unit_seconds"])
    ref = metricc.loads(text, backend="numpy", kernels=["curvature", "jacobian"])
    x = np.array([0.3, -0.2, 0.5, 0.1, 0.7, -0.4, 0.2, 0.9])
    y = np.concatenate([x, np.linspace(0.5, -0.3, 8)])
    _riemann_checks(k, x)
    for name, arg in (("riemann", x), ("kretschmann", x), ("geodesic_jacobian", y),
                      ("hamilton_jacobian", y)):
        a, b = getattr(k, name)(arg), getattr(ref, name)(arg)
        np.testing.assert_allclose(a, b, rtol=1e-10, atol=1e-12 * np.abs(b).max())
