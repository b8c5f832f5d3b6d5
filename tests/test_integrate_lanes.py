"""The C integrator's lanes (docs/integrator.md, "Implementation"): each thread advances 16
states side by side, one batch-kernel call per Runge-Kutta stage while every lane is busy,
and one-state steps when few are. None of that may show in the results: every state must get
bit for bit what it gets when integrated on its own, whatever the batch around it, its place
in the batch, the thread count or the build."""
from __future__ import annotations

import platform
import sys

import numpy as np
import pytest

import metricc
from tests.conftest import SPECS, needs_cc

FIELDS = ("y", "lam", "status_code", "steps", "samples")


def photons(k, n, seed):
    """Kerr photons from r = 30 M with impact parameters over capture and escape."""
    rng = np.random.default_rng(seed)
    y = np.zeros((n, 8))
    y[:, 1] = 30.0
    y[:, 2] = np.pi / 2 + rng.uniform(-0.3, 0.3, n)
    y[:, 4] = 1.0
    y[:, 6] = rng.uniform(-2e-3, 2e-3, n)
    y[:, 7] = rng.uniform(0.0, 8.0, n) / 900.0
    y = k.normalize(y, "null", solve_for=1)
    y[:, 5] = -np.abs(y[:, 5])
    return y


def awkward_batch(k, n=45, seed=11):
    """Photons plus states that stop at once or early: NaN, on the horizon event, outside the
    domain, and (through max_steps in the callers) cut short."""
    y = photons(k, n, seed)
    y[3, 2] = np.nan                      # bad_input at the start
    y[7, 1] = 1.0                         # inside the horizon event: stops at lambda = 0
    y[12, 2] = 0.0                        # on the axis: outside the domain
    return y


def assert_same(a, b, what):
    for f in FIELDS:
        x, y = getattr(a, f), getattr(b, f)
        if x is None:
            assert y is None, (what, f)
            continue
        np.testing.assert_array_equal(np.asarray(x), np.asarray(y), err_msg=f"{what}: {f}")


def one_by_one(k, y, lam_end, params=None, **kw):
    """The same integration state by state (each call a batch of one)."""
    parts = []
    for i in range(len(y)):
        p = None if params is None else {key: v[i:i + 1] for key, v in params.items()}
        parts.append(k.integrate(y[i:i + 1], lam_end, params=p, **kw))
    samples = None if parts[0].samples is None else np.concatenate([r.samples for r in parts])
    return type("Joined", (), {
        "y": np.concatenate([r.y for r in parts]), "lam": np.concatenate([r.lam for r in parts]),
        "status_code": np.concatenate([r.status_code for r in parts]),
        "steps": np.concatenate([r.steps for r in parts]), "samples": samples})


@needs_cc
@pytest.mark.parametrize("method", ["dop853", "dp5"])
def test_batch_equals_states_integrated_alone(shipped, method):
    k = shipped["kerr"]["c"]
    y = awkward_batch(k)
    spin = {"a": np.linspace(-0.95, 0.95, len(y))}
    kw = dict(rtol=1e-9, atol=1e-11, method=method, samples=[0.0, 5.0, 20.0, 45.0, 200.0])
    ref = one_by_one(k, y, 400.0, params=spin, threads=1, **kw)
    codes = set(np.asarray(ref.status_code).tolist())
    assert {0, 1, 5, 16} <= codes, codes        # done, domain, bad_input, horizon
    for threads in (1, 2, 3):
        batch = k.integrate(y, 400.0, params=spin, threads=threads, **kw)
        assert_same(batch, ref, f"{method}, {threads} thread(s)")
    # the same states in another order and in batches of other sizes (a full set of lanes,
    # a partly filled one, a few)
    order = np.random.default_rng(2).permutation(len(y))
    shuffled = k.integrate(y[order], 400.0, params={"a": spin["a"][order]}, threads=2, **kw)
    for f in FIELDS:
        np.testing.assert_array_equal(np.asarray(getattr(shuffled, f)),
                                      np.asarray(getattr(ref, f))[order], err_msg=f)
    for size in (3, 7, 17):
        part = k.integrate(y[:size], 400.0, params={"a": spin["a"][:size]}, threads=1, **kw)
        for f in FIELDS:
            np.testing.assert_array_equal(np.asarray(getattr(part, f)),
                                          np.asarray(getattr(ref, f))[:size], err_msg=f)


@needs_cc
def test_max_steps_and_backward_and_hamilton_in_lanes(shipped):
    k = shipped["kerr"]["c"]
    y = photons(k, 37, seed=5)
    for kw in (dict(max_steps=23), dict(max_steps=0)):
        assert_same(k.integrate(y, 400.0, threads=2, **kw), one_by_one(k, y, 400.0, **kw),
                    str(kw))
    back = dict(samples=[-3.0, -50.0, 1.0])
    assert_same(k.integrate(y, -80.0, threads=2, **back), one_by_one(k, y, -80.0, **back),
                "backward")
    z = k.momenta(y)
    assert_same(k.integrate(z, 300.0, form="hamilton", threads=2),
                one_by_one(k, z, 300.0, form="hamilton"), "hamilton")


@needs_cc
@pytest.mark.parametrize("name", ["schwarzschild", "ellipsoid", "kerr_schild", "minkowski"])
def test_other_specs_batch_equals_alone(shipped, name):
    """Dimensions 2 to 4, with and without parameters, events and domain."""
    k = shipped[name]["c"]
    rng = np.random.default_rng(8)
    n = 2 * k.dim
    y = rng.normal(size=(40, n))
    if name == "schwarzschild":
        y[:, 1] = rng.uniform(4.0, 20.0, 40)
        y[:, 2] = rng.uniform(0.5, 2.6, 40)
    if name == "kerr_schild":
        y[:, 1:4] *= 8.0
    kw = dict(samples=[0.0, 2.0, 9.0])
    assert_same(k.integrate(y, 25.0, threads=2, **kw), one_by_one(k, y, 25.0, **kw), name)


@needs_cc
@pytest.mark.skipif(not (sys.platform == "linux" and platform.machine() == "x86_64"),
                    reason="libmvec vector math needs x86-64 Linux")
def test_vector_math_build_integrates_like_the_plain_build(shipped):
    """The vector-math build's batch kernels use libmvec's sin/cos (a few ulp off); its
    integrator keeps to the single-state kernel, so the trajectories are the plain build's."""
    try:
        kv = metricc.load(SPECS / "kerr.toml", vector_math=True)
    except metricc.BuildError as exc:  # e.g. no libmvec on this system
        pytest.skip(f"vector-math build failed: {exc}")
    k = shipped["kerr"]["c"]
    y = awkward_batch(k, n=40, seed=3)
    kw = dict(samples=[1.0, 30.0], threads=2)
    assert_same(kv.integrate(y, 300.0, **kw), k.integrate(y, 300.0, **kw), "vector math")
