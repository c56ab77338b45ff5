"""Drawing a phantom: its truth mu image with labels, scale bar and colour bar, as a PNG."""

from __future__ import annotations

import math
import warnings
from pathlib import Path

import numpy as np

from simbench.budget import check_bytes
from simbench.errors import InputError, Where
from simbench.report.figures import finish_figure
from simbench.geometry.grid import ImageGrid
from simbench.phantom.compiled import PRISM_CODES, Phantom
from simbench.phantom.rasterize import rasterize

#: Range of the ``pixels`` setting (the command line's ``--pixels`` range ends at the same
#: 4096): the panels are drawn about 670 pixels wide (5.6 inches at 120 dpi), so large values
#: add memory and time rather than detail.
MIN_PIXELS, MAX_PIXELS = 8, 4096
#: Bytes per panel pixel while drawing: the float64 image, the rasterizer's work array and
#: matplotlib's resampled RGBA copy (estimate).
BYTES_PER_PIXEL = 32


def phantom_extent_mm(phantom: Phantom) -> tuple[np.ndarray, np.ndarray]:
    """Axis-aligned bounds (low, high) of a phantom in mm, shape (3,) each.

    Primitives contribute their bounding sphere (bounding circle in x, y for 2-D shapes, which
    are unbounded in z); voxel phantoms their voxel extent.
    """
    if phantom.voxels is not None:
        vox = phantom.voxels
        nz, ny, nx = vox.values.shape
        half = np.array(vox.spacing_mm) * np.array([nx, ny, nz]) / 2.0
        centre = np.array(vox.centre_mm, np.float64)
        return centre - half, centre + half
    o = phantom.objects
    if o.count == 0:
        return -np.ones(3), np.ones(3)
    r = o.bound_radius[:, None]
    low, high = (o.centre - r).min(axis=0), (o.centre + r).max(axis=0)
    if phantom.dimension == 2:
        low[2], high[2] = -1.0, 1.0
    return low, high


def _nice_length(span_mm: float) -> float:
    """A round scale-bar length near a fifth of the span (1, 2 or 5 times a power of ten)."""
    target = span_mm / 5.0
    power = 10.0 ** np.floor(np.log10(target))
    for step in (5.0, 2.0, 1.0):
        if step * power <= target:
            return step * power
    return power


