"""Joseph's projector and its transpose: adjointness on every geometry kind, agreement with
the exact tracer and with scikit-image's ``radon``, closed-form chords, thread independence,
the LinearOperator with scipy's solvers, and bad input."""

from __future__ import annotations

import math

import numba
import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy.sparse.linalg import LinearOperator, cg, lsqr

from simbench.errors import InputError
from simbench.geometry import (
    ImageGrid, cone_poses, fan_poses, parallel_poses, poses_from_arrays,
)
from simbench.phantom import parse_phantom_text, rasterize
from simbench.phantom.rasterize import material_mu
from simbench.recon import projectors
from simbench.recon.projectors import projector
from simbench.trace import line_integrals, trace


def grid_3d(shape, spacing, centre=(0.0, 0.0, 0.0)) -> ImageGrid:
    return ImageGrid(tuple(shape), tuple(spacing), tuple(centre), 3)


def free_divergent_poses(rng, n_views=9, n_rows=7, n_cols=11):
    """A wobbling, tilted, off-centre divergent trajectory (e.g. a C-arm), one pose a view."""
    source, centre, u_axis, v_axis = [], [], [], []
    for i in range(n_views):
        phi = 0.7 * i + rng.uniform(-0.1, 0.1)
        tilt = rng.uniform(-0.3, 0.3)
        d = np.array([-math.sin(phi) * math.cos(tilt), math.cos(phi) * math.cos(tilt),
                      math.sin(tilt)])
        u = np.array([math.cos(phi), math.sin(phi), 0.0])
        v = np.cross(u, d)
        turn = rng.uniform(-0.2, 0.2)  # detector turned in its own plane
        u, v = math.cos(turn) * u + math.sin(turn) * v, -math.sin(turn) * u + math.cos(turn) * v
        s = -rng.uniform(60.0, 90.0) * d + rng.uniform(-3, 3, 3)
        source.append(s)
        centre.append(s + rng.uniform(120.0, 160.0) * d + rng.uniform(-4, 4, 3))
        u_axis.append(u)
        v_axis.append(v)
    return poses_from_arrays(source=np.array(source), detector_centre=np.array(centre),
                             u_axis=np.array(u_axis), v_axis=np.array(v_axis), n_cols=n_cols,
                             n_rows=n_rows, pitch_u_mm=2.1, pitch_v_mm=1.9, offset_u_mm=1.3)


def free_parallel_poses(rng, n_views=7):
    """Parallel rays in arbitrary directions with detector planes not normal to them."""
    direction, centre, u_axis, v_axis = [], [], [], []
    for _ in range(n_views):
        d = rng.normal(size=3)
        d /= np.linalg.norm(d)
        u = np.cross(d, rng.normal(size=3))
        u /= np.linalg.norm(u)
        v = np.cross(d, u)
        v = math.cos(0.3) * v + math.sin(0.3) * d  # tilted detector
        v -= (v @ u) * u
        v /= np.linalg.norm(v)
        direction.append(d)
        centre.append(40.0 * d + rng.uniform(-2, 2, 3))
        u_axis.append(u)
        v_axis.append(v)
    return poses_from_arrays(direction=np.array(direction), detector_centre=np.array(centre),
                             u_axis=np.array(u_axis), v_axis=np.array(v_axis), n_cols=13,
                             n_rows=9, pitch_u_mm=1.7, pitch_v_mm=1.5)


