"""Pack expanded primitives into the flat arrays of :mod:`simbench.phantom.compiled`."""

from __future__ import annotations

import numpy as np

from simbench.phantom import compiled as C


def empty_objects() -> C.CompiledObjects:
    """A :class:`CompiledObjects` with no primitives (for voxel phantoms)."""
    return compile_objects([])


def compile_objects(primitives: list) -> C.CompiledObjects:
    """Flat arrays of the primitives, in painting order.

    Parameters
    ----------
    primitives : list of :class:`simbench.phantom.language.Primitive`
        Objects placed in the world frame (``to_world`` maps local to world).

    Returns
    -------
    CompiledObjects
        ``rotation[k] = to_world[k].T`` (world-to-local), ROI labels numbered 1, 2, ... in
        painting order.
    """
    k = len(primitives)
    shape = np.zeros(k, np.int64)
    centre = np.zeros((k, 3))
    rotation = np.zeros((k, 3, 3))
    half = np.zeros((k, 3))
    params = np.zeros((k, 4))
    mode = np.zeros(k, np.int64)
    material = np.zeros(k, np.int64)
    poly_start = np.zeros(k, np.int64)
    poly_count = np.zeros(k, np.int64)
    bound = np.zeros(k)
    roi = np.zeros(k, np.int64)
    edge = np.zeros(k, bool)
    polys = []
    n_poly = 0
    n_roi = 0
    for i, p in enumerate(primitives):
        shape[i] = p.shape
        centre[i] = p.centre
        rotation[i] = p.to_world.T
        half[i] = p.half_sizes
        params[i] = p.params
        mode[i] = p.mode
        material[i] = p.material
        bound[i] = p.bound_radius
        edge[i] = p.edge
        if p.roi:
            n_roi += 1
            roi[i] = n_roi
        if p.polygon is not None:
            poly_start[i] = n_poly
            poly_count[i] = len(p.polygon)
            polys.append(p.polygon)
            n_poly += len(p.polygon)
    poly_xy = np.concatenate(polys).astype(np.float64) if polys else np.zeros((0, 2))
    return C.CompiledObjects(shape, centre, rotation, half, params, mode, material, poly_start,
                             poly_count, np.ascontiguousarray(poly_xy), bound, roi, edge)


def build_phantom(name: str, dimension: int, materials: list, primitives: list, voxels,
                  source: str) -> C.Phantom:
    """Assemble a :class:`~simbench.phantom.compiled.Phantom` from read parts.

    ROI objects without a name are called ``"roi <label>"``; other unnamed objects keep an
    empty display name (drawings label only named objects).
    """
    objects = compile_objects(primitives)
    names = []
    roi_names = []
    for p, label in zip(primitives, objects.roi_label):
        display = p.name or (f"roi {label}" if label else "")
        names.append(display)
        if label:
            roi_names.append(display)
    return C.Phantom(name=name, dimension=dimension, materials=tuple(materials), objects=objects,
                     voxels=voxels, object_names=tuple(names), roi_names=tuple(roi_names),
                     source=source)
