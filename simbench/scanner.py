"""Scanner files: one YAML file describing a scanner's geometry and its measurement physics.

A scanner file has the top-level keys ``name``, ``description`` (optional), ``units`` (unit of
bare-number lengths, ``mm`` or ``cm``, default mm), ``geometry`` (see docs/geometry.md) and the
physics sections ``source``, ``exposure``, ``detector`` and ``scatter`` (optional; the tracer
needs only the geometry). Each section is read by the module that owns the concern; this module
only dispatches, so the file format has one reader per section. Once both the geometry and the
physics are read, the checks that need both (and the source spectrum) run:
:func:`simbench.measure.config.check_beam`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from simbench.errors import InputError, Where
from simbench.spec import Section, load_yaml, parse_yaml_text

TOP_LEVEL_KEYS = ("name", "description", "units", "geometry", "source", "exposure", "detector",
                  "scatter")


@dataclass(frozen=True, eq=False)
class Scanner:
    """A parsed, validated scanner.

    Attributes
    ----------
    name : str
    description : str
    geometry : simbench.geometry.ScannerGeometry
        Geometry settings; ``geometry.poses()`` gives the per-view pose form.
    physics : object or None
        The source, exposure, detector and scatter settings
        (:class:`simbench.measure.config.Physics`), None when the file has no ``source``.
    source : str
        File the scanner came from.
    """

    name: str
    description: str
    geometry: Any
    physics: Any
    source: str
    _spectrum: list = field(default_factory=list, repr=False, compare=False)

    def spectrum(self, filtration_where: Where | None = None):
        """The source spectrum (:class:`simbench.materials.spectra.Spectrum`), filtration applied.

        A ``spectrum_file`` is read relative to the scanner file. The spectrum is made once
        and kept (it is immutable).

        Parameters
        ----------
        filtration_where : Where, optional
            Place of the ``source.filtration`` field, named if the filtration lets (almost)
            no photons through.

        Raises
        ------
        InputError
            The scanner has no source section; the spectrum file is missing or bad; the
            filtration passes less than
            :data:`simbench.measure.config.MIN_FILTER_TRANSMISSION` of the photons.
        """
        if self._spectrum:
            return self._spectrum[0]
        from simbench.materials.spectrum_file import load_spectrum

        if self.physics is None:
            raise InputError(Where(str(self.source), field="source"),
                             "the scanner file has no source section",
                             "add a source section (energy, kvp or spectrum_file)")
        from simbench.measure import filter_spectrum, source_spectrum

        src = self.physics.source
        where = filtration_where or Where(str(self.source), field="source.filtration")
        if src.kind != "file":
            spectrum = source_spectrum(src)
        else:
            spectrum = filter_spectrum(load_spectrum(self.spectrum_file_path()), src.filtration,
                                       where)
        self._spectrum.append(spectrum)
        return spectrum

    def spectrum_file_path(self) -> Path:
        """Path of the source's spectrum file, resolved against the scanner file's folder."""
        path = Path(self.physics.source.spectrum_file)
        return path if path.is_absolute() else Path(self.source).parent / path


def load_scanner(path: str | Path) -> Scanner:
    """Read and validate a scanner file.

    Raises
    ------
    InputError
        One line naming the file, line, column and field of the first problem.
    """
    return _read(load_yaml(path, "scanner file"), str(path))


def parse_scanner_text(text: str, source: str = "<text>") -> Scanner:
    """Read a scanner from YAML text (for tests and inline scenarios)."""
    return _read(parse_yaml_text(text, source), source)


def _read(document: Any, source: str) -> Scanner:
    if document is None:
        raise InputError(Where(source, 1, 1), "scanner file is empty",
                         "a mapping with name and geometry")
    root = Section.root(document, source)
    root.check_keys(TOP_LEVEL_KEYS, required=("name", "geometry"))
    units = root.string("units", "mm", choices=("mm", "cm"))
    root = Section(root.node, root.where, units)
    name = root.string("name")
    description = root.string("description", "")

    from simbench.geometry import parse_geometry

    geometry = parse_geometry(root.section("geometry"))
    physics = None
    if root.has("source"):
        from simbench.measure.config import parse_physics

        physics = parse_physics(root)
    else:
        for key in ("exposure", "detector", "scatter"):
            if root.has(key):
                raise root.error(key, f"'{key}' given without a 'source' section",
                                 "add a source section (energy or kvp) or remove this one")
    scanner = Scanner(name, description, geometry, physics, source)
    if physics is not None:
        from simbench.measure.config import check_beam

        source_section = root.section("source")
        try:
            spectrum = scanner.spectrum(source_section.at("filtration"))
        except InputError as error:
            if error.where.line is not None or not source_section.has("spectrum_file"):
                raise
            # a problem with the spectrum file as a whole: named at the field that points to it
            raise InputError(source_section.at("spectrum_file"),
                             f"'{scanner.spectrum_file_path()}': {error.problem}",
                             error.valid) from None
        check_beam(physics, root, geometry, spectrum)
    return scanner