def geometry(kind: str):
    """(poses, grid) of each geometry kind, with offsets and off-centre anisotropic grids."""
    rng = np.random.default_rng(11)
    if kind == "parallel 2-D":
        return (parallel_poses(n_cols=37, pitch_u_mm=1.1, n_views=23, offset_u_mm=0.3),
                ImageGrid((1, 24, 30), (0.9, 1.2, 1.0), (1.5, -0.8, 0.0), 2))
    if kind == "parallel 3-D":
        return (parallel_poses(n_cols=21, n_rows=9, pitch_u_mm=1.3, pitch_v_mm=1.6, n_views=11,
                               arc_rad=2 * math.pi, offset_v_mm=0.7),
                grid_3d((10, 14, 16), (1.0, 1.1, 1.3), (0.4, 0.0, -0.6)))
    if kind == "fan curved":
        return (fan_poses(sid_mm=120.0, sdd_mm=240.0, n_cols=41, pitch_u_mm=1.7, n_views=29,
                          curved=True),
                ImageGrid.square_2d(28, 1.0, (0.7, -1.1)))
    if kind == "fan flat, offset, short scan":
        return (fan_poses(sid_mm=100.0, sdd_mm=180.0, n_cols=33, pitch_u_mm=1.5, n_views=25,
                          arc_rad="short", offset_u_mm=9.0, start_angle_rad=0.4),
                ImageGrid((1, 26, 22), (1.1, 0.8, 1.0), (0.0, 0.5, 0.0), 2))
    if kind == "cone flat":
        return (cone_poses(sid_mm=90.0, sdd_mm=170.0, n_cols=25, n_rows=19, pitch_u_mm=1.6,
                           pitch_v_mm=1.4, n_views=13, offset_u_mm=0.4),
                grid_3d((14, 16, 18), (1.0, 0.9, 1.2), (0.3, -0.2, 0.5)))
    if kind == "cone curved, helical":
        return (cone_poses(sid_mm=90.0, sdd_mm=170.0, n_cols=25, n_rows=11, pitch_u_mm=1.6,
                           pitch_v_mm=1.4, n_views=30, arc_rad=4 * math.pi, curved=True,
                           table_feed_per_turn_mm=8.0, start_z_mm=-8.0),
                grid_3d((18, 16, 16), (1.0, 1.0, 1.1)))
    if kind == "free divergent":
        return free_divergent_poses(rng), grid_3d((12, 15, 13), (1.2, 1.0, 1.1), (0.5, 0.5, 0.0))
    if kind == "free parallel":
        return free_parallel_poses(rng), grid_3d((9, 11, 10), (1.0, 1.2, 0.9))
    if kind == "3-D grid, 2-D scanner":
        return (fan_poses(sid_mm=100.0, sdd_mm=200.0, n_cols=31, pitch_u_mm=1.5, n_views=17),
                grid_3d((5, 20, 20), (1.0, 1.0, 0.7)))
    raise KeyError(kind)


KINDS = ["parallel 2-D", "parallel 3-D", "fan curved", "fan flat, offset, short scan",
         "cone flat", "cone curved, helical", "free divergent", "free parallel",
         "3-D grid, 2-D scanner"]


def adjoint_mismatch(A, rng) -> float:
    x = rng.normal(size=A.image_shape)
    y = rng.normal(size=A.projection_shape)
    ax = A.forward(x)
    assert np.abs(ax).max() > 1.0  # not vacuous: the rays cross the grid
    lhs = float(np.vdot(ax, y))
    rhs = float(np.vdot(x, A.back(y)))
    return abs(lhs - rhs) / abs(lhs)


@pytest.mark.parametrize("kind", KINDS)
def test_back_projector_is_the_adjoint(kind):
    poses, grid = geometry(kind)
    A = projector(poses, grid)
    # <A x, y> = <x, A^T y> by definition of the transpose (closed form); 1e-10 leaves
    # room for float64 rounding of sums of ~1e4 terms (common practice)
    assert adjoint_mismatch(A, np.random.default_rng(5)) < 1e-10


def test_back_projector_is_the_transpose_entry_by_entry():
    # the matrix read column by column through forward and row by row through back must be
    # the same matrix (definition of the transpose); tiny cone beam, every entry
    poses = cone_poses(sid_mm=30.0, sdd_mm=60.0, n_cols=6, n_rows=4, pitch_u_mm=2.0,
                       pitch_v_mm=2.0, n_views=3, curved=True)
    A = projector(poses, grid_3d((3, 4, 5), (1.0, 1.2, 0.9), (0.2, 0.0, 0.3)))
    n_img, n_proj = int(np.prod(A.image_shape)), int(np.prod(A.projection_shape))
    by_columns = np.stack([A.forward(np.eye(n_img)[j].reshape(A.image_shape)).ravel()
                           for j in range(n_img)], axis=1)
    by_rows = np.stack([A.back(np.eye(n_proj)[i].reshape(A.projection_shape)).ravel()
                        for i in range(n_proj)], axis=0)
    assert np.count_nonzero(by_columns) > 500  # not vacuous (678 of 72 x 60 entries)
    # float64 rounding of one product (common practice)
    np.testing.assert_allclose(by_rows, by_columns, rtol=0, atol=1e-14 * by_columns.max())


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), nx=st.integers(1, 9), ny=st.integers(1, 9),
       nz=st.integers(1, 9), inside=st.booleans())
