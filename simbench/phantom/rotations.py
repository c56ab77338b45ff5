"""Rotation matrices of the phantom language (pure math, radians).

Every matrix here maps an object's local frame to the frame it is placed in
(``outer = centre + Q @ local``); the compiled phantom stores the transpose, the world-to-local
rotation ``R = Q.T``.
"""

from __future__ import annotations

import math

import numpy as np


def rotation_about(axis: str, angle_rad: float) -> np.ndarray:
    """Right-handed (counter-clockwise seen from the +axis side) rotation about a world axis.

    Parameters
    ----------
    axis : {"x", "y", "z"}
    angle_rad : float
        Angle in radians.

    Returns
    -------
    ndarray (3, 3)
        The rotation matrix Q, acting on column vectors.

    Notes
    -----
    ``Q_z(t) = [[cos t, -sin t, 0], [sin t, cos t, 0], [0, 0, 1]]`` and its cyclic
    permutations for x and y.
    """
    c, s = math.cos(angle_rad), math.sin(angle_rad)
    if axis == "x":
        return np.array([[1.0, 0.0, 0.0], [0.0, c, -s], [0.0, s, c]])
    if axis == "y":
        return np.array([[c, 0.0, s], [0.0, 1.0, 0.0], [-s, 0.0, c]])
    if axis == "z":
        return np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])
    raise ValueError(f"axis must be x, y or z, got {axis!r}")


def compose_world_rotations(steps: list[tuple[str, float]]) -> np.ndarray:
    """The rotation of a list of rotations about the fixed world axes, applied in order.

    Parameters
    ----------
    steps : list of (axis, angle_rad)
        ``[("x", a1), ("z", a2)]`` first turns the object by a1 about x, then by a2 about z.

    Returns
    -------
    ndarray (3, 3)
        ``Q = Q_n @ ... @ Q_2 @ Q_1`` (extrinsic rotations: each about the fixed axes).
    """
    q = np.eye(3)
    for axis, angle in steps:
        q = rotation_about(axis, angle) @ q
    return q


def align_z_to(direction: np.ndarray) -> np.ndarray:
    """The smallest rotation that turns the unit vector +z onto ``direction``.

    Parameters
    ----------
    direction : array (3,)
        Any non-zero vector (normalised here).

    Returns
    -------
    ndarray (3, 3)
        Q with ``Q @ (0, 0, 1) = direction / |direction|``.

    Notes
    -----
    Rodrigues' formula about the axis ``k = z x a / |z x a|`` by the angle between z and a:
    ``Q = I + [v]_x + [v]_x^2 / (1 + c)`` with ``v = z x a``, ``c = z . a``. For ``a = -z``
    (c = -1) it is the half turn about x, ``diag(1, -1, -1)``.
    """
    a = np.asarray(direction, dtype=np.float64)
    a = a / np.max(np.abs(a))  # first to about 1, so that the norm neither overflows nor underflows
    a = a / np.linalg.norm(a)
    c = a[2]
    if c <= -1.0 + 1e-15:
        return np.diag([1.0, -1.0, -1.0])
    v = np.array([-a[1], a[0], 0.0])  # (0, 0, 1) x a
    vx = np.array([[0.0, -v[2], v[1]], [v[2], 0.0, -v[0]], [-v[1], v[0], 0.0]])
    return np.eye(3) + vx + vx @ vx / (1.0 + c)
