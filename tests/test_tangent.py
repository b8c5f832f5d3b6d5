"""Forward-mode kernels (metricc.tangent): tangent, transport, parameter derivative and stop
gradient, against independent derivations.

References: the Jacobian kernels of the optional "jacobian" group are differentiated by sympy
from the metric's expressions (a separate derivation, not forward mode on the optimised IR);
the transport kernels are compared with the definition of parallel transport contracted from
the Christoffel symbols; the parameter and stop derivatives with central finite differences
(common practice, with the step and tolerance stated at each check).
"""
from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

import metricc
from metricc.pipeline import generate
from metricc.spec import load_spec, parse_spec

from .conftest import SPECS, have_compiler, needs_cc
from .support import random_params, random_states

# A dense metric whose inverse is solved numerically at run time (the Solve steps of the IR):
# H^2 x H^2 in a mixed chart (Lee, Riemannian Manifolds (1997), common practice; the mixing
# matrix is invented).
DENSE = '''name = "dense_pair"
coordinates = ["a", "b", "c", "d"]
signature = "++++"
line_element = "((da + 0.3*db - 0.2*dc + 0.1*dd)^2 + (0.2*da + db + 0.4*dc - 0.3*dd)^2)/Y1^2 + ((-0.1*da + 0.5*db + dc + 0.2*dd)^2 + (0.3*da - 0.2*db + 0.1*dc + dd)^2)/Y2^2"
[parameters]
s = 1.0
[define]
Y1 = "s*(0.2*a + b + 0.4*c - 0.3*d)"
Y2 = "0.3*a - 0.2*b + 0.1*c + d"
[domain]
upper1 = "Y1"
upper2 = "Y2"
'''
DENSE_POINT = np.array([0.5, 1.2, 0.3, 1.1])

BACKENDS = ["numpy"] + (["c"] if have_compiler() else [])
CURVED = ("kerr", "kerr_schild", "reissner_nordstrom", "ellipsoid")


@pytest.fixture(scope="module")
def dense():
    out = {b: metricc.loads(DENSE, backend=b) for b in BACKENDS}
    out["jacobian"] = metricc.loads(DENSE, backend="numpy", kernels=["jacobian"])
    return out


@pytest.fixture(scope="module")
def jacobians():
    """The sympy-derived Jacobian kernels of the curved shipped specs (NumPy backend)."""
    return {n: metricc.load(SPECS / f"{n}.toml", backend="numpy", kernels=["jacobian"])
            for n in CURVED}


def _states(name, rng, n, k):
    y = random_states(name, rng, n)
    if name == "ellipsoid":
        y[:, 2:] *= 1e-7           # radians per metre-scale affine parameter
    return y


def _as_form(k, y, form, params=None):
    return y if form == "geodesic" else k.momenta(y, params)


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("form", ["geodesic", "hamilton"])
@pytest.mark.parametrize("name", CURVED)
def test_tangent_equals_sympy_jacobian_times_direction(shipped, jacobians, name, form, backend):
    rng = np.random.default_rng(3)
    k = shipped[name][backend]
    p = random_params(name, rng, 20)
    y = _as_form(k, _states(name, rng, 20, k), form, p)
    d = rng.normal(size=(20, 3, y.shape[-1]))
    J = getattr(jacobians[name], f"{form}_jacobian")(y, p)
    ref = np.einsum("nij,nkj->nki", J, d)
    got = k.tangent(y, d, p, form=form)
    scale = np.einsum("nij,nkj->nki", np.abs(J), np.abs(d))
    assert np.all(np.abs(got - ref) <= 1e-12 * scale + 1e-300)


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("form", ["geodesic", "hamilton"])
def test_tangent_through_a_numeric_solve(dense, form, backend):
    """The inverse of the dense metric is a linear solve in the kernels: its tangent is
    A^-1 (dB - dA X)."""
    rng = np.random.default_rng(5)
    k, ref_k = dense[backend], dense["jacobian"]
    assert k.inverse_strategy == "numeric"
    y = np.concatenate([DENSE_POINT + 0.05 * rng.normal(size=(10, 4)),
                        rng.normal(size=(10, 4))], axis=1)
    y = _as_form(k, y, form)
    d = rng.normal(size=(10, 2, 8))
    J = getattr(ref_k, f"{form}_jacobian")(y)
    got = k.tangent(y, d, form=form)
    scale = np.einsum("nij,nkj->nki", np.abs(J), np.abs(d))
    assert np.all(np.abs(got - np.einsum("nij,nkj->nki", J, d)) <= 1e-11 * scale)


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("name", ("kerr", "kerr_schild", "sphere", "ellipsoid"))
def test_transport_is_the_christoffel_contraction(shipped, name, backend):
    """dV^a = -Gamma^a_{bc} u^b V^c and, for covectors, dV_a = Gamma^c_{ab} u^b V_c
    (definition of parallel transport, e.g. Carroll 2004, Spacetime and Geometry, eq. 3.43)."""
    rng = np.random.default_rng(7)
    k = shipped[name][backend]
    p = random_params(name, rng, 15)
    y = _states(name, rng, 15, k)
    dim = k.dim
    G = k.christoffel(y[:, :dim], p)
    v = rng.normal(size=(15, 2, dim))
    ref = -np.einsum("nabc,nb,nkc->nka", G, y[:, dim:], v)
    scale = np.einsum("nabc,nb,nkc->nka", np.abs(G), np.abs(y[:, dim:]), np.abs(v))
    got = k.transport_rhs(y, v, p)
    assert np.all(np.abs(got - ref) <= 1e-12 * scale + 1e-300)
    z = k.momenta(y, p)
    ref_h = np.einsum("ncab,nb,nkc->nka", G, y[:, dim:], v)
    scale_h = np.einsum("ncab,nb,nkc->nka", np.abs(G), np.abs(y[:, dim:]), np.abs(v))
    got_h = k.transport_rhs(z, v, p, form="hamilton")
    assert np.all(np.abs(got_h - ref_h) <= 1e-10 * scale_h + 1e-300)


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("form", ["geodesic", "hamilton"])
@pytest.mark.parametrize("name", ("kerr", "reissner_nordstrom", "sphere"))
def test_param_derivative_against_central_differences(shipped, name, form, backend):
    """Central differences with step 1e-6 of the parameter: truncation ~1e-12 relative,
    rounding ~1e-10 (common practice); allowed 1e-7 of the RHS's size."""
    rng = np.random.default_rng(11)
    k = shipped[name][backend]
    p = {q: np.asarray(v) for q, v in random_params(name, rng, 12).items()}
    y = _as_form(k, _states(name, rng, 12, k), form, p)
    rhs = getattr(k, f"{form}_rhs")
    got = k.param_derivative(y, p, form=form)
    assert got.shape == (12, len(k.parameters), 2 * k.dim)
    for q, pname in enumerate(k.parameters):
        h = 1e-6 * np.maximum(1.0, np.abs(p[pname]))
        up = dict(p, **{pname: p[pname] + h})
        dn = dict(p, **{pname: p[pname] - h})
        fd = (rhs(y, up) - rhs(y, dn)) / (2 * h[:, None])
        scale = np.abs(rhs(y, p)) + np.abs(fd) + 1e-12
        assert np.all(np.abs(got[:, q] - fd) <= 1e-7 * scale), pname


