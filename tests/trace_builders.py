"""Test helpers for the tracer: compiled objects, phantoms and poses built by hand.

Poses follow ARCHITECTURE.md directly (view angle phi: central ray d = (-sin phi, cos phi, 0),
column axis u = (cos phi, sin phi, 0), row axis v = +z; source at -SID d, flat detector
centre at (SDD - SID) d), so the tracer tests do not depend on the geometry package.
"""

from __future__ import annotations

import numpy as np

from simbench.geometry.poses import Poses
from simbench.materials.spec import MaterialSpec
from simbench.phantom.compiled import (
    ADD, BOX, CONE, CYLINDER, ELLIPSE_2D, ELLIPSOID, POLYGON_2D, RECTANGLE_2D, REPLACE,
    CompiledObjects, Phantom, VoxelVolume,
)

CODES = {"ellipsoid": ELLIPSOID, "ellipse": ELLIPSE_2D, "box": BOX,
         "rectangle": RECTANGLE_2D, "cylinder": CYLINDER, "cone": CONE,
         "polygon": POLYGON_2D}


def rot_z(angle_rad: float) -> np.ndarray:
    """World-to-local rotation of an object turned by ``angle_rad`` about z (counter-clockwise)."""
    c, s = np.cos(angle_rad), np.sin(angle_rad)
    return np.array([[c, s, 0.0], [-s, c, 0.0], [0.0, 0.0, 1.0]])


def random_rotation(rng: np.random.Generator) -> np.ndarray:
    """A random proper rotation (QR of a Gaussian matrix)."""
    q, r = np.linalg.qr(rng.normal(size=(3, 3)))
    q = q * np.sign(np.diag(r))
    if np.linalg.det(q) < 0:
        q[:, 0] = -q[:, 0]
    return q


def obj(kind: str, centre=(0.0, 0.0, 0.0), half_sizes=(1.0, 1.0, 1.0), rotation=None,
        mode: str = "replace", material: int = 0, radii=(0.0, 0.0), vertices=None) -> dict:
    """One object description for :func:`compile_objects`."""
    return dict(kind=kind, centre=centre, half_sizes=half_sizes,
                rotation=np.eye(3) if rotation is None else np.asarray(rotation, float),
                mode=REPLACE if mode == "replace" else ADD, material=material,
                radii=radii, vertices=vertices)


def compile_objects(items: list[dict]) -> CompiledObjects:
    """Flat arrays of the contract in ``simbench/phantom/compiled.py``."""
    k = len(items)
    shape = np.zeros(k, np.int64)
    centre = np.zeros((k, 3))
    rotation = np.zeros((k, 3, 3))
    half = np.zeros((k, 3))
    params = np.zeros((k, 4))
    mode = np.zeros(k, np.int64)
    material = np.zeros(k, np.int64)
    poly_start = np.zeros(k, np.int64)
    poly_count = np.zeros(k, np.int64)
    poly = []
    bound = np.zeros(k)
    n_poly = 0
    for i, it in enumerate(items):
        code = CODES[it["kind"]]
        shape[i] = code
        centre[i] = it["centre"]
        rotation[i] = it["rotation"]
        mode[i] = it["mode"]
        material[i] = it["material"]
        hs = np.array(it["half_sizes"], float)
        if code == CONE:
            r0, r1 = it["radii"]
            params[i, :2] = (r0, r1)
            hs = np.array([max(r0, r1), max(r0, r1), hs[2]])
        if code == POLYGON_2D:
            v = np.asarray(it["vertices"], float)
            poly.append(v)
            poly_start[i] = n_poly
            poly_count[i] = len(v)
            n_poly += len(v)
            bound[i] = np.sqrt((v ** 2).sum(axis=1)).max()
            hs = np.array([np.abs(v[:, 0]).max(), np.abs(v[:, 1]).max(), np.inf])
        elif code in (ELLIPSE_2D, RECTANGLE_2D):
            hs[2] = np.inf
            bound[i] = np.hypot(hs[0], hs[1]) if code == RECTANGLE_2D else hs[:2].max()
        elif code in (BOX, CYLINDER, CONE):
            bound[i] = np.sqrt(hs[0] ** 2 + hs[1] ** 2 + hs[2] ** 2) if code == BOX else \
                np.hypot(hs[:2].max(), hs[2])
        else:
            bound[i] = hs.max()
        half[i] = hs
    poly_xy = np.concatenate(poly) if poly else np.zeros((0, 2))
    return CompiledObjects(shape, centre, rotation, half, params, mode, material, poly_start,
                           poly_count, poly_xy, bound, np.zeros(k, np.int64),
                           np.zeros(k, bool))


