"""A sinogram (or projection stack) as a picture."""

from __future__ import annotations

from pathlib import Path

import numpy as np



def draw_sinogram(projections: np.ndarray, path: str | Path, *, title: str = "",
                  label: str = "line integral") -> None:
    """Write a PNG of a 2-D sinogram (n_views, n_cols), or the central row of a 3-D stack.

    Parameters
    ----------
    projections : ndarray (n_views, n_cols) or (n_views, n_rows, n_cols)
    path : str or Path
        Output PNG, written atomically.
    title : str
    label : str
        Colour-bar label.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from simbench.report.figures import finish_figure

    data = np.asarray(projections)
    if data.ndim == 3:
        data = data[:, data.shape[1] // 2, :]
        title = f"{title} (central row)".strip()
    figure, axes = plt.subplots(figsize=(6, 5), layout="constrained")
    shown = axes.imshow(data, aspect="auto", origin="upper", cmap="gray",
                        interpolation="nearest")
    axes.set_xlabel("detector column")
    axes.set_ylabel("view")
    axes.set_title(title)
    figure.colorbar(shown, ax=axes, label=label)
    finish_figure(figure, path, dpi=110)
