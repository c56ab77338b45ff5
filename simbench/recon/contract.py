"""The plug-in contract: what a reconstructor receives, declares and returns.

A reconstructor is a callable ``(acquisition, grid, **options) -> image`` that declares

* its **input stage**: ``"projections"`` (log-normalized line integrals, what most
  reconstruction code wants) or ``"counts"`` (raw counts with the flat and dark frames, for
  code whose calibration is under test);
* its **options**, each with a type, a default, a range or a list of choices and one line of
  help, so that a wrong name, type or value is refused in one line before any work starts.

Write one with the :func:`reconstructor` decorator::

    from simbench.recon import Option, reconstructor

    @reconstructor("my-fbp", stage="projections", options=[
        Option("window", str, "hann", "apodization window", choices=("ramp", "hann"))])
    def my_fbp(acquisition, grid, *, window):
        ...
        return image            # grid.image_shape, finite floats, mu in 1/mm

and make it findable by a ``module:function`` path or through the ``simbench.reconstructors``
entry-point group of an installed package (:mod:`simbench.recon.registry`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np

from simbench.errors import InputError, Where
from simbench.geometry.grid import ImageGrid
from simbench.geometry.poses import Poses

STAGES = ("projections", "counts")


# ------------------------------------------------------------------------------------------
# The acquisition
# ------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Acquisition:
    """The arrays of one scan, its geometry and its physics metadata.

    Attributes
    ----------
    poses : Poses
        Per-view source and detector poses in the world frame
        (:mod:`simbench.geometry.poses`).
    projections : float32 (V, C) or (V, R, C), or None
        Log-normalized line integrals ``ln((flat - dark) / (counts - dark))``, starvation
        floor applied. For photon-counting detectors with several bins: (B, V, ...).
    counts : float32, same layout as ``projections``, or None
        Raw readings, dark level included.
    flat, dark : float32 (C,) or (R, C) (per bin: (B, ...)), or None
        Air and dark frames, averaged over their readings.
    metadata : dict
        The scan's record (``scan.json``): physics settings, reference energy of the truth,
        seeds.
    source : str
        Where it came from (a scan folder, or ``"<memory>"``).
    """

    poses: Poses
    projections: np.ndarray | None = None
    counts: np.ndarray | None = None
    flat: np.ndarray | None = None
    dark: np.ndarray | None = None
    metadata: dict = field(default_factory=dict)
    source: str = "<memory>"

    @classmethod
    def from_folder(cls, folder: str | Path, *, checksums: bool = True) -> "Acquisition":
        """Read a scan folder written by ``simbench scan`` (refused unless whole and unaltered).

        Parameters
        ----------
        folder : str or Path
        checksums : bool
            Verify every file's SHA-256 against the folder's marker (reads every byte once).
        """
        import json

        from simbench.folders import verify_folder

        folder = Path(folder)
        verify_folder(folder, "scan", checksums=checksums)
        record = json.loads((folder / "scan.json").read_text(encoding="utf-8"))
        arrays = {name: np.load(folder / "measured" / f"{name}.npy", mmap_mode="r",
                                allow_pickle=False)
                  for name in ("projections", "counts", "flat", "dark")}
        return cls(poses=Poses.from_record(record["geometry"]), metadata=record,
                   source=str(folder), **arrays)

    @property
    def stages(self) -> tuple[str, ...]:
        """The input stages this acquisition can feed."""
        have = []
        if self.projections is not None:
            have.append("projections")
        if self.counts is not None and self.flat is not None and self.dark is not None:
            have.append("counts")
        return tuple(have)

    def for_stage(self, stage: str) -> "Acquisition":
        """Only the arrays of one input stage (a ``counts`` plug-in never sees projections)."""
        import dataclasses

        if stage not in self.stages:
            raise InputError(Where(self.source), f"this acquisition has no {stage} data",
                             "an acquisition with " + (" or ".join(self.stages) or "data"))
        if stage == "projections":
            return dataclasses.replace(self, counts=None, flat=None, dark=None)
        return dataclasses.replace(self, projections=None)


# ------------------------------------------------------------------------------------------
# Options
# ------------------------------------------------------------------------------------------

_TYPE_NAMES = {int: "a whole number", float: "a number", str: "text", bool: "true or false"}


@dataclass(frozen=True)
class Option:
    """One option of a reconstructor.

    Parameters
    ----------
    name : str
    kind : type
        ``int``, ``float``, ``str`` or ``bool``.
    default : object
        Used when the option is not given (None: the option is required).
    help : str
        One line.
    minimum, maximum : float, optional
        Inclusive range of numbers.
    choices : tuple of str, optional
        The allowed values of a text option.
    """

    name: str
    kind: type
    default: Any
    help: str = ""
    minimum: float | None = None
    maximum: float | None = None
    choices: tuple | None = None

    def valid(self) -> str:
        """What a valid value looks like, for messages and listings."""
        if self.choices:
            return "one of " + ", ".join(map(str, self.choices))
        text = _TYPE_NAMES.get(self.kind, self.kind.__name__)
        if self.minimum is not None and self.maximum is not None:
            return f"{text} from {self.minimum:g} to {self.maximum:g}"
        if self.minimum is not None:
            return f"{text} of at least {self.minimum:g}"
        if self.maximum is not None:
            return f"{text} of at most {self.maximum:g}"
        return text

    def convert(self, value: Any, where: Where) -> Any:
        """The value in this option's type, checked; text (from a command line) is parsed."""
        bad = InputError(where, f"'{value}' is not valid for option '{self.name}'", self.valid())
        if self.kind is bool:
            if isinstance(value, str) and value.lower() in ("true", "yes", "1", "false", "no", "0"):
                value = value.lower() in ("true", "yes", "1")
            if not isinstance(value, bool):
                raise bad
            return value
        if self.kind in (int, float):
            if isinstance(value, bool):
                raise bad
            if isinstance(value, str):
                try:
                    value = float(value) if self.kind is float else int(value, 10)
                except ValueError:
                    raise bad from None
            if self.kind is int and isinstance(value, float) and value.is_integer():
                value = int(value)
            if not isinstance(value, (int, float)) or (self.kind is int and
                                                        not isinstance(value, int)):
                raise bad
            if not math.isfinite(value):
                raise bad
            if (self.minimum is not None and value < self.minimum) or \
                    (self.maximum is not None and value > self.maximum):
                raise bad
            return self.kind(value)
        if not isinstance(value, str) or (self.choices and value not in self.choices):
            raise bad
        return value


