"""The memory budget: estimate what an input will cost before doing the work, refuse what is over.

Every reader and command estimates, from the parsed input alone, the bytes the work it is
about to start would hold at once (expanded objects, pose arrays, rays and sub-rays, path
lengths, images, outputs), and calls :func:`check_bytes` *before* allocating anything large.
An estimate over the budget is one :class:`~simbench.errors.InputError` line naming the field
that drives the cost, the estimate and the budget.

The budget is, in order of precedence:

1. the command line's ``--memory-budget`` (set through :func:`set_memory_budget`);
2. the environment variable ``SIMBENCH_MEMORY_BUDGET``;
3. 80 % of the memory the system can give now (``MemAvailable`` of ``/proc/meminfo``), or
   4 GiB where that is unknown.

Sizes are written ``"8 GiB"``, ``"500 MB"``, ``"2G"`` or a plain number of bytes.
"""

from __future__ import annotations

import os
import re

from simbench.errors import InputError, Where

ENVIRONMENT_VARIABLE = "SIMBENCH_MEMORY_BUDGET"
#: fraction of the available memory that the default budget allows
DEFAULT_FRACTION = 0.8
#: budget where the available memory cannot be read
FALLBACK_BYTES = 4 * 2**30

_UNITS = {"": 1, "b": 1, "k": 10**3, "kb": 10**3, "kib": 2**10, "m": 10**6, "mb": 10**6,
          "mib": 2**20, "g": 10**9, "gb": 10**9, "gib": 2**30, "t": 10**12, "tb": 10**12,
          "tib": 2**40}
_SIZE = re.compile(r"^\s*(\d+(?:\.\d*)?|\.\d+)(?:[eE]\+?(\d{1,2}))?\s*([a-zA-Z]*)\s*$")
SIZE_VALID = "a size such as '8 GiB', '500 MB' or a number of bytes, at least 1 MiB"

_override: int | None = None


def parse_size(text: str, where: Where | str) -> int:
    """Bytes from ``"8 GiB"``, ``"500MB"``, ``"2g"`` or ``"1e9"``; one-line error otherwise."""
    match = _SIZE.match(str(text))
    unit = match.group(3).lower() if match else ""
    if not match or unit not in _UNITS:
        raise InputError(where, f"'{text}' is not a memory size", SIZE_VALID)
    number = float(match.group(1)) * 10 ** int(match.group(2) or 0) * _UNITS[unit]
    if not 2**20 <= number <= 2**60:
        raise InputError(where, f"memory budget '{text}' is out of range", SIZE_VALID)
    return int(number)


def set_memory_budget(size: int | None) -> int | None:
    """Set (bytes) or clear (None) the budget given on the command line; returns the
    previous setting, so that a caller can put it back."""
    global _override
    previous, _override = _override, (None if size is None else int(size))
    return previous


def available_memory_bytes() -> int | None:
    """Memory the system can give this process now (``MemAvailable``), or None if unknown."""
    try:
        with open("/proc/meminfo", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return None


def memory_budget_bytes() -> tuple[int, str]:
    """The budget in bytes and where it came from (for messages)."""
    if _override is not None:
        return _override, "--memory-budget"
    text = os.environ.get(ENVIRONMENT_VARIABLE, "").strip()
    if text:
        return parse_size(text, Where(f"${ENVIRONMENT_VARIABLE}")), ENVIRONMENT_VARIABLE
    have = available_memory_bytes()
    if have is None:
        return FALLBACK_BYTES, "the default budget"
    return int(DEFAULT_FRACTION * have), "80 % of the available memory"


def format_bytes(n: float) -> str:
    """``1.5 GiB``, ``320 MiB``, ``12 KiB`` or ``100 B``."""
    for unit, size in (("TiB", 2**40), ("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if n >= size:
            return f"{n / size:.3g} {unit}"
    return f"{int(n)} B"


def check_bytes(need: float, where: Where | str, what: str, valid: str) -> None:
    """Refuse, with one line, work whose estimated memory exceeds the budget.

    Parameters
    ----------
    need : float
        Estimated bytes held at once (may be a float: estimates of absurd inputs overflow
        integers' meaning long before they overflow floats).
    where : Where or str
        The field that drives the cost (file, line, column, field).
    what : str
        What the estimate covers, e.g. ``"the pose arrays of 1e9 views"``.
    valid : str
        What would fit, e.g. ``"fewer views"``.
    """
    budget, origin = memory_budget_bytes()
    if need > budget:
        raise InputError(where, f"{what} would need about {format_bytes(need)} of memory, over the "
                         f"budget of {format_bytes(budget)} ({origin})",
                         f"{valid}, or a larger budget with --memory-budget or "
                         f"{ENVIRONMENT_VARIABLE}")


def free_disk_bytes(path) -> tuple[int | None, "Path"]:
    """Free bytes on the disk that holds ``path`` (or its nearest existing parent).

    Returns
    -------
    (int or None, Path)
        The free bytes (None where the file system does not say) and the folder asked.
    """
    import shutil
    from pathlib import Path

    probe = Path(path)
    while not probe.exists() and probe != probe.parent:
        probe = probe.parent
    try:
        return shutil.disk_usage(probe).free, probe
    except OSError:
        return None, probe


def check_disk(need: float, out, where: Where | str, what: str, valid: str) -> None:
    """Refuse, with one line, outputs estimated to need more disk than is free where ``out``
    is to be written (checked before any work, so that a full disk is said up front).

    Parameters
    ----------
    need : float
        Estimated bytes written.
    out : path
        The output's destination (need not exist yet).
    where : Where or str
    what : str
        What is written, e.g. ``"the scan's outputs"``.
    valid : str
        What would fit, e.g. ``"fewer views"``; "an output folder on a larger disk" is added.
    """
    from pathlib import Path

    free, probe = free_disk_bytes(Path(out).parent)
    if free is not None and need > free:
        raise InputError(where, f"{what} would need about {format_bytes(need)} of disk and "
                         f"'{probe}' has {format_bytes(free)} free",
                         f"{valid}, or an output folder on a larger disk")
