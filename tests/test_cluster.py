"""Dask scale-out: pickling, lazy dask-array integration, a 2-process cluster, lost workers."""
from __future__ import annotations

import os
import pickle
import time

import numpy as np
import pytest

import metricc
from tests.conftest import SPECS

dask = pytest.importorskip("dask")
da = pytest.importorskip("dask.array")
distributed = pytest.importorskip("dask.distributed")


def photons(n: int, r0: float = 1000.0) -> np.ndarray:
    """Equatorial Schwarzschild photons from r0 aimed inward, impact parameters 0..10 M."""
    f = 1 - 2 / r0
    b = np.linspace(0.0, 10.0, n)
    y = np.zeros((n, 8))
    y[:, 1], y[:, 2], y[:, 4], y[:, 7] = r0, np.pi / 2, 1 / f, b / r0**2
    y[:, 5] = -np.sqrt(f * (f * y[:, 4] ** 2 - r0**2 * y[:, 7] ** 2))
    return y


@pytest.fixture(scope="module")
def kerr():
    return metricc.load(SPECS / "kerr.toml")


@pytest.fixture(scope="module")
def cluster():
    from dask.distributed import Client, LocalCluster
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cl, Client(cl) as client:
        yield cl, client


def test_pickle_carries_only_the_spec(kerr):
    blob = pickle.dumps(kerr)
    assert len(blob) < 5000
    assert str(kerr.cache_dir).encode() not in blob
    again = pickle.loads(blob)
    x = np.array([0.0, 6.0, 1.0, 0.0])
    np.testing.assert_array_equal(again.christoffel(x), kerr.christoffel(x))
    assert pickle.loads(blob) is again  # one rebuild per process


def test_dask_array_integration_is_lazy_and_exact(kerr):
    y = photons(600)
    ref = kerr.integrate(y, 2500.0, samples=[0.0, 500.0])
    lazy = kerr.integrate(da.from_array(y, chunks=(150, 8)), 2500.0, samples=[0.0, 500.0])
    assert isinstance(lazy.y, da.Array) and lazy.y.chunks[0] == (150,) * 4
    y_end, status, steps, samples = dask.compute(lazy.y, lazy.status, lazy.steps,
                                                 lazy.samples, scheduler="synchronous")
    np.testing.assert_array_equal(y_end, ref.y)
    np.testing.assert_array_equal(status, ref.status)
    np.testing.assert_array_equal(steps, ref.steps)
    np.testing.assert_array_equal(samples, ref.samples)


def test_per_state_parameters_follow_their_chunks(kerr):
    y = photons(200)
    spins = np.linspace(-0.9, 0.9, 200)
    ref = kerr.integrate(y, 2500.0, params={"a": spins})
    lazy = kerr.integrate(da.from_array(y, chunks=(64, 8)), 2500.0,
                          params={"a": da.from_array(spins, chunks=50)})
    np.testing.assert_array_equal(lazy.y.compute(scheduler="synchronous"), ref.y)


@pytest.mark.slow
def test_two_worker_cluster_matches_single_process(kerr, cluster):
    _, client = cluster
    from metricc.cluster import map_integrate
    y = photons(3000)
    ref = kerr.integrate(y, 2500.0)
    lazy = kerr.integrate(da.from_array(y, chunks=(500, 8)), 2500.0)
    y_end, status = dask.compute(lazy.y, lazy.status)
    np.testing.assert_array_equal(y_end, ref.y)
    np.testing.assert_array_equal(status, ref.status)
    res = map_integrate(client, kerr, y.reshape(30, 100, 8), 2500.0, chunk_size=400)
    assert res.y.shape == (30, 100, 8)
    np.testing.assert_array_equal(res.y.reshape(-1, 8), ref.y)
    np.testing.assert_array_equal(res.status.reshape(-1), ref.status)


def _slow_chunk(k, y, lam_end):
    time.sleep(0.4)  # long enough for the test to kill a worker mid-run
    return k.integrate(y, lam_end).y


@pytest.mark.slow
def test_killed_worker_chunks_are_recomputed_exactly(kerr, cluster):
    cl, client = cluster
    y = photons(800)
    ref = kerr.integrate(y, 2500.0)
    chunks = [y[i:i + 100] for i in range(0, 800, 100)]
    futures = [client.submit(_slow_chunk, kerr, c, 2500.0, pure=False) for c in chunks]
    time.sleep(0.6)
    victim = sorted(client.scheduler_info()["workers"])[0]
    # Kill the worker process outright; its nanny restarts it and Dask reruns its tasks.
    try:
        client.run(os._exit, 1, workers=[victim], on_error="ignore")
    except OSError:  # the connection to the dying worker closes under the call
        pass
    out = np.concatenate(client.gather(futures), axis=0)
    np.testing.assert_array_equal(out, ref.y)
    assert victim not in client.scheduler_info()["workers"]  # it really died
