"""The phantom language: read a located YAML document into a compiled :class:`Phantom`.

The reader walks the document with :class:`simbench.spec.Section`, so every bad value becomes a
one-line :class:`~simbench.errors.InputError` naming the file, line, column and field. Reading
has three stages:

1. :func:`simbench.phantom.expansion.check_expansion` counts what the groups and patterns
   expand to and refuses a document that is too large, before anything is built;
2. every distinct entry (object, group, ring, array, bars) is read and checked once into a
   template in its parent's frame (an entry shared through a YAML alias, or copied by a
   pattern, is read once);
3. the templates are expanded into plain primitives placed in the world frame, which
   :mod:`simbench.phantom.build` packs into the arrays of :mod:`simbench.phantom.compiled`.

The full language and the range of every number are described in ``docs/phantom-language.md``.
"""

from __future__ import annotations

import difflib
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from simbench.errors import InputError, Where
from simbench.materials import catalogue
from simbench.materials.spec import MaterialSpec
from simbench.phantom import compiled as C
from simbench.phantom import ranges as R
from simbench.phantom.build import (CopiesTemplate, GroupTemplate, ObjectTemplate, build_phantom,
                                    check_extent, expand)
from simbench.phantom.expansion import (MAX_OBJECTS, MAX_POLYGON_VERTICES, PATTERNS,
                                        check_expansion)
from simbench.phantom.polygon import polygon_problem
from simbench.phantom.rotations import align_z_to, compose_world_rotations, rotation_about
from simbench.spec import Section, check_number

SHAPES_2D = ("circle", "ellipse", "rectangle", "polygon")
SHAPES_3D = ("sphere", "ellipsoid", "box", "cylinder", "cone")
COMMON_KEYS = ("shape", "name", "material", "mu", "mode", "roi", "edge", "centre")
SHAPE_KEYS = {
    "circle": ("radius", "angle"),
    "ellipse": ("semi_axes", "angle"),
    "rectangle": ("size", "angle"),
    "polygon": ("vertices", "angle"),
    "sphere": ("radius", "rotate"),
    "ellipsoid": ("semi_axes", "rotate"),
    "box": ("size", "rotate"),
    "cylinder": ("radius", "semi_axes", "height", "axis", "rotate"),
    "cone": ("base_radius", "top_radius", "height", "axis", "rotate"),
}
TOP_KEYS = ("name", "dimension", "units", "description", "materials", "objects", "voxels",
            "random")
#: copies of one pattern; the total over the document is limited by
#: :data:`simbench.phantom.expansion.MAX_OBJECTS` (checked first)
MAX_COPIES = MAX_OBJECTS
MATERIAL_KEYS = ("formula", "mass_fractions", "density")
ROTATE_VALID = "a list of rotations about world axes such as [x: 30, z: 45] (degrees)"


@dataclass
class Reader:
    """State of one phantom file being read."""

    source: str
    dimension: int
    directory: Path | None
    custom: dict = field(default_factory=dict)
    materials: list = field(default_factory=list)
    material_index: dict = field(default_factory=dict)
    objects: list = field(default_factory=list)
    templates: dict = field(default_factory=dict)

    # -- materials ------------------------------------------------------------------------
    def use_material(self, key: Any, spec_factory) -> int:
        if key not in self.material_index:
            self.material_index[key] = len(self.materials)
            self.materials.append(spec_factory())
        return self.material_index[key]

    def named_material(self, name: Any, where: Where) -> int:
        if not isinstance(name, str) or not name.strip():
            raise InputError(where, f"expected a material name, got {name!r}",
                             "a catalogue or custom material name such as 'water'")
        if name in self.custom:
            return self.use_material(("custom", name), lambda: self.custom[name])
        try:
            spec = catalogue.get_material(name)
        except KeyError:
            known = sorted(set(catalogue.material_names()) | set(self.custom))
            close = difflib.get_close_matches(name, known, n=3, cutoff=0.5)
            hint = ("did you mean " + " or ".join(f"'{c}'" for c in close) + "?") if close else ""
            plain = [k for k in known if "mg/ml" not in k]
            raise InputError(where, f"unknown material '{name}'" + (f"; {hint}" if hint else ""),
                             "a catalogue name (" + ", ".join(plain)
                             + ", or a dilution such as iodine-5mg/ml), a name from this file's"
                             " 'materials', or 'mu: <value> /mm'")
        return self.use_material(("catalogue", name), lambda: spec)

    def object_template(self, **fields) -> ObjectTemplate:
        """A new object template, numbered in reading order."""
        template = ObjectTemplate(index=len(self.objects), **fields)
        self.objects.append(template)
        return template

    def mu_material(self, mu_per_mm: float) -> int:
        value = float(mu_per_mm)
        return self.use_material(("mu", value), lambda: MaterialSpec(
            name=f"mu={value:.12g}/mm", kind="mu", mu_per_mm=value))


