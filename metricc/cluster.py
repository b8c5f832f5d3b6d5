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


def _integrate_block(k, block, lam_end, params, kwargs, carried=None):
    """One compiled integrate call on one chunk (runs on a worker); carried: this chunk's
    transport / variations arrays, by keyword."""
    more = {name: np.asarray(v) for name, v in (carried or {}).items()}
    return k.integrate(np.asarray(block), lam_end, params=params or None, **kwargs, **more)


CARRIED_FIELDS = ("transport", "transport_samples", "variations", "variations_samples")


def _fields(res):
    fields = {"y": res.y, "lam": res.lam, "status": res.status, "steps": res.steps,
              "drift": res.drift, "status_code": res.status_code}
    if res.samples is not None:
        fields["samples"] = res.samples
    for name, v in res.invariant_drift.items():
        fields["invariant:" + name] = v
    for name in CARRIED_FIELDS:
        if getattr(res, name) is not None:
            fields[name] = getattr(res, name)
    for name, v in (res.param_variations or {}).items():
        fields["param:" + name] = v
    return fields


def _carried_arrays(k, lead: tuple, kwargs: dict) -> dict:
    """Pop transport and variations (arrays, not "all") from kwargs, each as an array of
    shape (N, m, width), N = prod(lead), leading axes broadcast (NumPy, or dask with
    lead = (N,)), for per-chunk slicing. Shapes are checked here, before anything runs;
    values (finite) by k.integrate on each chunk."""
    N = int(np.prod(lead, dtype=np.int64))
    out = {}
    for name, width in (("transport", k.dim), ("variations", 2 * k.dim)):
        value = kwargs.get(name)
        if value is None or isinstance(value, str):
            continue
        kwargs.pop(name)
        if is_dask_array(value):
            import dask.array as da
            arr = da.broadcast_to(value, lead + value.shape) if value.ndim == 2 else value
            ok = arr.shape[:-2] == lead and arr.ndim == len(lead) + 2 and \
                arr.shape[-1] == width
        else:
            arr = np.asarray(value, dtype=np.float64)
            ok = arr.ndim >= 2 and arr.shape[-1] == width
            try:
                arr = np.broadcast_to(arr, lead + arr.shape[-2:]) if ok else arr
            except ValueError:
                ok = False
        if not ok:
            raise ValueError(f"{k.name}.integrate: {name} must have shape {lead} + (m, "
                             f"{width}) (leading axes broadcast), got {value.shape}")
        out[name] = arr.reshape((N,) + arr.shape[-2:])
    return out


