"""Log preprocessing of raw counts into projections, with a stated photon-starvation policy.

    p = ln((flat - dark) / (counts - dark))

``flat`` and ``dark`` are the averaged air and dark frames (no view axis). A cell whose
``counts - dark`` (or ``flat - dark``) is below the *starvation floor* (0.5 count by default:
half of the smallest non-zero photon count) is clamped to the floor before the logarithm, so the
result is always finite. The floor and the number of clamped cells are returned in the record
(``Measurement.metadata["starvation"]``): never a silent NaN or inf.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

#: default floor of ``counts - dark`` and ``flat - dark`` before the logarithm, counts
DEFAULT_FLOOR_COUNTS = 0.5


@njit(parallel=True, cache=True)
def _floored_signal(counts, dark, floor, out):  # pragma: no cover - compiled
    """``out = counts - dark`` floored at ``floor`` (NaN too); returns the number floored.

    counts, out (P, V, Q); dark (P, Q). The count is an integer sum: the same with any
    number of threads.
    """
    n_pre, n_views, n_post = counts.shape
    starved = 0
    for task in prange(n_pre * n_views):
        i = task // n_views
        v = task % n_views
        k = 0
        for j in range(n_post):
            s = counts[i, v, j] - dark[i, j]
            if not s >= floor:
                s = floor
                k += 1
            out[i, v, j] = s
        starved += k
    return starved


@njit(parallel=True, cache=True)
def _minus_log(log_air, log_signal, out):  # pragma: no cover - compiled
    """``out[i, v, j] = log_air[i, j] - log_signal[i, v, j]``, rounded to out's dtype."""
    n_pre, n_views, n_post = log_signal.shape
    for task in prange(n_pre * n_views):
        i = task // n_views
        v = task % n_views
        for j in range(n_post):
            out[i, v, j] = log_air[i, j] - log_signal[i, v, j]


def log_normalize(counts: np.ndarray, flat: np.ndarray, dark: np.ndarray, *, view_axis: int = 0,
                  floor: float = DEFAULT_FLOOR_COUNTS,
                  dtype=np.float64) -> tuple[np.ndarray, dict]:
    """Projections (line integrals) from raw counts, flat and dark frames.

    Parameters
    ----------
    counts : array (..., V, ...)
        Raw readings of the scan.
    flat, dark : array
        Averaged air and dark frames: ``counts``' shape without the view axis.
    view_axis : int
        Axis of the views in ``counts``.
    floor : float
        Starvation floor in counts (> 0).
    dtype : numpy dtype
        Dtype of the projections (computed in float64).

    Returns
    -------
    projections : array, counts' shape
    record : dict
        ``floor_counts``, ``starved_cells`` (scan readings clamped), ``starved_fraction``,
        ``starved_flat_cells`` (flat cells clamped, e.g. dead cells).

    Notes
    -----
    ``p = ln(max(flat - dark, floor)) - ln(max(counts - dark, floor))`` (Beer–Lambert with air
    calibration).

    Examples
    --------
    >>> p, rec = log_normalize(np.array([[100.0, 0.0]]), np.array([1000.0, 1000.0]),
    ...                        np.zeros(2))
    >>> round(float(p[0, 0]), 6), rec["starved_cells"]
    (2.302585, 1)
    """
    if not floor > 0 or not np.isfinite(floor):
        raise ValueError(f"starvation floor must be a finite number > 0 counts, got {floor!r}")
    counts = np.ascontiguousarray(counts, dtype=np.float64)
    axis = view_axis % counts.ndim
    frame_shape = counts.shape[:axis] + (1,) + counts.shape[axis + 1:]
    n_pre = int(np.prod(counts.shape[:axis], dtype=np.int64))
    n_post = int(np.prod(counts.shape[axis + 1:], dtype=np.int64))
    n_views = counts.shape[axis]

    def frame(a):
        a = np.expand_dims(np.asarray(a, dtype=np.float64), view_axis)
        return np.ascontiguousarray(np.broadcast_to(a, frame_shape)).reshape(n_pre, n_post)

    flat, dark = frame(flat), frame(dark)
    air = flat - dark
    starved_air = ~(air >= floor)
    log_air = np.log(np.where(starved_air, floor, air))
    # one pass for the floor and its count, numpy's vectorised log in place, one subtraction
    signal = np.empty((n_pre, n_views, n_post))
    n_starved = _floored_signal(counts.reshape(n_pre, n_views, n_post), dark, float(floor),
                                signal)
    np.log(signal, out=signal)
    if np.dtype(dtype) in (np.float32, np.float64):
        p = signal if np.dtype(dtype) == np.float64 else np.empty(signal.shape, dtype=dtype)
        _minus_log(log_air, signal, p)
    else:
        p = (log_air[:, None, :] - signal).astype(dtype)
    p = p.reshape(counts.shape)
    record = {
        "floor_counts": float(floor),
        "starved_cells": int(n_starved),
        "starved_fraction": float(n_starved / max(counts.size, 1)),
        "starved_flat_cells": int(np.count_nonzero(starved_air)),
    }
    return p, record
