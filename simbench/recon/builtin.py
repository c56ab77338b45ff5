"""The built-in reconstructors, declared with their stages and options."""

from __future__ import annotations

BUILTINS: list = []