# --------------------------------------------------------------------------------------------
# Entry points
# --------------------------------------------------------------------------------------------


def read_document(document: Any, source: str, directory: Path | None) -> C.Phantom:
    """Turn a located YAML document into a :class:`~simbench.phantom.compiled.Phantom`.

    A document with a ``random`` section gives its sample 0 under root seed 0 (see
    :mod:`simbench.phantom.families` for other samples).
    """
    return read_sample(document, source, directory)[0]


def read_sample(document: Any, source: str, directory: Path | None, root_seed: int = 0,
                index: int | None = 0, *, warn: bool = True) -> tuple[C.Phantom, dict]:
    """Read a located YAML document and draw sample ``index`` of its ``random`` section.

    With ``index=None`` the whole document is checked but nothing is drawn: the phantom
    holds the fixed objects only. ``warn=False`` keeps the warnings about the random section
    (given once when a family is loaded) from repeating for every sample.

    Returns
    -------
    phantom : Phantom
    parameters : dict
        The drawn values (``{}`` without a ``random`` section).
    """
    if document is None:
        raise InputError(Where(source, 1, 1), "the phantom file is empty",
                         "a mapping with name, dimension and objects (or voxels)")
    top = Section.root(document, source)
    top.check_keys(TOP_KEYS, required=("name", "dimension"))
    units = top.string("units", "mm", choices=("mm", "cm"))
    top = Section(top.node, top.where, units)
    name = R.text(top, "name", required=True)
    dimension = top.integer("dimension")
    if dimension not in (2, 3):
        raise top.error("dimension", f"must be 2 or 3, got {dimension}", "2 or 3")
    R.text(top, "description", "")
    has_objects, has_voxels = top.has("objects"), top.has("voxels")
    has_random = top.has("random")
    if has_random and has_voxels:
        raise top.error("random", "a voxel phantom cannot have a random section",
                        "a random section beside an 'objects' list, or none")
    if has_objects == has_voxels and not (has_random and not has_voxels):
        raise InputError(top.where.child("objects"),
                         "a phantom needs exactly one of 'objects' and 'voxels'"
                         + (", got both" if has_objects else ", got neither"),
                         "an 'objects' list for an analytic phantom or a 'voxels' section")
    fixed = check_expansion(top) if has_objects else None
    reader = Reader(source, dimension, directory)
    materials = top.section("materials", None)
    if materials is not None:
        _read_custom_materials(reader, materials)
    voxels = placed = None
    parameters: dict = {}
    if has_objects or has_random:
        drawn = None
        if has_random:
            from simbench.phantom.families import read_random

            drawn = read_random(top, reader, fixed.objects if fixed else 0, warn=warn)
        items = top.sequence("objects", [])
        if has_objects and not items:
            raise top.error("objects", "the objects list is empty", "at least one object")
        templates = tuple(_read_item(reader, item, where, units) for item, where in items)
        if drawn is not None:
            fixed_placed = expand(GroupTemplate(np.zeros(3), None, templates)) if templates \
                else None
            if index is None:
                drawn.check_names(reader, fixed_placed)
            else:
                under, over, parameters = drawn.draw(reader, fixed_placed, root_seed, index)
                templates = under + templates + over
        if templates:  # a drawn sample may hold no object at all
            placed = expand(GroupTemplate(np.zeros(3), None, templates))
            check_extent(reader.objects, placed, R.MAX_EXTENT_MM)
    else:
        from simbench.phantom.voxels import read_voxels

        voxels = read_voxels(reader, top.section("voxels"))
    return build_phantom(name, dimension, reader.materials, reader.objects, placed, voxels,
                         source), parameters


