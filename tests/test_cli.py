"""The command line: ``metricc build SPEC... --out DIR [--target c,numpy]``.

Run in-process through metricc.cli.main (capsys), and once as ``python -m metricc``.
"""
from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

from metricc.cli import main

ROOT = Path(__file__).resolve().parent.parent
SPECS = ROOT / "specs"
SPHERE = SPECS / "sphere.toml"
SCHWARZSCHILD = SPECS / "schwarzschild.toml"
ALL_FILES = {"c": ("{n}.c", "{n}.h"), "numpy": ("{n}_numpy.py",)}

BAD_TEXT = '''name = "broken"
summary = "a spec with a typo"
coordinates = ["t", "r"]

[parameters]
M = 1.0

[define]
Sigma = "r^2"

[metric]
t.t = "-1"
r.r = "1 + M/Sigmq"
'''
# 1-based line and column of the typo, from the text above
BAD_LINE = BAD_TEXT.splitlines().index('r.r = "1 + M/Sigmq"') + 1
BAD_COL = 'r.r = "1 + M/Sigmq"'.index("Sigmq") + 1


def files_in(folder: Path) -> list[str]:
    return sorted(os.listdir(folder)) if folder.exists() else []


def expected(name: str, targets=("c", "numpy")) -> list[str]:
    return sorted(f.format(n=name) for t in targets for f in ALL_FILES[t])


@pytest.fixture
def bad_spec(tmp_path) -> Path:
    path = tmp_path / "broken.toml"
    path.write_text(BAD_TEXT, encoding="utf-8")
    return path


def assert_one_error_line(err: str, path: Path) -> str:
    assert err.endswith("\n")
    lines = err.splitlines()
    assert len(lines) == 1, err
    assert "Traceback" not in err
    assert lines[0].startswith(f"{path}:")
    assert ": error: " in lines[0]
    return lines[0]


# -- success ---------------------------------------------------------------------------------
def test_build_writes_all_targets_and_prints_summary(tmp_path, capsys):
    from metricc.pipeline import generate
    from metricc.spec import load_spec
    out = tmp_path / "out"
    assert main(["build", str(SCHWARZSCHILD), "--out", str(out)]) == 0
    captured = capsys.readouterr()
    assert captured.err == ""
    assert files_in(out) == expected("schwarzschild")
    text = captured.out
    assert "schwarzschild" in text
    gen = generate(load_spec(SCHWARZSCHILD), ("numpy",))
    kernel_names = [k.name for k in gen.kernels.kernels]
    assert {"metric", "inverse_metric", "christoffel", "geodesic_rhs"} <= set(kernel_names)
    for name in kernel_names:
        assert re.search(rf"^\s*{name}\b", text, re.M), f"kernel {name} not in summary"
    strategy = gen.kernels.inverse_strategy
    assert strategy in ("symbolic", "numeric", "mixed")
    assert re.search(rf"inverse.*\b{strategy}\b", text), text
    for f in expected("schwarzschild"):
        assert f in text


def test_build_several_specs(tmp_path, capsys):
    out = tmp_path / "out"
    assert main(["build", str(SPHERE), str(SCHWARZSCHILD), "-o", str(out)]) == 0
    assert files_in(out) == sorted(expected("sphere") + expected("schwarzschild"))
    text = capsys.readouterr().out
    assert "sphere" in text and "schwarzschild" in text


def test_target_numpy_writes_only_numpy_module(tmp_path, capsys):
    out = tmp_path / "out"
    assert main(["build", str(SPHERE), "--out", str(out), "--target", "numpy"]) == 0
    assert files_in(out) == ["sphere_numpy.py"]


def test_target_c_writes_only_header_and_source(tmp_path, capsys):
    out = tmp_path / "out"
    assert main(["build", str(SPHERE), "--out", str(out), "--target", "c"]) == 0
    assert files_in(out) == ["sphere.c", "sphere.h"]


def test_target_both_explicit(tmp_path, capsys):
    out = tmp_path / "out"
    assert main(["build", str(SPHERE), "--out", str(out), "--target", "c,numpy"]) == 0
    assert files_in(out) == expected("sphere")


def test_output_folder_is_created(tmp_path, capsys):
    out = tmp_path / "a" / "b" / "c"
    assert main(["build", str(SPHERE), "--out", str(out)]) == 0
    assert files_in(out) == expected("sphere")


def test_quiet_prints_nothing(tmp_path, capsys):
    out = tmp_path / "out"
    assert main(["build", str(SPHERE), "--out", str(out), "--quiet"]) == 0
    captured = capsys.readouterr()
    assert captured.out == "" and captured.err == ""
    assert files_in(out) == expected("sphere")


