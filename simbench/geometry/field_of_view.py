"""The field of view of a scan: the circle about the rotation axis (z) that the beam covers."""

from __future__ import annotations

import dataclasses

import numpy as np

from simbench.geometry.poses import Poses
from simbench.geometry.rays import cell_rays


def edge_ray_distances_mm(poses: Poses) -> np.ndarray:
    """Signed distances from the rotation axis of the two outermost rays of every view.

    Parameters
    ----------
    poses : Poses

    Returns
    -------
    float64 (V, 2)
        For the outer edges of the first and last columns (row coordinate v = 0), the signed
        distance of the ray's projection onto the x-y plane from the z axis,
        ``(p_xy x d_xy) / |d_xy|`` (p a point of the ray, d its direction); for a circular
        scan this is the parallel-beam coordinate t of the ray (positive toward +u). Rays
        parallel to z give NaN.
    """
    col = poses.col_u_mm
    half = 0.5 * poses.pitch_u_mm
    edges = np.array([col.min() - half, col.max() + half])
    probe = dataclasses.replace(poses, col_u_mm=edges, row_v_mm=np.zeros(1))
    rays = cell_rays(probe)[:, 0, :, :]  # (V, 2, 8)
    ox, oy, dx, dy = rays[..., 0], rays[..., 1], rays[..., 3], rays[..., 4]
    norm = np.hypot(dx, dy)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = (dy * ox - dx * oy) / norm
    out[norm < 1e-12] = np.nan
    return out


def field_of_view_radius_mm(poses: Poses, every_view: bool = True) -> float:
    """Radius of the field of view about the rotation axis (circular and helical scans).

    Parameters
    ----------
    poses : Poses
    every_view : bool
        True (default): the largest circle about the z axis that lies inside the beam of every
        single view. False: the largest circle whose every point is crossed by rays of every
        view on at least one side of the axis, i.e. what a full turn with an offset (half-fan)
        detector covers.

    Returns
    -------
    float
        Radius in mm (0 when some view's beam does not straddle the axis).

    Notes
    -----
    Per view, with the signed distances ``t_lo, t_hi`` of the two edge rays
    (:func:`edge_ray_distances_mm`), the beam straddles the axis when they have opposite
    signs; the circle seen then has radius ``min(|t_lo|, |t_hi|)`` (``max`` for
    ``every_view=False``). The result is the minimum over views. For a centred flat detector
    of width W this is ``SID * sin(atan(W / (2 SDD)))``; for a curved detector
    ``SID * sin(W / (2 SDD))``; for a parallel beam ``W / 2``.
    """
    t = edge_ray_distances_mm(poses)
    if np.any(np.isnan(t)):
        return 0.0
    straddles = t[:, 0] * t[:, 1] <= 0.0
    a = np.abs(t)
    per_view = a.min(axis=1) if every_view else a.max(axis=1)
    per_view = np.where(straddles, per_view, 0.0)
    return float(per_view.min())
