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

#: default floor of ``counts - dark`` and ``flat - dark`` before the logarithm, counts
DEFAULT_FLOOR_COUNTS = 0.5


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
    counts = np.asarray(counts, dtype=np.float64)
    flat = np.expand_dims(np.asarray(flat, dtype=np.float64), view_axis)
    dark = np.expand_dims(np.asarray(dark, dtype=np.float64), view_axis)
    signal = counts - dark
    air = flat - dark
    starved = ~(signal >= floor)  # also catches NaN
    starved_air = ~(air >= floor)
    signal = np.where(starved, floor, signal)
    air = np.where(starved_air, floor, air)
    p = np.log(air) - np.log(signal)
    record = {
        "floor_counts": float(floor),
        "starved_cells": int(np.count_nonzero(starved)),
        "starved_fraction": float(np.count_nonzero(starved) / max(starved.size, 1)),
        "starved_flat_cells": int(np.count_nonzero(starved_air)),
    }
    return p.astype(dtype, copy=False), record
