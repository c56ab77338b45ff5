"""Reading a user's spectrum from a two-column text file (energy in keV, relative fluence)."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from simbench.errors import InputError, Where
from simbench.materials.attenuation import VALID_ENERGY_RANGE_KEV
from simbench.materials.spectra import Spectrum

_VALID_ROW = "two numbers per line: energy in keV and relative fluence (>= 0), e.g. '60.5 1.2e3'"


def load_spectrum(path: str | Path) -> Spectrum:
    """Read a spectrum from a text file: one bin per line, ``energy_kev fluence``.

    Blank lines and lines starting with ``#`` are skipped; columns are separated by spaces,
    tabs or a comma. Energies are bin centres in keV, increasing and equally spaced (within
    1e-6 of the spacing), inside the attenuation tables (1 to 800 keV); fluence is relative,
    finite and >= 0, with at least one positive value. The result is normalised to a total
    fluence of 1 photon/mm^2 (``absolute`` False).

    Raises
    ------
    InputError
        One line naming the file and line of the first bad row and what would be valid.
    """
    path = Path(path)
    source = str(path)
    if not path.is_file():
        raise InputError(Where(source), "spectrum file not found", "the path of a text file")
    try:
        text = path.read_text(encoding="utf-8")
    except (UnicodeDecodeError, OSError) as exc:
        raise InputError(Where(source), f"cannot read spectrum file: {exc}".splitlines()[0],
                         "a UTF-8 text file") from None
    energies: list[float] = []
    fluence: list[float] = []
    lines: list[int] = []
    lo, hi = VALID_ENERGY_RANGE_KEV
    for number, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        parts = line.replace(",", " ").split()
        where = Where(source, number, 1, "spectrum")
        if len(parts) != 2:
            raise InputError(where, f"expected 2 columns, got {len(parts)}", _VALID_ROW)
        try:
            energy, value = float(parts[0]), float(parts[1])
        except ValueError:
            raise InputError(where, f"not a number in '{line}'", _VALID_ROW) from None
        if not (math.isfinite(energy) and math.isfinite(value)):
            raise InputError(where, f"value is not finite in '{line}'", _VALID_ROW)
        if not lo <= energy <= hi:
            raise InputError(where, f"energy {energy:g} keV outside the attenuation tables",
                             f"energies from {lo:g} to {hi:g} keV")
        if value < 0:
            raise InputError(where, f"negative fluence {value:g}", "fluence >= 0")
        if energies and energy <= energies[-1]:
            raise InputError(where, f"energy {energy:g} keV does not increase "
                             f"(previous {energies[-1]:g} keV)", "increasing energies")
        energies.append(energy)
        fluence.append(value)
        lines.append(number)
    if not energies:
        raise InputError(Where(source), "no spectrum rows found", _VALID_ROW)
    e = np.array(energies)
    f = np.array(fluence)
    width = 0.0
    if e.size > 1:
        steps = np.diff(e)
        width = float(steps[0])
        bad = np.nonzero(np.abs(steps - width) > 1e-6 * width + 1e-12)[0]
        if bad.size:
            row = lines[bad[0] + 1]
            raise InputError(Where(source, row, 1, "spectrum"),
                             f"energy step {steps[bad[0]]:g} keV differs from the first step "
                             f"{width:g} keV", "equally spaced energies (bin centres)")
    total = f.sum()
    if total <= 0:
        raise InputError(Where(source), "spectrum has no positive fluence",
                         "at least one fluence > 0")
    return Spectrum(e, width, f / total, f"spectrum from {path.name}", absolute=False)
