"""Stage 6: the object users call.

:class:`MetricKernels` wraps one spec's compiled (C via cffi) or NumPy kernels. Every method
takes arrays with any leading batch axes and returns arrays with the same leading axes;
``params`` is a dict name -> float or array broadcastable to those axes (one value per state
for parameter scans). This module needs only numpy and the compiled module: it imports neither
sympy nor the code generator.
"""
from __future__ import annotations

import warnings

import numpy as np

from . import build
from .errors import BuildError, MetriccWarning
from .spec import Spec

BACKENDS = ("auto", "c", "numpy")


class ConservedQuantities(dict):
    """Conserved momenta by name ``p_<coordinate>``; the bare coordinate name works too."""

    def __missing__(self, key):
        if isinstance(key, str) and "p_" + key in self:
            return self["p_" + key]
        raise KeyError(key)


class MetricKernels:
    """Kernels of one metric spec.

    Attributes:
        name, summary: from the spec.
        coordinates: tuple of coordinate names; ``dim`` = len(coordinates).
        parameters: dict name -> default value, in the order the kernels take them.
        backend: "c" (compiled with cffi) or "numpy".
        ignorable: coordinates the metric does not depend on (their momenta are conserved).
        signature: (negative, positive) eigenvalue counts of the metric inside the domain.
        inverse_strategy: how g^{-1} is obtained: "symbolic", "numeric" or "mixed".
        spec_sha256: hash of the spec's canonical content.
    """

    def __init__(self, entry: build.CacheEntry, backend: str, c_module, np_module):
        m = entry.manifest
        self._entry = entry
        self._manifest = m
        self._c = c_module
        self._np = np_module
        self.name: str = m["name"]
        self.summary: str = m["summary"]
        self.coordinates: tuple[str, ...] = tuple(m["coordinates"])
        self.dim: int = len(self.coordinates)
        self.parameters: dict[str, float] = {p: float(v) for p, v in m["parameters"]}
        self.backend: str = backend
        self.ignorable: tuple[str, ...] = tuple(m["ignorable"])
        self.domain_names: tuple[str, ...] = tuple(m["domain"])
        self.event_names: tuple[str, ...] = tuple(m["events"])
        self.signature: tuple[int, int] = tuple(m["signature"])
        self.inverse_strategy: str = m["inverse_strategy"]
        self.spec_sha256: str = m["spec_sha256"]
        self.kernel_info: dict = m["kernels"]

    def __repr__(self) -> str:
        return (f"<MetricKernels {self.name!r} ({', '.join(self.coordinates)}) "
                f"backend={self.backend!r}>")

    @property
    def cache_dir(self):
        """The cache folder holding this spec's generated sources and compiled module."""
        return self._entry.directory

    # -- kernels -------------------------------------------------------------------------
    def metric(self, x, params=None) -> np.ndarray:
        """g_{mu nu}: x (..., dim) -> (..., dim, dim)."""
        return self._call("metric", x, params)

    def inverse_metric(self, x, params=None) -> np.ndarray:
        """g^{mu nu}: x (..., dim) -> (..., dim, dim)."""
        return self._call("inverse_metric", x, params)

    def christoffel(self, x, params=None) -> np.ndarray:
        """Christoffel symbols of the second kind: x (..., dim) -> (..., dim, dim, dim) with
        [..., a, b, c] = Gamma^a_{bc}."""
        return self._call("christoffel", x, params)

    def geodesic_rhs(self, y, params=None) -> np.ndarray:
        """d/dlambda of y = [x^mu, u^mu] (..., 2*dim): [u^mu, -Gamma^mu_{ab} u^a u^b]."""
        return self._call("geodesic_rhs", y, params)

    def hamilton_rhs(self, z, params=None) -> np.ndarray:
        """d/dlambda of z = [x^mu, p_mu] (..., 2*dim) for H = 1/2 g^{mu nu} p_mu p_nu:
        [g^{mu nu} p_nu, -1/2 d_mu g^{ab} p_a p_b]."""
        return self._call("hamilton_rhs", z, params)

    def norm(self, y, params=None) -> np.ndarray:
        """g_{mu nu} u^mu u^nu for y = [x, u] (..., 2*dim) -> (...)."""
        return self._call("norm", y, params)

    def momentum_norm(self, z, params=None) -> np.ndarray:
        """g^{mu nu} p_mu p_nu (= 2H) for z = [x, p] (..., 2*dim) -> (...)."""
        return self._call("momentum_norm", z, params)

    def conserved(self, y, params=None) -> ConservedQuantities:
        """Momenta p_k = g_{k nu} u^nu of the ignorable coordinates k, for y = [x, u]:
        dict ``"p_<coordinate>"`` -> array (...). Empty if no coordinate is ignorable."""
        if not self.ignorable:
            self._check_input("norm", y)
            self._params(params, np.shape(y)[:-1])
            return ConservedQuantities()
        values = self._call("conserved", y, params)
        return ConservedQuantities({f"p_{c}": values[..., i] for i, c in enumerate(self.ignorable)})

    def momenta(self, y, params=None) -> np.ndarray:
        """The state [x^mu, p_mu] (p_mu = g_{mu nu} u^nu) for y = [x, u] (..., 2*dim)."""
        y = self._check_input("norm", y)
        g = self.metric(y[..., :self.dim], params)
        return np.concatenate([y[..., :self.dim], np.einsum("...ij,...j->...i", g,
                                                             y[..., self.dim:])], axis=-1)

    def velocities(self, z, params=None) -> np.ndarray:
        """The state [x^mu, u^mu] (u^mu = g^{mu nu} p_nu) for z = [x, p] (..., 2*dim)."""
        z = self._check_input("norm", z)
        ginv = self.inverse_metric(z[..., :self.dim], params)
        return np.concatenate([z[..., :self.dim], np.einsum("...ij,...j->...i", ginv,
                                                             z[..., self.dim:])], axis=-1)

    def domain_values(self, x, params=None) -> np.ndarray:
        """The spec's [domain] expressions (> 0 inside the chart): (..., dim) -> (..., n)."""
        if not self.domain_names:
            x = self._check_input("metric", x)
            return np.zeros(np.broadcast_shapes(x.shape[:-1], *[np.shape(v) for v in
                                                self._params(params, x.shape[:-1]).values()])
                            + (0,))
        return self._call("domain", x, params)

    def inside(self, x, params=None) -> np.ndarray:
        """True where every [domain] expression is > 0 (finite): (..., dim) -> (...) bool."""
        d = self.domain_values(x, params)
        with np.errstate(invalid="ignore"):
            return np.all(np.isfinite(d) & (d > 0), axis=-1)

    def event_values(self, x, params=None) -> np.ndarray:
        """The spec's [events] expressions: (..., dim) -> (..., n_events)."""
        if not self.event_names:
            raise ValueError(f"spec {self.name!r} defines no [events]")
        return self._call("events", x, params)

    # -- plumbing ------------------------------------------------------------------------
    def _check_input(self, kernel: str, arr) -> np.ndarray:
        info = self.kernel_info[kernel]
        size = info["input_size"]
        arr = np.asarray(arr, dtype=np.float64)
        if arr.ndim == 0 or arr.shape[-1] != size:
            what = {"x": f"coordinates ({', '.join(self.coordinates)})",
                    "y": "a state [x^mu, u^mu]", "z": "a state [x^mu, p_mu]"}[info["input"]]
            raise ValueError(f"{self.name}.{kernel}: expected {what} with last axis of length "
                             f"{size}, got an array of shape {arr.shape}")
        return arr

    def _params(self, params, batch_shape) -> dict:
        if params is None:
            return {}
        if not isinstance(params, dict):
            raise TypeError(f"params must be a dict name -> value, got {type(params).__name__}")
        out = {}
        for key, value in params.items():
            if key not in self.parameters:
                known = ", ".join(self.parameters) or "none"
                raise ValueError(f"{self.name}: unknown parameter {key!r} (parameters: {known})")
            arr = np.asarray(value, dtype=np.float64)
            try:
                np.broadcast_shapes(arr.shape, tuple(batch_shape))
            except ValueError:
                raise ValueError(f"{self.name}: parameter {key!r} has shape {arr.shape}, which "
                                 f"does not broadcast to the batch shape {tuple(batch_shape)}"
                                 ) from None
            out[key] = arr
        return out

    def _call(self, kernel: str, arr, params) -> np.ndarray:
        if kernel not in self.kernel_info:
            raise ValueError(f"spec {self.name!r} has no {kernel!r} kernel")
        info = self.kernel_info[kernel]
        arr = self._check_input(kernel, arr)
        given = self._params(params, arr.shape[:-1])
        batch = np.broadcast_shapes(arr.shape[:-1], *[v.shape for v in given.values()])
        out_shape = tuple(info["output_shape"])
        values = [given.get(p, np.float64(d)) for p, d in self.parameters.items()]
        if self._c is None:
            fn = getattr(self._np, kernel)
            with np.errstate(all="ignore"):
                result = fn(arr, tuple(values))
            return np.array(np.broadcast_to(result, batch + out_shape), dtype=np.float64)
        n_in = info["input_size"]
        n_out = int(np.prod(out_shape, dtype=np.int64))
        flat = np.ascontiguousarray(np.broadcast_to(arr, batch + (n_in,))).reshape(-1, n_in)
        count = flat.shape[0]
        out = np.empty((count, n_out), dtype=np.float64)
        if count:
            ffi, lib = self._c.ffi, self._c.lib
            npar = len(values)
            if all(v.ndim == 0 for v in given.values()) or npar == 0:
                pvec = np.array([float(v) for v in values] or [0.0], dtype=np.float64)
                stride = 0
            else:
                pvec = np.ascontiguousarray(np.stack(
                    [np.broadcast_to(v, batch).reshape(-1) for v in values], axis=-1))
                stride = npar
            fn = getattr(lib, f"{self.name}_{kernel}_batch")
            fn(count, ffi.from_buffer("double[]", flat), ffi.from_buffer("double[]", pvec),
               stride, ffi.from_buffer("double[]", out))
        return out.reshape(batch + out_shape)


def open_spec(spec: Spec, backend: str = "auto") -> MetricKernels:
    """Kernels for a validated spec: from the cache, generating and compiling on a miss."""
    if backend not in BACKENDS:
        raise ValueError(f"backend must be one of {', '.join(BACKENDS)}, got {backend!r}")
    entry = build.ensure_sources(spec)
    np_module = build.load_numpy_module(entry)
    c_module = None
    if backend in ("c", "auto"):
        try:
            entry = build.ensure_binary(entry)
            c_module = build.load_extension(entry)
        except BuildError as exc:
            if backend == "c":
                raise
            first = str(exc).splitlines()[0]
            warnings.warn(f"metricc: C backend unavailable ({first}); using the NumPy backend",
                          MetriccWarning, stacklevel=3)
    return MetricKernels(entry, "c" if c_module is not None else "numpy", c_module, np_module)
