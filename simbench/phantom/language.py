"""The phantom language: read a located YAML document into a compiled :class:`Phantom`.

The reader walks the document with :class:`simbench.spec.Section`, so every bad value becomes a
one-line :class:`~simbench.errors.InputError` naming the file, line, column and field. Groups
and patterns (ring, array, bars) are expanded here into plain primitives placed in the world
frame; :mod:`simbench.phantom.build` packs them into the arrays of
:mod:`simbench.phantom.compiled`. The full language is described in ``docs/phantom-language.md``.
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
from simbench.phantom.polygon import polygon_problem
from simbench.phantom.rotations import align_z_to, compose_world_rotations, rotation_about
from simbench.spec import Section, check_number, parse_length, parse_vector

SHAPES_2D = ("circle", "ellipse", "rectangle", "polygon")
SHAPES_3D = ("sphere", "ellipsoid", "box", "cylinder", "cone")
PATTERNS = ("group", "ring", "array", "bars")
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
TOP_KEYS = ("name", "dimension", "units", "description", "materials", "objects", "voxels")
MAX_COPIES = 100_000  # copies per pattern: far beyond any test object, below memory trouble
MATERIAL_KEYS = ("formula", "mass_fractions", "density")
ROTATE_VALID = "a list of rotations about world axes such as [x: 30, z: 45] (degrees)"


@dataclass(frozen=True)
class Frame:
    """A placement: ``outer = origin + rotation @ local`` (mm)."""

    origin: np.ndarray
    rotation: np.ndarray

    def place(self, centre: np.ndarray, rotation: np.ndarray) -> "Frame":
        return Frame(self.origin + self.rotation @ centre, self.rotation @ rotation)


WORLD = Frame(np.zeros(3), np.eye(3))


@dataclass
class Primitive:
    """One expanded object in the world frame, before packing into arrays."""

    shape: int
    centre: np.ndarray
    to_world: np.ndarray
    half_sizes: tuple
    params: tuple = (0.0, 0.0, 0.0, 0.0)
    polygon: np.ndarray | None = None
    material: int = 0
    mode: int = C.REPLACE
    name: str = ""
    roi: bool = False
    edge: bool = False
    bound_radius: float = 0.0


@dataclass
class Reader:
    """State of one phantom file being read."""

    source: str
    dimension: int
    directory: Path | None
    custom: dict = field(default_factory=dict)
    materials: list = field(default_factory=list)
    material_index: dict = field(default_factory=dict)
    primitives: list = field(default_factory=list)

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

    def mu_material(self, mu_per_mm: float) -> int:
        value = float(mu_per_mm)
        return self.use_material(("mu", value), lambda: MaterialSpec(
            name=f"mu={value:.12g}/mm", kind="mu", mu_per_mm=value))


# --------------------------------------------------------------------------------------------
# Entry points
# --------------------------------------------------------------------------------------------


def read_document(document: Any, source: str, directory: Path | None) -> C.Phantom:
    """Turn a located YAML document into a :class:`~simbench.phantom.compiled.Phantom`."""
    if document is None:
        raise InputError(Where(source, 1, 1), "the phantom file is empty",
                         "a mapping with name, dimension and objects (or voxels)")
    top = Section.root(document, source)
    top.check_keys(TOP_KEYS, required=("name", "dimension"))
    units = top.string("units", "mm", choices=("mm", "cm"))
    top = Section(top.node, top.where, units)
    name = top.string("name")
    dimension = top.integer("dimension")
    if dimension not in (2, 3):
        raise top.error("dimension", f"must be 2 or 3, got {dimension}", "2 or 3")
    top.raw("description", "")
    has_objects, has_voxels = top.has("objects"), top.has("voxels")
    if has_objects == has_voxels:
        raise InputError(top.where.child("objects"),
                         "a phantom needs exactly one of 'objects' and 'voxels'"
                         + (", got both" if has_objects else ", got neither"),
                         "an 'objects' list for an analytic phantom or a 'voxels' section")
    reader = Reader(source, dimension, directory)
    materials = top.section("materials", None)
    if materials is not None:
        _read_custom_materials(reader, materials)
    voxels = None
    if has_objects:
        items = top.sequence("objects")
        if not items:
            raise top.error("objects", "the objects list is empty", "at least one object")
        for item, where in items:
            _read_item(reader, item, where, units, WORLD, "")
    else:
        from simbench.phantom.voxels import read_voxels

        voxels = read_voxels(reader, top.section("voxels"))
    from simbench.phantom.build import build_phantom

    return build_phantom(name, dimension, reader.materials, reader.primitives, voxels, source)


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
                                exclusive_minimum=True, unit="g/cm3")
        kwargs: dict = {"density_g_cm3": density}
        if entry.has("formula"):
            kwargs["formula"] = entry.string("formula")
        else:
            fractions = entry.section("mass_fractions")
            values = {}
            for element in fractions.keys():
                values[str(element)] = check_number(fractions.raw(element), fractions.at(element),
                                                    minimum=0.0, exclusive_minimum=True)
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


def _read_item(reader: Reader, node: Any, where: Where, units: str, frame: Frame,
               suffix: str) -> None:
    kind = _item_kind(node, where)
    if kind == "shape":
        _read_object(reader, Section(node, where, units), frame, suffix)
        return
    section = Section(node, where, units).section(kind)
    {"group": _read_group, "ring": _read_ring, "array": _read_array, "bars": _read_bars}[kind](
        reader, section, frame, suffix)


def _placement_rotation(reader: Reader, s: Section) -> np.ndarray:
    """Rotation of a group or pattern frame: 2-D 'angle', 3-D 'rotate'."""
    if reader.dimension == 2:
        return rotation_about("z", s.angle("angle", 0.0))
    return _read_rotate(s)


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
        steps.append((axis, step.angle(axis)))
    return compose_world_rotations(steps)


def _centre(reader: Reader, s: Section) -> np.ndarray:
    values = s.lengths("centre", reader.dimension, (0.0,) * reader.dimension)
    return np.array(list(values) + [0.0] * (3 - reader.dimension), dtype=np.float64)


def _named(name: str, suffix: str) -> str:
    return f"{name}{suffix}" if name else ""


def _read_group(reader: Reader, s: Section, frame: Frame, suffix: str) -> None:
    allowed = ("name", "centre", "objects") + (("angle",) if reader.dimension == 2 else ("rotate",))
    s.check_keys(allowed, required=("objects",))
    s.string("name", "")
    inner = frame.place(_centre(reader, s), _placement_rotation(reader, s))
    items = s.sequence("objects")
    if not items:
        raise s.error("objects", "the group has no objects", "at least one object")
    for item, where in items:
        _read_item(reader, item, where, s.length_unit, inner, suffix)


def _read_ring(reader: Reader, s: Section, frame: Frame, suffix: str) -> None:
    allowed = ("name", "centre", "radius", "count", "start_angle", "turn_copies", "object") + (
        ("angle",) if reader.dimension == 2 else ("rotate",))
    s.check_keys(allowed, required=("radius", "count", "object"))
    s.string("name", "")
    ring = frame.place(_centre(reader, s), _placement_rotation(reader, s))
    radius = s.length("radius", positive=True)
    count = s.integer("count", minimum=1, maximum=MAX_COPIES)
    start = s.angle("start_angle", 0.0)
    turn = s.boolean("turn_copies", False)
    for k in range(count):
        phi = start + 2.0 * math.pi * k / count
        offset = np.array([radius * math.cos(phi), radius * math.sin(phi), 0.0])
        copy = ring.place(offset, rotation_about("z", phi) if turn else np.eye(3))
        _read_item(reader, s.raw("object"), s.at("object"), s.length_unit, copy,
                   f"{suffix} {k + 1}")


def _read_array(reader: Reader, s: Section, frame: Frame, suffix: str) -> None:
    allowed = ("name", "centre", "count", "step", "object") + (
        ("angle",) if reader.dimension == 2 else ("rotate",))
    s.check_keys(allowed, required=("count", "step", "object"))
    s.string("name", "")
    array = frame.place(_centre(reader, s), _placement_rotation(reader, s))
    count = s.integer("count", minimum=1, maximum=MAX_COPIES)
    step = np.array(list(s.lengths("step", reader.dimension)) + [0.0] * (3 - reader.dimension))
    for k in range(count):
        copy = array.place((k - (count - 1) / 2.0) * step, np.eye(3))
        _read_item(reader, s.raw("object"), s.at("object"), s.length_unit, copy,
                   f"{suffix} {k + 1}")


def _read_bars(reader: Reader, s: Section, frame: Frame, suffix: str) -> None:
    allowed = ("name", "centre", "line_pairs_per_mm", "count", "length", "material", "mu", "mode",
               "roi", "edge")
    allowed += ("angle",) if reader.dimension == 2 else ("rotate", "thickness")
    s.check_keys(allowed, required=("line_pairs_per_mm", "count", "length")
                 + (("thickness",) if reader.dimension == 3 else ()))
    name = s.string("name", "")
    lp = check_number(s.raw("line_pairs_per_mm"), s.at("line_pairs_per_mm"), minimum=0.0,
                      exclusive_minimum=True, unit="lp/mm")
    count = s.integer("count", minimum=1, maximum=MAX_COPIES)
    length = s.length("length", positive=True)
    width = 1.0 / (2.0 * lp)  # one line pair = one bar + one gap of equal width
    thickness = s.length("thickness", positive=True) if reader.dimension == 3 else math.inf
    bars = frame.place(_centre(reader, s), _placement_rotation(reader, s))
    material, mode, roi, edge = _read_material_and_flags(reader, s)
    for k in range(count):
        place = bars.place(np.array([(k - (count - 1) / 2.0) * 2.0 * width, 0.0, 0.0]), np.eye(3))
        half = (width / 2.0, length / 2.0, thickness / 2.0)
        shape = C.RECTANGLE_2D if reader.dimension == 2 else C.BOX
        bound = math.hypot(half[0], half[1]) if reader.dimension == 2 else math.sqrt(
            half[0] ** 2 + half[1] ** 2 + half[2] ** 2)
        reader.primitives.append(Primitive(
            shape, place.origin, place.rotation, half, material=material, mode=mode,
            name=_named(name, f"{suffix} bar {k + 1}" if roi else suffix), roi=roi, edge=edge,
            bound_radius=bound))


# --------------------------------------------------------------------------------------------
# One object
# --------------------------------------------------------------------------------------------


def _read_material_and_flags(reader: Reader, s: Section) -> tuple[int, int, bool, bool]:
    if s.has("material") == s.has("mu"):
        raise InputError(s.where.child("material"),
                         "an object needs exactly one of 'material' and 'mu'"
                         + (", got both" if s.has("mu") else ", got neither"),
                         "material: water, or mu: 0.02 /mm")
    if s.has("mu"):
        material = reader.mu_material(s.mu("mu"))
    else:
        material = reader.named_material(s.raw("material"), s.at("material"))
    mode = C.ADD if s.string("mode", "replace", choices=("replace", "add")) == "add" else C.REPLACE
    return material, mode, s.boolean("roi", False), s.boolean("edge", False)


def _read_object(reader: Reader, s: Section, frame: Frame, suffix: str) -> None:
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
    name = s.string("name", "")
    material, mode, roi, edge = _read_material_and_flags(reader, s)
    centre = _centre(reader, s)
    polygon = None
    params = (0.0, 0.0, 0.0, 0.0)
    if reader.dimension == 2:
        rotation = rotation_about("z", s.angle("angle", 0.0))
        if shape == "circle":
            r = s.length("radius", positive=True)
            code, half = C.ELLIPSE_2D, (r, r, math.inf)
        elif shape == "ellipse":
            a, b = s.lengths("semi_axes", 2, positive=True)
            code, half = C.ELLIPSE_2D, (a, b, math.inf)
        elif shape == "rectangle":
            w, h = s.lengths("size", 2, positive=True)
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
            axis = np.array(s.lengths("axis", 3))
            if not np.any(axis):
                raise s.error("axis", "the axis direction is the zero vector",
                              "a direction such as [0, 0, 1]")
            axis_rotation = align_z_to(axis)
        rotation = _read_rotate(s) @ axis_rotation
        if shape == "sphere":
            r = s.length("radius", positive=True)
            code, half = C.ELLIPSOID, (r, r, r)
        elif shape == "ellipsoid":
            code, half = C.ELLIPSOID, s.lengths("semi_axes", 3, positive=True)
        elif shape == "box":
            w, h, d = s.lengths("size", 3, positive=True)
            code, half = C.BOX, (w / 2.0, h / 2.0, d / 2.0)
        elif shape == "cylinder":
            if s.has("radius") == s.has("semi_axes"):
                raise InputError(s.where.child("radius"), "a cylinder needs exactly one of 'radius' "
                                 "and 'semi_axes'", "radius: 10, or semi_axes: [10, 6]")
            if s.has("radius"):
                r = s.length("radius", positive=True)
                a, b = r, r
            else:
                a, b = s.lengths("semi_axes", 2, positive=True)
            code, half = C.CYLINDER, (a, b, s.length("height", positive=True) / 2.0)
        else:
            r0 = s.length("base_radius", nonnegative=True)
            r1 = s.length("top_radius", nonnegative=True)
            if r0 == 0.0 and r1 == 0.0:
                raise s.error("base_radius", "a cone needs at least one radius > 0",
                              "base_radius and top_radius >= 0, not both zero")
            code, half = C.CONE, (max(r0, r1), max(r0, r1), s.length("height", positive=True) / 2.0)
            params = (r0, r1, 0.0, 0.0)
        if code == C.ELLIPSOID:
            bound = max(half)
        elif code == C.BOX:
            bound = math.sqrt(sum(h * h for h in half))
        else:
            bound = math.hypot(max(half[0], half[1]), half[2])
    place = frame.place(centre, rotation)
    reader.primitives.append(Primitive(
        code, place.origin, place.rotation, tuple(float(h) for h in half), params, polygon,
        material, mode, _named(name, suffix), roi, edge, float(bound)))


def _read_vertices(s: Section) -> np.ndarray:
    items = s.sequence("vertices")
    points = []
    for item, where in items:
        points.append(parse_vector(item, where, 2, lambda v, w: parse_length(v, w, s.length_unit)))
    polygon = np.array(points, dtype=np.float64).reshape(-1, 2)
    problem = polygon_problem(polygon)
    if problem:
        raise s.error("vertices", problem,
                      "a simple polygon: at least 3 distinct vertices in order, edges not crossing")
    return polygon

