"""Quantities carried along geodesics by ``MetricKernels.integrate``: transported vectors,
variations (tangent equations) and parameter sensitivities.

Both backends carry, per state, one flat vector c (nc,) next to the state y (S = 2*dim):
``[transport (m_T, D)][variation directions (m_V, S)][parameter columns (n_param, S)]``
(nc = m_T*D + (m_V + n_param)*S), integrated with
    dV/dlambda = transport kernel (y, V),  dW/dlambda = J(y) W  (tangent kernel),
    dP_q/dlambda = J(y) P_q + d f / d param_q,  P_q(0) = 0.
This module checks the user's arrays, packs and unpacks c, builds the NumPy right-hand side
of the augmented state, and moves the derivatives of a stopped state to the crossing.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .integrate import DOMAIN, EVENT_BASE


@dataclass
class Carry:
    """What one integrate call carries, for N flattened states with leading axes ``lead``.

    transport: (N, m_T, D) or None; variations: (N, m_V, S) or None (identity rows for
    ``all_variations``); param_names / param_index: the parameters of the sensitivities and
    their positions in the kernels' parameter order; error: carried components in the
    error norm."""
    lead: tuple
    dim: int
    transport: np.ndarray | None
    variations: np.ndarray | None
    all_variations: bool
    param_names: list
    param_index: list
    error: bool

    @property
    def n_transport(self) -> int:
        return 0 if self.transport is None else self.transport.shape[1]

    @property
    def n_variations(self) -> int:
        return 0 if self.variations is None else self.variations.shape[1]

    @property
    def n_param(self) -> int:
        return len(self.param_index)

    @property
    def size(self) -> int:
        """nc: carried components per state."""
        S = 2 * self.dim
        return self.n_transport * self.dim + (self.n_variations + self.n_param) * S

    def pack(self) -> np.ndarray:
        """c0 (N, nc), C order; parameter columns start at 0 (y0 does not depend on them)."""
        N = int(np.prod(self.lead, dtype=np.int64))
        parts = []
        if self.transport is not None:
            parts.append(self.transport.reshape(N, -1))
        if self.variations is not None:
            parts.append(self.variations.reshape(N, -1))
        parts.append(np.zeros((N, self.n_param * 2 * self.dim)))
        return np.ascontiguousarray(np.concatenate(parts, axis=1))

    def blocks(self, c: np.ndarray):
        """Views (transport (..., m_T, D), variations (..., m_V, S), params (..., n_param, S))
        of carried vectors c (..., nc); None for a block not carried."""
        D, S = self.dim, 2 * self.dim
        head = c.shape[:-1]
        o = self.n_transport * D
        t = c[..., :o].reshape(head + (self.n_transport, D)) if self.transport is not None \
            else None
        v = None
        if self.variations is not None:
            v = c[..., o:o + self.n_variations * S].reshape(head + (self.n_variations, S))
        o += self.n_variations * S
        p = c[..., o:].reshape(head + (self.n_param, S))
        return t, v, p

    def results(self, c_end: np.ndarray, c_samples: np.ndarray | None) -> dict:
        """The IntegrationResult fields from c_end (N, nc) and c_samples (N, S_samples, nc)."""
        lead = self.lead
        out = {}
        t, v, p = self.blocks(c_end)
        ts, vs = (None, None) if c_samples is None else self.blocks(c_samples)[:2]
        if t is not None:
            out["transport"] = t.reshape(lead + t.shape[1:]).copy()
            if ts is not None:
                out["transport_samples"] = ts.reshape(lead + ts.shape[1:]).copy()
        if v is not None:
            # rows are Phi applied to each direction; for "all" (directions e_j) the rows are
            # Phi's columns, so Phi itself ([i, j] = d y_end_i / d y0_j) is their transpose
            if self.all_variations:
                v = np.swapaxes(v, -1, -2)
                vs = None if vs is None else np.swapaxes(vs, -1, -2)
            out["variations"] = np.ascontiguousarray(v.reshape(lead + v.shape[1:]))
            if vs is not None:
                out["variations_samples"] = np.ascontiguousarray(vs.reshape(lead + vs.shape[1:]))
        if self.param_names is not None:
            out["param_variations"] = {name: p[:, q].reshape(lead + p.shape[-1:]).copy()
                                       for q, name in enumerate(self.param_names)}
        return out


def _vectors(k, what: str, value, lead: tuple, width: int, unit: str) -> np.ndarray:
    """value as a float array (N, m, width), its leading axes broadcast to ``lead``."""
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):
        raise ValueError(f"{k.name}.integrate: {what} must be an array of numbers of shape "
                         f"(..., m, {width}), got {type(value).__name__}") from None
    if arr.ndim < 2 or arr.shape[-1] != width:
        raise ValueError(f"{k.name}.integrate: {what} must have shape (..., m, {width}) "
                         f"({unit}), got {arr.shape}")
    try:
        arr = np.broadcast_to(arr, lead + arr.shape[-2:])
    except ValueError:
        raise ValueError(f"{k.name}.integrate: {what} of shape {arr.shape} does not match the "
                         f"states' leading axes {lead} (expected {lead + arr.shape[-2:]})"
                         ) from None
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{k.name}.integrate: {what} holds non-finite values")
    N = int(np.prod(lead, dtype=np.int64))
    return np.ascontiguousarray(arr.reshape((N,) + arr.shape[-2:]))


def prepare(k, lead: tuple, form: str, transport, variations, param_variations,
            carried_error) -> Carry | None:
    """Check the carried-quantity arguments of k.integrate; None when nothing is carried.

    Raises ValueError for a wrong shape, non-finite values, an unknown parameter name or a
    variations argument that is neither an array nor "all"."""
    D, S = k.dim, 2 * k.dim
    if not isinstance(carried_error, (bool, np.bool_)):
        raise ValueError(f"carried_error must be True or False, got {carried_error!r}")
    if transport is None and variations is None and param_variations in (None, False):
        return None
    N = int(np.prod(lead, dtype=np.int64))
    t = None
    if transport is not None:
        kind = "contravariant components V^a" if form == "geodesic" else \
            "covariant components V_a"
        t = _vectors(k, "transport", transport, lead, D, f"m vectors, {kind}")
    v, every = None, False
    if isinstance(variations, str):
        if variations != "all":
            raise ValueError(f"{k.name}.integrate: variations must be an array (..., m, {S}) "
                             f"or 'all', got {variations!r}")
        every = True
        v = np.ascontiguousarray(np.broadcast_to(np.eye(S), (N, S, S)))
    elif variations is not None:
        v = _vectors(k, "variations", variations, lead, S, "m directions in state space")
    names = None
    if param_variations is True:
        names = list(k.parameters)
    elif param_variations not in (None, False):
        given = [param_variations] if isinstance(param_variations, str) else param_variations
        try:
            names = list(given)
        except TypeError:
            raise ValueError(f"{k.name}.integrate: param_variations must be a list of "
                             f"parameter names or True, got {param_variations!r}") from None
        known = list(k.parameters)
        for name in names:
            if not isinstance(name, str) or name not in known:
                raise ValueError(f"{k.name}.integrate: param_variations: unknown parameter "
                                 f"{name!r} (parameters: {', '.join(known) or 'none'})")
        if len(set(names)) != len(names):
            raise ValueError(f"{k.name}.integrate: param_variations names a parameter twice: "
                             f"{names}")
    index = [] if names is None else [list(k.parameters).index(p) for p in names]
    return Carry(lead=tuple(lead), dim=D, transport=t, variations=v, all_variations=every,
                 param_names=names, param_index=index, error=bool(carried_error))


def numpy_rhs(np_module, form: str, carry: Carry):
    """The augmented right-hand side rhs(ya (m, S + nc), params) -> (m, S + nc) for
    integrate_numpy: the plain generated RHS on the base (so the base's bits are those of a
    plain run) and the generated transport, tangent and parameter-derivative kernels on the
    carried part."""
    D, S = carry.dim, 2 * carry.dim
    base = getattr(np_module, f"{form}_rhs")
    mT, mV, nP = carry.n_transport, carry.n_variations, carry.n_param
    transport = getattr(np_module, f"{form}_transport") if mT else None
    tangent = getattr(np_module, f"{form}_tangent") if mV + nP else None
    pderiv = getattr(np_module, f"{form}_param_derivative") if nP else None
    pidx = np.array(carry.param_index, dtype=np.intp)

    def rhs(ya, params):
        m = ya.shape[0]
        y = np.ascontiguousarray(ya[:, :S])
        out = np.empty_like(ya)
        out[:, :S] = base(y, params)
        o = S
        if mT:
            vec = ya[:, o:o + mT * D].reshape(m, mT, D)
            out[:, o:o + mT * D] = np.broadcast_to(transport(y, vec, params),
                                                   (m, mT, D)).reshape(m, -1)
            o += mT * D
        if mV + nP:
            dirs = ya[:, o:].reshape(m, mV + nP, S)
            jd = np.array(np.broadcast_to(tangent(y, dirs, params), (m, mV + nP, S)))
            if nP:
                dfdp = np.broadcast_to(pderiv(y, params), (m, len(params), S))
                jd[:, mV:] += dfdp[:, pidx]
            out[:, o:] = jd.reshape(m, -1)
        return out

    return rhs


def correct_at_stops(k, carry: Carry, form: str, y_end: np.ndarray, c_end: np.ndarray,
                     codes: np.ndarray, steps: np.ndarray, values: list) -> None:
    """Move variations and parameter sensitivities of states stopped on an event or a
    domain expression to the crossing (in place in c_end (N, nc)).

    The stop lambda* solves g(x(lambda*)) = 0 for the stop function g that fired, so it
    moves with the initial data and parameters: d lambda* = -(grad_x g . dx + dg/dp) /
    (grad_x g . dx/dlambda), and the derivative of the stopped state is dy + f(y_end) dlambda*.
    g is the event's row of the stops_gradient kernel, or for "domain" the domain expression
    closest to 0 at y_end (the one that fired, up to the location tolerance). Only states
    that took a step are corrected (one that stopped at lambda = 0 never moved); other
    statuses are left as integrated. A grazing crossing (grad_x g . dx/dlambda = 0) gives
    inf/NaN: the stop point is then not differentiable."""
    if carry.n_variations + carry.n_param == 0:
        return
    stopped = ((codes == DOMAIN) | (codes >= EVENT_BASE)) & (steps > 0)
    rows = np.flatnonzero(stopped)
    if rows.size == 0:
        return
    D = carry.dim
    pd = {p: v[rows] for p, v in zip(k.parameters, values)}
    x = y_end[rows, :D]
    with np.errstate(all="ignore"):
        grad = k.stops_gradient(x, pd)                          # (r, nstop, D + NPAR)
        f = k._call(f"{form}_rhs", y_end[rows], pd)            # (r, S)
        nev = len(k.event_names)
        code = codes[rows]
        which = np.where(code >= EVENT_BASE, code - EVENT_BASE, 0)
        dom = code == DOMAIN
        if dom.any():
            dv = k.domain_values(x[dom], {p: v[dom] for p, v in pd.items()})
            which[dom] = nev + np.argmin(np.abs(dv), axis=-1)
        g = grad[np.arange(rows.size), which]                  # (r, D + NPAR)
        gx = g[:, :D]
        rate = np.einsum("ri,ri->r", gx, f[:, :D])             # dg/dlambda at the stop
        S = 2 * D
        o = carry.n_transport * D                               # first variation column
        if carry.n_variations:
            cols = slice(o, o + carry.n_variations * S)
            v = c_end[rows, cols].reshape(rows.size, -1, S)
            dlam = -np.einsum("rmi,ri->rm", v[..., :D], gx) / rate[:, None]
            c_end[rows, cols] = (v + f[:, None, :] * dlam[..., None]).reshape(rows.size, -1)
        if carry.n_param:
            cols = slice(o + carry.n_variations * S, None)
            p = c_end[rows, cols].reshape(rows.size, -1, S)
            dgdp = g[:, D + np.array(carry.param_index, dtype=np.intp)]   # (r, n_param)
            dlam = -(np.einsum("rmi,ri->rm", p[..., :D], gx) + dgdp) / rate[:, None]
            c_end[rows, cols] = (p + f[:, None, :] * dlam[..., None]).reshape(rows.size, -1)
