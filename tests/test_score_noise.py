"""Noise power spectrum and noise magnitude against closed forms for white and filtered noise."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import ndimage

from simbench.geometry.grid import ImageGrid
from simbench.score import (ensemble_noise_std, noise_power_spectrum, noise_std, radial_average,
                            square_roi)

DX, DY = 0.5, 0.8  # mm: different on purpose, so that a swapped axis shows


def white_rois(n, shape, s, seed):
    return np.random.default_rng(seed).normal(0.0, s, (n, *shape))


def test_white_noise_nps_is_flat_at_variance_times_pixel_area():
    s = 0.003
    nps = noise_power_spectrum(white_rois(400, (64, 64), s, 1), (DX, DY))
    level = s * s * DX * DY
    # white noise of variance s^2: NPS = s^2 dx dy (ICRU Report 54)
    off_dc = np.ones(nps.nps.shape, bool)
    off_dc[32, 32] = False  # mean subtraction empties the zero-frequency sample
    assert nps.nps[off_dc].mean() == pytest.approx(level, rel=0.01)
    # every ring of the radial average within 5 % (rings hold >= 4 samples x 400 ROIs)
    assert np.all(np.abs(nps.radial_nps[1:] / level - 1) < 0.05)
    assert nps.nps[32, 32] == pytest.approx(0.0, abs=1e-25)
    # axes: zero frequency at the centre, spacing 1 / (N d)
    assert nps.fx_per_mm[32] == 0.0 and nps.fy_per_mm[32] == 0.0
    assert nps.fx_per_mm[33] == pytest.approx(1 / (64 * DX))
    assert nps.fy_per_mm[33] == pytest.approx(1 / (64 * DY))
    assert nps.radial_frequencies_per_mm[-1] <= 0.5 / DY + 1e-12


@pytest.mark.parametrize("detrend", ["mean", "plane", "ensemble"])
def test_nps_integral_is_the_pixel_variance(detrend):
    rois = white_rois(30, (32, 48), 2.0, 2)
    nps = noise_power_spectrum(rois, (DX, DY), detrend)
    df = (1 / (48 * DX)) * (1 / (32 * DY))
    # Parseval: sum NPS dfx dfy = mean squared detrended value (to rounding)
    assert nps.nps.sum() * df == pytest.approx(nps.variance, rel=1e-12)
    if detrend == "mean":
        assert nps.variance == pytest.approx(np.var(rois, axis=(1, 2)).mean(), rel=1e-12)
    # and estimates the pixel variance s^2 = 4 (1 - 1/N bias of a fitted trend ~ 0.2 %)
    assert nps.variance == pytest.approx(4.0, rel=0.03)


def test_filtered_noise_follows_the_filters_transfer_function():
    s = 1.0
    white = white_rois(300, (64, 64), s, 3)
    # a 3-point moving average along x (columns) only, periodic:
    # NPS = s^2 dx dy |H(fx)|^2, H(fx) = (1 + 2 cos(2 pi fx dx)) / 3 (DFT of the kernel)
    smooth = ndimage.uniform_filter1d(white, 3, axis=2, mode="wrap")
    nps = noise_power_spectrum(smooth, (DX, DY))
    along_x = nps.nps[:, :].mean(axis=0)  # average over fy
    h = (1 + 2 * np.cos(2 * np.pi * nps.fx_per_mm * DX)) / 3
    expected = s * s * DX * DY * h ** 2
    keep = expected > 0.05 * expected.max()
    keep[32] = False  # zero frequency (emptied by mean subtraction)
    np.testing.assert_allclose(along_x[keep], expected[keep], rtol=0.05)
    # and flat along fy
    along_y = nps.nps[:, 34]
    assert np.std(along_y) / np.mean(along_y) < 0.2


def test_ensemble_detrending_removes_deterministic_structure():
    ny = nx = 48
    y, x = np.indices((ny, nx))
    structure = 5.0 * (x > 20) + 0.1 * y  # an edge and a ramp, the same in every realization
    noise = white_rois(100, (ny, nx), 0.5, 4)
    rois = structure + noise
    level = 0.25 * DX * DY  # s^2 dx dy (ICRU Report 54)
    ensemble = noise_power_spectrum(rois, (DX, DY), "ensemble")
    assert np.all(np.abs(ensemble.radial_nps[1:] / level - 1) < 0.1)
    assert ensemble.variance == pytest.approx(0.25, rel=0.02)
    # subtracting the ROI means alone leaves the edge's power at low frequency
    plain = noise_power_spectrum(rois, (DX, DY), "mean")
    assert plain.radial_nps[1] > 10 * level


def test_plane_detrending_removes_a_ramp():
    y, x = np.indices((40, 40))
    rois = 0.2 * x - 0.3 * y + white_rois(200, (40, 40), 0.5, 5)
    plane = noise_power_spectrum(rois, (DX, DX), "plane")
    level = 0.25 * DX * DX
    # a fitted plane removes 3 of 1600 degrees of freedom: flat at s^2 dx dy within 10 % per
    # ring (ICRU Report 54 level; the low rings lose a little to the fit)
    assert np.all(np.abs(plane.radial_nps[2:] / level - 1) < 0.1)


def test_radial_average_of_the_radius_is_the_radius():
    fx = np.fft.fftfreq(50, 0.4)
    fy = np.fft.fftfreq(30, 0.4)
    radius = np.hypot(fx[None, :], fy[:, None])
    f, avg = radial_average(radius, fx, fy)
    # each ring is reported at the mean |f| of its samples, so averaging |f| gives it back
    np.testing.assert_allclose(avg, f, rtol=1e-12)
    assert f[0] == 0.0 and f[-1] <= 0.5 / 0.4 + 1e-12


def test_noise_std_closed_forms():
    b = 0.002
    iy, ix = np.indices((20, 20))
    image = 0.02 + b * np.where((iy + ix) % 2 == 0, 1.0, -1.0)
    # +-b checkerboard on N pixels: sample std b sqrt(N / (N - 1)) (definition)
    assert noise_std(image) == pytest.approx(b * math.sqrt(400 / 399), rel=1e-12)
    # two realizations base +- c: per-pixel sample variance 2 c^2, so std c sqrt(2)
    base = np.random.default_rng(6).uniform(0, 1, (8, 9))
    stack = np.stack([base + 0.01, base - 0.01])
    assert ensemble_noise_std(stack) == pytest.approx(0.01 * math.sqrt(2), rel=1e-12)
    mask = np.zeros((8, 9), bool)
    mask[2:5, 3:7] = True
    assert ensemble_noise_std(stack, mask) == pytest.approx(0.01 * math.sqrt(2), rel=1e-12)


def test_square_roi_is_centred_on_the_point():
    grid = ImageGrid.square_2d(100, 0.5)
    rows, cols = square_roi(grid, (10.0, -5.0), 20)
    # pixel i is at (i - 49.5) 0.5 mm: x = 10 mm is between columns 69 and 70, y = -5 mm
    # between rows 39 and 40, so a 20-pixel ROI spans 60..79 and 30..49
    assert (cols.start, cols.stop) == (60, 80)
    assert (rows.start, rows.stop) == (30, 50)