def _read_custom_materials(reader: Reader, section: Section) -> None:
    for mat_name in section.keys():
        where = section.at(mat_name)
        if not isinstance(mat_name, str):
            raise InputError(where, f"material name {mat_name!r} is not text", "a name such as 'gel'")
        entry = section.section(mat_name)
        entry.check_keys(MATERIAL_KEYS, required=("density",))
        if entry.has("formula") == entry.has("mass_fractions"):
            raise InputError(entry.where, "a custom material needs exactly one of 'formula' and "
                             "'mass_fractions'", "formula: H2O or mass_fractions: {H: 0.112, O: 0.888}")
        density = check_number(entry.raw("density"), entry.at("density"), minimum=0.0,
                               exclusive_minimum=True, maximum=R.MAX_DENSITY_G_CM3,
                               unit="g/cm3")
        kwargs: dict = {"density_g_cm3": density}
        if entry.has("formula"):
            kwargs["formula"] = entry.string("formula")
        else:
            fractions = entry.section("mass_fractions")
            values = {}
            for element in fractions.keys():
                values[str(element)] = check_number(fractions.raw(element), fractions.at(element),
                                                    minimum=0.0, exclusive_minimum=True,
                                                    maximum=1.0)
            if not values:
                raise entry.error("mass_fractions", "no elements given",
                                  "element: fraction pairs such as {H: 0.112, O: 0.888}")
            kwargs["mass_fractions"] = values
        try:
            spec = catalogue.custom_material(mat_name, **kwargs)
        except ValueError as exc:
            field_name = "formula" if "formula" in kwargs else "mass_fractions"
            text = (str(exc).splitlines() or ["invalid composition"])[0]
            problem, _, valid = text.partition(" (valid: ")
            raise entry.error(field_name, problem, valid.rstrip(")") or
                              "a chemical formula such as H2O or element mass fractions summing to 1"
                              ) from None
        reader.custom[mat_name] = spec


# --------------------------------------------------------------------------------------------
# Items: objects, groups, patterns
# --------------------------------------------------------------------------------------------


def _item_kind(node: Any, where: Where) -> str:
    if not isinstance(node, dict):
        raise InputError(where, "expected an object (a mapping with 'shape') or a pattern",
                         "a mapping with one of shape, " + ", ".join(PATTERNS))
    kinds = [k for k in ("shape",) + PATTERNS if k in node]
    if len(kinds) != 1:
        problem = ("an entry needs 'shape' or one of " + ", ".join(PATTERNS) if not kinds
                   else "an entry may have only one of " + ", ".join(kinds))
        raise InputError(where, problem, "shape: <name> for one object, or group/ring/array/bars")
    if kinds[0] != "shape" and len(node) != 1:
        extra = [k for k in node if k != kinds[0]][0]
        marks = getattr(node, "key_marks", {})
        raise InputError(where.child(str(extra), *marks.get(extra, (None, None))),
                         f"unknown field '{extra}' beside '{kinds[0]}'",
                         f"put every field of the {kinds[0]} inside its '{kinds[0]}:' mapping")
    return kinds[0]


def _read_item(reader: Reader, node: Any, where: Where, units: str) -> Any:
    """The template of one entry, read once per distinct YAML node."""
    key = id(node)
    if key in reader.templates:
        return reader.templates[key]
    kind = _item_kind(node, where)
    if kind == "shape":
        template = _read_object(reader, Section(node, where, units))
    else:
        section = Section(node, where, units).section(kind)
        template = {"group": _read_group, "ring": _read_ring, "array": _read_array,
                    "bars": _read_bars}[kind](reader, section)
    reader.templates[key] = template
    return template


def _placement_rotation(reader: Reader, s: Section) -> np.ndarray | None:
    """Rotation of a group or pattern frame: 2-D 'angle', 3-D 'rotate' (None: not turned)."""
    if reader.dimension == 2:
        return rotation_about("z", R.angle(s, "angle")) if s.has("angle") else None
    return _read_rotate(s) if s.has("rotate") else None


