"""Exact tracing: per-material path lengths along every detector ray.

Analytic primitives are intersected exactly in their local frames and composed with the
replace/add rules of :mod:`simbench.phantom.compiled`; voxel phantoms use Siddon's method.
"""

from simbench.trace.tracer import edge_truncation, iter_trace, line_integrals, trace

__all__ = ["trace", "iter_trace", "line_integrals", "edge_truncation"]
