"""Arrays as TIFF stacks: one page per slice (or per view), the values exactly as stored.

The writer takes an array and its sample spacing; it knows nothing of runs or folders. Pages
are written in the array's own order and dtype, uncompressed, so ``tifffile.imread`` gives
back the very bits that were written (float32 images and projections included).

Spacing: uint8, uint16 and float32 arrays are written as ImageJ stacks, which most image
tools read with their spacing: an ImageDescription ``unit=mm`` and ``spacing=<slice step>``,
and XResolution, YResolution in pixels per mm (ResolutionUnit none, as ImageJ writes them).
Other dtypes (int16, int32, float64) are plain TIFF with XResolution, YResolution in pixels per
centimetre and ResolutionUnit centimetre (TIFF 6.0, section 8), which has no slice step.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

#: sample types ImageJ stacks hold (other types are written as plain TIFF)
IMAGEJ_DTYPES = ("uint8", "uint16", "float32")


def write_tiff_stack(path: str | Path, array: np.ndarray, spacing_mm, *,
                     description: str = "") -> dict:
    """Write a 2-D or 3-D array as a TIFF stack whose pixels are the array's exact bits.

    Parameters
    ----------
    path : str or Path
        Destination (``.tif``).
    array : ndarray
        (ny, nx) or (n_pages, ny, nx); any of uint8, uint16, int16, int32, float32, float64.
    spacing_mm : sequence of float
        ``(d_col, d_row)`` or ``(d_col, d_row, d_page)``: sample spacing along the last axis,
        the middle axis and the first axis, in mm.
    description : str
        Text for the ImageDescription of a plain TIFF (ImageJ files carry their own).

    Returns
    -------
    dict
        ``layout`` ("imagej" or "plain"), ``shape``, ``dtype``.

    Notes
    -----
    ImageJ layout: XResolution = 1 / d_col, YResolution = 1 / d_row pixels per mm.
    Plain layout: 10 / d_col and 10 / d_row pixels per centimetre (ResolutionUnit 3).

    Examples
    --------
    >>> import tempfile, os, tifffile
    >>> a = np.arange(12, dtype=np.float32).reshape(3, 4)
    >>> with tempfile.TemporaryDirectory() as d:
    ...     _ = write_tiff_stack(os.path.join(d, "a.tif"), a, (0.5, 0.5))
    ...     bool((tifffile.imread(os.path.join(d, "a.tif")) == a).all())
    True
    """
    import tifffile

    array = np.asarray(array)
    if array.ndim not in (2, 3):
        raise ValueError(f"a TIFF stack needs 2 or 3 axes, got shape {array.shape}")
    d_col, d_row = float(spacing_mm[0]), float(spacing_mm[1])
    d_page = float(spacing_mm[2]) if len(spacing_mm) > 2 else d_col
    resolution = (10.0 / d_col, 10.0 / d_row)
    data = array if array.dtype.byteorder in "=|<" else array.astype(array.dtype.newbyteorder("<"))
    imagej = data.dtype.name in IMAGEJ_DTYPES
    big = data.nbytes > 2**32 - 2**25  # classic TIFF offsets are 32-bit
    if imagej and not big:
        tifffile.imwrite(path, data, imagej=True, resolution=(1.0 / d_col, 1.0 / d_row),
                         metadata={"axes": "ZYX" if data.ndim == 3 else "YX", "unit": "mm",
                                   "spacing": d_page},
                         photometric="minisblack")
        layout = "imagej"
    else:
        tifffile.imwrite(path, data, bigtiff=big, resolution=resolution,
                         resolutionunit="CENTIMETER", photometric="minisblack",
                         description=description or None, metadata=None)
        layout = "plain"
    return {"layout": layout, "shape": list(data.shape), "dtype": data.dtype.name}
