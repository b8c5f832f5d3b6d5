"""The example projects in examples/: each is copied to a temporary folder, built with its own
build system (make, CMake, make + GSL) running the real metricc, and its program is run.

Checked for each: the output is physically sensible (a bound orbit, status done, small
drifts); it agrees with the Python API (``metricc.load(spec).integrate`` on the NumPy
backend, an implementation independent of the generated C) from the same initial state; an
edited spec regenerates the kernels and changes the output, which then agrees with the
Python API for the edited spec; a rebuild with nothing changed regenerates nothing.

Each test skips (with the reason) where make, CMake, GSL or a C compiler is missing.
"""
from __future__ import annotations

import os
import re
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import metricc

ROOT = Path(__file__).resolve().parent.parent
EXAMPLES = ROOT / "examples"
WARN_CFLAGS = "-O2 -Wall -Wextra -pedantic -Werror"


# -- helpers ---------------------------------------------------------------------------------
def c_compiler() -> str | None:
    cc = shlex.split(os.environ.get("CC", "") or "cc")
    return shutil.which(cc[0]) if cc else None


def require(*tools: str) -> None:
    for tool in tools:
        if shutil.which(tool) is None:
            pytest.skip(f"{tool} not found")
    if c_compiler() is None:
        pytest.skip("no C compiler (cc or $CC)")


def require_gsl() -> None:
    if shutil.which("gsl-config"):
        return
    if shutil.which("pkg-config") and subprocess.run(
            ["pkg-config", "--exists", "gsl"], capture_output=True).returncode == 0:
        return
    pytest.skip("GSL development files not found (neither gsl-config nor pkg-config gsl)")


def depfile_rules(path: Path) -> list[tuple[list[str], list[str]]]:
    """The (targets, prerequisites) of each rule in a Make-format depfile, unescaped.

    Empty rules (``prerequisite:``, written as cc -MP does so a removed prerequisite never
    stops make) are checked to name a prerequisite of a real rule, then left out."""
    def words(text):
        return [w.replace("\\ ", " ").replace("\\#", "#").replace("$$", "$")
                for w in re.split(r"(?<!\\) +", text.strip()) if w]
    rules, empty = [], []
    for line in path.read_text(encoding="utf-8").splitlines():
        if not line.strip():
            continue
        if line.endswith(":"):
            empty.append(words(line[:-1])[0])
            continue
        targets, sep, prereqs = line.partition(": ")
        assert sep, f"not a rule: {line!r}"
        rules.append((words(targets), words(prereqs)))
    named = {p for _, prereqs in rules for p in prereqs}
    assert set(empty) == named, (empty, named)
    return rules


def assert_depfile_included(make: list[str], cwd: Path, depfile: Path) -> None:
    """Through the included depfile, an upgraded metricc (a newer version file) regenerates
    the kernels: make's what-if mode (-n -W FILE) pretends the file changed, touching nothing."""
    (_, prereqs), = depfile_rules(depfile)
    version_file, = [p for p in prereqs if p.endswith("_version.py")]
    assert Path(version_file).is_file()
    log = run(make + ["-n", "-W", version_file], cwd)
    assert "build spec.toml" in log, log


def assert_no_work(log: str) -> None:
    """A make run that ran no command: neither metricc, nor a compile, nor a link."""
    assert "metricc" not in log and " -c " not in log and "-o orbit" not in log, log


def metricc_argv() -> list[str]:
    return [sys.executable, "-m", "metricc"]


def example_env() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(ROOT), env.get("PYTHONPATH")) if p)
    env["METRICC"] = shlex.join(metricc_argv())
    # The session's isolated kernel cache (tests/conftest.py), never the user's own.
    env["METRICC_CACHE_DIR"] = os.environ["METRICC_CACHE_DIR"]
    env.pop("MAKEFLAGS", None)
    env.pop("MFLAGS", None)
    return env


def run(argv, cwd: Path, timeout: float = 120) -> str:
    proc = subprocess.run(argv, cwd=cwd, env=example_env(), capture_output=True, text=True,
                          timeout=timeout)
    if proc.returncode != 0:
        pytest.fail(f"{shlex.join(map(str, argv))} failed with status {proc.returncode}\n"
                    f"--- stdout\n{proc.stdout}\n--- stderr\n{proc.stderr}")
    return proc.stdout + proc.stderr


