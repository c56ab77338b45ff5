"""The per-view pose form to which every scanner geometry compiles.

This is the contract between :mod:`simbench.geometry` (parallel, fan, cone, offsets, short
scans and user poses all compile to it) and :mod:`simbench.trace` (whose kernels build one ray
per detector point from it with :func:`simbench.geometry.rays.detector_ray`).

Flat detector: the centre of cell (row k, column j) is
``detector_centre + col_u_mm[j] * u_axis + row_v_mm[k] * v_axis``.

Curved detector (equiangular, cylinder about the source with its axis along v, radius
R = |detector_centre - source|): column j sits at fan angle ``gamma_j = col_u_mm[j] / R``
(``col_u_mm`` is arc length on the cylinder), turning the ray toward +u:
``source + R * (cos(gamma_j) * w + sin(gamma_j) * u_axis) + row_v_mm[k] * v_axis`` with
``w = (detector_centre - source) / R``.

Parallel beam: every ray of a view travels along ``direction``; the ray through a detector
point is the whole line through it (no source), so line integrals are over (-inf, inf).
Divergent beam (fan, cone): the ray runs from the (focal spot) point to the detector point.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True, eq=False)
class Poses:
    """Per-view source and detector poses in the world frame (mm, unit vectors).

    Attributes
    ----------
    parallel : bool
        Parallel beam (``direction`` used) or divergent beam (``source`` used).
    source : float64 (V, 3)
        Focal spot centre per view (divergent); zeros for parallel beams.
    direction : float64 (V, 3)
        Unit ray direction per view (parallel); for divergent beams the unit vector from
        the source to the detector centre.
    detector_centre : float64 (V, 3)
    u_axis, v_axis : float64 (V, 3)
        Unit column and row axes of the detector per view (orthogonal).
    curved : bool
        Equiangular cylindrical detector (divergent beams only).
    col_u_mm : float64 (C,)
        Cell centres along u (arc length for curved detectors), offsets included.
    row_v_mm : float64 (R,)
        Cell centres along v.
    pitch_u_mm, pitch_v_mm : float
        Cell pitch (aperture for sub-rays).
    angles_rad : float64 (V,)
        View angle phi of circular geometries (NaN for user poses).
    dimension : int
        2 for 2-D scanners (one row at z = 0; projections shaped (V, C)), else 3.
    """

    parallel: bool
    source: np.ndarray
    direction: np.ndarray
    detector_centre: np.ndarray
    u_axis: np.ndarray
    v_axis: np.ndarray
    curved: bool
    col_u_mm: np.ndarray
    row_v_mm: np.ndarray
    pitch_u_mm: float
    pitch_v_mm: float
    angles_rad: np.ndarray
    dimension: int = 3

    @property
    def n_views(self) -> int:
        return int(self.detector_centre.shape[0])

    @property
    def n_rows(self) -> int:
        return int(self.row_v_mm.shape[0])

    @property
    def n_cols(self) -> int:
        return int(self.col_u_mm.shape[0])

    @property
    def projection_shape(self) -> tuple[int, ...]:
        """(V, C) for 2-D scanners, (V, R, C) otherwise (ARCHITECTURE.md layouts)."""
        if self.dimension == 2:
            return (self.n_views, self.n_cols)
        return (self.n_views, self.n_rows, self.n_cols)

    def select(self, views) -> "Poses":
        """The poses of some views only (cells, pitch and detector shape unchanged)."""
        views = np.asarray(views, dtype=np.int64)
        return dataclasses.replace(
            self, source=self.source[views], direction=self.direction[views],
            detector_centre=self.detector_centre[views], u_axis=self.u_axis[views],
            v_axis=self.v_axis[views], angles_rad=self.angles_rad[views])

    @classmethod
    def from_record(cls, record: dict) -> "Poses":
        """The poses written by :meth:`to_record` (e.g. from a scan's ``scan.json``)."""
        def vectors(key: str) -> np.ndarray:
            return np.asarray(record[key], dtype=np.float64).reshape(-1, 3)

        angles = np.array([np.nan if a is None else a for a in record["angles_rad"]],
                          dtype=np.float64)
        return cls(bool(record["parallel"]), vectors("source_mm"), vectors("direction"),
                   vectors("detector_centre_mm"), vectors("u_axis"), vectors("v_axis"),
                   bool(record["curved_detector"]),
                   np.asarray(record["col_u_mm"], dtype=np.float64),
                   np.asarray(record["row_v_mm"], dtype=np.float64),
                   float(record["pitch_u_mm"]), float(record["pitch_v_mm"]), angles,
                   int(record["dimension"]))

    def to_record(self) -> dict:
        """Every pose array as plain values, for JSON sidecars (NaN angles become null)."""
        return {
            "parallel": bool(self.parallel),
            "curved_detector": bool(self.curved),
            "dimension": int(self.dimension),
            "n_views": self.n_views, "n_rows": self.n_rows, "n_cols": self.n_cols,
            "pitch_u_mm": float(self.pitch_u_mm), "pitch_v_mm": float(self.pitch_v_mm),
            "col_u_mm": self.col_u_mm.tolist(), "row_v_mm": self.row_v_mm.tolist(),
            "angles_rad": [float(a) if np.isfinite(a) else None for a in self.angles_rad],
            "source_mm": self.source.tolist(), "direction": self.direction.tolist(),
            "detector_centre_mm": self.detector_centre.tolist(),
            "u_axis": self.u_axis.tolist(), "v_axis": self.v_axis.tolist(),
        }
