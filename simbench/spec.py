"""Reading the project's YAML files: nodes that keep their line and column, typed fields, units.

Every file format of the project (phantom, scanner, scenario) is YAML read with the safety of
``yaml.safe_load`` and a loader that remembers where each node stood. Readers walk the document
through :class:`Section`, whose typed getters turn a wrong value into an :class:`InputError`
naming the file, line, column and field, and what would be valid.

Units
-----
Lengths are millimetres inside. A file may write a length as a bare number (in the file's
``units``, default mm) or with an explicit unit: ``"12 mm"``, ``"1.2 cm"``, ``"0.5 m"``,
``"300 um"``. Attenuation coefficients always need a unit: ``"0.0206 /mm"``, ``"0.206 /cm"``,
``"0.206 1/cm"``; a bare number for mu is an error. Angles are degrees in files (``"30 deg"`` or
a bare number), radians inside. Energies are keV (``"60 keV"`` or a bare number).
"""

from __future__ import annotations

import math
import re
from pathlib import Path
from typing import Any, Iterable

import yaml

from simbench.errors import InputError, Where

# --------------------------------------------------------------------------------------------
# Located YAML
# --------------------------------------------------------------------------------------------


class LocatedDict(dict):
    """A mapping that remembers the 1-based (line, column) of itself, its keys and its values."""

    mark: tuple[int, int] = (None, None)  # type: ignore[assignment]
    key_marks: dict
    value_marks: dict


class LocatedList(list):
    """A sequence that remembers the 1-based (line, column) of itself and of its items."""

    mark: tuple[int, int] = (None, None)  # type: ignore[assignment]
    item_marks: list


def _mark(node: yaml.Node) -> tuple[int, int]:
    return (node.start_mark.line + 1, node.start_mark.column + 1)


_SAFE_LOADER = getattr(yaml, "CSafeLoader", yaml.SafeLoader)  # libyaml's parser where present


class _LocatedLoader(_SAFE_LOADER):
    """Safe loader (libyaml's C parser where available, with PyYAML's safe constructors) that
    builds LocatedDict/LocatedList and refuses duplicate keys."""


def _construct_mapping(loader: _LocatedLoader, node: yaml.MappingNode) -> LocatedDict:
    loader.flatten_mapping(node)
    out = LocatedDict()
    out.mark = _mark(node)
    out.key_marks = {}
    out.value_marks = {}
    for key_node, value_node in node.value:
        key = loader.construct_object(key_node, deep=True)
        try:
            hash(key)
        except TypeError:
            raise yaml.constructor.ConstructorError(
                None, None, "a mapping key must be a plain value", key_node.start_mark
            )
        if key in out:
            raise yaml.constructor.ConstructorError(
                None, None, f"duplicate key '{key}'", key_node.start_mark
            )
        out[key] = loader.construct_object(value_node, deep=True)
        out.key_marks[key] = _mark(key_node)
        out.value_marks[key] = _mark(value_node)
    return out


def _construct_sequence(loader: _LocatedLoader, node: yaml.SequenceNode) -> LocatedList:
    out = LocatedList(loader.construct_object(child, deep=True) for child in node.value)
    out.mark = _mark(node)
    out.item_marks = [_mark(child) for child in node.value]
    return out


_LocatedLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)
_LocatedLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_SEQUENCE_TAG, _construct_sequence)


#: the largest YAML file read (bytes): a phantom or scanner file of hand-written text is a few
#: KiB; long pose lists belong in a pose file (.npy or .csv), which has its own limits
MAX_YAML_BYTES = 4 * 2**20
#: the deepest nesting of mappings and lists in a YAML file (the shipped files use fewer than 10)
MAX_YAML_DEPTH = 64
#: the longest number written in a YAML file, in characters (float64 needs at most 25)
MAX_NUMBER_CHARACTERS = 64

_NUMBER_LIKE = re.compile(r"^[-+]?[0-9][0-9_.,eE+-]*$")


