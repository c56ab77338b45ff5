"""Voxel phantoms: a ``voxels`` section naming a ``.npy`` label or mu volume.

Reading the ``.npy`` file is the only I/O of the phantom package besides the phantom file
itself. The header is read and checked first (:mod:`simbench.npy_input`: a regular file, a
plain numeric dtype, a size that matches the file), the memory of the declared shape is
checked against the budget, and only then is the data read; the array is checked (shape,
finite mu within range, labels from 0 to 65535, every label mapped) before use.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from simbench.budget import check_bytes
from simbench.errors import InputError
from simbench.materials.spec import MaterialSpec
from simbench.npy_input import read_npy_data, read_npy_header
from simbench.phantom import compiled as C
from simbench.phantom import ranges as R
from simbench.spec import MU_UNITS_PER_MM, Section, check_integer

VOXEL_KEYS = ("file", "voxel_size", "centre", "labels", "mu_unit")
FILE_VALID = "a .npy file saved with numpy.save, path relative to the phantom file"
#: Bytes held per voxel while a volume is read and checked, beyond the file's own values: a
#: float64 copy (mu volumes) or an int32 copy and the sorted copy of np.unique (label volumes),
#: and the float64 volume the rasterizer makes from it.
BYTES_PER_VOXEL = 24


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
    if not file_name.strip():
        raise s.error("file", "the file name is empty", FILE_VALID)
    base = reader.directory if reader.directory is not None else Path.cwd()
    path = (base / file_name) if not Path(file_name).is_absolute() else Path(file_name)
    header = read_npy_header(path, s.at("file"), "voxel file", FILE_VALID)
    if len(header.shape) != dim or header.size == 0:
        raise s.error("file", f"the array has shape {header.shape}, expected {dim} non-empty axes",
                      "(ny, nx) for a 2-D phantom" if dim == 2 else "(nz, ny, nx) for a 3-D phantom")
    is_mu = s.has("mu_unit")
    unit = s.string("mu_unit", choices=tuple(MU_UNITS_PER_MM)) if is_mu else ""
    if is_mu and header.dtype.kind != "f":
        raise s.error("file", f"a mu volume must hold floating-point numbers, got {header.dtype}",
                      "float32 or float64 mu values (or use 'labels' for integer labels)")
    if not is_mu and header.dtype.kind not in "iub":
        raise s.error("file", f"a label volume must hold integers, got {header.dtype}",
                      "integer labels (or use 'mu_unit' for a float mu volume)")
    shape_text = "x".join(str(n) for n in header.shape)
    check_bytes(header.size * (header.dtype.itemsize * (2 if header.fortran_order else 1)
                               + BYTES_PER_VOXEL), s.at("file"),
                f"reading the {shape_text} voxels of '{path.name}'", "a smaller volume")
    raw_size = s.raw("voxel_size")
    if isinstance(raw_size, list):
        spacing = list(R.sizes(s, "voxel_size", dim))
    else:
        spacing = [R.size(s, "voxel_size")] * dim
    centre = list(R.point(s, "centre", dim))
    reach = math.hypot(*centre) + math.hypot(*(n * d / 2.0 for n, d in
                                               zip(header.shape[::-1], spacing)))
    if reach > R.MAX_EXTENT_MM:
        raise s.error("voxel_size", f"the volume reaches {reach:.6g} mm from the origin",
                      f"a volume within {R.MAX_EXTENT_MM:g} mm of the origin")
    values = read_npy_data(header, s.at("file"), "voxel file", FILE_VALID)
    if dim == 2:
        values = values[np.newaxis]
        spacing.append(spacing[0])
        centre.append(0.0)
    if is_mu:
        mu = values.astype(np.float64) * MU_UNITS_PER_MM[unit]
        bad = ~(np.abs(mu) <= R.MAX_MU_PER_MM)
        if bad.any():
            index = np.argwhere(bad)[0]
            value = float(values[tuple(index)])
            shown = "NaN" if math.isnan(value) else "inf" if math.isinf(value) else f"{value:.6g} {unit}"
            raise s.error("file", f"the mu volume holds {shown} (first at index "
                          f"{tuple(int(i) for i in index[3 - dim:])})",
                          f"finite mu values within +-{R.MAX_MU_PER_MM:g} /mm")
        reader.use_material(("mu volume",), lambda: MaterialSpec(
            name="mu volume", kind="mu", mu_per_mm=1.0))
        return C.VoxelVolume(np.ascontiguousarray(mu), "mu", tuple(spacing), tuple(centre))
    low, high = values.min(), values.max()
    if low < 0 or high > R.MAX_LABEL:
        raise s.error("file", f"labels must be from 0 to {R.MAX_LABEL}, found "
                      f"{low if low < 0 else high}", f"0 (vacuum) and 1, 2, ... up to {R.MAX_LABEL}")
    labels = values.astype(np.int32)
    table = s.section("labels")
    n_labels = int(high)
    label_material = np.full(n_labels + 1, -1, np.int64)
    given = {}
    for key in table.keys():
        number = check_integer(key, table.at(key), minimum=1, maximum=R.MAX_LABEL)
        given[number] = reader.named_material(table.raw(key), table.at(key))
    for value in np.unique(labels):
        if value == 0:
            continue
        if int(value) not in given:
            raise table.error(str(value), f"label {value} occurs in the volume but has no material",
                              "a material for every non-zero label, e.g. "
                              f"labels: {{{value}: water}}")
        label_material[value] = given[int(value)]
    return C.VoxelVolume(np.ascontiguousarray(labels), "labels", tuple(spacing),
                         tuple(centre), label_material)
