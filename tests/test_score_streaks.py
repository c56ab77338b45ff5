"""Streak index and projection-domain error against closed forms."""

from __future__ import annotations

import math

import numpy as np
import pytest

from simbench.geometry.grid import ImageGrid
from simbench.score import annulus_mask, projection_rmse, streak_index


@pytest.fixture(scope="module")
def ring():
    grid = ImageGrid.square_2d(256, 0.25)
    x, y = grid.axis_mm("x"), grid.axis_mm("y")
    theta = np.arctan2(y[:, None], x[None, :])
    return grid, theta, annulus_mask(grid, (0.0, 0.0), 8.0, 24.0)


def test_angular_streaks_give_their_rms(ring):
    grid, theta, region = ring
    truth = np.full(grid.image_shape, 0.02)
    amplitude = 0.004
    image = truth + amplitude * np.cos(8 * theta)  # eight bright and eight dark streaks
    # std of A cos(8 theta) over a full ring: A / sqrt(2) (mean of cos^2 over a period);
    # pixel-centre sampling of the ring moves it by well under 1 %
    assert streak_index(image, truth, region) == pytest.approx(amplitude / math.sqrt(2),
                                                               rel=0.01)


def test_reference_region_takes_out_the_noise(ring):
    grid, theta, region = ring
    rng = np.random.default_rng(21)
    truth = np.full(grid.image_shape, 0.02)
    noise = rng.normal(0.0, 0.003, grid.image_shape)
    image = truth + 0.004 * np.cos(8 * theta) * region + noise
    reference = annulus_mask(grid, (0.0, 0.0), 26.0, 31.0)
    # the noise adds s^2 to both variances and cancels: index^2 = A^2 / 2 (closed form);
    # within 5 % (sampling error of the two variances ~2 %)
    assert streak_index(image, truth, region, reference) == pytest.approx(
        0.004 / math.sqrt(2), rel=0.05)
    # without the reference the index holds both: sqrt(A^2 / 2 + s^2)
    assert streak_index(image, truth, region) == pytest.approx(
        math.sqrt(0.004 ** 2 / 2 + 0.003 ** 2), rel=0.03)


def test_a_uniform_offset_is_not_a_streak(ring):
    grid, _, region = ring
    truth = np.random.default_rng(22).uniform(0, 0.05, grid.image_shape)
    assert streak_index(truth + 0.01, truth, region) == pytest.approx(0.0, abs=1e-12)
    labels = region.astype(np.int32) * 4
    assert streak_index(truth + 0.01, truth, 4, labels=labels) == pytest.approx(0.0, abs=1e-12)


def test_projection_rmse_closed_forms():
    exact = np.random.default_rng(23).uniform(0, 5, (6, 3, 10))
    offsets = np.array([0.0, 0.1, -0.2, 0.3, 0.0, 0.05])
    measured = exact + offsets[:, None, None]
    # a constant error c over a view has RMSE |c| (definition)
    np.testing.assert_allclose(projection_rmse(measured, exact, per_view=True), np.abs(offsets),
                               atol=1e-12)
    assert projection_rmse(measured, exact) == pytest.approx(
        math.sqrt(np.mean(offsets ** 2)), rel=1e-12)
    assert projection_rmse(exact[:, 0], exact[:, 0]) == 0.0
