"""The one error type users see for bad input.

Every problem with a user's file or argument is raised as :class:`InputError`. Its text is a
single line naming the file, the line and column, the field, what is wrong and what would be
valid; the command line prints that line and exits with code 2, never a traceback.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass


@dataclass(frozen=True)
class Where:
    """A place in a user's file: path, 1-based line and column, and the dotted field name."""

    source: str = "<input>"
    line: int | None = None
    column: int | None = None
    field: str = ""

    def __str__(self) -> str:
        place = self.source
        if self.line is not None:
            place += f":{self.line}"
            if self.column is not None:
                place += f":{self.column}"
        if self.field:
            place += f": {self.field}"
        return place

    def child(self, field: str, line: int | None = None, column: int | None = None) -> "Where":
        """The place of a sub-field; keeps this place's line where the child has none."""
        name = f"{self.field}.{field}" if self.field and not field.startswith("[") else (
            f"{self.field}{field}" if self.field else field
        )
        return Where(
            self.source,
            self.line if line is None else line,
            self.column if column is None else column,
            name,
        )


class InputError(ValueError):
    """Bad user input: one line with file, line, column, field, the problem and what is valid.

    Parameters
    ----------
    where : Where
        The place of the problem.
    problem : str
        What is wrong, e.g. ``"size must be > 0, got -3 mm"``.
    valid : str, optional
        What would be valid, e.g. ``"a positive length such as '20 mm'"``.
    """

    def __init__(self, where: Where | str, problem: str, valid: str = ""):
        if isinstance(where, str):
            where = Where(where)
        self.where = where
        self.problem = problem
        self.valid = valid
        text = f"{where}: {problem}"
        if valid:
            text += f" (valid: {valid})"
        super().__init__(" ".join(text.split()))

    def __reduce__(self):
        """Pickle by the constructor's arguments, so the error crosses to and from worker
        processes (an exception is otherwise rebuilt from ``args``, the text alone)."""
        return (type(self), (self.where, self.problem, self.valid))


class InputWarning(UserWarning):
    """A doubtful but usable input, e.g. a detector that truncates the object."""


def warn_input(where: Where | str, message: str) -> None:
    """Emit an :class:`InputWarning` with the same one-line place format as errors."""
    warnings.warn(f"{where}: {message}", InputWarning, stacklevel=2)
