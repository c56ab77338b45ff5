"""Voxel phantoms: a ``voxels`` section naming a ``.npy`` label or mu volume.

Reading the ``.npy`` file is the only I/O of the phantom package besides the phantom file
itself; the array is checked (dtype, shape, finite values, every label mapped) before use.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from simbench.errors import InputError
from simbench.materials.spec import MaterialSpec
from simbench.phantom import compiled as C
from simbench.spec import MU_UNITS_PER_MM, Section, check_integer

VOXEL_KEYS = ("file", "voxel_size", "centre", "labels", "mu_unit")


def read_voxels(reader, s: Section) -> C.VoxelVolume:
    """Read and check a ``voxels`` section; registers the materials with ``reader``.

    Parameters
    ----------
    reader : simbench.phantom.language.Reader
        The state of the phantom file (dimension, directory, materials).
    s : Section
        The ``voxels`` mapping.

    Returns
    -------
    VoxelVolume
        Values shaped (nz, ny, nx) (a 2-D file's (ny, nx) array becomes (1, ny, nx); its slice
        thickness is set to the pixel width dx, centred on z = 0).
    """
    dim = reader.dimension
    s.check_keys(VOXEL_KEYS, required=("file", "voxel_size"))
    if s.has("labels") == s.has("mu_unit"):
        raise InputError(s.where.child("labels"),
                         "a voxel phantom needs exactly one of 'labels' (label volume) and "
                         "'mu_unit' (mu volume)" + (", got both" if s.has("labels") else ""),
                         "labels: {1: water, 2: bone}, or mu_unit: /mm")
    file_name = s.string("file")
    base = reader.directory if reader.directory is not None else Path.cwd()
    path = (base / file_name) if not Path(file_name).is_absolute() else Path(file_name)
    if not path.is_file():
        raise s.error("file", f"voxel file '{path}' not found",
                      "a .npy file path relative to the phantom file")
    try:
        values = np.load(path, allow_pickle=False)
    except (ValueError, OSError) as exc:
        raise s.error("file", f"cannot read '{path}' as .npy: {str(exc).splitlines()[0]}",
                      "an array saved with numpy.save") from None
    if not isinstance(values, np.ndarray):
        raise s.error("file", f"'{path}' does not hold one array", "an array saved with numpy.save")
    if values.ndim != dim or values.size == 0:
        raise s.error("file", f"the array has shape {values.shape}, expected {dim} non-empty axes",
                      "(ny, nx) for a 2-D phantom" if dim == 2 else "(nz, ny, nx) for a 3-D phantom")
    raw_size = s.raw("voxel_size")
    if isinstance(raw_size, list):
        spacing = list(s.lengths("voxel_size", dim, positive=True))
    else:
        spacing = [s.length("voxel_size", positive=True)] * dim
    centre = list(s.lengths("centre", dim, (0.0,) * dim))
    if dim == 2:
        values = values[np.newaxis]
        spacing.append(spacing[0])
        centre.append(0.0)
    if s.has("mu_unit"):
        unit = s.string("mu_unit", choices=tuple(MU_UNITS_PER_MM))
        if values.dtype.kind != "f":
            raise s.error("file", f"a mu volume must hold floating-point numbers, got {values.dtype}",
                          "float32 or float64 mu values (or use 'labels' for integer labels)")
        mu = values.astype(np.float64) * MU_UNITS_PER_MM[unit]
        if not np.all(np.isfinite(mu)):
            bad = tuple(int(i) for i in np.argwhere(~np.isfinite(mu))[0][3 - dim:])
            raise s.error("file", f"the mu volume holds NaN or inf (first at index {bad})",
                          "finite mu values")
        reader.use_material(("mu volume",), lambda: MaterialSpec(
            name="mu volume", kind="mu", mu_per_mm=1.0))
        return C.VoxelVolume(np.ascontiguousarray(mu), "mu", tuple(spacing), tuple(centre))
    if values.dtype.kind not in "iub":
        raise s.error("file", f"a label volume must hold integers, got {values.dtype}",
                      "integer labels (or use 'mu_unit' for a float mu volume)")
    labels = values.astype(np.int64)
    if labels.min() < 0:
        raise s.error("file", f"labels must be >= 0, found {labels.min()}", "0 (vacuum) and 1, 2, ...")
    table = s.section("labels")
    n_labels = int(labels.max())
    label_material = np.full(n_labels + 1, -1, np.int64)
    given = {}
    for key in table.keys():
        number = check_integer(key, table.at(key), minimum=1)
        given[number] = reader.named_material(table.raw(key), table.at(key))
    for value in np.unique(labels):
        if value == 0:
            continue
        if int(value) not in given:
            raise table.error(str(value), f"label {value} occurs in the volume but has no material",
                              "a material for every non-zero label, e.g. "
                              f"labels: {{{value}: water}}")
        label_material[value] = given[int(value)]
    return C.VoxelVolume(np.ascontiguousarray(labels.astype(np.int32)), "labels", tuple(spacing),
                         tuple(centre), label_material)
