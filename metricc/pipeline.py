"""The whole pipeline on one screen.

    Spec --derive--> Geometry --build_kernels--> KernelSet --emit--> Sources

Each stage returns plain immutable data; every intermediate is kept on the result so it can be
inspected (``metricc show``, tests). Compiling and caching the sources is :mod:`metricc.build`.
"""
from __future__ import annotations

import time
from dataclasses import dataclass

from .emit import Sources, cdef_text, emit
from .geometry import Geometry, derive
from .kernels import KernelSet, build_kernels
from .spec import Spec


@dataclass(frozen=True)
class Generated:
    spec: Spec
    geometry: Geometry
    kernels: KernelSet
    sources: Sources
    cdef: str
    seconds: float


def generate(spec: Spec, targets=("c", "numpy"), extra_kernels=()) -> Generated:
    """Run the symbolic stages on a validated spec (raises SpecError for bad metrics).

    extra_kernels: optional kernel groups ("curvature", "jacobian") beyond the spec's own.
    """
    t0 = time.perf_counter()
    geometry = derive(spec)                 # sympy: metric, derivatives, inverse strategy
    kernels = build_kernels(geometry, tuple(extra_kernels))  # IR: CSE'd straight-line kernels
    sources = emit(kernels, targets)        # text: C99 header/source, NumPy module
    return Generated(spec, geometry, kernels, sources, cdef_text(kernels),
                     time.perf_counter() - t0)
