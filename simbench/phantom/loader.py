"""Reading phantom files and texts (the I/O edge of the phantom package)."""

from __future__ import annotations

from pathlib import Path

from simbench.data import FOLDER as DATA_FOLDER, shipped_files
from simbench.phantom.compiled import Phantom
from simbench.phantom.language import read_document
from simbench.spec import load_yaml, parse_yaml_text


def load_phantom(path: str | Path) -> Phantom:
    """Read, check and compile a phantom file.

    Parameters
    ----------
    path : str or Path
        A phantom YAML file (see ``docs/phantom-language.md``). Voxel files named inside are
        found relative to its folder.

    Returns
    -------
    Phantom
        Materials, compiled primitives or voxel volume, object and ROI names.

    Raises
    ------
    InputError
        One line naming the file, line, column and field, the problem and what is valid.

    Examples
    --------
    >>> from simbench.phantom import load_phantom, shipped_phantom_path
    >>> load_phantom(shipped_phantom_path("shepp-logan")).objects.count
    10
    """
    path = Path(path)
    return read_document(load_yaml(path, "phantom file"), str(path), path.parent)


def parse_phantom_text(text: str, source: str = "<text>", directory: str | Path | None = None
                       ) -> Phantom:
    """Check and compile a phantom given as YAML text.

    Parameters
    ----------
    text : str
        The phantom document.
    source : str
        Name used for the file in error messages.
    directory : str or Path, optional
        Folder against which voxel file paths are resolved (default: the working folder).

    Returns
    -------
    Phantom
    """
    return read_document(parse_yaml_text(text, source), source,
                         Path(directory) if directory is not None else None)


def shipped_phantom_path(name: str) -> Path:
    """Path of a phantom shipped with simbench, e.g. ``"shepp-logan"`` (``.yaml`` optional)."""
    stem = name[:-5] if name.endswith(".yaml") else name
    return DATA_FOLDER / "phantoms" / f"{stem}.yaml"


def shipped_phantom_names() -> list[str]:
    """Names of the phantoms shipped with simbench."""
    return list(shipped_files("phantoms"))
