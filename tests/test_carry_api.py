"""``k.integrate`` with carried quantities (issue 13): argument checks, the plain path's bits,
the block layout, and variations / parameter sensitivities against central finite
differences of full integrations, including states stopped by an event or a domain
expression; the Dask path and the command line.

Reference for the derivatives: central finite differences (common practice),
d y_end / d q ~ (y_end(q + h) - y_end(q - h)) / (2 h) with h = 1e-6 max(1, |q|), each side a
full integration at rtol 1e-12: truncation O(h^2) ~ 1e-12 and the integrator's error over h
~ 1e-6 relative, so agreement to 1e-4 of the largest entry is demanded (an uncorrected
stopped state is off by order 1). Other references are named where used.
"""
from __future__ import annotations

import numpy as np
import pytest

import metricc
from tests.conftest import SPECS, have_compiler

TIGHT = {"rtol": 1e-12, "atol": 1e-14}    # the finite-difference integrations
CARRY = {"rtol": 1e-11, "atol": 1e-13}    # the integrations carrying derivatives
FD_TOL = 1e-4

# A 2-sphere of radius R with the polar cap theta < cap cut out by a [domain] expression
# that geodesics cross transversally (the shipped specs' domain boundaries are coordinate
# singularities, reached only by non-generic geodesics). "cap" enters only the stop, so
# d y_end / d cap comes entirely from the moving stop point.
CAP_SPHERE = """
name = "capsphere"
summary = "2-sphere of radius R without the cap theta < cap (carried-quantity tests)"
coordinates = ["theta", "phi"]
line_element = "R^2*dtheta^2 + R^2*sin(theta)^2*dphi^2"

[parameters]
R = 1.0
cap = 0.4

[domain]
off_poles = "sin(theta)"
outside_cap = "theta - cap"
"""

_LOADED: dict = {}


def kernels(name: str, backend: str):
    """Kernels of a shipped spec (or "capsphere"), loaded once; C tests are skipped without
    a compiler."""
    key = (name, backend)
    if key not in _LOADED:
        if backend == "c" and not have_compiler():
            pytest.skip("no C compiler")
        if name == "capsphere":
            k = metricc.loads(CAP_SPHERE, backend=backend)
        else:
            k = metricc.load(SPECS / f"{name}.toml", backend=backend)
        _LOADED[key] = k
    return _LOADED[key]


BACKENDS = ["numpy", "c"]


def kerr_states(k):
    """Two Kerr photons (M = 1, a = 0.9): the first falls through the horizon event near
    lambda = 4.9, the second is still outside at lambda = 12 (test inputs)."""
    y = np.array([[0.0, 6.0, 1.3, 0.0, 1.0, -0.9, 0.01, 0.02],
                  [0.0, 8.0, 1.2, 0.5, 1.0, 0.5, 0.0, 0.03]])
    return k.normalize(y, "null", 0)


def cap_states():
    """Sphere states [theta, phi, u^theta, u^phi]: the first heads north and crosses
    theta = cap (its great circle comes within 0.25 rad of the pole), the second stays
    south of the cap."""
    return np.array([[1.2, 0.0, -1.0, 0.3], [1.5, 1.0, 0.2, 0.9]])


def fd_initial(k, y0, lam_end, form="geodesic", **kw):
    """Central differences of y_end in each component of y0: (N, S, S), [n, i, j] =
    d y_end_i / d y0_j; also checks that no perturbation changes how a state ends."""
    base = k.integrate(y0, lam_end, form=form, **TIGHT, **kw)
    S = y0.shape[-1]
    out = np.empty(y0.shape + (S,))
    for j in range(S):
        h = 1e-6 * np.maximum(1.0, np.abs(y0[:, j]))
        plus, minus = y0.copy(), y0.copy()
        plus[:, j] += h
        minus[:, j] -= h
        rp = k.integrate(plus, lam_end, form=form, **TIGHT, **kw)
        rm = k.integrate(minus, lam_end, form=form, **TIGHT, **kw)
        assert (rp.status == base.status).all() and (rm.status == base.status).all()
        out[:, :, j] = (rp.y - rm.y) / (2 * h[:, None])
    return out, base


