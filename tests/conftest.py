"""Shared fixtures: an isolated kernel cache and the shipped specs in both backends."""
from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
SPECS = ROOT / "specs"
SHIPPED = ("minkowski", "sphere", "ellipsoid", "schwarzschild", "kerr", "kerr_schild",
           "reissner_nordstrom")


_SESSION_CACHE = []


def pytest_configure(config):
    # A fresh kernel cache for the session, never the user's own (set before metricc runs).
    cache = tempfile.mkdtemp(prefix="metricc-test-cache-")
    _SESSION_CACHE.append(cache)
    os.environ["METRICC_CACHE_DIR"] = cache


def pytest_unconfigure(config):
    for cache in _SESSION_CACHE:
        shutil.rmtree(cache, ignore_errors=True)


def have_compiler() -> bool:
    from metricc.build import compiler_command
    return shutil.which(compiler_command()[0]) is not None


needs_cc = pytest.mark.skipif(not have_compiler(), reason="no C compiler")


@pytest.fixture(scope="session")
def shipped():
    """name -> {"c": MetricKernels or None, "numpy": MetricKernels} for every shipped spec."""
    import metricc
    out = {}
    for name in SHIPPED:
        entry = {"numpy": metricc.load(SPECS / f"{name}.toml", backend="numpy")}
        entry["c"] = metricc.load(SPECS / f"{name}.toml", backend="c") if have_compiler() else None
        out[name] = entry
    return out
