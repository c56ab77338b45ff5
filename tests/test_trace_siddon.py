"""Siddon's method for voxel phantoms against the analytic tracer, a brute-force per-voxel
clipping sum, and scikit-image's ``radon``."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from trace_builders import (
    divergent_poses, line_poses, obj, parallel_poses, phantom_of, random_lines,
    voxel_phantom,
)
from simbench.errors import InputError
from simbench.trace import line_integrals, trace


def voxel_edges(n, spacing, centre):
    """Voxel boundaries on the ARCHITECTURE.md grid convention."""
    return (np.arange(n + 1) - n / 2.0) * spacing + centre


def brute_force(o, d, values, spacing, centre, seg=None, use_z=True):
    """Sum over every voxel of (chord of the ray in that voxel's box) * value, each chord by
    numpy slab clipping of the ray against the voxel's own box."""
    nz, ny, nx = values.shape
    ex = voxel_edges(nx, spacing[0], centre[0])
    ey = voxel_edges(ny, spacing[1], centre[1])
    ez = voxel_edges(nz, spacing[2], centre[2])
    iz, iy, ix = np.nonzero(values)
    lo = np.stack([ex[ix], ey[iy], ez[iz]], axis=1)
    hi = np.stack([ex[ix + 1], ey[iy + 1], ez[iz + 1]], axis=1)
    axes = 3 if use_z else 2
    out = np.zeros(o.shape[0])
    for r in range(o.shape[0]):
        t0 = np.full(lo.shape[0], -np.inf if seg is None else 0.0)
        t1 = np.full(lo.shape[0], np.inf if seg is None else seg[r])
        for a in range(axes):
            if d[r, a] == 0.0:
                # half-open voxels [lo, hi): a ray in a face plane belongs to the + side
                inside = (o[r, a] >= lo[:, a]) & (o[r, a] < hi[:, a])
                t1 = np.where(inside, t1, -np.inf)
                continue
            ta = (lo[:, a] - o[r, a]) / d[r, a]
            tb = (hi[:, a] - o[r, a]) / d[r, a]
            t0 = np.maximum(t0, np.minimum(ta, tb))
            t1 = np.minimum(t1, np.maximum(ta, tb))
        out[r] = np.sum(np.clip(t1 - t0, 0.0, None) * values[iz, iy, ix])
    return out


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), nx=st.integers(1, 9), ny=st.integers(1, 9),
       nz=st.integers(1, 9), dx=st.floats(0.3, 3.0), dz=st.floats(0.3, 3.0))
def test_siddon_random_rays_equal_per_voxel_clipping(seed, nx, ny, nz, dx, dz):
    rng = np.random.default_rng(seed)
    values = rng.uniform(0.0, 0.05, (nz, ny, nx)) * (rng.random((nz, ny, nx)) < 0.8)
    spacing = (dx, 1.1 * dx, dz)
    centre = tuple(rng.uniform(-3, 3, 3))
    phantom = voxel_phantom(values, spacing, centre, kind="mu", dimension=3)
    reach = 0.5 * np.linalg.norm([nx * spacing[0], ny * spacing[1], nz * spacing[2]])
    o, d = random_lines(rng, centre, reach, n=32, far=60.0)
    # also rays along the grid axes (a quarter voxel off the centre, so never in a face
    # plane, whose side would be a rounding coin toss)
    quarter = 0.25 * np.array(spacing)
    o[:3] = np.array(centre) + quarter - 60.0 * np.eye(3)
    d[:3] = np.eye(3)
    got = trace(phantom, line_poses(o, d))[0, :, 0, 0]
    want = brute_force(o, d, values, spacing, centre)
    # same float operations order of magnitude: agreement to 1e-10 of the largest value
    # (float64 rounding with margin, common practice)
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-10 * max(want.max(), 1e-3))
    seg = rng.uniform(55.0, 65.0, o.shape[0])
    got = trace(phantom, line_poses(o, d, seg))[0, :, 0, 0]
    np.testing.assert_allclose(got, brute_force(o, d, values, spacing, centre, seg),
                               rtol=0, atol=1e-10 * max(want.max(), 1e-3))


def test_rays_in_face_planes_belong_to_the_plus_side():
    # exactly representable faces (spacing 1 mm, centre 0): the convention of siddon.py,
    # half-open voxels [lo, hi); a ray in the grid's upper face plane misses
    values = np.zeros((2, 2, 2))
    values[1, 1, 1] = 1.0
    values[0, 0, 1] = 3.0
    phantom = voxel_phantom(values, (1.0, 1.0, 1.0), kind="mu", dimension=3)
    o = np.array([[-10.0, 0.0, 0.0], [-10.0, 1.0, 1.0], [-10.0, -1.0, -1.0], [-10.0, 0.5, 0.5]])
    d = np.tile([1.0, 0.0, 0.0], (4, 1))
    got = trace(phantom, line_poses(o, d))[0, :, 0, 0]
    # closed form: 1 mm through voxel (1, 1, 1), miss, 1 mm through voxel (0, 0, 1) of 3 /mm,
    # 1 mm through voxel (1, 1, 1)
    np.testing.assert_allclose(got, [1.0, 0.0, 3.0, 1.0], atol=1e-12)