def _read_rotate(s: Section) -> np.ndarray:
    if not s.has("rotate"):
        return np.eye(3)
    steps = []
    for item, where in s.sequence("rotate"):
        if not isinstance(item, dict) or len(item) != 1 or next(iter(item)) not in ("x", "y", "z"):
            raise InputError(where, f"a rotation step must be one axis: angle pair, got {item!r}",
                             ROTATE_VALID)
        step = Section(item, where)
        axis = next(iter(item))
        steps.append((axis, R.angle(step, axis)))
    return compose_world_rotations(steps)


def _centre(reader: Reader, s: Section) -> np.ndarray:
    values = R.point(s, "centre", reader.dimension)
    return np.array(list(values) + [0.0] * (3 - reader.dimension), dtype=np.float64)


def _read_group(reader: Reader, s: Section) -> GroupTemplate:
    allowed = ("name", "centre", "objects") + (("angle",) if reader.dimension == 2 else ("rotate",))
    s.check_keys(allowed, required=("objects",))
    R.text(s, "name")
    centre, rotation = _centre(reader, s), _placement_rotation(reader, s)
    items = s.sequence("objects")
    if not items:
        raise s.error("objects", "the group has no objects", "at least one object")
    return GroupTemplate(centre, rotation, tuple(
        _read_item(reader, item, where, s.length_unit) for item, where in items))


def _read_ring(reader: Reader, s: Section) -> CopiesTemplate:
    allowed = ("name", "centre", "radius", "count", "start_angle", "turn_copies", "object") + (
        ("angle",) if reader.dimension == 2 else ("rotate",))
    s.check_keys(allowed, required=("radius", "count", "object"))
    R.text(s, "name")
    centre, rotation = _centre(reader, s), _placement_rotation(reader, s)
    radius = R.size(s, "radius")
    count = s.integer("count", minimum=1, maximum=MAX_COPIES)
    start = R.angle(s, "start_angle")
    turn = s.boolean("turn_copies", False)
    phi = np.array([start + 2.0 * math.pi * k / count for k in range(count)])
    offsets = np.array([(radius * math.cos(p), radius * math.sin(p), 0.0) for p in phi])
    item = _read_item(reader, s.raw("object"), s.at("object"), s.length_unit)
    return CopiesTemplate(centre, rotation, offsets, phi if turn else None, " {}", item)


def _read_array(reader: Reader, s: Section) -> CopiesTemplate:
    allowed = ("name", "centre", "count", "step", "object") + (
        ("angle",) if reader.dimension == 2 else ("rotate",))
    s.check_keys(allowed, required=("count", "step", "object"))
    R.text(s, "name")
    centre, rotation = _centre(reader, s), _placement_rotation(reader, s)
    count = s.integer("count", minimum=1, maximum=MAX_COPIES)
    step = np.array(list(R.positions(s.raw("step"), s.at("step"), reader.dimension,
                                     s.length_unit, "step")) + [0.0] * (3 - reader.dimension))
    offsets = (np.arange(count) - (count - 1) / 2.0)[:, None] * step[None, :]
    item = _read_item(reader, s.raw("object"), s.at("object"), s.length_unit)
    return CopiesTemplate(centre, rotation, offsets, None, " {}", item)