def _check_structure(text: str, source: str) -> None:
    """Refuse nesting deeper than :data:`MAX_YAML_DEPTH` and absurdly long numbers, from the
    parser's events (an iterative pass, before any recursive construction)."""
    _check_flow_depth(text, source)
    # a stack of [is_mapping, expecting_key, last_key]: enough to name the field of a value
    stack: list = []
    for event in yaml.parse(text, Loader=_SAFE_LOADER):
        if isinstance(event, (yaml.MappingStartEvent, yaml.SequenceStartEvent)):
            if stack and stack[-1][0]:
                stack[-1][1] = True  # this collection is the value of the last key
            stack.append([isinstance(event, yaml.MappingStartEvent), True, ""])
            if len(stack) > MAX_YAML_DEPTH:
                mark = event.start_mark
                raise InputError(Where(source, mark.line + 1, mark.column + 1, ""),
                                 f"lists and mappings nested more than {MAX_YAML_DEPTH} deep",
                                 f"at most {MAX_YAML_DEPTH} levels of nesting")
        elif isinstance(event, (yaml.MappingEndEvent, yaml.SequenceEndEvent)):
            stack.pop()
        elif isinstance(event, yaml.ScalarEvent):
            in_mapping = bool(stack) and stack[-1][0]
            if in_mapping and stack[-1][1]:
                stack[-1][1], stack[-1][2] = False, event.value
                continue
            if (not event.style  # plain: None (PyYAML) or "" (libyaml)
                    and len(event.value) > MAX_NUMBER_CHARACTERS
                    and _NUMBER_LIKE.match(event.value)):
                mark = event.start_mark
                field = next((entry[2] for entry in reversed(stack) if entry[0]), "")
                raise InputError(Where(source, mark.line + 1, mark.column + 1, field),
                                 f"a number written with {len(event.value)} characters",
                                 f"a number of at most {MAX_NUMBER_CHARACTERS} characters, "
                                 "such as 1.5e-3")
            if in_mapping:
                stack[-1][1] = True


def _code_point(character) -> int:
    """PyYAML reports a bad character as text, libyaml as its number."""
    return ord(character) if isinstance(character, str) else int(character)


def _check_flow_depth(text: str, source: str) -> None:
    """Refuse flow brackets nested deeper than :data:`MAX_YAML_DEPTH` from the raw text, in
    one linear pass (a parser's cost grows faster than linearly with such nesting).

    Brackets inside quoted scalars and comments are not counted; a stray bracket in a plain
    scalar may be, which can only make the check stricter on absurd inputs.
    """
    if text.count("[") + text.count("{") <= MAX_YAML_DEPTH:
        return
    depth, quote, line, column, comment = 0, "", 1, 0, False
    for char in text:
        column += 1
        if char == "\n":
            line, column, comment = line + 1, 0, False
            continue
        if comment:
            continue
        if quote:
            if char == quote:
                quote = ""
            continue
        if char in "'\"":
            quote = char
        elif char == "#":
            comment = True
        elif char in "[{":
            depth += 1
            if depth > MAX_YAML_DEPTH:
                raise InputError(Where(source, line, column, ""),
                                 f"lists and mappings nested more than {MAX_YAML_DEPTH} deep",
                                 f"at most {MAX_YAML_DEPTH} levels of nesting")
        elif char in "]}":
            depth = max(0, depth - 1)


def parse_yaml_text(text: str, source: str = "<input>") -> Any:
    """Parse YAML text into located nodes; every error becomes one-line :class:`InputError`.

    Nesting deeper than :data:`MAX_YAML_DEPTH` and numbers longer than
    :data:`MAX_NUMBER_CHARACTERS` are refused before the document is built.
    """
    try:
        _check_structure(text, source)
        return yaml.load(text, Loader=_LocatedLoader)  # noqa: S506 - SafeLoader subclass
    except InputError:
        raise
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark is not None else None
        column = mark.column + 1 if mark is not None else None
        problem = exc.problem or exc.context or "invalid YAML"
        raise InputError(
            Where(source, line, column, ""),
            f"YAML syntax error: {problem}",
            "well-formed YAML (check indentation, colons and quotes)",
        ) from None
    except yaml.reader.ReaderError as exc:  # a character YAML does not allow, by position
        before = text[:max(0, int(exc.position))]
        line = before.count("\n") + 1
        column = len(before) - (before.rfind("\n") + 1) + 1
        raise InputError(Where(source, line, column, ""),
                         f"character U+{_code_point(exc.character):04X} is not allowed in YAML",
                         "printable text (tabs and newlines are fine)") from None
    except yaml.YAMLError as exc:  # pragma: no cover - unmarked errors are rare
        raise InputError(Where(source), f"YAML error: {exc}".splitlines()[0]) from None
    except (ValueError, OverflowError, RecursionError) as exc:  # a value PyYAML cannot build
        raise InputError(Where(source), "a value cannot be read: "
                         + (str(exc).splitlines() or [type(exc).__name__])[0][:200],
                         "plain numbers, text, lists and mappings") from None


