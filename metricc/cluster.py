"""Scale-out with Dask: picklable kernels, lazy dask-array integration, a cluster map.

metricc does not schedule anything itself. A :class:`~metricc.MetricKernels` object pickles
as its spec text (nothing machine-specific): a worker rebuilds it on first use, normally by
loading the compiled module from its own cache, and keeps it for later tasks (keyed by the
spec hash, backend and kernel options). ``k.integrate`` on a dask array returns dask arrays,
one compiled call per chunk; :func:`map_integrate` sends chunks of a NumPy batch (camera
tiles, parameter grids) to a ``dask.distributed.Client`` and gathers them in order.
"""
from __future__ import annotations

import numpy as np

_REBUILT: dict = {}


def rebuild(source: str, path: str, backend: str, kernels: tuple, vector_math: bool = False):
    """Unpickle a MetricKernels: the same spec, loaded once per process."""
    from .runtime import open_spec
    from .spec import parse_spec
    spec = parse_spec(source, path)
    key = (spec.sha256, backend, tuple(kernels), vector_math)
    k = _REBUILT.get(key)
    if k is None:
        k = open_spec(spec, backend, list(kernels) or None, vector_math)
        _REBUILT[key] = k
    return k


def is_dask_array(obj) -> bool:
    return type(obj).__module__.startswith("dask.") and hasattr(obj, "chunks") \
        and hasattr(obj, "to_delayed")


def _integrate_block(k, block, lam_end, params, kwargs):
    """One compiled integrate call on one chunk (runs on a worker)."""
    return k.integrate(np.asarray(block), lam_end, params=params or None, **kwargs)


def _fields(res):
    fields = {"y": res.y, "lam": res.lam, "status": res.status, "steps": res.steps,
              "drift": res.drift, "status_code": res.status_code}
    if res.samples is not None:
        fields["samples"] = res.samples
    for name, v in res.invariant_drift.items():
        fields["invariant:" + name] = v
    return fields


def integrate_dask(k, y0, lam_end, params=None, **kwargs):
    """Lazy integration of a dask array y0 (N, 2*dim) chunked along axis 0.

    Returns an IntegrationResult whose arrays are dask arrays with the same chunks along the
    batch axis; nothing runs until they are computed. Per-state parameters may be NumPy or
    dask arrays of shape (N,).
    """
    import dask
    import dask.array as da
    from .integrate import IntegrationResult

    if y0.ndim != 2 or y0.shape[1] != 2 * k.dim:
        raise ValueError(f"{k.name}.integrate: a dask array of states must have shape "
                         f"(N, {2 * k.dim}), got {y0.shape}")
    kwargs.pop("progress", None)  # Dask reports progress itself (dashboard, progress bars)
    y0 = y0.rechunk({1: -1}).astype(np.float64)
    bounds = np.cumsum((0,) + y0.chunks[0])
    param_blocks = []
    for i in range(len(y0.chunks[0])):
        block = {}
        for name, value in (params or {}).items():
            if is_dask_array(value):
                value = value.rechunk((y0.chunks[0],))
                block[name] = value.to_delayed().ravel()[i]
            else:
                arr = np.asarray(value, dtype=np.float64)
                block[name] = arr if arr.ndim == 0 else arr[bounds[i]:bounds[i + 1]]
        param_blocks.append(block)
    n_samples = 0 if kwargs.get("samples") is None else len(np.asarray(kwargs["samples"]))
    width = max([len(s) for s in k.event_names] + [14])
    results = [dask.delayed(_integrate_block, pure=True)(k, blk, lam_end, pb, kwargs)
               for blk, pb in zip(y0.to_delayed().ravel(), param_blocks)]
    n = 2 * k.dim

    def column(field, tail, dtype):
        parts = [da.from_delayed(dask.delayed(lambda r, f=field: _fields(r)[f])(r),
                                 shape=(int(c),) + tail, dtype=dtype)
                 for r, c in zip(results, y0.chunks[0])]
        return da.concatenate(parts, axis=0)

    return IntegrationResult(
        y=column("y", (n,), np.float64), lam=column("lam", (), np.float64),
        status=column("status", (), np.dtype(f"<U{width}")),
        steps=column("steps", (), np.int64),
        samples=column("samples", (n_samples, n), np.float64) if n_samples else None,
        drift=column("drift", (), np.float64),
        status_code=column("status_code", (), np.int32),
        invariant_drift={name: column("invariant:" + name, (), np.float64)
                         for name in k.invariant_names})


def map_integrate(client, k, y0, lam_end, params=None, chunk_size: int = 20000, **kwargs):
    """Integrate a NumPy batch on a dask.distributed cluster; results gathered in order.

    y0: (..., 2*dim) states (a camera image (H, W, 2*dim), a parameter grid, ...), split into
    chunks of ``chunk_size`` states along the flattened batch; per-state parameters are split
    the same way. Returns an IntegrationResult of NumPy arrays shaped like a local
    ``k.integrate`` call. Chunks are independent tasks, so a lost worker's chunks are simply
    recomputed by Dask.
    """
    from .integrate import IntegrationResult
    y0 = np.asarray(y0, dtype=np.float64)
    lead = y0.shape[:-1]
    flat = y0.reshape(-1, y0.shape[-1])
    N = flat.shape[0]
    pflat = {name: np.broadcast_to(np.asarray(v, dtype=np.float64), lead).reshape(-1)
             for name, v in (params or {}).items()}
    kwargs.pop("progress", None)
    starts = list(range(0, N, max(1, int(chunk_size))))
    futures = [client.submit(_integrate_block, k, flat[s:s + chunk_size], lam_end,
                             {name: v[s:s + chunk_size] for name, v in pflat.items()}, kwargs,
                             pure=False)
               for s in starts]
    parts = client.gather(futures)
    fields = [_fields(r) for r in parts]

    def join(name):
        return np.concatenate([f[name] for f in fields], axis=0)

    def shaped(arr):
        return arr.reshape(lead + arr.shape[1:])

    samples = shaped(join("samples")) if "samples" in fields[0] else None
    return IntegrationResult(
        y=shaped(join("y")), lam=shaped(join("lam")), status=shaped(join("status")),
        steps=shaped(join("steps")), samples=samples, drift=shaped(join("drift")),
        status_code=shaped(join("status_code")),
        invariant_drift={name: shaped(join("invariant:" + name)) for name in k.invariant_names})
