"""Integrator faults (issue 12, section 4): honest statuses for states that cannot start,
one validation of the options for both backends, any number of events, Ctrl-C during a
long C integration, and a NumPy loop whose cost follows the running states only.

Reference values: the Kerr horizon r+ = M + sqrt(M^2 - a^2) (Boyer & Lindquist 1967), so
|a| > M leaves no horizon and the spec's horizon expression is NaN; the circular-orbit
angular velocity Omega = 1 / (r^1.5 + a) (Bardeen, Press & Teukolsky 1972); straight lines
x = lambda in flat space (common practice).
"""
from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

import metricc
from metricc import integrate as integrate_module
from tests.conftest import SPECS, have_compiler

BACKENDS = ["numpy", pytest.param("c", marks=pytest.mark.skipif(not have_compiler(),
                                                                 reason="no C compiler"))]
ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(params=BACKENDS)
def backend(request):
    return request.param


def kerr_circular(k, r=10.0, a=0.9):
    """Prograde circular equatorial orbit, Omega = 1 / (r^1.5 + a) (BPT 1972), u^t from
    g(u, u) = -1 with the spec's own metric."""
    x = np.array([0.0, r, np.pi / 2, 0.0])
    g = k.metric(x, {"a": a})
    omega = 1.0 / (r ** 1.5 + a)
    ut = 1.0 / np.sqrt(-(g[0, 0] + 2 * g[0, 3] * omega + g[3, 3] * omega ** 2))
    return np.array([0.0, r, np.pi / 2, 0.0, ut, 0.0, 0.0, omega * ut])


# -- honest statuses -----------------------------------------------------------------------
def test_nan_or_out_of_range_parameters_are_bad_input(shipped, backend):
    """a = NaN, and a = 1.5 > M (no horizon: r+ is NaN, Boyer & Lindquist 1967), cannot be
    started: "bad_input" at lambda = 0 with no steps, not the horizon event."""
    k = shipped["kerr"][backend]
    y0 = np.array([kerr_circular(k)] * 3)
    res = k.integrate(y0, 50.0, params={"a": np.array([0.9, np.nan, 1.5])})
    assert list(res.status) == ["done", "bad_input", "bad_input"]
    np.testing.assert_array_equal(res.lam[1:], 0.0)
    np.testing.assert_array_equal(res.steps[1:], 0)
    np.testing.assert_array_equal(res.y[1:], y0[1:])
    np.testing.assert_array_equal(res.status_code[1:], integrate_module.BAD_INPUT)


def test_nan_state_is_bad_input(shipped, backend):
    k = shipped["kerr"][backend]
    y0 = np.array([kerr_circular(k)] * 2)
    y0[1, 6] = np.nan
    res = k.integrate(y0, 50.0)
    assert list(res.status) == ["done", "bad_input"]


SQRT_SPEC = '''name = "rootline"
coordinates = ["x", "y"]
[parameters]
c = 2.0
[metric]
x.x = "1 + sqrt(c - x)"
y.y = "1"
'''


def test_rhs_not_finite_at_start_is_bad_input(tmp_path, backend):
    """x > c: sqrt(c - x) is NaN, so is the right-hand side; no stop function exists. Such a
    start is "bad_input", not "not_finite" after a cascade of rejected steps."""
    k = metricc.loads(SQRT_SPEC, backend=backend)
    y0 = np.array([[0.0, 0.0, 0.1, 1.0],      # x < c: fine
                   [3.0, 0.0, 0.1, 1.0]])     # x > c: f(y0) is NaN
    res = k.integrate(y0, 1.0)
    assert list(res.status) == ["done", "bad_input"]
    assert res.steps[1] == 0


@pytest.mark.parametrize("rtol, atol", [(1e-300, 0.0), (1e-300, 1e-12), (1e-16, 1e-16),
                                        (np.nan, 1e-12), (1e-10, -1.0), (1e-10, np.inf)])
def test_unreachable_tolerances_are_refused(shipped, backend, rtol, atol):
    """rtol below 100 ulp of 1 (scipy's solve_ivp floor, common practice) asks for more than
    double precision: refused with the argument's name, rather than states that end as
    "not_finite" (rtol 1e-300, atol 0) or take different steps on C and NumPy (1e-16)."""
    k = shipped["kerr"][backend]
    name = "atol" if rtol == 1e-10 else "rtol"
    with pytest.raises(ValueError, match=name):
        k.integrate(kerr_circular(k)[None], 50.0, rtol=rtol, atol=atol)


def test_smallest_rtol_is_accepted(shipped, backend):
    k = shipped["kerr"][backend]
    res = k.integrate(kerr_circular(k)[None], 20.0, rtol=integrate_module.RTOL_MIN)
    assert list(res.status) == ["done"]


