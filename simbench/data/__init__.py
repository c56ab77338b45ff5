"""The files shipped with simbench: phantoms, scanners and scenarios, found by name."""

from __future__ import annotations

from pathlib import Path

FOLDER = Path(__file__).resolve().parent


def shipped_files(kind: str) -> dict[str, Path]:
    """Shipped files of a kind (``"phantoms"``, ``"scanners"`` or ``"scenarios"``) by name
    (the file stem)."""
    return {p.stem: p for p in sorted((FOLDER / kind).glob("*.yaml"))}