@pytest.mark.parametrize("backend", BACKENDS)
def test_stops_gradient_against_central_differences(shipped, backend):
    """Kerr's horizon event and domain expressions: d/dx and d/dM, d/da by central
    differences (step 1e-6, common practice)."""
    rng = np.random.default_rng(13)
    k = shipped["kerr"][backend]
    p = {q: np.asarray(v) for q, v in random_params("kerr", rng, 10).items()}
    x = random_states("kerr", rng, 10)[:, :4]
    got = k.stops_gradient(x, p)
    nstop = len(k.event_names) + len(k.domain_names)
    assert got.shape == (10, nstop, 4 + 2)

    def stops(x, p):
        return np.concatenate([k.event_values(x, p).reshape(10, -1),
                               k.domain_values(x, p).reshape(10, -1)], axis=1)
    h = 1e-6
    for c in range(4):
        e = np.zeros(4)
        e[c] = h
        fd = (stops(x + e, p) - stops(x - e, p)) / (2 * h)
        assert np.allclose(got[:, :, c], fd, rtol=1e-6, atol=1e-8)
    for q, pname in enumerate(k.parameters):
        fd = (stops(x, dict(p, **{pname: p[pname] + h}))
              - stops(x, dict(p, **{pname: p[pname] - h}))) / (2 * h)
        assert np.allclose(got[:, :, 4 + q], fd, rtol=1e-6, atol=1e-8)


@needs_cc
@pytest.mark.parametrize("name", ("kerr", "kerr_schild", "ellipsoid"))
def test_fused_rhs_is_bit_identical_and_entry_points_agree(shipped, name):
    """The f output of the directional kernels is the RHS kernel's, bit for bit, through the
    single-state, batch and structure-of-arrays entry points (53 states: three full tiles
    and a partial one), which all give the same directions' results."""
    rng = np.random.default_rng(17)
    k = shipped[name]["c"]
    ffi, lib = k._c.ffi, k._c.lib
    n, S, D, m = 53, 2 * k.dim, k.dim, 3
    pv = np.array(list(k.parameters.values()))
    y = _states(name, rng, n, k)
    buf = lambda a: ffi.from_buffer("double[]", a)     # noqa: E731
    for form in ("geodesic", "hamilton"):
        z = np.ascontiguousarray(_as_form(k, y, form))
        f_ref = getattr(k, f"{form}_rhs")(z)
        for kind, din in (("tangent", S), ("transport", D)):
            name_k = f"{k.name}_{form}_{kind}"
            dirs = rng.normal(size=(n, m, din))
            f = np.empty((n, S))
            out = np.empty((n, m, S if kind == "tangent" else D))
            getattr(lib, name_k + "_batch")(n, buf(z), m, buf(np.ascontiguousarray(dirs)),
                                            buf(pv), 0, buf(f), buf(out))
            assert np.array_equal(f, f_ref)
            fs = np.empty((S, n))
            outs = np.empty((m, out.shape[-1], n))
            getattr(lib, name_k + "_soa")(n, buf(np.ascontiguousarray(z.T)), m,
                                          buf(np.ascontiguousarray(dirs.transpose(1, 2, 0))),
                                          buf(pv), 0, buf(fs), buf(outs))
            assert np.array_equal(fs.T, f_ref)
            assert np.array_equal(outs.transpose(2, 0, 1), out)
            # f = NULL leaves only the directions
            out2 = np.empty_like(out)
            getattr(lib, name_k + "_batch")(n, buf(z), m, buf(np.ascontiguousarray(dirs)),
                                            buf(pv), 0, ffi.NULL, buf(out2))
            assert np.array_equal(out2, out)


