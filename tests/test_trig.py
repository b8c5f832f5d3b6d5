"""The generated C files' own sin and cos (metricc.emit_trig) against mpmath and libm."""
from __future__ import annotations

import math
import platform
import shutil
import subprocess
import sys

import mpmath
import numpy as np
import pytest

import metricc
from metricc import emit_trig
from metricc.emit import emit
from metricc.geometry import derive
from metricc.kernels import build_kernels
from metricc.spec import parse_spec
from tests.conftest import needs_cc

# A 2-D metric of our own whose kernels call sin and cos of both coordinates and are regular
# for every real x, y (so any argument, huge or zero, is a fair input).
WAVY = """
name = "wavy"
coordinates = ["x", "y"]
signature = "++"
line_element = "(2 + sin(x))*dx^2 + (2 + cos(x)*sin(y))*dy^2"
"""

HARNESS = r"""
#include <stdio.h>
#include <stdlib.h>
#include "wavy.c"
int main(void)
{
    size_t n, i;
    double *x, *out;
    if (fread(&n, sizeof n, 1, stdin) != 1) return 1;
    x = malloc(n * sizeof *x);
    out = malloc(2 * n * sizeof *out);
    if (fread(x, sizeof *x, n, stdin) != n) return 1;
    for (i = 0; i < n; ++i) {
        out[i] = wavy_sin(x[i]);
        out[n + i] = wavy_cos(x[i]);
    }
    fwrite(out, sizeof *out, 2 * n, stdout);
    return 0;
}
"""


def _ulp_error(got: float, exact: mpmath.mpf) -> float:
    """|got - exact| in units of the last place of the double nearest exact."""
    ref = float(exact)
    ulp = math.ulp(ref) if ref != 0.0 else math.ulp(0.0)
    return float(abs(mpmath.mpf(got) - exact)) / ulp


def _arguments() -> np.ndarray:
    """Typical angles, large ones up to the polynomial's range, the doubles nearest k pi/2
    (where sin or cos is smallest and the reduction is hardest) and their neighbours, and
    tiny ones."""
    rng = np.random.default_rng(11)
    mpmath.mp.prec = 200
    ks = np.unique(np.concatenate([np.arange(1, 400), rng.integers(400, 333000, 400)]))
    near = np.array([float(int(k) * mpmath.pi / 2) for k in ks])
    return np.concatenate([
        rng.uniform(-8.0, 8.0, 4000),
        rng.uniform(-emit_trig.RANGE, emit_trig.RANGE, 2000),
        near, -near, np.nextafter(near, 0.0), np.nextafter(near, np.inf),
        10.0 ** rng.uniform(-300, -1, 300), [5e-324, -5e-324, 1e-8, 0.7853981633974483],
    ])


def _compile_harness(tmp_path, extra_flags=()) -> list[str]:
    cc = shutil.which("cc") or shutil.which("gcc")
    sources = emit(build_kernels(derive(parse_spec(WAVY, "wavy.toml"))), targets=("c",))
    for filename, text in sources.files.items():
        (tmp_path / filename).write_text(text)
    (tmp_path / "harness.c").write_text(HARNESS)
    exe = tmp_path / "harness"
    subprocess.run([cc, "-std=c99", "-O2", "-Wall", "-Wextra", "-Werror", *extra_flags,
                    "harness.c", "-o", str(exe), "-lm"], cwd=tmp_path, check=True,
                   capture_output=True, timeout=300)
    return [str(exe)]


