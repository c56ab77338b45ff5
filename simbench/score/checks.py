"""Input checks shared by the metrics: one-line :class:`~simbench.errors.InputError` for bad input.

Every public metric validates its arguments here, at the top, and works on float64 copies
below; the helpers name the function and the argument in the error's place, e.g.
``ssim(): mask: has no pixels (valid: ...)``.
"""

from __future__ import annotations

import math

import numpy as np

from simbench.errors import InputError, Where
from simbench.geometry.grid import ImageGrid


def fail(function: str, field: str, problem: str, valid: str = "") -> InputError:
    """The error for a bad argument ``field`` of the metric ``function``."""
    return InputError(Where(f"{function}()", field=field), problem, valid)


def real_array(value, function: str, field: str, ndims=(2, 3)) -> np.ndarray:
    """``value`` as a finite float64 array whose number of dimensions is in ``ndims``."""
    try:
        array = np.asarray(value)
    except Exception:  # noqa: BLE001 - anything that is not an array
        array = np.asarray(None)
    if array.dtype.kind not in "iuf":
        raise fail(function, field, f"got {type(value).__name__} of dtype {array.dtype}",
                   "a real-valued numeric array")
    if array.ndim not in ndims:
        raise fail(function, field, f"has {array.ndim} dimensions, shape {array.shape}",
                   " or ".join(f"{n}-D" for n in ndims) + " array")
    if array.size == 0:
        raise fail(function, field, f"is empty, shape {array.shape}", "at least one value")
    array = array.astype(np.float64, copy=False)
    if not np.all(np.isfinite(array)):
        raise fail(function, field, f"contains {int(np.sum(~np.isfinite(array)))} NaN or "
                   "infinite values", "finite values")
    return array


def same_shape(a: np.ndarray, b: np.ndarray, function: str, field_a: str, field_b: str):
    """Refuse two arrays of different shapes."""
    if a.shape != b.shape:
        raise fail(function, field_b, f"shape {b.shape} differs from {field_a}'s {a.shape}",
                   f"an array on the same grid as {field_a}")


def boolean_mask(mask, shape: tuple, function: str, field: str = "mask") -> np.ndarray:
    """``mask`` as a boolean array of ``shape`` with at least one True pixel."""
    array = np.asarray(mask)
    if array.dtype != np.bool_:
        raise fail(function, field, f"has dtype {array.dtype}",
                   "a boolean array (True where pixels are scored)")
    if array.shape != tuple(shape):
        raise fail(function, field, f"shape {array.shape} differs from the image's {shape}",
                   "a boolean array on the image's grid")
    if not array.any():
        raise fail(function, field, "has no pixels", "a mask with at least one True pixel")
    return array


def label_array(labels, shape: tuple, function: str, field: str = "labels") -> np.ndarray:
    """``labels`` as an integer array of ``shape`` (0 background, k > 0 the k-th ROI)."""
    array = np.asarray(labels)
    if array.dtype.kind not in "iu":
        raise fail(function, field, f"has dtype {array.dtype}",
                   "an integer label map (0 background, k > 0 the k-th ROI)")
    if array.shape != tuple(shape):
        raise fail(function, field, f"shape {array.shape} differs from the image's {shape}",
                   "a label map on the image's grid")
    return array


def region(which, labels, shape: tuple, function: str, field: str) -> np.ndarray:
    """A region given as a ROI label (int, with ``labels``) or a boolean mask, as a mask."""
    if isinstance(which, (bool, np.bool_)):
        raise fail(function, field, f"got {which!r}", "a ROI label (int > 0) or a boolean mask")
    if isinstance(which, (int, np.integer)):
        if labels is None:
            raise fail(function, field, f"is the label {int(which)} but no label map was given",
                       "pass labels=..., or give the region as a boolean mask")
        array = label_array(labels, shape, function)
        if which <= 0:
            raise fail(function, field, f"label {int(which)} is the background",
                       "a ROI label k > 0")
        mask = array == which
        if not mask.any():
            present = np.unique(array[array > 0])
            raise fail(function, field, f"label {int(which)} has no pixels",
                       "one of the labels present: " + (", ".join(map(str, present[:20]))
                                                        if present.size else "none"))
        return mask
    return boolean_mask(which, shape, function, field)


def positive(value, function: str, field: str) -> float:
    """A finite number > 0."""
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise fail(function, field, f"got {value!r}", "a finite number > 0") from None
    if not (math.isfinite(number) and number > 0):
        raise fail(function, field, f"must be > 0, got {value!r}", "a finite number > 0")
    return number


def finite(value, function: str, field: str) -> float:
    """A finite number."""
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise fail(function, field, f"got {value!r}", "a finite number") from None
    if not math.isfinite(number):
        raise fail(function, field, f"got {value!r}", "a finite number")
    return number


def point(value, function: str, field: str) -> tuple[float, float]:
    """An (x, y) point in mm."""
    try:
        x, y = (float(v) for v in value)
    except (TypeError, ValueError):
        raise fail(function, field, f"got {value!r}", "an (x, y) point in mm") from None
    if not (math.isfinite(x) and math.isfinite(y)):
        raise fail(function, field, f"got {value!r}", "a finite (x, y) point in mm")
    return x, y


def plane_grid(grid, image: np.ndarray, function: str) -> ImageGrid:
    """Check that a 2-D ``image`` lies on the x-y plane of ``grid`` (one slice of a 3-D grid)."""
    if not isinstance(grid, ImageGrid):
        raise fail(function, "grid", f"got {type(grid).__name__}",
                   "a simbench.geometry.grid.ImageGrid")
    if not all(math.isfinite(s) and s > 0 for s in grid.spacing_mm[:2]):
        raise fail(function, "grid", f"spacing {grid.spacing_mm}", "positive x and y spacing")
    if image.shape != tuple(grid.shape[1:]):
        raise fail(function, "image", f"shape {image.shape} does not match the grid's x-y plane "
                   f"{tuple(grid.shape[1:])}", "a 2-D image (ny, nx) on the grid (one axial "
                   "slice of a 3-D grid)")
    return grid


def planar_radius_mm(grid: ImageGrid, centre_mm: tuple[float, float]) -> np.ndarray:
    """Distance (mm) of every pixel centre of the grid's x-y plane from a point, (ny, nx)."""
    x = grid.axis_mm("x") - centre_mm[0]
    y = grid.axis_mm("y") - centre_mm[1]
    return np.hypot(x[None, :], y[:, None])
