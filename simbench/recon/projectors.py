"""Matched forward and back projectors on the pose form, for iterative reconstruction.

:func:`projector` binds a scanner's :class:`~simbench.geometry.poses.Poses` (parallel, fan or
cone beam, flat or curved detector, offsets, short scans, helices, free per-view poses) to an
:class:`~simbench.geometry.grid.ImageGrid` (2-D or 3-D). Its ``forward`` is Joseph's
ray-driven projector; its ``back`` is the exact transpose of the same matrix (not a separate
voxel-driven approximation), so that ``<A x, y> = <x, A^T y>`` holds to rounding and
least-squares solvers (``scipy.sparse.linalg.lsqr``, ``cg`` on the normal equations)
converge to the solution of the discrete problem.

Why Joseph's method rather than Siddon's: Siddon's weights (exact chords through square
pixels) change slope abruptly as a ray slides across a pixel corner, so its sinogram of a
smooth object carries the staircase of the pixel grid; Joseph's linear interpolation between
voxel centres is a continuous model of the image and tracks the line integral of a smooth
object more closely. Its walk also takes one fixed step per plane with no test of which
plane comes next, which is the cheaper loop. Measured against the exact analytic tracer on
a smooth phantom rasterized finely, the worst ray is off by 0.31 % of the peak (2-D fan beam, 0.5 mm pixels)
and 0.53 % (3-D cone beam, 1 mm voxels) with Joseph's method, 0.58 % and 1.07 % with
Siddon's chords through the same images (``tests/test_projectors.py``); on a 512 x 512 image
and 720 views Joseph's forward projection ran 1.8 to 2.2 times as fast as the Siddon tracer
(three runs of ``benchmarks/bench_projectors.py``).

The numba kernels live in :mod:`simbench.recon.projector_kernels`.
"""

from __future__ import annotations

import numba
import numpy as np
from scipy.sparse.linalg import LinearOperator

from simbench.errors import InputError, Where
from simbench.geometry.grid import ImageGrid
from simbench.geometry.poses import Poses
from simbench.recon import projector_kernels as kernels

#: Rays per back-projection pass: the per-ray slab ranges of one pass take 8 bytes a ray.
RAYS_PER_PASS = 2**21

#: Image slabs per thread in the back projector (more slabs balance uneven work; any number
#: gives the same bits).
SLABS_PER_THREAD = 4


def _where(field: str) -> Where:
    return Where("projector", None, None, field)


def _check_poses(poses) -> None:
    if not isinstance(poses, Poses):
        raise InputError(_where("poses"), f"got {type(poses).__name__}",
                         "a simbench.geometry.poses.Poses")
    arrays = (poses.source, poses.direction, poses.detector_centre, poses.u_axis,
              poses.v_axis, poses.col_u_mm, poses.row_v_mm)
    if not all(np.all(np.isfinite(np.asarray(a, dtype=np.float64))) for a in arrays):
        raise InputError(_where("poses"), "a pose array holds NaN or infinite values",
                         "finite positions (mm) and unit axes")
    if poses.n_views < 1 or poses.n_cols < 1 or poses.n_rows < 1:
        raise InputError(_where("poses"), f"projection shape {poses.projection_shape}",
                         "at least one view, row and column")
    if poses.dimension == 2 and poses.n_rows != 1:
        raise InputError(_where("poses"), f"a 2-D scanner with {poses.n_rows} rows",
                         "exactly one detector row for 2-D scanners")


def _check_grid(grid, poses: Poses) -> None:
    if not isinstance(grid, ImageGrid):
        raise InputError(_where("grid"), f"got {type(grid).__name__}",
                         "a simbench.geometry.grid.ImageGrid")
    if grid.dimension not in (2, 3):
        raise InputError(_where("grid.dimension"), f"got {grid.dimension!r}", "2 or 3")
    shape = tuple(grid.shape)
    if len(shape) != 3 or not all(isinstance(s, (int, np.integer)) and s >= 1 for s in shape):
        raise InputError(_where("grid.shape"), f"got {grid.shape!r}",
                         "three whole numbers >= 1 (nz, ny, nx)")
    if grid.dimension == 2 and shape[0] != 1:
        raise InputError(_where("grid.shape"), f"a 2-D grid with nz = {shape[0]}", "nz = 1")
    spacing = np.asarray(grid.spacing_mm, dtype=np.float64)
    centre = np.asarray(grid.centre_mm, dtype=np.float64)
    used = spacing[:grid.dimension] if spacing.shape == (3,) else spacing
    if spacing.shape != (3,) or not np.all(np.isfinite(used)) or np.any(used <= 0):
        raise InputError(_where("grid.spacing_mm"), f"got {grid.spacing_mm!r}",
                         "positive voxel sizes (dx, dy, dz) in mm (dz unused in 2-D)")
    if centre.shape != (3,) or not np.all(np.isfinite(centre)):
        raise InputError(_where("grid.centre_mm"), f"got {grid.centre_mm!r}",
                         "a finite (cx, cy, cz) in mm")
    if grid.dimension == 2 and poses.dimension != 2:
        raise InputError(_where("grid"), "a 2-D grid with a 3-D scanner",
                         "a 3-D grid for a 3-D scanner (a 2-D grid needs a 2-D scanner)")


