"""Build-step integration: depfile, --check, show, verify, cffi build script, ivp_rhs, CUDA."""
from __future__ import annotations

import os
import shutil
import subprocess
import sys

import numpy as np
import pytest

import metricc
from metricc.cli import main
from tests.conftest import SHIPPED, SPECS, needs_cc


def test_depfile_lists_outputs_spec_and_metricc(tmp_path):
    out = tmp_path / "gen"
    dep = tmp_path / "kerr.d"
    assert main(["build", str(SPECS / "kerr.toml"), str(SPECS / "sphere.toml"), "--out",
                 str(out), "--depfile", str(dep), "-q"]) == 0
    lines = [line for line in dep.read_text().splitlines() if line and not line.endswith(":")]
    assert len(lines) == 2
    # empty rules for every prerequisite, as cc -MP writes them
    empty = [line[:-1] for line in dep.read_text().splitlines() if line.endswith(":")]
    assert str(SPECS / "kerr.toml") in empty and any(e.endswith("_version.py") for e in empty)
    targets, prereqs = lines[0].split(": ")
    assert sorted(targets.split()) == sorted(str(out / f) for f in
                                             ("kerr.c", "kerr.h", "kerr_numpy.py"))
    assert prereqs.split()[0] == str(SPECS / "kerr.toml")
    assert prereqs.split()[1].endswith(os.path.join("metricc", "_version.py"))
    assert lines[1].split(": ")[1].split()[0] == str(SPECS / "sphere.toml")


def test_depfile_escapes_spaces(tmp_path):
    spec_dir = tmp_path / "my specs"
    spec_dir.mkdir()
    shutil.copy(SPECS / "sphere.toml", spec_dir / "sphere.toml")
    dep = tmp_path / "s.d"
    assert main(["build", str(spec_dir / "sphere.toml"), "--out", str(tmp_path / "o"),
                 "--depfile", str(dep), "-q"]) == 0
    assert "my\\ specs/sphere.toml" in dep.read_text()


def test_check_passes_on_fresh_output_and_fails_on_stale(tmp_path, capsys):
    out = tmp_path / "gen"
    args = ["build", str(SPECS / "schwarzschild.toml"), "--out", str(out), "-q"]
    assert main(args) == 0
    assert main(args + ["--check"]) == 0
    before = {p.name: p.stat().st_mtime_ns for p in out.iterdir()}
    stale = out / "schwarzschild.c"
    stale.write_text(stale.read_text().replace("0.5", "0.25", 1))
    capsys.readouterr()
    assert main(args + ["--check"]) == 1
    err = capsys.readouterr().err
    assert str(stale) in err and "schwarzschild.h" not in err
    (out / "schwarzschild_numpy.py").unlink()
    assert main(args + ["--check"]) == 1
    assert "schwarzschild_numpy.py" in capsys.readouterr().err
    # --check writes nothing
    assert not (out / "schwarzschild_numpy.py").exists()
    assert {p.name for p in out.iterdir()} <= set(before)


def test_show_text_matches_textbook_schwarzschild(capsys):
    assert main(["show", str(SPECS / "schwarzschild.toml")]) == 0
    text = capsys.readouterr().out
    # Closed forms of the Schwarzschild Christoffel symbols (Carroll 2004, ch. 5; the equation
    # number 5.15 is from memory), in the printer's canonical spelling and in terms of the
    # spec's helper f = 1 - 2M/r: M/(f r^2) = M/(r (r - 2M)), f M/r^2 = M (r - 2M)/r^3.
    assert "f = -2*M/r + 1" in text
    assert "Gamma^t_{t r} = M/(f*r^2)" in text
    assert "Gamma^r_{t t} = M*f/r^2" in text
    assert "Gamma^theta_{phi phi} = -sin(theta)*cos(theta)" in text
    assert "Gamma^phi_{theta phi} = cos(theta)/sin(theta)" in text
    assert "g_{theta theta} = r^2" in text
    assert text.count("Gamma^") == 9


def test_show_latex(capsys):
    assert main(["show", str(SPECS / "sphere.toml"), "--format", "latex", "--parts", "all"]) == 0
    text = capsys.readouterr().out
    assert text.count("\\begin{align*}") == 5
    assert "\\Gamma^{\\theta}_{\\phi \\phi} &= - \\sin{\\left(\\theta \\right)}" in text
    assert "g^{\\theta \\theta} &= \\frac{1}{R^{2}}" in text


def test_show_dense_metric_uses_first_kind(capsys, tmp_path):
    assert main(["show", str(SPECS / "kerr_schild.toml"), "--parts", "inverse_metric,christoffel"]) == 0
    text = capsys.readouterr().out
    assert "rank-one update" in text and "Gamma_{t t x}" in text
    from tests.test_kernels import KERR_SCHILD_RESCALED
    spec = tmp_path / "ks_rescaled.toml"
    spec.write_text(KERR_SCHILD_RESCALED)
    assert main(["show", str(spec), "--parts", "inverse_metric,christoffel"]) == 0
    text = capsys.readouterr().out
    assert "solved numerically" in text and "Gamma_{t t x}" in text


@pytest.mark.parametrize("name", SHIPPED)
def test_verify_passes_on_every_shipped_spec(name, capsys):
    assert main(["verify", str(SPECS / f"{name}.toml"), "--points", "16"]) == 0
    out = capsys.readouterr().out
    assert "FAIL" not in out and "checks passed" in out


