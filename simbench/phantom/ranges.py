"""The documented range of every number of the phantom language, and the getters that check it.

Every number a phantom file holds is read through one of these getters, so that a value out of
its physical range is one :class:`~simbench.errors.InputError` line at its place, never a
NaN, an overflow or a silently meaningless phantom further on. The ranges are written out in
docs/phantom-language.md ("Ranges"); the reasons are beside each constant.
"""

from __future__ import annotations

import math
from typing import Any

from simbench.errors import InputError, Where
from simbench.spec import (MAX_LENGTH_MM, MIN_LENGTH_MM, Section, check_span, check_within,
                           parse_length, parse_vector)

#: Smallest size (radius, semi-axis, side, height, bar width, voxel size), mm: 10 nm, below the
#: finest resolution of any X-ray CT (about 50 nm in nano-CT; recalled from memory).
MIN_SIZE_MM = MIN_LENGTH_MM
#: Largest size and largest coordinate written in a file, mm: 100 m, beyond the largest objects
#: scanned by industrial CT (cargo containers, about 12 m; recalled from memory). With
#: MIN_SIZE_MM it spans 1e10, so float64 (16 digits) keeps 6 digits at the smallest size.
#: (simbench.spec.MAX_LENGTH_MM, shared with scanner files.)
#: Largest distance of any part of a placed object from the origin, mm, after its groups and
#: patterns have moved it (nested placements add up, so this is ten times MAX_LENGTH_MM).
MAX_EXTENT_MM = 1e6
#: Largest |angle| written in a file, degrees: one turn reaches every orientation.
MAX_ANGLE_DEG = 360.0
#: Largest |mu|, 1/mm: about eight times the largest mu of any element over the 1-800 keV of
#: the attenuation tables (uranium at 1 keV, 1.26e4 /mm, computed with xraylib).
MAX_MU_PER_MM = 1e5
#: Largest density of a custom material, g/cm3: the densest element, osmium, is 22.59
#: (fact of the trade).
MAX_DENSITY_G_CM3 = 30.0
#: Largest label value of a label volume: the range of uint16 (common practice for label maps).
MAX_LABEL = 65535

SIZE_VALID = (f"a length from {MIN_SIZE_MM:g} mm (10 nm) to {MAX_LENGTH_MM:g} mm (100 m), "
              "such as 20, '20 mm' or '2 cm'")
POSITION_VALID = (f"a length within +-{MAX_LENGTH_MM:g} mm (100 m), such as 20, '20 mm' "
                  "or '-2 cm'")
ANGLE_VALID = f"an angle from -{MAX_ANGLE_DEG:g} to {MAX_ANGLE_DEG:g} degrees, such as 30 or '30 deg'"


def check_size(mm: float, where: Where) -> float:
    """A size (already parsed, in mm) within [MIN_SIZE_MM, MAX_LENGTH_MM]."""
    return check_span(mm, where, SIZE_VALID, prefix="size ", small="smaller than 10 nm",
                      large="larger than 100 m", low=MIN_SIZE_MM)


def check_position(mm: float, where: Where, what: str = "coordinate") -> float:
    """A coordinate or vector component (already parsed, in mm) within +-MAX_LENGTH_MM."""
    return check_within(mm, where, what, POSITION_VALID)


def size(s: Section, key: str, default: Any = None) -> float:
    """A positive size in mm within the size range (``default`` when absent, if given)."""
    if default is not None and not s.has(key):
        return default
    return check_size(s.length(key, positive=True), s.at(key))


def size_or_zero(s: Section, key: str) -> float:
    """A size that may also be exactly 0 (a cone's end radius)."""
    mm = s.length(key, nonnegative=True)
    return 0.0 if mm == 0.0 else check_size(mm, s.at(key))


def sizes(s: Section, key: str, count: int) -> tuple[float, ...]:
    """A list of exactly ``count`` sizes in mm, each within the size range."""
    return parse_vector(s.raw(key), s.at(key), count, lambda v, w: check_size(
        parse_length(v, w, s.length_unit, positive=True), w))


def positions(value: Any, where: Where, count: int, unit: str,
              what: str = "coordinate") -> tuple[float, ...]:
    """A list of exactly ``count`` coordinates (or vector components) in mm, each within
    +-MAX_LENGTH_MM."""
    return parse_vector(value, where, count, lambda v, w: check_position(
        parse_length(v, w, unit), w, what))


def point(s: Section, key: str, count: int) -> tuple[float, ...]:
    """A point ``[x, y(, z)]`` (the origin when absent)."""
    if not s.has(key):
        return (0.0,) * count
    return positions(s.raw(key), s.at(key), count, s.length_unit)


def angle(s: Section, key: str, default: float = 0.0) -> float:
    """An angle in radians, written within +-MAX_ANGLE_DEG degrees."""
    if not s.has(key):
        return default
    rad = s.angle(key)
    if abs(rad) > math.radians(MAX_ANGLE_DEG) * (1.0 + 1e-12):
        raise s.error(key, f"angle {math.degrees(rad):.6g} deg is more than a turn", ANGLE_VALID)
    return rad


def mu(s: Section, key: str, may_be_negative: bool) -> float:
    """An attenuation coefficient in 1/mm within +-MAX_MU_PER_MM (>= 0 unless allowed)."""
    value = s.mu(key)
    if abs(value) > MAX_MU_PER_MM:
        raise s.error(key, f"mu {value:.6g} /mm is beyond any material",
                      f"|mu| at most {MAX_MU_PER_MM:g} /mm")
    if value < 0.0 and not may_be_negative:
        raise s.error(key, f"a replace object cannot have a negative mu ({value:.6g} /mm): it "
                      "would emit rather than absorb", "mu >= 0, or mode: add to lower the mu "
                      "of the objects below")
    return value


def text(s: Section, key: str, default: str | None = None, *, required: bool = False) -> str:
    """A name or description: text without control characters (line breaks allowed only in
    descriptions, i.e. when ``key == "description"``)."""
    if required:
        value = s.string(key)
    else:
        value = s.string(key, "" if default is None else default)
    allowed = "\n\t" if key == "description" else ""
    bad = next((c for c in value if (ord(c) < 32 or 127 <= ord(c) < 160) and c not in allowed),
               None)
    if bad is not None:
        raise s.error(key, f"contains the control character {bad!r}",
                      "text of letters, digits, spaces and punctuation (any language)")
    if required and not value.strip():
        raise s.error(key, "is empty", "a non-empty name")
    return value
