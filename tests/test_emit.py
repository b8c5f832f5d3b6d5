"""Generated sources: headers, determinism, plain-C compilation and a C driver."""
from __future__ import annotations

import os
import shutil
import subprocess
import sys

import numpy as np
import pytest

import metricc
from metricc._version import __version__
from metricc.pipeline import generate
from metricc.spec import load_spec
from tests.conftest import ROOT, SHIPPED, SPECS, needs_cc

CC = shutil.which(os.environ.get("CC", "cc")) or shutil.which("gcc")
STRICT = ["-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", "-O2"]


@pytest.fixture(scope="module")
def generated():
    return {name: generate(load_spec(SPECS / f"{name}.toml")) for name in SHIPPED}


def test_files_and_headers(generated):
    for name, g in generated.items():
        files = g.sources.files
        assert sorted(files) == sorted([f"{name}.h", f"{name}.c", f"{name}_numpy.py"])
        for text in files.values():
            head = "\n".join(text.splitlines()[:4])
            assert f"metricc {__version__}" in head
            assert g.spec.sha256 in head
            assert "DO NOT EDIT" in head


def test_numpy_module_imports_only_numpy(generated):
    for name, g in generated.items():
        src = g.sources[f"{name}_numpy.py"]
        imports = [line for line in src.splitlines() if line.startswith(("import", "from"))]
        assert imports == ["import numpy as np"]


def test_same_spec_same_bytes_across_processes_and_hash_seeds(tmp_path):
    outs = []
    for seed in ("0", "1", "12345"):
        out = tmp_path / seed
        env = dict(os.environ, PYTHONHASHSEED=seed, PYTHONPATH=str(ROOT))
        subprocess.run([sys.executable, "-m", "metricc", "build", str(SPECS / "kerr.toml"),
                        str(SPECS / "kerr_schild.toml"), "--out", str(out), "-q"],
                       check=True, env=env, timeout=300)
        outs.append({p.name: p.read_bytes() for p in sorted(out.iterdir())})
    assert outs[0] == outs[1] == outs[2]
    assert len(outs[0]) == 6


@needs_cc
@pytest.mark.parametrize("name", SHIPPED)
def test_c_compiles_warning_free_without_python_headers(generated, tmp_path, name):
    g = generated[name]
    for fname, text in g.sources.files.items():
        (tmp_path / fname).write_text(text)
    subprocess.run([CC, *STRICT, "-c", f"{name}.c", "-o", f"{name}.o"], cwd=tmp_path,
                   check=True, capture_output=True, timeout=120)
    # Exported symbols all carry the spec's prefix.
    nm = shutil.which("nm")
    if nm:
        out = subprocess.run([nm, "-g", "--defined-only", f"{name}.o"], cwd=tmp_path,
                             capture_output=True, text=True, check=True).stdout
        symbols = [line.split()[-1] for line in out.splitlines() if line.strip()]
        assert symbols and all(s.startswith(f"{name}_") for s in symbols), symbols


@needs_cc
def test_header_compiles_as_cplusplus(generated, tmp_path):
    gxx = shutil.which("g++") or shutil.which("c++")
    if not gxx:
        pytest.skip("no C++ compiler")
    g = generated["kerr"]
    (tmp_path / "kerr.h").write_text(g.sources["kerr.h"])
    (tmp_path / "use.cpp").write_text('#include "kerr.h"\nint main() { double p[2]; '
                                      'kerr_default_params(p); return 0; }\n')
    subprocess.run([gxx, "-Wall", "-Wextra", "-Werror", "-c", "use.cpp"], cwd=tmp_path,
                   check=True, capture_output=True, timeout=120)


DRIVER = r"""
#include <stdio.h>
#include "kerr.h"
#include "schwarzschild.h"

int main(void)
{
    double y[8] = {0.0, 6.5, 1.1, 0.4, 1.3, -0.2, 0.03, 0.05};
    double p[KERR_NPARAMS], out[8], gam[64];
    double ys[16], ps[2 * KERR_NPARAMS], outs[16];
    double sp[1] = {1.0};
    int i;
    kerr_default_params(p);
    kerr_geodesic_rhs(y, p, out);
    for (i = 0; i < 8; ++i) printf("%.17g\n", out[i]);
    kerr_christoffel(y, p, gam);
    for (i = 0; i < 64; ++i) printf("%.17g\n", gam[i]);
    /* batch with one parameter vector per state */
    for (i = 0; i < 8; ++i) { ys[i] = y[i]; ys[8 + i] = y[i]; }
    ps[0] = 1.0; ps[1] = 0.5; ps[2] = 2.0; ps[3] = -0.3;
    kerr_geodesic_rhs_batch(2, ys, ps, KERR_NPARAMS, outs);
    for (i = 0; i < 16; ++i) printf("%.17g\n", outs[i]);
    schwarzschild_geodesic_rhs(y, sp, out);
    for (i = 0; i < 8; ++i) printf("%.17g\n", out[i]);
    return 0;
}
"""


@needs_cc
def test_c_driver_reproduces_python_values(generated, tmp_path):
    for name in ("kerr", "schwarzschild"):
        for fname, text in generated[name].sources.files.items():
            (tmp_path / fname).write_text(text)
    (tmp_path / "driver.c").write_text(DRIVER)
    subprocess.run([CC, *STRICT, "driver.c", "kerr.c", "schwarzschild.c", "-o", "driver",
                    "-lm"], cwd=tmp_path, check=True, capture_output=True, timeout=120)
    run = subprocess.run([str(tmp_path / "driver")], capture_output=True, text=True,
                         check=True, timeout=60)
    values = np.array([float(v) for v in run.stdout.split()])
    y = np.array([0.0, 6.5, 1.1, 0.4, 1.3, -0.2, 0.03, 0.05])
    for backend in ("c", "numpy"):
        kerr = metricc.load(SPECS / "kerr.toml", backend=backend)
        schw = metricc.load(SPECS / "schwarzschild.toml", backend=backend)
        expect = np.concatenate([
            kerr.geodesic_rhs(y), kerr.christoffel(y[:4]).ravel(),
            kerr.geodesic_rhs(np.stack([y, y]), params={"M": np.array([1.0, 2.0]),
                                                        "a": np.array([0.5, -0.3])}).ravel(),
            schw.geodesic_rhs(y)])
        np.testing.assert_allclose(values, expect, rtol=1e-13, atol=1e-15)


