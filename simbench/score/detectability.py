"""Task-based image quality: the detectability index d' of the non-prewhitening (NPW) observer.

d' says how well a stated signal (e.g. a 5 mm disc of 10 HU contrast) can be told from its
absence in the image's noise, after the image's blur. It combines the TTF
(:mod:`simbench.score.resolution`) and the NPS (:mod:`simbench.score.noise`) with the task,
so two reconstructions with different noise textures and sharpness are compared on one number
that depends on the object of interest.

References
----------
S. Richard, D. B. Husarik, G. Yadava, S. N. Murphy and E. Samei, "Towards task-based
assessment of CT performance: system and object MTF across different reconstruction
algorithms", Med. Phys. 39(7), 4115-4122 (2012).
ICRU Report 87, "Radiation dose and image-quality assessment in computed tomography",
J. ICRU 12(1) (2012).
ICRU Report 54, "Medical imaging - the assessment of image quality" (1995).
H. H. Barrett and K. J. Myers, *Foundations of Image Science* (Wiley, 2004), ch. 13 (the
NPW observer; recalled from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import special

from simbench.score import checks
from simbench.score.noise import NoisePowerSpectrum
from simbench.score.resolution import TransferFunction


@dataclass(frozen=True)
class DiscTask:
    """Detect a uniform disc: the task function is the disc's Fourier transform.

    Attributes
    ----------
    diameter_mm : float
        Diameter of the disc, mm (> 0).
    contrast : float
        Its value above the background, in the unit of the NPS's images (1/mm or HU).

    Notes
    -----
    ``W(f) = C (pi d^2 / 4) 2 J1(pi d |f|) / (pi d |f|)`` (unit: contrast x mm^2), the 2-D
    Fourier transform of a disc of diameter d and height C; its energy is
    ``integral |W|^2 df = integral |w|^2 dx = C^2 pi d^2 / 4`` (Parseval).
    """

    diameter_mm: float
    contrast: float

    def __post_init__(self):
        checks.positive(self.diameter_mm, "DiscTask", "diameter_mm")
        contrast = checks.finite(self.contrast, "DiscTask", "contrast")
        if contrast == 0:
            raise checks.fail("DiscTask", "contrast", "is 0", "a nonzero contrast")

    def __call__(self, fx_per_mm, fy_per_mm) -> np.ndarray:
        """``W(fx, fy)`` at broadcastable frequency arrays, contrast x mm^2."""
        d = float(self.diameter_mm)
        x = np.pi * d * np.hypot(fx_per_mm, fy_per_mm)
        jinc = np.ones_like(x)
        nonzero = x != 0
        jinc[nonzero] = 2.0 * special.j1(x[nonzero]) / x[nonzero]
        return float(self.contrast) * (np.pi * d * d / 4.0) * jinc

    def energy(self) -> float:
        """``integral |w(x)|^2 dx = C^2 pi d^2 / 4``, contrast^2 x mm^2."""
        return float(self.contrast) ** 2 * math.pi * float(self.diameter_mm) ** 2 / 4.0


def _filled_zero_frequency(nps: np.ndarray, fx: np.ndarray, fy: np.ndarray) -> np.ndarray:
    """The NPS with its zero-frequency sample replaced by the mean of its axis neighbours."""
    ix, iy = np.flatnonzero(fx == 0), np.flatnonzero(fy == 0)
    if ix.size != 1 or iy.size != 1:
        return nps
    ix, iy = int(ix[0]), int(iy[0])
    neighbours = [nps[iy, j] for j in (ix - 1, ix + 1) if 0 <= j < nps.shape[1]]
    neighbours += [nps[i, ix] for i in (iy - 1, iy + 1) if 0 <= i < nps.shape[0]]
    out = nps.copy()
    out[iy, ix] = float(np.mean(neighbours))
    return out


def npw_detectability(task, nps: NoisePowerSpectrum, ttf: TransferFunction | None = None
                      ) -> float:
    """Detectability index d' of the non-prewhitening (NPW) observer.

    Parameters
    ----------
    task : callable ``W(fx, fy)``
        The task function: the Fourier transform of the signal to detect, in the NPS's image
        unit x mm^2, at frequency arrays in cycles/mm (e.g. :class:`DiscTask`).
    nps : NoisePowerSpectrum
        The 2-D noise power spectrum (:func:`simbench.score.noise.noise_power_spectrum`), in
        the same image unit as the task's contrast.
    ttf : TransferFunction, optional
        The radial TTF (or MTF) of the image at the task's contrast
        (:func:`simbench.score.resolution.ttf_circular_insert`); default 1 (no blur).

    Returns
    -------
    float
        d' (dimensionless).

    Notes
    -----
    ``d'^2 = [ sum |W|^2 TTF^2 df ]^2 / sum |W|^2 TTF^2 NPS df`` over the NPS's frequency
    grid (``df = dfx dfy``, ``|f|`` up to the grid's Nyquist frequencies), the TTF read at
    ``|f|`` (0 beyond its last frequency: a wire MTF stops at the Nyquist frequency, a TTF
    from :func:`~simbench.score.resolution.ttf_circular_insert` reaches past the corners of
    the grid). Mean subtraction leaves the NPS at zero frequency 0, which is not the noise
    there: that sample is replaced by the mean of its four neighbours.

    For white noise of variance s^2 on pixels dx x dy (``NPS = s^2 dx dy``) and no blur,
    ``d'^2 = sum |W|^2 df / (s^2 dx dy) = E / (s^2 dx dy)`` with ``E = integral |w|^2 dx`` the
    signal's energy (Parseval), which is ``sum_i w_i^2 / s^2`` over pixels: the NPW template
    is then the prewhitening (ideal linear) one. The band limit leaves out the signal's
    energy beyond the Nyquist frequency (about ``2 / (pi^2 d f_N)`` of a disc's).

    References
    ----------
    S. Richard et al., Med. Phys. 39(7), 4115-4122 (2012) (NPW d' from TTF and NPS).
    ICRU Report 87, J. ICRU 12(1) (2012); ICRU Report 54 (1995) (model observers).
    H. H. Barrett and K. J. Myers, *Foundations of Image Science* (2004), ch. 13 (recalled
    from memory).
    """
    function = "npw_detectability"
    if not callable(task):
        raise checks.fail(function, "task", f"got {type(task).__name__}",
                          "a task function W(fx, fy), e.g. DiscTask(diameter_mm, contrast)")
    if not isinstance(nps, NoisePowerSpectrum):
        raise checks.fail(function, "nps", f"got {type(nps).__name__}",
                          "a NoisePowerSpectrum from noise_power_spectrum()")
    if ttf is not None and not isinstance(ttf, TransferFunction):
        raise checks.fail(function, "ttf", f"got {type(ttf).__name__}",
                          "a TransferFunction from ttf_circular_insert() or mtf_wire(), or None")
    fx, fy = nps.fx_per_mm[None, :], nps.fy_per_mm[:, None]
    w2 = np.abs(np.asarray(task(fx, fy))) ** 2
    if w2.shape != nps.nps.shape or not np.all(np.isfinite(w2)):
        raise checks.fail(function, "task", "did not return finite values on the frequency "
                          "grid", f"an array of shape {nps.nps.shape}")
    if ttf is not None:
        w2 = w2 * ttf.at(np.hypot(fx, fy)) ** 2
    noise = _filled_zero_frequency(nps.nps, nps.fx_per_mm, nps.fy_per_mm)
    signal = float(w2.sum())
    spread = float((w2 * noise).sum())
    if not signal > 0:
        raise checks.fail(function, "task", "has no energy within the frequency grid",
                          "a signal whose spectrum reaches the NPS's frequencies")
    if not spread > 0:
        raise checks.fail(function, "nps", "is zero where the task has energy",
                          "the NPS of noisy images")
    df = (nps.fx_per_mm[1] - nps.fx_per_mm[0]) * (nps.fy_per_mm[1] - nps.fy_per_mm[0])
    return math.sqrt(signal * signal * df / spread)