def test_verify_fails_on_broken_generated_files(tmp_path, capsys):
    out = tmp_path / "gen"
    assert main(["build", str(SPECS / "kerr.toml"), "--out", str(out), "-q"]) == 0
    assert main(["verify", str(SPECS / "kerr.toml"), "--dir", str(out), "--points", "8"]) == 0
    capsys.readouterr()
    # Break one Christoffel output of the NumPy module: a sign flip in one component.
    mod = out / "kerr_numpy.py"
    text = mod.read_text()
    start = text.index("def christoffel(")
    i = text.index("out[..., 1] = ", start)
    broken = text[:i] + "out[..., 1] = -" + text[i + len("out[..., 1] = "):]
    assert broken != text
    mod.write_text(broken)
    assert main(["verify", str(SPECS / "kerr.toml"), "--dir", str(out), "--points", "8"]) == 1
    report = capsys.readouterr().out
    assert "FAIL" in report


@needs_cc
def test_verify_fails_on_broken_c(tmp_path, capsys):
    out = tmp_path / "gen"
    assert main(["build", str(SPECS / "schwarzschild.toml"), "--out", str(out), "-q"]) == 0
    src = out / "schwarzschild.c"
    text = src.read_text()
    start = text.index("void schwarzschild_geodesic_rhs(")
    i = text.index("out[5] = ", start)
    src.write_text(text[:i] + "out[5] = 1.000001*" + text[i + len("out[5] = "):])
    assert main(["verify", str(SPECS / "schwarzschild.toml"), "--dir", str(out),
                 "--points", "8"]) == 1
    report = capsys.readouterr().out
    assert "c and numpy agree" in report and "FAIL" in report


@needs_cc
def test_cffi_build_script_needs_no_metricc(tmp_path):
    out = tmp_path / "pkg"
    assert main(["build", str(SPECS / "kerr.toml"), "--out", str(out), "--target", "cffi",
                 "-q"]) == 0
    assert sorted(p.name for p in out.iterdir()) == ["kerr.c", "kerr.h", "kerr_cffi_build.py"]
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    subprocess.run([sys.executable, "kerr_cffi_build.py"], cwd=out, check=True, env=env,
                   capture_output=True, timeout=300)
    code = ("import sys; sys.path.insert(0, '.'); from _kerr_kernels import ffi, lib;"
            "y = ffi.new('double[8]', [0, 6.5, 1.1, 0.4, 1.3, -0.2, 0.03, 0.05]);"
            "p = ffi.new('double[2]'); lib.kerr_default_params(p); o = ffi.new('double[8]');"
            "lib.kerr_geodesic_rhs(y, p, o); print(' '.join(repr(v) for v in o));"
            "print('metricc' in sys.modules)")
    run = subprocess.run([sys.executable, "-c", code], cwd=out, env=env, check=True,
                         capture_output=True, text=True, timeout=60)
    values, imported = run.stdout.splitlines()
    assert imported == "False"
    k = metricc.load(SPECS / "kerr.toml", backend="numpy")
    np.testing.assert_allclose([float(v) for v in values.split()],
                               k.geodesic_rhs([0, 6.5, 1.1, 0.4, 1.3, -0.2, 0.03, 0.05]),
                               rtol=1e-13)


def test_ivp_rhs_plain_and_vectorized(shipped):
    from scipy.integrate import solve_ivp
    k = shipped["schwarzschild"]["numpy"]
    # a bound, slightly eccentric equatorial orbit (95% of the circular angular velocity)
    r0, f = 12.0, 1 - 2 / 12.0
    omega = 0.95 * np.sqrt(1 / r0**3)
    ut = 1 / np.sqrt(f - r0**2 * omega**2)
    y0 = np.array([0, r0, np.pi / 2, 0, ut, 0.0, 0.0, omega * ut])
    fun = k.ivp_rhs()
    a = solve_ivp(fun, (0, 200), y0, method="DOP853", rtol=1e-11, atol=1e-12)
    b = solve_ivp(fun, (0, 200), y0, method="Radau", rtol=1e-9, atol=1e-11, vectorized=True)
    np.testing.assert_allclose(a.y[:, -1], b.y[:, -1], rtol=1e-6, atol=1e-12)
    cols = np.stack([y0, y0 * 1.01], axis=1)
    assert fun(0.0, cols).shape == (8, 2)
    np.testing.assert_array_equal(fun(0.0, cols)[:, 0], fun(0.0, y0))
    h = k.ivp_rhs(params={"M": 2.0}, form="hamilton")
    z = k.momenta(y0)
    np.testing.assert_array_equal(h(0.0, z), k.hamilton_rhs(z, params={"M": 2.0}))


NVCC = shutil.which("nvcc")


@pytest.mark.skipif(NVCC is None, reason="nvcc not installed")
def test_header_and_source_compile_as_cuda_device_code(tmp_path):
    out = tmp_path / "gen"
    assert main(["build", str(SPECS / "kerr.toml"), "--out", str(out), "--target", "c",
                 "-q"]) == 0
    (out / "use.cu").write_text(
        '#define KERR_FN __host__ __device__\n#include "kerr.c"\n'
        "__global__ void rhs(const double *y, const double *p, double *out, int n)\n"
        "{ int i = blockIdx.x * blockDim.x + threadIdx.x;\n"
        "  if (i < n) kerr_geodesic_rhs(y + 8 * i, p, out + 8 * i); }\n")
    run = subprocess.run([NVCC, "-c", "use.cu", "-o", "use.o"], cwd=out, capture_output=True,
                         text=True, timeout=600)
    assert run.returncode == 0, run.stderr[-2000:]
