"""Pictures of a scanner geometry: world frame, source, detector, rays and field of view."""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np

from simbench.errors import InputError, Where
from simbench.geometry.field_of_view import field_of_view_radius_mm
from simbench.geometry.poses import Poses
from simbench.geometry.rays import cell_rays
from simbench.report.figures import finish_figure

_COLOURS = ("tab:blue", "tab:orange", "tab:green", "tab:red", "tab:purple", "tab:brown")


def _pick_views(poses: Poses, views) -> np.ndarray:
    if views is not None:
        chosen = np.asarray(views, dtype=np.int64).ravel()
        if chosen.size == 0 or chosen.min() < 0 or chosen.max() >= poses.n_views:
            raise InputError(Where("<arguments>", field="views"),
                             f"view indices {chosen.tolist()} are out of range",
                             f"indices from 0 to {poses.n_views - 1}")
        return chosen
    count = min(4, poses.n_views)
    return np.unique(np.round(np.linspace(0, poses.n_views, count, endpoint=False)).astype(int))


def _row_of(poses: Poses) -> int:
    return int(np.argmin(np.abs(poses.row_v_mm)))


def _detector_points(poses: Poses, view: int, row: int, shown_depth: float) -> np.ndarray:
    """Cell centres of one row (C, 3); parallel-beam detectors are drawn ``shown_depth`` along d."""
    rays = cell_rays(poses, [view])[0, row]
    if poses.parallel:
        return rays[:, 0:3] + shown_depth * rays[:, 3:6]
    return rays[:, 0:3] + rays[:, 7:8] * rays[:, 3:6]


def _label_angle(poses: Poses, view: int) -> str:
    angle = poses.angles_rad[view]
    if math.isnan(angle):
        return f"view {view}"
    return f"view {view}, phi = {math.degrees(angle):.4g} deg"