def fd_param(k, y0, lam_end, name, form="geodesic"):
    """Central difference of y_end in parameter ``name`` with y0 fixed: (N, S)."""
    v = k.parameters[name]
    h = 1e-6 * max(1.0, abs(v))
    rp = k.integrate(y0, lam_end, params={name: v + h}, form=form, **TIGHT)
    rm = k.integrate(y0, lam_end, params={name: v - h}, form=form, **TIGHT)
    assert (rp.status == rm.status).all()
    return (rp.y - rm.y) / (2 * h)


def assert_close_rows(got, want, tol=FD_TOL):
    """Each state's block agrees to tol times its largest reference entry."""
    got, want = np.asarray(got), np.asarray(want)
    axes = tuple(range(1, want.ndim))
    scale = np.max(np.abs(want), axis=axes)
    err = np.max(np.abs(got - want), axis=axes) / scale
    assert np.all(err <= tol), f"relative errors {err} (tolerance {tol})"


# -- argument checks -------------------------------------------------------------------------
BAD = [
    ({"transport": np.zeros((2, 1, 3))}, "transport must have shape"),
    ({"transport": np.zeros((3, 1, 2))}, "does not match the states' leading axes"),
    ({"transport": np.zeros(2)}, "transport must have shape"),
    ({"transport": [[[np.nan, 0.0]], [[0.0, 0.0]]]}, "non-finite"),
    ({"transport": "all"}, "array of numbers"),
    ({"variations": "some"}, "variations must be an array"),
    ({"variations": np.zeros((2, 1, 2))}, "variations must have shape"),
    ({"variations": np.full((2, 1, 4), np.inf)}, "non-finite"),
    ({"variations": {"a": 1}}, "array of numbers"),
    ({"param_variations": ["R", "Q"]}, "unknown parameter 'Q'"),
    ({"param_variations": ["R", "R"]}, "names a parameter twice"),
    ({"param_variations": 3}, "list of parameter names or True"),
    ({"carried_error": "no"}, "carried_error must be True or False"),
]


@pytest.mark.parametrize("kwargs,message", BAD)
def test_bad_carried_arguments_are_refused(kwargs, message):
    k = kernels("sphere", "numpy")
    with pytest.raises(ValueError, match=message):
        k.integrate(cap_states(), 1.0, **kwargs)


def test_nothing_carried_changes_nothing():
    k = kernels("kerr", "numpy")
    y0 = kerr_states(k)
    plain = k.integrate(y0, 12.0, samples=[3.0, 6.0])
    same = k.integrate(y0, 12.0, samples=[3.0, 6.0], transport=None, variations=None,
                       param_variations=None, carried_error=False)
    for f in ("y", "lam", "status", "steps", "samples", "drift"):
        np.testing.assert_array_equal(getattr(same, f), getattr(plain, f))
    for f in ("transport", "transport_samples", "variations", "variations_samples",
              "param_variations"):
        assert getattr(plain, f) is None and getattr(same, f) is None


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("method", ["dop853", "dp5"])
def test_carried_error_false_keeps_the_plain_steps_bit_for_bit(backend, method):
    k = kernels("kerr", backend)
    y0 = kerr_states(k)
    samples = [9.0, 2.0, 4.5]
    kw = {"method": method, "rtol": 1e-8, "atol": 1e-10}
    plain = k.integrate(y0, 12.0, samples=samples, **kw)
    res = k.integrate(y0, 12.0, samples=samples, transport=y0[:, None, 4:],
                      variations="all", param_variations=True, carried_error=False, **kw)
    for f in ("y", "lam", "status", "steps", "samples", "drift"):
        np.testing.assert_array_equal(getattr(res, f), getattr(plain, f), err_msg=f)
    # in the error norm (the default) the derivatives' error also limits the steps
    ctl = k.integrate(y0, 12.0, variations="all", param_variations=True, **kw)
    assert np.all(ctl.steps >= plain.steps) and np.any(ctl.steps > plain.steps)