def load_yaml(path: str | Path, what: str = "file") -> Any:
    """Read a YAML file into located nodes.

    Parameters
    ----------
    path : str or Path
        The file to read.
    what : str
        What the file should be ("phantom file", "scanner file"), used in messages.

    Raises
    ------
    InputError
        The file is missing, not a regular file (a folder, a device, a pipe), larger than
        :data:`MAX_YAML_BYTES`, unreadable, not UTF-8 (with the line and column of the first
        bad byte) or not valid YAML.
    """
    path = Path(path)
    data = read_limited(path, what, MAX_YAML_BYTES, "a YAML file")
    source = str(path)
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[:exc.start].count(b"\n") + 1
        column = exc.start - (data.rfind(b"\n", 0, exc.start) + 1) + 1
        raise InputError(Where(source, line, column, ""),
                         f"{what} is not UTF-8 text (byte 0x{data[exc.start]:02x})",
                         "a UTF-8 YAML file") from None
    return parse_yaml_text(text, source)


def read_limited(path: Path, what: str, limit: int, valid: str) -> bytes:
    """The bytes of a regular file of at most ``limit`` bytes, else one-line InputError.

    Devices (``/dev/zero``), pipes and folders are refused before anything is read, so a
    reader never blocks or reads without end.
    """
    source = str(path)
    try:
        info = path.stat()
    except FileNotFoundError:
        raise InputError(Where(source), f"{what} not found", f"the path of an existing file "
                         f"({valid})") from None
    except OSError as exc:
        raise InputError(Where(source), f"cannot read {what}: {exc.strerror}", valid) from None
    import stat

    if stat.S_ISDIR(info.st_mode):
        raise InputError(Where(source), f"{what} is a directory", f"the path of {valid}")
    if not stat.S_ISREG(info.st_mode):
        raise InputError(Where(source), f"{what} is not a regular file (a device, pipe or "
                         "socket)", f"the path of {valid}")
    if info.st_size > limit:
        raise InputError(Where(source), f"{what} is {info.st_size / 2**20:.1f} MiB, over the "
                         f"limit of {limit / 2**20:.0f} MiB", f"{valid} of at most "
                         f"{limit / 2**20:.0f} MiB")
    try:
        with open(path, "rb") as handle:
            data = handle.read(limit + 1)
    except OSError as exc:
        raise InputError(Where(source), f"cannot read {what}: {exc.strerror}", valid) from None
    if len(data) > limit:
        raise InputError(Where(source), f"{what} grew beyond {limit / 2**20:.0f} MiB while being "
                         "read", f"{valid} of at most {limit / 2**20:.0f} MiB")
    return data


# --------------------------------------------------------------------------------------------
# Units
# --------------------------------------------------------------------------------------------

LENGTH_UNITS_MM = {"mm": 1.0, "cm": 10.0, "m": 1000.0, "um": 1e-3, "µm": 1e-3}
MU_UNITS_PER_MM = {"/mm": 1.0, "1/mm": 1.0, "/cm": 0.1, "1/cm": 0.1, "/m": 1e-3, "1/m": 1e-3}
ANGLE_UNITS_RAD = {"deg": math.pi / 180.0, "rad": 1.0}
ENERGY_UNITS_KEV = {"keV": 1.0, "kev": 1.0, "MeV": 1000.0}

_NUMBER_UNIT = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?|[-+]?inf|nan)\s*(\S*)\s*$")

LENGTH_VALID = "a length such as 20, '20 mm' or '2 cm'"
MU_VALID = "an attenuation coefficient with units such as '0.0206 /mm' or '0.206 /cm'"


def split_quantity(value: Any) -> tuple[float, str] | None:
    """Split ``12``, ``"12 mm"`` or ``"-0.5cm"`` into (number, unit); None if it is neither."""
    if isinstance(value, bool):
        return None
    if isinstance(value, (int, float)):
        try:
            return float(value), ""
        except OverflowError:  # an integer beyond float64: as out of range as inf
            return math.copysign(math.inf, value), ""
    if isinstance(value, str):
        match = _NUMBER_UNIT.match(value)
        if match:
            return float(match.group(1)), match.group(2)
    return None


# --------------------------------------------------------------------------------------------
# Sections: typed, located access to a mapping
# --------------------------------------------------------------------------------------------

_MISSING = object()


