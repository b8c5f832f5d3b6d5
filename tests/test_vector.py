"""Structure-of-arrays entry points and the optional vector-math (libmvec) build."""
from __future__ import annotations

import platform
import shutil
import subprocess
import sys

import numpy as np
import pytest

import metricc
from metricc.cli import main
from tests.conftest import SHIPPED, SPECS, needs_cc
from tests.support import random_params, random_states

LIBMVEC = sys.platform == "linux" and platform.machine() == "x86_64"
KERNELS = ("metric", "christoffel", "geodesic_rhs", "hamilton_rhs", "norm")


@needs_cc
@pytest.mark.parametrize("name", SHIPPED)
def test_soa_equals_the_scalar_kernels(shipped, name):
    """The C structure-of-arrays loop computes bit for bit what the batch kernel computes; the
    NumPy backend's soa (a transposed call) agrees with C to rounding."""
    k, knp = shipped[name]["c"], shipped[name]["numpy"]
    rng = np.random.default_rng(3)
    y = random_states(name, rng, 257)
    p = random_params(name, rng, 257)
    for kernel in KERNELS:
        arr = y[:, :k.dim] if kernel in ("metric", "christoffel") else y
        aos = k._call(kernel, arr, p).reshape(len(y), -1)
        cols = np.ascontiguousarray(arr.T)
        np.testing.assert_array_equal(k.soa(kernel, cols, p).T, aos, err_msg=kernel)
        scale = np.max(np.abs(aos), axis=1, keepdims=True) + 1e-300
        assert np.max(np.abs(knp.soa(kernel, cols, p).T - aos) / scale) < 1e-12, kernel


@needs_cc
@pytest.mark.skipif(not LIBMVEC, reason="libmvec vector math needs x86-64 Linux")
@pytest.mark.parametrize("name", ["kerr", "ellipsoid", "sphere"])
def test_vector_math_build_stays_within_a_few_ulp(name):
    try:
        kv = metricc.load(SPECS / f"{name}.toml", vector_math=True)
    except metricc.BuildError as exc:  # e.g. no libmvec on this system
        pytest.skip(f"vector-math build failed: {exc}")
    k = metricc.load(SPECS / f"{name}.toml")
    rng = np.random.default_rng(4)
    y = random_states(name, rng, 4096)
    for kernel in KERNELS:
        arr = y[:, :k.dim] if kernel in ("metric", "christoffel") else y
        ref = k._call(kernel, arr, None).reshape(len(y), -1)
        vec = kv.soa(kernel, np.ascontiguousarray(arr.T)).T
        # Vector sin/cos differ from libm's by at most 4 ulp (glibc's documented bound); the
        # outputs then agree to a few ulp of their magnitude (cancellation can make a small
        # component's own relative error larger).
        scale = np.max(np.abs(ref), axis=1, keepdims=True) + 1e-300
        assert np.max(np.abs(vec - ref) / scale) < 16 * np.finfo(float).eps, kernel


@needs_cc
def test_standalone_vector_math_compiles_warning_free(tmp_path):
    cc = shutil.which("cc") or shutil.which("gcc")
    assert main(["build", str(SPECS / "kerr.toml"), "--out", str(tmp_path), "--target", "c",
                 "-q"]) == 0
    subprocess.run([cc, "-std=c99", "-Wall", "-Wextra", "-Werror", "-O3", "-fopenmp-simd",
                    "-DKERR_VECTOR_MATH", "-fno-builtin-sin", "-fno-builtin-cos", "-c",
                    "kerr.c"], cwd=tmp_path, check=True, capture_output=True, timeout=300)


@needs_cc
@pytest.mark.parametrize("name", SHIPPED)
def test_tiled_batch_equals_the_single_state_kernel(shipped, name):
    """The batch kernels run tiles (library calls first, then vectorised arithmetic); every
    state must still get bit for bit what the single-state C function gives it, in full
    tiles and in the partial last one, with shared and per-state parameters."""
    k = shipped[name]["c"]
    ffi, lib = k._c.ffi, k._c.lib
    rng = np.random.default_rng(5)
    n = 37                      # two full tiles of 16 and a partial one
    y = random_states(name, rng, n)
    per_state = random_params(name, rng, n)
    for kernel in KERNELS:
        arr = np.ascontiguousarray(y[:, :k.dim] if kernel in ("metric", "christoffel") else y)
        for params in (None, per_state):
            batch = k._call(kernel, arr, params).reshape(n, -1)
            given = k._params(params, (n,))
            pmat = np.array([[float(np.broadcast_to(given.get(p, d), (n,))[i])
                              for p, d in k.parameters.items()] or [0.0] for i in range(n)])
            single = getattr(lib, f"{k.name}_{kernel}")
            for i in range(n):
                out = np.empty(batch.shape[1])
                single(ffi.from_buffer("double[]", np.ascontiguousarray(arr[i])),
                       ffi.from_buffer("double[]", np.ascontiguousarray(pmat[i])),
                       ffi.from_buffer("double[]", out))
                np.testing.assert_array_equal(batch[i], out, err_msg=f"{kernel} state {i}")
