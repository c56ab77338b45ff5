"""Projections as NeXus HDF5 files in the NXtomo layout (NeXus application definition NXtomo).

The writer takes arrays and a :class:`~simbench.geometry.poses.Poses`; it knows nothing of
runs or folders. One file holds one entry::

    /entry                      NXentry, definition = "NXtomo"
      title, start_time
      instrument                NXinstrument
        source                  NXsource: type, name, probe = "x-ray", distance (-SID, mm)
        detector                NXdetector: data (frames, rows, columns), image_key,
                                x_pixel_size, y_pixel_size (mm), distance (mm),
                                x_rotation_axis_pixel_position
        beam                    NXbeam: incident_energy (keV), for monochromatic data only
        geometry                NXcollection: the exact per-view poses (mm, unit vectors)
      sample                    NXsample: name, rotation_angle (degree), z_translation (mm)
      data                      NXdata: links to detector/data, image_key, rotation_angle
      notes                     NXnote: the caution, and what the data and angles mean

Frames are the dark frame(s) first (image_key 2), then the flat frame(s) (1), then one
projection per view (0), as is common practice. ``data`` is stored (frame, row, column):
row along the detector's v axis (+z), column along u; NXtomo names the two image axes
``xsize`` and ``ysize`` without fixing their order, and tomography readers take the last
axis as x.

NXtomo describes a parallel beam turning about one axis. For fan and cone beams the file
records what NXtomo can hold (source and detector distances, the detector pitch) and the
exact geometry in ``instrument/geometry``; a reader that assumes parallel rays will not
reconstruct those correctly. docs/export.md states every field and its limits.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

import simbench

#: image_key values (NXtomo): projection, flat field, dark field
PROJECTION, FLAT, DARK = 0, 1, 2
#: rows of views written at once (bounds memory for large cone-beam scans)
BYTES_PER_BLOCK = 64 * 2**20


def rotation_text() -> str:
    """What ``rotation_angle`` means, for the file's notes and the docs."""
    return ("rotation_angle is simbench's view angle phi in degrees: at phi the central ray "
            "travels along (-sin phi, cos phi, 0) and detector columns run along "
            "(cos phi, sin phi, 0) in the world frame (mm, rotation axis z). The source and "
            "detector turn counterclockwise seen from +z as phi grows, which is the same as "
            "the sample turning by -phi about z.")


def geometry_numbers(poses) -> dict:
    """Distances NXtomo can hold, from the per-view poses.

    Returns
    -------
    dict
        ``sid_mm`` and ``sdd_mm`` (divergent beams: mean over views of |source| in the
        plane z = source z, and |detector centre - source|; None for parallel beams), and
        ``axis_column`` (the column position, in cells from 0, where the rotation axis
        projects: ``-col_u_mm[0] / pitch_u``).
    """
    out = {"sid_mm": None, "sdd_mm": None}
    if not poses.parallel:
        out["sid_mm"] = float(np.mean(np.hypot(poses.source[:, 0], poses.source[:, 1])))
        out["sdd_mm"] = float(np.mean(np.linalg.norm(poses.detector_centre - poses.source,
                                                     axis=1)))
    out["axis_column"] = float(-poses.col_u_mm[0] / poses.pitch_u_mm)
    return out


