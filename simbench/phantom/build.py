"""Expand checked templates into placed objects and pack them into the flat arrays of
:mod:`simbench.phantom.compiled`.

The reader (:mod:`simbench.phantom.language`) turns every distinct entry of a phantom file
into a template in its parent's frame: :class:`ObjectTemplate`, :class:`GroupTemplate` or
:class:`CopiesTemplate` (ring, array, bars). :func:`expand` places them all at once with array
arithmetic, from the innermost pattern out, so a pattern of 100 000 copies costs a few array
operations rather than 100 000 Python calls; :func:`build_phantom` packs the result.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from simbench.errors import InputError, Where
from simbench.phantom import compiled as C


@dataclass(frozen=True, eq=False)
class ObjectTemplate:
    """One checked object in its parent's frame.

    ``rotation`` maps the object's frame to its parent's (None: not turned); ``index`` is its
    position in the reader's list of object templates.
    """

    index: int
    code: int
    centre: np.ndarray
    rotation: np.ndarray | None
    half_sizes: tuple
    params: tuple
    polygon: np.ndarray | None
    material: int
    mode: int
    name: str
    roi: bool
    edge: bool
    bound_radius: float
    where: Where


@dataclass(frozen=True, eq=False)
class GroupTemplate:
    """A checked group: its placement and its entries' templates, in painting order."""

    centre: np.ndarray
    rotation: np.ndarray | None
    items: tuple


@dataclass(frozen=True, eq=False)
class CopiesTemplate:
    """A checked ring, array or bars: ``item`` placed at ``offsets[k]`` (K, 3) in the pattern's
    frame, turned about the pattern's z by ``turns[k]`` radians when ``turns`` is given; copy k
    is named with ``label.format(k + 1)`` after the names of the patterns around it."""

    centre: np.ndarray
    rotation: np.ndarray | None
    offsets: np.ndarray
    turns: np.ndarray | None
    label: str
    item: Any


@dataclass(frozen=True, eq=False)
class Placed:
    """N placed objects in painting order.

    Attributes
    ----------
    template : int64 (N,)
        Index of each object's :class:`ObjectTemplate`.
    centre : float64 (N, 3)
        Centre in the frame they were placed in, mm.
    to_world : float64 (N, 3, 3)
        Rotation from the object's frame to that frame.
    suffix : list of str
        Copy numbers appended to the object's name (``" 3"``, ``" 2 bar 1"``).
    """

    template: np.ndarray
    centre: np.ndarray
    to_world: np.ndarray
    suffix: list


def _combine(q: np.ndarray | None, c: np.ndarray, placed: Placed) -> tuple[np.ndarray, np.ndarray]:
    """Centres (K, M, 3) and rotations (K, M, 3, 3) of M placed objects seen from K frames,
    frame k sitting at ``c[k]`` turned by ``q[k]`` (None: not turned).

    Centres ``c + Q p`` and rotations ``Q R``, written as three explicit products per entry so
    that the result does not depend on a linear-algebra library or its threads.
    """
    p, r = placed.centre, placed.to_world
    k, m = c.shape[0], p.shape[0]
    if q is None:
        return c[:, None, :] + p[None, :, :], np.broadcast_to(r, (k, m, 3, 3)).copy()
    qp = (q[:, None, :, 0] * p[None, :, None, 0] + q[:, None, :, 1] * p[None, :, None, 1]
          + q[:, None, :, 2] * p[None, :, None, 2])
    qr = (q[:, None, :, 0, None] * r[None, :, None, 0, :]
          + q[:, None, :, 1, None] * r[None, :, None, 1, :]
          + q[:, None, :, 2, None] * r[None, :, None, 2, :])
    return c[:, None, :] + qp, qr


def _place(rotation: np.ndarray | None, centre: np.ndarray, placed: Placed) -> Placed:
    """``placed`` seen from the frame in which its own frame sits at ``centre`` turned by
    ``rotation``."""
    moved, turned = _combine(None if rotation is None else rotation[None], centre[None], placed)
    return Placed(placed.template, moved[0], turned[0], placed.suffix)


def _rotations_z(angles_rad: np.ndarray) -> np.ndarray:
    """Rotations about z by each angle, (K, 3, 3) (the matrices of
    :func:`simbench.phantom.rotations.rotation_about`)."""
    out = np.zeros((len(angles_rad), 3, 3))
    cos = np.array([math.cos(a) for a in angles_rad])
    sin = np.array([math.sin(a) for a in angles_rad])
    out[:, 0, 0], out[:, 0, 1], out[:, 1, 0], out[:, 1, 1] = cos, -sin, sin, cos
    out[:, 2, 2] = 1.0
    return out