@pytest.mark.parametrize("backend", BACKENDS)
def test_blocks_carried_together_equal_blocks_carried_alone(backend):
    """With carried_error=False every run takes the plain steps, so each block's values do
    not depend on what else is carried: the layout [transport][variations][params] must
    route every block to its own kernel and back."""
    k = kernels("kerr", backend)
    y0 = kerr_states(k)
    rng = np.random.default_rng(5)
    vt, vv = rng.normal(size=(2, 2, 4)), rng.normal(size=(2, 3, 8))
    kw = {"samples": [2.0, 7.0], "carried_error": False}
    both = k.integrate(y0, 12.0, transport=vt, variations=vv, param_variations=["a"], **kw)
    t = k.integrate(y0, 12.0, transport=vt, **kw)
    v = k.integrate(y0, 12.0, variations=vv, **kw)
    p = k.integrate(y0, 12.0, param_variations="a", **kw)
    np.testing.assert_array_equal(both.transport, t.transport)
    np.testing.assert_array_equal(both.transport_samples, t.transport_samples)
    np.testing.assert_array_equal(both.variations, v.variations)
    np.testing.assert_array_equal(both.variations_samples, v.variations_samples)
    np.testing.assert_array_equal(both.param_variations["a"], p.param_variations["a"])
    assert both.transport.shape == (2, 2, 4) and both.transport_samples.shape == (2, 2, 2, 4)
    assert both.variations.shape == (2, 3, 8) and both.variations_samples.shape == (2, 2, 3, 8)
    assert list(both.param_variations) == ["a"] and both.param_variations["a"].shape == (2, 8)


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("form", ["geodesic", "hamilton"])
def test_velocity_is_transported_into_the_end_velocity(backend, form):
    """A geodesic's tangent is parallel along it (the definition of a geodesic; common
    practice): transporting u^a (p_a for the Hamiltonian form) from the start gives the end
    state's u^a (p_a), at the end and at every sample."""
    k = kernels("kerr", backend)
    y0 = kerr_states(k)
    if form == "hamilton":
        y0 = k.momenta(y0)
    vec = np.stack([y0[:, 4:], np.tile([0.0, 1.0, 0.0, 0.0], (2, 1))], axis=1)
    res = k.integrate(y0, 12.0, form=form, transport=vec, samples=[1.0, 3.0], **CARRY)
    scale = np.abs(res.y[:, 4:]).max(axis=1, keepdims=True)
    assert np.all(np.abs(res.transport[:, 0] - res.y[:, 4:]) <= 1e-7 * scale)
    sc = np.abs(res.samples[..., 4:]).max(axis=-1, keepdims=True)
    assert np.all(np.abs(res.transport_samples[:, :, 0] - res.samples[..., 4:]) <= 1e-7 * sc)


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("form", ["geodesic", "hamilton"])
def test_kerr_transition_matrix_matches_finite_differences(backend, form):
    k = kernels("kerr", backend)
    y0 = kerr_states(k)
    if form == "hamilton":
        y0 = k.momenta(y0)
    res = k.integrate(y0, 12.0, form=form, variations="all", **CARRY)
    fd, base = fd_initial(k, y0, 12.0, form)
    # the first state ends on the horizon event: its matrix is that of the stopped state
    assert list(res.status) == ["horizon", "done"] and list(base.status) == list(res.status)
    assert res.variations.shape == (2, 8, 8)
    assert_close_rows(res.variations, fd)


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("form", ["geodesic", "hamilton"])
def test_kerr_parameter_sensitivities_match_finite_differences(backend, form):
    """M and a enter both the equations of motion and the horizon event (r_+ = M +
    sqrt(M^2 - a^2)), so the stopped state needs the event's own parameter derivative."""
    k = kernels("kerr", backend)
    y0 = kerr_states(k)
    if form == "hamilton":
        y0 = k.momenta(y0)   # then p_mu, not u^mu, is held fixed as the parameters move
    res = k.integrate(y0, 12.0, form=form, param_variations=True, **CARRY)
    assert list(res.status) == ["horizon", "done"]
    assert list(res.param_variations) == ["M", "a"]
    for name in ("M", "a"):
        assert_close_rows(res.param_variations[name], fd_param(k, y0, 12.0, name, form))


@pytest.mark.parametrize("backend", BACKENDS)
def test_given_directions_on_the_sphere_match_finite_differences(backend):
    """Explicit directions W (m = 2): res.variations[:, k] = Phi W[:, k], with Phi from
    central differences; states done at lam_end (no stop)."""
    k = kernels("sphere", backend)
    y0 = np.array([[1.0, 0.2, 0.3, 0.8], [2.0, -1.0, -0.5, 0.4]])
    W = np.array([[[1.0, 0.0, 0.5, -0.2], [0.0, 0.3, 1.0, 0.7]],
                  [[0.2, 1.0, 0.0, 0.1], [-1.0, 0.0, 0.0, 2.0]]])
    res = k.integrate(y0, 5.0, variations=W, **CARRY)
    fd, base = fd_initial(k, y0, 5.0)
    assert list(base.status) == ["done", "done"]
    assert_close_rows(res.variations, np.einsum("nij,nkj->nki", fd, W))


