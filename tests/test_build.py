"""The kernel cache: warm loads, atomic publication, concurrent builds, compiler fallback."""
from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
import warnings

import numpy as np
import pytest

import metricc
from metricc import build
from metricc.errors import BuildError, MetriccWarning
from tests.conftest import ROOT, SPECS, needs_cc


def _spec_text(tag: str) -> str:
    """A small valid spec whose content (and so cache key) is unique to ``tag``."""
    return _small_spec(f"probe_{tag}", summary=f"test surface {tag}")


def _run(code: str, env_extra: dict, timeout=300) -> subprocess.CompletedProcess:
    env = dict(os.environ, PYTHONPATH=str(ROOT), **env_extra)
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          env=env, timeout=timeout)


@needs_cc
def test_warm_load_compiles_nothing_and_skips_sympy(tmp_path):
    cache = tmp_path / "cache"
    first = _run(f"import metricc; k = metricc.load({str(SPECS / 'kerr.toml')!r}, "
                 "backend='c'); print(k.backend)", {"METRICC_CACHE_DIR": str(cache)})
    assert first.returncode == 0, first.stderr
    entries = [p for p in cache.iterdir() if p.is_dir() and not p.name.startswith(".")]
    assert len(entries) == 1
    before = {p.name: p.stat().st_mtime_ns for p in entries[0].iterdir()}
    # No compiler at all now: a warm load must not need one, nor sympy.
    code = (f"import sys, metricc; k = metricc.load({str(SPECS / 'kerr.toml')!r}, backend='c');"
            "print(k.backend, 'sympy' in sys.modules, 'jinja2' in sys.modules);"
            "print(k.geodesic_rhs([0, 8.0, 1.0, 0, 1, 0.1, 0.01, 0.02])[5])")
    warm = _run(code, {"METRICC_CACHE_DIR": str(cache), "CC": "/nonexistent/cc"})
    assert warm.returncode == 0, warm.stderr
    assert warm.stdout.split()[:3] == ["c", "False", "False"]
    after = {p.name: p.stat().st_mtime_ns for p in entries[0].iterdir()}
    assert after == before


def test_no_compiler_auto_falls_back_to_numpy_with_one_warning(tmp_path, monkeypatch):
    monkeypatch.setenv("METRICC_CACHE_DIR", str(tmp_path))
    monkeypatch.setenv("CC", "/nonexistent/cc")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        k = metricc.loads(_spec_text("fallback"))
    assert k.backend == "numpy"
    ours = [w for w in caught if issubclass(w.category, MetriccWarning)]
    assert len(ours) == 1 and "NumPy" in str(ours[0].message)
    np.testing.assert_allclose(k.metric([1.0, 2.0]), [[1 + 0.5 * 4, 0], [0, 2.0]])
    with pytest.raises(BuildError, match="compiler"):
        metricc.loads(_spec_text("fallback"), backend="c")


def test_bad_backend_name(tmp_path, monkeypatch):
    monkeypatch.setenv("METRICC_CACHE_DIR", str(tmp_path))
    with pytest.raises(ValueError, match="backend"):
        metricc.loads(_spec_text("x"), backend="fortran")


@needs_cc
def test_concurrent_builds_of_one_spec(tmp_path):
    cache = tmp_path / "cache"
    spec = tmp_path / "probe.toml"
    spec.write_text(_spec_text("race"))
    code = (f"import metricc, json; k = metricc.load({str(spec)!r}, backend='c');"
            "print(json.dumps(k.christoffel([0.3, 0.7]).tolist()))")
    env = dict(os.environ, PYTHONPATH=str(ROOT), METRICC_CACHE_DIR=str(cache))
    procs = [subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True, env=env) for _ in range(4)]
    outs = [p.communicate(timeout=300) for p in procs]
    assert all(p.returncode == 0 for p in procs), [e for _, e in outs]
    results = {o for o, _ in outs}
    assert len(results) == 1
    visible = [p for p in cache.iterdir() if p.is_dir() and not p.name.startswith(".")]
    assert len(visible) == 1
    leftovers = [p for p in cache.iterdir() if p.name.startswith(".build-")]
    assert not leftovers
    manifest = json.loads((visible[0] / "manifest.json").read_text())
    assert manifest["binary"]["module"].startswith("_metricc_")
    assert (visible[0] / manifest["binary"]["file"]).is_file()