class Section:
    """Typed access to one mapping of a located YAML document.

    Parameters
    ----------
    node : LocatedDict
        The mapping.
    where : Where
        Its place (file, line, column, dotted field name).
    length_unit : str
        Unit of bare-number lengths in this file (``"mm"`` or ``"cm"``).

    Notes
    -----
    Readers call :meth:`check_keys` with the keys they accept so that a misspelt or extra
    field is an error rather than silently ignored.
    """

    def __init__(self, node: Any, where: Where, length_unit: str = "mm"):
        if not isinstance(node, dict):
            raise InputError(where, f"expected a mapping of fields, got {_describe(node)}",
                             "a YAML mapping (key: value lines)")
        self.node = node
        self.where = where
        self.length_unit = length_unit

    # -- places --------------------------------------------------------------------------
    @classmethod
    def root(cls, node: Any, source: str, length_unit: str = "mm") -> "Section":
        """The top-level mapping of a document read with :func:`load_yaml`."""
        mark = getattr(node, "mark", (1, 1)) if isinstance(node, dict) else (1, 1)
        return cls(node, Where(source, mark[0], mark[1], ""), length_unit)

    def at(self, key: str) -> Where:
        """The place of field ``key`` (its value if present, else this mapping)."""
        marks = getattr(self.node, "value_marks", {})
        line, column = marks.get(key, (None, None))
        return self.where.child(str(key), line, column)

    def error(self, key: str, problem: str, valid: str = "") -> InputError:
        """An :class:`InputError` placed at field ``key``; raise it."""
        return InputError(self.at(key), problem, valid)

    # -- structure -----------------------------------------------------------------------
    def keys(self) -> list[str]:
        return list(self.node.keys())

    def has(self, key: str) -> bool:
        return key in self.node

    def check_keys(self, allowed: Iterable[str], required: Iterable[str] = ()) -> None:
        """Refuse unknown fields and missing required fields."""
        allowed = list(allowed)
        for key in self.node:
            if key not in allowed:
                marks = getattr(self.node, "key_marks", {})
                line, column = marks.get(key, (None, None))
                raise InputError(self.where.child(str(key), line, column),
                                 f"unknown field '{key}'",
                                 "one of " + ", ".join(allowed))
        for key in required:
            if key not in self.node:
                raise InputError(self.where.child(key), f"missing required field '{key}'",
                                 "add it")

    def raw(self, key: str, default: Any = _MISSING) -> Any:
        """The value as written; a missing key without default is an error."""
        if key in self.node:
            return self.node[key]
        if default is _MISSING:
            raise InputError(self.where.child(key), f"missing required field '{key}'", "add it")
        return default

    def section(self, key: str, default: Any = _MISSING) -> "Section | None":
        """The sub-mapping at ``key`` as a Section (None if absent and default is None)."""
        value = self.raw(key, default)
        if value is None and default is None:
            return None
        return Section(value, self.at(key), self.length_unit)

    def sequence(self, key: str, default: Any = _MISSING) -> list[tuple[Any, Where]]:
        """Items of the list at ``key`` with the place of each."""
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return []
        if not isinstance(value, list):
            raise self.error(key, f"expected a list, got {_describe(value)}", "a YAML list")
        marks = getattr(value, "item_marks", [(None, None)] * len(value))
        base = self.at(key)
        return [(item, base.child(f"[{i}]", *marks[i])) for i, item in enumerate(value)]

    # -- typed values --------------------------------------------------------------------
    def number(self, key: str, default: Any = _MISSING, *, minimum: float | None = None,
               maximum: float | None = None, exclusive_minimum: bool = False) -> float:
        """A finite float, optionally bounded."""
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        return check_number(value, self.at(key), minimum=minimum, maximum=maximum,
                            exclusive_minimum=exclusive_minimum)

    def integer(self, key: str, default: Any = _MISSING, *, minimum: int | None = None,
                maximum: int | None = None) -> int:
        """A whole number, optionally bounded."""
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        return check_integer(value, self.at(key), minimum=minimum, maximum=maximum)

    def string(self, key: str, default: Any = _MISSING, *, choices: Iterable[str] | None = None) -> str:
        """A string, optionally one of ``choices``."""
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        if not isinstance(value, str):
            raise self.error(key, f"expected text, got {_describe(value)}",
                             "one of " + ", ".join(choices) if choices else "a string")
        if choices is not None and value not in choices:
            choices = list(choices)
            raise self.error(key, f"'{value}' is not known", "one of " + ", ".join(choices))
        return value

    def boolean(self, key: str, default: Any = _MISSING) -> bool:
        value = self.raw(key, default)
        if not isinstance(value, bool):
            raise self.error(key, f"expected true or false, got {_describe(value)}", "true or false")
        return value

    def length(self, key: str, default: Any = _MISSING, *, positive: bool = False,
               nonnegative: bool = False) -> float:
        """A length in mm (bare numbers are in this file's unit)."""
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        return parse_length(value, self.at(key), self.length_unit, positive=positive,
                            nonnegative=nonnegative)

    def lengths(self, key: str, count: int, default: Any = _MISSING, *, positive: bool = False) -> tuple[float, ...]:
        """A list of exactly ``count`` lengths in mm."""
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        return parse_vector(value, self.at(key), count, lambda v, w: parse_length(
            v, w, self.length_unit, positive=positive))

    def angle(self, key: str, default: Any = _MISSING) -> float:
        """An angle in radians (files give degrees, bare or ``"30 deg"``, or ``"0.5 rad"``)."""
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        return parse_angle(value, self.at(key))

    def mu(self, key: str, default: Any = _MISSING) -> float:
        """An attenuation coefficient in 1/mm; units are required."""
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        return parse_mu(value, self.at(key))

    def energy(self, key: str, default: Any = _MISSING) -> float:
        """An energy in keV (bare number or ``"60 keV"``)."""
        value = self.raw(key, default)
        if value is default and default is not _MISSING:
            return value
        return parse_energy(value, self.at(key))


