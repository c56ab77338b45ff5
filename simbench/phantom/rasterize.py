"""The truth image and the ROI label map of a phantom on an image grid.

Partial volume is handled by sub-sampling: every pixel (voxel) is sampled on a regular
``supersample``-per-axis grid of points at the centres of equal sub-cells, the composition rule
(replace / add, in painting order) is applied exactly at each point, and the values are
averaged. The numba kernels live in :mod:`simbench.phantom.kernels`.
"""

from __future__ import annotations

import numpy as np

from simbench.geometry.grid import ImageGrid
from simbench.phantom import kernels
from simbench.phantom.compiled import Phantom


def material_mu(materials, energy_kev: float) -> np.ndarray:
    """mu of each material at one energy, 1/mm.

    Parameters
    ----------
    materials : sequence of MaterialSpec
    energy_kev : float

    Returns
    -------
    float64 (M,)
        Explicit-mu materials give their constant; others come from
        :func:`simbench.materials.attenuation.mu_table`.
    """
    mu = np.array([m.mu_per_mm if m.kind == "mu" else np.nan for m in materials], np.float64)
    need = [i for i, m in enumerate(materials) if m.kind != "mu"]
    if need:
        from simbench.materials.attenuation import mu_table

        table = np.asarray(mu_table([materials[i] for i in need], np.array([float(energy_kev)])))
        mu[need] = table[:, 0]
    return mu


def object_mu(phantom: Phantom, energy_kev: float) -> np.ndarray:
    """mu of every primitive of ``phantom.objects`` at ``energy_kev``, 1/mm, shape (K,)."""
    return material_mu(phantom.materials, energy_kev)[phantom.objects.material] if \
        phantom.objects.count else np.zeros(0)


def _check(grid: ImageGrid, energy_kev: float | None, supersample: int) -> None:
    if not isinstance(supersample, (int, np.integer)) or supersample < 1:
        raise ValueError(f"supersample must be an integer >= 1, got {supersample!r}")
    if energy_kev is not None and not (np.isfinite(energy_kev) and energy_kev > 0):
        raise ValueError(f"energy_kev must be a positive finite number, got {energy_kev!r}")
    if any(s <= 0 for s in grid.spacing_mm[:grid.dimension]) or min(grid.shape) < 1:
        raise ValueError(f"the grid needs positive spacing and sizes, got {grid}")


def _axes(grid: ImageGrid, supersample: int):
    """Cell centres, sub-sample offsets and half widths along x, y, z (mm)."""
    centres, offsets, halves = [], [], []
    for i, name in enumerate("xyz"):
        d = float(grid.spacing_mm[i])
        centres.append(np.ascontiguousarray(grid.axis_mm(name), dtype=np.float64))
        if name == "z" and grid.dimension == 2:
            offsets.append(np.zeros(1))  # a 2-D grid samples the plane z = cz only
            halves.append(0.0)
        else:
            offsets.append(((np.arange(supersample) + 0.5) / supersample - 0.5) * d)
            halves.append(d / 2.0)
    return centres, offsets, halves


def rasterize(phantom: Phantom, grid: ImageGrid, energy_kev: float, supersample: int = 4
              ) -> np.ndarray:
    """The truth mu image of a phantom on a grid, with partial volume.

    Parameters
    ----------
    phantom : Phantom
    grid : ImageGrid
        Where the pixels sit (ARCHITECTURE.md image-grid convention). A 2-D grid samples the
        plane z = centre z; a 3-D grid samples whole voxels.
    energy_kev : float
        Energy at which material mu is taken, keV.
    supersample : int
        Sub-samples per axis and pixel (``supersample ** dim`` points per pixel).

    Returns
    -------
    float64 array, ``grid.image_shape``
        Mean mu over each pixel, 1/mm.

    Notes
    -----
    At a point, with k the last ``replace`` object containing it,
    ``mu = mu_k + sum_{j > k, add, contains} mu_j`` (0 without a replace object). The pixel
    value is the mean over the sub-samples at offsets ``((i + 1/2) / s - 1/2) * d``,
    ``i = 0..s-1``; pixels that the kernel proves uniform (every primitive wholly in or out)
    use their centre value, which is then exact. Voxel phantoms are resampled by nearest
    voxel at each sub-sample (0 outside the volume), i.e. the area overlap of the pixel with
    each voxel up to the sub-sampling error.
    """
    _check(grid, energy_kev, supersample)
    (xs, ys, zs), (ox, oy, oz), (hx, hy, hz) = _axes(grid, supersample)
    out = np.zeros(grid.shape, np.float64)
    if phantom.voxels is not None:
        vox = phantom.voxels
        if vox.kind == "mu":
            volume = vox.values.astype(np.float64)
        else:
            per_label = np.zeros(len(vox.label_material))
            mat_mu = material_mu(phantom.materials, energy_kev)
            mapped = vox.label_material >= 0
            per_label[mapped] = mat_mu[vox.label_material[mapped]]
            volume = per_label[vox.values]
        nzv, nyv, nxv = volume.shape
        spacing = np.array(vox.spacing_mm, np.float64)
        origin = np.array(vox.centre_mm, np.float64) - spacing * np.array([nxv, nyv, nzv]) / 2.0
        if phantom.dimension == 2:  # the single slice holds for every z
            volume = volume[:1]
            origin[2] = -0.5
            spacing[2] = 1.0
            zs = np.zeros_like(zs)
            oz = np.zeros(1)
        kernels.resample_nearest(xs, ys, zs, ox, oy, oz, np.ascontiguousarray(volume), origin,
                                 spacing, out)
    elif phantom.objects.count:
        o = phantom.objects
        kernels.rasterize_objects(xs, ys, zs, ox, oy, oz, hx, hy, hz, o.shape, o.centre,
                                  o.rotation, o.half_sizes, o.params, o.mode,
                                  object_mu(phantom, energy_kev), o.poly_start, o.poly_count,
                                  o.poly_xy, o.bound_radius, out)
    return out.reshape(grid.image_shape)


def label_map(phantom: Phantom, grid: ImageGrid, supersample: int = 1) -> np.ndarray:
    """ROI labels of a phantom on a grid.

    Parameters
    ----------
    phantom : Phantom
    grid : ImageGrid
    supersample : int
        1 (default): the label at the pixel centre. s > 1: a pixel keeps a label only when all
        ``s ** dim`` sub-samples carry it (the pixel lies wholly in the ROI, so ROI statistics
        are free of partial volume); else 0.

    Returns
    -------
    int32 array, ``grid.image_shape``
        0 outside every ROI, else the ROI label (``phantom.roi_names[label - 1]``).

    Notes
    -----
    At a point, painting objects in order, a ``replace`` object sets the label to its own ROI
    label (0 if it is not a ROI: an insert displaces the ROI below it) and an ``add`` object
    that is a ROI sets its label (an ``add`` object that is not a ROI keeps the label below).
    So the label is that of the top-most ROI object covering the point, unless a later
    non-ROI ``replace`` object covers it. Voxel phantoms have no ROIs (all 0).
    """
    _check(grid, None, supersample)
    (xs, ys, zs), (ox, oy, oz), _ = _axes(grid, supersample)
    out = np.zeros(grid.shape, np.int32)
    o = phantom.objects
    if phantom.voxels is None and o.count and o.roi_label.any():
        kernels.label_objects(xs, ys, zs, ox, oy, oz, o.shape, o.centre, o.rotation,
                              o.half_sizes, o.params, o.mode, o.roi_label, o.poly_start,
                              o.poly_count, o.poly_xy, o.bound_radius, out)
    return out.reshape(grid.image_shape)