def test_adjoint_on_random_free_poses(seed, nx, ny, nz, inside):
    # rays that start inside the grid (a source among the voxels) and ones that miss it
    rng = np.random.default_rng(seed)
    spacing = tuple(rng.uniform(0.5, 2.0, 3))
    centre = tuple(rng.uniform(-2.0, 2.0, 3))
    n_views = 5
    d = rng.normal(size=(n_views, 3))
    d /= np.linalg.norm(d, axis=1, keepdims=True)
    u = np.cross(d, rng.normal(size=(n_views, 3)))
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    v = np.cross(d, u)
    reach = 0.5 * np.linalg.norm(np.array([nx, ny, nz]) * spacing)
    source = np.array(centre) + (rng.uniform(-0.5, 0.5, (n_views, 3)) * reach if inside
                                 else -3.0 * reach * d)
    poses = poses_from_arrays(source=source, detector_centre=source + 4.0 * reach * d,
                              u_axis=u, v_axis=v, n_cols=6, n_rows=5,
                              pitch_u_mm=reach, pitch_v_mm=reach)
    A = projector(poses, grid_3d((nz, ny, nx), spacing, centre))
    x = rng.normal(size=A.image_shape)
    y = rng.normal(size=A.projection_shape)
    lhs = float(np.vdot(A.forward(x), y))
    rhs = float(np.vdot(x, A.back(y)))
    # as above; the absolute floor keeps near-empty problems (few rays hit) meaningful
    assert abs(lhs - rhs) <= 1e-10 * max(abs(lhs), 1e-3 * reach)


def test_axis_rays_through_a_uniform_image_have_closed_form_chords():
    # a ray along y through a uniform 1 /mm image crosses ny pixels of dy mm: ny * dy;
    # a ray along x crosses nx * dx (closed form)
    grid = ImageGrid((1, 12, 20), (0.5, 0.75, 1.0), (0.0, 0.0, 0.0), 2)
    poses = parallel_poses(n_cols=8, pitch_u_mm=0.5, angles_rad=[0.0, math.pi / 2])
    p = projector(poses, grid).forward(np.ones(grid.image_shape))
    np.testing.assert_allclose(p[0, 2:6], 12 * 0.75, rtol=1e-14)
    np.testing.assert_allclose(p[1, 2:6], 20 * 0.5, rtol=1e-14)
    # fan beam, phi = 0: the central ray (odd column count) runs along +y
    fan = fan_poses(sid_mm=50.0, sdd_mm=100.0, n_cols=9, pitch_u_mm=1.0, n_views=1)
    q = projector(fan, grid).forward(np.ones(grid.image_shape))
    assert q[0, 4] == pytest.approx(12 * 0.75, rel=1e-14)


def test_oblique_ray_through_a_square_has_its_chord():
    # Joseph's interpolation of a uniform square image is exact for lines at 45 degrees
    # that cross only whole-pixel diagonals: the chord of the square, 2 * (h * sqrt 2 - s)
    # at distance s from the centre of a square of half side h (closed form)
    n, h = 6, 3.0
    grid = ImageGrid.square_2d(n, 1.0)
    poses = parallel_poses(n_cols=8, pitch_u_mm=1.0, angles_rad=[math.pi / 4])
    p = projector(poses, grid).forward(np.ones((n, n)))[0]
    s = np.abs(poses.col_u_mm)
    np.testing.assert_allclose(p, 2.0 * np.clip(h * math.sqrt(2.0) - s, 0, None), atol=1e-12)


def _nested(profile, count, line):
    """Shells s = 1/count .. 1 whose stacked ``add`` values follow ``profile(s)``."""
    mids = (np.arange(count) + 0.5) / count
    value = np.append(profile(mids), 0.0)
    return [line((i + 1) / count, value[i] - value[i + 1]) for i in range(count)]