# --------------------------------------------------------------------------------------------
# Value parsers (usable on their own, e.g. for command-line options)
# --------------------------------------------------------------------------------------------


def _describe(value: Any) -> str:
    if value is None:
        return "nothing"
    if isinstance(value, bool):
        return f"'{value}'"
    if isinstance(value, dict):
        return "a mapping"
    if isinstance(value, list):
        return "a list"
    return f"'{value}'"


def check_number(value: Any, where: Where, *, minimum: float | None = None,
                 maximum: float | None = None, exclusive_minimum: bool = False,
                 unit: str = "") -> float:
    """A finite number within bounds, else :class:`InputError`."""
    parsed = split_quantity(value)
    if parsed is None or (parsed[1] and parsed[1] != unit):
        raise InputError(where, f"expected a number, got {_describe(value)}", "a finite number")
    number = parsed[0]
    if not math.isfinite(number):
        raise InputError(where, f"value must be finite, got {value}", "a finite number")
    suffix = f" {unit}" if unit else ""
    if minimum is not None:
        if exclusive_minimum and number <= minimum:
            raise InputError(where, f"must be > {minimum:g}{suffix}, got {number:g}{suffix}",
                             f"a number greater than {minimum:g}{suffix}")
        if not exclusive_minimum and number < minimum:
            raise InputError(where, f"must be >= {minimum:g}{suffix}, got {number:g}{suffix}",
                             f"a number of at least {minimum:g}{suffix}")
    if maximum is not None and number > maximum:
        raise InputError(where, f"must be <= {maximum:g}{suffix}, got {number:g}{suffix}",
                         f"a number of at most {maximum:g}{suffix}")
    return number


def check_integer(value: Any, where: Where, *, minimum: int | None = None,
                  maximum: int | None = None) -> int:
    """A whole number within bounds, else :class:`InputError`."""
    if isinstance(value, bool) or not (
        isinstance(value, int) or (isinstance(value, float) and value.is_integer())
    ):
        raise InputError(where, f"expected a whole number, got {_describe(value)}", "an integer")
    number = int(value)
    if minimum is not None and number < minimum:
        raise InputError(where, f"must be >= {minimum}, got {number}", f"an integer >= {minimum}")
    if maximum is not None and number > maximum:
        raise InputError(where, f"must be <= {maximum}, got {number}", f"an integer <= {maximum}")
    return number


