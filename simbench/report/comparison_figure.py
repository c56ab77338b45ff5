"""Truth, reconstruction and their difference side by side, in one HU window."""

from __future__ import annotations

from pathlib import Path

import numpy as np


def to_hu(mu_per_mm: np.ndarray, mu_water: float, mu_air: float) -> np.ndarray:
    """Hounsfield units: ``1000 (mu - mu_water) / (mu_water - mu_air)`` at one energy.

    Parameters
    ----------
    mu_per_mm : ndarray
    mu_water, mu_air : float
        mu of water and of air at the image's energy, 1/mm.
    """
    return 1000.0 * (np.asarray(mu_per_mm, dtype=np.float64) - mu_water) / (mu_water - mu_air)


def draw_comparison(truth_hu: np.ndarray, image_hu: np.ndarray, extent_mm: tuple, path,
                    *, title: str = "", window: tuple = (-200.0, 200.0),
                    difference_window: float = 50.0) -> Path:
    """Write a PNG of truth, reconstruction and reconstruction - truth (2-D images, HU).

    Parameters
    ----------
    truth_hu, image_hu : float (ny, nx)
        On the same grid (row index growing with +y); NaN in the reconstruction marks pixels
        not compared (outside the field of view), shown blank.
    extent_mm : (xmin, xmax, ymin, ymax)
        Pixel edges (:meth:`simbench.geometry.grid.ImageGrid.extent_mm`).
    path : str or Path
    title : str
    window : (low, high)
        Grey-level window of truth and reconstruction, HU.
    difference_window : float
        The difference is shown from -difference_window to +difference_window HU.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from simbench.report.figures import finish_figure

    difference = np.asarray(image_hu) - np.asarray(truth_hu)
    figure, axes = plt.subplots(1, 3, figsize=(13, 4.6), layout="constrained")
    panels = ((truth_hu, "truth", "gray", window),
              (image_hu, "reconstruction", "gray", window),
              (difference, "reconstruction - truth", "RdBu_r",
               (-difference_window, difference_window)))
    for ax, (data, name, cmap, (low, high)) in zip(axes, panels):
        shown = ax.imshow(data, origin="lower", extent=extent_mm, cmap=cmap, vmin=low,
                          vmax=high, interpolation="nearest")
        ax.set_title(name)
        ax.set_xlabel("x (mm)")
        figure.colorbar(shown, ax=ax, label="HU", shrink=0.85)
    axes[0].set_ylabel("y (mm)")
    inside = np.isfinite(difference)
    rmse = float(np.sqrt(np.mean(difference[inside] ** 2)))
    figure.suptitle(f"{title}   (RMSE {rmse:.1f} HU; window {window[0]:g} to {window[1]:g} HU)"
                    .strip())
    return finish_figure(figure, path, dpi=100)
