"""ROI statistics, HU, CNR, uniformity and cupping against closed forms on synthetic images."""

from __future__ import annotations

import math

import numpy as np
import pytest

from simbench.geometry.grid import ImageGrid
from simbench.phantom import label_map, load_phantom, rasterize, shipped_phantom_path
from simbench.score import (annulus_mask, cnr, cupping, disc_mask, hounsfield, roi_statistics,
                            uniformity)

MU_WATER = 0.0206  # 1/mm, water near 60 keV (recalled from memory; any positive value works)
MU_AIR = 0.00002


def checkerboard(shape):
    """+1 / -1 in a checkerboard: mean 0 and population variance 1 on an even count."""
    iy, ix = np.indices(shape)
    return np.where((iy + ix) % 2 == 0, 1.0, -1.0)


def test_hounsfield_fixed_points():
    # HU = 1000 (mu - mu_w) / (mu_w - mu_a): water 0, air -1000 (definition, ICRU 87)
    assert hounsfield(MU_WATER, MU_WATER, MU_AIR) == 0.0
    assert hounsfield(MU_AIR, MU_WATER, MU_AIR) == pytest.approx(-1000.0, rel=1e-12)
    assert hounsfield(2 * MU_WATER - MU_AIR, MU_WATER, MU_AIR) == pytest.approx(1000.0)
    values = hounsfield(np.array([MU_AIR, MU_WATER]), MU_WATER, MU_AIR)
    np.testing.assert_allclose(values, [-1000.0, 0.0], atol=1e-12)


def test_roi_statistics_closed_forms():
    labels = np.zeros((20, 20), np.int32)
    labels[2:8, 2:8] = 1     # 36 pixels
    labels[10:18, 10:14] = 3  # 32 pixels
    truth = np.full(labels.shape, MU_WATER)
    image = truth + 0.001 * checkerboard(labels.shape)
    image[labels == 3] += 0.0005  # a bias in ROI 3
    stats = roi_statistics(image, labels, truth, MU_WATER, MU_AIR)
    assert sorted(stats) == [1, 3]
    scale = 1000.0 / (MU_WATER - MU_AIR)
    for label, n, bias in ((1, 36, 0.0), (3, 32, 0.0005)):
        s = stats[label]
        # a +-b checkerboard on an even count: mean 0, sample std b sqrt(N / (N - 1))
        assert s.pixels == n
        assert s.mean == pytest.approx(MU_WATER + bias, abs=1e-15)
        assert s.std == pytest.approx(0.001 * math.sqrt(n / (n - 1)), rel=1e-12)
        assert s.bias == pytest.approx(bias, abs=1e-15)
        # HU is linear: bias and std scale by 1000 / (mu_w - mu_a) (definition)
        assert s.bias_hu == pytest.approx(bias * scale, abs=1e-9)
        assert s.std_hu == pytest.approx(s.std * scale, rel=1e-12)
        assert s.mean_hu == pytest.approx(bias * scale, abs=1e-9)
    assert stats[1].as_dict()["pixels"] == 36
    # without water and air there are no HU; without a truth no bias
    plain = roi_statistics(image, labels)[1]
    assert plain.mean_hu is None and plain.bias is None


def test_cnr_closed_form():
    labels = np.zeros((40, 40), np.int32)
    labels[5:15, 5:15] = 1   # ROI: 100 pixels
    labels[20:36, 20:36] = 2  # background: 256 pixels
    image = np.zeros(labels.shape)
    image[labels == 1] = 0.03
    image[labels == 2] = 0.02 + 0.002 * checkerboard((16, 16)).ravel()
    # CNR = |mean_roi - mean_bg| / std_bg with std_bg = b sqrt(N / (N - 1)) (definition)
    expected = 0.01 / (0.002 * math.sqrt(256 / 255))
    assert cnr(image, 1, 2, labels) == pytest.approx(expected, rel=1e-12)
    # a ROI darker than its background has the same CNR; masks work like labels
    assert cnr(-image, labels == 1, labels == 2) == pytest.approx(expected, rel=1e-12)
    # no spread in the background: contrast over nothing is unbounded
    flat = np.where(labels == 1, 1.0, 0.0)
    assert cnr(flat, 1, 2, labels) == math.inf


@pytest.fixture(scope="module")
def water_cylinder():
    """The shipped water cylinder on a 0.5 mm grid: truth (60 keV) and its ROI labels."""
    phantom = load_phantom(shipped_phantom_path("water-cylinder"))
    grid = ImageGrid.square_2d(420, 0.5)
    truth = rasterize(phantom, grid, 60.0)
    labels = label_map(phantom, grid, supersample=2)
    return grid, truth, labels, phantom.roi_names


