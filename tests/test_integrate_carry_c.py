"""NAME_integrate_carry, the C batch integrator's carried quantities (docs/integrator.md,
"Carried quantities"), called directly through cffi: parallel transport, variations and
parameter columns carried along each state.

- Without carried quantities in the error norm the state's integration is a plain run's, bit
  for bit (and carry = NULL is NAME_integrate itself).
- The carried values agree with a scipy solve_ivp reference (DOP853, rtol 1e-13 or 1e-12)
  of the augmented ODE, built from the runtime's kernels (k.tangent, k.transport_rhs,
  k.param_derivative), at lam_end, at samples and where a state stops on an event.
- Lanes, batch size, threads: each state gets the same bits as when integrated alone.
"""
from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest

import metricc
from tests.conftest import SPECS, needs_cc
from tests.test_integrate_lanes import awkward_batch, photons

pytestmark = needs_cc

BAD_INPUT, INTERRUPTED = 5, 6
FIELDS = ("y", "lam", "status", "steps", "samples")


@pytest.fixture(scope="module")
def specs():
    """name -> C kernels, for kerr and sphere."""
    return {name: metricc.load(SPECS / f"{name}.toml") for name in ("kerr", "sphere")}


def call(k, y0, lam_end, c0=None, transport=0, variations=0, param_index=(), error_control=1,
         params=None, method="dop853", form="geodesic", samples=None, threads=1, rtol=1e-10,
         atol=1e-12, max_steps=100000, entry="carry", interrupt=False):
    """One call of NAME_integrate_carry (entry="carry"; c0 None: carry = NULL) or of
    NAME_integrate (entry="plain"). params: dict name -> (N,) values (default: the spec's).
    Returns y, c, lam, status, steps, samples, c_samples (c, c_samples None without c0)."""
    ffi, lib = k._c.ffi, k._c.lib
    y0 = np.ascontiguousarray(y0, dtype=np.float64)
    N, n = y0.shape
    opt = ffi.new(f"{k.name}_integrator_options *")
    opt.rtol, opt.atol, opt.max_steps = rtol, atol, max_steps
    opt.method = 0 if method == "dp5" else 1
    opt.form = 0 if form == "geodesic" else 1
    opt.event_mask = 2 ** 64 - 1
    opt.threads = threads
    names = list(k.parameters)
    pv = np.ascontiguousarray(np.stack(
        [np.broadcast_to((params or {}).get(p, k.parameters[p]), (N,)) for p in names]
        or [np.zeros(N)], axis=-1), dtype=np.float64)
    S = 0 if samples is None else len(samples)
    s_arr = np.ascontiguousarray(samples if S else [0.0], dtype=np.float64)
    out = SimpleNamespace(y=np.empty((N, n)), lam=np.empty(N), status=np.empty(N, np.intc),
                          steps=np.empty(N, np.dtype(f"i{ffi.sizeof('long')}")),
                          samples=np.full((N, S, n), -1.0) if S else None, c=None,
                          c_samples=None)

    def buf(kind, a):
        return ffi.from_buffer(kind, a) if a is not None else ffi.NULL
    common = (buf("double[]", pv), len(names))
    if entry == "plain":
        getattr(lib, f"{k.name}_integrate")(
            N, buf("double[]", y0), lam_end, *common, opt, S, buf("double[]", s_arr),
            buf("double[]", out.y), buf("double[]", out.lam), buf("int[]", out.status),
            buf("long[]", out.steps), buf("double[]", out.samples))
        return out
    carry, c0_arr = ffi.NULL, None
    if c0 is not None:
        c0_arr = np.ascontiguousarray(c0, dtype=np.float64)
        nc = c0_arr.shape[1]
        carry = ffi.new(f"{k.name}_carry_options *")
        pidx = ffi.new("int[]", list(param_index) or [0])
        carry.n_transport, carry.n_variations = transport, variations
        carry.n_param, carry.param_index = len(param_index), pidx
        carry.error_control = error_control
        out.c = np.full((N, nc), -1.0)
        out.c_samples = np.full((N, S, nc), -1.0) if S else None
    flag = ffi.new("int *", 1 if interrupt else 0)
    getattr(lib, f"{k.name}_integrate_carry")(
        N, buf("double[]", y0), buf("double[]", c0_arr), lam_end, *common, opt, carry, S,
        buf("double[]", s_arr), buf("double[]", out.y), buf("double[]", out.c),
        buf("double[]", out.lam), buf("int[]", out.status), buf("long[]", out.steps),
        buf("double[]", out.samples), buf("double[]", out.c_samples), flag)
    return out