@pytest.mark.parametrize("backend", BACKENDS)
def test_domain_stop_moves_the_derivatives_to_the_crossing(backend):
    """A state stopped where the domain expression theta - cap crosses 0: its transition
    matrix and its sensitivity to cap (which enters only the stop) are those of the
    crossing point; the expression closest to 0 is the one used (off_poles is not)."""
    k = kernels("capsphere", backend)
    y0 = cap_states()
    res = k.integrate(y0, 3.0, variations="all", param_variations=True, **CARRY)
    fd, base = fd_initial(k, y0, 3.0)
    assert list(res.status) == ["domain", "done"]
    assert_close_rows(res.variations, fd)
    d_cap = fd_param(k, y0, 3.0, "cap")
    assert np.abs(d_cap[0]).max() > 0.1 and np.all(d_cap[1] == 0)
    assert_close_rows(res.param_variations["cap"][:1], d_cap[:1])
    np.testing.assert_array_equal(res.param_variations["cap"][1], 0.0)


@pytest.mark.parametrize("backend", BACKENDS)
def test_variation_samples_follow_the_given_sample_order(backend):
    """variations_samples[:, i] belongs to samples[i] (given unsorted): it equals the
    variations of a run that ends there (same tolerance, to 1e-9)."""
    k = kernels("sphere", backend)
    y0 = np.array([[1.0, 0.2, 0.3, 0.8], [2.0, -1.0, -0.5, 0.4]])
    samples = [4.0, 1.0, 2.5]
    res = k.integrate(y0, 5.0, variations="all", samples=samples, **CARRY)
    assert res.variations_samples.shape == (2, 3, 4, 4)
    for i, s in enumerate(samples):
        end = k.integrate(y0, s, variations="all", **CARRY)
        assert_close_rows(res.variations_samples[:, i], end.variations, 1e-9)


def test_dask_path_equals_the_plain_path():
    dask = pytest.importorskip("dask")
    da = pytest.importorskip("dask.array")
    k = kernels("kerr", "numpy")
    y0 = np.repeat(kerr_states(k), 2, axis=0)
    vt = np.random.default_rng(2).normal(size=(4, 1, 4))
    vv = np.random.default_rng(3).normal(size=(4, 2, 8))
    kw = {"samples": [1.0, 5.0], "param_variations": ["a"], "rtol": 1e-8}
    ref = k.integrate(y0, 12.0, transport=vt, variations=vv, **kw)
    lazy = k.integrate(da.from_array(y0, chunks=(1, 8)), 12.0, transport=vt,
                       variations=da.from_array(vv, chunks=(2, 2, 8)), **kw)
    assert isinstance(lazy.variations, da.Array) and isinstance(lazy.param_variations["a"],
                                                                 da.Array)
    got = dask.compute(lazy.y, lazy.transport, lazy.transport_samples, lazy.variations,
                       lazy.variations_samples, lazy.param_variations["a"],
                       scheduler="synchronous")
    want = (ref.y, ref.transport, ref.transport_samples, ref.variations,
            ref.variations_samples, ref.param_variations["a"])
    for g, w in zip(got, want):
        np.testing.assert_array_equal(g, w)
    every = k.integrate(da.from_array(y0, chunks=(3, 8)), 12.0, variations="all", rtol=1e-8)
    np.testing.assert_array_equal(every.variations.compute(scheduler="synchronous"),
                                  k.integrate(y0, 12.0, variations="all", rtol=1e-8).variations)


class _InlineClient:
    """A dask.distributed Client stand-in that runs each task at once, in order: enough to
    check how map_integrate splits and joins the arrays."""

    def submit(self, fn, *args, pure=None):
        return fn(*args)

    def gather(self, futures):
        return list(futures)