def copy_example(name: str, tmp_path: Path) -> Path:
    dst = tmp_path / name
    shutil.copytree(EXAMPLES / name, dst,
                    ignore=shutil.ignore_patterns("gen", "build", "orbit", "*.o"))
    return dst


def parse_output(text: str) -> dict[str, str]:
    out = {}
    for line in text.splitlines():
        key, sep, value = line.partition(" = ")
        assert sep, f"unexpected output line {line!r}"
        assert key not in out, f"key {key!r} printed twice"
        out[key.strip()] = value.strip()
    return out


def num(out: dict, key: str) -> float:
    return float(out[key])


def vec(out: dict, key: str) -> np.ndarray:
    return np.array([float(v) for v in out[key].split()])


def stamps(*paths: Path) -> dict[str, tuple[int, bytes]]:
    return {p.name: (p.stat().st_mtime_ns, p.read_bytes()) for p in paths}


def age_tree(folder: Path, seconds: float = 30.0) -> None:
    """Move every mtime in ``folder`` back by ``seconds`` (order kept), so that an edit made
    next is newer than every output however coarse the file system's clock."""
    for p in folder.rglob("*"):
        if p.is_file() and not p.is_symlink():
            st = p.stat()
            shift = int(seconds * 1e9)
            os.utime(p, ns=(st.st_atime_ns - shift, st.st_mtime_ns - shift))


def set_parameter(spec: Path, name: str, value: float) -> None:
    text = spec.read_text(encoding="utf-8")
    new, count = re.subn(rf"(?m)^{re.escape(name)}\s*=\s*[-+0-9.eE]+", f"{name} = {value!r}", text)
    assert count == 1, f"parameter {name} not found exactly once in {spec}"
    spec.write_text(new, encoding="utf-8")


def python_final(spec: Path, y0: np.ndarray, lam_end: float, rtol: float, atol: float):
    """The same integration through the Python API (NumPy backend), default parameters."""
    k = metricc.load(spec, backend="numpy")
    res = k.integrate(np.atleast_2d(y0), lam_end, rtol=rtol, atol=atol)
    return k, res


def assert_close(c_value: np.ndarray, py_value: np.ndarray, what: str, rel: float = 1e-9):
    c_value, py_value = np.asarray(c_value), np.asarray(py_value)
    scale = np.maximum(np.abs(py_value), 1.0)
    err = np.max(np.abs(c_value - py_value) / scale)
    assert err <= rel, f"{what}: C {c_value} vs Python {py_value} (relative error {err:.2e})"


# -- examples/make-orbit -----------------------------------------------------------------------
def check_ember(out: dict, spec: Path) -> None:
    """Physical sanity of the make-orbit output, and agreement with the Python API."""
    y0 = vec(out, "y0")
    assert out["status"] == "done"
    assert num(out, "lam") == num(out, "lam_end")
    assert int(out["samples"]) == 401
    r_min, r_max = num(out, "r_min"), num(out, "r_max")
    # Bound, outside the surface; the start (dr = 0) is a turning point of the radial motion.
    assert num(out, "R_surf") < r_min <= y0[1] * (1 + 1e-9) and y0[1] * (1 - 1e-9) <= r_max < 100
    assert r_min - 1e-6 <= num(out, "r") <= r_max + 1e-6
    assert 0 < num(out, "energy") < 1                      # bound: E = -p_t < 1
    assert num(out, "orbits") > 1
    assert num(out, "energy_drift") < 1e-9 and num(out, "norm_drift") < 1e-9
    k, res = python_final(spec, y0, num(out, "lam_end"), num(out, "rtol"), num(out, "atol"))
    assert res.status[0] == "done"
    assert num(out, "M") == k.parameters["M"]
    assert_close([num(out, "t"), num(out, "r"), num(out, "phi")], res.y[0, :3], "final t, r, phi")
    assert int(out["steps"]) == pytest.approx(int(res.steps[0]), abs=3)


