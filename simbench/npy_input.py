"""Reading a user's ``.npy`` file without trusting it: header first, then only what it declares.

A voxel phantom and a pose file may name a ``.npy`` file. Such a file can be anything: a
device (``/dev/zero``), a FIFO, a header that claims 1e12 elements, an object array, data cut
short. :func:`read_npy_header` reads and checks the header alone (magic string, format
version 1.0 or 2.0, a header of at most 10 000 characters parsed by
:mod:`numpy.lib.format`'s literal reader, a plain numeric dtype, no object or structured
fields) and compares the declared data size with the file's size; the caller then estimates
its memory from the declared shape and checks it against the budget
(:func:`simbench.budget.check_bytes`) before :func:`read_npy_data` reads exactly the declared
bytes. Every problem is one :class:`~simbench.errors.InputError` line at the field that named
the file.
"""

from __future__ import annotations

import math
import os
import stat
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from numpy.lib import format as npy_format

from simbench.errors import InputError, Where

#: dtype kinds a numeric user array may have: bool, signed and unsigned integers, floats
NUMERIC_KINDS = "biuf"
#: the longest header numpy itself reads without being told to trust the file
MAX_HEADER_CHARACTERS = 10_000


@dataclass(frozen=True)
class NpyHeader:
    """What a ``.npy`` header declares.

    Attributes
    ----------
    path : Path
    shape : tuple of int
    dtype : numpy.dtype
    fortran_order : bool
    data_offset : int
        Byte offset of the data in the file.
    """

    path: Path
    shape: tuple
    dtype: np.dtype
    fortran_order: bool
    data_offset: int

    @property
    def size(self) -> int:
        """Number of elements (an exact Python int, however large the declared shape)."""
        return math.prod(self.shape)

    @property
    def data_bytes(self) -> int:
        """Bytes of data the header declares."""
        return self.size * self.dtype.itemsize


def regular_file_problem(path: Path) -> str:
    """Why ``path`` cannot be read as a data file (``""`` if it is an existing regular file).

    A device, FIFO or socket is refused before it is opened: reading ``/dev/zero`` never ends
    and opening a FIFO waits for a writer.
    """
    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        return "not found"
    except OSError as exc:
        return f"cannot be examined ({exc.strerror})"
    except (ValueError, UnicodeError):  # a NUL byte or a lone surrogate in the name
        return "is not a usable file name (it holds a NUL byte or invalid characters)"
    if stat.S_ISDIR(mode):
        return "is a folder, not a file"
    if not stat.S_ISREG(mode):
        kind = ("a FIFO (named pipe)" if stat.S_ISFIFO(mode) else
                "a device" if stat.S_ISCHR(mode) or stat.S_ISBLK(mode) else
                "a socket" if stat.S_ISSOCK(mode) else "not a regular file")
        return f"is {kind}, not a regular file"
    return ""


def read_npy_header(path: str | Path, where: Where, what: str, valid: str) -> NpyHeader:
    """Read and check the header of a ``.npy`` file; read no data.

    Parameters
    ----------
    path : str or Path
        The file.
    where : Where
        The field that named the file (every message is placed there).
    what : str
        What the file is, for messages (``"voxel file"``, ``"pose file"``).
    valid : str
        What a valid file is, for messages.

    Returns
    -------
    NpyHeader

    Raises
    ------
    InputError
        Missing or non-regular file, not a ``.npy`` file, unreadable or oversized header,
        non-numeric, object or structured dtype, negative dimensions, data size not equal to
        what the header declares (a truncated or padded file).
    """
    path = Path(path)
    problem = regular_file_problem(path)
    if problem:
        raise InputError(where, f"{what} '{path}' {problem}", valid)
    try:
        with open(path, "rb") as handle:
            version = npy_format.read_magic(handle)
            if version == (1, 0):
                shape, fortran_order, dtype = npy_format.read_array_header_1_0(
                    handle, max_header_size=MAX_HEADER_CHARACTERS)
            elif version == (2, 0):
                shape, fortran_order, dtype = npy_format.read_array_header_2_0(
                    handle, max_header_size=MAX_HEADER_CHARACTERS)
            else:
                raise InputError(where, f"{what} '{path}' uses .npy format version "
                                 f"{version[0]}.{version[1]}", valid + " (format 1.0 or 2.0)")
            offset = handle.tell()
            file_bytes = os.fstat(handle.fileno()).st_size
    except InputError:
        raise
    except OSError as exc:
        raise InputError(where, f"cannot read {what} '{path}': {exc.strerror}", valid) from None
    except (ValueError, TypeError, SyntaxError, RecursionError, OverflowError, EOFError) as exc:
        first = (str(exc).splitlines() or [type(exc).__name__])[0][:120]
        raise InputError(where, f"{what} '{path}' is not a readable .npy file ({first})",
                         valid) from None
    if dtype.hasobject or dtype.fields is not None or dtype.subdtype is not None or \
            dtype.kind not in NUMERIC_KINDS:
        raise InputError(where, f"{what} '{path}' holds values of type {dtype}, not plain "
                         "numbers", valid)
    if any(n < 0 for n in shape):
        raise InputError(where, f"{what} '{path}' declares the impossible shape {shape}", valid)
    header = NpyHeader(path, tuple(int(n) for n in shape), dtype, bool(fortran_order), offset)
    held = file_bytes - offset
    if held != header.data_bytes:
        size = "x".join(str(n) for n in header.shape) or "scalar"
        raise InputError(where, f"{what} '{path}' holds {held} bytes of data but its header "
                         f"declares {header.data_bytes} ({size} values of {dtype}): the file "
                         f"is {'truncated' if held < header.data_bytes else 'longer than declared'}",
                         valid)
    return header


def read_npy_data(header: NpyHeader, where: Where, what: str, valid: str) -> np.ndarray:
    """Read the data a checked header declares: exactly ``header.data_bytes`` bytes.

    Call :func:`read_npy_header` first, and check the memory of the declared shape against the
    budget before calling this.

    Returns
    -------
    ndarray
        The array, C-ordered, of the declared shape and dtype.
    """
    try:
        with open(header.path, "rb") as handle:
            handle.seek(header.data_offset)
            flat = np.fromfile(handle, dtype=header.dtype, count=header.size)
    except OSError as exc:
        raise InputError(where, f"cannot read {what} '{header.path}': {exc.strerror}",
                         valid) from None
    if flat.size != header.size:  # the file changed under us
        raise InputError(where, f"{what} '{header.path}' ended before its declared data", valid)
    if header.fortran_order:
        return np.ascontiguousarray(flat.reshape(header.shape[::-1]).T)
    return flat.reshape(header.shape)
