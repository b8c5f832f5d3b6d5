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
from .integrate import IntegrationResult
from .spec import Spec

BACKENDS = ("auto", "c", "numpy")
NUMPY_CHUNK = 8192   # states per NumPy kernel call


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
        periods: dict periodic coordinate -> its period at the default parameters (the
            spec's [periods]; empty when none); period_values() for other parameters.
    """

    def __init__(self, entry: build.CacheEntry, backend: str, c_module, np_module):
        m = entry.manifest
        self._entry = entry
        self._manifest = m
        self._c = c_module
        self._np_module = np_module
        self.name: str = m["name"]
        self.summary: str = m["summary"]
        self.coordinates: tuple[str, ...] = tuple(m["coordinates"])
        self.dim: int = len(self.coordinates)
        self.parameters: dict[str, float] = {p: float(v) for p, v in m["parameters"]}
        self.backend: str = backend
        self.ignorable: tuple[str, ...] = tuple(m["ignorable"])
        self.domain_names: tuple[str, ...] = tuple(m["domain"])
        self.event_names: tuple[str, ...] = tuple(m["events"])
        self.invariant_names: tuple[str, ...] = tuple(m.get("invariants", ()))
        self.kernel_groups: tuple[str, ...] = tuple(m.get("groups", ()))
        self.signature: tuple[int, int] = tuple(m["signature"])
        self.inverse_strategy: str = m["inverse_strategy"]
        self.spec_sha256: str = m["spec_sha256"]
        self.kernel_info: dict = m["kernels"]
        # in coordinate order ("periodic"; the manifest's JSON sorts the dict's keys)
        self.periods: dict[str, float] = {c: float(m["periods"][c])
                                          for c in m.get("periodic", ())}

    def __reduce__(self):
        # Pickled as the spec text: a Dask worker rebuilds (usually: loads from its own
        # cache) the kernels on first use; nothing machine-specific travels.
        origin = getattr(self, "_origin", None)
        if origin is None:
            raise TypeError(f"kernels of {self.name!r} loaded from generated files cannot be "
                            "pickled; load them with metricc.load or metricc.loads")
        from .cluster import rebuild
        return rebuild, origin

    @property
    def _np(self):
        """The generated NumPy module, imported on first use (a C-backend warm load never
        needs it)."""
        if self._np_module is None:
            self._np_module = build.load_numpy_module(self._entry)
        return self._np_module

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

    def soa(self, kernel: str, columns, params=None) -> np.ndarray:
        """Structure-of-arrays evaluation: ``columns`` (size, N) -> (output size, N).

        The C entry point <name>_<kernel>_soa is a loop the compiler vectorises (with vector
        sin/cos when loaded with ``vector_math=True``); on the NumPy backend the same values
        come from the array-of-structures kernels. params: scalars or (N,) arrays.
        """
        if kernel not in self.kernel_info:
            raise ValueError(f"spec {self.name!r} has no {kernel!r} kernel")
        info = self.kernel_info[kernel]
        cols = np.ascontiguousarray(np.asarray(columns, dtype=np.float64))
        size = info["input_size"]
        if cols.ndim != 2 or cols.shape[0] != size:
            raise ValueError(f"{self.name}.soa({kernel!r}): expected columns of shape ({size}, N), "
                             f"got {cols.shape}")
        N = cols.shape[1]
        n_out = int(np.prod(info["output_shape"], dtype=np.int64))
        given = self._params(params, (N,))
        if self._c is None:
            out = self._call(kernel, cols.T, params)
            return np.ascontiguousarray(out.reshape(N, n_out).T)
        values = [given.get(p, np.float64(d)) for p, d in self.parameters.items()]
        if not values or all(v.ndim == 0 for v in given.values()):
            pvec, stride = np.array([float(v) for v in values] or [0.0]), 0
        else:
            pvec = np.ascontiguousarray(np.stack([np.broadcast_to(v, (N,)) for v in values], -1))
            stride = len(values)
        out = np.empty((n_out, N))
        ffi = self._c.ffi
        if N:
            getattr(self._c.lib, f"{self.name}_{kernel}_soa")(
                N, ffi.from_buffer("double[]", cols), ffi.from_buffer("double[]", pvec), stride,
                ffi.from_buffer("double[]", out))
        return out

    def invariants(self, y, params=None, form: str = "geodesic") -> dict:
        """The spec's [invariants]: dict name -> array (...), for y = [x, u] (form="geodesic")
        or z = [x, p] (form="hamilton")."""
        if not self.invariant_names:
            raise ValueError(f"spec {self.name!r} declares no [invariants]")
        if form not in ("geodesic", "hamilton"):
            raise ValueError(f"form must be 'geodesic' or 'hamilton', got {form!r}")
        values = self._call("invariants" if form == "geodesic" else "invariants_hamilton", y,
                            params)
        return {name: values[..., i] for i, name in enumerate(self.invariant_names)}

    # -- optional kernels: curvature and Jacobians ---------------------------------------
    def _optional(self, kernel: str, group: str, arr, params):
        if kernel not in self.kernel_info:
            raise ValueError(
                f"spec {self.name!r} was built without the {group!r} kernels; enable them with "
                f"kernels = [\"{group}\"] in the spec, metricc.load(..., kernels=[\"{group}\"]) "
                f"or metricc build --kernels {group}")
        return self._call(kernel, arr, params)

    def riemann(self, x, params=None) -> np.ndarray:
        """Riemann tensor: x (..., dim) -> (..., dim, dim, dim, dim), [..., a, b, c, d] =
        R^a_{bcd} = d_c Gamma^a_{db} - d_d Gamma^a_{cb} + Gamma^a_{ce} Gamma^e_{db}
        - Gamma^a_{de} Gamma^e_{cb} (MTW 1973 convention). Needs kernels=["curvature"]."""
        return self._optional("riemann", "curvature", x, params)

    def ricci(self, x, params=None) -> np.ndarray:
        """Ricci tensor R_{bd} = R^a_{bad}: (..., dim) -> (..., dim, dim)."""
        return self._optional("ricci", "curvature", x, params)

    def ricci_scalar(self, x, params=None) -> np.ndarray:
        """Ricci scalar g^{bd} R_{bd}: (..., dim) -> (...)."""
        return self._optional("ricci_scalar", "curvature", x, params)

    def kretschmann(self, x, params=None) -> np.ndarray:
        """Kretschmann scalar R_{abcd} R^{abcd}: (..., dim) -> (...)."""
        return self._optional("kretschmann", "curvature", x, params)

    def geodesic_jacobian(self, y, params=None) -> np.ndarray:
        """d f_i / d y_j of geodesic_rhs: (..., 2*dim) -> (..., 2*dim, 2*dim) [..., i, j].
        Needs kernels=["jacobian"]."""
        return self._optional("geodesic_jacobian", "jacobian", y, params)

    def hamilton_jacobian(self, z, params=None) -> np.ndarray:
        """d f_i / d z_j of hamilton_rhs: (..., 2*dim) -> (..., 2*dim, 2*dim) [..., i, j]."""
        return self._optional("hamilton_jacobian", "jacobian", z, params)

    # -- derivatives for carried quantities (metricc.tangent) ----------------------------
    def tangent(self, y, dy, params=None, form: str = "geodesic") -> np.ndarray:
        """J(y) dy for m directions: y (..., 2*dim), dy (..., m, 2*dim) -> (..., m, 2*dim),
        J = d f / d y of the form's right-hand side (geodesic_rhs or hamilton_rhs), computed
        by forward mode without forming J."""
        return self._call_directional(f"{_form(form)}_tangent", y, dy, params)

    def transport_rhs(self, y, v, params=None, form: str = "geodesic") -> np.ndarray:
        """dV/dlambda of parallel transport for m vectors: y (..., 2*dim), v (..., m, dim) ->
        (..., m, dim). form="geodesic": V contravariant, dV^a = -Gamma^a_{bc} u^b V^c;
        form="hamilton": y = [x, p], V covariant, dV_a = Gamma^c_{ab} u^b V_c."""
        return self._call_directional(f"{_form(form)}_transport", y, v, params)

    def param_derivative(self, y, params=None, form: str = "geodesic") -> np.ndarray:
        """d f / d params of the form's right-hand side: y (..., 2*dim) -> (..., NPAR,
        2*dim), parameters in the order of ``parameters``."""
        name = f"{_form(form)}_param_derivative"
        if name not in self.kernel_info:
            arr = self._check_input(f"{_form(form)}_rhs", y)
            return np.zeros(arr.shape[:-1] + (0, 2 * self.dim))
        return self._call(name, y, params)

    def stops_gradient(self, x, params=None) -> np.ndarray:
        """d/d[x, params] of the stop functions (events, then domain expressions): x (...,
        dim) -> (..., nstop, dim + NPAR)."""
        if "stops_gradient" not in self.kernel_info:
            arr = self._check_input("metric", x)
            return np.zeros(arr.shape[:-1] + (0, self.dim + len(self.parameters)))
        return self._call("stops_gradient", x, params)

    def _call_directional(self, kernel: str, arr, dirs, params) -> np.ndarray:
        info = self.kernel_info[kernel]
        arr = self._check_input(kernel, arr)
        d_in = info["direction_size"]
        dirs = np.asarray(dirs, dtype=np.float64)
        if dirs.ndim < 2 or dirs.shape[-1] != d_in:
            raise ValueError(f"{self.name}.{kernel}: expected directions of shape (..., m, "
                             f"{d_in}), got an array of shape {dirs.shape}")
        given = self._params(params, arr.shape[:-1])
        try:
            batch = np.broadcast_shapes(arr.shape[:-1], dirs.shape[:-2],
                                        *[v.shape for v in given.values()])
        except ValueError:
            raise ValueError(f"{self.name}.{kernel}: states of shape {arr.shape} and "
                             f"directions of shape {dirs.shape} have different batch axes"
                             ) from None
        m = dirs.shape[-2]
        out_shape = tuple(info["direction_output_shape"])
        n_out = int(np.prod(out_shape, dtype=np.int64))
        n_in = info["input_size"]
        count = int(np.prod(batch, dtype=np.int64))
        flat = np.ascontiguousarray(np.broadcast_to(arr, batch + (n_in,))).reshape(-1, n_in)
        dflat = np.ascontiguousarray(np.broadcast_to(dirs, batch + (m, d_in))).reshape(
            count, m, d_in)
        values = [np.broadcast_to(given.get(p, np.float64(d)), batch).reshape(-1)
                  for p, d in self.parameters.items()]
        out = np.empty((count, m, n_out), dtype=np.float64)
        if count and m:
            if self._c is None:
                fn = getattr(self._np, kernel)
                with np.errstate(all="ignore"):
                    for start in range(0, count, NUMPY_CHUNK):
                        stop = min(count, start + NUMPY_CHUNK)
                        out[start:stop] = fn(flat[start:stop], dflat[start:stop],
                                             tuple(p[start:stop] for p in values)
                                             ).reshape(-1, m, n_out)
            else:
                ffi, lib = self._c.ffi, self._c.lib
                npar = len(values)
                pvec = (np.ascontiguousarray(np.stack(values, axis=-1)) if npar
                        else np.zeros(1))
                getattr(lib, f"{self.name}_{kernel}_batch")(
                    count, ffi.from_buffer("double[]", flat), m,
                    ffi.from_buffer("double[]", dflat), ffi.from_buffer("double[]", pvec),
                    npar, ffi.NULL, ffi.from_buffer("double[]", out))
        return out.reshape(batch + (m,) + out_shape)

    # -- initial data and observers (metricc.observers) ----------------------------------
    def normalize(self, y, kind: str = "timelike", solve_for: int = 0, params=None) -> np.ndarray:
        """States [x, u] (..., 2*dim) with g(u,u) = -1 ("timelike"), 0 ("null") by solving
        for component ``solve_for``, or rescaled to g(u,u) = +1 ("unit"). See
        metricc.observers.normalize."""
        from .observers import normalize
        return normalize(self, y, kind, solve_for, params)

    def frame(self, x, observer="static", params=None) -> np.ndarray:
        """Orthonormal tetrad (..., dim, dim), [..., a, mu] = e_(a)^mu; row 0 the observer's
        velocity ("static", "zamo", a 4-velocity array, or None for Riemannian metrics)."""
        from .observers import frame
        return frame(self, x, observer, params)

    def from_frame(self, x, v, observer="static", params=None) -> np.ndarray:
        """The state [x, v^(a) e_(a)^mu] (..., 2*dim) from local components v (..., dim)."""
        from .observers import from_frame
        return from_frame(self, x, v, observer, params)

    def camera(self, x, forward, up, fov, shape, observer="static", params=None) -> np.ndarray:
        """Null states (height, width, 2*dim), one per pixel centre of a pinhole camera at x;
        see metricc.observers.camera."""
        from .observers import camera
        return camera(self, x, forward, up, fov, shape, observer, params)

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

    def period_values(self, params=None) -> dict:
        """name -> period of each periodic coordinate for ``params`` (the ``periods``
        kernel): floats for scalar parameters, arrays of the parameters' broadcast shape
        otherwise. Empty dict for a spec without [periods]."""
        if not self.periods:
            return {}
        given = self._params(params, ())
        batch = np.broadcast_shapes(*[v.shape for v in given.values()])
        out = self._call("periods", np.zeros(self.dim), params)
        out = out.reshape(batch + (len(self.periods),))
        return {c: (float(out[..., i]) if not batch else out[..., i])
                for i, c in enumerate(self.periods)}

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

    def ivp_rhs(self, params=None, form: str = "geodesic"):
        """``fun(t, y)`` for scipy.integrate.solve_ivp (also with ``vectorized=True``).

        y is a state (2*dim,) or, vectorised, (2*dim, k) columns; t is unused (the geodesic
        equation does not depend on the affine parameter). form: "geodesic" or "hamilton".
        """
        if form not in ("geodesic", "hamilton"):
            raise ValueError(f"form must be 'geodesic' or 'hamilton', got {form!r}")
        kernel = "geodesic_rhs" if form == "geodesic" else "hamilton_rhs"
        self._params(params, ())

        def fun(t, y):
            y = np.asarray(y, dtype=np.float64)
            if y.ndim == 1:
                return self._call(kernel, y, params)
            return self._call(kernel, y.T, params).T

        return fun

    # -- integration -----------------------------------------------------------------------
    def integrate(self, y0, lam_end, params=None, rtol=1e-10, atol=1e-12, max_steps=100000,
                  events=None, samples=None, form="geodesic", method=None, threads=None,
                  progress=None, transport=None, variations=None, param_variations=None,
                  carried_error=True) -> IntegrationResult:
        """Integrate a batch of geodesics from lambda = 0 to ``lam_end``; see docs/integrator.md.

        y0: (N, 2*dim) states [x, u] (form="geodesic") or [x, p] (form="hamilton"); any
        leading axes work and are kept in the result. Returns an IntegrationResult with y
        (N, 2*dim), lam (N,), status (N,) str, steps (N,), samples (N, S, 2*dim) or None, drift
        (N,).

        Carried along each geodesic (S = 2*dim; leading axes broadcast to y0's):

        - transport: (N, m, dim) vectors parallel-transported (form="geodesic": components
          V^a; "hamilton": V_a) -> res.transport (N, m, dim), res.transport_samples
          (N, S_samples, m, dim).
        - variations: (N, m, S) initial directions in state space, or "all" (the identity) ->
          res.variations (N, m, S), row k = d y_end / d y0 applied to direction k; for "all"
          (N, S, S) with [i, j] = d y_end_i / d y0_j. res.variations_samples likewise.
        - param_variations: parameter names, or True for all -> res.param_variations, dict
          name -> (N, S) d y_end / d param with y0 held fixed.
        - carried_error: True: carried components join the error norm; False: the steps
          (and y, lam, status) are those of a plain run, bit for bit.

        A state stopped by an event or a [domain] expression after at least one step has its
        variations and parameter sensitivities moved to the crossing: the stop point
        lambda* moves with the data, d lambda* = -(grad_x g . dx + dg/dp) / (grad_x g .
        dx/dlambda) with g the event's expression, or for "domain" the domain expression
        closest to 0 at the end; f(y_end) d lambda* is added. Samples and transported vectors
        are not corrected; states that ended otherwise (done, max_steps, not_finite, ...)
        return the derivatives as integrated. Nothing carried (the default): nothing
        changes, bit for bit.
        """
        from .cluster import integrate_dask, is_dask_array
        from .integrate import check_options
        rtol, atol, max_steps, threads = check_options(rtol, atol, max_steps, threads)
        if is_dask_array(y0):
            return integrate_dask(self, y0, lam_end, params=params, rtol=rtol, atol=atol,
                                  max_steps=max_steps, events=events, samples=samples,
                                  form=form, method=method, threads=threads,
                                  transport=transport, variations=variations,
                                  param_variations=param_variations,
                                  carried_error=carried_error)
        from .integrate import DOMAIN, EVENT_BASE, IntegrationResult, integrate_numpy, \
            status_names
        from .tableaus import DEFAULT_METHOD, METHODS
        if form not in ("geodesic", "hamilton"):
            raise ValueError(f"form must be 'geodesic' or 'hamilton', got {form!r}")
        method = DEFAULT_METHOD if method is None else method
        if method not in METHODS:
            raise ValueError(f"method must be one of {', '.join(METHODS)}, got {method!r}")
        norm_kernel = "norm" if form == "geodesic" else "momentum_norm"
        y0 = self._check_input(norm_kernel, y0)
        lead = y0.shape[:-1]
        n = 2 * self.dim
        flat = np.ascontiguousarray(y0.reshape(-1, n))
        lam_end = float(lam_end)
        if not np.isfinite(lam_end):
            raise ValueError(f"lam_end must be finite, got {lam_end}")
        if progress is not None and not callable(progress):
            raise TypeError("progress must be a callable progress(done, total)")
        if events is None:
            active = list(range(len(self.event_names)))
        else:
            if isinstance(events, str):
                events = [events]
            unknown = [e for e in events if e not in self.event_names]
            if unknown:
                known = ", ".join(self.event_names) or "none"
                raise ValueError(f"{self.name}: unknown event {unknown[0]!r} (events: {known})")
            active = sorted({self.event_names.index(e) for e in events})
        given = self._params(params, lead)
        for key, v in given.items():
            if np.broadcast_shapes(v.shape, lead) != tuple(lead):
                raise ValueError(f"{self.name}: parameter {key!r} of shape {v.shape} would add "
                                 f"batch axes to the states of shape {tuple(lead)}")
        values = [np.broadcast_to(given.get(p, np.float64(d)), lead).reshape(-1).astype(np.float64)
                  for p, d in self.parameters.items()]
        if samples is not None:
            samples = np.asarray(samples, dtype=np.float64)
            if samples.ndim != 1 or not np.all(np.isfinite(samples)):
                raise ValueError("samples must be a 1-D array of finite affine parameters")
        direction = 1.0 if lam_end >= 0 else -1.0
        order = None
        if samples is not None:
            order = np.argsort(direction * samples, kind="stable")
            sorted_samples = np.ascontiguousarray(samples[order])
        else:
            sorted_samples = None
        from . import carry as carried
        carry = carried.prepare(self, tuple(lead), form, transport, variations,
                                param_variations, carried_error)
        c_end = c_samp = None
        nc = 0 if carry is None else carry.size

        if self._c is not None:
            y_end, lam, codes, steps, samp, c_end, c_samp = self._integrate_c(
                flat, lam_end, values, given, rtol, atol, int(max_steps), active, sorted_samples,
                form, method, threads, progress, carry)
        else:
            fn = getattr(self._np, "geodesic_rhs" if form == "geodesic" else "hamilton_rhs")
            codes_list = []
            if active:
                codes_list += [EVENT_BASE + k for k in active]
            if self.domain_names:
                codes_list += [DOMAIN] * len(self.domain_names)
            stops_fn = getattr(self._np, "stops", None)
            nev = len(self.event_names)
            columns = list(active) + list(range(nev, nev + len(self.domain_names)))

            def stop(x, p):
                return stops_fn(x, p)[:, columns]

            y_start, more = flat, {}
            if nc:
                # the augmented state [y, c]: the integrator carries c through steps, samples
                # and stops; the base alone sets the starting step (and, without
                # carried_error, the error norm)
                fn = carried.numpy_rhs(self._np, form, carry)
                y_start = np.concatenate([flat, carry.pack()], axis=1)
                more = {"n_base": n, "n_control": n + nc if carry.error else n}
            y_end, lam, codes, steps, samp = integrate_numpy(
                fn, stop if codes_list else None, y_start, lam_end, tuple(values), rtol=rtol,
                atol=atol, max_steps=int(max_steps), method=method, samples=sorted_samples,
                stop_codes=np.array(codes_list, dtype=np.int32), progress=progress, **more)
            if nc:
                y_end, c_end = np.ascontiguousarray(y_end[:, :n]), y_end[:, n:].copy()
                if samp is not None:
                    samp, c_samp = samp[..., :n].copy(), samp[..., n:]
        # samples given in integration order (the usual case) need no reordering: a copy of
        # (N, S, 2*dim) costs as much as the integration of short rays
        in_order = order is None or bool(np.all(order == np.arange(len(order))))
        if samp is not None:
            if not in_order:
                unsorted = np.empty_like(samp)
                unsorted[:, order] = samp
                samp = unsorted
            samp = samp.reshape(lead + (len(samples), n))
        extra = {}
        if carry is not None:
            if nc == 0:   # empty arrays asked for: shapes only
                c_end = np.zeros((flat.shape[0], 0))
                c_samp = None if samples is None else np.zeros((flat.shape[0], len(samples), 0))
            if c_samp is not None and not in_order:
                unsorted = np.empty_like(c_samp)
                unsorted[:, order] = c_samp
                c_samp = unsorted
            carried.correct_at_stops(self, carry, form, y_end, c_end, codes, steps, values)
            extra = carry.results(c_end, c_samp)
        pdict = {p: v for p, v in zip(self.parameters, values)}
        with np.errstate(all="ignore"):
            start = self._call(norm_kernel, flat, pdict)
            end = self._call(norm_kernel, y_end, pdict)
        drift = np.abs(end - start)
        invariant_drift = {}
        if self.invariant_names:
            with np.errstate(all="ignore"):
                i0 = self.invariants(flat, pdict, form)
                i1 = self.invariants(y_end, pdict, form)
            invariant_drift = {n: np.abs(i1[n] - i0[n]).reshape(lead) for n in i0}
        return IntegrationResult(
            invariant_drift=invariant_drift,
            y=y_end.reshape(lead + (n,)), lam=lam.reshape(lead),
            status=status_names(codes, self.event_names).reshape(lead),
            steps=steps.astype(np.int64).reshape(lead), samples=samp,
            drift=drift.reshape(lead), status_code=codes.reshape(lead), **extra)

    def connect(self, x_from, x_to, params=None, kind=None, free=None, solutions=1,
                rtol=1e-11, atol=1e-13, tol=1e-10, max_iter=50, progress=None):
        """The geodesic joining x_from to x_to (..., dim), by damped Newton shooting on u0
        (affine parameter 0 at x_from, 1 on arrival); see metricc.connect.

        free: coordinate names left free on arrival (one, with kind="null" or "timelike",
        which adds g(u0,u0) = 0 or -1; x_to's value of it only gives the direction: earlier
        than x_from's means past-directed). Periodic coordinates arrive modulo their period.
        Riemannian specs: the shortest geodesic found. solutions=n: up to n distinct ones,
        by length (null with free: by the change of the free coordinate, then the angle
        swept), on an axis before the last. Returns a Connection (y0, y1, length, status,
        iterations, residual); one pair failing never raises for the batch."""
        from .connect import connect
        return connect(self, x_from, x_to, params=params, kind=kind, free=free,
                       solutions=solutions, rtol=rtol, atol=atol, tol=tol, max_iter=max_iter,
                       progress=progress)

    def _integrate_c(self, flat, lam_end, values, given, rtol, atol, max_steps, active, samples,
                     form, method, threads, progress, carry=None):
        """The compiled integrator on flat states (N, S): NAME_integrate_interruptible, or
        NAME_integrate_carry when ``carry`` (metricc.carry.Carry) has carried components.
        Returns (y_end, lam, codes, steps, samples, c_end, c_samples); the last two are None
        without carried components."""
        ffi, lib = self._c.ffi, self._c.lib
        N, n = flat.shape
        opt = ffi.new(f"{self.name}_integrator_options *")
        opt.rtol, opt.atol = rtol, atol
        opt.max_steps = min(max_steps, 2 ** (8 * ffi.sizeof("long") - 1) - 1)
        opt.method = 0 if method == "dp5" else 1
        opt.form = 0 if form == "geodesic" else 1
        # event k is bit k % 64 of word k // 64: event_mask, then event_mask_more[0], ...
        bits = sum(1 << k for k in active)
        opt.event_mask = bits & (2 ** 64 - 1)
        if len(self.event_names) > 64:
            for w in range(len(opt.event_mask_more)):
                opt.event_mask_more[w] = (bits >> (64 * (w + 1))) & (2 ** 64 - 1)
        opt.threads = int(threads or 0)
        # Ctrl-C: the C call runs off the main thread, which waits for it and, on
        # KeyboardInterrupt, raises this flag; the integrator reads it once per step
        flag = ffi.new("int *")
        npar = len(values)
        if npar == 0 or all(v.ndim == 0 for v in given.values()):
            pvec = np.array([float(v[0]) if v.size else 0.0 for v in values] or [0.0])
            stride = 0
        else:
            pvec = np.ascontiguousarray(np.stack(values, axis=-1))
            stride = npar
        y_out = np.empty((N, n))
        lam = np.empty(N)
        codes = np.empty(N, dtype=np.intc)
        steps = np.empty(N, dtype=np.dtype(f"i{ffi.sizeof('long')}"))
        S = 0 if samples is None else len(samples)
        # the C integrator writes every sample of every ray (NaN where not reached, also for
        # rays an interrupt never started), so the arrays start uninitialised
        samp = np.empty((N, S, n)) if S else None
        nc = 0 if carry is None else carry.size
        if nc:
            fn = getattr(lib, f"{self.name}_integrate_carry")
            copt, keep = _carry_options(ffi, self.name, carry)
            c0 = carry.pack()
            c_out = np.empty((N, nc))
            c_samp = np.empty((N, S, nc)) if S else None
        else:
            fn = getattr(lib, f"{self.name}_integrate_interruptible")
            c_out = c_samp = None
        chunk = N if progress is None else max(64, -(-N // 100))
        s_ptr = ffi.from_buffer("double[]", samples) if S else ffi.NULL
        for start in range(0, N, max(chunk, 1)):
            stop = min(N, start + chunk)
            m = stop - start
            pv = pvec[start:stop] if stride else pvec
            y_ptr = ffi.from_buffer("double[]", flat[start:stop])
            tail = (ffi.from_buffer("double[]", y_out[start:stop]),
                    ffi.from_buffer("double[]", lam[start:stop]),
                    ffi.from_buffer("int[]", codes[start:stop]),
                    ffi.from_buffer("long[]", steps[start:stop]),
                    ffi.from_buffer("double[]", samp[start:stop]) if S else ffi.NULL)
            if nc:
                # (n, y0, c0, lam_end, params, stride, opt, carry, n_samples, samples,
                #  y_out, c_out, lam, status, steps, samples_out, c_samples_out, interrupt)
                args = (m, y_ptr, ffi.from_buffer("double[]", c0[start:stop]), lam_end,
                        ffi.from_buffer("double[]", pv), stride, opt, copt, S, s_ptr,
                        tail[0], ffi.from_buffer("double[]", c_out[start:stop])) + tail[1:] + (
                        ffi.from_buffer("double[]", c_samp[start:stop]) if S else ffi.NULL,
                        flag)
            else:
                args = (m, y_ptr, lam_end, ffi.from_buffer("double[]", pv), stride, opt, S,
                        s_ptr) + tail + (flag,)
            _interruptible(fn, args, flag)
            if progress is not None:
                progress(stop, N)
        if nc:
            del keep   # the parameter index array lived as long as the calls
        return y_out, lam, codes.astype(np.int32), steps, samp, c_out, c_samp

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
        n_in = info["input_size"]
        if self._c is None:
            fn = getattr(self._np, kernel)
            count = int(np.prod(batch, dtype=np.int64))
            if count <= NUMPY_CHUNK:
                with np.errstate(all="ignore"):
                    result = fn(arr, tuple(values))
                return np.array(np.broadcast_to(result, batch + out_shape), dtype=np.float64)
            # Large batches in cache-sized chunks: NumPy's temporaries then stay in cache
            # (about 3x faster at 1e5 states than one pass).
            flat = np.broadcast_to(arr, batch + (n_in,)).reshape(-1, n_in)
            pflat = [np.broadcast_to(v, batch).reshape(-1) for v in values]
            out = np.empty((count,) + out_shape)
            with np.errstate(all="ignore"):
                for start in range(0, count, NUMPY_CHUNK):
                    stop = min(count, start + NUMPY_CHUNK)
                    out[start:stop] = fn(flat[start:stop], tuple(p[start:stop] for p in pflat))
            return out.reshape(batch + out_shape)
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


def _carry_options(ffi, name: str, carry):
    """NAME_carry_options for a Carry, and the cffi objects it points into (keep them alive
    for the calls)."""
    copt = ffi.new(f"{name}_carry_options *")
    copt.n_transport = carry.n_transport
    copt.n_variations = carry.n_variations
    copt.n_param = carry.n_param
    index = ffi.new("int[]", list(carry.param_index) or [0])
    copt.param_index = index
    copt.error_control = 1 if carry.error else 0
    return copt, index


def _form(form: str) -> str:
    if form not in ("geodesic", "hamilton"):
        raise ValueError(f"form must be 'geodesic' or 'hamilton', got {form!r}")
    return form


_WORKER: list = []   # [(process id, executor)]: the thread that runs C integrations


def _integrator_thread():
    """A one-thread executor for C integrations started from the main thread, created per
    process (a forked child gets its own). One long-lived thread also keeps the OpenMP
    thread pool, which belongs to the thread that starts the parallel region, warm."""
    import os
    from concurrent.futures import ThreadPoolExecutor
    if not _WORKER or _WORKER[0][0] != os.getpid():
        _WORKER[:] = [(os.getpid(), ThreadPoolExecutor(1, thread_name_prefix="metricc-integrate"))]
    return _WORKER[0][1]


def _interruptible(fn, args, flag) -> None:
    """fn(*args), a C integrator call that reads ``flag`` (cffi int *, its interrupt flag),
    such that Ctrl-C stops it within a step.

    Python runs signal handlers only on the main thread, between bytecodes; a long C call on
    the main thread would hold a KeyboardInterrupt back until it returns. So the call runs on
    a worker thread while the main thread waits in short timed waits (the signal may be
    delivered to any thread; a timed wait returns to the interpreter, which then runs the
    handler). On KeyboardInterrupt the flag is raised, the call (which holds pointers into
    our arrays, kept alive by ``args``) is awaited, and the interrupt re-raised. Off the main
    thread the call is made directly."""
    import threading
    from concurrent.futures import TimeoutError as FutureTimeout
    if threading.current_thread() is not threading.main_thread():
        fn(*args)
        return
    future = _integrator_thread().submit(fn, *args)
    try:
        while True:
            try:
                future.result(timeout=0.1)
                return
            except FutureTimeout:
                continue
    except KeyboardInterrupt:
        flag[0] = 1
        while not future.done():
            try:
                future.exception(timeout=0.1)
            except (FutureTimeout, KeyboardInterrupt):
                continue
        raise


def build_options(spec: Spec, kernels=None, vector_math: bool = False) -> dict:
    """Cache options: the optional kernel groups asked for beyond the spec's own, and
    whether the C build vectorises with libmvec."""
    from .spec import OPTIONAL_KERNELS
    if kernels is None:
        kernels = ()
    if isinstance(kernels, str):
        kernels = [kernels]
    bad = [k for k in kernels if k not in OPTIONAL_KERNELS]
    if bad:
        raise ValueError(f"unknown kernel group {bad[0]!r}; choose from "
                         f"{', '.join(OPTIONAL_KERNELS)}")
    extra = sorted(set(kernels) - set(spec.kernels))
    options = {"kernels": extra} if extra else {}
    if vector_math:
        options["vector_math"] = True
    return options


def open_spec(spec: Spec, backend: str = "auto", kernels=None,
              vector_math: bool = False) -> MetricKernels:
    """Kernels for a validated spec: from the cache, generating and compiling on a miss.

    kernels: optional kernel groups ("curvature", "jacobian") beyond the spec's own.
    vector_math: compile the structure-of-arrays entry points vectorised with glibc's
    libmvec (x86-64 Linux; changes sin/cos/exp/log/pow results by at most 4 ulp)."""
    if backend not in BACKENDS:
        raise ValueError(f"backend must be one of {', '.join(BACKENDS)}, got {backend!r}")
    entry = build.ensure_sources(spec, build_options(spec, kernels, vector_math))
    np_module = build.load_numpy_module(entry) if backend == "numpy" else None
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
    k = MetricKernels(entry, "c" if c_module is not None else "numpy", c_module, np_module)
    k._origin = (spec.source, spec.path, backend, tuple(sorted(set(kernels or ()))),
                 bool(vector_math))
    return k


def open_generated(spec: Spec, directory, backend: str) -> MetricKernels:
    """Kernels from previously generated files in ``directory`` (NAME.h/.c, NAME_numpy.py)
    rather than from the cache: for checking committed outputs (``metricc verify --dir``).

    The files are copied into a fresh cache folder, so they are compiled and loaded exactly
    as they are, without being regenerated.
    """
    import json
    import shutil
    import tempfile
    from pathlib import Path
    reference = build.ensure_sources(spec)
    root = build.cache_root()
    tmp = Path(tempfile.mkdtemp(dir=root, prefix=".verify-"))
    name = spec.name
    wanted = {"c": [f"{name}.h", f"{name}.c"], "numpy": [f"{name}_numpy.py"]}[backend]
    for f in reference.manifest["files"]:
        src = Path(directory) / f if f in wanted else reference.path(f)
        if not src.is_file():
            raise BuildError(f"{Path(directory) / f}: no such generated file")
        shutil.copyfile(src, tmp / f)
    manifest = dict(reference.manifest, binary=None)
    build.atomic_write(tmp / build.MANIFEST, json.dumps(manifest, indent=1, sort_keys=True))
    entry = build.CacheEntry(tmp, manifest)
    np_module = build.load_numpy_module(entry)
    c_module = None
    if backend == "c":
        entry = build.ensure_binary(entry)
        c_module = build.load_extension(entry)
    return MetricKernels(entry, backend, c_module, np_module)
