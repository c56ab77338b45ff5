"""Iterative reference reconstructions on the matched projectors: SIRT, OS-SART, CGLS, TV.

Every method works on any geometry the pose form describes (:mod:`simbench.recon.projectors`),
takes projections in the layout of the scan and returns the image in 1/mm with the history of
its data residual, so that convergence can be checked and plotted.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from simbench.errors import InputError, Where
from simbench.geometry.grid import ImageGrid
from simbench.geometry.poses import Poses


@dataclass
class IterativeResult:
    """An iterative reconstruction and how it got there.

    Attributes
    ----------
    image : float64 ndarray, ``grid.image_shape``
    residuals : list of float
        The residual the method decreases, after each iteration: ``||b - A x||_R`` (the
        norm weighted by the inverse row sums) for SIRT, ``||b - A x||_2`` for CGLS and
        OS-SART, the objective ``0.5 ||A x - b||^2 + lambda TV(x)`` for TV.
    """

    image: np.ndarray
    residuals: list = field(default_factory=list)


def _projector(poses: Poses, grid: ImageGrid):
    from simbench.recon.projectors import projector

    return projector(poses, grid)


def _data(projections, poses: Poses) -> np.ndarray:
    b = np.asarray(projections, dtype=np.float64)
    if b.shape != tuple(poses.projection_shape):
        raise InputError(Where("projections"), f"shape {b.shape} does not match the scan",
                         f"projections shaped {tuple(poses.projection_shape)}")
    return b


def _inverse(values: np.ndarray) -> np.ndarray:
    """1/values where values > 0, else 0 (rays that miss the grid, voxels no ray sees)."""
    out = np.zeros_like(values)
    np.divide(1.0, values, out=out, where=values > 1e-12 * max(float(values.max()), 1e-300))
    return out


def _first(initial, shape: tuple) -> np.ndarray:
    """The first image of an iteration: zero, or a float64 copy of ``initial``."""
    if initial is None:
        return np.zeros(shape)
    return np.array(initial, dtype=np.float64).reshape(shape)


def sirt(poses: Poses, projections, grid: ImageGrid, *, iterations: int = 100,
         relaxation: float = 1.0, nonnegative: bool = True, initial=None) -> IterativeResult:
    """Simultaneous iterative reconstruction technique.

    Parameters
    ----------
    poses : Poses
    projections : array, ``poses.projection_shape``
        Line integrals.
    grid : ImageGrid
    iterations : int
    relaxation : float
        lambda in (0, 2).
    nonnegative : bool
        Clip mu at 0 after each update.
    initial : array, ``grid.image_shape``, optional
        The first image (default zero), e.g. an FBP of the same projections: iterative methods
        converge slowly at low spatial frequencies, and a few iterations from zero leave the
        mean level low.

    Returns
    -------
    IterativeResult

    Notes
    -----
    ``x <- x + lambda C A^T R (b - A x)`` with ``R = diag(1 / A 1)`` (inverse row sums: ray
    lengths in the grid) and ``C = diag(1 / A^T 1)`` (inverse column sums). Without the
    non-negativity clip, each step decreases ``||b - A x||_R``.

    References
    ----------
    J. Gregor and T. Benson, "Computational analysis and improvement of SIRT", IEEE Trans.
    Med. Imaging 27(7), 918-924 (2008); A. van der Sluis and H. A. van der Vorst, "SIRT- and
    CG-type methods for the iterative solution of sparse linear least-squares problems",
    Linear Algebra Appl. 130, 257-303 (1990).
    """
    A = _projector(poses, grid)
    b = _data(projections, poses)
    row = _inverse(A.forward(np.ones(A.image_shape)))
    col = _inverse(A.back(np.ones(A.projection_shape)))
    x = _first(initial, A.image_shape)
    result = IterativeResult(x)
    for _ in range(iterations):
        r = b - A.forward(x)
        result.residuals.append(float(np.sqrt(np.sum(row * r * r))))
        x += relaxation * col * A.back(row * r)
        if nonnegative:
            np.maximum(x, 0.0, out=x)
    r = b - A.forward(x)
    result.residuals.append(float(np.sqrt(np.sum(row * r * r))))
    result.image = x
    return result


def os_sart(poses: Poses, projections, grid: ImageGrid, *, iterations: int = 10,
            subsets: int = 10, relaxation: float = 1.0, nonnegative: bool = True,
            initial=None) -> IterativeResult:
    """Ordered-subset simultaneous algebraic reconstruction technique.

    Parameters
    ----------
    iterations : int
        Passes over all views.
    subsets : int
        Views are split into this many interleaved subsets (view s, s + n, s + 2n...).
    relaxation, nonnegative, initial
        As in :func:`sirt`.

    Notes
    -----
    For each subset S of views: ``x <- x + lambda C_S A_S^T R_S (b_S - A_S x)``, the SART
    update of Andersen and Kak on that subset's rays. The residual recorded is
    ``||b - A x||_2`` after each full pass.

    References
    ----------
    A. H. Andersen and A. C. Kak, "Simultaneous algebraic reconstruction technique (SART)",
    Ultrason. Imaging 6, 81-94 (1984); G. Wang and M. Jiang, "Ordered-subset simultaneous
    algebraic reconstruction techniques (OS-SART)", J. X-Ray Sci. Technol. 12, 169-177 (2004).
    """
    b = _data(projections, poses)
    subsets = int(max(1, min(subsets, poses.n_views)))
    groups = [np.arange(s, poses.n_views, subsets) for s in range(subsets)]
    parts = []
    for views in groups:
        A = _projector(poses.select(views), grid)
        parts.append((views, A, _inverse(A.forward(np.ones(A.image_shape))),
                      _inverse(A.back(np.ones(A.projection_shape)))))
    full = _projector(poses, grid)
    x = _first(initial, full.image_shape)
    result = IterativeResult(x, [float(np.linalg.norm(b - full.forward(x)))])
    for _ in range(iterations):
        for views, A, row, col in parts:
            r = b[views] - A.forward(x)
            x += relaxation * col * A.back(row * r)
            if nonnegative:
                np.maximum(x, 0.0, out=x)
        result.residuals.append(float(np.linalg.norm(b - full.forward(x))))
    result.image = x
    return result


def cgls(poses: Poses, projections, grid: ImageGrid, *, iterations: int = 30,
         initial=None) -> IterativeResult:
    """Conjugate gradients on the normal equations (least squares), no constraint.

    Parameters
    ----------
    initial : array, optional
        As in :func:`sirt`: the search starts from it (the Krylov subspaces grow from its
        residual).

    Notes
    -----
    Minimises ``||A x - b||_2`` over growing Krylov subspaces: the residual decreases
    monotonically. Stopping early regularizes.

    References
    ----------
    M. R. Hestenes and E. Stiefel, "Methods of conjugate gradients for solving linear
    systems", J. Res. Natl. Bur. Stand. 49, 409-436 (1952); A. Björck, Numerical Methods for
    Least Squares Problems, SIAM (1996), section 7.4 (CGLS).
    """
    A = _projector(poses, grid)
    b = _data(projections, poses)
    x = _first(initial, A.image_shape)
    r = b - A.forward(x) if initial is not None else b.copy()
    s = A.back(r)
    p = s.copy()
    gamma = float(np.sum(s * s))
    result = IterativeResult(x, [float(np.linalg.norm(r))])
    for _ in range(iterations):
        if gamma == 0.0:
            break
        q = A.forward(p)
        alpha = gamma / float(np.sum(q * q))
        x += alpha * p
        r -= alpha * q
        s = A.back(r)
        gamma_new = float(np.sum(s * s))
        p = s + (gamma_new / gamma) * p
        gamma = gamma_new
        result.residuals.append(float(np.linalg.norm(r)))
    result.image = x
    return result


def _gradient(x: np.ndarray) -> np.ndarray:
    """Forward differences along each axis (Neumann boundary: 0 at the last voxel)."""
    g = np.zeros((x.ndim,) + x.shape)
    for axis in range(x.ndim):
        d = np.diff(x, axis=axis)
        index = [slice(None)] * x.ndim
        index[axis] = slice(0, -1)
        g[axis][tuple(index)] = d
    return g


def _divergence(g: np.ndarray) -> np.ndarray:
    """The negative adjoint of :func:`_gradient`: ``<grad x, g> = -<x, div g>``."""
    out = np.zeros(g.shape[1:])
    for axis in range(g.shape[0]):
        d = np.moveaxis(g[axis], axis, 0).copy()
        d[-1] = 0.0  # the gradient never writes its last entry
        term = d.copy()
        term[1:] -= d[:-1]
        out += np.moveaxis(term, 0, axis)
    return out


def tv(poses: Poses, projections, grid: ImageGrid, *, iterations: int = 200,
       weight: float = 1.0, nonnegative: bool = True, initial=None) -> IterativeResult:
    """Total-variation regularized least squares by the preconditioned primal-dual method.

    Parameters
    ----------
    iterations : int
    weight : float
        lambda, the weight of the isotropic total variation (in the units of ``A x - b``
        per 1/mm of image step).
    nonnegative : bool
    initial : array, optional
        As in :func:`sirt`.

    Notes
    -----
    Minimises ``0.5 ||A x - b||^2 + lambda sum_j |(grad x)_j| (+ indicator x >= 0)`` with
    ``K = [A; m grad]`` (forward differences, scaled by ``m = mean(A^T 1) / (2 n_dims)`` so
    that both blocks have similar column sums; the TV term is then ``(lambda / m) |m grad
    x|``, the same objective) by the primal-dual algorithm of Chambolle & Pock with the
    diagonal step sizes of Pock & Chambolle (alpha = 1): ``sigma = 1 / sum_j |K_ij|`` per
    dual row (``1 / A 1`` for rays, ``1 / (2 m)`` for differences) and
    ``tau = 1 / sum_i |K_ij|`` per voxel (``1 / (A^T 1 + 2 n_dims m)``). These steps need no
    estimate of ``||K||``; without the scaling, the dual of the TV term would take thousands
    of iterations to reach its bound, the projector's column sums being hundreds of times
    the gradient's.
    The residual recorded is the objective after each step.

    References
    ----------
    A. Chambolle and T. Pock, "A first-order primal-dual algorithm for convex problems with
    applications to imaging", J. Math. Imaging Vis. 40, 120-145 (2011); T. Pock and
    A. Chambolle, "Diagonal preconditioning for first order primal-dual algorithms in convex
    optimization", Proc. ICCV, 1762-1769 (2011); E. Y. Sidky, J. H. Jorgensen and X. Pan,
    "Convex optimization problem prototyping for image reconstruction in computed tomography
    with the Chambolle-Pock algorithm", Phys. Med. Biol. 57, 3065-3091 (2012).
    """
    A = _projector(poses, grid)
    b = _data(projections, poses)
    ndim = len(A.image_shape)
    sigma = _inverse(A.forward(np.ones(A.image_shape)))
    columns = A.back(np.ones(A.projection_shape))
    # K = [A; mu grad] with the TV weight lambda / mu: the same objective, with the gradient
    # block scaled so that its column sums match the projector's on average
    mu = max(float(columns.mean()) / (2.0 * ndim), 1e-12)
    radius = weight / mu
    tau = 1.0 / (columns + 2.0 * ndim * mu)
    x = _first(initial, A.image_shape)
    x_bar = x.copy()
    p = np.zeros(A.projection_shape)
    q = np.zeros((ndim,) + x.shape)
    result = IterativeResult(x)
    for _ in range(iterations):
        # dual of the data term 0.5 ||y - b||^2 (rays that miss the grid keep p = 0)
        p = (p + sigma * (A.forward(x_bar) - b)) / (1.0 + sigma)
        # dual of (lambda / mu) |mu grad x|: projection onto the ball of radius lambda / mu
        q += 0.5 * _gradient(x_bar)  # sigma = 1 / (2 mu) on the rows of mu grad
        magnitude = np.sqrt(np.sum(q * q, axis=0))
        q /= np.maximum(1.0, magnitude / max(radius, 1e-300))[None]
        x_new = x - tau * (A.back(p) - mu * _divergence(q))
        if nonnegative:
            np.maximum(x_new, 0.0, out=x_new)
        x_bar = 2.0 * x_new - x
        x = x_new
        residual = A.forward(x) - b
        result.residuals.append(float(0.5 * np.sum(residual * residual) + weight * np.sum(
            np.sqrt(np.sum(_gradient(x) ** 2, axis=0)))))
    result.image = x
    return result
