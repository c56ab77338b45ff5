"""One ray per detector point, from the pose form (numba, shared by the tracer and the tests)."""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from simbench.geometry.poses import Poses


# inlined by LLVM into the tracer's per-ray loops, without reference counting (it allocates
# nothing; counting would cost atomic operations on every ray)
@njit(cache=True, _nrt=False, forceinline=True)
def detector_ray(parallel, curved, source, direction, detector_centre, u_axis, v_axis,
                 view, u_mm, v_mm, spot_u_mm, spot_v_mm):
    """The ray of view ``view`` that ends at detector point (u_mm, v_mm).

    Parameters
    ----------
    parallel, curved : bool
        As in :class:`~simbench.geometry.poses.Poses`.
    source, direction, detector_centre, u_axis, v_axis : float64 (V, 3)
        The pose arrays.
    view : int
    u_mm, v_mm : float
        Detector coordinates of the point (arc length along u for curved detectors).
    spot_u_mm, spot_v_mm : float
        Offset of the emission point from the focal spot centre along u and v (divergent
        beams; ignored for parallel beams).

    Returns
    -------
    ox, oy, oz, dx, dy, dz, t_min, t_max : float
        Origin, unit direction and the parameter range of the ray: the whole line
        (-inf, inf) for parallel beams, [0, distance to the detector point] for divergent.
    """
    ux, uy, uz = u_axis[view, 0], u_axis[view, 1], u_axis[view, 2]
    vx, vy, vz = v_axis[view, 0], v_axis[view, 1], v_axis[view, 2]
    cx, cy, cz = detector_centre[view, 0], detector_centre[view, 1], detector_centre[view, 2]
    if parallel:
        dx, dy, dz = direction[view, 0], direction[view, 1], direction[view, 2]
        return (cx + u_mm * ux + v_mm * vx, cy + u_mm * uy + v_mm * vy, cz + u_mm * uz + v_mm * vz,
                dx, dy, dz, -np.inf, np.inf)
    sx, sy, sz = source[view, 0], source[view, 1], source[view, 2]
    if curved:
        wx, wy, wz = cx - sx, cy - sy, cz - sz
        radius = math.sqrt(wx * wx + wy * wy + wz * wz)
        wx /= radius
        wy /= radius
        wz /= radius
        gamma = u_mm / radius
        cg, sg = math.cos(gamma) * radius, math.sin(gamma) * radius
        px = sx + cg * wx + sg * ux + v_mm * vx
        py = sy + cg * wy + sg * uy + v_mm * vy
        pz = sz + cg * wz + sg * uz + v_mm * vz
    else:
        px = cx + u_mm * ux + v_mm * vx
        py = cy + u_mm * uy + v_mm * vy
        pz = cz + u_mm * uz + v_mm * vz
    ox = sx + spot_u_mm * ux + spot_v_mm * vx
    oy = sy + spot_u_mm * uy + spot_v_mm * vy
    oz = sz + spot_u_mm * uz + spot_v_mm * vz
    dx, dy, dz = px - ox, py - oy, pz - oz
    length = math.sqrt(dx * dx + dy * dy + dz * dz)
    return ox, oy, oz, dx / length, dy / length, dz / length, 0.0, length


@njit(cache=True)
def _rays_kernel(parallel, curved, source, direction, centre, u_axis, v_axis, views, u, v, out):
    for i in range(views.shape[0]):
        for k in range(v.shape[0]):
            for j in range(u.shape[0]):
                r = detector_ray(parallel, curved, source, direction, centre, u_axis, v_axis,
                                 views[i], u[j], v[k], 0.0, 0.0)
                for q in range(8):
                    out[i, k, j, q] = r[q]


def cell_rays(poses: Poses, views=None) -> np.ndarray:
    """Rays through every cell centre, for inspection and tests.

    Parameters
    ----------
    poses : Poses
    views : array of int, optional
        View indices (default all).

    Returns
    -------
    ndarray (n_views, n_rows, n_cols, 8)
        ``ox, oy, oz, dx, dy, dz, t_min, t_max`` per cell (see :func:`detector_ray`).
    """
    views = np.arange(poses.n_views) if views is None else np.asarray(views, dtype=np.int64)
    out = np.empty((views.shape[0], poses.n_rows, poses.n_cols, 8))
    _rays_kernel(poses.parallel, poses.curved, poses.source, poses.direction,
                 poses.detector_centre, poses.u_axis, poses.v_axis, views,
                 poses.col_u_mm, poses.row_v_mm, out)
    return out
