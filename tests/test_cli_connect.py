"""``metricc connect`` through the command line (metricc.cli.main, in process).

Reference values: on the sphere of radius R (specs/sphere.toml, colatitude theta, longitude
phi) the connecting geodesic is the shorter great-circle arc, of length R times the central
angle (closed form: the spherical law of cosines in its atan2 form, common practice).
"""
from __future__ import annotations

import numpy as np
import pytest

from metricc.cli import main

from .conftest import SPECS

SPHERE = str(SPECS / "sphere.toml")


def central_angle(a, b):
    """Central angle between points (theta, phi) of the unit sphere (closed form)."""
    pa = np.stack([np.sin(a[..., 0]) * np.cos(a[..., 1]), np.sin(a[..., 0]) * np.sin(a[..., 1]),
                   np.cos(a[..., 0])], -1)
    pb = np.stack([np.sin(b[..., 0]) * np.cos(b[..., 1]), np.sin(b[..., 0]) * np.sin(b[..., 1]),
                   np.cos(b[..., 0])], -1)
    return np.arctan2(np.linalg.norm(np.cross(pa, pb), axis=-1), np.sum(pa * pb, -1))


def run(capsys, *args):
    # the default backend (C where a compiler works): the NumPy backend's shooting takes
    # seconds per pair
    code = main(["connect", *map(str, args)])
    out, err = capsys.readouterr()
    return code, out, err


def value_after(out: str, label: str) -> float:
    line = next(l for l in out.splitlines() if l.strip().startswith(label))
    return float(line.split()[-1])


def test_one_pair_prints_status_length_u0_and_arrival(capsys):
    a, b = np.array([1.0, 0.2]), np.array([2.0, 1.5])
    code, out, err = run(capsys, SPHERE, "--from", "1.0,0.2", "--to", "2.0,1.5")
    assert code == 0, err
    assert out.startswith("sphere: converged after ")
    assert value_after(out, "length") == pytest.approx(float(central_angle(a, b)), rel=1e-10)
    arrival = next(l for l in out.splitlines() if l.strip().startswith("arrival"))
    theta = float(arrival.split("theta = ")[1].split(",")[0])
    phi = float(arrival.split("phi = ")[1])
    assert theta == pytest.approx(2.0, abs=1e-9)
    assert np.cos(phi - 1.5) == pytest.approx(1.0, abs=1e-12)   # modulo the period 2 pi
    u0 = next(l for l in out.splitlines() if l.strip().startswith("u0"))
    assert "dtheta = " in u0 and "dphi = " in u0


def test_values_are_constant_expressions_and_params_apply(capsys):
    # along the equator from phi = 0 to pi/3: length R pi/3 (closed form), R = 2 by --param
    code, out, err = run(capsys, SPHERE, "--from", "pi/2,0", "--to", "pi/2,pi/3",
                         "--param", "R=2")
    assert code == 0, err
    assert value_after(out, "length") == pytest.approx(2 * np.pi / 3, rel=1e-10)


def test_windings_across_the_period(capsys):
    # phi = 3 to phi = -3 is 2 pi - 6 the short way round the equator (closed form)
    code, out, err = run(capsys, SPHERE, "--from", "pi/2,3", "--to=pi/2,-3")
    assert code == 0, err
    assert value_after(out, "length") == pytest.approx(2 * np.pi - 6, rel=1e-10)


def test_batch_writes_every_field(tmp_path, capsys):
    rng = np.random.default_rng(5)
    n = 12
    a = np.stack([rng.uniform(0.3, np.pi - 0.3, n), rng.uniform(-np.pi, np.pi, n)], -1)
    b = np.stack([rng.uniform(0.3, np.pi - 0.3, n), rng.uniform(-np.pi, np.pi, n)], -1)
    pairs = np.stack([a, b], 1)
    src, out_path = tmp_path / "pairs.npy", tmp_path / "res.npz"
    np.save(src, pairs)
    code, out, err = run(capsys, SPHERE, "-i", src, "-o", out_path,
                         "--progress")
    assert code == 0, err
    assert f"{n} pairs, {n} converged" in out
    assert "\rsphere [" in err          # the progress bar
    with np.load(out_path) as z:
        assert set(z.files) == {"y0", "y1", "length", "status", "iterations", "residual"}
        assert z["y0"].shape == z["y1"].shape == (n, 4)
        for key in ("length", "status", "iterations", "residual"):
            assert z[key].shape == (n,)
        assert list(z["status"]) == ["converged"] * n
        np.testing.assert_allclose(z["length"], central_angle(a, b), rtol=1e-10)
        np.testing.assert_array_equal(z["y0"][:, :2], a)
        np.testing.assert_allclose(z["y1"][:, 0], b[:, 0], atol=1e-9)
        assert np.all(z["iterations"] >= 1) and np.all(z["residual"] <= 1e-10)


