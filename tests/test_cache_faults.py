"""Damaged cache entries are detected and rebuilt; killed builders leave nothing behind.

Each damaged entry is loaded in a fresh interpreter (a damaged shared object must never be
mapped into the test process: a truncated one can fault with SIGBUS). The child pins the
generator fingerprint of this process, so it finds the same cache entry even while the
checkout's sources change. Reference values: the NumPy backend of the same spec, and for the
2-D metric below the closed form Gamma^u_{vv} = -u / (1 + k v^2), from the textbook formula
Gamma^a_{bc} = 1/2 g^{ad} (d_b g_dc + d_c g_db - d_d g_bc) (common practice).
"""
from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
import time

import numpy as np
import pytest

import metricc
from metricc import build
from tests.conftest import ROOT, needs_cc
from tests.test_build import _small_spec

X = [0.3, 0.7]


def _spec_text(tag: str) -> str:
    return _small_spec(f"fault_{tag}")   # u.u = 1 + k v^2, v.v = 1 + u^2, k = 0.5


def _gamma_u_vv(x=X, k=0.5):
    """Gamma^u_{vv} = -1/2 g^{uu} d_u g_vv = -u / (1 + k v^2)."""
    return -x[0] / (1 + k * x[1] ** 2)


def _entry(tmp_path, monkeypatch, tag: str, binary: bool = True):
    monkeypatch.setenv("METRICC_CACHE_DIR", str(tmp_path / "cache"))
    spec = metricc.parse_spec(_spec_text(tag))
    entry = build.ensure_sources(spec)
    return build.ensure_binary(entry) if binary else entry


def _child(tmp_path, tag: str, backend: str, env_extra=None) -> subprocess.CompletedProcess:
    code = textwrap.dedent(f"""
        import json, warnings
        from metricc import build
        build._FINGERPRINT.append({build.generator_fingerprint()!r})
        import metricc
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            k = metricc.loads({_spec_text(tag)!r}, backend={backend!r})
        print(json.dumps({{"backend": k.backend, "gamma": k.christoffel({X!r}).tolist(),
                          "warnings": [str(w.message) for w in caught]}}))
        """)
    env = dict(os.environ, PYTHONPATH=str(ROOT), METRICC_CACHE_DIR=str(tmp_path / "cache"),
               **(env_extra or {}))
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          env=env, timeout=300)


def _ok(proc, backend: str) -> dict:
    assert proc.returncode == 0, (proc.returncode, proc.stderr[-2000:])
    out = json.loads(proc.stdout.strip().splitlines()[-1])
    assert out["backend"] == backend
    assert out["gamma"][0][1][1] == pytest.approx(_gamma_u_vv(), rel=1e-14)
    return out


def _binary(entry) -> os.PathLike:
    return entry.directory / entry.manifest["binary"]["file"]


@needs_cc
@pytest.mark.parametrize("damage", ["truncated", "garbage", "other_spec"])
def test_damaged_binary_is_rebuilt(tmp_path, monkeypatch, damage):
    entry = _entry(tmp_path, monkeypatch, "bin")
    path = _binary(entry)
    size = path.stat().st_size
    if damage == "truncated":   # ELF headers intact, segments cut off: mapped, would SIGBUS
        os.truncate(path, size // 3)
    elif damage == "garbage":
        path.write_bytes(np.random.default_rng(1).bytes(size))
    else:
        other = _entry(tmp_path, monkeypatch, "other")
        path.write_bytes(_binary(other).read_bytes())
    out = _ok(_child(tmp_path, "bin", "c"), "c")
    assert out["warnings"] == []
    # The next load is warm again: the rebuilt binary matches its recorded checksum.
    fresh = build.lookup(metricc.parse_spec(_spec_text("bin")))
    assert build.file_sha256(_binary(fresh)) == fresh.manifest["binary"]["sha256"]


@needs_cc
def test_damaged_sources_are_regenerated(tmp_path, monkeypatch):
    entry = _entry(tmp_path, monkeypatch, "src")
    name = entry.manifest["name"]
    entry.path(f"{name}_numpy.py").write_text("this is not python )(\n")
    _ok(_child(tmp_path, "src", "numpy"), "numpy")
    entry = build.ensure_binary(build.lookup(metricc.parse_spec(_spec_text("src"))))
    entry.path(f"{name}.c").write_text("garbage that no compiler accepts\n")
    _binary(entry).unlink()
    _ok(_child(tmp_path, "src", "c"), "c")


@needs_cc
def test_damaged_binary_without_compiler_falls_back_then_recovers(tmp_path, monkeypatch):
    entry = _entry(tmp_path, monkeypatch, "fallback")
    os.truncate(_binary(entry), 4096)
    no_cc = {"CC": "/nonexistent/cc"}
    out = _ok(_child(tmp_path, "fallback", "auto", no_cc), "numpy")
    assert len(out["warnings"]) == 1 and "NumPy" in out["warnings"][0]
    strict = _child(tmp_path, "fallback", "c", no_cc)
    assert strict.returncode == 1 and "BuildError" in strict.stderr
    assert "ImportError" not in strict.stderr
    # With a compiler again, the entry is rebuilt rather than failing on every later load.
    _ok(_child(tmp_path, "fallback", "c"), "c")


@needs_cc
def test_builder_killed_mid_compile_leaves_no_stray_folder(tmp_path, monkeypatch):
    entry = _entry(tmp_path, monkeypatch, "killed", binary=False)
    code = textwrap.dedent(f"""
        from metricc import build
        build._FINGERPRINT.append({build.generator_fingerprint()!r})
        import metricc
        metricc.loads({_spec_text("killed")!r}, backend="c")
        """)
    env = dict(os.environ, PYTHONPATH=str(ROOT), METRICC_CACHE_DIR=str(tmp_path / "cache"))
    # A session of its own, so that killing its group also kills the compiler it runs.
    proc = subprocess.Popen([sys.executable, "-c", code], env=env, start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 120
    try:
        while not any(p.name.startswith(".cc-") for p in entry.directory.iterdir()):
            assert proc.poll() is None and time.monotonic() < deadline, "never compiled"
            time.sleep(0.01)
    finally:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()
    assert any(p.name.startswith(".cc-") for p in entry.directory.iterdir())
    # A dead builder's generation folder (as a kill between generating and publishing leaves
    # it) for this entry and an old one of another entry; a young one of another entry may
    # belong to a live builder and stays.
    root = tmp_path / "cache"
    key = build.spec_key(metricc.parse_spec(_spec_text("killed")))[:32]
    (root / f".build-{key}-dead").mkdir()
    (root / ".build-0123abcd-old").mkdir()
    os.utime(root / ".build-0123abcd-old", (time.time() - 3 * 3600,) * 2)   # over an hour
    (root / ".build-4567cdef-live").mkdir()
    _ok(_child(tmp_path, "killed", "c"), "c")   # the next build of this entry
    assert [p.name for p in entry.directory.iterdir() if p.name.startswith(".cc-")] == []
    left = sorted(p.name for p in root.iterdir() if p.name.startswith((".build-", ".trash-")))
    assert left == [".build-4567cdef-live"]
