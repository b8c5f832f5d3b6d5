"""The Python API: attributes, shapes, parameters and errors (both backends)."""
from __future__ import annotations

import numpy as np
import pytest

import metricc
from tests.conftest import SPECS
from tests.support import random_params, random_points, random_states

BACKENDS = ["numpy", pytest.param("c", marks=pytest.mark.skipif(
    not __import__("tests.conftest", fromlist=["have_compiler"]).have_compiler(),
    reason="no C compiler"))]


@pytest.fixture(params=BACKENDS)
def kerr(request, shipped):
    return shipped["kerr"][request.param]


def test_attributes(kerr):
    assert kerr.name == "kerr"
    assert kerr.coordinates == ("t", "r", "theta", "phi")
    assert kerr.dim == 4
    assert kerr.parameters == {"M": 1.0, "a": 0.9}
    assert kerr.backend in ("c", "numpy")
    assert kerr.ignorable == ("t", "phi")
    assert kerr.signature == (1, 3)
    assert kerr.inverse_strategy in ("symbolic", "numeric", "mixed")


def test_shapes_follow_leading_axes(kerr):
    rng = np.random.default_rng(1)
    y = random_states("kerr", rng, 12).reshape(3, 4, 8)
    x = y[..., :4]
    assert kerr.metric(x).shape == (3, 4, 4, 4)
    assert kerr.inverse_metric(x).shape == (3, 4, 4, 4)
    assert kerr.christoffel(x).shape == (3, 4, 4, 4, 4)
    assert kerr.geodesic_rhs(y).shape == (3, 4, 8)
    assert kerr.hamilton_rhs(y).shape == (3, 4, 8)
    assert kerr.norm(y).shape == (3, 4)
    c = kerr.conserved(y)
    assert set(c) == {"p_t", "p_phi"} and c["p_phi"].shape == (3, 4)
    np.testing.assert_array_equal(c["phi"], c["p_phi"])
    # a single state gives unbatched results
    assert kerr.geodesic_rhs(y[0, 0]).shape == (8,)
    assert kerr.norm(y[0, 0]).shape == ()
    assert kerr.metric(x[:0].reshape(0, 4)).shape == (0, 4, 4)


def test_per_state_parameters_match_scalar_calls(kerr):
    rng = np.random.default_rng(2)
    y = random_states("kerr", rng, 5)
    p = random_params("kerr", rng, 5)
    batch = kerr.geodesic_rhs(y, params=p)
    for i in range(5):
        one = kerr.geodesic_rhs(y[i], params={"M": float(p["M"][i]), "a": float(p["a"][i])})
        np.testing.assert_array_equal(batch[i], one)
    # parameters broadcast against the batch: one state, many spins
    spins = np.array([-0.9, -0.6, -0.3, 0.0, 0.3, 0.6, 0.9])
    scan = kerr.metric(y[0, :4], params={"a": spins})
    assert scan.shape == (7, 4, 4)
    np.testing.assert_array_equal(scan[3], kerr.metric(y[0, :4], params={"a": 0.0}))


def test_default_parameters_are_used(kerr):
    x = np.array([0.0, 7.0, 1.0, 0.0])
    np.testing.assert_array_equal(kerr.metric(x), kerr.metric(x, params={"M": 1.0, "a": 0.9}))


def test_momenta_velocities_round_trip(kerr):
    rng = np.random.default_rng(3)
    y = random_states("kerr", rng, 6)
    z = kerr.momenta(y)
    np.testing.assert_allclose(kerr.velocities(z), y, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(kerr.momentum_norm(z), kerr.norm(y), rtol=1e-11, atol=1e-12)


def test_domain_helpers(kerr):
    x = np.array([[0.0, 5.0, 1.0, 0.0], [0.0, 1.0, 1.0, 0.0], [0.0, 5.0, 0.0, 0.0]])
    np.testing.assert_array_equal(kerr.inside(x), [True, False, False])
    assert kerr.domain_values(x).shape == (3, 2)
    r_plus = 1 + np.sqrt(1 - 0.81)  # Kerr outer horizon M + sqrt(M^2 - a^2) (closed form)
    np.testing.assert_allclose(kerr.event_values(x)[:, 0], x[:, 1] - 1.01 * r_plus)


@pytest.mark.parametrize("bad, match", [
    (np.zeros(3), r"last axis of length 4"),
    (np.zeros((2, 5)), r"shape \(2, 5\)"),
    (np.float64(1.0), r"last axis"),
])
def test_wrong_shapes_are_clear_errors(kerr, bad, match):
    with pytest.raises(ValueError, match=match):
        kerr.metric(bad)


def test_bad_parameters_are_clear_errors(kerr):
    x = np.zeros((3, 4)) + [0, 5, 1, 0]
    with pytest.raises(ValueError, match=r"unknown parameter 'spin' \(parameters: M, a\)"):
        kerr.metric(x, params={"spin": 0.5})
    with pytest.raises(ValueError, match="does not broadcast"):
        kerr.metric(x, params={"a": np.zeros(4)})
    with pytest.raises(TypeError, match="dict"):
        kerr.metric(x, params=[1.0, 0.5])


def test_metric_without_ignorable_coordinates_has_empty_conserved(shipped):
    k = shipped["ellipsoid"]["numpy"]
    assert k.ignorable == ("lon",)
    rng = np.random.default_rng(4)
    y = random_states("ellipsoid", rng, 3)
    assert set(k.conserved(y)) == {"p_lon"}
    surface = metricc.loads('name = "warped"\ncoordinates = ["u", "v"]\n[metric]\n'
                            'u.u = "1 + v^2 + u^2"\nv.v = "2 + u^2*v^2"\n', backend="numpy")
    assert surface.ignorable == ()
    assert surface.conserved(np.ones(4)) == {}


def test_load_from_path_and_text_agree(shipped):
    text = (SPECS / "schwarzschild.toml").read_text()
    a = metricc.loads(text, backend="numpy")
    b = shipped["schwarzschild"]["numpy"]
    x = random_points("schwarzschild", np.random.default_rng(5), 4)
    np.testing.assert_array_equal(a.christoffel(x), b.christoffel(x))
    assert a.spec_sha256 == b.spec_sha256