def smooth_phantom(dimension: int):
    """A smooth elliptical body, mu = 0.02 (1 - s^2)^2 /mm in its elliptical radius s, with
    a Gaussian-like bump and dip, each made of nested add-mode shells (invented test data)."""
    def body(s):
        return 0.02 * (1.0 - s * s) ** 2

    def blob(s):
        return np.exp(-0.5 * (3.0 * s) ** 2)

    if dimension == 2:
        lines = _nested(body, 32, lambda s, m: "{shape: ellipse, semi_axes: "
                        f"[{55 * s}, {40 * s}], mode: add, mu: {m:.12g} /mm}}")
        lines += _nested(lambda s: 0.01 * blob(s), 16, lambda s, m: "{shape: circle, centre: "
                         f"[20, 8], radius: {15 * s}, mode: add, mu: {m:.12g} /mm}}")
        lines += _nested(lambda s: -0.006 * blob(s), 16, lambda s, m: "{shape: circle, "
                         f"centre: [-22, -10], radius: {12 * s}, mode: add, mu: {m:.12g} /mm}}")
    else:
        lines = _nested(body, 32, lambda s, m: "{shape: ellipsoid, semi_axes: "
                        f"[{40 * s}, {30 * s}, {24 * s}], mode: add, mu: {m:.12g} /mm}}")
        lines += _nested(lambda s: 0.01 * blob(s), 16, lambda s, m: "{shape: sphere, centre: "
                         f"[14, 6, 7], radius: {11 * s}, mode: add, mu: {m:.12g} /mm}}")
        lines += _nested(lambda s: -0.006 * blob(s), 16, lambda s, m: "{shape: sphere, "
                         f"centre: [-15, -7, -6], radius: {9 * s}, mode: add, mu: {m:.12g} /mm}}")
    text = (f"name: smooth\ndimension: {dimension}\nunits: mm\nobjects:\n"
            + "".join(f"  - {line}\n" for line in lines))
    return parse_phantom_text(text, "smooth.yaml")


@pytest.mark.parametrize("dimension", [2, 3])
def test_forward_matches_exact_line_integrals_of_a_smooth_phantom(dimension):
    phantom = smooth_phantom(dimension)
    mu = material_mu(phantom.materials, 60.0)
    if dimension == 2:
        poses = fan_poses(sid_mm=300.0, sdd_mm=600.0, n_cols=480, pitch_u_mm=0.5, n_views=60,
                          curved=True)
        grid = ImageGrid.square_2d(240, 0.5)
        image = rasterize(phantom, grid, 60.0, supersample=8)
    else:
        poses = cone_poses(sid_mm=250.0, sdd_mm=500.0, n_cols=110, n_rows=80, pitch_u_mm=1.5,
                           pitch_v_mm=1.5, n_views=20)
        grid = grid_3d((54, 66, 86), (1.0, 1.0, 1.0))
        image = rasterize(phantom, grid, 60.0, supersample=2)
    exact = line_integrals(trace(phantom, poses), mu)
    ours = projector(poses, grid).forward(image)
    peak = exact.max()
    assert peak > 0.8  # not vacuous
    # requirement: within 1 % of the peak of the exact line integrals (analytic tracer).
    # Measured at worst over all rays: 2-D fan, 0.5 mm pixels, 0.31 % (mean 0.026 %);
    # 3-D cone, 1 mm voxels, 0.53 % (mean 0.052 %). Siddon's exact chords through the
    # same images give 0.58 % and 1.07 %: the rest is the voxel grid's own discretization
    assert np.abs(ours - exact).max() < 1e-2 * peak


def test_agrees_with_skimage_radon():
    skimage_transform = pytest.importorskip("skimage.transform")
    # as in test_trace_siddon.py: odd size (scikit-image rotates about pixel n // 2, our
    # grid centre only for odd n), and scikit-image's angle theta is our view phi = -theta
    n = 97
    c = (n - 1) / 2
    y, x = np.mgrid[0:n, 0:n] - c
    image = (np.exp(-((x - 15) ** 2 + (y + 10) ** 2) / (2 * 12.0 ** 2))
             + 0.5 * np.exp(-((x + 10) ** 2 + (y - 14) ** 2) / (2 * 8.0 ** 2)))
    image *= (x * x + y * y) < (0.45 * n) ** 2
    theta_deg = np.linspace(0.0, 180.0, 45, endpoint=False)
    sk = skimage_transform.radon(image, theta=theta_deg, circle=True)  # (n, views)
    poses = parallel_poses(n_cols=n, pitch_u_mm=1.0, angles_rad=np.radians(-theta_deg))
    ours = projector(poses, ImageGrid.square_2d(n, 1.0)).forward(image)
    # both interpolate the pixels bilinearly (scikit-image rotates the image, we sample
    # along the rays): measured 0.28 % of the peak at worst and 0.005 % on average
    err = np.abs(ours - sk.T)
    assert err.max() < 5e-3 * sk.max()
    assert err.mean() < 1e-4 * sk.max()