# -- one validation of counts for both backends -------------------------------------------
@pytest.mark.parametrize("value", [2 ** 40, 1e30, float("inf"), 2 ** 70, np.int64(500)])
def test_large_max_steps_mean_no_limit(shipped, backend, value):
    k = shipped["kerr"][backend]
    res = k.integrate(kerr_circular(k)[None], 50.0, max_steps=value)
    assert list(res.status) == ["done"]


@pytest.mark.parametrize("name, value", [("max_steps", float("nan")), ("max_steps", -1),
                                         ("max_steps", 2.5), ("max_steps", "100"),
                                         ("threads", 2 ** 40), ("threads", 1e30),
                                         ("threads", float("inf")), ("threads", float("nan")),
                                         ("threads", 0), ("threads", 1.5)])
def test_bad_counts_raise_value_error_naming_the_argument(shipped, backend, name, value):
    k = shipped["kerr"][backend]
    with pytest.raises(ValueError, match=name):
        k.integrate(kerr_circular(k)[None], 50.0, **{name: value})


# -- more than 64 events -------------------------------------------------------------------
N_EVENTS = 70


def many_events_spec() -> str:
    """Flat 2-D space with 70 events: wall_k = (1000 - k) - x, crossed at x = 1000 - k."""
    lines = ['name = "walls"', 'coordinates = ["t", "x"]', 'signature = "-+"',
             'line_element = "-dt^2 + dx^2"', "[events]"]
    lines += [f'wall_{k} = "{1000 - k} - x"' for k in range(N_EVENTS)]
    return "\n".join(lines) + "\n"


@pytest.fixture(scope="module")
def walls():
    return {be: (metricc.loads(many_events_spec(), backend=be)
                 if be == "numpy" or have_compiler() else None) for be in ("numpy", "c")}


@pytest.mark.parametrize("events, first", [(None, N_EVENTS - 1), (["wall_66"], 66),
                                           (["wall_3", "wall_65"], 65), (["wall_63"], 63),
                                           (["wall_64"], 64), (["wall_0"], 0)])
def test_more_than_64_events(walls, backend, events, first):
    """u = (1, 1) from x = 0: the particle meets wall k at lambda = 1000 - k (a straight
    line, common practice); the first active wall stops it, whichever word of the event
    mask holds its bit."""
    k = walls[backend]
    if k is None:
        pytest.skip("no C compiler")
    y0 = np.array([[0.0, 0.0, 1.0, 1.0]])
    res = k.integrate(y0, 2000.0, events=events)
    assert list(res.status) == [f"wall_{first}"]
    np.testing.assert_allclose(res.lam, 1000.0 - first, rtol=1e-11)
    np.testing.assert_allclose(res.y[0, 1], 1000.0 - first, rtol=1e-11)
    none = k.integrate(y0, 2000.0, events=[])
    assert list(none.status) == ["done"]


# -- Ctrl-C --------------------------------------------------------------------------------
@pytest.mark.skipif(not have_compiler(), reason="no C compiler")
def test_interrupt_flag_stops_every_state(shipped):
    """The standalone entry point kerr_integrate_interruptible: a raised interrupt flag stops
    every state with status INTERRUPTED at its initial state (here raised before the call);
    kerr_integrate keeps its signature and options."""
    k = shipped["kerr"]["c"]
    ffi, lib = k._c.ffi, k._c.lib
    y0 = np.array([kerr_circular(k)] * 40)
    n = len(y0)
    opt = ffi.new("kerr_integrator_options *")
    opt.rtol, opt.atol, opt.max_steps, opt.method = 1e-10, 1e-12, 100000, 1   # DOP853
    flag = ffi.new("int *", 1)
    p = np.array(list(k.parameters.values()))
    y_out, lam = np.full((n, 8), np.nan), np.full(n, np.nan)
    status = np.full(n, -7, dtype=np.intc)
    steps = np.full(n, -7, dtype=np.dtype(f"i{ffi.sizeof('long')}"))
    lib.kerr_integrate_interruptible(
        n, ffi.from_buffer("double[]", y0), 1e6, ffi.from_buffer("double[]", p), 0, opt, 0,
        ffi.NULL, ffi.from_buffer("double[]", y_out), ffi.from_buffer("double[]", lam),
        ffi.from_buffer("int[]", status), ffi.from_buffer("long[]", steps), ffi.NULL, flag)
    np.testing.assert_array_equal(status, integrate_module.INTERRUPTED)
    np.testing.assert_array_equal(y_out, y0)
    np.testing.assert_array_equal(lam, 0.0)
    np.testing.assert_array_equal(steps, 0)


