"""Ramp filtering of projections for filtered backprojection.

The ramp filter is built the discrete way of Kak & Slaney (eq. 3.61): the band-limited ramp's
spatial samples ``h[n]`` are placed on a zero-padded circular grid, and its discrete Fourier
transform is the filter. Unlike sampling ``|f|`` directly in frequency, this keeps the right
(small, non-zero) value at zero frequency, so reconstructions carry no DC offset. Projections
are zero-padded to a fast length of at least ``2 C - 1`` so that the circular convolution
equals the linear one on the ``C`` detector columns, and filtered with :mod:`scipy.fft`.

Windows (apodisation) multiply the spectrum; ``cutoff`` is the fraction of the Nyquist
frequency above which the filter is zero.

References
----------
A. C. Kak and M. Slaney, *Principles of Computerized Tomographic Imaging* (IEEE Press, 1988),
ch. 3: eq. 3.61 (the discrete ramp kernel) and sec. 3.4 (fan beams; for equiangular rays
the kernel ``(gamma / sin gamma)^2 h(gamma)``, section recalled from memory).
"""

from __future__ import annotations

import math

import numba
import numpy as np
import scipy.fft

from simbench.errors import InputError, Where

#: window names accepted by ``filter=``
WINDOWS = ("ramp", "shepp-logan", "cosine", "hamming", "hann")

_WHERE = "<arguments>"


def check_window(window, cutoff) -> tuple[str, float]:
    """Validate a window name and a cutoff; return them normalised.

    Parameters
    ----------
    window : str
        One of :data:`WINDOWS`.
    cutoff : float
        Fraction of the Nyquist frequency, ``0 < cutoff <= 1``.

    Returns
    -------
    (str, float)

    Raises
    ------
    InputError
        One line naming the option and what is valid.
    """
    if not isinstance(window, str) or window.lower() not in WINDOWS:
        raise InputError(Where(_WHERE, field="filter"), f"unknown filter {window!r}",
                         ", ".join(WINDOWS))
    if isinstance(cutoff, bool):
        cutoff = None
    try:
        value = float(cutoff)
    except (TypeError, ValueError):
        value = math.nan
    if not (0.0 < value <= 1.0):
        raise InputError(Where(_WHERE, field="cutoff"),
                         f"must be a fraction of the Nyquist frequency in (0, 1], got {cutoff!r}",
                         "a number with 0 < cutoff <= 1, e.g. 1.0 (no cut) or 0.8")
    return window.lower(), value


def padded_length(n_cols: int) -> int:
    """Fast FFT length of at least ``2 n_cols - 1`` (no wrap-around on ``n_cols`` outputs)."""
    return int(scipy.fft.next_fast_len(max(2 * int(n_cols) - 1, 2), real=True))


