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
    stages: tuple = ()          # (stage, seconds) for derive, kernels, emit


# A stage slower than this is named in ``metricc build`` output, with its slowest kernels.
SLOW_STAGE_SECONDS = 5.0


def generate(spec: Spec, targets=("c", "numpy"), extra_kernels=()) -> Generated:
    """Run the symbolic stages on a validated spec (raises SpecError for bad metrics).

    extra_kernels: optional kernel groups ("curvature", "jacobian") beyond the spec's own.
    """
    t0 = time.perf_counter()
    geometry = derive(spec)                 # sympy: metric, derivatives, inverse strategy
    t1 = time.perf_counter()
    kernels = build_kernels(geometry, tuple(extra_kernels))  # IR: CSE'd straight-line kernels
    t2 = time.perf_counter()
    sources = emit(kernels, targets)        # text: C99 header/source, NumPy module
    t3 = time.perf_counter()
    return Generated(spec, geometry, kernels, sources, cdef_text(kernels), t3 - t0,
                     (("derive", t1 - t0), ("kernels", t2 - t1), ("emit", t3 - t2)))


def slow_stages(result: Generated, threshold: float | None = None) -> str:
    """One line naming the stages that took longer than ``threshold`` seconds (default
    SLOW_STAGE_SECONDS; for the kernels stage with its three slowest kernels), or "" when
    none did."""
    threshold = SLOW_STAGE_SECONDS if threshold is None else threshold
    parts = []
    for stage, seconds in result.stages:
        if seconds <= threshold:
            continue
        text = f"{stage} {seconds:.1f} s"
        if stage == "kernels":
            slow = sorted(result.kernels.kernels, key=lambda k: -k.seconds)[:3]
            text += " (" + ", ".join(f"{k.name} {k.seconds:.1f} s" for k in slow) + ")"
        parts.append(text)
    return ", ".join(parts)