def test_failed_build_leaves_nothing_in_the_cache(tmp_path, monkeypatch):
    monkeypatch.setenv("METRICC_CACHE_DIR", str(tmp_path))
    bad = _spec_text("singular").replace('v.v = "1 + u^2"', 'v.v = "0*u"')
    with pytest.raises(metricc.SpecError, match="singular"):
        metricc.loads(bad, backend="numpy")
    assert [p for p in tmp_path.iterdir() if p.is_dir()] == []


def test_cache_key_ignores_comments_but_not_content(tmp_path, monkeypatch):
    monkeypatch.setenv("METRICC_CACHE_DIR", str(tmp_path))
    text = _spec_text("key")
    a = metricc.parse_spec(text)
    b = metricc.parse_spec("# a comment\n" + text.replace("k = 0.5", "k   =   0.5  # x"))
    c = metricc.parse_spec(text.replace("k = 0.5", "k = 0.25"))
    assert build.spec_key(a) == build.spec_key(b) != build.spec_key(c)
    assert a.sha256 == b.sha256 != c.sha256


def test_cache_dir_defaults_to_user_cache(monkeypatch, tmp_path):
    monkeypatch.delenv("METRICC_CACHE_DIR", raising=False)
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path))
    assert build.cache_root() == tmp_path / "metricc"


def test_atomic_write_replaces_whole_file(tmp_path):
    target = tmp_path / "f.txt"
    build.atomic_write(target, "one")
    build.atomic_write(target, "two")
    assert target.read_text() == "two"
    assert [p.name for p in tmp_path.iterdir()] == ["f.txt"]


def _small_spec(name: str, extra: str = "", summary: str = "") -> str:
    """A small valid 2-D spec named ``name``; ``extra`` (tables) is appended at the end."""
    return textwrap.dedent(f"""
        name = "{name}"
        summary = "{summary}"
        coordinates = ["u", "v"]
        [parameters]
        k = 0.5
        [metric]
        u.u = "1 + k*v^2"
        v.v = "1 + u^2"
        """) + extra


def test_specs_whose_symbols_clash_are_refused_in_one_build(tmp_path, capsys):
    """kerr makes the GSL wrapper kerr_gsl_geodesic_rhs; a spec named kerr_gsl makes the same
    name as its plain kernel. Built into one folder, the two could not link: refuse, write
    nothing."""
    from metricc.cli import main
    (tmp_path / "kerr.toml").write_text(_small_spec("kerr"))
    (tmp_path / "kerr_gsl.toml").write_text(_small_spec("kerr_gsl"))
    out = tmp_path / "out"
    rc = main(["build", str(tmp_path / "kerr.toml"), str(tmp_path / "kerr_gsl.toml"),
               "--out", str(out), "-q"])
    err = capsys.readouterr().err
    assert rc == 1
    assert "kerr_gsl_geodesic_rhs" in err and "kerr_gsl.toml:2:" in err
    assert not out.exists()


def test_specs_whose_macros_clash_are_refused(tmp_path, capsys):
    """A parameter named DIM of spec 'm' gives the macro M_PARAM_DIM, which spec 'm_param'
    defines as its dimension."""
    from metricc.cli import main
    (tmp_path / "a.toml").write_text(_small_spec("m").replace("k = 0.5", "k = 0.5\nDIM = 1.0"))
    (tmp_path / "b.toml").write_text(_small_spec("m_param"))
    rc = main(["build", str(tmp_path / "a.toml"), str(tmp_path / "b.toml"),
               "--out", str(tmp_path / "out"), "-q"])
    assert rc == 1 and "M_PARAM_DIM" in capsys.readouterr().err
    # No false alarm: 'orbit' and 'orbital' share a prefix but no symbol ('orbit_' does not
    # start 'orbital_').
    (tmp_path / "c.toml").write_text(_small_spec("orbit"))
    (tmp_path / "d.toml").write_text(_small_spec("orbital"))
    assert main(["build", str(tmp_path / "c.toml"), str(tmp_path / "d.toml"),
                 "--out", str(tmp_path / "out"), "-q", "--target", "c"]) == 0
    assert (tmp_path / "out" / "orbital.h").is_file()