def integrate_dask(k, y0, lam_end, params=None, **kwargs):
    """Lazy integration of a dask array y0 (N, 2*dim) chunked along axis 0.

    Returns an IntegrationResult whose arrays are dask arrays with the same chunks along the
    batch axis; nothing runs until they are computed. Per-state parameters may be NumPy or
    dask arrays of shape (N,); transport (N, m, dim) and variations (N, m, 2*dim) likewise
    (or "all"), each chunk integrating its own rows. Carried results (transport,
    variations, their samples, the param_variations dict) are dask arrays too.
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
    carried = _carried_arrays(k, (y0.shape[0],), kwargs)
    param_blocks, carried_blocks = [], []
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
        # each chunk gets its own rows of the carried vectors (a delayed block for dask)
        carried_blocks.append({
            name: arr.rechunk((y0.chunks[0], -1, -1)).to_delayed().ravel()[i]
            if is_dask_array(arr) else np.ascontiguousarray(arr[bounds[i]:bounds[i + 1]])
            for name, arr in carried.items()})
    n_samples = 0 if kwargs.get("samples") is None else len(np.asarray(kwargs["samples"]))
    width = max([len(s) for s in k.event_names] + [14])
    results = [dask.delayed(_integrate_block, pure=True)(k, blk, lam_end, pb, kwargs, cb)
               for blk, pb, cb in zip(y0.to_delayed().ravel(), param_blocks, carried_blocks)]
    n = 2 * k.dim

    def column(field, tail, dtype):
        parts = [da.from_delayed(dask.delayed(lambda r, f=field: _fields(r)[f])(r),
                                 shape=(int(c),) + tail, dtype=dtype)
                 for r, c in zip(results, y0.chunks[0])]
        return da.concatenate(parts, axis=0)

    extra = _carried_columns(k, kwargs, carried, n_samples, column)
    return IntegrationResult(**extra,
        y=column("y", (n,), np.float64), lam=column("lam", (), np.float64),
        status=column("status", (), np.dtype(f"<U{width}")),
        steps=column("steps", (), np.int64),
        samples=column("samples", (n_samples, n), np.float64) if n_samples else None,
        drift=column("drift", (), np.float64),
        status_code=column("status_code", (), np.int32),
        invariant_drift={name: column("invariant:" + name, (), np.float64)
                         for name in k.invariant_names})


def _carried_columns(k, kwargs, carried, n_samples, column) -> dict:
    """The carried-quantity fields of a lazy result: column(field, tail, dtype) -> dask
    array, for the shapes k.integrate returns per chunk."""
    n = 2 * k.dim
    out = {}
    for name, size in (("transport", k.dim), ("variations", n)):
        if name in carried:
            m = carried[name].shape[1]
        elif name == "variations" and isinstance(kwargs.get(name), str):
            m = n   # "all": (N, S, S); anything else is refused by k.integrate
        else:
            continue
        out[name] = column(name, (m, size), np.float64)
        if n_samples:
            out[name + "_samples"] = column(name + "_samples", (n_samples, m, size), np.float64)
    names = kwargs.get("param_variations")
    if names is True:
        names = list(k.parameters)
    elif isinstance(names, str):
        names = [names]
    if names not in (None, False):
        out["param_variations"] = {p: column("param:" + p, (n,), np.float64) for p in names}
    return out


def map_integrate(client, k, y0, lam_end, params=None, chunk_size: int = 20000, **kwargs):
    """Integrate a NumPy batch on a dask.distributed cluster; results gathered in order.

    y0: (..., 2*dim) states (a camera image (H, W, 2*dim), a parameter grid, ...), split into
    chunks of ``chunk_size`` states along the flattened batch; per-state parameters are split
    the same way. Returns an IntegrationResult of NumPy arrays shaped like a local
    ``k.integrate`` call, carried quantities included (transport and variations arrays are
    split like the states). Chunks are independent tasks, so a lost worker's chunks are
    simply recomputed by Dask.
    """
    from .integrate import IntegrationResult
    y0 = np.asarray(y0, dtype=np.float64)
    lead = y0.shape[:-1]
    flat = y0.reshape(-1, y0.shape[-1])
    N = flat.shape[0]
    pflat = {name: np.broadcast_to(np.asarray(v, dtype=np.float64), lead).reshape(-1)
             for name, v in (params or {}).items()}
    kwargs.pop("progress", None)
    carried = _carried_arrays(k, lead, kwargs)
    starts = list(range(0, N, max(1, int(chunk_size))))
    futures = [client.submit(_integrate_block, k, flat[s:s + chunk_size], lam_end,
                             {name: v[s:s + chunk_size] for name, v in pflat.items()}, kwargs,
                             {name: np.ascontiguousarray(v[s:s + chunk_size])
                              for name, v in carried.items()}, pure=False)
               for s in starts]
    parts = client.gather(futures)
    fields = [_fields(r) for r in parts]

    def join(name):
        return np.concatenate([f[name] for f in fields], axis=0)

    def shaped(arr):
        return arr.reshape(lead + arr.shape[1:])

    samples = shaped(join("samples")) if "samples" in fields[0] else None
    extra = {name: shaped(join(name)) for name in CARRIED_FIELDS if name in fields[0]}
    pv = [f[6:] for f in fields[0] if f.startswith("param:")]
    if pv or kwargs.get("param_variations") not in (None, False):
        extra["param_variations"] = {p: shaped(join("param:" + p)) for p in pv}
    return IntegrationResult(**extra,
        y=shaped(join("y")), lam=shaped(join("lam")), status=shaped(join("status")),
        steps=shaped(join("steps")), samples=samples, drift=shaped(join("drift")),
        status_code=shaped(join("status_code")),
        invariant_drift={name: shaped(join("invariant:" + name)) for name in k.invariant_names})