def test_make_orbit(tmp_path):
    require("make")
    src = copy_example("make-orbit", tmp_path)
    make = ["make", f"METRICC={shlex.join(metricc_argv())}", f"CFLAGS={WARN_CFLAGS}"]
    gen = src / "gen"
    log = run(make, src)
    assert "metricc" in log and "build spec.toml --out gen" in log
    first = parse_output(run(["./orbit"], src))
    check_ember(first, src / "spec.toml")

    # The depfile: every generated file depends on the spec and on metricc's version file.
    (targets, prereqs), = depfile_rules(gen / "ember.d")
    assert {"gen/ember.c", "gen/ember.h"} <= set(targets)
    assert prereqs[0] == "spec.toml" and prereqs[1].endswith("_version.py")
    assert_depfile_included(make, src, gen / "ember.d")

    # Nothing changed: nothing is regenerated or rebuilt.
    kernels = (gen / "ember.c", gen / "ember.h")
    before = stamps(*kernels)
    log = run(make, src)
    assert_no_work(log)
    assert stamps(*kernels) == before

    # A heavier star: the kernels are regenerated, the program rebuilt, the orbit differs.
    age_tree(src)
    before = stamps(*kernels)
    set_parameter(src / "spec.toml", "M", 1.15)
    log = run(make, src)
    assert "build spec.toml" in log and "orbit.c" in log
    after = stamps(*kernels)
    for name in before:
        assert after[name][0] != before[name][0], f"{name} not rewritten"
        assert after[name][1] != before[name][1], f"{name} unchanged"
    second = parse_output(run(["./orbit"], src))
    assert num(second, "M") == 1.15
    assert abs(num(second, "r") - num(first, "r")) > 1e-3
    assert abs(num(second, "phi") - num(first, "phi")) > 1e-3
    check_ember(second, src / "spec.toml")

    # A spec edit that changes no output (a comment): metricc runs once, rewrites nothing,
    # orbit.c is not recompiled, and the next make is a no-op again.
    age_tree(src)
    before = stamps(gen / "ember.h", src / "orbit.o")
    with open(src / "spec.toml", "a", encoding="utf-8") as f:
        f.write("# a comment changes no generated byte\n")
    log = run(make, src)
    assert "build spec.toml" in log and "orbit.c" not in log, log
    assert stamps(gen / "ember.h", src / "orbit.o") == before
    log = run(make, src)
    assert_no_work(log)
    assert parse_output(run(["./orbit"], src)) == second


# -- examples/cmake-orbit ----------------------------------------------------------------------
PROBES = ("wren", "finch", "lark")


def check_tamsin(out: dict, spec: Path) -> None:
    assert out["probes"].split() == list(PROBES)
    y0 = np.stack([vec(out, f"{p}.y0") for p in PROBES])
    k, res = python_final(spec, y0, num(out, "lam_end"), num(out, "rtol"), num(out, "atol"))
    assert num(out, "M") == k.parameters["M"]
    for i, p in enumerate(PROBES):
        assert out[f"{p}.status"] == "done" == res.status[i]
        assert num(out, f"{p}.lam") == num(out, "lam_end")
        assert num(out, "R_surf") < num(out, f"{p}.r") < 100
        assert 0 < num(out, f"{p}.theta") < np.pi
        assert 0 < num(out, f"{p}.energy") < 1
        assert num(out, f"{p}.energy_drift") < 1e-9 and num(out, f"{p}.lz_drift") < 1e-8
        final = [num(out, f"{p}.{c}") for c in ("r", "theta", "phi")]
        assert_close(final, res.y[i, 1:4], f"{p}: final r, theta, phi")
    # The probes start differently and end differently.
    assert len({out[f"{p}.r"] for p in PROBES}) == 3