@needs_cc
@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2 ** 32 - 1), m=st.integers(1, 5),
       a=st.floats(-3, 3), b=st.floats(-3, 3))
def test_tangent_is_linear_and_backends_agree(shipped, seed, m, a, b):
    """J(a d1 + b d2) = a J d1 + b J d2, and the C and NumPy kernels agree to rounding."""
    rng = np.random.default_rng(seed)
    kc, kn = shipped["kerr"]["c"], shipped["kerr"]["numpy"]
    y = random_states("kerr", rng, 4)
    d1, d2 = rng.normal(size=(2, 4, m, 8))
    t1, t2 = kc.tangent(y, d1), kc.tangent(y, d2)
    both = kc.tangent(y, a * d1 + b * d2)
    scale = np.abs(a * t1) + np.abs(b * t2) + 1e-300
    assert np.all(np.abs(both - (a * t1 + b * t2)) <= 1e-12 * np.max(scale) + 1e-12 * scale)
    tn = kn.tangent(y, d1)
    assert np.allclose(t1, tn, rtol=1e-12, atol=1e-12 * np.max(np.abs(tn)))


def test_directional_input_checks(shipped):
    k = shipped["sphere"]["numpy"]
    y = random_states("sphere", np.random.default_rng(1), 3)
    with pytest.raises(ValueError, match="directions of shape"):
        k.tangent(y, np.zeros((3, 5)))          # directions of the wrong size
    with pytest.raises(ValueError, match="different batch axes"):
        k.tangent(y, np.zeros((2, 1, 4)))       # 3 states, 2 sets of directions
    # one set of directions (m, 2*dim) is shared by every state
    assert k.tangent(y, np.eye(4)).shape == (3, 4, 4)
    with pytest.raises(ValueError, match="directions of shape"):
        k.transport_rhs(y, np.zeros((3, 1, 4)))  # transport vectors have dim components
    with pytest.raises(ValueError, match="form must be"):
        k.tangent(y, np.zeros((3, 1, 4)), form="lagrange")
    assert k.tangent(y, np.zeros((3, 0, 4))).shape == (3, 0, 4)


def test_generated_sources_declare_and_are_deterministic():
    spec = load_spec(SPECS / "sphere.toml")
    a = generate(spec).sources
    b = generate(parse_spec((SPECS / "sphere.toml").read_text(), "x.toml")).sources
    assert a.files == b.files
    header = a["sphere.h"]
    for form in ("geodesic", "hamilton"):
        assert (f"void sphere_{form}_tangent(const double *SPHERE_RESTRICT y, size_t m"
                in header.replace("z, size_t m", "y, size_t m"))
        assert f"sphere_{form}_transport_soa(size_t n" in header
        assert f"sphere_{form}_param_derivative_batch(size_t n" in header
    assert "def geodesic_tangent(y, dy, params=DEFAULTS):" in a["sphere_numpy.py"]
    assert "def hamilton_transport(z, v, params=DEFAULTS):" in a["sphere_numpy.py"]


class _Skewed:
    """A MetricKernels stand-in whose transport (or tangent) kernel is off by 1e-6."""

    def __init__(self, k, which):
        self._k, self._which = k, which

    def __getattr__(self, name):
        attr = getattr(self._k, name)
        if name == self._which:
            return lambda *a, **kw: attr(*a, **kw) * (1 + 1e-6)
        return attr


@pytest.mark.parametrize("which, check", [
    ("transport_rhs", "transport = -Gamma(u, V)"),
    ("tangent", "tangent velocity part = 2 x transport")])
def test_verify_checks_the_forward_mode_kernels(shipped, which, check):
    """metricc verify compares transport with the Christoffel symbols (the definition of
    parallel transport) and the tangent's velocity part with transport: each passes on the
    real kernels and fails when its kernel is off by one part in 1e6."""
    from metricc.verify import run_checks
    k = shipped["kerr"]["numpy"]
    good = {c.name: c.ok for c in run_checks(k)}
    assert good[check]
    bad = {c.name: c.ok for c in run_checks(_Skewed(k, which))}
    assert not bad[check]
