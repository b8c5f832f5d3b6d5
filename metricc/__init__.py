"""metricc: compile a metric written as a small TOML spec into geodesic kernels.

    import metricc
    k = metricc.load("specs/kerr.toml")          # C via cffi if a compiler works, else NumPy
    k.christoffel(x)                              # (..., dim) -> (..., dim, dim, dim)
    k.geodesic_rhs(y)                             # y = [x^mu, u^mu] -> dy/dlambda

Importing metricc is light: sympy and the code generator load only when a spec is not yet
in the cache.
"""
from __future__ import annotations

from pathlib import Path

from ._version import __version__
from .errors import BuildError, MetriccWarning, SpecError
from .runtime import MetricKernels, open_spec
from .spec import Spec, load_spec, parse_spec

__all__ = ["load", "loads", "SpecError", "BuildError", "MetriccWarning", "MetricKernels",
           "Spec", "load_spec", "parse_spec", "__version__"]


def load(path: str | Path, backend: str = "auto", kernels=None,
         vector_math: bool = False) -> MetricKernels:
    """Kernels of the spec file at ``path``. backend: "c", "numpy" or "auto" (C if a
    compiler works, else NumPy with one warning). kernels: optional groups to build beyond
    the spec's own ``kernels`` key ("curvature", "jacobian"). Raises SpecError for a bad
    spec. vector_math: compile the structure-of-arrays entry points (k.soa) vectorised
    with glibc's libmvec (x86-64 Linux)."""
    return open_spec(load_spec(path), backend, kernels, vector_math)


def loads(text: str, backend: str = "auto", path: str = "<string>", kernels=None,
          vector_math: bool = False) -> MetricKernels:
    """Kernels of spec text (TOML); ``path`` only names the text in error messages."""
    return open_spec(parse_spec(text, path), backend, kernels, vector_math)