def carried_start(k, N, transport, variations, n_param, seed):
    """c0: random transported vectors and variation directions, parameter columns 0
    (d y0 / d param = 0: the initial state does not depend on the parameters)."""
    rng = np.random.default_rng(seed)
    D, S = k.dim, 2 * k.dim
    return np.concatenate([rng.normal(size=(N, transport * D + variations * S)),
                           np.zeros((N, n_param * S))], axis=1)


def augmented_rhs(k, form, transport, variations, param_index, params):
    """The augmented ODE (state + carried) for solve_ivp, from the runtime's kernels
    k.transport_rhs, k.tangent and k.param_derivative (C backend: a call costs a few tens of
    microseconds, the NumPy backend's over a millisecond). The integrator under test is not
    involved: only its right-hand side is shared."""
    D, S = k.dim, 2 * k.dim
    rhs = getattr(k, f"{form}_rhs")
    md = variations + len(param_index)

    def f(t, Y):
        y, c = Y[:S], Y[S:]
        parts = [rhs(y, params)]
        if transport:
            v = c[:transport * D].reshape(transport, D)
            parts.append(k.transport_rhs(y, v, params, form).ravel())
        if md:
            w = k.tangent(y, c[transport * D:].reshape(md, S), params, form)
            if param_index:
                w[variations:] += k.param_derivative(y, params, form)[list(param_index)]
            parts.append(w.ravel())
        return np.concatenate(parts)
    return f


def reference(k, y0, c0, lam, form, transport, variations, param_index, params, t_eval=None,
              rtol=1e-13):
    """scipy solve_ivp reference (DOP853, atol = rtol, 1e-13 by default) of the state and
    the carried values at lam (and of both at t_eval), for one state."""
    from scipy.integrate import solve_ivp
    S = 2 * k.dim
    sol = solve_ivp(augmented_rhs(k, form, transport, variations, param_index, params),
                    (0.0, lam), np.concatenate([y0, c0]), method="DOP853", rtol=rtol,
                    atol=rtol, dense_output=t_eval is not None)
    assert sol.success, sol.message
    end = sol.y[:, -1]
    at = None if t_eval is None else sol.sol(np.asarray(t_eval)).T
    return end[:S], end[S:], at


def assert_same(a, b, what, fields=FIELDS):
    for f in fields:
        x, y = getattr(a, f), getattr(b, f)
        if x is None:
            assert y is None, (what, f)
            continue
        np.testing.assert_array_equal(x, y, err_msg=f"{what}: {f}")


# -- (a) without carried error control, the state's integration is a plain run's --------------
@pytest.mark.parametrize("form", ["geodesic", "hamilton"])
@pytest.mark.parametrize("method", ["dop853", "dp5"])
@pytest.mark.parametrize("N", [64, 3])
def test_plain_steps_bit_for_bit(specs, form, method, N):
    """carry = NULL is NAME_integrate, and carrying 1 transported vector, 2 variations and a
    parameter column with error_control = 0 leaves y, lam, status, steps and samples bit for
    bit as they were: 64 states keep all 16 lanes busy (batch kernels), 3 take one-state
    steps; the batch has states stopping on the horizon, at the start and on the domain."""
    k = specs["kerr"]
    y = awkward_batch(k, n=max(N, 16), seed=4)[:N] if N > 3 else photons(k, N, seed=4)
    if form == "hamilton":
        y = k.momenta(y)
    spin = {"a": np.linspace(-0.9, 0.9, N)}
    kw = dict(params=spin, method=method, form=form, samples=[0.0, 5.0, 20.0, 45.0, 200.0],
              rtol=1e-9, atol=1e-11)
    plain = call(k, y, 400.0, entry="plain", **kw)
    if N > 3:
        assert {0, 16} <= set(plain.status.tolist()), plain.status   # done, horizon
    assert_same(call(k, y, 400.0, **kw), plain, "carry = NULL")
    c0 = carried_start(k, N, 1, 2, 1, seed=1)
    quiet = call(k, y, 400.0, c0=c0, transport=1, variations=2, param_index=[1],
                 error_control=0, **kw)
    assert_same(quiet, plain, "error_control = 0")
    assert np.isfinite(quiet.c[plain.status != BAD_INPUT]).all()
    # with the carried components in the norm the steps do change (the test above is not
    # vacuous: the carried part is integrated with the state)
    loud = call(k, y, 400.0, c0=c0, transport=1, variations=2, param_index=[1], **kw)
    assert (loud.steps > plain.steps).any()


