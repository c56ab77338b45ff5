"""Reference raw-data preprocessing: flat and dark correction, log, starvation floor, and a
water beam-hardening precorrection from the scan's own spectrum.

These are the steps a lab's calibration code replaces; a ``counts``-stage plug-in is scored
against them.
"""

from __future__ import annotations

import numpy as np

from simbench.errors import InputError, Where

#: polynomial degree of the water linearization (degree 3 to 5 is usual practice)
WATER_DEGREE = 4
#: water thicknesses fitted, mm: beyond any patient or phantom the bench ships
WATER_MAX_MM = 600.0


def log_projections(counts, flat, dark, *, floor: float = 0.5) -> tuple[np.ndarray, dict]:
    """Line integrals ``ln((flat - dark) / (counts - dark))`` with a starvation floor.

    Parameters
    ----------
    counts : float (V, C) or (V, R, C); (B, V, ...) for photon-counting bins
        Raw readings, dark level included.
    flat, dark : float (C,) or (R, C); (B, ...) for bins
        Air and dark frames.
    floor : float
        Floor of ``counts - dark`` and ``flat - dark`` before the logarithm, counts.

    Returns
    -------
    projections : float32, ``counts``' shape
    starvation : dict
        The floor and the number of floored readings.

    Notes
    -----
    The same calibration as the scan's own projections (:mod:`simbench.measure.calibration`),
    so that a ``counts``-stage plug-in with no calibration of its own reproduces them.
    """
    from simbench.measure.calibration import log_normalize

    counts = np.asarray(counts, dtype=np.float64)
    flat = np.asarray(flat, dtype=np.float64)
    dark = np.asarray(dark, dtype=np.float64)
    binned = counts.ndim == flat.ndim + 2
    if not binned:
        counts, flat, dark = counts[None], flat[None], dark[None]
    projections, starvation = log_normalize(counts, flat, dark, view_axis=1, floor=floor,
                                            dtype=np.float32)
    return (projections if binned else projections[0]), starvation


def water_linearization(energies_kev, signal_weights, reference_energy_kev: float, *,
                        degree: int = WATER_DEGREE, max_thickness_mm: float = WATER_MAX_MM
                        ) -> np.ndarray:
    """Polynomial that maps a measured polychromatic water projection to the monochromatic
    one at the reference energy.

    Parameters
    ----------
    energies_kev : float (E,)
    signal_weights : float (E,)
        What the detector's signal weighs per energy bin with no object (the scan's
        ``signal_weights_per_bin``).
    reference_energy_kev : float
        Energy of the truth line integrals.
    degree : int
    max_thickness_mm : float

    Returns
    -------
    float64 (degree + 1,)
        Coefficients, highest power first (:func:`numpy.polyval`), with no constant term
        (zero water gives zero).

    Notes
    -----
    For water thicknesses ``t`` from 0 to ``max_thickness_mm``::

        p_poly(t) = -ln( sum_E w(E) exp(-mu_w(E) t) / sum_E w(E) ),   p_mono(t) = mu_w(E0) t

    and the polynomial ``P`` minimises ``sum (P(p_poly) - p_mono)^2`` with ``P(0) = 0``.

    References
    ----------
    G. T. Herman, "Correction for beam hardening in computed tomography", Phys. Med. Biol.
    24(1), 81-106 (1979); L. M. Kijewski and B. E. Bjarngard, "Correction for beam hardening
    in computed tomography", Med. Phys. 5(3), 209-214 (1978).
    """
    from simbench.materials import get_material, mu_table

    energies = np.asarray(energies_kev, dtype=np.float64)
    weights = np.asarray(signal_weights, dtype=np.float64)
    keep = weights > 0
    if not keep.any():
        raise InputError(Where("scan.json", field="measurement.signal_weights_per_bin"),
                         "the scan's signal weighs no energy", "a scan written by simbench scan")
    energies, weights = energies[keep], weights[keep]
    water = [get_material("water")]
    mu = mu_table(water, energies)[0]
    mu_ref = float(mu_table(water, [reference_energy_kev])[0, 0])
    t = np.linspace(0.0, max_thickness_mm, 601)
    transmitted = np.exp(-np.outer(t, mu)) @ weights / weights.sum()
    p_poly = -np.log(np.maximum(transmitted, 1e-300))
    p_mono = mu_ref * t
    # least squares without a constant term: columns p^degree ... p^1
    design = np.stack([p_poly ** k for k in range(degree, 0, -1)], axis=1)
    coefficients = np.linalg.lstsq(design, p_mono, rcond=None)[0]
    return np.append(coefficients, 0.0)


def water_precorrect(projections, metadata: dict, *, degree: int = WATER_DEGREE) -> np.ndarray:
    """Apply the water linearization of a scan (from its ``scan.json`` record) to projections.

    Parameters
    ----------
    projections : float (V, C), (V, R, C), or (B, V, ...) for photon-counting bins
    metadata : dict
        The scan's record: ``measurement.energies_kev``, ``measurement.signal_weights_per_bin``
        and ``truth.reference_energy_kev``.

    Returns
    -------
    float32, ``projections``' shape
    """
    try:
        measurement = metadata["measurement"]
        energies = measurement["energies_kev"]
        weights = np.asarray(measurement["signal_weights_per_bin"], dtype=np.float64)
        reference = float(metadata["truth"]["reference_energy_kev"])
    except (KeyError, TypeError):
        raise InputError(Where("scan.json", field="measurement"),
                         "the scan records no spectrum weights for a water correction",
                         "a scan written by this version of simbench scan") from None
    data = np.asarray(projections, dtype=np.float64)
    if weights.shape[0] == 1:
        return np.polyval(water_linearization(energies, weights[0], reference, degree=degree),
                          data).astype(np.float32)
    return np.stack([np.polyval(water_linearization(energies, w, reference, degree=degree),
                                data[b]) for b, w in enumerate(weights)]).astype(np.float32)
