"""Reusing finished work: the item ledger of a run folder.

A run is made of items: the truth, one measurement per dose and realization, one
reconstruction per algorithm, dose and realization. Each finished item is recorded in the
ledger :data:`LEDGER` (``items.json``) with a **key**, the SHA-256 of everything its bits depend
on, and the SHA-256 of each of its files. A rerun computes the keys of its own items first; an
item whose key and file checksums match is taken over instead of being made again:

- from an interrupted run (its staging folder, adopted by
  :func:`simbench.folders.commit_folder` with ``resume=LEDGER``): files stay where they are;
- from the complete run already in the output folder: files are hard-linked (or copied) into
  the new staging folder.

Anything else found in an adopted folder (items of another key, files of an item cut short by
the interruption) is deleted before the run starts. Scoring and the report are always made
again: they are cheap and read every item.

Keys cover the simbench version, the compiled phantom and scanner (geometry poses, physics,
spectrum), the seed and the task identity, the grid and the algorithm with its options.
Reconstructions by plug-ins (entry points, module paths, external programs) are never reused:
their code can change without anything simbench can see.
"""

from __future__ import annotations

import dataclasses
import enum
import hashlib
import json
import os
import shutil
from pathlib import Path
from typing import Any

import numpy as np

#: the ledger file of a run folder
LEDGER = "items.json"
LEDGER_FORMAT = "simbench run items"


def fingerprint(*parts: Any) -> str:
    """SHA-256 (hex) of a canonical encoding of ``parts``.

    Dataclasses (fields that take part in comparison), arrays (dtype, shape and bytes), mappings
    (sorted by key), sequences, paths and scalars are encoded by value, so two equal inputs give
    one key whatever object holds them.
    """
    digest = hashlib.sha256()
    _feed(digest, parts)
    return digest.hexdigest()


def _feed(digest, value: Any) -> None:
    if isinstance(value, np.ndarray):
        array = np.ascontiguousarray(value)
        digest.update(f"a{array.dtype.str}{array.shape}".encode())
        digest.update(array.tobytes())
    elif dataclasses.is_dataclass(value) and not isinstance(value, type):
        digest.update(f"d{type(value).__qualname__}(".encode())
        for item in dataclasses.fields(value):
            if item.compare:
                digest.update(f"{item.name}=".encode())
                _feed(digest, getattr(value, item.name))
        digest.update(b")")
    elif isinstance(value, dict):
        digest.update(b"{")
        for key in sorted(value, key=repr):
            _feed(digest, key)
            _feed(digest, value[key])
        digest.update(b"}")
    elif isinstance(value, (list, tuple)):
        digest.update(f"l{len(value)}[".encode())
        for item in value:
            _feed(digest, item)
        digest.update(b"]")
    elif isinstance(value, (str, int, float, bool, type(None), Path, enum.Enum, np.generic)):
        digest.update(f"s{type(value).__name__}:{value!r};".encode())
    elif hasattr(value, "__dict__"):
        digest.update(f"o{type(value).__qualname__}".encode())
        _feed(digest, {k: v for k, v in vars(value).items() if not k.startswith("_")})
    else:
        raise TypeError(f"cannot fingerprint a {type(value).__name__}")