def write_nxtomo(path: str | Path, projections: np.ndarray, poses, *,
                 flat: np.ndarray | None = None, dark: np.ndarray | None = None,
                 signal: str = "counts", title: str = "", sample_name: str = "phantom",
                 source_name: str = "simbench", start_time: str | None = None,
                 energy_kev: float | None = None, frames_averaged: dict | None = None,
                 notes: str = "") -> dict:
    """Write projections (and flat and dark frames) as one NXtomo entry.

    Parameters
    ----------
    path : str or Path
        Destination HDF5 file (``.nxs``).
    projections : ndarray
        (n_views, n_cols) for 2-D scans or (n_views, n_rows, n_cols); may be a memory map
        (written in blocks of views).
    poses : Poses
        The scan's geometry: angles, distances, pitch, and the exact per-view poses.
    flat, dark : ndarray, optional
        One flat and one dark frame, shaped like one view; both or neither.
    signal : str
        ``"counts"`` (raw detector counts) or ``"line integrals"`` (dimensionless,
        ``-ln(I / I0)``), recorded in ``detector/data@long_name``.
    title, sample_name, source_name : str
    start_time : str, optional
        ISO 8601 date and time of the data (NX_DATE_TIME).
    energy_kev : float, optional
        Monochromatic energy of the data (keV), written as ``beam/incident_energy``.
    frames_averaged : dict, optional
        ``{"flat": n, "dark": n}``: how many frames each written frame is the mean of.
    notes : str
        Text for ``entry/notes/data``.

    Returns
    -------
    dict
        ``frames``, ``shape`` of ``data``, ``image_key_counts``.
    """
    import h5py

    shape = tuple(projections.shape)
    n_views = shape[0]
    n_rows = 1 if len(shape) == 2 else shape[1]
    n_cols = shape[-1]
    if n_views != poses.n_views or n_cols != poses.n_cols or n_rows != poses.n_rows:
        raise ValueError(f"projections {shape} do not match the poses "
                         f"({poses.n_views} views, {poses.n_rows} rows, {poses.n_cols} columns)")
    if (flat is None) != (dark is None):
        raise ValueError("give both flat and dark frames, or neither")
    if np.any(~np.isfinite(poses.angles_rad)):
        raise ValueError("NXtomo needs a rotation angle per view")
    extra = [] if flat is None else [(DARK, dark), (FLAT, flat)]
    keys = np.array([k for k, _ in extra] + [PROJECTION] * n_views, dtype=np.int32)
    n_frames = keys.size
    angles_deg = np.degrees(poses.angles_rad)
    first = float(angles_deg[0])
    frame_angles = np.concatenate([np.full(len(extra), first), angles_deg])
    dtype = np.float32 if projections.dtype.kind == "f" and projections.dtype.itemsize <= 4 \
        else projections.dtype
    numbers = geometry_numbers(poses)

    with h5py.File(path, "w", track_order=True) as f:
        f.attrs["NX_class"] = "NXroot"
        f.attrs["default"] = "entry"
        f.attrs["creator"] = f"simbench {simbench.__version__}"
        f.attrs["file_name"] = Path(path).name
        if start_time:
            f.attrs["file_time"] = start_time
        entry = _group(f, "entry", "NXentry")
        entry.attrs["default"] = "data"
        entry["title"] = title
        if start_time:
            entry["start_time"] = start_time
        entry["definition"] = "NXtomo"

        instrument = _group(entry, "instrument", "NXinstrument")
        source = _group(instrument, "source", "NXsource")
        source["type"] = "Fixed Tube X-ray"
        source["name"] = source_name
        source["probe"] = "x-ray"
        if numbers["sid_mm"] is not None:
            _length(source, "distance", -numbers["sid_mm"])

        detector = _group(instrument, "detector", "NXdetector")
        data = detector.create_dataset("data", shape=(n_frames, n_rows, n_cols), dtype=dtype,
                                       chunks=(1, n_rows, n_cols), track_times=False)
        data.attrs["long_name"] = ("counts per detector cell" if signal == "counts" else
                                   "line integral -ln(I/I0), dimensionless")
        if signal == "counts":
            data.attrs["units"] = "counts"
        data.attrs["interpretation"] = "image"
        data.attrs["target"] = data.name
        for i, (_, frame) in enumerate(extra):
            data[i] = np.asarray(frame, dtype=dtype).reshape(n_rows, n_cols)
        step = max(1, BYTES_PER_BLOCK // max(1, n_rows * n_cols * np.dtype(dtype).itemsize))
        for v0 in range(0, n_views, step):
            block = np.asarray(projections[v0:v0 + step], dtype=dtype)
            data[len(extra) + v0:len(extra) + v0 + block.shape[0]] = \
                block.reshape(block.shape[0], n_rows, n_cols)
        image_key = detector.create_dataset("image_key", data=keys, track_times=False)
        image_key.attrs["target"] = image_key.name
        _length(detector, "x_pixel_size", poses.pitch_u_mm)
        _length(detector, "y_pixel_size", poses.pitch_v_mm)
        if numbers["sdd_mm"] is not None:
            _length(detector, "distance", numbers["sdd_mm"] - numbers["sid_mm"])
        detector.create_dataset("x_rotation_axis_pixel_position",
                                data=numbers["axis_column"], track_times=False)
        if frames_averaged:
            for name, n in frames_averaged.items():
                detector.attrs[f"{name}_frames_averaged"] = int(n)

        if energy_kev is not None:
            beam = _group(instrument, "beam", "NXbeam")
            d = beam.create_dataset("incident_energy", data=float(energy_kev),
                                    track_times=False)
            d.attrs["units"] = "keV"
        _write_poses(_group(instrument, "geometry", "NXcollection"), poses, numbers)

        sample = _group(entry, "sample", "NXsample")
        sample["name"] = sample_name
        rotation = sample.create_dataset("rotation_angle", data=frame_angles, track_times=False)
        rotation.attrs["units"] = "degree"
        rotation.attrs["target"] = rotation.name
        z_shift = poses.detector_centre[:, 2]
        if np.any(z_shift != 0.0):  # helical and shifted scans: the sample moves instead
            z = np.concatenate([np.full(len(extra), -z_shift[0]), -z_shift])
            _length(sample, "z_translation", z)

        nxdata = _group(entry, "data", "NXdata")
        nxdata.attrs["signal"] = "data"
        nxdata.attrs["axes"] = ["rotation_angle", ".", "."]
        nxdata.attrs["rotation_angle_indices"] = 0
        nxdata["data"] = data  # hard links (NeXus: the linked field carries @target)
        nxdata["image_key"] = image_key
        nxdata["rotation_angle"] = rotation

        note = _group(entry, "notes", "NXnote")
        note["type"] = "text/plain"
        note["description"] = simbench.CAUTION
        note["data"] = (notes + "\n" if notes else "") + rotation_text()
    counts = {int(k): int(np.sum(keys == k)) for k in (PROJECTION, FLAT, DARK)}
    return {"frames": int(n_frames), "shape": [int(n_frames), int(n_rows), int(n_cols)],
            "image_key_counts": {"projection": counts[PROJECTION], "flat": counts[FLAT],
                                 "dark": counts[DARK]}}


def _group(parent, name: str, nx_class: str):
    group = parent.create_group(name, track_order=True)
    group.attrs["NX_class"] = nx_class
    return group


def _length(group, name: str, value) -> None:
    d = group.create_dataset(name, data=np.asarray(value, dtype=np.float64), track_times=False)
    d.attrs["units"] = "mm"


def _write_poses(group, poses, numbers: dict) -> None:
    """The exact geometry, one row per projection frame (image_key 0), in frame order."""
    group.attrs["description"] = (
        "exact per-view geometry in simbench's world frame (mm, rotation axis z), one row "
        "per projection frame in frame order; the centre of cell (row k, column j) of a flat "
        "detector is detector_centre + column_position[j] * u_axis + row_position[k] * v_axis")
    group["beam"] = "parallel" if poses.parallel else "divergent"
    group["detector_shape"] = "curved" if poses.curved else "flat"
    if poses.curved:
        group["detector_shape"].attrs["description"] = (
            "equiangular cylinder about the source, axis along v; column_position is arc "
            "length on it (fan angle = column_position / |detector_centre - source|)")
    if poses.parallel:
        _vector(group, "ray_direction", poses.direction, "")
    else:
        _vector(group, "source_position", poses.source, "mm")
        _length(group, "source_to_isocentre", numbers["sid_mm"])
        _length(group, "source_to_detector", numbers["sdd_mm"])
    _vector(group, "detector_centre", poses.detector_centre, "mm")
    _vector(group, "u_axis", poses.u_axis, "")
    _vector(group, "v_axis", poses.v_axis, "")
    _length(group, "column_position", poses.col_u_mm)
    _length(group, "row_position", poses.row_v_mm)
    angle = group.create_dataset("view_angle", data=np.degrees(poses.angles_rad),
                                 track_times=False)
    angle.attrs["units"] = "degree"


def _vector(group, name: str, value, units: str) -> None:
    d = group.create_dataset(name, data=np.asarray(value, dtype=np.float64), track_times=False)
    if units:
        d.attrs["units"] = units