def test_uniform_cylinder_has_no_cupping_or_nonuniformity(water_cylinder):
    grid, truth, labels, names = water_cylinder
    centre = names.index("centre ROI") + 1
    edges = [k + 1 for k, name in enumerate(names) if name.startswith("edge ROI")]
    assert len(edges) == 4
    mu = float(truth[labels == centre].mean())
    assert uniformity(truth, centre, edges, mu, 0.0, labels) == pytest.approx(0.0, abs=1e-9)
    assert cupping(truth, centre, edges, labels) == pytest.approx(0.0, abs=1e-9)


def test_parabolic_cup_matches_its_closed_form(water_cylinder):
    grid, truth, labels, names = water_cylinder
    centre = names.index("centre ROI") + 1
    edges = [k + 1 for k, name in enumerate(names) if name.startswith("edge ROI")]
    x, y = grid.axis_mm("x"), grid.axis_mm("y")
    r2 = x[None, :] ** 2 + y[:, None] ** 2
    mu0, depth, big_r = 0.02, 0.05, 100.0
    image = mu0 * (1 - depth * (1 - r2 / big_r ** 2))  # a cup: centre 5 % low
    # mean of r^2 over a disc of radius a centred at distance D is D^2 + a^2 / 2 (closed form),
    # so the ROI means are mu0 (1 - depth (1 - (D^2 + a^2/2) / R^2)); the shipped phantom's
    # centre ROI has a = 15 mm at D = 0, its edge ROIs a = 12 mm at D = 70 mm
    centre_mean = mu0 * (1 - depth * (1 - (15 ** 2 / 2) / big_r ** 2))
    edge_mean = mu0 * (1 - depth * (1 - (70 ** 2 + 12 ** 2 / 2) / big_r ** 2))
    expected_cup = 100 * (edge_mean - centre_mean) / edge_mean
    # pixel-centre sampling of the ROIs (0.5 mm pixels) moves the means by ~1e-4 relative
    assert cupping(image, centre, edges, labels) == pytest.approx(expected_cup, rel=1e-3)
    expected_hu = 1000 * (edge_mean - centre_mean) / (mu0 - MU_AIR)
    assert uniformity(image, centre, edges, mu0, MU_AIR, labels) == pytest.approx(
        expected_hu, rel=1e-3)


def test_uniformity_takes_the_largest_peripheral_difference():
    image = np.zeros((30, 30))
    regions = []
    for k, value in enumerate([0.0200, 0.0203, 0.0195, 0.0201]):  # periphery means
        region = np.zeros(image.shape, bool)
        region[k * 7:k * 7 + 5, 0:5] = True
        image[region] = value
        regions.append(region)
    middle = np.zeros(image.shape, bool)
    middle[12:18, 12:18] = True
    image[middle] = 0.0200
    # max |mean_p - mean_c| = 0.0005 -> 1000 * 0.0005 / 0.02 = 25 HU (definition)
    assert uniformity(image, middle, regions, 0.02, 0.0) == pytest.approx(25.0, rel=1e-9)
    # cupping: periphery mean 0.019975, centre 0.02 -> 100 (0.019975 - 0.02) / 0.019975 (a cap)
    assert cupping(image, middle, regions) == pytest.approx(
        100 * (0.019975 - 0.02) / 0.019975, rel=1e-9)


def test_disc_and_annulus_masks():
    grid = ImageGrid.square_2d(200, 0.1)
    disc = disc_mask(grid, (1.0, -2.0), 4.0)
    # area of a disc: pi r^2 (closed form), to the pixel-counting error ~ perimeter x pixel
    assert abs(disc.sum() * 0.01 - math.pi * 16) < 2 * math.pi * 4 * 0.1
    ring = annulus_mask(grid, (1.0, -2.0), 2.0, 4.0)
    assert abs(ring.sum() * 0.01 - math.pi * (16 - 4)) < 2 * math.pi * 6 * 0.1
    assert not (ring & disc_mask(grid, (1.0, -2.0), 1.9)).any()
    # the centre pixel nearest (1, -2) mm: x index 1 / 0.1 + 99.5, y index -2 / 0.1 + 99.5
    assert disc[80, 110] and disc[79, 109]
    cube = ImageGrid((3, 20, 20), (1.0, 1.0, 1.0))
    assert disc_mask(cube, (0, 0), 5.0).shape == (3, 20, 20)