def draw_phantom(phantom: Phantom, path: str | Path, *, energy_kev: float = 60.0,
                 pixels: int = 512) -> Path:
    """Write a PNG of a phantom's truth mu image.

    Parameters
    ----------
    phantom : Phantom
    path : str or Path
        Destination PNG (written atomically: temporary file, then ``os.replace``).
    energy_kev : float
        Energy at which mu is shown, keV.
    pixels : int
        Pixels along the longer side of each panel, from 8 to 4096.

    Returns
    -------
    Path
        ``path``.

    Notes
    -----
    2-D phantoms get one panel; 3-D phantoms three central slices through the centre of the
    phantom's bounds: axial (x-y), coronal (x-z) and sagittal (y-z). Panels are drawn with
    ``origin='lower'`` and axes in mm; named objects whose bounds cross a slice are labelled at
    their centres (names are drawn as plain text, never as math). A scale bar, a colour bar in
    1/mm and a one-line caution are added.

    Raises
    ------
    InputError
        ``pixels`` outside 8 to 4096, an energy that is not a positive number, or panels whose
        memory estimate is over the budget.
    """
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt
    from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

    if isinstance(pixels, bool) or not isinstance(pixels, (int, np.integer)) or not (
            MIN_PIXELS <= pixels <= MAX_PIXELS):
        raise InputError(Where("<arguments>", field="pixels"),
                         f"must be a whole number from {MIN_PIXELS} to {MAX_PIXELS}, got "
                         f"{pixels!r}", f"an image size from {MIN_PIXELS} to {MAX_PIXELS} pixels")
    try:
        energy_ok = math.isfinite(float(energy_kev)) and float(energy_kev) > 0
    except (TypeError, ValueError):
        energy_ok = False
    if not energy_ok:
        raise InputError(Where("<arguments>", field="energy_kev"),
                         f"must be a positive energy in keV, got {energy_kev!r}",
                         "an energy such as 60 (keV)")
    low, high = phantom_extent_mm(phantom)
    margin = 0.05 * float(np.max(high - low))
    low, high = low - margin, high + margin
    mid = (low + high) / 2.0
    span = high - low
    pixel_mm = float(np.max(span[:phantom.dimension])) / pixels
    n = np.minimum(np.maximum(np.ceil(span / pixel_mm).astype(int), 1), pixels + 1)
    panels_pixels = n[0] * n[1] + (n[0] * n[2] + n[1] * n[2] if phantom.dimension == 3 else 0)
    check_bytes(float(panels_pixels) * BYTES_PER_PIXEL, Where("<arguments>", field="pixels"),
                f"drawing {int(panels_pixels):,} pixels", "fewer pixels")
    # (label, horizontal axis, vertical axis) per panel
    panels = [("axial (z = {:.1f} mm)".format(mid[2]), 0, 1)]
    if phantom.dimension == 3:
        panels += [("coronal (y = {:.1f} mm)".format(mid[1]), 0, 2),
                   ("sagittal (x = {:.1f} mm)".format(mid[0]), 1, 2)]
    images = []
    for _, h, v in panels:
        if phantom.dimension == 2:
            grid = ImageGrid((1, n[1], n[0]), (pixel_mm,) * 3, (mid[0], mid[1], 0.0), 2)
            image = rasterize(phantom, grid, energy_kev, supersample=2)
        else:
            shape = [1, 1, 1]  # (nz, ny, nx)
            shape[2 - h], shape[2 - v] = n[h], n[v]
            grid = ImageGrid(tuple(shape), (pixel_mm,) * 3, tuple(mid), 3)
            image = rasterize(phantom, grid, energy_kev, supersample=1)
            image = image.reshape(n[v], n[h])  # rows along v (v > h in every panel)
        extent = (mid[h] - n[h] * pixel_mm / 2, mid[h] + n[h] * pixel_mm / 2,
                  mid[v] - n[v] * pixel_mm / 2, mid[v] + n[v] * pixel_mm / 2)
        images.append((image, extent))
    vmin = min(float(im.min()) for im, _ in images)
    vmax = max(float(im.max()) for im, _ in images)
    if vmax <= vmin:
        vmax = vmin + 1e-6
    fig, axes = plt.subplots(1, len(panels), figsize=(5.6 * len(panels) + 0.6, 5.8),
                             squeeze=False, layout="constrained")
    names = "xyz"
    o = phantom.objects
    for ax, (title, h, v), (image, extent) in zip(axes[0], panels, images):
        shown = ax.imshow(image, origin="lower", extent=extent, cmap="gray", vmin=vmin,
                          vmax=vmax, interpolation="nearest")
        ax.set_xlabel(f"{names[h]} (mm)")
        ax.set_ylabel(f"{names[v]} (mm)")
        if phantom.dimension == 3:
            ax.set_title(title, fontsize=10)
        cut_axis = 3 - h - v
        placed: dict[str, list] = {}
        for k in range(o.count):
            label = phantom.object_names[k] if k < len(phantom.object_names) else ""
            crosses = (phantom.dimension == 2 or o.shape[k] in PRISM_CODES
                       or abs(o.centre[k, cut_axis] - mid[cut_axis]) <= o.bound_radius[k])
            if label and crosses:
                placed.setdefault(label, []).append(o.centre[k])
        near = 0.03 * (extent[1] - extent[0])
        spots: list = []
        for label, centres in placed.items():  # objects sharing a name: one label at their mean
            where = np.mean(centres, axis=0)
            spot = (where[h], where[v])
            stacked = sum(1 for s in spots if np.hypot(s[0] - spot[0], s[1] - spot[1]) < near)
            spots.append(spot)
            ax.annotate(label, spot, xytext=(0, -7 * stacked), textcoords="offset points",
                        color="tab:orange", fontsize=6, ha="center", va="center",
                        parse_math=False)
        bar = _nice_length(extent[1] - extent[0])
        ax.add_artist(AnchoredSizeBar(ax.transData, bar, f"{bar:g} mm", "lower right",
                                      pad=0.4, color="white", frameon=False, size_vertical=0))
        fig.colorbar(shown, ax=ax, fraction=0.046, pad=0.02, label="mu (1/mm)")
    fig.suptitle(f"{phantom.name}: truth mu at {energy_kev:g} keV", fontsize=11,
                 parse_math=False)
    fig.get_layout_engine().set(h_pad=0.25)
    with warnings.catch_warnings():
        # names in scripts the font lacks are drawn as boxes: a drawing, not an error
        warnings.filterwarnings("ignore", message="Glyph .* missing from")
        warnings.filterwarnings("ignore", message="Matplotlib currently does not support")
        return finish_figure(fig, path, dpi=120)