# -- (b) the carried values against a scipy solve_ivp reference -------------------------------
CASES = [  # spec, form, method, transport, variations, parameter columns (names)
    ("kerr", "geodesic", "dop853", 2, 3, ["M", "a"]),
    ("kerr", "hamilton", "dop853", 1, 2, ["a"]),
    ("kerr", "geodesic", "dp5", 1, 2, ["a"]),
    ("sphere", "geodesic", "dop853", 1, 4, ["R"]),
    ("sphere", "hamilton", "dp5", 2, 1, ["R"]),
]


def case_states(k, name, N, seed):
    """States whose paths stay clear of coordinate singularities (the reference is then
    accurate far beyond the integrator's tolerance): Kerr photons from r = 30 M with impact
    parameters 5.5 to 8 M (they escape); great circles on the sphere inclined at most 0.8
    rad to the equator (sin(theta) >= 0.7 all along)."""
    rng = np.random.default_rng(seed)
    if name == "kerr":
        y = np.zeros((N, 8))
        y[:, 1], y[:, 4] = 30.0, 1.0
        y[:, 2] = np.pi / 2 + rng.uniform(-0.3, 0.3, N)
        y[:, 6] = rng.uniform(-2e-3, 2e-3, N)
        y[:, 7] = rng.uniform(5.5, 8.0, N) / 900.0
        y = k.normalize(y, "null", solve_for=1)
        y[:, 5] = -np.abs(y[:, 5])
        return y, {"a": np.linspace(0.5, 0.95, N)}
    incl = rng.uniform(-0.8, 0.8, N)              # the great circle's inclination
    speed = rng.uniform(0.5, 2.0, N)
    y = np.stack([np.full(N, np.pi / 2), rng.uniform(-np.pi, np.pi, N),
                  speed * np.sin(incl), speed * np.cos(incl)], axis=-1)
    return y, {"R": rng.uniform(0.5, 3.0, N)}


@pytest.mark.parametrize("name,form,method,mt,mv,pnames", CASES)
def test_carried_values_match_scipy_reference(specs, name, form, method, mt, mv, pnames):
    """Transport, variations and parameter columns at lam_end against scipy solve_ivp
    (DOP853, rtol 1e-13) of the augmented ODE: within 2e-10 of the largest reference value
    (the integrator runs at rtol 1e-11 with the carried components in the norm; measured:
    at most 3.3e-11, sphere with DP5). 20 states: all lanes busy at first, one-state steps
    at the end."""
    k = specs[name]
    N, lam_end = 20, 40.0 if name == "kerr" else 7.0
    y, params = case_states(k, name, N, seed=3)
    if form == "hamilton":
        y = k.momenta(y, params)
    pidx = [list(k.parameters).index(p) for p in pnames]
    c0 = carried_start(k, N, mt, mv, len(pidx), seed=5)
    res = call(k, y, lam_end, c0=c0, transport=mt, variations=mv, param_index=pidx,
               params=params, method=method, form=form, rtol=1e-11, atol=1e-13)
    assert (res.status == 0).all(), res.status
    for i in (0, 7, 19):
        p = {key: v[i] for key, v in params.items()}
        y_ref, c_ref, _ = reference(k, y[i], c0[i], lam_end, form, mt, mv, pidx, p)
        assert np.abs(res.y[i] - y_ref).max() <= 1e-9 * (1.0 + np.abs(y_ref).max())
        err = np.abs(res.c[i] - c_ref).max() / (1.0 + np.abs(c_ref).max())
        assert err <= 2e-10, (i, err)


