"""Iterative reference methods: convergence, agreement with scipy, accuracy against FBP.

Sources of the check values: the convergence properties of each method as published (SIRT
decreases the R-weighted residual, van der Sluis & van der Vorst 1990; CGLS decreases the
2-norm residual, Hestenes & Stiefel 1952; LSQR and CGLS produce the same iterates in exact
arithmetic, Paige & Saunders 1982), and the exact line integrals of the tracer as data (not
the projector's own, so the comparison with truth is not an inverse crime).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.sparse.linalg import lsqr

from simbench.geometry import parallel_poses
from simbench.geometry.grid import ImageGrid
from simbench.materials import mu_table
from simbench.phantom import load_phantom, rasterize
from simbench.data import shipped_files
from simbench.recon.analytic import fbp
from simbench.recon.iterative import _divergence, _gradient, cgls, os_sart, sirt, tv
from simbench.recon.projectors import projector
from simbench.trace import line_integrals, trace


@pytest.fixture(scope="module")
def problem():
    """Exact 60 keV line integrals of the shipped water-and-inserts phantom, 2-D parallel."""
    phantom = load_phantom(shipped_files("phantoms")["water-ellipse-inserts"])
    poses = parallel_poses(n_cols=128, pitch_u_mm=3.0, n_views=120, dimension=2)
    grid = ImageGrid.square_2d(64, 6.0)
    mu = mu_table(phantom.materials, [60.0])[:, 0]
    data = line_integrals(trace(phantom, poses), mu)
    truth = rasterize(phantom, grid, 60.0)
    return poses, grid, data, truth


def _rmse(image, truth) -> float:
    return float(np.sqrt(np.mean((np.asarray(image, dtype=np.float64) - truth) ** 2)))


def test_sirt_decreases_its_weighted_residual_and_beats_fbp(problem):
    poses, grid, data, truth = problem
    result = sirt(poses, data, grid, iterations=60, nonnegative=False)
    steps = np.diff(result.residuals)
    assert np.all(steps <= 1e-12 * result.residuals[0]), steps.max()
    assert _rmse(result.image, truth) < _rmse(fbp(poses, data, grid), truth)


def test_cgls_decreases_its_residual_and_beats_fbp(problem):
    poses, grid, data, truth = problem
    result = cgls(poses, data, grid, iterations=12)
    steps = np.diff(result.residuals)
    assert np.all(steps <= 1e-12 * result.residuals[0]), steps.max()
    assert _rmse(result.image, truth) < _rmse(fbp(poses, data, grid), truth)


def test_scipy_lsqr_on_the_linear_operator_reaches_the_cgls_solution(problem):
    poses, grid, data, _ = problem
    operator = projector(poses, grid).as_linear_operator()
    ours = cgls(poses, data, grid, iterations=10).image.ravel()
    theirs = lsqr(operator, data.ravel(), iter_lim=10, atol=0.0, btol=0.0, conlim=0.0)[0]
    # the same Krylov iterates in exact arithmetic; 1e-6 relative allows for rounding over
    # ten iterations of float64 sums (common practice)
    assert np.linalg.norm(ours - theirs) <= 1e-6 * np.linalg.norm(theirs)


def test_os_sart_converges_faster_per_pass_than_sirt(problem):
    poses, grid, data, truth = problem
    ordered = os_sart(poses, data, grid, iterations=5, subsets=10)
    simultaneous = sirt(poses, data, grid, iterations=5)
    # ordered subsets: about as many updates per pass as subsets (Wang & Jiang 2004)
    assert _rmse(ordered.image, truth) < _rmse(simultaneous.image, truth)
    assert _rmse(ordered.image, truth) < _rmse(fbp(poses, data, grid), truth)
    assert ordered.image.min() >= 0.0


def test_tv_gradient_and_divergence_are_adjoint():
    rng = np.random.default_rng(3)
    for shape in ((9, 7), (4, 6, 5)):
        x = rng.standard_normal(shape)
        g = rng.standard_normal((len(shape),) + shape)
        # <grad x, g> = -<x, div g>: the definition of the divergence used by the method
        assert np.isclose(np.sum(_gradient(x) * g), -np.sum(x * _divergence(g)), rtol=1e-12)


def test_tv_flattens_noise_in_uniform_regions_and_keeps_the_total(problem):
    poses, grid, data, truth = problem
    noisy = data + np.random.default_rng(7).normal(0.0, 0.02, data.shape)
    plain = cgls(poses, noisy, grid, iterations=30).image
    regular = tv(poses, noisy, grid, iterations=150, weight=3.0).image
    assert _rmse(regular, truth) < _rmse(plain, truth)
    # the central 8 x 8 pixels are water in the truth (uniform): total variation, which
    # favours piecewise-constant images (Rudin, Osher & Fatemi 1992), flattens the noise there
    patch = (slice(28, 36), slice(28, 36))
    assert np.ptp(truth[patch]) < 1e-12
    assert np.std(regular[patch]) < 0.25 * np.std(plain[patch])
    # the total of the image (the projections' mean over a view, times the view's width) is
    # set by the data, not by the penalty: kept within 1 %
    assert abs(regular.sum() / truth.sum() - 1) < 0.01


@pytest.mark.parametrize("method", [sirt, os_sart, cgls])
def test_an_exact_solution_is_a_fixed_point_of_every_start(problem, method):
    # consistent data b = A x: from initial = x the residual is zero and no update moves it
    # (the fixed point of each method's update, by its definition)
    poses, grid, _, truth = problem
    A = projector(poses, grid)
    exact = A.forward(truth)
    result = method(poses, exact, grid, iterations=3, initial=truth)
    assert np.max(np.abs(result.image - truth)) < 1e-9 * truth.max()


def test_starting_from_fbp_reaches_the_mean_level_sooner(problem):
    # iterative methods converge slowly at low frequencies (common practice): a few TV
    # iterations from zero leave the image's mean low, from FBP they start close to it
    poses, grid, data, truth = problem
    start = fbp(poses, data, grid)
    from_zero = tv(poses, data, grid, iterations=10, weight=0.1).image
    from_fbp = tv(poses, data, grid, iterations=10, weight=0.1, initial=start).image
    assert abs(from_fbp.mean() - truth.mean()) < abs(from_zero.mean() - truth.mean())
    assert _rmse(from_fbp, truth) < _rmse(from_zero, truth)