def test_siddon_2d_volume_is_a_prism():
    # a 2-D label image is unbounded along z: oblique rays see the 2-D chord / cos(tilt)
    rng = np.random.default_rng(7)
    labels = (rng.random((1, 11, 13)) < 0.6).astype(np.int32)
    phantom = voxel_phantom(labels, (0.7, 0.9, 1.0), (0.3, -0.2, 0.0), dimension=2)
    o, d = random_lines(rng, (0.3, -0.2, 0.0), 6.0, n=40, far=50.0)
    got = trace(phantom, line_poses(o, d))[0, :, 0, 0]
    want = brute_force(o, d, labels.astype(float), (0.7, 0.9, 1.0), (0.3, -0.2, 0.0),
                       use_z=False)
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-10 * want.max())  # as above


@pytest.mark.parametrize("geometry", ["parallel", "cone"])
def test_voxelised_box_equals_analytic_box(geometry):
    # a box whose faces lie on voxel boundaries: Siddon must give its exact chords
    spacing = (1.5, 1.25, 2.0)
    shape = (12, 16, 20)  # nz, ny, nx
    centre = (1.0, -2.0, 0.5)
    ex = voxel_edges(shape[2], spacing[0], centre[0])
    ey = voxel_edges(shape[1], spacing[1], centre[1])
    ez = voxel_edges(shape[0], spacing[2], centre[2])
    labels = np.zeros(shape, np.int32)
    labels[2:9, 3:11, 4:14] = 1
    lo = np.array([ex[4], ey[3], ez[2]])
    hi = np.array([ex[14], ey[11], ez[9]])
    box = obj("box", centre=tuple((lo + hi) / 2), half_sizes=tuple((hi - lo) / 2))
    angles = np.linspace(0, 2 * np.pi, 13, endpoint=False) + 0.1
    if geometry == "parallel":
        poses = parallel_poses(angles, 40, 0.77, n_rows=30, pitch_v=0.83)
    else:
        poses = divergent_poses(angles, 200.0, 400.0, 40, 1.6, n_rows=30, pitch_v=1.7)
    got = trace(voxel_phantom(labels, spacing, centre), poses)
    want = trace(phantom_of([box]), poses)
    assert want.max() > 10.0  # not vacuous: the box is 15 x 10 x 14 mm
    # float64 rounding with margin (common practice)
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-10 * want.max())


def test_labels_map_to_materials_and_match_mu_volume():
    rng = np.random.default_rng(3)
    labels = rng.integers(0, 4, (5, 6, 7)).astype(np.int32)
    table = np.array([-1, 1, 0, 1])  # label 1 and 3 -> material 1, label 2 -> material 0
    mu = np.array([0.02, 0.05])
    phantom = voxel_phantom(labels, (1.0, 1.0, 1.0), kind="labels", label_material=table,
                            n_materials=2)
    mu_volume = np.where(labels == 0, 0.0, mu[np.clip(table[labels], 0, None)])
    poses = divergent_poses(np.linspace(0, np.pi, 5), 100.0, 200.0, 24, 1.0, n_rows=20)
    lengths = trace(phantom, poses)
    assert lengths.shape == (2, 5, 20, 24)
    p = line_integrals(lengths, mu)
    q = trace(voxel_phantom(mu_volume, (1.0, 1.0, 1.0), kind="mu"), poses)[0]
    # the same chords weighted in another order: float64 rounding (common practice)
    np.testing.assert_allclose(p, q, rtol=0, atol=1e-12 * q.max())


def test_agrees_with_skimage_radon():
    skimage_transform = pytest.importorskip("skimage.transform")
    # odd size: scikit-image rotates about pixel n // 2, which is our grid centre only
    # for odd n (for even n the two conventions differ by half a pixel)
    n = 97
    c = (n - 1) / 2
    y, x = np.mgrid[0:n, 0:n] - c
    image = (np.exp(-((x - 15) ** 2 + (y + 10) ** 2) / (2 * 12.0 ** 2))
             + 0.5 * np.exp(-((x + 10) ** 2 + (y - 14) ** 2) / (2 * 8.0 ** 2)))
    image *= (x * x + y * y) < (0.45 * n) ** 2
    theta_deg = np.linspace(0.0, 180.0, 45, endpoint=False)
    sk = skimage_transform.radon(image, theta=theta_deg, circle=True)  # (n, views)
    # scikit-image's column for angle theta is our view phi = -theta (array row index
    # growing with +y, as in our image convention); measured, see module docstring
    phantom = voxel_phantom(image, (1.0, 1.0, 1.0), kind="mu", dimension=2)
    ours = trace(phantom, parallel_poses(np.radians(-theta_deg), n, 1.0))[0]
    # scikit-image interpolates the rotated image bilinearly: observed agreement 0.4 % of
    # the peak at worst and 0.04 % on average for smooth images (measured for this test)
    err = np.abs(ours - sk.T)
    assert err.max() < 1e-2 * sk.max()
    assert err.mean() < 1e-3 * sk.max()


def test_voxel_input_errors():
    good = voxel_phantom(np.ones((2, 2, 2), np.int32), (1.0, 1.0, 1.0))
    poses = parallel_poses([0.0], 4, 1.0)
    bad_mu = voxel_phantom(np.full((1, 2, 2), np.nan), (1.0, 1.0, 1.0), kind="mu")
    with pytest.raises(InputError, match="NaN"):
        trace(bad_mu, poses)
    bad_spacing = voxel_phantom(np.ones((2, 2, 2), np.int32), (1.0, 0.0, 1.0))
    with pytest.raises(InputError, match="spacing"):
        trace(bad_spacing, poses)
    assert trace(good, poses).shape == (1, 1, 4)
