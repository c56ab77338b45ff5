"""Counting what a phantom document expands to, before expanding it.

Groups and patterns multiply: an ``array`` of 1000 inside an ``array`` of 1000 is a million
objects, and YAML aliases (``&a`` / ``*a``) let a few kilobytes name a group of groups of
groups. :func:`check_expansion` counts the objects and polygon vertices of the whole document
from the raw YAML nodes (PyYAML builds an alias as the very same Python object as its anchor,
so counts are memoized by object identity and the count costs one visit per distinct node),
then refuses, in one line naming the pattern field and the count:

* more than :data:`MAX_OBJECTS` objects in all, or a polygon total over :data:`MAX_VERTICES`;
* groups and patterns nested more than :data:`MAX_NESTING` deep;
* an expansion whose memory estimate (:data:`BYTES_PER_OBJECT` per object,
  :data:`BYTES_PER_VERTEX` per polygon vertex) is over the memory budget
  (:func:`simbench.budget.check_bytes`).

The counter reads the document leniently (a malformed entry counts as what it would be if it
were well formed, or as nothing); the reader that runs next reports malformed entries.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

from simbench import budget
from simbench.errors import InputError, Where
from simbench.spec import Section

#: Largest number of objects a phantom may expand to (every copy of every pattern counts).
#: Far beyond any test object (the shipped phantoms hold at most 30); at this size a trace
#: already tests every object against every ray, and expanding takes about a second.
MAX_OBJECTS = 100_000
#: Largest number of vertices of one polygon (the simplicity check is quadratic in it).
MAX_POLYGON_VERTICES = 10_000
#: Largest number of polygon vertices in the expanded phantom, copies included.
MAX_VERTICES = 1_000_000
#: Deepest nesting of groups and patterns.
MAX_NESTING = 32
#: Bytes held per expanded object while the phantom is built (placed centres and rotations
#: with their temporaries, copy names, the packed arrays): the peak measured with tracemalloc
#: is about 470 B for 1e5 named ROI circles in one array and for 1e5 boxes in an array in a
#: turned ring in a group; doubled for margin.
BYTES_PER_OBJECT = 1000
#: Bytes held per expanded polygon vertex: the packed float64 pair and its concatenation
#: (measured 13 to 42 B per vertex beyond the per-object cost, YAML reading included).
BYTES_PER_VERTEX = 48
_CAP = 10**30  # counts saturate here: enough to say "far too many", cheap to multiply

PATTERNS = ("group", "ring", "array", "bars")


@dataclass(frozen=True)
class Size:
    """What one entry expands to."""

    objects: int
    vertices: int
    height: int  # levels of groups and patterns below and including this entry

    @property
    def bytes(self) -> int:
        return self.objects * BYTES_PER_OBJECT + self.vertices * BYTES_PER_VERTEX


_EMPTY = Size(0, 0, 0)


def _kind(node: Any) -> str | None:
    if not isinstance(node, dict):
        return None
    for kind in ("shape",) + PATTERNS:
        if kind in node:
            return kind
    return None


def _copies(section: Any) -> int:
    """A pattern's count as the reader will read it, or 1 when it is not a whole number."""
    value = section.get("count") if isinstance(section, dict) else None
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return 1
    if isinstance(value, float) and not value.is_integer():
        return 1
    return max(0, min(int(value), _CAP))


def _items(section: Any, key: str) -> list:
    value = section.get(key) if isinstance(section, dict) else None
    return value if isinstance(value, list) else []


class _Counter:
    def __init__(self) -> None:
        self.memo: dict[int, Size] = {}
        self.active: set[int] = set()

    def size(self, node: Any, where: Where, depth: int) -> Size:
        kind = _kind(node)
        if kind is None:
            return _EMPTY
        key = id(node)
        if key in self.memo:
            found = self.memo[key]
        elif key in self.active:  # a cycle cannot come from YAML text, but costs nothing here
            return _EMPTY
        elif kind != "shape" and depth >= MAX_NESTING:
            raise _too_deep(where)
        else:
            self.active.add(key)
            try:
                found = self._measure(node, kind, where, depth)
            finally:
                self.active.discard(key)
            self.memo[key] = found
        if depth + found.height > MAX_NESTING:
            raise _too_deep(where)
        return found

    def _measure(self, node: dict, kind: str, where: Where, depth: int) -> Size:
        if kind == "shape":
            vertices = node.get("vertices")
            return Size(1, len(vertices) if isinstance(vertices, list) else 0, 0)
        inner = node[kind]
        inner_where = _at(node, where, kind)
        if kind == "bars":
            return Size(_copies(inner), 0, 1)
        if kind == "group":
            objects = vertices = height = 0
            for item, item_where in _listed(inner, inner_where, "objects"):
                part = self.size(item, item_where, depth + 1)
                objects = min(objects + part.objects, _CAP)
                vertices = min(vertices + part.vertices, _CAP)
                height = max(height, part.height)
            return Size(objects, vertices, height + 1)
        count = _copies(inner)
        child = inner.get("object") if isinstance(inner, dict) else None
        part = self.size(child, _at(inner, inner_where, "object"), depth + 1)
        return Size(min(count * part.objects, _CAP), min(count * part.vertices, _CAP),
                    part.height + 1)