def draw_geometry(poses: Poses, path: str | Path, *, views=None, title: str = "",
                  show_field_of_view: bool = True, dpi: int = 90) -> Path:
    """Write a PNG picture of a geometry.

    The top view (x-y plane, z toward the reader) shows the world axes, the isocentre, the
    source track, and for a few views: the source, the detector cells of the row nearest
    v = 0, the central ray, the rays through the first and last cells, and the u axis (v is
    +z for circular scans). The field of view (dashed circle) is the circle about the rotation
    axis seen by every view. 3-D geometries get a second panel: the side view in the plane of
    the first shown view's central ray and z, with the rays through the first and last rows.

    Parameters
    ----------
    poses : Poses
    path : str or Path
        Output PNG, written atomically (temporary file, then rename).
    views : sequence of int, optional
        View indices to draw (default up to four spread over the scan).
    title : str
    show_field_of_view : bool
    dpi : int

    Returns
    -------
    Path
        The written file.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    path = Path(path)
    chosen = _pick_views(poses, views)
    three_d = poses.dimension == 3 and poses.n_rows > 1
    figure, axes = plt.subplots(1, 2 if three_d else 1, figsize=(12 if three_d else 6.5, 5.6),
                                layout="constrained", squeeze=False)
    top = axes[0, 0]
    row = _row_of(poses)

    if poses.parallel:
        half_width = 0.5 * (np.ptp(poses.col_u_mm) + poses.pitch_u_mm) + abs(
            float(np.mean(poses.col_u_mm)))
        depth = 1.3 * half_width
    else:
        depth = 0.0
    fov = field_of_view_radius_mm(poses) if show_field_of_view else 0.0
    if not poses.parallel:
        top.plot(poses.source[:, 0], poses.source[:, 1], color="0.75", lw=0.8, zorder=0,
                 label="source track")
    for k, view in enumerate(chosen):
        colour = _COLOURS[k % len(_COLOURS)]
        cells = _detector_points(poses, view, row, depth)
        top.plot(cells[:, 0], cells[:, 1], color=colour, lw=3, solid_capstyle="butt",
                 label=_label_angle(poses, view))
        if poses.parallel:
            d = poses.direction[view]
            for end in (cells[0], cells[-1]):
                start = end - 2 * depth * d
                top.plot([start[0], end[0]], [start[1], end[1]], color=colour, lw=0.8, ls="--")
            centre = poses.detector_centre[view] + depth * d
            start = centre - 2 * depth * d
            top.annotate("", xy=centre[:2], xytext=start[:2],
                         arrowprops=dict(arrowstyle="->", color=colour, lw=1.2))
        else:
            s = poses.source[view]
            top.plot(*s[:2], "o", color=colour, ms=6)
            for end in (cells[0], cells[-1]):
                top.plot([s[0], end[0]], [s[1], end[1]], color=colour, lw=0.8, ls="--")
            centre = poses.detector_centre[view]
            top.annotate("", xy=centre[:2], xytext=s[:2],
                         arrowprops=dict(arrowstyle="->", color=colour, lw=1.2))
        # u axis at the detector centre, and the first / last cells
        centre = poses.detector_centre[view] + depth * poses.direction[view]
        scale = 0.25 * max(np.ptp(cells[:, 0]), np.ptp(cells[:, 1]), poses.pitch_u_mm * 4)
        tip = centre + scale * poses.u_axis[view]
        top.annotate("", xy=tip[:2], xytext=centre[:2],
                     arrowprops=dict(arrowstyle="-|>", color="k", lw=1.0))
        top.text(*tip[:2], " u", fontsize=8, va="center")
        top.plot(*cells[0, :2], "s", color=colour, mfc="white", ms=5)
        top.plot(*cells[-1, :2], "s", color=colour, ms=5)
        if k == 0:
            top.text(*cells[0, :2], "  first cell", fontsize=7, color=colour, va="top")
            top.text(*cells[-1, :2], "  last cell", fontsize=7, color=colour, va="bottom")
    if fov > 0:
        top.add_patch(matplotlib.patches.Circle((0, 0), fov, fill=False, ls=":", lw=1.2,
                                                color="k", label=f"field of view r = {fov:.4g} mm"))
    turn = field_of_view_radius_mm(poses, every_view=False) if show_field_of_view else 0.0
    if turn > 1.01 * fov:
        top.add_patch(matplotlib.patches.Circle(
            (0, 0), turn, fill=False, ls="-.", lw=1.0, color="0.3",
            label=f"covered over a full turn r = {turn:.4g} mm"))
    # world frame at the isocentre
    span = max(np.ptp(top.get_xlim()), np.ptp(top.get_ylim()))
    arrow = 0.12 * span
    for vec, name in (((arrow, 0), "x"), ((0, arrow), "y")):
        top.annotate("", xy=vec, xytext=(0, 0), arrowprops=dict(arrowstyle="-|>", color="0.3"))
        top.text(vec[0] * 1.08, vec[1] * 1.08, name, color="0.3", ha="center", va="center")
    top.plot(0, 0, "+", color="k", ms=10)
    top.text(0, 0, "  isocentre (z toward the reader)", fontsize=7, va="top")
    top.set_aspect("equal")
    top.set_xlabel("x (mm)")
    top.set_ylabel("y (mm)")
    top.set_title("top view" + (": v = +z" if not np.isnan(poses.angles_rad).all() else ""),
                  fontsize=10)
    top.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    top.grid(alpha=0.3)

    if three_d:
        _side_view(axes[0, 1], poses, int(chosen[0]), depth)
    if title:
        figure.suptitle(title)
    return finish_figure(figure, path, dpi=dpi)


def _side_view(ax, poses: Poses, view: int, depth: float) -> None:
    """Plane of the central ray of ``view`` and z: rays through the first and last rows."""
    d = poses.direction[view].copy()
    d[2] = 0.0
    d /= max(np.linalg.norm(d), 1e-12)
    probe = dataclasses.replace(poses, col_u_mm=np.array([float(np.mean(poses.col_u_mm))]))
    rays = cell_rays(probe, [view])[0, :, 0]  # (R, 8)
    if poses.parallel:
        ends = rays[:, 0:3] + depth * rays[:, 3:6]
        starts = ends - 2 * depth * rays[:, 3:6]
    else:
        ends = rays[:, 0:3] + rays[:, 7:8] * rays[:, 3:6]
        starts = rays[:, 0:3]
    along = lambda p: p @ d  # noqa: E731 - short projection used three times
    ax.plot(along(ends), ends[:, 2], color="tab:blue", lw=3, label="detector column (all rows)")
    for k, label in ((0, "first row"), (-1, "last row")):
        ax.plot([along(starts[k]), along(ends[k])], [starts[k, 2], ends[k, 2]], ls="--",
                color="tab:blue", lw=0.8)
        ax.text(along(ends[k]), ends[k, 2], "  " + label, fontsize=7, va="center")
    if not poses.parallel:
        s = poses.source[view]
        ax.plot(along(s), s[2], "o", color="tab:blue", label="source")
    ax.plot(0, 0, "+", color="k", ms=10)
    c = poses.detector_centre[view] + (depth * poses.direction[view] if poses.parallel else 0)
    tip = c + 0.25 * (np.ptp(ends[:, 2]) + poses.pitch_v_mm) * poses.v_axis[view]
    ax.annotate("", xy=(along(tip), tip[2]), xytext=(along(c), c[2]),
                arrowprops=dict(arrowstyle="-|>", color="k"))
    ax.text(along(tip), tip[2], " v", fontsize=8)
    ax.set_aspect("equal")
    ax.set_xlabel("distance along the central ray of the first view (mm)")
    ax.set_ylabel("z (mm)")
    ax.set_title("side view", fontsize=10)
    ax.legend(fontsize=7, loc="lower left")
    ax.grid(alpha=0.3)


def write_documentation_figures(directory: str | Path) -> list[Path]:
    """Draw the figures of docs/geometry.md into ``directory`` (small demonstration settings).

    Returns
    -------
    list of Path
        The files written.
    """
    from simbench.geometry.circular import cone_poses, fan_poses, parallel_poses
    from simbench.geometry.explicit import poses_from_arrays

    directory = Path(directory)
    out = []
    out.append(draw_geometry(parallel_poses(n_cols=64, pitch_u_mm=4.0, n_views=180),
                             directory / "geometry-parallel.png", views=[0, 30, 60],
                             title="parallel beam (2-D)"))
    out.append(draw_geometry(
        fan_poses(sid_mm=500.0, sdd_mm=900.0, n_cols=96, pitch_u_mm=6.0, n_views=360,
                  curved=True, offset_u_mm=1.5),
        directory / "geometry-fan.png", views=[0, 90], title="fan beam, curved detector"))
    out.append(draw_geometry(
        fan_poses(sid_mm=500.0, sdd_mm=900.0, n_cols=64, pitch_u_mm=6.0, n_views=360,
                  offset_u_mm=150.0),
        directory / "geometry-offset-detector.png", views=[0, 180],
        title="fan beam, offset (half-fan) flat detector"))
    out.append(draw_geometry(
        cone_poses(sid_mm=400.0, sdd_mm=800.0, n_cols=64, n_rows=48, pitch_u_mm=4.0,
                   pitch_v_mm=4.0, n_views=360),
        directory / "geometry-cone.png", views=[0, 45], title="cone beam, flat panel"))
    # a C-arm-like partial orbit with the detector tilted about its u axis
    angles = np.radians(np.linspace(-100.0, 100.0, 9))
    tilt = math.radians(8.0)
    d = np.stack([-np.sin(angles), np.cos(angles), np.zeros_like(angles)], axis=1)
    u = np.stack([np.cos(angles), np.sin(angles), np.zeros_like(angles)], axis=1)
    v = np.cos(tilt) * np.array([0.0, 0.0, 1.0]) - math.sin(tilt) * d
    source = -600.0 * d + np.array([0.0, 0.0, 20.0])
    centre = 450.0 * d
    arm = poses_from_arrays(source=source, detector_centre=centre, u_axis=u, v_axis=v,
                            n_cols=64, n_rows=48, pitch_u_mm=5.0, pitch_v_mm=5.0)
    out.append(draw_geometry(arm, directory / "geometry-poses.png", views=[0, 4, 8],
                             title="per-view poses (C-arm-like arc, tilted detector)"))
    return out
