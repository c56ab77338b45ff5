"""Scanner geometries: parallel, fan, cone, helical and free per-view poses.

Every geometry compiles to the per-view pose form :class:`~simbench.geometry.poses.Poses`,
from which :func:`simbench.geometry.rays.detector_ray` builds one ray per detector point.
Frames and formulas: docs/geometry.md.
"""

from simbench.geometry.circular import (cell_centres_mm, cone_poses, fan_angle_rad, fan_poses,
                                        parallel_poses, short_scan_arc_rad, view_angles_rad)
from simbench.geometry.explicit import pose_table, poses_from_arrays
from simbench.geometry.grid import ImageGrid
from simbench.geometry.field_of_view import edge_ray_distances_mm, field_of_view_radius_mm
from simbench.geometry.poses import Poses
from simbench.geometry.sampling import cell_subsamples, focal_spot_points
from simbench.geometry.scanner_geometry import ScannerGeometry, parse_geometry

__all__ = [
    "Poses", "ScannerGeometry", "parse_geometry", "parallel_poses", "fan_poses", "cone_poses",
    "poses_from_arrays", "pose_table", "cell_centres_mm", "view_angles_rad", "fan_angle_rad",
    "short_scan_arc_rad", "field_of_view_radius_mm", "edge_ray_distances_mm",
    "cell_subsamples", "focal_spot_points", "ImageGrid",
]