def mu_materials(n: int) -> tuple:
    return tuple(MaterialSpec(name=f"m{i}", kind="mu", mu_per_mm=0.0) for i in range(n))


def phantom_of(items: list[dict], n_materials: int | None = None, dimension: int = 3) -> Phantom:
    objects = compile_objects(items)
    if n_materials is None:
        n_materials = int(objects.material.max()) + 1 if objects.count else 1
    return Phantom("test", dimension, mu_materials(n_materials), objects)


def voxel_phantom(values: np.ndarray, spacing_mm, centre_mm=(0.0, 0.0, 0.0), kind="labels",
                  label_material=None, n_materials=None, dimension=None) -> Phantom:
    values = np.asarray(values)
    if values.ndim == 2:
        values = values[None]
    if dimension is None:
        dimension = 2 if values.shape[0] == 1 else 3
    if kind == "mu":
        n_materials = 1
        label_material = np.zeros(0, np.int64)
    else:
        if label_material is None:
            label_material = np.array([-1] + list(range(int(values.max()))), np.int64)
        n_materials = n_materials or int(np.max(label_material)) + 1
    vox = VoxelVolume(values, kind, tuple(spacing_mm), tuple(centre_mm),
                      np.asarray(label_material, np.int64))
    empty = compile_objects([])
    return Phantom("voxels", dimension, mu_materials(n_materials), empty, vox)


def _axes(angles):
    a = np.asarray(angles, float)
    d = np.stack([-np.sin(a), np.cos(a), np.zeros_like(a)], axis=1)
    u = np.stack([np.cos(a), np.sin(a), np.zeros_like(a)], axis=1)
    v = np.tile([0.0, 0.0, 1.0], (a.size, 1))
    return a, d, u, v


def cells(n: int, pitch: float, offset: float = 0.0) -> np.ndarray:
    """Cell centres (ARCHITECTURE.md): (j - (n - 1) / 2) * pitch + offset."""
    return (np.arange(n) - (n - 1) / 2.0) * pitch + offset


def parallel_poses(angles, n_cols: int, pitch: float, n_rows: int = 1, pitch_v: float = 1.0,
                   offset_u: float = 0.0, detector_distance: float = 300.0,
                   dimension: int | None = None) -> Poses:
    a, d, u, v = _axes(angles)
    if dimension is None:
        dimension = 2 if n_rows == 1 else 3
    return Poses(True, np.zeros_like(d), d, detector_distance * d, u, v, False,
                 cells(n_cols, pitch, offset_u), cells(n_rows, pitch_v), pitch, pitch_v, a,
                 dimension)


def divergent_poses(angles, sid: float, sdd: float, n_cols: int, pitch: float, n_rows: int = 1,
                    pitch_v: float = 1.0, curved: bool = False, offset_u: float = 0.0,
                    z_shift=None, dimension: int | None = None) -> Poses:
    """Fan (one row) or cone beam; ``pitch`` is arc length for curved detectors."""
    a, d, u, v = _axes(angles)
    if dimension is None:
        dimension = 2 if n_rows == 1 else 3
    src = -sid * d
    det = (sdd - sid) * d
    if z_shift is not None:
        src = src.copy()
        det = det.copy()
        src[:, 2] += z_shift
        det[:, 2] += z_shift
    return Poses(False, src, d, det, u, v, curved, cells(n_cols, pitch, offset_u),
                 cells(n_rows, pitch_v), pitch, pitch_v, a, dimension)


def rotated_poses(poses: Poses, rotation: np.ndarray) -> Poses:
    """The same poses turned rigidly by ``rotation`` (world to world)."""
    r = np.asarray(rotation)
    return Poses(poses.parallel, poses.source @ r.T, poses.direction @ r.T,
                 poses.detector_centre @ r.T, poses.u_axis @ r.T, poses.v_axis @ r.T,
                 poses.curved, poses.col_u_mm, poses.row_v_mm, poses.pitch_u_mm,
                 poses.pitch_v_mm, poses.angles_rad * np.nan, 3)