def _run(cmd, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    x = np.ascontiguousarray(x, dtype=float)
    raw = subprocess.run(cmd, input=np.uint64(len(x)).tobytes() + x.tobytes(),
                         capture_output=True, check=True, timeout=120).stdout
    out = np.frombuffer(raw, dtype=float)
    return out[:len(x)], out[len(x):]


def test_constants_against_mpmath():
    """pi/2 = P1 + P2 + P3 to about 2^-120 (mpmath), P1 and P2 with at most 33 significant
    bits (so k P1 and k P2 are exact for |k| < 2^20), 2/pi and the Taylor coefficients the
    doubles nearest their exact values."""
    mpmath.mp.prec = 300
    total = mpmath.mpf(emit_trig.PIO2_1) + emit_trig.PIO2_2 + emit_trig.PIO2_3
    assert abs(total - mpmath.pi / 2) < mpmath.mpf(2) ** -120
    for part in (emit_trig.PIO2_1, emit_trig.PIO2_2):
        mantissa, _ = math.frexp(part)
        assert (mantissa * 2 ** 33).is_integer()
    assert emit_trig.TWO_OVER_PI == float(2 / mpmath.pi)
    assert emit_trig.ROUND_MAGIC == 1.5 * 2 ** 52
    assert emit_trig.RANGE * emit_trig.TWO_OVER_PI < 2 ** 19
    for n, c in zip(range(3, 18, 2), emit_trig._series(3, emit_trig.SIN_DEGREE)):
        assert c == float(mpmath.mpf(-1) ** (n // 2) / mpmath.factorial(n))
    for n, c in zip(range(4, 19, 2), emit_trig._series(4, emit_trig.COS_DEGREE)):
        assert c == float(mpmath.mpf(-1) ** (n // 2) / mpmath.factorial(n))
    # the first omitted Taylor terms at pi/4 are far below half an ulp of sin, cos there
    r = mpmath.pi / 4
    assert r ** 19 / mpmath.factorial(19) < 1e-19 and r ** 20 / mpmath.factorial(20) < 1e-19


@needs_cc
def test_sin_cos_within_two_ulp_of_mpmath(tmp_path):
    cmd = _compile_harness(tmp_path)
    x = _arguments()
    s, c = _run(cmd, x)
    mpmath.mp.prec = 200
    worst_s = max(_ulp_error(float(si), mpmath.sin(mpmath.mpf(float(xi)))) for xi, si in zip(x, s))
    worst_c = max(_ulp_error(float(ci), mpmath.cos(mpmath.mpf(float(xi)))) for xi, ci in zip(x, c))
    assert worst_s <= 2.0 and worst_c <= 2.0, (worst_s, worst_c)


@needs_cc
def test_special_and_out_of_range_arguments_follow_libm(tmp_path):
    """Zero keeps its sign; infinities, NaN and |x| > 2^19 give libm's values (Python's
    math.sin and math.cos call the same C library)."""
    cmd = _compile_harness(tmp_path)
    finite = np.array([0.0, -0.0, 1e6, -7e5, 524288.5, 1e300, -1e300])
    s, c = _run(cmd, finite)
    for xi, si, ci in zip(finite, s, c):
        assert si == math.sin(xi) and math.copysign(1.0, si) == math.copysign(1.0, math.sin(xi))
        assert ci == math.cos(xi)
    s, c = _run(cmd, np.array([np.inf, -np.inf, np.nan]))
    assert np.isnan(s).all() and np.isnan(c).all()


@needs_cc
def test_libm_trig_switch_gives_libm_bits(tmp_path):
    cmd = _compile_harness(tmp_path, ["-DWAVY_LIBM_TRIG"])
    x = np.random.default_rng(12).uniform(-100.0, 100.0, 500)
    s, c = _run(cmd, x)
    assert [float(v) for v in s] == [math.sin(v) for v in x]
    assert [float(v) for v in c] == [math.cos(v) for v in x]


# sin of a call and a call of sin: these sin/cos run in the tile's plain call loop, through
# the checked scalar functions, after the vectorised ones
NESTED = WAVY.replace('"wavy"', '"nested"').replace(
    '(2 + sin(x))*dx^2', '(2 + sin(x) + sin(exp(x/4))/2)*dx^2').replace(
    '(2 + cos(x)*sin(y))*dy^2', '(2 + cos(x)*exp(sin(y)/3))*dy^2')


@needs_cc
@pytest.mark.parametrize("text", [WAVY, NESTED], ids=["direct", "nested"])
def test_tiles_with_out_of_range_lanes_match_the_single_state_kernel(text):
    """The tiled right-hand sides run the polynomial over a whole tile and redo the lanes
    outside its range with libm: every state still gets the single-state kernel's bits, and
    agrees with the NumPy backend (numpy's sin and cos) to rounding."""
    k = metricc.loads(text, backend="c", path="spec.toml")
    knp = metricc.loads(text, backend="numpy", path="spec.toml")
    ffi, lib = k._c.ffi, k._c.lib
    rng = np.random.default_rng(13)
    n = 37
    y = rng.normal(size=(n, 4))
    y[:, :2] = rng.uniform(-4.0, 4.0, (n, 2))
    y[3, 0], y[5, 1], y[8, 0], y[17, 1] = 0.0, -0.0, 1e6, -3e5
    y[10, 0], y[20, 0], y[21, 1], y[25, 1] = 1e300, 524288.0, 524289.0, 1e22
    y[33, 0] = 1e300              # in the partial last tile
    for kernel in ("geodesic_rhs", "hamilton_rhs"):
        batch = k._call(kernel, y, None).reshape(n, -1)
        single = getattr(lib, f"{k.name}_{kernel}")
        for i in range(n):
            out = np.empty(4)
            single(ffi.from_buffer("double[]", np.ascontiguousarray(y[i])), ffi.NULL,
                   ffi.from_buffer("double[]", out))
            np.testing.assert_array_equal(batch[i], out, err_msg=f"{kernel} state {i}")
        ref = knp._call(kernel, y, None).reshape(n, -1)
        # exp of a huge argument overflows in both backends (sin(inf) is NaN): same places
        np.testing.assert_array_equal(np.isfinite(batch), np.isfinite(ref))
        rows = np.isfinite(ref).all(axis=1)
        scale = np.max(np.abs(ref[rows]), axis=1, keepdims=True)
        assert np.max(np.abs(batch[rows] - ref[rows]) / scale) < 1e-13, kernel


@needs_cc
@pytest.mark.skipif(not (sys.platform == "linux" and platform.machine() == "x86_64"),
                    reason="libmvec vector math needs x86-64 Linux")
def test_vector_math_build_with_nested_calls_stays_within_a_few_ulp():
    """In a vector-math build the plain call loop (exp here) may use glibc's vector
    functions, within 4 ulp of libm's (glibc's documented bound); sin and cos keep their
    polynomial. The outputs stay within a few ulp of the plain build's."""
    try:
        kv = metricc.loads(NESTED, backend="c", path="spec.toml", vector_math=True)
    except metricc.BuildError as exc:  # e.g. no libmvec on this system
        pytest.skip(f"vector-math build failed: {exc}")
    k = metricc.loads(NESTED, backend="c", path="spec.toml")
    y = np.random.default_rng(15).uniform(-3.0, 3.0, (4096, 4))
    for kernel in ("geodesic_rhs", "hamilton_rhs"):
        ref = k._call(kernel, y, None).reshape(len(y), -1)
        vec = kv.soa(kernel, np.ascontiguousarray(y.T)).T
        scale = np.max(np.abs(ref), axis=1, keepdims=True) + 1e-300
        assert np.max(np.abs(vec - ref) / scale) < 16 * np.finfo(float).eps, kernel
