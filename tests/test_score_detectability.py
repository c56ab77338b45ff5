"""NPW detectability index d' against closed forms and against its definition by simulation.

Closed form used below (derived in :func:`simbench.score.npw_detectability`'s Notes): for
white noise of variance s^2 on pixels dx x dy, NPS = s^2 dx dy (ICRU Report 54), and
d'^2 = [int |W|^2 T^2 df]^2 / int |W|^2 T^2 NPS df = int |W|^2 T^2 df / (s^2 dx dy).
With T = 1 this is E / (s^2 dx dy), E = int |w|^2 dx the signal energy (Parseval), i.e. the
familiar sum_i w_i^2 / s^2 of a known signal in white noise (Barrett and Myers 2004, ch. 13,
recalled from memory).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import fft

from simbench.score import DiscTask, NoisePowerSpectrum, TransferFunction, noise_power_spectrum
from simbench.score import npw_detectability


def flat_nps(s, shape, dx, dy):
    """The exact NPS of white noise of variance s^2: s^2 dx dy everywhere (ICRU Report 54)."""
    ny, nx = shape
    fx = fft.fftshift(fft.fftfreq(nx, dx))
    fy = fft.fftshift(fft.fftfreq(ny, dy))
    values = np.full(shape, s * s * dx * dy)
    values[ny // 2, nx // 2] = 0.0  # as mean subtraction leaves it
    return NoisePowerSpectrum(values, fx, fy, np.zeros(1), np.zeros(1), s * s, 1, (dx, dy),
                              "mean")


def gaussian_transfer(sigma_mm, f_max=4.0):
    f = np.linspace(0.0, f_max, 2001)
    t = np.exp(-2 * math.pi ** 2 * sigma_mm ** 2 * f ** 2)  # Gaussian blur (closed form)
    return TransferFunction("TTF", f, t, math.nan, math.nan)


@pytest.mark.parametrize("diameter_mm", [10.0, 20.0])
def test_disc_in_measured_white_noise_matches_the_closed_form(diameter_mm):
    s, dx, dy = 0.002, 0.5, 0.5
    rois = np.random.default_rng(11).normal(0.0, s, (200, 64, 64))
    nps = noise_power_spectrum(rois, (dx, dy))
    task = DiscTask(diameter_mm, contrast=0.001)
    # d' = sqrt(E / (s^2 dx dy)), E = C^2 pi d^2 / 4 (derived above); within 5 %
    expected = math.sqrt(task.energy() / (s * s * dx * dy))
    assert npw_detectability(task, nps) == pytest.approx(expected, rel=0.05)


def test_gaussian_signal_through_gaussian_blur_matches_the_closed_form():
    s, dx, dy = 3.0, 0.4, 0.6
    a, sigma, c = 2.0, 0.8, 10.0  # signal width, blur, contrast (HU, say)

    def gaussian_signal(fx, fy):
        # w(r) = c exp(-r^2 / (2 a^2)) has W(f) = c 2 pi a^2 exp(-2 pi^2 a^2 f^2)
        return c * 2 * math.pi * a * a * np.exp(-2 * math.pi ** 2 * a * a * (fx ** 2 + fy ** 2))

    nps = flat_nps(s, (128, 96), dx, dy)
    # int |W|^2 T^2 df = c^2 pi a^4 / (a^2 + sigma^2) (Gaussian integral, closed form)
    expected = math.sqrt(c * c * math.pi * a ** 4 / (a * a + sigma * sigma) / (s * s * dx * dy))
    got = npw_detectability(gaussian_signal, nps, gaussian_transfer(sigma))
    assert got == pytest.approx(expected, rel=0.01)


def test_d_prime_scales_with_contrast_over_noise():
    nps = flat_nps(1.0, (64, 64), 0.5, 0.5)
    base = npw_detectability(DiscTask(5.0, 1.0), nps)
    # d' is linear in the contrast and inverse in the noise amplitude (closed form above)
    assert npw_detectability(DiscTask(5.0, 3.0), nps) == pytest.approx(3 * base, rel=1e-12)
    assert npw_detectability(DiscTask(5.0, 1.0), flat_nps(2.0, (64, 64), 0.5, 0.5)) == \
        pytest.approx(base / 2, rel=1e-12)
    # blur lowers d' (the TTF weights |W|^2 by T^2 <= 1)
    assert npw_detectability(DiscTask(5.0, 1.0), nps, gaussian_transfer(1.0)) < base


def test_d_prime_in_correlated_noise_matches_the_observers_definition():
    """Simulate the NPW observer: template t = the expected signal, statistic lambda = t . g;
    d' = (mean lambda_present - mean lambda_absent) / std lambda (ICRU Report 54, the
    detectability of a linear observer), against the formula from the estimated NPS."""
    n, dx = 64, 0.5
    rng = np.random.default_rng(12)
    fx = fft.fftfreq(n, dx)
    f2 = fx[None, :] ** 2 + fx[:, None] ** 2
    task = DiscTask(6.0, 1.0)
    blur = gaussian_transfer(0.6)
    # the blurred signal on the periodic grid: inverse DFT of W T / (dx dy)
    signal = fft.ifft2(task(fx[None, :], fx[:, None]) * blur.at(np.sqrt(f2))).real / (dx * dx)
    # correlated noise: white noise through a Gaussian low-pass (periodic)
    rx = fft.rfftfreq(n, dx)
    shaping = 0.5 * np.exp(-2 * math.pi ** 2 * 0.7 ** 2 * (rx[None, :] ** 2 + fx[:, None] ** 2))

    def correlated(count):
        return fft.irfft2(fft.rfft2(rng.normal(0.0, 1.0, (count, n, n))) * shaping, (n, n))

    nps = noise_power_spectrum(correlated(400), (dx, dx))
    # NPW statistic on noise-only images; the signal adds t . t to its mean
    responses = np.concatenate([(correlated(500) * signal).sum(axis=(1, 2)) for _ in range(8)])
    simulated = (signal * signal).sum() / responses.std(ddof=1)
    # within 5 % (sampling error of the simulation ~1.1 %, of the NPS ~1 %)
    assert npw_detectability(task, nps, blur) == pytest.approx(simulated, rel=0.05)


def test_disc_task_energy_and_transform():
    task = DiscTask(4.0, 2.0)
    # W(0) = C pi d^2 / 4; the first zero of J1 is at 3.8317 (tables), so W = 0 at
    # f = 3.8317 / (pi d)
    assert task(np.zeros(1), np.zeros(1))[0] == pytest.approx(2.0 * math.pi * 4.0, rel=1e-12)
    assert abs(task(np.array([3.8317 / (math.pi * 4.0)]), np.zeros(1))[0]) < 1e-4
    assert task.energy() == pytest.approx(4.0 * math.pi * 4.0, rel=1e-12)