def _read_bars(reader: Reader, s: Section) -> CopiesTemplate:
    allowed = ("name", "centre", "line_pairs_per_mm", "count", "length", "material", "mu", "mode",
               "roi", "edge")
    allowed += ("angle",) if reader.dimension == 2 else ("rotate", "thickness")
    s.check_keys(allowed, required=("line_pairs_per_mm", "count", "length")
                 + (("thickness",) if reader.dimension == 3 else ()))
    name = R.text(s, "name")
    lp = check_number(s.raw("line_pairs_per_mm"), s.at("line_pairs_per_mm"), minimum=0.0,
                      exclusive_minimum=True, unit="lp/mm")
    width = 1.0 / (2.0 * lp)  # one line pair = one bar + one gap of equal width
    if not R.MIN_SIZE_MM <= width <= R.MAX_LENGTH_MM:
        raise s.error("line_pairs_per_mm", f"{lp:.6g} lp/mm makes bars {width:.6g} mm wide",
                      f"from {1 / (2 * R.MAX_LENGTH_MM):g} to {1 / (2 * R.MIN_SIZE_MM):g} lp/mm "
                      f"(bars from {R.MIN_SIZE_MM:g} mm to {R.MAX_LENGTH_MM:g} mm wide)")
    count = s.integer("count", minimum=1, maximum=MAX_COPIES)
    length = R.size(s, "length")
    thickness = R.size(s, "thickness") if reader.dimension == 3 else math.inf
    centre, rotation = _centre(reader, s), _placement_rotation(reader, s)
    material, mode, roi, edge = _read_material_and_flags(reader, s)
    half = (width / 2.0, length / 2.0, thickness / 2.0)
    code = C.RECTANGLE_2D if reader.dimension == 2 else C.BOX
    bound = math.hypot(half[0], half[1]) if reader.dimension == 2 else math.sqrt(
        half[0] ** 2 + half[1] ** 2 + half[2] ** 2)
    bar = reader.object_template(code=code, centre=np.zeros(3), rotation=None, half_sizes=half,
                                 params=(0.0, 0.0, 0.0, 0.0), polygon=None, material=material,
                                 mode=mode, name=name, roi=roi, edge=edge, bound_radius=bound,
                                 where=s.where)
    offsets = np.zeros((count, 3))
    offsets[:, 0] = (np.arange(count) - (count - 1) / 2.0) * 2.0 * width
    return CopiesTemplate(centre, rotation, offsets, None, " bar {}" if roi else "", bar)


# --------------------------------------------------------------------------------------------
# One object
# --------------------------------------------------------------------------------------------


def _read_material_and_flags(reader: Reader, s: Section) -> tuple[int, int, bool, bool]:
    if s.has("material") == s.has("mu"):
        raise InputError(s.where.child("material"),
                         "an object needs exactly one of 'material' and 'mu'"
                         + (", got both" if s.has("mu") else ", got neither"),
                         "material: water, or mu: 0.02 /mm")
    mode = C.ADD if s.string("mode", "replace", choices=("replace", "add")) == "add" else C.REPLACE
    if s.has("mu"):
        material = reader.mu_material(R.mu(s, "mu", may_be_negative=mode == C.ADD))
    else:
        material = reader.named_material(s.raw("material"), s.at("material"))
    return material, mode, s.boolean("roi", False), s.boolean("edge", False)


