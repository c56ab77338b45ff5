"""A source spectrum as a picture, with its mean energy and half-value layer."""

from __future__ import annotations

from pathlib import Path

from simbench.report.figures import finish_figure


def plot_spectrum(spectrum, path: str | Path, *, title: str | None = None) -> Path:
    """Write a PNG of a spectrum: fluence per keV against energy.

    Parameters
    ----------
    spectrum : simbench.materials.Spectrum
    path : str or Path
        Output PNG, written atomically (temporary file in the same folder, then renamed).
    title : str, optional
        Defaults to the spectrum's description.

    Returns
    -------
    Path
        The written file.

    Notes
    -----
    The title carries the mean energy (keV) and the first half-value layer in aluminium
    (mm, by air kerma); a footer carries the caution line.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    path = Path(path)
    energies = spectrum.energies_kev
    width = spectrum.bin_width_kev
    figure = Figure(figsize=(6.4, 4.2), layout="constrained")
    FigureCanvasAgg(figure)
    axes = figure.add_subplot()
    if width > 0 and energies.size > 1:
        axes.step(energies, spectrum.fluence / width, where="mid", color="C0", lw=1.0)
        unit = "photons / (mm² keV mAs) at 1 m" if spectrum.absolute else "relative fluence / keV"
    else:
        axes.vlines(energies, 0, spectrum.fluence, color="C0")
        unit = "relative fluence"
    axes.set_xlabel("energy (keV)")
    axes.set_ylabel(unit)
    axes.set_xlim(0, float(energies[-1] + max(width, 1.0)))
    axes.set_ylim(bottom=0)
    axes.grid(alpha=0.3)
    figures = f"mean {spectrum.mean_energy_kev:.1f} keV, HVL {spectrum.hvl_mm_al:.2f} mm Al"
    axes.set_title(f"{title or spectrum.description}\n{figures}", fontsize=9)
    return finish_figure(figure, path, dpi=110)