@pytest.mark.parametrize("kind", ["fan flat, offset, short scan", "cone curved, helical"])
def test_same_bits_whatever_the_thread_count(kind, monkeypatch):
    # ARCHITECTURE.md: same seed, same bits with 1 or N workers
    poses, grid = geometry(kind)
    A = projector(poses, grid)
    rng = np.random.default_rng(2)
    x = rng.normal(size=A.image_shape)
    y = rng.normal(size=A.projection_shape)
    saved = numba.get_num_threads()
    results = []
    try:
        for threads, slabs_per_thread in ((1, 1), (min(2, numba.config.NUMBA_NUM_THREADS), 4),
                                          (1, 7)):
            numba.set_num_threads(threads)
            monkeypatch.setattr(projectors, "SLABS_PER_THREAD", slabs_per_thread)
            results.append((A.forward(x), A.back(y)))
    finally:
        numba.set_num_threads(saved)
    for forward, back in results[1:]:
        assert np.array_equal(forward, results[0][0])
        assert np.array_equal(back, results[0][1])


def test_float32_input_is_accepted_and_accumulated_in_float64():
    poses, grid = geometry("cone flat")
    A = projector(poses, grid)
    x = np.random.default_rng(3).random(A.image_shape).astype(np.float32)
    y = np.random.default_rng(4).random(A.projection_shape).astype(np.float32)
    assert A.forward(x).dtype == np.float64 and A.back(y).dtype == np.float64
    # float32 values are exact in float64: same result as the float64 copy
    assert np.array_equal(A.forward(x), A.forward(x.astype(np.float64)))
    assert np.array_equal(A.back(y), A.back(y.astype(np.float64)))


def test_linear_operator_runs_scipy_solvers():
    # a consistent, overdetermined system (864 rays, 256 pixels): least squares recovers
    # the image that made the data (closed form: the unique solution of A x = A x_true)
    grid = ImageGrid.square_2d(16, 1.0)
    poses = parallel_poses(n_cols=24, pitch_u_mm=1.0, n_views=36)
    A = projector(poses, grid)
    op = A.as_linear_operator()
    assert isinstance(op, LinearOperator)
    assert op.shape == (36 * 24, 256) and op.dtype == np.float64
    yy, xx = np.mgrid[0:16, 0:16]
    truth = np.exp(-((xx - 7.0) ** 2 + (yy - 9.0) ** 2) / 12.0) + 0.3 * (xx > 10)
    data = A.forward(truth).ravel()
    np.testing.assert_allclose(op.matvec(truth.ravel()), data, rtol=0, atol=0)
    x = lsqr(op, data, atol=1e-14, btol=1e-14, iter_lim=3000)[0]
    # convergence tolerance of the solver (common practice)
    np.testing.assert_allclose(x.reshape(16, 16), truth, atol=1e-6)
    normal = op.T @ op
    x_cg, info = cg(normal, op.T @ data, rtol=1e-13, maxiter=3000)
    assert info == 0
    np.testing.assert_allclose(x_cg.reshape(16, 16), truth, atol=1e-5)


def test_bad_input_is_one_line_input_error():
    poses, grid = geometry("parallel 2-D")
    A = projector(poses, grid)
    cases = [
        (lambda: A.forward(np.ones((3, 3))), "shape"),
        (lambda: A.forward(np.full(A.image_shape, np.nan)), "NaN"),
        (lambda: A.forward(np.ones(A.image_shape, complex)), "complex"),
        (lambda: A.forward("image"), "real"),
        (lambda: A.back(np.ones(A.image_shape)), "shape"),
        (lambda: A.back(np.full(A.projection_shape, np.inf)), "infinite"),
        (lambda: projector("poses", grid), "Poses"),
        (lambda: projector(poses, "grid"), "ImageGrid"),
        (lambda: projector(poses, ImageGrid((1, 4, 4), (1.0, 0.0, 1.0), dimension=2)),
         "spacing"),
        (lambda: projector(geometry("cone flat")[0], ImageGrid.square_2d(8, 1.0)), "2-D grid"),
        (lambda: projector(poses, ImageGrid((3, 4, 4), (1.0, 1.0, 1.0), dimension=2)), "nz"),
    ]
    for call, words in cases:
        with pytest.raises(InputError, match=words) as caught:
            call()
        assert "\n" not in str(caught.value)
