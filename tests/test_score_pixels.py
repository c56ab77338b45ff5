"""Pixel errors: RMSE, NRMSE, MAE, PSNR and SSIM against closed forms and scikit-image."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from skimage.metrics import (normalized_root_mse, peak_signal_noise_ratio,
                             structural_similarity)

from simbench.geometry.grid import ImageGrid
from simbench.phantom import load_phantom, rasterize, shipped_phantom_path
from simbench.score import mae, nrmse, psnr, rmse, ssim, ssim_map


def skimage_ssim(image, truth, data_range):
    # the settings of Wang et al. (2004) as scikit-image names them
    return structural_similarity(truth, image, gaussian_weights=True, sigma=1.5,
                                 use_sample_covariance=False, data_range=data_range)


def random_pair(shape, seed):
    rng = np.random.default_rng(seed)
    truth = rng.uniform(0.0, 0.05, shape)
    return truth + rng.normal(0.0, 0.004, shape), truth


@pytest.fixture(scope="module")
def phantom_pair():
    """A rasterized shipped phantom (mu at 60 keV, 1/mm) and a noisy copy of it."""
    phantom = load_phantom(shipped_phantom_path("water-ellipse-inserts"))
    truth = rasterize(phantom, ImageGrid.square_2d(128, 3.0), 60.0)
    noisy = truth + np.random.default_rng(8).normal(0.0, 0.002, truth.shape)
    return noisy, truth


@pytest.mark.parametrize("shape,seed", [((64, 80), 1), ((13, 11), 2), ((16, 20, 24), 3)])
def test_ssim_and_psnr_agree_with_scikit_image_on_random_images(shape, seed):
    image, truth = random_pair(shape, seed)
    span = truth.max() - truth.min()
    # scikit-image's structural_similarity and peak_signal_noise_ratio (reference library)
    assert ssim(image, truth) == pytest.approx(skimage_ssim(image, truth, span), abs=1e-6)
    assert psnr(image, truth) == pytest.approx(
        peak_signal_noise_ratio(truth, image, data_range=span), abs=1e-6)
    assert ssim(image, truth, data_range=0.1) == pytest.approx(
        skimage_ssim(image, truth, 0.1), abs=1e-6)
    assert psnr(image, truth, data_range=0.1) == pytest.approx(
        peak_signal_noise_ratio(truth, image, data_range=0.1), abs=1e-6)


def test_ssim_and_psnr_agree_with_scikit_image_on_a_phantom(phantom_pair):
    image, truth = phantom_pair
    span = truth.max() - truth.min()
    # scikit-image (reference library) on a real image: the shipped phantom with noise
    assert ssim(image, truth) == pytest.approx(skimage_ssim(image, truth, span), abs=1e-6)
    assert psnr(image, truth) == pytest.approx(
        peak_signal_noise_ratio(truth, image, data_range=span), abs=1e-6)
    # a float32 reconstruction is scored in float64 like a float64 one
    assert ssim(image.astype(np.float32), truth) == pytest.approx(
        skimage_ssim(image.astype(np.float32).astype(np.float64), truth, span), abs=1e-6)


def test_nrmse_is_scikit_image_min_max_normalization(phantom_pair):
    image, truth = phantom_pair
    # scikit-image normalized_root_mse(normalization="min-max") (reference library)
    assert nrmse(image, truth) == pytest.approx(
        normalized_root_mse(truth, image, normalization="min-max"), rel=1e-12)


def test_constant_offset_gives_closed_forms():
    truth = np.linspace(0.0, 0.04, 400).reshape(20, 20)
    image = truth + 0.003
    # an error of c at every pixel: RMSE = MAE = c, NRMSE = c / range,
    # PSNR = 10 log10(range^2 / c^2) (definitions, Wang and Bovik 2009)
    assert rmse(image, truth) == pytest.approx(0.003, rel=1e-12)
    assert mae(image, truth) == pytest.approx(0.003, rel=1e-12)
    assert nrmse(image, truth) == pytest.approx(0.003 / 0.04, rel=1e-12)
    assert psnr(image, truth) == pytest.approx(20 * math.log10(0.04 / 0.003), rel=1e-12)


def test_alternating_errors_separate_rmse_from_mae():
    truth = np.zeros((10, 10))
    image = truth.copy()
    image[0, :4] = [3.0, -3.0, 4.0, -4.0]
    # RMSE = sqrt((9 + 9 + 16 + 16) / 100), MAE = 14 / 100 (definitions)
    assert rmse(image, truth) == pytest.approx(math.sqrt(0.5), rel=1e-12)
    assert mae(image, truth) == pytest.approx(0.14, rel=1e-12)


def test_equal_images_score_perfectly(phantom_pair):
    _, truth = phantom_pair
    # SSIM(x, x) = 1 and MSE 0 (Wang et al. 2004, eq. (13); PSNR unbounded)
    assert ssim(truth, truth) == pytest.approx(1.0, abs=1e-12)
    assert psnr(truth, truth) == math.inf
    assert rmse(truth, truth) == 0.0


def test_mask_scores_only_its_pixels():
    truth = np.zeros((32, 32))
    truth[8:24, 8:24] = 1.0
    image = truth.copy()
    image[:, :4] += 0.5  # errors only in the first columns
    mask = np.zeros_like(truth, bool)
    mask[:, 4:] = True
    assert rmse(image, truth, mask) == 0.0
    assert mae(image, truth, mask) == 0.0
    assert psnr(image, truth, mask) == math.inf
    # an all-true mask is no mask
    everywhere = np.ones_like(mask)
    assert ssim(image, truth, everywhere) == pytest.approx(ssim(image, truth), abs=1e-15)
    # the masked SSIM is the mean of the SSIM map over the mask's interior pixels
    local = ssim_map(image, truth)
    inner = np.zeros_like(mask)
    inner[5:-5, 5:-5] = True
    assert ssim(image, truth, mask) == pytest.approx(local[mask & inner].mean(), abs=1e-15)


def test_default_data_range_is_the_truths_range_over_the_mask():
    truth = np.zeros((20, 20))
    truth[:, 10:] = np.linspace(0, 2.0, 10)
    image = truth + 0.1
    mask = np.zeros_like(truth, bool)
    mask[:, 15:] = True
    span = truth[mask].max() - truth[mask].min()
    assert psnr(image, truth, mask) == pytest.approx(20 * math.log10(span / 0.1), rel=1e-12)


@settings(max_examples=40, deadline=None)
@given(st.lists(st.floats(-1e3, 1e3), min_size=2, max_size=30), st.integers(0, 2**31))
def test_rmse_bounds_mae_and_nrmse_scales(errors, seed):
    truth = np.random.default_rng(seed).uniform(0, 1, len(errors))[None, :]
    truth[0, 0], truth[0, 1] = 0.0, 1.0
    image = truth + np.array(errors)[None, :]
    # power-mean inequality: the quadratic mean is at least the arithmetic mean (squares of
    # errors below ~1e-154 underflow to 0, hence the absolute slack)
    assert rmse(image, truth) >= mae(image, truth) * (1 - 1e-12) - 1e-150
    # the truth's range here is 1, so NRMSE equals RMSE
    assert nrmse(image, truth) == pytest.approx(rmse(image, truth), rel=1e-12)