def parse_length(value: Any, where: Where, default_unit: str = "mm", *, positive: bool = False,
                 nonnegative: bool = False) -> float:
    """A length in mm from ``12``, ``"12 mm"`` or ``"1.2 cm"``."""
    parsed = split_quantity(value)
    if parsed is None:
        raise InputError(where, f"expected a length, got {_describe(value)}", LENGTH_VALID)
    number, unit = parsed
    unit = unit or default_unit
    if unit not in LENGTH_UNITS_MM:
        raise InputError(where, f"unknown length unit '{unit}'",
                         "a length in " + ", ".join(LENGTH_UNITS_MM))
    if not math.isfinite(number):
        raise InputError(where, f"length must be finite, got {value}", LENGTH_VALID)
    mm = number * LENGTH_UNITS_MM[unit]
    if positive and mm <= 0:
        raise InputError(where, f"must be > 0, got {value}", "a positive " + LENGTH_VALID[2:])
    if nonnegative and mm < 0:
        raise InputError(where, f"must be >= 0, got {value}", "a non-negative " + LENGTH_VALID[2:])
    return mm


def parse_mu(value: Any, where: Where) -> float:
    """An attenuation coefficient in 1/mm; a bare number is an error (units are required)."""
    parsed = split_quantity(value)
    if parsed is None:
        raise InputError(where, f"expected an attenuation coefficient, got {_describe(value)}", MU_VALID)
    number, unit = parsed
    if not unit:
        raise InputError(where, f"mu '{value}' has no units", MU_VALID)
    if unit not in MU_UNITS_PER_MM:
        raise InputError(where, f"unknown attenuation unit '{unit}'",
                         "mu in " + ", ".join(MU_UNITS_PER_MM))
    if not math.isfinite(number):
        raise InputError(where, f"mu must be finite, got {value}", MU_VALID)
    return number * MU_UNITS_PER_MM[unit]


def parse_angle(value: Any, where: Where) -> float:
    """An angle in radians from degrees (bare or ``"30 deg"``) or ``"0.5 rad"``."""
    parsed = split_quantity(value)
    if parsed is None:
        raise InputError(where, f"expected an angle, got {_describe(value)}",
                         "an angle in degrees such as 30 or '30 deg'")
    number, unit = parsed
    unit = unit or "deg"
    if unit not in ANGLE_UNITS_RAD:
        raise InputError(where, f"unknown angle unit '{unit}'", "deg or rad")
    if not math.isfinite(number):
        raise InputError(where, f"angle must be finite, got {value}", "a finite angle")
    return number * ANGLE_UNITS_RAD[unit]


def parse_energy(value: Any, where: Where) -> float:
    """An energy in keV from ``60`` or ``"60 keV"``; must be > 0."""
    parsed = split_quantity(value)
    if parsed is None:
        raise InputError(where, f"expected an energy, got {_describe(value)}", "an energy such as 60 or '60 keV'")
    number, unit = parsed
    unit = unit or "keV"
    if unit not in ENERGY_UNITS_KEV:
        raise InputError(where, f"unknown energy unit '{unit}'", "keV or MeV")
    if not math.isfinite(number) or number <= 0:
        raise InputError(where, f"energy must be a positive finite number, got {value}",
                         "an energy such as 60 or '60 keV'")
    return number * ENERGY_UNITS_KEV[unit]


#: lengths any file may hold, phantom and scanner alike: 10 nm to 100 m
MIN_LENGTH_MM = 1e-5
MAX_LENGTH_MM = 1e5


def check_span(mm: float, where: Where, valid: str, *, prefix: str = "",
               small: str = "shorter than 10 nm", large: str = "longer than 100 m",
               low: float = MIN_LENGTH_MM, high: float = MAX_LENGTH_MM) -> float:
    """A positive length (already in mm) within [low, high], else one line: ``<prefix><mm>
    mm is <small|large>`` (NaN counts as too large)."""
    if not low <= mm <= high:
        raise InputError(where, f"{prefix}{mm:.6g} mm is {small if mm < low else large}", valid)
    return mm


def check_within(mm: float, where: Where, what: str, valid: str,
                 limit: float = MAX_LENGTH_MM) -> float:
    """A signed length (already in mm) within +-limit (100 m by default), else one line."""
    if not abs(mm) <= limit:
        raise InputError(where, f"{what} {mm:.6g} mm is beyond 100 m", valid)
    return mm


def parse_vector(value: Any, where: Where, count: int, parse_item) -> tuple:
    """A list of exactly ``count`` items, each read with ``parse_item(item, where)``."""
    if not isinstance(value, list) or len(value) != count:
        raise InputError(where, f"expected a list of {count} values, got {_describe(value)}",
                         f"a list of {count} values such as [" + ", ".join(["0"] * count) + "]")
    marks = getattr(value, "item_marks", [(None, None)] * len(value))
    return tuple(parse_item(item, where.child(f"[{i}]", *marks[i])) for i, item in enumerate(value))