CTRL_C_SCRIPT = r"""
import sys, time
import numpy as np
import metricc
k = metricc.load(sys.argv[1], backend="c")
y = np.zeros((64, 8))
y[:, 1] = np.linspace(10.0, 12.0, 64)
y[:, 2] = np.pi / 2
y[:, 4] = 1.0
y[:, 7] = 0.03
y = k.normalize(y, "timelike", solve_for=0)
print("start", flush=True)
t0 = time.perf_counter()
try:
    k.integrate(y, 1e9, rtol=1e-13, atol=1e-14, max_steps=10**9, threads=1)
except KeyboardInterrupt:
    print("interrupted after %.2f s" % (time.perf_counter() - t0), flush=True)
    raise
print("finished", flush=True)
"""


@pytest.mark.skipif(not have_compiler(), reason="no C compiler")
def test_ctrl_c_stops_a_long_c_integration(shipped, tmp_path):
    """64 bound orbits to lambda = 1e9 with max_steps 1e9 would run for hours; SIGINT one
    second in must end the process with KeyboardInterrupt within a few seconds (a bound,
    not a speed measurement)."""
    assert shipped["kerr"]["c"] is not None           # built: the child loads from the cache
    script = tmp_path / "long_run.py"
    script.write_text(CTRL_C_SCRIPT)
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.Popen([sys.executable, str(script), str(SPECS / "kerr.toml")],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=env, cwd=str(ROOT))
    try:
        assert proc.stdout.readline().strip() == "start"
        time.sleep(1.0)
        proc.send_signal(signal.SIGINT)
        t0 = time.monotonic()
        out, err = proc.communicate(timeout=20)
        elapsed = time.monotonic() - t0
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert "interrupted after" in out, (out, err)
    assert "KeyboardInterrupt" in err
    assert proc.returncode != 0
    assert elapsed < 10.0


# -- NumPy: finished states cost nothing per step ------------------------------------------
class _ScanCounter:
    """Stands in for numpy inside metricc.integrate, recording the size of every
    flatnonzero call (the scans for running states)."""

    def __init__(self):
        self.sizes = []

    def flatnonzero(self, a):
        self.sizes.append(np.size(a))
        return np.flatnonzero(a)

    def __getattr__(self, name):
        return getattr(np, name)


def test_numpy_steps_do_not_scan_finished_states(shipped, monkeypatch):
    """One orbit running 300 steps among 2000 states that stop at once: after the start,
    no step looks at the whole batch (the loop keeps the running states' indices)."""
    k = shipped["kerr"]["numpy"]
    slow = kerr_circular(k)[None]
    fast = np.repeat(slow, 2000, axis=0)
    fast[:, 1] = 1.44          # r+ = 1.436 < r < 1.01 r+: the horizon event stops them at 0
    counter = _ScanCounter()
    monkeypatch.setattr(integrate_module, "np", counter)
    res = k.integrate(np.concatenate([slow, fast]), 1e6, max_steps=300)
    assert res.status[0] == "max_steps" and res.steps[0] == 300
    full = [s for s in counter.sizes if s >= len(fast)]
    assert len(full) <= 3, counter.sizes[:20]


@pytest.mark.parametrize("status", ["bad_input", "interrupted"])
def test_new_statuses_are_reserved_event_names(status):
    """An event named like a status would make the two indistinguishable in res.status."""
    text = ('name = "flat"\ncoordinates = ["t", "x"]\nline_element = "-dt^2 + dx^2"\n'
            f'[events]\n{status} = "x - 1"\n')
    with pytest.raises(metricc.SpecError, match=status):
        metricc.loads(text, backend="numpy")


FLAT2 = ('name = "flat2"\ncoordinates = ["t", "x"]\nsignature = "-+"\n'
         'line_element = "-dt^2 + dx^2"\n')


def test_pure_relative_tolerance_with_a_zero_component(backend):
    """atol = 0 and x, u^x exactly 0 all along (a particle at rest in flat space, common
    practice): the error scale of those components is 0; the state is finite and must end
    "done" at x = 0, t = lambda, not "not_finite" from 0 / 0 in the error norm."""
    k = metricc.loads(FLAT2, backend=backend)
    res = k.integrate(np.array([[0.0, 0.0, 1.0, 0.0], [0.0, 0.0, 1.0, 0.5]]), 10.0, atol=0.0)
    assert list(res.status) == ["done", "done"]
    np.testing.assert_allclose(res.y[:, 0], 10.0, rtol=1e-13)
    np.testing.assert_allclose(res.y[:, 1], [0.0, 5.0], rtol=1e-13, atol=0)