@pytest.mark.parametrize("generator", ["Unix Makefiles", "Ninja"])
def test_cmake_orbit(tmp_path, generator):
    require("cmake", "make" if generator == "Unix Makefiles" else "ninja")
    src = copy_example("cmake-orbit", tmp_path)
    build = tmp_path / "build"
    run(["cmake", "-S", str(src), "-B", str(build), "-G", generator,
         "-DMETRICC=" + ";".join(metricc_argv()), f"-DCMAKE_C_FLAGS={WARN_CFLAGS}"], tmp_path)
    cmake_build = ["cmake", "--build", str(build)]
    log = run(cmake_build, tmp_path)
    assert "metricc: generating the tamsin kernels" in log
    exe = build / "orbit"
    first = parse_output(run([str(exe)], tmp_path))
    check_tamsin(first, src / "spec.toml")

    kernels = (build / "gen" / "tamsin.c", build / "gen" / "tamsin.h")
    before = stamps(*kernels, exe)
    log = run(cmake_build, tmp_path)
    assert "metricc" not in log and "Linking" not in log, log
    assert stamps(*kernels, exe) == before

    age_tree(tmp_path)
    before = stamps(*kernels)
    set_parameter(src / "spec.toml", "M", 1.1)
    log = run(cmake_build, tmp_path)
    assert "metricc: generating the tamsin kernels" in log
    after = stamps(*kernels)
    for name in before:
        assert after[name][0] != before[name][0] and after[name][1] != before[name][1], name
    second = parse_output(run([str(exe)], tmp_path))
    assert num(second, "M") == 1.1
    for p in PROBES:
        assert abs(num(second, f"{p}.r") - num(first, f"{p}.r")) > 1e-3, p
    check_tamsin(second, src / "spec.toml")

    before = stamps(*kernels, exe)
    log = run(cmake_build, tmp_path)
    assert "metricc" not in log, log
    assert stamps(*kernels, exe) == before

    # A comment changes no generated byte: metricc runs once, then builds are no-ops again;
    # Ninja re-reads the outputs' times (restat) and so rebuilds nothing at all.
    age_tree(tmp_path)
    before = stamps(build / "gen" / "tamsin.h", exe)
    with open(src / "spec.toml", "a", encoding="utf-8") as f:
        f.write("# a comment changes no generated byte\n")
    log = run(cmake_build, tmp_path)
    assert "metricc: generating the tamsin kernels" in log
    if generator == "Ninja":
        assert stamps(build / "gen" / "tamsin.h", exe) == before
    log = run(cmake_build, tmp_path)
    assert "metricc" not in log, log
    assert parse_output(run([str(exe)], tmp_path)) == second


# -- examples/gsl-orbit ------------------------------------------------------------------------
def check_orrin(out: dict, spec: Path) -> None:
    y0 = vec(out, "y0")
    M = num(out, "M")
    assert out["status"] == "done"
    assert num(out, "lam") == num(out, "lam_end")
    rho_min, rho_max = num(out, "rho_min"), num(out, "rho_max")
    assert 3 * M < rho_min < rho_max <= y0[1] * (1 + 1e-9)   # bound, well outside rho = M/2
    assert rho_min - 1e-6 <= num(out, "rho") <= rho_max + 1e-6
    rho = num(out, "rho")
    assert num(out, "r_areal") == pytest.approx(rho * (1 + M / (2 * rho)) ** 2, rel=1e-14)
    assert 0 < num(out, "energy") < 1
    assert num(out, "energy_drift") < 1e-10 and num(out, "norm_drift") < 1e-10
    # GSL's rk8pd and metricc's DOP853 are different methods: they agree to the tolerance.
    eps = num(out, "eps")
    k, res = python_final(spec, y0, num(out, "lam_end"), eps, eps)
    assert res.status[0] == "done"
    assert M == k.parameters["M"]
    assert_close([num(out, "t"), num(out, "rho"), num(out, "phi")], res.y[0, :3],
                 "final t, rho, phi")


def test_gsl_orbit(tmp_path):
    require("make")
    require_gsl()
    src = copy_example("gsl-orbit", tmp_path)
    make = ["make", f"METRICC={shlex.join(metricc_argv())}", f"CFLAGS={WARN_CFLAGS}"]
    kernels = (src / "gen" / "orrin.c", src / "gen" / "orrin.h")
    log = run(make, src)
    assert "build spec.toml --out gen" in log
    first = parse_output(run(["./orbit"], src))
    check_orrin(first, src / "spec.toml")
    assert_depfile_included(make, src, src / "gen" / "orrin.d")

    before = stamps(*kernels, src / "orbit")
    log = run(make, src)
    assert_no_work(log)
    assert stamps(*kernels, src / "orbit") == before

    age_tree(src)
    before = stamps(*kernels)
    set_parameter(src / "spec.toml", "M", 1.1)
    log = run(make, src)
    assert "build spec.toml" in log and "orbit.c" in log
    after = stamps(*kernels)
    for name in before:
        assert after[name][0] != before[name][0] and after[name][1] != before[name][1], name
    second = parse_output(run(["./orbit"], src))
    assert num(second, "M") == 1.1
    assert abs(num(second, "rho") - num(first, "rho")) > 1e-3
    check_orrin(second, src / "spec.toml")

    before = stamps(*kernels, src / "orbit")
    log = run(make, src)
    assert_no_work(log)
    assert stamps(*kernels, src / "orbit") == before
