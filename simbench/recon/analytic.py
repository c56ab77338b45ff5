"""Analytic reference reconstructions: filtered backprojection (parallel and fan beam) and FDK.

All functions take ``(poses, projections, grid, **options)`` and return the image in 1/mm as
float32 (sums over views in float64). ``poses`` must describe a circular scan about the z axis
in the conventions of ARCHITECTURE.md (view angle phi, central ray ``d(phi) = (-sin phi,
cos phi, 0)``, column axis ``u(phi) = (cos phi, sin phi, 0)``, row axis +z; source at
``-SID d(phi)``, flat detector centre at ``(SDD - SID) d(phi)``), with equally spaced views.

The scan's redundancy is handled by weights ``rho`` on every (view, column) whose values on
the two measurements of one line sum to 1 (:func:`redundancy_weights`):

* a full turn: ``rho = 1/2`` on a centred detector (a detector offset by up to two cells,
  such as a quarter-cell offset, counts as centred; the few cells past the mirror of the
  short edge, measured once, get ``rho = 1``); an offset (half-fan) detector gets a smooth
  ``sin^2`` ramp across the region seen from both sides (Wang 2002), so the whole field of
  view of the wider side is reconstructed (the filtered projections are kept on zero columns
  added past the short side, where the ramp filter's tails still carry signal);
* less than a turn but at least 180 degrees plus the fan angle: Parker weights (Parker 1982)
  for the arc actually scanned (the over-scan form, with ``delta = (arc - pi) / 2`` in place
  of the half fan angle); parallel beams are the case of zero fan angle.

Options (every function): ``filter`` (``"ramp"``, ``"shepp-logan"``, ``"cosine"``,
``"hamming"``, ``"hann"``; default ``"ramp"``) and ``cutoff`` (fraction of the Nyquist
frequency, ``0 < cutoff <= 1``, default 1).

References
----------
A. C. Kak and M. Slaney, *Principles of Computerized Tomographic Imaging* (IEEE Press, 1988),
ch. 3 (parallel- and fan-beam filtered backprojection).
D. L. Parker, "Optimal short scan convolution reconstruction for fan beam CT",
Med. Phys. 9(2), 254-257 (1982).
L. A. Feldkamp, L. C. Davis and J. W. Kress, "Practical cone-beam algorithm",
J. Opt. Soc. Am. A 1(6), 612-619 (1984).
G. Wang, "X-ray micro-CT with a displaced detector array", Med. Phys. 29(7), 1634-1636 (2002).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from simbench.errors import InputError, Where
from simbench.geometry.grid import ImageGrid
from simbench.geometry.poses import Poses
from simbench.recon import backprojection_kernels as kernels
from simbench.recon.filters import apply_spectrum, check_window, filter_spectrum, padded_length

_WHERE = "<arguments>"
#: options every function accepts, with their defaults
OPTIONS = {"filter": "ramp", "cutoff": 1.0}
#: a detector offset by at most this many cells from centre is treated as centred
CENTRED_CELLS = 2.0
#: geometric tolerance on the poses, relative to the scan's size
_POSE_TOLERANCE = 1e-6
#: bytes of filtered projections and FFT work space held at once, at most
_BLOCK_BYTES = 256 * 2**20


def _fail(field: str, problem: str, valid: str) -> InputError:
    return InputError(Where(_WHERE, field=field), problem, valid)


@dataclass(frozen=True)
class CircularScan:
    """What the analytic methods need to know about a circular scan (derived from poses).

    Attributes
    ----------
    mode : int
        0 parallel, 1 flat detector, 2 equiangular curved detector.
    sid_mm, sdd_mm : float
        Source-to-axis and source-to-detector distances (0 for parallel beams).
    z_mm : float
        z of the source orbit (parallel: 0).
    step_rad : float
        Signed angle between successive views (negative for clockwise scans).
    arc_rad : float
        ``n_views * |step|``: the angle the views stand for.
    """

    mode: int
    sid_mm: float
    sdd_mm: float
    z_mm: float
    step_rad: float
    arc_rad: float


def circular_scan(poses: Poses) -> CircularScan:
    """Check that ``poses`` is a circular scan with equal steps and describe it.

    Parameters
    ----------
    poses : Poses

    Returns
    -------
    CircularScan

    Raises
    ------
    InputError
        For poses that are not a circular scan about z in the ARCHITECTURE.md conventions
        (user poses, helical scans, tilted detectors, unequal angle steps).
    """
    if not isinstance(poses, Poses):
        raise _fail("poses", f"got {type(poses).__name__}", "a simbench.geometry.poses.Poses")
    angles = np.asarray(poses.angles_rad, dtype=np.float64)
    if angles.shape[0] < 2 or not np.all(np.isfinite(angles)):
        raise _fail("poses", "the views have no view angles (or fewer than two views)",
                    "a circular scan of at least two views with known angles")
    steps = np.diff(angles)
    step = float(np.mean(steps))
    if step == 0.0 or np.max(np.abs(steps - step)) > 1e-6 * abs(step):
        raise _fail("poses", "the view angles are not equally spaced",
                    "a circular scan with equal angle steps")
    c, s = np.cos(angles), np.sin(angles)
    zero = np.zeros_like(angles)
    d = np.stack([-s, c, zero], axis=1)
    u = np.stack([c, s, zero], axis=1)
    v = np.tile([0.0, 0.0, 1.0], (angles.shape[0], 1))
    tol = _POSE_TOLERANCE
    if not (np.allclose(poses.direction, d, rtol=0, atol=tol)
            and np.allclose(poses.u_axis, u, rtol=0, atol=tol)
            and np.allclose(poses.v_axis, v, rtol=0, atol=tol)):
        raise _fail("poses", "the ray directions or detector axes do not follow the view "
                    "angles of a circular scan about z",
                    "poses from parallel_poses, fan_poses or cone_poses (circular)")
    arc = angles.shape[0] * abs(step)
    if poses.parallel:
        return CircularScan(kernels.PARALLEL, 0.0, 0.0, 0.0, step, arc)
    sid_each = -np.sum(poses.source[:, :2] * d[:, :2], axis=1)
    sid = float(np.mean(sid_each))
    centre = poses.detector_centre - poses.source
    sdd = float(np.mean(np.linalg.norm(centre, axis=1)))
    z0 = float(poses.source[0, 2])
    scale = tol * max(sdd, 1.0)
    want_source = -sid * d + np.array([0.0, 0.0, z0])
    if not (sid > 0 and np.allclose(poses.source, want_source, rtol=0, atol=scale)
            and np.allclose(centre, sdd * d, rtol=0, atol=scale)):
        raise _fail("poses", "the source and detector do not move on one circle about z "
                    "(helical scan or user poses)",
                    "a circular fan or cone scan (fan_poses, cone_poses without table feed)")
    mode = kernels.CURVED if poses.curved else kernels.FLAT
    return CircularScan(mode, sid, sdd, z0, step, arc)


def _fan_angles(scan: CircularScan, col_u_mm: np.ndarray) -> np.ndarray:
    """Fan angle gamma of each column (0 for parallel beams), radians."""
    if scan.mode == kernels.PARALLEL:
        return np.zeros_like(col_u_mm)
    if scan.mode == kernels.CURVED:
        return col_u_mm / scan.sdd_mm
    return np.arctan(col_u_mm / scan.sdd_mm)


def parker_weight(beta, gamma, delta):
    """Parker's short-scan weight for the over-scan arc ``pi + 2 delta``.

    Parameters
    ----------
    beta : float or array
        Angle into the scan, ``0 <= beta <= pi + 2 delta``, radians.
    gamma : float or array
        Fan angle, signed so that the other measurement of the same line is at
        ``(beta + pi + 2 gamma, -gamma)``; ``|gamma| <= delta``.
    delta : float
        Half the over-scan, ``(arc - pi) / 2``, radians (>= 0).

    Returns
    -------
    float64 array
        ``sin^2(pi/4 * beta / (delta - gamma))`` for ``beta < 2 (delta - gamma)``;
        1 up to ``pi - 2 gamma``; ``sin^2(pi/4 * (pi + 2 delta - beta) / (delta + gamma))``
        up to ``pi + 2 delta``; 0 beyond. The two measurements of a line sum to 1.

    References
    ----------
    D. L. Parker, Med. Phys. 9(2), 254-257 (1982) (with ``delta`` the half fan angle).
    """
    beta = np.asarray(beta, dtype=np.float64)
    gamma = np.asarray(gamma, dtype=np.float64)
    beta, gamma = np.broadcast_arrays(beta, gamma)
    rise = np.maximum(delta - gamma, 1e-300)
    fall = np.maximum(delta + gamma, 1e-300)
    w = np.ones(beta.shape)
    first = beta < 2.0 * (delta - gamma)
    w[first] = np.sin(0.25 * np.pi * beta[first] / rise[first]) ** 2
    last = beta > np.pi - 2.0 * gamma
    w[last] = np.sin(0.25 * np.pi * np.clip(np.pi + 2.0 * delta - beta[last], 0.0, None)
                     / fall[last]) ** 2
    w[beta > np.pi + 2.0 * delta] = 0.0
    return w


def offset_weight(u, overlap):
    """Redundancy weight across an offset (half-fan) detector, along its column axis.

    Parameters
    ----------
    u : float or array
        Column coordinate (mm; arc length on curved detectors), signed so that the detector
        reaches further toward +u.
    overlap : float
        Half-width of the central region seen from both sides (the short side's reach), mm.

    Returns
    -------
    float64 array
        0 for ``u <= -overlap``, ``sin^2(pi/4 (1 + u / overlap))`` between, 1 for
        ``u >= overlap``; ``w(u) + w(-u) = 1``.

    References
    ----------
    G. Wang, Med. Phys. 29(7), 1634-1636 (2002).
    """
    x = np.clip(np.asarray(u, dtype=np.float64) / overlap, -1.0, 1.0)
    return np.sin(0.25 * np.pi * (1.0 + x)) ** 2


def _detector_reach(poses: Poses) -> tuple[float, float]:
    """(short side reach, long side reach) of the detector from its centre line, mm; the
    long side's sign is returned as the sign of the second value."""
    lo = float(poses.col_u_mm[0] - poses.pitch_u_mm / 2.0)
    hi = float(poses.col_u_mm[-1] + poses.pitch_u_mm / 2.0)
    if lo >= 0.0 or hi <= 0.0:
        raise _fail("poses", "the detector does not cover the centre of rotation",
                    "a detector whose columns reach both sides of the central ray")
    if hi >= -lo:
        return -lo, hi
    return hi, lo


def redundancy_weights(poses: Poses) -> tuple[np.ndarray, np.ndarray]:
    """Redundancy weights of a circular scan and the quadrature weight of each view.

    Parameters
    ----------
    poses : Poses
        A circular parallel, fan or cone scan with equal angle steps.

    Returns
    -------
    rho : float64 (V, C)
        Weight of each (view, column); the measurements of one line sum to 1.
    view_rad : float64 (V,)
        Angle each view stands for, radians (``|step|``; halved for the first and last view
        of a turn whose last view repeats the first).

    Notes
    -----
    A full turn (``n |step|`` equals 2 pi, or 2 pi plus one step) uses ``rho = 1/2`` on a
    centred detector and the offset-detector ramp :func:`offset_weight` over the region seen
    from both sides on a detector offset by more than two cells. A shorter arc of at least
    ``pi + 2 gamma_max`` uses :func:`parker_weight` with ``delta = (arc - pi) / 2``, with the
    angle into the scan measured from the start of the first view's share,
    ``beta_i = |phi_i - phi_0| + |step| / 2``.

    References
    ----------
    D. L. Parker, Med. Phys. 9(2), 254-257 (1982); G. Wang, Med. Phys. 29(7), 1634-1636 (2002).
    """
    scan = circular_scan(poses)
    n_views, n_cols = poses.n_views, poses.n_cols
    step = abs(scan.step_rad)
    view_rad = np.full(n_views, step)
    col = np.asarray(poses.col_u_mm, dtype=np.float64)
    short_reach, long_reach = _detector_reach(poses)
    centred = abs(long_reach) - short_reach <= CENTRED_CELLS * poses.pitch_u_mm
    full = abs(scan.arc_rad - 2.0 * math.pi) <= 0.01 * step
    repeats = abs(scan.arc_rad - 2.0 * math.pi - step) <= 0.01 * step
    if full or repeats:
        if repeats:
            view_rad[[0, -1]] = step / 2.0
        signed = col * math.copysign(1.0, long_reach)
        if centred:
            row = np.where(signed > short_reach, 1.0, 0.5)
        else:
            row = offset_weight(signed, short_reach)
        return np.tile(row, (n_views, 1)), view_rad
    if scan.arc_rad > 2.0 * math.pi:
        raise _fail("poses", f"the views cover {math.degrees(scan.arc_rad):.6g} degrees, more "
                    "than one turn", "a circular scan of at most one turn")
    gamma = _fan_angles(scan, col)
    edges = _fan_angles(scan, np.array([col[0] - poses.pitch_u_mm / 2.0,
                                        col[-1] + poses.pitch_u_mm / 2.0]))
    need = math.pi + 2.0 * float(np.max(np.abs(edges)))
    if scan.arc_rad < need - 0.01 * step:
        raise _fail("poses", f"the views cover {math.degrees(scan.arc_rad):.6g} degrees, less "
                    f"than 180 degrees plus the fan angle ({math.degrees(need):.6g} degrees)",
                    "a full turn or a short scan of at least 180 degrees plus the fan angle")
    if not centred:
        raise _fail("poses", "a scan of less than a turn with an offset detector",
                    "a full turn for an offset (half-fan) detector, or a centred detector")
    delta = max((scan.arc_rad - math.pi) / 2.0, float(np.max(np.abs(edges))))
    beta = np.abs(np.asarray(poses.angles_rad) - poses.angles_rad[0]) + step / 2.0
    # the other measurement of the line (beta, gamma) is at beta + pi - 2 gamma for a
    # counterclockwise scan and beta + pi + 2 gamma for a clockwise one (ARCHITECTURE.md
    # frame, gamma turning the ray toward +u)
    gamma_parker = -gamma if scan.step_rad > 0 else gamma
    return parker_weight(beta[:, None], gamma_parker[None, :], delta), view_rad


def _options(options: dict) -> tuple[str, float]:
    unknown = sorted(set(options) - set(OPTIONS))
    if unknown:
        raise _fail(unknown[0], "is not an option of the analytic reconstructions",
                    ", ".join(OPTIONS))
    merged = {**OPTIONS, **options}
    return check_window(merged["filter"], merged["cutoff"])


def _check_arrays(poses: Poses, projections, grid) -> np.ndarray:
    if not isinstance(grid, ImageGrid):
        raise _fail("grid", f"got {type(grid).__name__}", "a simbench.geometry.grid.ImageGrid")
    if grid.dimension != poses.dimension:
        raise _fail("grid", f"a {grid.dimension}-D grid for a {poses.dimension}-D scan",
                    f"a {poses.dimension}-D grid")
    if min(grid.shape) < 1 or not all(
            math.isfinite(s) and s > 0 for s in grid.spacing_mm[:grid.dimension]):
        raise _fail("grid", f"shape {grid.shape} spacing {grid.spacing_mm}",
                    "at least one voxel and positive spacing")
    try:
        data = np.asarray(projections)
    except Exception:  # noqa: BLE001 - anything that is not an array
        data = np.asarray(None)
    if data.dtype.kind not in "iuf":
        raise _fail("projections", f"got {data.dtype} data", "a real-valued numeric array")
    if data.shape != poses.projection_shape:
        raise _fail("projections", f"shape {data.shape} does not match the scan",
                    f"shape {poses.projection_shape} (views, {'rows, ' * (poses.dimension == 3)}"
                    "columns)")
    if not np.all(np.isfinite(data)):
        raise _fail("projections", "contains NaN or infinite values",
                    "finite line integrals (replace or interpolate bad cells first)")
    return data


def _check_grid_inside_orbit(scan: CircularScan, grid: ImageGrid) -> None:
    if scan.mode == kernels.PARALLEL:
        return
    xs, ys = grid.axis_mm("x"), grid.axis_mm("y")
    reach = math.hypot(max(abs(xs[0]), abs(xs[-1])), max(abs(ys[0]), abs(ys[-1])))
    if reach >= scan.sid_mm:
        raise _fail("grid", f"reaches {reach:.6g} mm from the axis, beyond the source orbit "
                    f"({scan.sid_mm:.6g} mm)", "a grid inside the source orbit")


def _check_memory(grid: ImageGrid, block_bytes: float) -> None:
    from simbench.budget import check_bytes

    n_voxels = float(np.prod(grid.shape))
    check_bytes(n_voxels * 12.0 + block_bytes, Where(_WHERE, field="grid"),
                f"a reconstruction on a {' x '.join(map(str, grid.image_shape))} grid",
                "a smaller grid")


def _prepare(poses, projections, grid, options):
    window, cutoff = _options(options)
    scan = circular_scan(poses)
    data = _check_arrays(poses, projections, grid)
    _check_grid_inside_orbit(scan, grid)
    rho, view_rad = redundancy_weights(poses)
    return window, cutoff, scan, data, rho, view_rad


def _column_weights(scan: CircularScan, poses: Poses, rho: np.ndarray, view_rad: np.ndarray
                    ) -> tuple[np.ndarray, float]:
    """Weights applied before filtering, per (view, column) and the filter spacing."""
    col = np.asarray(poses.col_u_mm, dtype=np.float64)
    weights = rho * view_rad[:, None]
    if scan.mode == kernels.PARALLEL:
        return weights, float(poses.pitch_u_mm)
    if scan.mode == kernels.FLAT:
        # the ramp over the detector's own pitch is SDD / SID times the ramp over the same
        # cells projected to the axis; the kernel divides by a^2 (a: depth along the central
        # ray), which with SID^2 gives the (SID / a)^2 of Kak & Slaney
        return weights * (scan.sid_mm * scan.sdd_mm), float(poses.pitch_u_mm)
    gamma = col / scan.sdd_mm
    return weights * (scan.sid_mm * np.cos(gamma))[None, :], poses.pitch_u_mm / scan.sdd_mm


def _cone_cosines(scan: CircularScan, poses: Poses) -> np.ndarray:
    """Cosine of each cell's ray against the central ray (flat) or against the plane of the
    orbit (curved: the fan part ``cos gamma`` is in :func:`_column_weights`), (R, C)."""
    col = np.asarray(poses.col_u_mm, dtype=np.float64)[None, :]
    row = np.asarray(poses.row_v_mm, dtype=np.float64)[:, None]
    sdd = scan.sdd_mm
    if scan.mode == kernels.FLAT:
        return sdd / np.sqrt(sdd * sdd + col * col + row * row)
    if scan.mode == kernels.CURVED:
        return np.broadcast_to(sdd / np.sqrt(sdd * sdd + row * row), (row.shape[0], col.shape[1]))
    return np.ones((row.shape[0], col.shape[1]))


def view_geometry(poses: Poses) -> np.ndarray:
    """Per view ``ox, oy, oz, wx, wy, ux, uy`` for the kernels, float64 (V, 7): the origin
    (detector centre for parallel beams, source otherwise), central direction and column
    axis."""
    origin = poses.detector_centre if poses.parallel else poses.source
    return np.ascontiguousarray(np.column_stack([
        origin[:, 0], origin[:, 1], origin[:, 2], poses.direction[:, 0],
        poses.direction[:, 1], poses.u_axis[:, 0], poses.u_axis[:, 1]]), dtype=np.float64)


def _block_views(n_per_view_bytes: float) -> int:
    return max(1, int(_BLOCK_BYTES // max(n_per_view_bytes, 1.0)))


def fbp(poses: Poses, projections, grid: ImageGrid, **options) -> np.ndarray:
    """Filtered backprojection for parallel beams (2-D, or stacked slices) and fan beams.

    Parameters
    ----------
    poses : Poses
        A circular parallel-beam scan (``dimension`` 2, or 3 with rows stacked along z) or a
        2-D fan-beam scan (flat or equiangular curved detector, any column offset), full
        turn or short scan (see the module docstring).
    projections : array (V, C), or (V, R, C) for stacked parallel beams
        Line integrals (dimensionless).
    grid : ImageGrid
        Where to reconstruct; 2-D for 2-D scans, 3-D for stacked parallel beams.
    **options
        ``filter`` (``"ramp"``, ``"shepp-logan"``, ``"cosine"``, ``"hamming"``, ``"hann"``)
        and ``cutoff`` (fraction of Nyquist, ``0 < cutoff <= 1``).

    Returns
    -------
    float32 array, ``grid.image_shape``
        mu in 1/mm.

    Notes
    -----
    Parallel beam (Kak & Slaney eq. 3.42 in discrete form), with ``q`` the ramp-filtered
    weighted projection and ``t = x cos phi + y sin phi``::

        f(x, y) = sum_i dphi_i q_i(t),   q_i = ramp * (rho_i p_i)

    Fan beam, flat detector (Kak & Slaney sec. 3.4, equally spaced collinear detectors)::

        f(r) = sum_i dphi_i (SID SDD / a^2) q_i(SDD b / a),
        q_i = ramp * (rho_i p_i SDD / sqrt(SDD^2 + u^2))

    with ``a = (r - s_i) . d_i`` and ``b = (r - s_i) . u_i``; curved (equiangular) detector::

        f(r) = sum_i dphi_i (1 / L^2) q_i(gamma*),  q_i = g * (rho_i p_i SID cos gamma),

    ``g(gamma) = (gamma / sin gamma)^2 h(gamma)``, ``L^2 = a^2 + b^2``,
    ``gamma* = atan2(b, a)``. Stacked parallel beams interpolate linearly between rows.

    References
    ----------
    A. C. Kak and M. Slaney, *Principles of Computerized Tomographic Imaging* (1988), ch. 3;
    D. L. Parker, Med. Phys. 9(2), 254-257 (1982); G. Wang, Med. Phys. 29(7), 1634-1636 (2002).

    Examples
    --------
    >>> from simbench.geometry.circular import parallel_poses
    >>> poses = parallel_poses(n_cols=65, pitch_u_mm=1.0, n_views=90)
    >>> t = poses.col_u_mm
    >>> sino = np.tile(2 * 0.02 * np.sqrt(np.clip(20.0**2 - t**2, 0, None)), (90, 1))  # disc
    >>> image = fbp(poses, sino, ImageGrid.square_2d(64, 1.0))
    >>> bool(abs(image[28:36, 28:36].mean() - 0.02) < 5e-4)
    True
    """
    if isinstance(poses, Poses) and not poses.parallel and poses.dimension == 3:
        raise _fail("poses", "a cone-beam scan", "fdk() for cone beams; fbp() takes parallel "
                    "beams and 2-D fan beams")
    return _reconstruct(poses, projections, grid, options)


def fdk(poses: Poses, projections, grid: ImageGrid, **options) -> np.ndarray:
    """FDK reconstruction of a circular cone-beam scan (flat or curved detector).

    Parameters
    ----------
    poses : Poses
        A circular cone-beam scan (``dimension`` 3, divergent), full turn (centred or offset
        half-fan detector) or short scan.
    projections : array (V, R, C)
        Line integrals.
    grid : ImageGrid
        A 3-D grid inside the source orbit.
    **options
        ``filter``, ``cutoff`` as for :func:`fbp`.

    Returns
    -------
    float32 array (nz, ny, nx)
        mu in 1/mm.

    Notes
    -----
    Each detector row is weighted and ramp-filtered along the columns, then backprojected
    along the rays (voxel-driven, linear interpolation in both directions). Flat detector::

        f(r) = sum_i dphi_i (SID SDD / a^2) q_i(SDD b / a, SDD (z - z_s) / a),
        q_i = ramp * (rho_i p_i SDD / sqrt(SDD^2 + u^2 + v^2));

    curved (cylindrical) detector::

        f(r) = sum_i dphi_i (1 / L^2) q_i(SDD atan2(b, a), SDD (z - z_s) / L),
        q_i = g * (rho_i p_i SID cos(gamma) SDD / sqrt(SDD^2 + v^2)),

    with ``a``, ``b``, ``L``, ``g`` as in :func:`fbp`. In the plane of the orbit this is the
    fan-beam formula; elsewhere it is Feldkamp's approximation (exact for objects that do not
    change along z).

    References
    ----------
    L. A. Feldkamp, L. C. Davis and J. W. Kress, J. Opt. Soc. Am. A 1(6), 612-619 (1984);
    D. L. Parker, Med. Phys. 9(2), 254-257 (1982); G. Wang, Med. Phys. 29(7), 1634-1636 (2002).
    """
    if isinstance(poses, Poses) and (poses.parallel or poses.dimension != 3):
        raise _fail("poses", "not a cone-beam scan", "fdk() takes circular cone-beam scans; "
                    "use fbp() for parallel and 2-D fan beams")
    return _reconstruct(poses, projections, grid, options)


def _mirror_columns(poses: Poses) -> tuple[int, int]:
    """Zero columns to add below and above the detector so that it reaches as far on both
    sides of the central ray.

    The ramp filter is not local: a filtered projection is needed wherever the object
    projects, also past the short side of an offset detector, where the weighted data are
    zero but their filtered values are not.
    """
    lo = float(poses.col_u_mm[0] - poses.pitch_u_mm / 2.0)
    hi = float(poses.col_u_mm[-1] + poses.pitch_u_mm / 2.0)
    extra = int(math.ceil(abs(hi + lo) / poses.pitch_u_mm - 1e-9))
    return (extra, 0) if hi + lo > 0 else (0, extra)


def _reconstruct(poses, projections, grid, options) -> np.ndarray:
    window, cutoff, scan, data, rho, view_rad = _prepare(poses, projections, grid, options)
    weights, spacing = _column_weights(scan, poses, rho, view_rad)
    cone = _cone_cosines(scan, poses)
    n_lo, n_hi = _mirror_columns(poses)
    n_cols = poses.n_cols
    n_ext = n_cols + n_lo + n_hi
    measured = slice(n_lo, n_lo + n_cols)
    n_padded = padded_length(n_ext)
    spectrum = filter_spectrum(n_padded, spacing, window, cutoff,
                               equiangular=scan.mode == kernels.CURVED)
    views_geometry = view_geometry(poses)
    xs = np.ascontiguousarray(grid.axis_mm("x"), dtype=np.float64)
    ys = np.ascontiguousarray(grid.axis_mm("y"), dtype=np.float64)
    col0 = float(poses.col_u_mm[0]) - n_lo * float(poses.pitch_u_mm)
    detector = np.array([scan.sdd_mm, col0, 1.0 / float(poses.pitch_u_mm),
                         float(poses.row_v_mm[0]), 1.0 / float(poses.pitch_v_mm)])
    n_rows = 1 if poses.dimension == 2 else poses.n_rows
    per_view = n_rows * (n_ext + 3) * 4.0 + n_rows * n_padded * 24.0
    block = _block_views(per_view)
    _check_memory(grid, min(block, poses.n_views) * per_view)
    out = np.zeros(grid.shape if poses.dimension == 3 else grid.image_shape, np.float64)
    if poses.dimension == 2:
        for start in range(0, poses.n_views, block):
            views = slice(start, min(start + block, poses.n_views))
            weighted = np.zeros((views.stop - start, n_ext))
            weighted[:, measured] = data[views] * (cone * weights[views])
            filtered = np.zeros((weighted.shape[0], n_ext + 3))
            filtered[:, 1:n_ext + 1] = apply_spectrum(weighted, spectrum, n_padded)
            kernels.backproject_2d(filtered, scan.mode, views_geometry[views], detector, xs, ys,
                                   out)
        return out.astype(np.float32)
    zs = grid.axis_mm("z")
    z_first = float(zs[0])
    dz = float(grid.spacing_mm[2])
    sub = max(1, int(32 * 2**20 // (n_rows * n_padded * 24.0)))  # views per FFT call
    for start in range(0, poses.n_views, block):
        views = slice(start, min(start + block, poses.n_views))
        n = views.stop - views.start
        filtered = np.zeros((n, n_ext + 3, n_rows + 3), np.float32)
        for first in range(0, n, sub):
            part = slice(start + first, start + min(first + sub, n))
            weighted = np.zeros((part.stop - part.start, n_rows, n_ext))
            weighted[..., measured] = data[part] * (cone[None] * weights[part, None, :])
            filtered[first:first + weighted.shape[0], 1:n_ext + 1, 1:n_rows + 1] = \
                apply_spectrum(weighted, spectrum, n_padded).transpose(0, 2, 1)
        kernels.backproject_3d(filtered, scan.mode, views_geometry[views], detector, xs, ys,
                               z_first, dz, out)
    return out.astype(np.float32)