def _too_deep(where: Where) -> InputError:
    return InputError(where, f"groups and patterns nest more than {MAX_NESTING} deep here",
                      f"at most {MAX_NESTING} levels of group, ring, array and bars")


def _at(node: Any, where: Where, key: str) -> Where:
    if isinstance(node, dict):
        return Section(node, where).at(key)
    return where.child(key)


def _listed(section: Any, where: Where, key: str) -> list[tuple[Any, Where]]:
    items = _items(section, key)
    if not items:
        return []
    base = _at(section, where, key)
    marks = getattr(items, "item_marks", [(None, None)] * len(items))
    return [(item, base.child(f"[{i}]", *marks[i])) for i, item in enumerate(items)]


def _describe(n: int) -> str:
    return f"more than {_CAP:.0e}" if n >= _CAP else f"{n:,}"


def _amount(size: Size) -> str:
    """``"1,000 objects"`` or ``"1,000 objects with 5,000 polygon vertices"``."""
    text = f"{_describe(size.objects)} object{'' if size.objects == 1 else 's'}"
    if size.vertices:
        text += f" with {_describe(size.vertices)} polygon vertices"
    return text


def _culprit(counter: _Counter, node: Any, where: Where,
             measure: Callable[[Size], int], limit: int) -> tuple[Where, str, Size]:
    """The innermost entry whose own expansion is over ``limit``: its place, what it does,
    and what it expands to."""
    kind = _kind(node)
    own = counter.memo[id(node)]
    if kind == "shape":
        return where, f"this polygon has {_describe(own.vertices)} vertices", own
    inner = node[kind]
    inner_where = _at(node, where, kind)
    if kind == "group":
        for item, item_where in _listed(inner, inner_where, "objects"):
            if _kind(item) is not None and measure(counter.memo[id(item)]) > limit:
                return _culprit(counter, item, item_where, measure, limit)
        return (_at(inner, inner_where, "objects"),
                f"the objects of this group expand to {_amount(own)}", own)
    if kind in ("ring", "array"):
        child = inner.get("object")
        if _kind(child) is not None and measure(counter.memo[id(child)]) > limit:
            return _culprit(counter, child, _at(inner, inner_where, "object"), measure, limit)
        one = counter.memo[id(child)] if _kind(child) is not None else _EMPTY
        return (_at(inner, inner_where, "count"),
                f"{_describe(_copies(inner))} copies of {_amount(one)} make {_amount(own)}", own)
    return _at(inner, inner_where, "count"), f"{_amount(own)} (bars)", own


def check_expansion(top: Section) -> Size:
    """Count what the ``objects`` of a phantom document expand to; refuse what is too much.

    Parameters
    ----------
    top : Section
        The top-level mapping of the phantom document (its ``objects`` may be anything).

    Returns
    -------
    Size
        Objects, polygon vertices and nesting depth of the whole expanded document.

    Raises
    ------
    InputError
        Over :data:`MAX_OBJECTS` objects, over :data:`MAX_VERTICES` vertices, nesting over
        :data:`MAX_NESTING`, or a memory estimate over the budget; the line names the count
        field of the innermost pattern that alone is too large (or the ``objects`` list whose
        entries together are) and the count.
    """
    counter = _Counter()
    entries = _listed(top.node, top.where, "objects")
    objects = vertices = 0
    for item, where in entries:
        part = counter.size(item, where, 0)
        objects = min(objects + part.objects, _CAP)
        vertices = min(vertices + part.vertices, _CAP)
    total = Size(objects, vertices, 0)

    def problem(measure: Callable[[Size], int], limit: int) -> tuple[Where, str]:
        for item, where in entries:
            if _kind(item) is not None and measure(counter.memo[id(item)]) > limit:
                place, what, own = _culprit(counter, item, where, measure, limit)
                if (own.objects, own.vertices) != (objects, vertices):
                    what += f"; the whole phantom to {_amount(total)}"
                return place, what
        return top.at("objects"), f"the entries expand to {_amount(total)} in all"

    if objects > MAX_OBJECTS:
        where, what = problem(lambda s: s.objects, MAX_OBJECTS)
        raise InputError(where, f"{what}, over the limit of {MAX_OBJECTS:,} objects",
                         f"at most {MAX_OBJECTS:,} objects in all, copies of patterns included")
    if vertices > MAX_VERTICES:
        where, what = problem(lambda s: s.vertices, MAX_VERTICES)
        raise InputError(where, f"{what}, over the limit of {MAX_VERTICES:,} polygon vertices",
                         f"at most {MAX_VERTICES:,} polygon vertices in all, copies included")
    limit, _ = budget.memory_budget_bytes()
    if total.bytes > limit:
        where, what = problem(lambda s: s.bytes, limit)
        budget.check_bytes(total.bytes, where, f"{what}, which", "fewer copies or objects")
    return total
