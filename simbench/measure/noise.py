"""Random streams and counting noise.

Every random number of a measurement comes from a :class:`numpy.random.Generator` on a
``PCG64`` stream made by :func:`rng_for` from the root seed and the *identity* of the task
(scenario, dose, realization, stage), never from the order of execution; draws happen in numpy,
in one fixed order, so the same seed gives the same bits with any number of threads or workers.

Counting noise
--------------
Photon-counting cells (and a monochromatic source) count photons: each energy bin is an
independent Poisson variable of mean equal to its expected count.

An energy-integrating cell adds the deposited energy ``w(E)`` of every detected photon, a
*compound* Poisson variable. With ``n(E)`` the expected number of detected photons per energy
bin, its first moments are

    M0 = sum_E n(E),   M1 = sum_E n(E) w(E) (mean),   M2 = sum_E n(E) w(E)^2 (variance),

so that its relative variance is ``M2 / M1^2 = 1 / (M0 * I)`` with the Swank factor
``I = M1^2 / (M0 * M2) <= 1`` (Swank 1973). Cells with at least
:data:`GAUSSIAN_MIN_PHOTONS` expected photons are drawn from a normal law with exactly this
mean and variance (the compound Poisson law is then normal to within its skewness,
``~ 1 / sqrt(M0)``); darker cells are drawn exactly, one Poisson draw per energy bin.

References
----------
R. K. Swank, "Absorption and noise in x-ray phosphors", J. Appl. Phys. 44, 4199 (1973).
"""

from __future__ import annotations

import math
import threading

import numpy as np
from numba import njit, prange

from simbench.seeding import identity_key, rng_for  # noqa: F401 - the streams of measurement

#: expected photons per reading above which energy-integrating noise is drawn as a normal law
#: with the exact compound-Poisson mean and variance
GAUSSIAN_MIN_PHOTONS = 50.0


def poisson_counts(expected: np.ndarray, rng: np.random.Generator, frames: int = 1) -> np.ndarray:
    """Poisson counts of the given means, averaged over ``frames`` independent readings.

    Parameters
    ----------
    expected : float64 array
        Expected counts per reading (>= 0).
    rng : numpy.random.Generator
    frames : int
        Number of readings averaged (their sum is Poisson of mean ``frames * expected``).

    Returns
    -------
    float64 array, same shape
    """
    return rng.poisson(expected * frames).astype(np.float64) / frames


def start_standard_normals(*requests: tuple[np.random.Generator, tuple[int, ...]],
                           dtype=np.float64):
    """Draw standard normal deviates in a background thread, to overlap other work.

    Parameters
    ----------
    *requests : (numpy.random.Generator, shape)
        One stream and the shape to draw from it, drawn in this order.
    dtype : numpy dtype
        float64, or float32 (numpy's float32 ziggurat: about a third cheaper, and ample
        resolution for noise).

    Returns
    -------
    callable
        ``wait()`` -> list of arrays, ``rng.standard_normal(shape, dtype=dtype)`` for every
        request:
        each stream gives exactly the values it gives alone, whatever the timing (numpy
        releases the GIL while it fills an array). ``wait()`` re-raises whatever the drawing
        raised; the streams must not be used before it returns.
    """
    result: list = []
    failure: list = []

    def work():
        try:
            for rng, shape in requests:
                result.append(rng.standard_normal(shape, dtype=dtype))
        except BaseException as exc:  # handed to the caller by wait()
            failure.append(exc)

    thread = threading.Thread(target=work, daemon=True)
    thread.start()

    def wait() -> list[np.ndarray]:
        thread.join()
        if failure:
            raise failure[0]
        return result

    return wait


@njit(parallel=True, cache=True)
def _normal_signal(m1, m2, scale, z, out):  # pragma: no cover - compiled
    """``out[i] = m1[i] + sqrt(m2[i] * scale) * z[i]`` (one pass, no temporaries)."""
    for i in prange(z.shape[0]):
        out[i] = m1[i] + math.sqrt(m2[i] * scale) * z[i]


def compound_counts(m0: np.ndarray, m1: np.ndarray, m2: np.ndarray, rng: np.random.Generator,
                    exact_bins, frames: int = 1, *, normals: np.ndarray | None = None
                    ) -> np.ndarray:
    """Energy-integrating signal: compound Poisson of moments (M0, M1, M2) per cell.

    Parameters
    ----------
    m0, m1, m2 : float64 arrays of one shape
        Expected photons, mean signal and signal variance per reading (module notes).
    rng : numpy.random.Generator
    exact_bins : callable
        ``exact_bins(index) -> (n (k, E), w (E,))``: expected photons per energy bin of the
        flat cells ``index`` and the signal weight per bin, for the exact draw of dark cells.
    frames : int
        Number of readings averaged.
    normals : float64 or float32 array of m0's size, optional
        The first ``m0.size`` standard normal deviates of ``rng``, drawn beforehand (e.g. by
        :func:`start_standard_normals`, while other work runs).

    Returns
    -------
    float64 array, same shape
        Mean signal over the frames.

    Notes
    -----
    ``out = M1 + sqrt(M2 / frames) z`` with one standard normal ``z`` per cell, drawn first
    and in cell order; then one Poisson draw per energy bin of every dark cell, in cell order.
    """
    flat_m0 = m0.reshape(-1)
    if normals is None:
        z = rng.standard_normal(flat_m0.shape[0])
    else:
        z = np.ascontiguousarray(normals).reshape(-1)
        if z.shape[0] != flat_m0.shape[0] or z.dtype not in (np.float64, np.float32):
            raise ValueError(f"normals must hold {flat_m0.shape[0]} float64 or float32 values")
    # one compiled kernel for float64 deviates: float32 ones widen exactly
    z = z.astype(np.float64, copy=False)
    out = np.empty(flat_m0.shape[0])
    _normal_signal(np.ascontiguousarray(m1, dtype=np.float64).reshape(-1),
                   np.ascontiguousarray(m2, dtype=np.float64).reshape(-1), 1.0 / frames, z, out)
    dark = np.flatnonzero(flat_m0 < GAUSSIAN_MIN_PHOTONS / frames)
    if dark.size:
        n, w = exact_bins(dark)
        draws = rng.poisson(n * frames).astype(np.float64)
        out[dark] = (draws * w).sum(axis=1) / frames  # numpy's fixed order (no BLAS threads)
    return out.reshape(m0.shape)