# -- (c) samples and the value where an event stops the state ---------------------------------
def test_carried_samples_and_event_stop(specs):
    """Kerr photons aimed at the hole stop on the horizon event: the carried values there
    (the dense output at the crossing) and at samples along the way agree with the scipy
    solve_ivp reference (rtol 1e-12; its dense output, integrated to where the C integrator
    stopped), both methods. Relative to the largest reference value, within 3e-8 at the
    stop (the variations reach 1e7 at r = 1.01 r+; measured at most 3.9e-9) and 2e-9 at
    the samples (measured 1.9e-10 DOP853, 8.4e-11 DP5); a stop placed at the end of the
    step instead of the crossing, or samples at the wrong theta, miss by far more."""
    k = specs["kerr"]
    N = 3
    y = np.zeros((N, 8))
    y[:, 1], y[:, 2], y[:, 4] = 30.0, np.pi / 2 - 0.2, 1.0
    y[:, 7] = np.linspace(0.0, 2.5, N) / 900.0           # impact parameters below capture
    y = k.normalize(y, "null", solve_for=1)
    y[:, 5] = -np.abs(y[:, 5])
    samples = [0.0, 3.0, 11.5, 20.25, 27.0, 500.0]
    c0 = carried_start(k, N, 2, 2, 1, seed=9)
    runs = [call(k, y, 600.0, c0=c0, transport=2, variations=2, param_index=[1],
                 samples=samples, method=method) for method in ("dop853", "dp5")]
    for res in runs:
        assert (res.status == 16).all(), res.status       # the horizon event
    for i in range(N):
        stops = [res.lam[i] for res in runs]
        reached = [s for s in samples if s <= min(stops)]
        assert reached == samples[:5]
        _, _, at = reference(k, y[i], c0[i], max(stops), "geodesic", 2, 2, [1],
                             {"M": 1.0, "a": 0.9}, t_eval=reached + stops, rtol=1e-12)
        for m, res in enumerate(runs):
            c_ref = at[len(reached) + m, 8:]
            err = np.abs(res.c[i] - c_ref).max() / (1.0 + np.abs(c_ref).max())
            assert err <= 3e-8, (i, m, "stop", err)
            for j, s in enumerate(samples):
                if s <= res.lam[i]:
                    err = np.abs(res.c_samples[i, j] - at[j, 8:]).max()
                    assert err <= 2e-9 * (1.0 + np.abs(at[j, 8:]).max()), (i, m, s, err)
                else:
                    assert np.isnan(res.c_samples[i, j]).all()
            # the sample at lambda = 0 is c0 itself
            np.testing.assert_array_equal(res.c_samples[i, 0], c0[i])


# -- (d) lanes, batch size and threads do not show in the carried results ---------------------
@pytest.mark.parametrize("method", ["dop853", "dp5"])
def test_carried_batch_equals_states_alone(specs, method):
    """45 states (stopping on the horizon, at the start, on the domain, by max_steps in a
    second run) with per-state spins: 1 and 2 threads and each state alone give the same
    bits, carried values and samples included (batch kernels with 16 busy lanes, one state
    at a time otherwise)."""
    k = specs["kerr"]
    y = awkward_batch(k, n=45, seed=2)
    N = len(y)
    spin = {"a": np.linspace(-0.95, 0.95, N)}
    c0 = carried_start(k, N, 2, 3, 2, seed=4)
    kw = dict(c0=c0, transport=2, variations=3, param_index=[0, 1], params=spin,
              method=method, samples=[0.0, 5.0, 20.0, 45.0, 200.0], rtol=1e-9, atol=1e-11)
    fields = FIELDS + ("c", "c_samples")
    for extra in ({}, {"max_steps": 23}):
        one = call(k, y, 400.0, threads=1, **kw, **extra)
        assert_same(call(k, y, 400.0, threads=2, **kw, **extra), one, "2 threads", fields)
        for i in range(N):
            kw_i = dict(kw, c0=c0[i:i + 1], params={"a": spin["a"][i:i + 1]})
            alone = call(k, y[i:i + 1], 400.0, **kw_i, **extra)
            for f in fields:
                np.testing.assert_array_equal(getattr(alone, f)[0], getattr(one, f)[i],
                                              err_msg=f"state {i} {f} {extra}")


# -- starting and stopping ------------------------------------------------------------------
def test_carried_bad_input_and_interrupt(specs):
    """A non-finite carried start value makes its state (only) BAD_INPUT, with c0 returned;
    carry options that cannot be honoured (negative count, parameter index out of range)
    stop every state as BAD_INPUT; an interrupt raised before the call stops every state
    unstarted: c_out = c0, carried samples NaN."""
    k = specs["kerr"]
    y = photons(k, 5, seed=1)
    c0 = carried_start(k, 5, 1, 1, 0, seed=2)
    c0[2, 3] = np.inf
    res = call(k, y, 20.0, c0=c0, transport=1, variations=1)
    assert res.status.tolist() == [0, 0, BAD_INPUT, 0, 0]
    np.testing.assert_array_equal(res.c[2], c0[2])
    assert res.lam[2] == 0.0 and res.steps[2] == 0
    c1 = carried_start(k, 5, 0, 0, 1, seed=2)
    for kw in (dict(transport=-1, c0=c0), dict(param_index=[2], c0=c1)):
        bad = call(k, y, 20.0, **kw)
        assert (bad.status == BAD_INPUT).all(), kw
        np.testing.assert_array_equal(bad.y, y)
    stopped = call(k, y, 20.0, c0=c0, transport=1, variations=1, samples=[0.0, 1.0],
                   interrupt=True)
    assert (stopped.status == INTERRUPTED).all()
    np.testing.assert_array_equal(stopped.c, c0)
    assert np.isnan(stopped.c_samples).all()