def test_map_integrate_splits_carried_arrays_with_the_states():
    from metricc.cluster import map_integrate
    k = kernels("kerr", "numpy")
    y0 = np.concatenate([kerr_states(k), kerr_states(k)[::-1]]).reshape(2, 2, 8)
    rng = np.random.default_rng(4)
    vt, vv = rng.normal(size=(2, 2, 1, 4)), rng.normal(size=(2, 2, 2, 8))
    kw = {"transport": vt, "variations": vv, "param_variations": ["a"], "samples": [3.0],
          "rtol": 1e-8}
    ref = k.integrate(y0, 12.0, **kw)
    res = map_integrate(_InlineClient(), k, y0, 12.0, chunk_size=3, **kw)
    for f in ("y", "transport", "transport_samples", "variations", "variations_samples"):
        np.testing.assert_array_equal(getattr(res, f), getattr(ref, f), err_msg=f)
    np.testing.assert_array_equal(res.param_variations["a"], ref.param_variations["a"])
    every = map_integrate(_InlineClient(), k, y0, 12.0, chunk_size=3, variations="all",
                          rtol=1e-8)
    np.testing.assert_array_equal(every.variations,
                                  k.integrate(y0, 12.0, variations="all", rtol=1e-8).variations)


# -- command line ----------------------------------------------------------------------------
def _cli(args):
    from metricc.cli import main
    return main(["integrate", str(SPECS / "kerr.toml"), "--backend", "numpy", "--lam-end",
                 "12", "--rtol", "1e-8"] + [str(a) for a in args])


def test_cli_round_trip_with_carried_vectors(tmp_path):
    k = kernels("kerr", "numpy")
    y0 = kerr_states(k)
    vt = np.random.default_rng(7).normal(size=(2, 2, 4))
    vv = np.random.default_rng(8).normal(size=(2, 1, 8))
    np.savez(tmp_path / "in.npz", y0=y0, transport=vt, variations=vv)
    assert _cli(["-i", tmp_path / "in.npz", "-o", tmp_path / "out.npz", "--samples", "3",
                 "--param-variations", "M,a"]) == 0
    ref = k.integrate(y0, 12.0, transport=vt, variations=vv, param_variations=["M", "a"],
                      samples=np.linspace(0, 12, 3), rtol=1e-8)
    with np.load(tmp_path / "out.npz") as out:
        for key in ("y", "transport", "transport_samples", "variations",
                    "variations_samples"):
            np.testing.assert_array_equal(out[key], getattr(ref, key), err_msg=key)
        for name in ("M", "a"):
            np.testing.assert_array_equal(out[f"param_variation_{name}"],
                                          ref.param_variations[name])
    np.savez(tmp_path / "states.npz", y0=y0)
    assert _cli(["-i", tmp_path / "states.npz", "-o", tmp_path / "all.npz", "--variations",
                 "all", "--param-variations", "all"]) == 0
    ref = k.integrate(y0, 12.0, variations="all", param_variations=True, rtol=1e-8)
    with np.load(tmp_path / "all.npz") as out:
        np.testing.assert_array_equal(out["variations"], ref.variations)
        assert out["variations"].shape == (2, 8, 8)
        assert sorted(f for f in out.files if f.startswith("param_")) == \
            ["param_variation_M", "param_variation_a"]


@pytest.mark.parametrize("arrays,flags,message", [
    ({"y0": "ok", "transports": np.zeros((2, 1, 4))}, [], "unknown key 'transports'"),
    ({"states": "ok"}, [], "no key 'y0'"),
    ({"y0": "ok", "transport": np.zeros((2, 1, 3))}, [], "key 'transport' has shape"),
    ({"y0": "ok", "variations": np.zeros((3, 1, 8))}, [], "key 'variations' has shape"),
    ({"y0": "ok", "variations": np.zeros((2, 1, 8))}, ["--variations", "all"],
     "already holds variations"),
    ({"y0": "ok"}, ["--param-variations", "b"], "unknown parameter 'b'"),
])
def test_cli_refuses_bad_carried_input(tmp_path, capsys, arrays, flags, message):
    k = kernels("kerr", "numpy")
    arrays = {key: kerr_states(k) if isinstance(v, str) else v for key, v in arrays.items()}
    path = tmp_path / "bad.npz"
    np.savez(path, **arrays)
    assert _cli(["-i", path, "-o", tmp_path / "out.npz"] + flags) == 1
    err = capsys.readouterr().err
    assert message in err and err.startswith("metricc: error:")
    if "key" in message or "holds" in message:
        assert str(path) in err
    assert not (tmp_path / "out.npz").exists()
