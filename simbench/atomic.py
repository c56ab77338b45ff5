"""Atomic file writes: a reader never sees a half-written output.

Every single-file output of the project goes through :func:`atomic_path`: the data is written
to a temporary file ``.<name>.tmp-<pid>-<random><suffix>`` in the destination folder, flushed,
then renamed over the destination (``os.replace`` is atomic on POSIX and Windows within one
file system). A temporary file left by a killed process (its process id no longer runs) is
removed by the next write to the same destination, which says so. Folders of outputs are
committed whole by :mod:`simbench.folders`.
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
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        _remove_stale_temporaries(path)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.tmp-{os.getpid()}-",
                                   suffix=suffix or path.suffix, dir=path.parent)
    except OSError as exc:
        raise output_error(path, exc) from None
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


def output_error(path: Path, exc: OSError):
    """The one-line :class:`~simbench.errors.InputError` for an output that cannot be written:
    the destination as the user named it and the system's reason."""
    from simbench.errors import InputError, Where

    blocker = next((p for p in [path, *path.parents] if p.exists() and not p.is_dir()), None)
    if blocker is not None and blocker != path:
        problem = f"cannot write here: '{blocker}' is a file, not a folder"
    else:
        problem = f"cannot write here: {exc.strerror or type(exc).__name__}"
    return InputError(Where(str(path)), problem,
                      "a path in a folder you can write, on a disk with room")


def _remove_stale_temporaries(path: Path) -> None:
    from simbench.folders import note

    for stale in path.parent.glob(f".{path.name}.tmp-*"):
        pid = stale.name[len(path.name) + 6:].split("-", 1)[0]
        if pid.isdigit() and not _running(int(pid)):
            with contextlib.suppress(OSError):
                stale.unlink()
                note(f"removed '{stale}', left by an interrupted run")


def _running(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def write_npy(path: str | Path, array: np.ndarray) -> None:
    """Write one array as ``.npy``, atomically; a non-finite float array is refused.

    Callers check their results first and name the input that caused a non-finite value;
    this is the last guard, so that no NaN or inf is ever written.
    """
    array = np.asarray(array)
    if array.dtype.kind in "fc" and not np.isfinite(array).all():
        from simbench.errors import InputError, Where

        raise InputError(Where(str(path)), "the result holds NaN or inf values; nothing was "
                         "written", "inputs within their documented ranges")
    with atomic_path(path, ".npy") as tmp:
        np.save(tmp, array, allow_pickle=False)


def write_json(path: str | Path, data: Any) -> None:
    """Write JSON (indented, sorted keys, UTF-8), atomically."""
    with atomic_path(path, ".json") as tmp:
        tmp.write_text(json.dumps(data, indent=2, sort_keys=True, default=_jsonable) + "\n",
                       encoding="utf-8")


def as_json_values(data: Any) -> Any:
    """``data`` as it reads back from a JSON file (arrays as lists, numpy scalars as numbers)."""
    return json.loads(json.dumps(data, default=_jsonable))


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