def test_generated_numpy_module_imports(tmp_path, capsys):
    import importlib.util
    out = tmp_path / "out"
    assert main(["build", str(SPHERE), "--out", str(out), "--target", "numpy"]) == 0
    spec = importlib.util.spec_from_file_location("sphere_numpy_cli_test",
                                                  out / "sphere_numpy.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    assert module.NAME == "sphere"


# -- unchanged output is not rewritten ----------------------------------------------------------
def test_rebuild_leaves_unchanged_files_untouched(tmp_path, capsys):
    out = tmp_path / "out"
    assert main(["build", str(SPHERE), "--out", str(out)]) == 0
    old = 1_000_000_000 * 10 ** 9          # 2001-09-09, far from now
    for name in files_in(out):
        os.utime(out / name, ns=(old, old))
    before = {name: os.stat(out / name).st_mtime_ns for name in files_in(out)}
    assert all(v == old for v in before.values())
    capsys.readouterr()
    assert main(["build", str(SPHERE), "--out", str(out)]) == 0
    after = {name: os.stat(out / name).st_mtime_ns for name in files_in(out)}
    assert after == before
    assert "unchanged" in capsys.readouterr().out


def test_rebuild_rewrites_only_changed_file(tmp_path, capsys):
    out = tmp_path / "out"
    assert main(["build", str(SPHERE), "--out", str(out)]) == 0
    original = (out / "sphere.c").read_bytes()
    (out / "sphere.c").write_text("/* edited by hand */\n")
    old = 1_000_000_000 * 10 ** 9
    for name in files_in(out):
        os.utime(out / name, ns=(old, old))
    assert main(["build", str(SPHERE), "--out", str(out)]) == 0
    assert (out / "sphere.c").read_bytes() == original
    assert os.stat(out / "sphere.c").st_mtime_ns != old
    assert os.stat(out / "sphere.h").st_mtime_ns == old
    assert os.stat(out / "sphere_numpy.py").st_mtime_ns == old


# -- errors --------------------------------------------------------------------------------
def test_bad_spec_one_line_exit_1_no_output(tmp_path, capsys, bad_spec):
    out = tmp_path / "out"
    assert main(["build", str(bad_spec), "--out", str(out)]) == 1
    captured = capsys.readouterr()
    line = assert_one_error_line(captured.err, bad_spec)
    assert line.startswith(f"{bad_spec}:{BAD_LINE}:{BAD_COL}: error: [metric] r.r: ")
    assert "did you mean 'Sigma'?" in line
    assert captured.out == ""
    assert files_in(out) == []


@pytest.mark.parametrize("order", ["good-first", "bad-first"])
def test_bad_spec_with_good_spec_writes_nothing(tmp_path, capsys, bad_spec, order):
    out = tmp_path / "out"
    specs = [str(SPHERE), str(bad_spec)] if order == "good-first" else [str(bad_spec), str(SPHERE)]
    assert main(["build", *specs, "--out", str(out)]) == 1
    captured = capsys.readouterr()
    assert_one_error_line(captured.err, bad_spec)
    assert files_in(out) == []
    assert not (out / "sphere_numpy.py").exists()


def test_bad_spec_does_not_touch_existing_output(tmp_path, capsys, bad_spec):
    out = tmp_path / "out"
    assert main(["build", str(SPHERE), "--out", str(out)]) == 0
    old = 1_000_000_000 * 10 ** 9
    for name in files_in(out):
        os.utime(out / name, ns=(old, old))
    assert main(["build", str(SPHERE), str(bad_spec), "--out", str(out)]) == 1
    assert files_in(out) == expected("sphere")
    assert all(os.stat(out / n).st_mtime_ns == old for n in files_in(out))


@pytest.mark.parametrize("text, fragment", [
    ('name = "x"\ncoordinates = ["t", "r"\n', "TOML"),
    ('name = "x"\ncoordinates = ["t", "r"]\n[metric]\nt.t = "-1"\n', "singular"),
    ('name = "x"\ncoordinates = ["t", "r"]\nsignature = "++"\n[metric]\nt.t = "-1"\nr.r = "1"\n',
     "signature"),
    ('name = "x"\ncoordinates = ["t", "r"]\n[metric]\nt.t = "-1"\nr.r = "__import__(\'os\')"\n',
     "unexpected character"),
    ('name = "x"\ncoordinates = ["t"]\n[metric]\nt.t = "-1"\n', "dimension"),
    ('name = "x"\ncoordinates = ["t", "r"]\nline_element = "dt^3 + dr^2"\n', "quadratic"),
])
def test_various_bad_specs_are_one_line_errors(tmp_path, capsys, text, fragment):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    out = tmp_path / "out"
    assert main(["build", str(path), "--out", str(out)]) == 1
    line = assert_one_error_line(capsys.readouterr().err, path)
    assert fragment in line
    assert files_in(out) == []


def test_huge_constant_is_one_line_error(tmp_path, capsys):
    path = tmp_path / "huge.toml"
    path.write_text('name = "x"\ncoordinates = ["t", "r"]\n[metric]\nt.t = "-1"\n'
                    'r.r = "1 + 1e300*1e300"\n')
    out = tmp_path / "out"
    assert main(["build", str(path), "--out", str(out)]) == 1
    assert_one_error_line(capsys.readouterr().err, path)
    assert files_in(out) == []


def test_missing_spec_file_is_one_line_error(tmp_path, capsys):
    path = tmp_path / "nope.toml"
    out = tmp_path / "out"
    assert main(["build", str(path), "--out", str(out)]) == 1
    assert_one_error_line(capsys.readouterr().err, path)
    assert files_in(out) == []


def test_two_specs_with_same_name_is_an_error(tmp_path, capsys):
    copy = tmp_path / "sphere_copy.toml"
    copy.write_text(SPHERE.read_text())
    out = tmp_path / "out"
    assert main(["build", str(SPHERE), str(copy), "--out", str(out)]) == 1
    err = capsys.readouterr().err
    assert len(err.splitlines()) == 1 and "error" in err and "Traceback" not in err
    assert files_in(out) == []


@pytest.mark.parametrize("target", ["cuda", "c,fortran", "", "C"])
def test_unknown_target_is_argparse_error(tmp_path, capsys, target):
    out = tmp_path / "out"
    with pytest.raises(SystemExit) as info:
        main(["build", str(SPHERE), "--out", str(out), "--target", target])
    assert info.value.code == 2
    err = capsys.readouterr().err
    assert "target" in err
    assert "Traceback" not in err
    assert files_in(out) == []


def test_missing_out_is_argparse_error(capsys):
    with pytest.raises(SystemExit) as info:
        main(["build", str(SPHERE)])
    assert info.value.code == 2
    assert "--out" in capsys.readouterr().err


def test_no_command_is_argparse_error(capsys):
    with pytest.raises(SystemExit) as info:
        main([])
    assert info.value.code == 2


# -- as a separate process -------------------------------------------------------------------
def _run(args, tmp_path, cwd):
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH")
                                     else "")
    env["METRICC_CACHE_DIR"] = str(tmp_path / "cache")
    return subprocess.run([sys.executable, "-m", "metricc", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=120)


def test_python_dash_m_build(tmp_path):
    out = tmp_path / "out"
    result = _run(["build", str(SPHERE), "--out", str(out)], tmp_path, tmp_path)
    assert result.returncode == 0, result.stderr
    assert files_in(out) == expected("sphere")
    assert "sphere" in result.stdout
    assert "christoffel" in result.stdout
    assert "Traceback" not in result.stderr


def test_python_dash_m_bad_spec(tmp_path, bad_spec):
    out = tmp_path / "out"
    result = _run(["build", str(SPHERE), str(bad_spec), "--out", str(out)], tmp_path, tmp_path)
    assert result.returncode == 1
    line = assert_one_error_line(result.stderr, bad_spec)
    assert line.startswith(f"{bad_spec}:{BAD_LINE}:{BAD_COL}: error: [metric] r.r: ")
    assert files_in(out) == []


# -- metricc integrate -----------------------------------------------------------------------
def _orbit_state():
    """One Schwarzschild state (M = 1) at r = 10 in the equatorial plane, [x, u]."""
    import numpy as np
    return np.array([0.0, 10.0, np.pi / 2, 0.0, 1.0, 0.0, 0.0, 0.03])


def test_integrate_single_state_npy(tmp_path, capsys):
    import numpy as np
    states = tmp_path / "one.npy"
    np.save(states, _orbit_state())                      # shape (2*dim,): a single state
    out = tmp_path / "res.npz"
    assert main(["integrate", str(SCHWARZSCHILD), "-i", str(states), "--lam-end", "5",
                 "-o", str(out), "--backend", "numpy", "--no-progress"]) == 0
    printed = capsys.readouterr().out
    assert "1 state, 1 done" in printed
    res = np.load(out)
    assert res["y"].shape == (8,) and res["status"].shape == ()
    assert str(res["status"]) == "done" and float(res["lam"]) == 5.0


def test_integrate_batch_npy_counts_states(tmp_path, capsys):
    import numpy as np
    states = tmp_path / "two.npy"
    np.save(states, np.stack([_orbit_state(), _orbit_state()]))
    out = tmp_path / "res.npz"
    assert main(["integrate", str(SCHWARZSCHILD), "-i", str(states), "--lam-end", "5",
                 "-o", str(out), "--backend", "numpy", "--no-progress"]) == 0
    assert "2 states, 2 done" in capsys.readouterr().out
    assert np.load(out)["y"].shape == (2, 8)


@pytest.mark.parametrize("name", ["r.txt", "r", "r.npy"])
def test_integrate_refuses_output_without_npz_suffix(tmp_path, capsys, name):
    import numpy as np
    states = tmp_path / "one.npy"
    np.save(states, _orbit_state())
    out = tmp_path / name
    assert main(["integrate", str(SCHWARZSCHILD), "-i", str(states), "--lam-end", "5",
                 "-o", str(out), "--backend", "numpy", "--no-progress"]) == 1
    err = capsys.readouterr().err
    assert err.startswith("metricc: error: --output") and ".npz" in err
    assert len(err.splitlines()) == 1
    assert not out.exists()


# -- help text -------------------------------------------------------------------------------
def test_every_option_has_help_text():
    import argparse
    from metricc.cli import _parser
    missing = []

    def walk(parser, prefix):
        for action in parser._actions:
            if isinstance(action, argparse._SubParsersAction):  # e.g. render shadow|fan
                for name, sub in action.choices.items():
                    walk(sub, f"{prefix} {name}".strip())
            elif not isinstance(action, argparse._HelpAction) and not action.help:
                missing.append(f"{prefix} {'/'.join(action.option_strings) or action.dest}")

    walk(_parser(), "")
    assert missing == []


# -- the README's set-up commands and CI ------------------------------------------------------
def _setup_commands() -> list[str]:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text[text.index("## Set-up on a fresh machine"):]
    section = section[:section.index("\n## ", 1)]
    return re.findall(r"```sh\n(.*?)\n```", section, flags=re.S)


def test_readme_setup_commands_install_into_a_virtual_environment():
    # A stock Debian/Ubuntu Python refuses `pip install` outside a virtual environment
    # (PEP 668, "externally managed environment"): each command makes (or reuses) one first.
    commands = _setup_commands()
    assert len(commands) == 2
    for cmd in commands:
        assert "\n" not in cmd                          # one copy-pasteable line
        assert cmd.startswith("python3 -m venv .venv && . .venv/bin/activate && python -m pip install ")
    assert "metricc build specs/kerr.toml" in commands[0]
    assert commands[1].endswith("python -m pytest")


def test_ci_runs_the_readme_test_command_verbatim():
    test_command = _setup_commands()[1]
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8").splitlines()
    assert test_command in ci


# -- the shipped Carter constant -------------------------------------------------------------
def test_readme_carter_example_is_shipped_and_conserved_through_the_cli(tmp_path, capsys):
    import numpy as np
    import metricc
    from tests.test_observers import carter_reference, kerr_bound_states
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    example = re.search(r"```toml\n\[invariants\]\n(carter = .*)\n```", readme).group(1)
    kerr_path = SPECS / "kerr.toml"
    assert example in kerr_path.read_text(encoding="utf-8").splitlines()
    k = metricc.load(kerr_path, backend="numpy")
    y0 = kerr_bound_states(k)[:1]                # an inclined eccentric bound orbit
    M, a = k.parameters["M"], k.parameters["a"]
    q0, _ = carter_reference(y0, M, a)           # Carter (1968) in closed form
    assert q0[0] > 1.0                           # inclined: Q is far from zero
    np.testing.assert_allclose(k.invariants(y0)["carter"], q0, rtol=1e-12)
    states, out = tmp_path / "orbit.npy", tmp_path / "orbit.npz"
    np.save(states, y0)
    assert main(["integrate", str(kerr_path), "-i", str(states), "--lam-end", "400",
                 "-o", str(out), "--backend", "numpy", "--no-progress", "--rtol", "1e-11"]) == 0
    res = np.load(out)
    assert list(res["status"]) == ["done"]
    q1, _ = carter_reference(res["y"], M, a)
    assert abs(q1[0] / q0[0] - 1) < 1e-8         # conserved along the geodesic
    assert abs(res["invariant_drift_carter"][0] - abs(q1[0] - q0[0])) < 1e-12 * q0[0]