ODD_NAMES = """
name = "odd"
coordinates = ["out", "y", "x"]
[parameters]
params = 1.5
n = 2.0
[define]
shape = "params*out"
[metric]
out.out = "1 + shape^2"
y.y = "n + x^2"
x.x = "1 + out^2"
x.y = "0.1*params"
"""


def test_generated_identifiers_never_use_spec_names(tmp_path):
    # Coordinates and parameters named like the generated code's own arguments and locals.
    g = generate(metricc.parse_spec(ODD_NAMES))
    c = g.sources["odd.c"]
    assert "const double params =" not in c and "double out =" not in c
    if CC:
        for fname, body in g.sources.files.items():
            (tmp_path / fname).write_text(body)
        subprocess.run([CC, *STRICT, "-c", "odd.c"], cwd=tmp_path, check=True,
                       capture_output=True, timeout=120)
    k = metricc.loads(ODD_NAMES, backend="numpy")
    x = np.array([0.3, -0.2, 0.7])
    g_ = k.metric(x, params={"params": 2.0})
    np.testing.assert_allclose(g_, [[1 + (2.0 * 0.3) ** 2, 0, 0], [0, 2.0 + 0.49, 0.2],
                                    [0, 0.2, 1 + 0.09]], rtol=1e-15)


INTEGRATOR_DRIVER = r"""
#include <stdio.h>
#include <math.h>
#include "schwarzschild.h"

int main(void)
{
    /* photons from r = 1000 M in the equatorial plane, impact parameters 5.0 and 5.4
       (the capture threshold is 3 sqrt(3) M = 5.196 M) */
    const double r0 = 1000.0, f = 1.0 - 2.0 / r0, b[2] = {5.0, 5.4};
    double y0[16], y[16], lam[2], p[1] = {1.0}, samples[3] = {0.0, 500.0, 1000.0}, s[2 * 3 * 8];
    int status[2], i;
    long steps[2];
    schwarzschild_integrator_options opt;
    for (i = 0; i < 2; ++i) {
        double *q = y0 + 8 * i;
        q[0] = 0.0; q[1] = r0; q[2] = 1.5707963267948966; q[3] = 0.0;
        q[4] = 1.0 / f; q[6] = 0.0; q[7] = b[i] / (r0 * r0);
        q[5] = -sqrt(f * (f * q[4] * q[4] - r0 * r0 * q[7] * q[7]));
    }
    opt.rtol = 1e-10; opt.atol = 1e-12; opt.max_steps = 100000;
    opt.method = SCHWARZSCHILD_METHOD_DOP853; opt.form = SCHWARZSCHILD_FORM_GEODESIC;
    opt.event_mask = 1UL << SCHWARZSCHILD_EVENT_horizon; opt.threads = 1;
    schwarzschild_integrate(2, y0, 3000.0, p, 0, &opt, 3, samples, y, lam, status, steps, s);
    for (i = 0; i < 2; ++i)
        printf("%d %ld %.17g %.17g %.17g\n", status[i], steps[i], lam[i], y[8 * i + 1], s[(3 * i + 2) * 8 + 1]);
    return 0;
}
"""


@needs_cc
def test_standalone_c_integrator_matches_python(generated, tmp_path):
    for fname, text in generated["schwarzschild"].sources.files.items():
        (tmp_path / fname).write_text(text)
    (tmp_path / "orbit.c").write_text(INTEGRATOR_DRIVER)
    subprocess.run([CC, *STRICT, "orbit.c", "schwarzschild.c", "-o", "orbit", "-lm"],
                   cwd=tmp_path, check=True, capture_output=True, timeout=120)
    run = subprocess.run([str(tmp_path / "orbit")], capture_output=True, text=True, check=True,
                         timeout=60)
    rows = [line.split() for line in run.stdout.splitlines()]
    # photon 1 (b < 3 sqrt 3 M) is captured, photon 2 escapes (MTW 1973, sec. 25.6)
    assert [int(r[0]) for r in rows] == [16, 0]
    k = metricc.load(SPECS / "schwarzschild.toml")
    r0, f = 1000.0, 1 - 2 / 1000.0
    y0 = np.zeros((2, 8))
    y0[:, 1], y0[:, 2], y0[:, 4] = r0, np.pi / 2, 1 / f
    y0[:, 7] = np.array([5.0, 5.4]) / r0**2
    y0[:, 5] = -np.sqrt(f * (f * y0[:, 4] ** 2 - r0**2 * y0[:, 7] ** 2))
    res = k.integrate(y0, 3000.0, samples=[0.0, 500.0, 1000.0], threads=1)
    assert list(res.status) == ["horizon", "done"]
    np.testing.assert_array_equal(res.steps, [int(r[1]) for r in rows])
    np.testing.assert_allclose(res.lam, [float(r[2]) for r in rows], rtol=1e-12)
    np.testing.assert_allclose(res.y[:, 1], [float(r[3]) for r in rows], rtol=1e-12)
    np.testing.assert_allclose(res.samples[:, 2, 1], [float(r[4]) for r in rows], rtol=1e-12)