class Ledger:
    """The finished items of the run being written, and those it may take over.

    Parameters
    ----------
    staging : Path
        The run's staging folder (possibly adopted from an interrupted run).
    expected : dict
        Every item this run will make, by name, with its key (and None for an item that is
        never reused).
    previous : Path, optional
        The complete run folder being replaced, whose items may be linked in.
    """

    def __init__(self, staging: Path, expected: dict[str, str | None],
                 previous: Path | None = None):
        self.staging, self.expected = staging, expected
        self.items: dict[str, dict] = {}
        self.made: dict[str, dict] = {}
        self.taken = {"interrupted": [], "previous": []}
        adopted = _read_ledger(staging / LEDGER)
        keep: set[str] = set()
        for name, entry in adopted.items():
            if self._matches(name, entry, staging):
                self.items[name] = entry
                self.taken["interrupted"].append(name)
                keep.update(entry["files"])
        self._prune(keep)
        if previous is not None and previous.is_dir():
            for name, entry in _read_ledger(previous / LEDGER).items():
                if name not in self.items and self._matches(name, entry, previous):
                    for rel in entry["files"]:
                        _link(previous / rel, staging / rel)
                    self.items[name] = entry
                    self.taken["previous"].append(name)
        self._write()

    def _matches(self, name: str, entry: Any, folder: Path) -> bool:
        key = self.expected.get(name)
        if key is None or not isinstance(entry, dict) or entry.get("key") != key:
            return False
        files = entry.get("files")
        if not isinstance(files, dict) or not files:
            return False
        from simbench.folders import file_sha256

        for rel, sha in files.items():
            path = folder / rel
            if ".." in Path(rel).parts or not path.is_file() or file_sha256(path) != sha:
                return False
        return True

    def _prune(self, keep: set[str]) -> None:
        """Delete every file of the staging folder that no taken-over item claims."""
        for path in sorted(self.staging.rglob("*"), reverse=True):
            rel = path.relative_to(self.staging).as_posix()
            if path.is_dir() and not path.is_symlink():
                if not any(path.iterdir()):
                    path.rmdir()
            elif rel not in keep and rel != LEDGER:
                path.unlink()

    def get(self, name: str) -> dict | None:
        """The recorded values of a finished item, or None if it must be made."""
        entry = self.items.get(name)
        return None if entry is None else entry.get("values", {})

    def values_of(self, name: str) -> dict:
        """The values of an item made by this run or taken over ({} if neither)."""
        if name in self.made:
            return self.made[name]
        return self.items.get(name, {}).get("values", {})

    def drop(self, name: str) -> None:
        """Make an item again after all: forget it and delete its files (a linked file is
        unlinked, never written through)."""
        entry = self.items.pop(name, None)
        if entry is None:
            return
        for rel in entry["files"]:
            (self.staging / rel).unlink(missing_ok=True)
        for names in self.taken.values():
            if name in names:
                names.remove(name)
        self._write()

    def record(self, name: str, files: list[Path], values: dict | None = None) -> None:
        """Record a finished item (its files complete in the staging folder)."""
        self.made[name] = values or {}
        key = self.expected.get(name)
        if key is None:
            return
        from simbench.folders import file_sha256

        self.items[name] = {"key": key, "values": values or {},
                            "files": {p.relative_to(self.staging).as_posix(): file_sha256(p)
                                      for p in files}}
        self._write()

    def _write(self) -> None:
        from simbench.atomic import write_json

        write_json(self.staging / LEDGER, {"format": LEDGER_FORMAT, "items": self.items})

    def summary(self) -> str | None:
        """One line saying what was taken over, or None."""
        parts = []
        for source, names in self.taken.items():
            if not names:
                continue
            counts: dict[str, int] = {}
            for name in names:
                kind = name.split("/", 1)[0]
                counts[kind] = counts.get(kind, 0) + 1
            total: dict[str, int] = {}
            for name in self.expected:
                kind = name.split("/", 1)[0]
                total[kind] = total.get(kind, 0) + 1
            said = ", ".join(f"{_KIND_WORDS[k]} {counts[k]} of {total[k]}"
                             for k in _KIND_WORDS if k in counts)
            where = ("the interrupted run's work" if source == "interrupted"
                     else "the previous run in the output folder")
            parts.append(f"reused from {where}: {said}")
        return "; ".join(parts) or None


_KIND_WORDS = {"truth": "truth", "measured": "measurements", "recon": "reconstructions"}


def _read_ledger(path: Path) -> dict:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    if not isinstance(data, dict) or data.get("format") != LEDGER_FORMAT \
            or not isinstance(data.get("items"), dict):
        return {}
    return data["items"]


def _link(source: Path, target: Path) -> None:
    target.parent.mkdir(parents=True, exist_ok=True)
    try:
        os.link(source, target)
    except OSError:
        shutil.copy2(source, target)
