"""Finding reconstructors: built-ins, installed packages, module paths and external commands.

A name given to ``--algorithm`` (or in a scenario file) is looked up in this order:

1. the built-in reconstructors (:mod:`simbench.recon.builtin`);
2. the ``simbench.reconstructors`` entry-point group of installed packages: a package
   declares, in its ``pyproject.toml``::

       [project.entry-points."simbench.reconstructors"]
       my-fbp = "mypackage.recon:my_fbp"

3. a ``module:function`` path (``mypackage.recon:my_fbp``) or a file path
   (``./my_recon.py:my_fbp``).

External commands are made by :func:`simbench.recon.external.external_reconstructor`.
The target may be a function declared with :func:`simbench.recon.reconstructor`, a
:class:`~simbench.recon.contract.Reconstructor`, or a plain function (then its stage is
``projections`` and it takes no options).

Code named inside a file (scenario files travel between labs) is imported only when the
caller passes ``allow_code=True``, which the command line sets from ``--allow-code``.
"""

from __future__ import annotations

import dataclasses
import importlib
import importlib.util
import re
from importlib import metadata
from pathlib import Path

from simbench.errors import InputError, Where
from simbench.recon.contract import Reconstructor

ENTRY_POINT_GROUP = "simbench.reconstructors"
_MODULE_PATH = re.compile(r"^[A-Za-z_][\w.]*:[A-Za-z_]\w*$")
_FILE_PATH = re.compile(r"^.+\.py:[A-Za-z_]\w*$")


def builtin_reconstructors() -> dict[str, Reconstructor]:
    """The built-in reconstructors by name."""
    from simbench.recon.builtin import BUILTINS

    out = {}
    for function in BUILTINS:
        found = function.simbench_reconstructor
        out[found.name] = found
    return out


def _entry_points() -> dict:
    return {ep.name: ep for ep in metadata.entry_points(group=ENTRY_POINT_GROUP)}


def as_reconstructor(target, name: str, origin: str) -> Reconstructor:
    """A :class:`Reconstructor` from a declared function, a Reconstructor or a plain callable."""
    if isinstance(target, Reconstructor):
        return dataclasses.replace(target, origin=origin)
    declared = getattr(target, "simbench_reconstructor", None)
    if isinstance(declared, Reconstructor):
        return dataclasses.replace(declared, origin=origin)
    if callable(target):
        doc = (getattr(target, "__doc__", None) or "").strip().splitlines()
        return Reconstructor(name=name, function=target, stage="projections", options=(),
                             summary=doc[0] if doc else "", origin=origin)
    raise InputError(Where(origin), f"'{name}' is a {type(target).__name__}, not a function",
                     "a function (acquisition, grid, **options) -> image")


def find_reconstructor(spec: str, *, allow_code: bool, where: Where | None = None,
                       ) -> Reconstructor:
    """The reconstructor named by ``spec``.

    Parameters
    ----------
    spec : str
        A built-in or entry-point name, a ``module:function`` path or a ``file.py:function``
        path.
    allow_code : bool
        Whether a module or file path may be imported (True on the command line, where the
        user typed it; from a scenario file, only with ``--allow-code``).
    where : Where, optional
        The place of ``spec``, for messages.

    Raises
    ------
    InputError
        Unknown name (with the known ones), code not allowed, import failure.
    """
    where = where or Where("<command line>", field="--algorithm")
    if not isinstance(spec, str) or not spec.strip():
        raise InputError(where, f"expected a reconstructor name, got {spec!r}",
                         "a name listed by 'simbench algorithms'")
    builtins = builtin_reconstructors()
    if spec in builtins:
        return builtins[spec]
    points = _entry_points()
    if spec in points:
        point = points[spec]
        try:
            target = point.load()
        except Exception as exc:  # noqa: BLE001 - a third party's import error
            raise InputError(where, f"the installed reconstructor '{spec}' ({point.value}) "
                             f"failed to load: {type(exc).__name__}: {exc}".splitlines()[0],
                             "fix or reinstall the package that provides it") from None
        package = point.dist.name if getattr(point, "dist", None) else "an installed package"
        return as_reconstructor(target, spec, f"entry point ({package})")
    if _MODULE_PATH.match(spec) or _FILE_PATH.match(spec):
        if not allow_code:
            raise InputError(where, f"'{spec}' names code to run, and code named in a file "
                             "runs only when allowed", "pass --allow-code on the command line "
                             "if you trust this file")
        return as_reconstructor(_import(spec, where), spec.rsplit(":", 1)[1], spec)
    known = sorted(builtins) + sorted(points)
    raise InputError(where, f"unknown reconstructor '{spec}'",
                     "one of " + ", ".join(known) + ", a module:function path or a "
                     "file.py:function path")


def _import(spec: str, where: Where):
    target, function = spec.rsplit(":", 1)
    try:
        if target.endswith(".py"):
            path = Path(target)
            if not path.is_file():
                raise InputError(where, f"no Python file '{target}'", "the path of a .py file")
            loader_spec = importlib.util.spec_from_file_location(
                f"simbench_plugin_{path.stem}", path)
            module = importlib.util.module_from_spec(loader_spec)
            loader_spec.loader.exec_module(module)
        else:
            module = importlib.import_module(target)
    except InputError:
        raise
    except Exception as exc:  # noqa: BLE001 - the plug-in's own import error
        raise InputError(where, f"importing '{target}' failed: {type(exc).__name__}: "
                         f"{exc}".splitlines()[0], "an importable module or Python file") from None
    if not hasattr(module, function):
        raise InputError(where, f"'{target}' has no '{function}'",
                         "the name of a function defined there")
    return getattr(module, function)


def list_reconstructors() -> list[tuple[str, Reconstructor | None, str]]:
    """Every reconstructor found: (name, reconstructor or None, problem) rows, so that a
    package that fails to load is listed with its problem rather than hiding the rest."""
    rows = [(name, rec, "") for name, rec in builtin_reconstructors().items()]
    for name, point in sorted(_entry_points().items()):
        try:
            rows.append((name, find_reconstructor(name, allow_code=False), ""))
        except InputError as exc:
            rows.append((name, None, exc.problem))
    return rows