def _read_object(reader: Reader, s: Section) -> ObjectTemplate:
    shape = s.raw("shape")
    if not isinstance(shape, str) or shape not in SHAPES_2D + SHAPES_3D:
        close = difflib.get_close_matches(str(shape), SHAPES_2D + SHAPES_3D, n=2, cutoff=0.5)
        hint = "; did you mean " + " or ".join(f"'{c}'" for c in close) + "?" if close else ""
        valid = SHAPES_2D if reader.dimension == 2 else SHAPES_3D
        raise s.error("shape", f"unknown shape {shape!r}{hint}",
                      f"in a {reader.dimension}-D phantom one of " + ", ".join(valid))
    if reader.dimension == 2 and shape in SHAPES_3D:
        raise s.error("shape", f"'{shape}' is a 3-D shape but the phantom is 2-D (dimension: 2)",
                      "in a 2-D phantom one of " + ", ".join(SHAPES_2D))
    if reader.dimension == 3 and shape in SHAPES_2D:
        raise s.error("shape", f"'{shape}' is a 2-D shape but the phantom is 3-D (dimension: 3)",
                      "in a 3-D phantom one of " + ", ".join(SHAPES_3D))
    s.check_keys(COMMON_KEYS + SHAPE_KEYS[shape])
    name = R.text(s, "name")
    material, mode, roi, edge = _read_material_and_flags(reader, s)
    centre = _centre(reader, s)
    polygon = None
    params = (0.0, 0.0, 0.0, 0.0)
    if reader.dimension == 2:
        rotation = rotation_about("z", R.angle(s, "angle"))
        if shape == "circle":
            r = R.size(s, "radius")
            code, half = C.ELLIPSE_2D, (r, r, math.inf)
        elif shape == "ellipse":
            a, b = R.sizes(s, "semi_axes", 2)
            code, half = C.ELLIPSE_2D, (a, b, math.inf)
        elif shape == "rectangle":
            w, h = R.sizes(s, "size", 2)
            code, half = C.RECTANGLE_2D, (w / 2.0, h / 2.0, math.inf)
        else:
            polygon = _read_vertices(s)
            code = C.POLYGON_2D
            half = (float(np.abs(polygon[:, 0]).max()), float(np.abs(polygon[:, 1]).max()), math.inf)
        bound = (float(np.hypot(polygon[:, 0], polygon[:, 1]).max()) if polygon is not None
                 else math.hypot(half[0], half[1]) if code == C.RECTANGLE_2D else max(half[:2]))
    else:
        axis_rotation = np.eye(3)
        if shape in ("cylinder", "cone") and s.has("axis"):
            axis = np.array(R.positions(s.raw("axis"), s.at("axis"), 3, s.length_unit,
                                             "axis component"))
            if not np.any(axis):
                raise s.error("axis", "the axis direction is the zero vector",
                              "a direction such as [0, 0, 1]")
            axis_rotation = align_z_to(axis)
        rotation = _read_rotate(s) @ axis_rotation
        if shape == "sphere":
            r = R.size(s, "radius")
            code, half = C.ELLIPSOID, (r, r, r)
        elif shape == "ellipsoid":
            code, half = C.ELLIPSOID, R.sizes(s, "semi_axes", 3)
        elif shape == "box":
            w, h, d = R.sizes(s, "size", 3)
            code, half = C.BOX, (w / 2.0, h / 2.0, d / 2.0)
        elif shape == "cylinder":
            if s.has("radius") == s.has("semi_axes"):
                raise InputError(s.where.child("radius"), "a cylinder needs exactly one of 'radius' "
                                 "and 'semi_axes'", "radius: 10, or semi_axes: [10, 6]")
            if s.has("radius"):
                r = R.size(s, "radius")
                a, b = r, r
            else:
                a, b = R.sizes(s, "semi_axes", 2)
            code, half = C.CYLINDER, (a, b, R.size(s, "height") / 2.0)
        else:
            r0 = R.size_or_zero(s, "base_radius")
            r1 = R.size_or_zero(s, "top_radius")
            if r0 == 0.0 and r1 == 0.0:
                raise s.error("base_radius", "a cone needs at least one radius > 0",
                              "base_radius and top_radius >= 0, not both zero")
            code, half = C.CONE, (max(r0, r1), max(r0, r1), R.size(s, "height") / 2.0)
            params = (r0, r1, 0.0, 0.0)
        if code == C.ELLIPSOID:
            bound = max(half)
        elif code == C.BOX:
            bound = math.sqrt(sum(h * h for h in half))
        else:
            bound = math.hypot(max(half[0], half[1]), half[2])
    return reader.object_template(
        code=code, centre=centre, rotation=rotation, half_sizes=tuple(float(h) for h in half),
        params=params, polygon=polygon, material=material, mode=mode, name=name, roi=roi,
        edge=edge, bound_radius=float(bound), where=s.where)


def _read_vertices(s: Section) -> np.ndarray:
    items = s.sequence("vertices")
    if len(items) > MAX_POLYGON_VERTICES:
        raise s.error("vertices", f"the polygon has {len(items):,} vertices",
                      f"at most {MAX_POLYGON_VERTICES:,} vertices")
    points = [R.positions(item, where, 2, s.length_unit) for item, where in items]
    polygon = np.array(points, dtype=np.float64).reshape(-1, 2)
    problem = polygon_problem(polygon)
    if problem:
        raise s.error("vertices", problem,
                      "a simple polygon: at least 3 distinct vertices in order, edges not crossing")
    extent = polygon.max(axis=0) - polygon.min(axis=0)
    if extent.min() < R.MIN_SIZE_MM:
        raise s.error("vertices", f"the polygon is only {extent.min():.3g} mm across",
                      f"a polygon at least {R.MIN_SIZE_MM:g} mm (10 nm) wide and high")
    return polygon
