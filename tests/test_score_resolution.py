"""TTF from a circular insert and MTF from a wire, against the Gaussian's closed form.

A disc of radius R blurred by an isotropic 2-D Gaussian of standard deviation s has, at
distance r from its centre, the value P(|X| <= R) for X ~ N((r, 0), s^2 I): the Rice
distribution's CDF, ``scipy.stats.rice.cdf(R, r / s, scale=s)`` (S. O. Rice, "Mathematical
analysis of random noise", Bell Syst. Tech. J. 23-24 (1944-45), recalled from memory), a
closed form of the blurred disc, so the test images are exact. The
Gaussian's transfer function is its Fourier transform, ``exp(-2 pi^2 s^2 f^2)``.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from simbench.geometry.grid import ImageGrid
from simbench.score import TransferFunction, frequency_at, mtf_wire, ttf_circular_insert

LN2, LN10 = math.log(2.0), math.log(10.0)


def gaussian_tf(sigma_mm, f):
    """Fourier transform of a unit Gaussian (closed form)."""
    return np.exp(-2 * math.pi ** 2 * sigma_mm ** 2 * np.asarray(f) ** 2)


def gaussian_f(sigma_mm, level):
    """Where exp(-2 pi^2 s^2 f^2) = level: f = sqrt(-ln(level) / (2 pi^2)) / s (closed form)."""
    return math.sqrt(-math.log(level) / (2 * math.pi ** 2)) / sigma_mm


def blurred_disc(grid, centre, radius_mm, sigma_mm):
    x, y = grid.axis_mm("x"), grid.axis_mm("y")
    r = np.hypot(x[None, :] - centre[0], y[:, None] - centre[1])
    return stats.rice.cdf(radius_mm, r / sigma_mm, scale=sigma_mm)


@pytest.mark.parametrize("sigma_mm", [0.5, 1.0, 1.5])
@pytest.mark.parametrize("centre", [(0.13, -0.21), (0.0, 0.0), (3.3, 1.7)])
def test_ttf_of_a_gaussian_blurred_disc_is_the_gaussians_transform(sigma_mm, centre):
    grid = ImageGrid.square_2d(160, 0.5)
    image = 0.02 + 0.01 * blurred_disc(grid, centre, 10.0, sigma_mm)
    ttf = ttf_circular_insert(image, grid, centre, 10.0)
    expected = gaussian_tf(sigma_mm, ttf.frequencies_per_mm)
    upto = expected >= 0.1
    # within 0.02 up to where it falls to 0.1 (closed form of the Gaussian's transform)
    assert np.abs(ttf.values - expected)[upto].max() < 0.02
    assert ttf.f50_per_mm == pytest.approx(gaussian_f(sigma_mm, 0.5), rel=0.02)
    assert ttf.f10_per_mm == pytest.approx(gaussian_f(sigma_mm, 0.1), rel=0.03)
    assert ttf.kind == "TTF" and ttf.values[0] == 1.0
    assert ttf.contrast == pytest.approx(0.01, rel=1e-6)
    # reported to twice the grid's Nyquist frequency (the ESF is oversampled)
    assert ttf.frequencies_per_mm[-1] == pytest.approx(2.0, abs=0.01)


def test_ttf_does_not_depend_on_the_sign_or_scale_of_the_contrast():
    grid = ImageGrid.square_2d(160, 0.5)
    disc = blurred_disc(grid, (0.4, 0.2), 10.0, 1.0)
    bright = ttf_circular_insert(0.02 + 0.01 * disc, grid, (0.4, 0.2), 10.0)
    dark = ttf_circular_insert(0.02 - 0.003 * disc, grid, (0.4, 0.2), 10.0)
    # normalized at zero frequency: |F[LSF]| / |F[LSF](0)| (Richard et al. 2012)
    np.testing.assert_allclose(bright.values, dark.values, atol=1e-9)
    assert dark.contrast == pytest.approx(-0.003, rel=1e-6)


def test_ttf_in_noise_with_a_hann_window_stays_near_the_truth():
    grid = ImageGrid.square_2d(160, 0.5)
    clean = 0.02 + 0.01 * blurred_disc(grid, (0.13, -0.21), 10.0, 1.0)
    rng = np.random.default_rng(5)
    f50 = [ttf_circular_insert(clean + rng.normal(0, 2e-4, clean.shape), grid, (0.13, -0.21),
                               10.0, window="hann").f50_per_mm for _ in range(10)]
    # contrast 50 times the noise: f50 within 5 % of the closed form (measured spread ~1 %)
    assert np.mean(f50) == pytest.approx(gaussian_f(1.0, 0.5), rel=0.05)


@pytest.mark.parametrize("sigma_mm", [0.5, 0.75, 1.0])
@pytest.mark.parametrize("centre", [(0.0, 0.0), (0.1, -0.2)])
def test_wire_mtf_of_a_gaussian_point_spread_function(sigma_mm, centre):
    grid = ImageGrid.square_2d(160, 0.5)
    x, y = grid.axis_mm("x"), grid.axis_mm("y")
    r2 = (x[None, :] - centre[0]) ** 2 + (y[:, None] - centre[1]) ** 2
    image = 3.0 + np.exp(-r2 / (2 * sigma_mm ** 2))  # a point blurred by a Gaussian, on a pedestal
    mtf = mtf_wire(image, grid, centre)
    # radially averaged |DFT(PSF)| is the Gaussian's transform (closed form); the bins'
    # width and aliasing of the sampled PSF stay well below 0.02
    np.testing.assert_allclose(mtf.values, gaussian_tf(sigma_mm, mtf.frequencies_per_mm),
                               atol=0.01)
    assert mtf.f50_per_mm == pytest.approx(gaussian_f(sigma_mm, 0.5), rel=0.01)
    assert mtf.frequencies_per_mm[-1] <= 1.0 + 1e-12  # the Nyquist frequency, 1 / (2 dx)


@pytest.mark.parametrize("diameter_mm", [0.5, 1.0])
def test_wire_mtf_divides_out_the_wires_own_transform(diameter_mm):
    grid = ImageGrid.square_2d(160, 0.25)
    sigma = 0.5
    image = blurred_disc(grid, (0.05, 0.1), diameter_mm / 2, sigma)
    mtf = mtf_wire(image, grid, (0.05, 0.1), wire_diameter_mm=diameter_mm)
    # the image is the disc's transform 2 J1(pi d f) / (pi d f) times the Gaussian's
    # (convolution theorem); dividing the disc's out leaves the Gaussian (closed form)
    np.testing.assert_allclose(mtf.values, gaussian_tf(sigma, mtf.frequencies_per_mm),
                               atol=0.01)
    # without the correction, the wire's size shows
    raw = mtf_wire(image, grid, (0.05, 0.1))
    n = mtf.values.size
    assert np.abs(raw.values[:n] - gaussian_tf(sigma, raw.frequencies_per_mm[:n])).max() > 0.02


def test_frequency_at_interpolates_linearly():
    f = np.linspace(0.0, 2.0, 21)
    # T(f) = 1 - f / 2 crosses 0.5 at f = 1 and 0.1 at f = 1.8 (closed form)
    assert frequency_at(f, 1 - f / 2, 0.5) == pytest.approx(1.0, rel=1e-12)
    assert frequency_at(f, 1 - f / 2, 0.1) == pytest.approx(1.8, rel=1e-12)
    assert math.isnan(frequency_at(f, np.ones_like(f), 0.5))
    tf = TransferFunction("MTF", f, 1 - f / 2, 1.0, 1.8)
    np.testing.assert_allclose(tf.at([0.5, -0.5, 3.0]), [0.75, 0.75, 0.0])