def expand(template: Any) -> Placed:
    """Every object of ``template``, placed in the frame of the template's parent.

    Notes
    -----
    An object at ``p`` turned by ``R`` in a frame placed at ``c`` turned by ``Q`` sits at
    ``c + Q p`` turned by ``Q R``; patterns repeat their item's placed objects for each copy
    (copy-major order, so painting order is copy 1's objects, then copy 2's, ...).
    """
    if isinstance(template, ObjectTemplate):
        rotation = np.eye(3) if template.rotation is None else template.rotation
        return Placed(np.array([template.index]), template.centre[None, :].copy(),
                      rotation[None, :, :].copy(), [""])
    if isinstance(template, GroupTemplate):
        parts = [expand(item) for item in template.items]
        inner = Placed(np.concatenate([p.template for p in parts]),
                       np.concatenate([p.centre for p in parts]),
                       np.concatenate([p.to_world for p in parts]),
                       [s for p in parts for s in p.suffix])
        return _place(template.rotation, template.centre, inner)
    item = expand(template.item)
    count = len(template.offsets)
    turns = None if template.turns is None else _rotations_z(template.turns)
    centres, rotations = _combine(turns, template.offsets, item)
    label = template.label
    suffix = ([label.format(k + 1) + s for k in range(count) for s in item.suffix] if label
              else item.suffix * count)
    inner = Placed(np.tile(item.template, count), centres.reshape(-1, 3),
                   rotations.reshape(-1, 3, 3), suffix)
    return _place(template.rotation, template.centre, inner)


def check_extent(templates: list, placed: Placed, limit_mm: float) -> None:
    """Refuse a placed object that reaches farther than ``limit_mm`` from the origin.

    The reach is ``|centre| + bound_radius``; the error names the object's place in the file.
    """
    if not len(placed.template):
        return
    bounds = np.array([t.bound_radius for t in templates])[placed.template]
    reach = np.sqrt(np.einsum("ij,ij->i", placed.centre, placed.centre)) + bounds
    bad = np.flatnonzero(~(reach <= limit_mm))
    if bad.size:
        k = int(bad[0])
        raise InputError(templates[placed.template[k]].where,
                         f"once its groups and patterns have placed it, this object reaches "
                         f"{reach[k]:.6g} mm from the origin",
                         f"objects within {limit_mm:g} mm of the origin")


def compile_objects(templates: list, placed: Placed | None) -> C.CompiledObjects:
    """Flat arrays of the placed objects, in painting order.

    Parameters
    ----------
    templates : list of ObjectTemplate
        The object templates, ``templates[i].index == i``.
    placed : Placed or None
        The objects placed in the world frame (None: no objects, as for voxel phantoms).

    Returns
    -------
    CompiledObjects
        ``rotation[k] = to_world[k].T`` (world-to-local), ROI labels numbered 1, 2, ... in
        painting order.
    """
    if placed is None or not len(placed.template):
        return C.CompiledObjects(
            np.zeros(0, np.int64), np.zeros((0, 3)), np.zeros((0, 3, 3)), np.zeros((0, 3)),
            np.zeros((0, 4)), np.zeros(0, np.int64), np.zeros(0, np.int64),
            np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros((0, 2)), np.zeros(0),
            np.zeros(0, np.int64), np.zeros(0, bool))
    idx = placed.template

    def column(get, dtype) -> np.ndarray:
        return np.array([get(t) for t in templates], dtype=dtype)[idx]

    roi_flag = column(lambda t: t.roi, bool)
    roi = np.where(roi_flag, np.cumsum(roi_flag), 0).astype(np.int64)
    poly_count = column(lambda t: 0 if t.polygon is None else len(t.polygon), np.int64)
    poly_start = np.where(poly_count > 0, np.cumsum(poly_count) - poly_count, 0).astype(np.int64)
    with_polygon = np.flatnonzero(poly_count)
    poly_xy = (np.concatenate([templates[idx[k]].polygon for k in with_polygon]).astype(np.float64)
               if with_polygon.size else np.zeros((0, 2)))
    return C.CompiledObjects(
        shape=column(lambda t: t.code, np.int64),
        centre=np.ascontiguousarray(placed.centre, dtype=np.float64),
        rotation=np.ascontiguousarray(placed.to_world.transpose(0, 2, 1), dtype=np.float64),
        half_sizes=column(lambda t: t.half_sizes, np.float64).reshape(-1, 3),
        params=column(lambda t: t.params, np.float64).reshape(-1, 4),
        mode=column(lambda t: t.mode, np.int64),
        material=column(lambda t: t.material, np.int64),
        poly_start=poly_start, poly_count=poly_count, poly_xy=np.ascontiguousarray(poly_xy),
        bound_radius=column(lambda t: t.bound_radius, np.float64),
        roi_label=roi, edge=column(lambda t: t.edge, bool))


def build_phantom(name: str, dimension: int, materials: list, templates: list,
                  placed: Placed | None, voxels, source: str) -> C.Phantom:
    """Assemble a :class:`~simbench.phantom.compiled.Phantom` from read parts.

    ROI objects without a name are called ``"roi <label>"``; other unnamed objects keep an
    empty display name (drawings label only named objects).
    """
    objects = compile_objects(templates, placed)
    names = []
    roi_names = []
    if placed is not None:
        for k, label in zip(placed.template, objects.roi_label):
            base = templates[k].name
            display = f"{base}{placed.suffix[len(names)]}" if base else (
                f"roi {label}" if label else "")
            names.append(display)
            if label:
                roi_names.append(display)
    return C.Phantom(name=name, dimension=dimension, materials=tuple(materials), objects=objects,
                     voxels=voxels, object_names=tuple(names), roi_names=tuple(roi_names),
                     source=source)