# ------------------------------------------------------------------------------------------
# Reconstructors
# ------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Reconstructor:
    """A reconstructor with its declared stage and options.

    Attributes
    ----------
    name : str
    function : callable
        ``function(acquisition, grid, **options) -> image``.
    stage : str
        ``"projections"`` or ``"counts"``.
    options : tuple of Option
    summary : str
        One line: what it does (first line of the function's docstring by default).
    origin : str
        Where it was found: ``built-in``, ``entry point (package)``, ``module:function``,
        ``external command``.
    """

    name: str
    function: Callable
    stage: str
    options: tuple = ()
    summary: str = ""
    origin: str = "built-in"

    def check_options(self, given: dict, where: Where | None = None) -> dict:
        """Every option with its value: the given ones checked, the others defaulted.

        Raises
        ------
        InputError
            An unknown option name (with the known ones), a value of the wrong type or out
            of range, a required option missing.
        """
        where = where or Where("<command line>", field="--option")
        known = {o.name: o for o in self.options}
        for name in given:
            if name not in known:
                raise InputError(where, f"'{self.name}' has no option '{name}'",
                                 "one of " + ", ".join(known) if known else "no options")
        out = {}
        for option in self.options:
            if option.name in given:
                out[option.name] = option.convert(given[option.name], where.child(option.name)
                                                  if where.field else where)
            elif option.default is None:
                raise InputError(where, f"'{self.name}' needs option '{option.name}'",
                                 option.valid())
            else:
                out[option.name] = option.default
        return out

    def run(self, acquisition: Acquisition, grid: ImageGrid, options: dict) -> np.ndarray:
        """Check the options, call the function on the arrays of its stage, check the image.

        Returns
        -------
        float32 ndarray, ``grid.image_shape``
        """
        checked = self.check_options(options)
        image = self.function(acquisition.for_stage(self.stage), grid, **checked)
        return check_image(image, grid, self.name)


def check_image(image: Any, grid: ImageGrid, name: str, label: str = "reconstructor"
                ) -> np.ndarray:
    """The image as float32 if it has the grid's shape and finite values; else one line
    naming the ``label`` (``reconstructor``, ``command``) and ``name``."""
    where = Where(f"{label} '{name}'")
    try:
        array = np.asarray(image)
    except Exception:  # noqa: BLE001 - whatever a plug-in returned
        array = None
    if array is None or array.dtype.kind not in "fiu":
        raise InputError(where, f"returned {type(image).__name__}"
                         + (f" of dtype {array.dtype}" if array is not None else "")
                         + ", not an array of numbers", f"a float array shaped "
                         f"{tuple(grid.image_shape)}")
    if tuple(array.shape) != tuple(grid.image_shape):
        raise InputError(where, f"returned an image shaped {tuple(array.shape)}",
                         f"the grid's shape {tuple(grid.image_shape)}")
    if not np.isfinite(array).all():
        bad = int(np.size(array) - np.isfinite(array).sum())
        raise InputError(where, f"returned an image with {bad} NaN or inf values",
                         "finite values")
    return np.ascontiguousarray(array, dtype=np.float32)


def reconstructor(name: str, *, stage: str = "projections", options=(),
                  summary: str | None = None) -> Callable:
    """Declare a function as a reconstructor (its stage and options).

    Parameters
    ----------
    name : str
        The name users give to ``--algorithm`` and in scenario files.
    stage : str
        ``"projections"`` or ``"counts"``.
    options : sequence of Option
    summary : str, optional
        One line; default the first line of the function's docstring.

    Returns
    -------
    callable
        A decorator that returns the function unchanged, with a :class:`Reconstructor` in
        its ``simbench_reconstructor`` attribute.
    """
    if stage not in STAGES:
        raise ValueError(f"stage must be one of {STAGES}, got {stage!r}")

    def decorate(function: Callable) -> Callable:
        doc = (function.__doc__ or "").strip().splitlines()
        function.simbench_reconstructor = Reconstructor(
            name=name, function=function, stage=stage, options=tuple(options),
            summary=summary if summary is not None else (doc[0] if doc else ""))
        return function

    return decorate
