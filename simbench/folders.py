"""Output folders that are whole or absent: the one commit protocol of every command.

A command that writes a folder of outputs (a scan, a reconstruction, a run, a dataset shard)
never writes into its final place. It builds the folder beside it and commits it in one step::

    with commit_folder(out, kind="scan") as staging:
        ...write every file under staging...
    # here out/ is the complete new folder, with complete.json written last

The protocol, in order:

1. **Lock.** ``.<name>.lock`` beside the folder is locked (``flock``) for the whole run, so two
   runs into one folder never mix: the second is refused with one line.
2. **Clean up.** Holding the lock, every ``.<name>.partial-*`` and ``.<name>.old-*`` folder
   beside the final one is a leftover of a killed run; it is removed and the command says so.
   A run killed half-way through a fallback swap (step 5) had moved the old folder aside: it is
   put back first. A caller that can resume (``resume=LEDGER``, the run command) adopts the
   newest interrupted staging folder holding that ledger instead, and keeps only what the
   ledger's checksums prove whole (:mod:`simbench.execute.reuse`).
3. **Stage.** The caller writes into ``.<name>.partial-<pid>-<token>`` beside the final folder
   (same file system, so the commit is a rename).
4. **Mark.** :data:`MARKER` (``complete.json``) is written last in the staging folder: the kind
   of folder, the simbench version, and the size and SHA-256 of every other file. Files and
   folder are flushed to disk.
5. **Swap.** A new folder is renamed into place. An existing one is exchanged with the staging
   folder in one atomic ``renameat2(RENAME_EXCHANGE)`` (Linux); where the file system cannot,
   the old folder is renamed aside, the new one into place, and the old one removed (a kill
   between the two renames leaves the old folder aside, and step 2 of the next run restores it).
   The old folder is then deleted.

After any interruption, SIGKILL included, the final path holds the complete old folder or the
complete new one. An existing folder is replaced only if it is an empty folder or a complete
simbench folder of the same kind: a user's other folder is never deleted.

Readers call :func:`verify_folder`, which refuses a folder without a valid marker, with a file
missing, added, resized or altered, in one line.
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import fcntl
import hashlib
import json
import os
import secrets
import shutil
import sys
import time
from pathlib import Path
from typing import Callable, Iterator

from simbench.atomic import output_error
from simbench.errors import InputError, Where

#: the marker file, written last; its presence with matching checksums makes a folder complete
MARKER = "complete.json"
#: format of the marker
MARKER_FORMAT = "simbench complete folder"
MARKER_VERSION = 1

_RENAME_EXCHANGE = 2
_AT_FDCWD = -100


def note(message: str) -> None:
    """Print one ``simbench: note:`` line on standard error (what a command did unasked)."""
    sys.stderr.write(f"simbench: note: {' '.join(message.split())}\n")


# ------------------------------------------------------------------------------------------
# Writing
# ------------------------------------------------------------------------------------------


@contextlib.contextmanager
def commit_folder(final: str | Path, kind: str, *, say: Callable[[str], None] = note,
                  option: str = "-o", resume: str | None = None) -> Iterator[Path]:
    """Build a folder beside ``final`` and commit it whole when the block succeeds.

    Parameters
    ----------
    final : str or Path
        The folder's final path.
    kind : str
        What the folder is (``"scan"``, ``"reconstruction"``, ``"run"``...), recorded in the
        marker; an existing folder of another kind is not replaced.
    say : callable
        Receives one line for each thing done unasked (stale folders removed or restored).
    option : str
        The command-line option that named ``final``, for messages.
    resume : str, optional
        The name of a ledger file. A staging folder left by an interrupted run that holds this
        file is adopted as the new staging folder (the newest one, if several) instead of being
        removed: the caller keeps what its ledger proves whole and deletes the rest (see
        :mod:`simbench.execute.reuse`). Likewise, when the block fails or is interrupted
        (Ctrl-C, SIGTERM, an error) after the ledger was written, the staging folder is kept
        for the next run instead of being deleted.

    Yields
    ------
    Path
        The staging folder to write into.

    Raises
    ------
    InputError
        ``final`` is a file, a folder that is not ours, a folder of another kind, being
        written by another run, or cannot be created.
    """
    final = Path(final)
    where = Where("<command line>", field=option)
    parent = final.parent
    try:
        parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise output_error(final, exc) from None
    with locked(final, where):
        adopt = _resumable(final, resume)
        _clean_stale(final, say, spare=adopt)
        _check_replaceable(final, kind, where)
        staging = parent / f".{final.name}.partial-{os.getpid()}-{secrets.token_hex(4)}"
        keep = False
        try:  # made inside the try: a signal right after the mkdir still removes it
            try:
                if adopt is not None:
                    os.rename(adopt, staging)
                    say(f"resuming from '{adopt.name}', left by an interrupted run: its "
                        "finished work is checked and kept, the rest removed")
                else:
                    staging.mkdir()
            except OSError as exc:
                raise output_error(final, exc) from None
            yield staging
            write_marker(staging, kind)
            _swap_into_place(staging, final)
        except BaseException:
            # a resumable command keeps its finished work for the next run (the staging
            # folder never looks complete: hidden name, no marker)
            if resume is not None and staging.is_dir() and (staging / resume).is_file():
                keep = True
            raise
        finally:
            if staging.exists() and not keep:
                shutil.rmtree(staging, ignore_errors=True)


def write_marker(folder: Path, kind: str) -> dict:
    """Write :data:`MARKER` in ``folder`` (last): size and SHA-256 of every other file."""
    files = {}
    for path in sorted(_files(folder)):
        rel = path.relative_to(folder).as_posix()
        files[rel] = {"bytes": path.stat().st_size, "sha256": file_sha256(path)}
        _fsync_file(path)
    import simbench

    marker = {"format": MARKER_FORMAT, "version": MARKER_VERSION, "kind": kind,
              "simbench_version": simbench.__version__,
              "written": time.strftime("%Y-%m-%dT%H:%M:%S%z"), "files": files}
    target = folder / MARKER
    with open(target, "w", encoding="utf-8") as handle:
        json.dump(marker, handle, indent=2, sort_keys=True)
        handle.write("\n")
        handle.flush()
        os.fsync(handle.fileno())
    for sub in sorted({p.parent for p in _files(folder)} | {folder}, reverse=True):
        _fsync_dir(sub)
    return marker


def _swap_into_place(staging: Path, final: Path) -> None:
    if not final.exists():
        os.rename(staging, final)
        _fsync_dir(final.parent)
        return
    if _exchange(staging, final):
        _fsync_dir(final.parent)
        shutil.rmtree(staging, ignore_errors=True)  # holds the old folder now
        return
    aside = final.parent / f".{final.name}.old-{os.getpid()}-{secrets.token_hex(4)}"
    os.rename(final, aside)
    os.rename(staging, final)
    _fsync_dir(final.parent)
    shutil.rmtree(aside, ignore_errors=True)


def _exchange(a: Path, b: Path) -> bool:
    """Swap two paths atomically (Linux ``renameat2``); False where that is not supported."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        renameat2 = libc.renameat2
    except (OSError, AttributeError):
        return False
    renameat2.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p,
                          ctypes.c_uint]
    if renameat2(_AT_FDCWD, os.fsencode(a), _AT_FDCWD, os.fsencode(b), _RENAME_EXCHANGE) == 0:
        return True
    code = ctypes.get_errno()
    if code in (errno.EINVAL, errno.ENOSYS, errno.ENOTSUP, errno.EOPNOTSUPP):
        return False
    raise OSError(code, os.strerror(code), str(b))


