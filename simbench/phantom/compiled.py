"""The compiled phantom: flat arrays that the tracer and the rasterizer read.

This is the contract between :mod:`simbench.phantom` (which parses, validates and expands a
phantom file into these arrays) and :mod:`simbench.trace` / :mod:`simbench.phantom.rasterize`
(which read them in numba kernels). Every length is in mm, every position in the world frame
of ARCHITECTURE.md (isocenter at the origin, rotation axis z).

Shape codes (``shape`` array) and what ``half_sizes`` / ``params`` mean for each, all in the
object's local frame (``local = rotation @ (world - centre)``):

============  ====  =================================================================
code name     code  geometry in the local frame
============  ====  =================================================================
ELLIPSOID       0   (x/a)^2 + (y/b)^2 + (z/c)^2 <= 1, half_sizes = (a, b, c); sphere a=b=c
ELLIPSE_2D      1   (x/a)^2 + (y/b)^2 <= 1 for every z (2-D circle/ellipse), half_sizes=(a,b,inf)
BOX             2   |x|<=a, |y|<=b, |z|<=c, half_sizes = (a, b, c)
RECTANGLE_2D    3   |x|<=a, |y|<=b for every z, half_sizes = (a, b, inf)
CYLINDER        4   (x/a)^2 + (y/b)^2 <= 1 and |z| <= c, half_sizes = (a, b, c); axis = local z
CONE            5   truncated cone about local z, |z| <= c, radius r(z) growing linearly from
                    params[0] at z=-c to params[1] at z=+c; half_sizes = (rmax, rmax, c)
POLYGON_2D      6   point-in-polygon of (x, y) for every z; vertices
                    poly_xy[poly_start[k]:poly_start[k]+poly_count[k]] (simple polygon, any
                    winding, not necessarily convex)
============  ====  =================================================================

Composition: objects are painted in order. At a point, let k be the last ``replace`` object
(mode 0) that contains it: mu = mu(k) + sum of mu(j) over ``add`` objects (mode 1) with j > k
that contain it (with no replace object, the background is vacuum, mu = 0). Path lengths are
kept per material, so ``add`` objects contribute their own material's length.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

ELLIPSOID = 0
ELLIPSE_2D = 1
BOX = 2
RECTANGLE_2D = 3
CYLINDER = 4
CONE = 5
POLYGON_2D = 6

#: shape codes that are infinite along local z (2-D shapes)
PRISM_CODES = (ELLIPSE_2D, RECTANGLE_2D, POLYGON_2D)

REPLACE = 0
ADD = 1


@dataclass(frozen=True, eq=False)
class CompiledObjects:
    """Flat arrays of K primitives, in painting order.

    Attributes
    ----------
    shape : int64 (K,)
        Shape code (module constants).
    centre : float64 (K, 3)
        Centre in the world frame, mm.
    rotation : float64 (K, 3, 3)
        World-to-local rotation: ``local = rotation @ (world - centre)``.
    half_sizes : float64 (K, 3)
        Semi-axes / half widths in mm (``inf`` along z for 2-D shapes).
    params : float64 (K, 4)
        Extra per-shape numbers (cone radii); zeros otherwise.
    mode : int64 (K,)
        REPLACE (0) or ADD (1).
    material : int64 (K,)
        Index into the phantom's material list.
    poly_start, poly_count : int64 (K,)
        Slice of ``poly_xy`` holding a polygon's vertices (0, 0 for other shapes).
    poly_xy : float64 (P, 2)
        Polygon vertices in local coordinates, mm.
    bound_radius : float64 (K,)
        Radius of a sphere about ``centre`` containing the object (for 2-D shapes: of a
        circle in the xy plane; the object is unbounded in z).
    roi_label : int64 (K,)
        0 for none, else the ROI label number of the object (1, 2, ...).
    edge : bool (K,)
        The object is flagged as a resolution edge.
    """

    shape: np.ndarray
    centre: np.ndarray
    rotation: np.ndarray
    half_sizes: np.ndarray
    params: np.ndarray
    mode: np.ndarray
    material: np.ndarray
    poly_start: np.ndarray
    poly_count: np.ndarray
    poly_xy: np.ndarray
    bound_radius: np.ndarray
    roi_label: np.ndarray
    edge: np.ndarray

    @property
    def count(self) -> int:
        return int(self.shape.shape[0])


@dataclass(frozen=True, eq=False)
class VoxelVolume:
    """A voxel phantom on the image-grid convention of ARCHITECTURE.md.

    Voxel (iz, iy, ix) has its centre at
    ``((ix-(nx-1)/2)*dx + cx, (iy-(ny-1)/2)*dy + cy, (iz-(nz-1)/2)*dz + cz)``.

    Attributes
    ----------
    values : ndarray (nz, ny, nx)
        int32 labels (``kind == "labels"``; 0 is vacuum) or float64 mu in 1/mm (``"mu"``).
    kind : str
        ``"labels"`` or ``"mu"``.
    spacing_mm : tuple (dx, dy, dz)
    centre_mm : tuple (cx, cy, cz)
    label_material : int64 (n_labels + 1,)
        For labels: material index of label value i (entry 0 unused, -1 for vacuum).
        For a mu volume the phantom has one pseudo-material with mu = 1 /mm at all energies
        and the "path length" is the line integral of the volume itself.
    """

    values: np.ndarray
    kind: str
    spacing_mm: tuple
    centre_mm: tuple
    label_material: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))


@dataclass(frozen=True, eq=False)
class Phantom:
    """A parsed, validated phantom ready to trace and rasterize.

    Attributes
    ----------
    name : str
    dimension : int
        2 or 3.
    materials : tuple of MaterialSpec
        Material m of the path-length array ``L[m, ...]``.
    objects : CompiledObjects
        Analytic primitives (possibly none).
    voxels : VoxelVolume or None
        A voxel phantom (then ``objects`` is empty).
    object_names : tuple of str
        Display name of every primitive (``objects`` order), for drawings and reports.
    roi_names : tuple of str
        Name of ROI label 1, 2, ... (index 0 is label 1).
    source : str
        The file it came from (for messages).
    """

    name: str
    dimension: int
    materials: tuple
    objects: CompiledObjects
    voxels: VoxelVolume | None = None
    object_names: tuple = ()
    roi_names: tuple = ()
    source: str = "<input>"