def test_outside_domain_is_a_status_not_an_error(tmp_path, capsys):
    # theta = 0 is a pole: outside the chart (sin(theta) > 0)
    pairs = np.array([[[1.0, 0.0], [2.0, 1.0]], [[0.0, 0.0], [2.0, 1.0]]])
    src, out_path = tmp_path / "pairs.npy", tmp_path / "res.npz"
    np.save(src, pairs)
    code, out, err = run(capsys, SPHERE, "-i", src, "-o", out_path)
    assert code == 0, err
    with np.load(out_path) as z:
        assert list(z["status"]) == ["converged", "outside_domain"]
        assert np.isnan(z["length"][1])
    code, out, err = run(capsys, SPHERE, "--from", "0,0", "--to", "2,1")
    assert code == 1 and "outside_domain" in out


BAD = [
    (["--from", "1,2", "--to", "1,x"], "the value of phi ('x') is not a number"),
    (["--from", "1,2", "--to", "1"], "give 2 comma-separated values (theta, phi), got 1"),
    (["--from", "1,2", "--to", "1,2,3"], "got 3"),
    (["--from", "1,2"], "give both --from and --to"),
    ([], "give either --from and --to"),
    (["--from", "1,2", "--to", "1,3", "--free", "psi"], "'psi' is not a coordinate"),
    (["--from", "1,2", "--to", "1,3", "--kind", "null"], "Riemannian"),
    (["--from", "1,2", "--to", "1,3", "--solutions", "0"], "--solutions must be at least 1"),
    (["--from", "1,2", "--to", "1,3", "--param", "R"], "--param expects NAME=VALUE"),
    (["--from", "1,2", "--to", "1,3", "--param", "Q=1"], "unknown parameter 'Q'"),
]


@pytest.mark.parametrize("args,words", BAD)
def test_bad_arguments_are_one_clear_line(capsys, args, words):
    code, out, err = run(capsys, SPHERE, *args)
    assert code == 1
    assert err.startswith("metricc: error: ") and words in err, err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1


@pytest.mark.parametrize("shape,words", [((3, 2), "expected (N, 2, 2)"),
                                         ((3, 2, 3), "expected (N, 2, 2)"),
                                         ((3, 3, 2), "expected (N, 2, 2)")])
def test_bad_pair_files_write_nothing(tmp_path, capsys, shape, words):
    src, out_path = tmp_path / "pairs.npy", tmp_path / "res.npz"
    np.save(src, np.ones(shape))
    code, out, err = run(capsys, SPHERE, "-i", src, "-o", out_path)
    assert code == 1 and words in err, err
    assert not out_path.exists()


def test_batch_arguments(tmp_path, capsys):
    src = tmp_path / "pairs.npy"
    np.save(src, np.ones((2, 2, 2)))
    code, _, err = run(capsys, SPHERE, "-i", src)
    assert code == 1 and "--input needs --output" in err
    code, _, err = run(capsys, SPHERE, "-i", src, "-o", tmp_path / "r.txt")
    assert code == 1 and "ending in .npz" in err
    code, _, err = run(capsys, SPHERE, "-i", tmp_path / "missing.npy", "-o", tmp_path / "r.npz")
    assert code == 1 and "cannot read" in err
    code, _, err = run(capsys, SPHERE, "-i", src, "-o", tmp_path / "r.npz", "--kind",
                       "timelike", "--free", "phi")
    assert code == 1 and not (tmp_path / "r.npz").exists()


def test_two_solutions_are_the_short_and_the_long_arc(tmp_path, capsys):
    # the second geodesic joining two points of a sphere is the rest of the great circle:
    # length 2 pi - angle (closed form)
    a, b = np.array([1.0, 0.2]), np.array([2.0, 1.5])
    angle = float(central_angle(a, b))
    code, out, err = run(capsys, SPHERE, "--from", "1.0,0.2", "--to", "2.0,1.5",
                         "--solutions", "2")
    assert code == 0, err
    assert "solution 1: converged" in out and "solution 2: converged" in out
    lengths = [float(l.split()[-1]) for l in out.splitlines() if l.strip().startswith("length")]
    assert lengths == pytest.approx([angle, 2 * np.pi - angle], rel=1e-10)
    src, out_path = tmp_path / "pairs.npy", tmp_path / "res.npz"
    np.save(src, np.array([[a, b]] * 3))
    code, out, err = run(capsys, SPHERE, "-i", src, "-o", out_path, "--solutions", "2")
    assert code == 0, err
    with np.load(out_path) as z:
        assert z["y0"].shape == (3, 2, 4) and z["status"].shape == (3, 2)
        np.testing.assert_allclose(z["length"], [[angle, 2 * np.pi - angle]] * 3, rtol=1e-10)