def line_poses(origins, directions, segment=None) -> Poses:
    """One view per line: a parallel view through ``origins`` along ``directions`` (whole
    lines), or a divergent view from ``origins`` to ``origins + segment * directions``."""
    d = directions / np.linalg.norm(directions, axis=1, keepdims=True)
    helper = np.where(np.abs(d[:, 2:3]) < 0.9, [[0.0, 0.0, 1.0]], [[1.0, 0.0, 0.0]])
    u = np.cross(helper, d)
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    v = np.cross(d, u)
    n = d.shape[0]
    if segment is None:
        return Poses(True, np.zeros((n, 3)), d, origins.copy(), u, v, False, np.zeros(1),
                     np.zeros(1), 1.0, 1.0, np.full(n, np.nan), 3)
    det = origins + segment[:, None] * d
    return Poses(False, origins.copy(), d, det, u, v, False, np.zeros(1), np.zeros(1), 1.0,
                 1.0, np.full(n, np.nan), 3)


def random_lines(rng, centre, reach, n=48, far=400.0):
    """Lines passing at distances 0..1.3 reach from ``centre``, starting ~``far`` away."""
    d = rng.normal(size=(n, 3))
    d /= np.linalg.norm(d, axis=1, keepdims=True)
    perp = np.cross(d, rng.normal(size=(n, 3)))
    perp /= np.linalg.norm(perp, axis=1, keepdims=True)
    dist = rng.uniform(0.0, 1.3, n) * reach
    start = np.asarray(centre) + dist[:, None] * perp - far * d
    return start, d


def planar_lines(rng, centre, reach, n=48, far=400.0):
    """Lines in the plane z = centre z (2-D scanners)."""
    ang = rng.uniform(0, 2 * np.pi, n)
    d = np.stack([np.cos(ang), np.sin(ang), np.zeros(n)], axis=1)
    perp = np.stack([-np.sin(ang), np.cos(ang), np.zeros(n)], axis=1)
    dist = rng.uniform(-1.3, 1.3, n) * reach
    start = np.asarray(centre) + dist[:, None] * perp - far * d
    return start, d


# Shepp–Logan head phantom: Kak & Slaney, Principles of Computerized Tomographic Imaging
# (IEEE Press 1988; SIAM 2001), ch. 3, Table 3.1 (values recalled from memory): centre
# (x, y), semi-axes (A, B), angle of A from the x axis in degrees, refractive index rho.
# Coordinates are in units of the phantom half size.
SHEPP_LOGAN_TABLE = np.array([
    # x       y        A      B       angle  rho
    [0.0,    0.0,     0.92,  0.69,   90.0,  2.0],
    [0.0,   -0.0184,  0.874, 0.6624, 90.0, -0.98],
    [0.22,   0.0,     0.31,  0.11,   72.0, -0.02],
    [-0.22,  0.0,     0.41,  0.16,  108.0, -0.02],
    [0.0,    0.35,    0.25,  0.21,   90.0,  0.01],
    [0.0,    0.1,     0.046, 0.046,   0.0,  0.01],
    [0.0,   -0.1,     0.046, 0.046,   0.0,  0.01],
    [-0.08, -0.605,   0.046, 0.023,   0.0,  0.01],
    [0.0,   -0.606,   0.023, 0.023,   0.0,  0.01],  # -0.606 in Table 3.1 (some print -0.605)
    [0.06,  -0.605,   0.046, 0.023,  90.0,  0.01],
])


def shepp_logan(scale_mm: float = 100.0) -> tuple[Phantom, np.ndarray]:
    """The ten Shepp–Logan ellipses as 2-D ellipses in add mode, one material each.

    Returns the phantom and mu of each material (1/mm) = rho / scale_mm (invented scaling
    so that line integrals stay of order one).
    """
    items = []
    for i, (x, y, a, b, ang, rho) in enumerate(SHEPP_LOGAN_TABLE):
        items.append(obj("ellipse", centre=(x * scale_mm, y * scale_mm, 0.0),
                         half_sizes=(a * scale_mm, b * scale_mm, 1.0),
                         rotation=rot_z(np.radians(ang)), mode="add", material=i))
    phantom = phantom_of(items, dimension=2)
    return phantom, SHEPP_LOGAN_TABLE[:, 5] / scale_mm
