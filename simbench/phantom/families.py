"""Phantom families: a phantom file whose ``random`` section draws a new phantom per sample.

A family is read once (:func:`load_family`) and sampled many times
(:meth:`PhantomFamily.sample`). Sample ``index`` of a root seed draws only from
``rng_for(root_seed, "phantom", family.name, index)``, so it is the same bits whatever the
order, the process or the machine that draws it. A plain phantom file (no ``random``
section) is a family of one: every sample is that phantom and its parameters are ``{}``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from simbench.data import shipped_files
from simbench.phantom.compiled import Phantom
from simbench.spec import load_yaml


def _resolve(path_or_name: str | Path) -> Path:
    """An existing path as given, else the shipped phantom of that name, else the path as
    given (so that reading it reports it missing)."""
    path = Path(path_or_name)
    if path.exists():
        return path
    stem = path.name[:-5] if path.name.endswith(".yaml") else path.name
    files = shipped_files("phantoms")
    if path.parent == Path(".") and stem in files:
        return files[stem]
    return path


@dataclass(eq=False)
class PhantomFamily:
    """A phantom file read once, ready to draw samples from.

    Attributes
    ----------
    name : str
        The phantom's ``name`` (part of every sample's random-stream identity).
    source : str
        The file it came from.
    dimension : int
        2 or 3.
    is_random : bool
        The file has a ``random`` section (else every sample is the same phantom).
    """

    name: str
    source: str
    dimension: int
    is_random: bool
    _document: Any = field(default=None, repr=False)
    _directory: Path | None = field(default=None, repr=False)
    _fixed: Phantom | None = field(default=None, repr=False)

    def sample(self, root_seed: int, index: int) -> tuple[Phantom, dict]:
        """Sample ``index`` of the family under ``root_seed``.

        Parameters
        ----------
        root_seed : int
            The dataset's root seed (>= 0).
        index : int
            The sample number (>= 0).

        Returns
        -------
        phantom : Phantom
            The drawn phantom, ROI names included.
        parameters : dict
            The drawn values, JSON-serialisable (``{}`` for a family of one).

        Notes
        -----
        Draws from ``rng_for(root_seed, "phantom", self.name, index)`` only, so the result
        depends on nothing but (file, root_seed, index).
        """
        _check_seed_and_index(root_seed, index)
        if not self.is_random:
            return self._fixed, {}
        raise NotImplementedError  # filled in with the random section


def _check_seed_and_index(root_seed: int, index: int) -> None:
    for what, value in (("root_seed", root_seed), ("index", index)):
        if isinstance(value, bool) or not isinstance(value, int) or value < 0:
            raise ValueError(f"{what} must be a whole number >= 0, got {value!r}")


def load_family(path_or_name: str | Path) -> PhantomFamily:
    """Read a phantom file, with or without a ``random`` section, as a family.

    Parameters
    ----------
    path_or_name : str or Path
        A phantom file, or the name of a shipped phantom (``"shepp-logan"``).

    Returns
    -------
    PhantomFamily
        A plain phantom file (or shipped phantom) is a family of one.

    Raises
    ------
    InputError
        One line naming the file, line, column and field, the problem and what is valid.

    Examples
    --------
    >>> family = load_family("shepp-logan")
    >>> phantom, parameters = family.sample(root_seed=1, index=7)
    >>> family.is_random, phantom.objects.count, parameters
    (False, 10, {})
    """
    from simbench.phantom.language import read_document

    path = _resolve(path_or_name)
    document = load_yaml(path, "phantom file")
    phantom = read_document(document, str(path), path.parent)
    return PhantomFamily(name=phantom.name, source=str(path), dimension=phantom.dimension,
                         is_random=False, _document=document, _directory=path.parent,
                         _fixed=phantom)
