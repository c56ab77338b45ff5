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
_BIN = Option("bin", int, 0, "energy bin of a photon-counting scan", minimum=0, maximum=7)
_START = Option("start", str, "zero", "the first image: zero, or fbp (FBP or FDK with the Hann "
                "filter of the same projections; fewer iterations reach the mean level)",
                choices=("zero", "fbp"))
_WATER = Option("water_correction", bool, False,
                "linearize for water from the scan's own spectrum (beam-hardening precorrection)")


def _select_bin(acquisition, data, bin: int) -> np.ndarray:
    """The projections (or counts) of one energy bin: photon-counting scans carry a bin axis
    in front of the views."""
    from simbench.errors import InputError, Where

    data = np.asarray(data)
    if data.ndim == len(acquisition.poses.projection_shape) + 1:
        if bin >= data.shape[0]:
            raise InputError(Where("<command line>", field="--option bin"),
                             f"the scan has {data.shape[0]} energy bins",
                             f"a bin from 0 to {data.shape[0] - 1}")
        return data[bin]
    return data


def _projections(acquisition, bin: int = 0, water_correction: bool = False) -> np.ndarray:
    data = np.asarray(acquisition.projections, dtype=np.float32)
    if water_correction:
        from simbench.recon.preprocess import water_precorrect

        data = water_precorrect(data, acquisition.metadata)
    return _select_bin(acquisition, data, bin)


def _first_image(acquisition, grid, projections, start: str):
    """The first image of an iterative method (None: zero)."""
    return None if start == "zero" else _analytic(acquisition, grid, projections, "hann", 1.0)


def _analytic(acquisition, grid, projections, filter, cutoff):
    """FBP for parallel and 2-D fan beams, FDK for cone beams."""
    from simbench.recon import analytic

    method = analytic.fdk if (acquisition.poses.dimension == 3
                              and not acquisition.poses.parallel) else analytic.fbp
    return method(acquisition.poses, projections, grid, filter=filter, cutoff=cutoff)


@reconstructor("fbp", options=[_FILTER, _CUTOFF, _WATER, _BIN])
def fbp(acquisition, grid, *, filter, cutoff, water_correction, bin):
    """Filtered backprojection: parallel beam (2-D or stacked) and 2-D fan beam, full or short scan."""
    from simbench.recon.analytic import fbp as run

    return run(acquisition.poses, _projections(acquisition, bin, water_correction), grid,
               filter=filter, cutoff=cutoff)


@reconstructor("fdk", options=[_FILTER, _CUTOFF, _WATER, _BIN])
def fdk(acquisition, grid, *, filter, cutoff, water_correction, bin):
    """FDK for circular cone beam, flat or curved detector, centred or offset (half-fan)."""
    from simbench.recon.analytic import fdk as run

    return run(acquisition.poses, _projections(acquisition, bin, water_correction), grid,
               filter=filter, cutoff=cutoff)


@reconstructor("fbp-from-counts", stage="counts", options=[
    Option("floor", float, 0.5, "starvation floor of counts - dark before the log, counts",
           minimum=1e-6, maximum=1e6),
    Option("water_correction", bool, True, "water beam-hardening precorrection from the "
           "scan's own spectrum"), _FILTER, _CUTOFF, _BIN])
def fbp_from_counts(acquisition, grid, *, floor, water_correction, filter, cutoff, bin):
    """The reference chain from raw counts: flat and dark correction, log, water precorrection, FBP or FDK."""
    from simbench.recon.preprocess import log_projections, water_precorrect

    projections, _ = log_projections(acquisition.counts, acquisition.flat, acquisition.dark,
                                     floor=floor)
    if water_correction:
        projections = water_precorrect(projections, acquisition.metadata)
    return _analytic(acquisition, grid, _select_bin(acquisition, projections, bin), filter,
                     cutoff)


@reconstructor("sirt", options=[
    Option("iterations", int, 100, "iterations", minimum=1, maximum=100000),
    _RELAXATION, _NONNEGATIVE, _WATER, _START])
def sirt(acquisition, grid, *, iterations, relaxation, nonnegative, water_correction, start):
    """SIRT on the matched projectors (any geometry)."""
    from simbench.recon.iterative import sirt as run

    data = _projections(acquisition, 0, water_correction)
    return run(acquisition.poses, data, grid, iterations=iterations, relaxation=relaxation,
               nonnegative=nonnegative,
               initial=_first_image(acquisition, grid, data, start)).image


@reconstructor("os-sart", options=[
    Option("iterations", int, 10, "passes over all views", minimum=1, maximum=10000),
    Option("subsets", int, 10, "ordered subsets of views", minimum=1, maximum=10000),
    _RELAXATION, _NONNEGATIVE, _WATER, _START])
def os_sart(acquisition, grid, *, iterations, subsets, relaxation, nonnegative,
            water_correction, start):
    """OS-SART on the matched projectors (any geometry)."""
    from simbench.recon.iterative import os_sart as run

    data = _projections(acquisition, 0, water_correction)
    return run(acquisition.poses, data, grid, iterations=iterations, subsets=subsets,
               relaxation=relaxation, nonnegative=nonnegative,
               initial=_first_image(acquisition, grid, data, start)).image


@reconstructor("cgls", options=[
    Option("iterations", int, 30, "iterations (stopping early regularizes)", minimum=1,
           maximum=10000), _WATER, _START])
def cgls(acquisition, grid, *, iterations, water_correction, start):
    """CGLS least squares on the matched projectors (any geometry)."""
    from simbench.recon.iterative import cgls as run

    data = _projections(acquisition, 0, water_correction)
    return run(acquisition.poses, data, grid, iterations=iterations,
               initial=_first_image(acquisition, grid, data, start)).image


@reconstructor("tv", options=[
    Option("iterations", int, 200, "primal-dual iterations", minimum=1, maximum=100000),
    Option("weight", float, 1.0, "weight of the total variation", minimum=0.0,
           maximum=1e6),
    _NONNEGATIVE, _WATER, _START])
def tv(acquisition, grid, *, iterations, weight, nonnegative, water_correction, start):
    """Total-variation regularized least squares (Chambolle-Pock), any geometry."""
    from simbench.recon.iterative import tv as run

    data = _projections(acquisition, 0, water_correction)
    return run(acquisition.poses, data, grid, iterations=iterations, weight=weight,
               nonnegative=nonnegative,
               initial=_first_image(acquisition, grid, data, start)).image


BUILTINS: list = [fbp, fdk, fbp_from_counts, sirt, os_sart, cgls, tv]
