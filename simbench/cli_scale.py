"""Command-line commands that generate and verify datasets (added to ``simbench`` by :mod:`simbench.cli`)."""

from __future__ import annotations


def add_commands(command) -> None:
    """Add this module's commands; ``command(name, help, example)`` returns a sub-parser."""