@contextlib.contextmanager
def locked(final: Path, where: Where) -> Iterator[None]:
    """Hold ``.<name>.lock`` beside ``final`` for the block: a second writer into the same
    place is refused with one line naming the process that holds it."""
    lock_path = final.parent / f".{final.name}.lock"
    while True:
        try:
            fd = os.open(lock_path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            raise output_error(final, exc) from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            holder = os.read(fd, 64).decode("ascii", "replace").strip() or "another process"
            os.close(fd)
            raise InputError(where, f"another simbench run (process {holder}) is writing "
                             f"'{final}'", "wait for it to finish, or choose another output "
                             "folder") from None
        try:
            same = os.fstat(fd).st_ino == os.stat(lock_path).st_ino
        except FileNotFoundError:
            same = False
        if same:  # else a finishing run unlinked the file between our open and our lock
            break
        os.close(fd)
    try:
        os.ftruncate(fd, 0)
        os.write(fd, str(os.getpid()).encode("ascii"))
        yield
    finally:
        with contextlib.suppress(OSError):
            os.unlink(lock_path)
        os.close(fd)


def _resumable(final: Path, ledger: str | None) -> Path | None:
    """The newest staging folder of an interrupted run into ``final`` holding ``ledger``."""
    if ledger is None:
        return None
    found = [p for p in final.parent.glob(f".{final.name}.partial-*")
             if p.is_dir() and not p.is_symlink() and (p / ledger).is_file()]
    return max(found, key=lambda p: (p / ledger).stat().st_mtime, default=None)


def _clean_stale(final: Path, say: Callable[[str], None], spare: Path | None = None) -> None:
    """Remove (or restore) what killed runs into ``final`` left beside it, except ``spare``;
    we hold the lock."""
    parent, name = final.parent, final.name
    asides = sorted(parent.glob(f".{name}.old-*"))
    if not final.exists():
        for aside in asides:
            if aside.is_dir() and _marker_kind(aside) is not None:
                os.rename(aside, final)
                say(f"restored '{final}' from '{aside.name}', moved aside by a run that was "
                    "killed while replacing it")
                break
    for stale in sorted(parent.glob(f".{name}.partial-*")) + sorted(parent.glob(f".{name}.old-*")):
        if stale == spare:
            continue
        size = sum(p.stat().st_size for p in _files(stale)) if stale.is_dir() else 0
        if stale.is_dir():
            shutil.rmtree(stale, ignore_errors=True)
        else:
            stale.unlink(missing_ok=True)
        say(f"removed '{stale}' ({size / 2**20:.1f} MiB), left by an interrupted run")


def _check_replaceable(final: Path, kind: str, where: Where) -> None:
    if not final.exists() and not final.is_symlink():
        return
    if not final.is_dir() or final.is_symlink():
        raise InputError(where, f"'{final}' exists and is not a folder",
                         "a new path, or an existing simbench output folder")
    if not any(final.iterdir()):
        return
    found = _marker_kind(final)
    if found is None:
        raise InputError(where, f"'{final}' is a folder that simbench did not write (no valid "
                         f"{MARKER}); refusing to replace it",
                         "a new path, or an existing complete simbench output folder")
    if found != kind:
        raise InputError(where, f"'{final}' holds {_a(found)} folder, not {_a(kind)} folder; "
                         "refusing to replace it", f"a new path, or an existing {kind} folder")


def _marker_kind(folder: Path) -> str | None:
    try:
        marker = json.loads((folder / MARKER).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(marker, dict) or marker.get("format") != MARKER_FORMAT:
        return None
    return str(marker.get("kind"))


# ------------------------------------------------------------------------------------------
# Reading
# ------------------------------------------------------------------------------------------


def verify_folder(folder: str | Path, kind: str, *, checksums: bool = True) -> dict:
    """Refuse, in one line, a folder that is not a complete, unaltered simbench ``kind`` folder.

    Parameters
    ----------
    folder : str or Path
    kind : str
        The kind of folder expected (``"scan"``...).
    checksums : bool
        Also compare every file's SHA-256 with the marker (reads every byte); False checks
        presence and sizes only.

    Returns
    -------
    dict
        The marker.
    """
    folder = Path(folder)
    where = Where(str(folder))
    if not folder.is_dir():
        raise InputError(where, f"no {kind} folder here" if not folder.exists() else
                         f"not a folder", f"the path of {_a(kind)} folder written by simbench")
    path = folder / MARKER
    try:
        marker = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(where, f"incomplete {kind} folder: {MARKER} is missing (an "
                         "interrupted run, or a folder simbench did not write)",
                         f"a complete {kind} folder; write it again") from None
    except (OSError, ValueError) as exc:
        raise InputError(Where(str(path)), f"unreadable marker: {exc}".splitlines()[0],
                         f"a complete {kind} folder; write it again") from None
    if not isinstance(marker, dict) or marker.get("format") != MARKER_FORMAT \
            or not isinstance(marker.get("files"), dict):
        raise InputError(Where(str(path)), "not a simbench marker", f"a complete {kind} folder")
    if marker.get("kind") != kind:
        raise InputError(where, f"this is {_a(str(marker.get('kind')))} folder, not "
                         f"{_a(kind)} folder", f"the path of {_a(kind)} folder")
    listed = marker["files"]
    present = {p.relative_to(folder).as_posix() for p in _files(folder)} - {MARKER}
    for rel in sorted(set(listed) - present):
        raise InputError(Where(str(folder / rel)), f"file listed in {MARKER} is missing",
                         f"a complete {kind} folder; write it again")
    for rel in sorted(present - set(listed)):
        raise InputError(Where(str(folder / rel)), f"file not listed in {MARKER} (added after "
                         "the folder was written)", f"remove it, or write the {kind} again")
    for rel, entry in sorted(listed.items()):
        path = folder / rel
        if path.stat().st_size != entry.get("bytes"):
            raise InputError(Where(str(path)), f"size differs from {MARKER} (truncated or "
                             "altered)", f"a complete {kind} folder; write it again")
        if checksums and file_sha256(path) != entry.get("sha256"):
            raise InputError(Where(str(path)), f"SHA-256 differs from {MARKER} (altered or "
                             "damaged)", f"a complete {kind} folder; write it again")
    return marker


# ------------------------------------------------------------------------------------------
# Helpers
# ------------------------------------------------------------------------------------------


def _a(kind: str) -> str:
    """``kind`` with its indefinite article: "a scan", "an export"."""
    return f"{'an' if kind[:1].lower() in 'aeiou' else 'a'} {kind}"


def file_sha256(path: Path, block: int = 8 * 2**20) -> str:
    """SHA-256 of a file, read in blocks."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        while chunk := handle.read(block):
            digest.update(chunk)
    return digest.hexdigest()


def _files(folder: Path) -> list[Path]:
    return [p for p in folder.rglob("*") if p.is_file() and not p.is_symlink()]


def _fsync_file(path: Path) -> None:
    with open(path, "rb") as handle:
        os.fsync(handle.fileno())


def _fsync_dir(path: Path) -> None:
    with contextlib.suppress(OSError):
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


