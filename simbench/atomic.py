"""Atomic file writes: a reader never sees a half-written output.

Every output of the project goes through :func:`atomic_path`: the data is written to a
temporary file in the destination folder, flushed, then renamed over the destination
(``os.replace`` is atomic on POSIX and Windows within one file system).
"""

from __future__ import annotations

import contextlib
import json
import os
import tempfile
from pathlib import Path
from typing import Any, Iterator

import numpy as np


@contextlib.contextmanager
def atomic_path(path: str | Path, suffix: str = "") -> Iterator[Path]:
    """Yield a temporary path beside ``path``; rename it onto ``path`` if the block succeeds.

    Parameters
    ----------
    path : str or Path
        Final destination. Its folder is created if missing.
    suffix : str
        Suffix for the temporary file (some writers pick the format from it, e.g. ``".png"``).
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=suffix or path.suffix,
                               dir=path.parent)
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        with open(tmp_path, "rb+") as handle:
            os.fsync(handle.fileno())
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp_path, 0o666 & ~umask)  # mkstemp makes owner-only files
        os.replace(tmp_path, path)
    finally:
        if tmp_path.exists():
            tmp_path.unlink()


def write_npy(path: str | Path, array: np.ndarray) -> None:
    """Write one array as ``.npy``, atomically."""
    with atomic_path(path, ".npy") as tmp:
        np.save(tmp, array, allow_pickle=False)


def write_json(path: str | Path, data: Any) -> None:
    """Write JSON (indented, sorted keys, UTF-8), atomically."""
    with atomic_path(path, ".json") as tmp:
        tmp.write_text(json.dumps(data, indent=2, sort_keys=True, default=_jsonable) + "\n",
                       encoding="utf-8")


def save_figure(figure, path: str | Path, **savefig_kwargs) -> None:
    """Save a matplotlib figure atomically (format from the destination's suffix)."""
    path = Path(path)
    with atomic_path(path, path.suffix or ".png") as tmp:
        figure.savefig(tmp, format=(path.suffix.lstrip(".") or "png"), **savefig_kwargs)


def _jsonable(value: Any) -> Any:
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, Path):
        return str(value)
    raise TypeError(f"cannot write {type(value).__name__} to JSON")
