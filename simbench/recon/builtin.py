"""The built-in reconstructors, declared with their stages and options.

Each wraps a reference method of :mod:`simbench.recon.analytic` or
:mod:`simbench.recon.iterative` into the plug-in contract (``(acquisition, grid, **options)
-> image``); ``simbench algorithms`` lists them with their options.
"""

from __future__ import annotations

import numpy as np

from simbench.recon.contract import Option, reconstructor

_FILTER = Option("filter", str, "ramp", "apodization window of the ramp filter",
                 choices=("ramp", "shepp-logan", "cosine", "hamming", "hann"))
_CUTOFF = Option("cutoff", float, 1.0, "filter cutoff as a fraction of the Nyquist frequency",
                 minimum=0.01, maximum=1.0)
_NONNEGATIVE = Option("nonnegative", bool, True, "clip mu at 0 after each update")
_RELAXATION = Option("relaxation", float, 1.0, "relaxation factor lambda",
                     minimum=0.01, maximum=1.99)


def _projections(acquisition) -> np.ndarray:
    return np.asarray(acquisition.projections, dtype=np.float32)


@reconstructor("fbp", options=[_FILTER, _CUTOFF])
def fbp(acquisition, grid, *, filter, cutoff):
    """Filtered backprojection: parallel beam (2-D or stacked) and 2-D fan beam, full or short scan."""
    from simbench.recon.analytic import fbp as run

    return run(acquisition.poses, _projections(acquisition), grid, filter=filter,
               cutoff=cutoff)


@reconstructor("fdk", options=[_FILTER, _CUTOFF])
def fdk(acquisition, grid, *, filter, cutoff):
    """FDK for circular cone beam, flat or curved detector, centred or offset (half-fan)."""
    from simbench.recon.analytic import fdk as run

    return run(acquisition.poses, _projections(acquisition), grid, filter=filter,
               cutoff=cutoff)


@reconstructor("sirt", options=[
    Option("iterations", int, 100, "iterations", minimum=1, maximum=100000),
    _RELAXATION, _NONNEGATIVE])
def sirt(acquisition, grid, *, iterations, relaxation, nonnegative):
    """SIRT on the matched projectors (any geometry)."""
    from simbench.recon.iterative import sirt as run

    return run(acquisition.poses, _projections(acquisition), grid, iterations=iterations,
               relaxation=relaxation, nonnegative=nonnegative).image


@reconstructor("os-sart", options=[
    Option("iterations", int, 10, "passes over all views", minimum=1, maximum=10000),
    Option("subsets", int, 10, "ordered subsets of views", minimum=1, maximum=10000),
    _RELAXATION, _NONNEGATIVE])
def os_sart(acquisition, grid, *, iterations, subsets, relaxation, nonnegative):
    """OS-SART on the matched projectors (any geometry)."""
    from simbench.recon.iterative import os_sart as run

    return run(acquisition.poses, _projections(acquisition), grid, iterations=iterations,
               subsets=subsets, relaxation=relaxation, nonnegative=nonnegative).image


@reconstructor("cgls", options=[
    Option("iterations", int, 30, "iterations (stopping early regularizes)", minimum=1,
           maximum=10000)])
def cgls(acquisition, grid, *, iterations):
    """CGLS least squares on the matched projectors (any geometry)."""
    from simbench.recon.iterative import cgls as run

    return run(acquisition.poses, _projections(acquisition), grid,
               iterations=iterations).image


@reconstructor("tv", options=[
    Option("iterations", int, 200, "primal-dual iterations", minimum=1, maximum=100000),
    Option("weight", float, 1.0, "weight of the total variation", minimum=0.0,
           maximum=1e6),
    _NONNEGATIVE])
def tv(acquisition, grid, *, iterations, weight, nonnegative):
    """Total-variation regularized least squares (Chambolle-Pock), any geometry."""
    from simbench.recon.iterative import tv as run

    return run(acquisition.poses, _projections(acquisition), grid, iterations=iterations,
               weight=weight, nonnegative=nonnegative).image


BUILTINS: list = [fbp, fdk, sirt, os_sart, cgls, tv]