def ramp_kernel(n_padded: int, spacing: float, equiangular: bool = False) -> np.ndarray:
    """The spatial ramp kernel on a circular grid of ``n_padded`` samples.

    Parameters
    ----------
    n_padded : int
        Length of the circular grid (even or odd).
    spacing : float
        Sample spacing tau: mm for parallel beams and flat detectors, radians (the angle
        between neighbouring columns) for equiangular curved detectors.
    equiangular : bool
        Return the equiangular fan-beam kernel ``(n tau / sin(n tau))**2 h[n]``.

    Returns
    -------
    float64 (n_padded,)
        Index ``k`` holds ``h[n]`` for ``n = k`` when ``k <= n_padded // 2``, else
        ``n = k - n_padded``.

    Notes
    -----
    Kak & Slaney eq. 3.61: ``h[0] = 1 / (4 tau^2)``, ``h[n] = 0`` for even ``n != 0``,
    ``h[n] = -1 / (n^2 pi^2 tau^2)`` for odd ``n``. The equiangular kernel is Kak & Slaney's
    ``g(gamma) = (1/2) (gamma / sin gamma)^2 h(gamma)`` (sec. 3.4) without its factor 1/2,
    which the caller's redundancy weights carry.
    """
    k = np.arange(n_padded)
    n = np.where(k <= n_padded // 2, k, k - n_padded).astype(np.float64)
    h = np.zeros(n_padded)
    h[0] = 0.25 / spacing**2
    odd = (np.abs(n) % 2) == 1
    h[odd] = -1.0 / (np.pi * n[odd] * spacing) ** 2
    if equiangular:
        angle = n * spacing
        # the factor is needed on |n| < n_cols only (the linear-convolution range), where
        # |angle| is below the fan angle (< pi); further taps are left unmodified
        ok = (angle != 0.0) & (np.abs(angle) < 3.0)
        h[ok] *= (angle[ok] / np.sin(angle[ok])) ** 2
    return h


def window_response(window: str, cutoff: float, freq_nyquist: np.ndarray) -> np.ndarray:
    """The apodisation window at frequencies given as fractions of Nyquist.

    Parameters
    ----------
    window : str
        One of :data:`WINDOWS`.
    cutoff : float
        Fraction of Nyquist above which the response is 0.
    freq_nyquist : float64 array
        ``|f| / f_Nyquist`` (0 to 1).

    Returns
    -------
    float64 array, same shape

    Notes
    -----
    With ``x = f / (cutoff f_Nyquist)`` (0 for ``x > 1``): ramp 1; Shepp-Logan
    ``sin(pi x / 2) / (pi x / 2)``; cosine ``cos(pi x / 2)``; Hamming ``0.54 + 0.46 cos(pi x)``;
    Hann ``0.5 + 0.5 cos(pi x)``.
    """
    x = np.abs(np.asarray(freq_nyquist, dtype=np.float64)) / cutoff
    if window == "ramp":
        w = np.ones_like(x)
    elif window == "shepp-logan":
        w = np.sinc(x / 2.0)  # numpy's sinc is sin(pi t) / (pi t)
    elif window == "cosine":
        w = np.cos(np.pi * x / 2.0)
    elif window == "hamming":
        w = 0.54 + 0.46 * np.cos(np.pi * x)
    elif window == "hann":
        w = 0.5 + 0.5 * np.cos(np.pi * x)
    else:  # validated by check_window
        raise AssertionError(window)
    return np.where(x <= 1.0 + 1e-12, w, 0.0)


def filter_spectrum(n_padded: int, spacing: float, window: str = "ramp", cutoff: float = 1.0,
                    equiangular: bool = False) -> np.ndarray:
    """The filter's real spectrum for :func:`scipy.fft.rfft` of length ``n_padded``.

    Parameters
    ----------
    n_padded : int
    spacing : float
        Column spacing (mm, or radians for an equiangular detector).
    window, cutoff :
        See :func:`window_response`.
    equiangular : bool
        Use the equiangular fan-beam kernel.

    Returns
    -------
    float64 (n_padded // 2 + 1,)
        ``spacing * DFT(h)`` times the window: multiplying a row's rfft by it and inverting
        gives ``q_k = spacing * sum_n h[k - n] p_n`` (the discrete form of Kak & Slaney
        eq. 3.62).
    """
    h = ramp_kernel(n_padded, spacing, equiangular)
    spectrum = spacing * scipy.fft.rfft(h).real
    freq = np.arange(spectrum.shape[0]) * (2.0 / n_padded)
    return spectrum * window_response(window, cutoff, freq)


def ramp_filter(projections, spacing: float, window: str = "ramp", cutoff: float = 1.0,
                equiangular: bool = False) -> np.ndarray:
    """Filter projections along their last axis (detector columns).

    Parameters
    ----------
    projections : array (..., C)
        Line integrals (already weighted, for divergent beams), any leading shape.
    spacing : float
        Column spacing in mm (radians for an equiangular detector); > 0.
    window : str
        ``"ramp"``, ``"shepp-logan"``, ``"cosine"``, ``"hamming"`` or ``"hann"``.
    cutoff : float
        Fraction of the Nyquist frequency, ``0 < cutoff <= 1``.
    equiangular : bool
        Equiangular (curved) detector: the kernel ``(gamma / sin gamma)^2 h(gamma)``.

    Returns
    -------
    float64 array, same shape
        ``q_k = spacing * sum_n h[k - n] p_n`` with the windowed kernel, 1/mm for line
        integrals over mm spacing.

    Notes
    -----
    Zero padding to ``scipy.fft.next_fast_len(2 C - 1)`` makes the circular convolution equal
    the linear convolution on the ``C`` outputs.

    References
    ----------
    A. C. Kak and M. Slaney, *Principles of Computerized Tomographic Imaging* (1988), eq. 3.61.

    Examples
    --------
    >>> q = ramp_filter(np.ones((1, 5)), 1.0)
    >>> q.shape
    (1, 5)
    """
    window, cutoff = check_window(window, cutoff)
    data = np.asarray(projections, dtype=np.float64)
    if data.ndim < 1 or data.shape[-1] < 1:
        raise InputError(Where(_WHERE, field="projections"),
                         f"shape {data.shape} has no detector columns", "an array (..., C)")
    if not (np.isfinite(spacing) and spacing > 0):
        raise InputError(Where(_WHERE, field="spacing"), f"must be > 0, got {spacing!r}",
                         "a positive column spacing")
    n_cols = data.shape[-1]
    n_padded = padded_length(n_cols)
    spectrum = filter_spectrum(n_padded, float(spacing), window, cutoff, equiangular)
    return apply_spectrum(data, spectrum, n_padded)


def apply_spectrum(data: np.ndarray, spectrum: np.ndarray, n_padded: int) -> np.ndarray:
    """Multiply each row's zero-padded rfft by ``spectrum`` and return the first C samples."""
    workers = numba.get_num_threads()
    freq = scipy.fft.rfft(data, n=n_padded, axis=-1, workers=workers)
    freq *= spectrum
    return scipy.fft.irfft(freq, n=n_padded, axis=-1, workers=workers)[..., :data.shape[-1]]