def _real_array(value, shape: tuple, field: str, what: str) -> np.ndarray:
    """``value`` as a C-contiguous float64 array of ``shape``, or a one-line InputError."""
    try:
        array = np.asarray(value)
    except Exception:  # noqa: BLE001 - anything numpy cannot read is bad input
        raise InputError(_where(field), f"got {type(value).__name__}",
                         f"a real array shaped {shape}") from None
    if array.dtype == object or not (np.issubdtype(array.dtype, np.floating)
                                     or np.issubdtype(array.dtype, np.integer)
                                     or array.dtype == np.bool_):
        raise InputError(_where(field), f"got an array of {array.dtype}",
                         f"real numbers (float32 or float64) shaped {shape}")
    if array.shape != shape:
        raise InputError(_where(field), f"shape {array.shape} does not match the {what}",
                         f"an array shaped {shape}")
    array = np.ascontiguousarray(array, dtype=np.float64)
    if not np.all(np.isfinite(array)):
        raise InputError(_where(field), "contains NaN or infinite values", "finite numbers")
    return array


class Projector:
    """Joseph's projector A for one scanner and one image grid, with its exact transpose.

    Build it with :func:`projector`.

    Attributes
    ----------
    poses : Poses
    grid : ImageGrid
    image_shape : tuple
        (ny, nx) for 2-D grids, (nz, ny, nx) otherwise.
    projection_shape : tuple
        (n_views, n_cols) for 2-D scanners, (n_views, n_rows, n_cols) otherwise.
    """

    def __init__(self, poses: Poses, grid: ImageGrid):
        _check_poses(poses)
        _check_grid(grid, poses)
        self.poses = poses
        self.grid = grid
        self.image_shape = tuple(int(s) for s in grid.image_shape)
        self.projection_shape = tuple(int(s) for s in poses.projection_shape)
        self._cell_shape = (poses.n_views, poses.n_rows, poses.n_cols)
        self._pose_arrays = tuple(np.ascontiguousarray(a, dtype=np.float64) for a in (
            poses.source, poses.direction, poses.detector_centre, poses.u_axis, poses.v_axis))
        self._col_u = np.ascontiguousarray(poses.col_u_mm, dtype=np.float64)
        self._row_v = np.ascontiguousarray(poses.row_v_mm, dtype=np.float64)
        nz, ny, nx = (int(s) for s in grid.shape)
        self._n_axes = int(grid.dimension)
        # per axis x, y, z: voxels, flat-index step, size (mm), centre of voxel 0 (mm)
        self._n = (nx, ny, nz)
        self._stride = (1, nx, nx * ny)
        dz = float(grid.spacing_mm[2]) if self._n_axes == 3 else 1.0  # 2-D: z not walked
        self._spacing = (float(grid.spacing_mm[0]), float(grid.spacing_mm[1]), dz)
        self._first = tuple(float(grid.axis_mm(axis)[0]) for axis in "xyz")
        # back projection owns slabs of whole planes along the outermost axis that has more
        # than one voxel (z, else y), contiguous in memory
        self._slab_axis = 2 if (self._n_axes == 3 and nz > 1) else 1

    def _kernel_geometry(self) -> tuple:
        return (bool(self.poses.parallel), bool(self.poses.curved)) + self._pose_arrays

    def forward(self, image) -> np.ndarray:
        """Project an image: Joseph's line integrals along every cell ray.

        Parameters
        ----------
        image : array, ``image_shape``
            mu per voxel in 1/mm (float32 or float64; accumulated in float64).

        Returns
        -------
        float64 array, ``projection_shape``
            ``(A x)_i = (spacing_a / |d_a|) * sum_k x_interp(k)``, dimensionless.

        Notes
        -----
        For the ray ``o + t d`` of cell i (from
        :func:`simbench.geometry.rays.detector_ray`), a is the axis with the largest
        ``|d_a| / spacing_a``; at each plane of voxel centres ``x_a = c_a(k)`` inside the
        ray's parameter range, the image is interpolated linearly (2-D) or bilinearly (3-D)
        between the voxel centres of the other axes, taking voxels outside the grid as 0.
        A 2-D grid is a prism along z.

        References
        ----------
        P. M. Joseph, "An improved algorithm for reprojecting rays through pixel images",
        IEEE Trans. Med. Imaging 1(3), 192-196 (1982).
        """
        flat = _real_array(image, self.image_shape, "image", "grid's image shape").ravel()
        out = np.empty(self._cell_shape, dtype=np.float64)
        kernels.forward_kernel(*self._kernel_geometry(), self._col_u, self._row_v, self._first,
                               self._spacing, self._n, self._stride, self._n_axes, flat, out)
        return out.reshape(self.projection_shape)

    def back(self, projections) -> np.ndarray:
        """Back-project: the exact transpose of :meth:`forward`.

        Parameters
        ----------
        projections : array, ``projection_shape``
            One value per cell ray (float32 or float64; accumulated in float64).

        Returns
        -------
        float64 array, ``image_shape``
            ``(A^T y)_j = sum_i A_ij y_i``, in mm (ray length per unit of ``y``).

        Notes
        -----
        Every ray spreads ``(spacing_a / |d_a|) * y_i`` over the voxels and with the
        interpolation weights that :meth:`forward` reads, computed by the same functions,
        so ``<A x, y> = <x, A^T y>`` to rounding. The image is split into slabs along its
        outermost axis, one parallel task per slab; each voxel receives its terms in the
        order (view, row, column) whatever the number of threads, so the result is the same
        to the bit with 1 or N threads.
        """
        values = _real_array(projections, self.projection_shape, "projections",
                             "scanner's projection shape").reshape(self._cell_shape)
        image = np.zeros(int(np.prod(self.grid.shape)), dtype=np.float64)
        n_views, n_rows, n_cols = self._cell_shape
        n_slab = int(self._n[self._slab_axis])
        n_slabs = max(1, min(n_slab, SLABS_PER_THREAD * numba.get_num_threads()))
        slab_bounds = (np.arange(n_slabs + 1, dtype=np.int64) * n_slab) // n_slabs
        step = max(1, min(n_views, RAYS_PER_PASS // (n_rows * n_cols)))
        ray_lo = np.empty((step, n_rows, n_cols), dtype=np.int32)
        ray_hi = np.empty_like(ray_lo)
        geometry = self._kernel_geometry()
        for v0 in range(0, n_views, step):
            views = np.arange(v0, min(v0 + step, n_views), dtype=np.int64)
            lo, hi = ray_lo[:views.shape[0]], ray_hi[:views.shape[0]]
            kernels.slab_ranges_kernel(*geometry, views, self._col_u, self._row_v,
                                       self._first, self._spacing, self._n, self._n_axes,
                                       self._slab_axis, lo, hi)
            kernels.back_kernel(*geometry, views, self._col_u, self._row_v, self._first,
                                self._spacing, self._n, self._stride, self._n_axes,
                                self._slab_axis, slab_bounds, lo, hi, values, image)
        return image.reshape(self.image_shape)

    def as_linear_operator(self) -> LinearOperator:
        """The projector as a :class:`scipy.sparse.linalg.LinearOperator`.

        Returns
        -------
        LinearOperator
            Shape ``(prod(projection_shape), prod(image_shape))``, float64; ``matvec``
            takes a flattened image (C order) and returns flattened projections, ``rmatvec``
            the reverse (the back projector), so ``lsqr(A, p.ravel())`` and
            ``cg(A.T @ A, A.T @ p.ravel())`` work unchanged.
        """
        n_image = int(np.prod(self.image_shape))
        n_proj = int(np.prod(self.projection_shape))

        def matvec(x):
            return self.forward(np.reshape(x, self.image_shape)).ravel()

        def rmatvec(y):
            return self.back(np.reshape(y, self.projection_shape)).ravel()

        return LinearOperator((n_proj, n_image), matvec=matvec, rmatvec=rmatvec,
                              dtype=np.float64)

    def __repr__(self) -> str:
        kind = "parallel" if self.poses.parallel else (
            "curved divergent" if self.poses.curved else "flat divergent")
        return (f"Projector({kind}, projections {self.projection_shape}, "
                f"image {self.image_shape})")


def projector(poses: Poses, grid: ImageGrid) -> Projector:
    """Matched forward and back projectors for a scanner's poses and an image grid.

    Parameters
    ----------
    poses : Poses
        Any scanner geometry in the pose form (parallel, fan or cone beam; flat or curved
        detector; offsets; short scans; helical; free per-view poses).
    grid : ImageGrid
        Where the voxels sit (ARCHITECTURE.md convention). A 2-D grid needs a 2-D scanner;
        a 3-D grid works with either (a 2-D scanner's rays then lie in the plane z = 0).

    Returns
    -------
    Projector
        With ``forward(image)``, ``back(projections)`` and ``as_linear_operator()``.

    Raises
    ------
    InputError
        Not a Poses or an ImageGrid, non-finite poses, bad grid sizes, or a 2-D grid with a
        3-D scanner.

    Notes
    -----
    The forward projector is Joseph's method (linear interpolation between voxel centres
    on the planes of the axis each ray crosses most steeply); the back projector is its
    exact transpose. Both run in numba over all rays or image slabs in parallel, with
    float64 accumulation, and give the same bits with any number of threads.

    References
    ----------
    P. M. Joseph, "An improved algorithm for reprojecting rays through pixel images",
    IEEE Trans. Med. Imaging 1(3), 192-196 (1982).

    Examples
    --------
    >>> from simbench.geometry import ImageGrid, parallel_poses
    >>> poses = parallel_poses(n_cols=8, pitch_u_mm=1.0, n_views=4)
    >>> A = projector(poses, ImageGrid.square_2d(6, 1.0))
    >>> A.forward(np.ones((6, 6))).shape
    (4, 8)
    >>> round(float(A.forward(np.ones((6, 6)))[0, 3]), 12)  # 6 pixels of 1 mm along y
    6.0
    """
    return Projector(poses, grid)
