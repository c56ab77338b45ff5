"""Phantom families: a phantom file whose ``random`` section draws a new phantom per sample.

A family is read once (:func:`load_family`) and sampled many times
(:meth:`PhantomFamily.sample`). Sample ``index`` of a root seed draws only from
``rng_for(root_seed, "phantom", family.name, index)``, so it is the same bits whatever the
order, the process or the machine that draws it. A plain phantom file (no ``random``
section) is a family of one: every sample is that phantom and its parameters are ``{}``.

The ``random`` section (docs/phantom-language.md, "Random families") holds an optional
``body`` whose outline is drawn (with an optional fat layer of drawn thickness), painted
under the file's fixed ``objects``, and a list of drawn ``objects`` sets painted over them:
each set draws a count, and for every object a shape, size, aspect, orientation, material
and density scale, and places it at random inside a region, apart from the others when
asked (:mod:`simbench.phantom.placement`). Reading checks every distribution's bounds, the
largest object count against the limits and the memory budget, and whether the objects can
be placed at all, before any sample is drawn.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from simbench import budget
from simbench.data import shipped_files
from simbench.errors import InputError, Where, warn_input
from simbench.phantom import compiled as C
from simbench.phantom import ranges as R
from simbench.phantom.compiled import Phantom
from simbench.phantom.distributions import Draw, read_draw
from simbench.phantom.expansion import BYTES_PER_OBJECT, MAX_OBJECTS
from simbench.phantom import placement
from simbench.phantom.placement import (MAX_COVERAGE_2D, MAX_COVERAGE_3D, REGION_SHAPES_2D,
                                        REGION_SHAPES_3D, Region, place_apart)
from simbench.spec import (Section, check_integer, check_number, load_yaml, parse_angle,
                           parse_length)

RANDOM_KEYS = ("body", "objects")
BODY_SIZE_KEYS = {"circle": ("radius",), "ellipse": ("semi_axes",), "rectangle": ("size",),
                  "sphere": ("radius",), "ellipsoid": ("semi_axes",), "box": ("size",),
                  "cylinder": ("radius", "semi_axes", "height")}
BODY_KEYS = ("shape", "name", "material", "roi", "centre", "fat_layer", "fat_material")
SET_KEYS = ("name", "count", "shape", "radius", "aspect", "material", "density_scale", "region",
            "apart", "gap", "avoid", "roi")
DRAWN_SHAPES_2D = ("circle", "ellipse", "rectangle")
DRAWN_SHAPES_3D = ("sphere", "ellipsoid", "box", "cylinder")
#: Largest count of one drawn set: placement apart tests every candidate against every placed
#: object, so a set of this size costs about a second.
MAX_SET_COUNT = 10_000
#: Largest density scale: beyond it no tissue or test material stays physical (the catalogue's
#: densities span air, 0.0012, to metals, about 20 g/cm3; the result is also checked against
#: the custom-density limit).
MAX_DENSITY_SCALE = 100.0
#: Identity of a sample's random stream after the root seed: ("phantom", name, index).
STREAM = "phantom"


def _resolve(path_or_name: str | Path) -> Path:
    """An existing path as given, else the shipped phantom of that name, else the path as
    given (so that reading it reports it missing)."""
    path = Path(path_or_name)
    if path.exists():
        return path
    stem = path.name[:-5] if path.name.endswith(".yaml") else path.name
    files = shipped_files("phantoms")
    if path.parent == Path(".") and stem in files:
        return files[stem]
    return path


@dataclass(eq=False)
class PhantomFamily:
    """A phantom file read once, ready to draw samples from.

    Attributes
    ----------
    name : str
        The phantom's ``name`` (part of every sample's random-stream identity).
    source : str
        The file it came from.
    dimension : int
        2 or 3.
    is_random : bool
        The file has a ``random`` section (else every sample is the same phantom).
    """

    name: str
    source: str
    dimension: int
    is_random: bool
    _document: Any = field(default=None, repr=False)
    _directory: Path | None = field(default=None, repr=False)
    _fixed: Phantom | None = field(default=None, repr=False)

    def sample(self, root_seed: int, index: int) -> tuple[Phantom, dict]:
        """Sample ``index`` of the family under ``root_seed``.

        Parameters
        ----------
        root_seed : int
            The dataset's root seed (>= 0).
        index : int
            The sample number (>= 0).

        Returns
        -------
        phantom : Phantom
            The drawn phantom, ROI names included.
        parameters : dict
            The drawn values, JSON-serialisable (``{}`` for a family of one).

        Notes
        -----
        Draws from ``rng_for(root_seed, "phantom", self.name, index)`` only, so the result
        depends on nothing but (file, root_seed, index).
        """
        _check_seed_and_index(root_seed, index)
        if not self.is_random:
            return self._fixed, {}
        from simbench.phantom.language import read_sample

        return read_sample(self._document, self.source, self._directory, root_seed, index,
                           warn=False)


def _check_seed_and_index(root_seed: int, index: int) -> None:
    for what, value in (("root_seed", root_seed), ("index", index)):
        if isinstance(value, bool) or not isinstance(value, int) or value < 0:
            raise ValueError(f"{what} must be a whole number >= 0, got {value!r}")


def load_family(path_or_name: str | Path) -> PhantomFamily:
    """Read a phantom file, with or without a ``random`` section, as a family.

    Parameters
    ----------
    path_or_name : str or Path
        A phantom file, or the name of a shipped phantom (``"shepp-logan"``).

    Returns
    -------
    PhantomFamily
        A plain phantom file (or shipped phantom) is a family of one.

    Raises
    ------
    InputError
        One line naming the file, line, column and field, the problem and what is valid.

    Examples
    --------
    >>> family = load_family("shepp-logan")
    >>> phantom, parameters = family.sample(root_seed=1, index=7)
    >>> family.is_random, phantom.objects.count, parameters
    (False, 10, {})
    """
    from simbench.phantom.language import read_sample

    path = _resolve(path_or_name)
    document = load_yaml(path, "phantom file")
    is_random = isinstance(document, dict) and "random" in document
    # checks the whole file; a family's placements are drawn per sample only
    phantom, _ = read_sample(document, str(path), path.parent, index=None if is_random else 0)
    return PhantomFamily(name=phantom.name, source=str(path), dimension=phantom.dimension,
                         is_random=is_random, _document=document, _directory=path.parent,
                         _fixed=None if is_random else phantom)


# --------------------------------------------------------------------------------------------
# Reading the random section
# --------------------------------------------------------------------------------------------


def _size_item(unit: str):
    return lambda v, w: R.check_size(parse_length(v, w, unit, positive=True), w)


def _thickness_item(unit: str):
    def parse(v, w):
        mm = parse_length(v, w, unit, nonnegative=True)
        return 0.0 if mm == 0.0 else R.check_size(mm, w)
    return parse


def _angle_item(v, w):
    rad = parse_angle(v, w)
    if abs(rad) > math.radians(R.MAX_ANGLE_DEG) * (1.0 + 1e-12):
        raise InputError(w, f"angle {math.degrees(rad):.6g} deg is more than a turn",
                         R.ANGLE_VALID)
    return rad


def _aspect_item(v, w):
    return check_number(v, w, minimum=0.0, exclusive_minimum=True, maximum=1.0)


def _scale_item(v, w):
    return check_number(v, w, minimum=0.0, exclusive_minimum=True, maximum=MAX_DENSITY_SCALE)


def _text_item(choices: tuple, what: str):
    def parse(v, w):
        if not isinstance(v, str) or v not in choices:
            raise InputError(w, f"unknown {what} {v!r}", "one of " + ", ".join(choices))
        return v
    return parse


def _material_item(reader):
    """Check a material name against the catalogue and the file's custom materials without
    adding it to the phantom's material list (only drawn materials are added)."""
    from simbench.phantom.language import Reader

    probe = Reader(reader.source, reader.dimension, reader.directory, custom=reader.custom)

    def parse(v, w):
        probe.named_material(v, w)
        return v
    return parse


@dataclass(frozen=True, eq=False)
class BodySpec:
    """A body outline whose sizes are drawn: half sizes ``draws[axes[i]] * factors[i]``."""

    shape: str
    name: str
    material: int
    roi: bool
    centre: tuple
    draws: tuple
    axes: tuple
    factors: tuple
    fat: Draw | None
    fat_material: int
    fat_axes: int  # how many leading axes the fat layer thins (a cylinder's z is not)
    where: Where

    def region(self, values: list[float], fat: float) -> Region:
        half = [values[a] * f for a, f in zip(self.axes, self.factors)]
        inner = [h - fat if i < self.fat_axes else h for i, h in enumerate(half)]
        return Region(self.shape, self.centre, tuple(inner))

    def extreme(self, which: str) -> Region:
        """The smallest (``"low"``) or largest (``"high"``) inner region."""
        values = [getattr(d, which) for d in self.draws]
        fat = 0.0 if self.fat is None else (self.fat.high if which == "low" else self.fat.low)
        return self.region(values, fat)


@dataclass(frozen=True, eq=False)
class SetSpec:
    """One drawn set of objects."""

    name: str
    count: Draw
    shape: Draw
    radius: Draw
    aspect: Draw
    angle: Draw | None
    rotate_random: bool
    material: Draw
    density_scale: Draw | None
    region: Region | None  # None: inside the body
    apart: bool
    gap: float
    avoid: tuple  # (name, where) of fixed objects the set keeps clear of
    roi: bool
    where: Where


def _read_body(reader, s: Section) -> BodySpec:
    dim = reader.dimension
    shapes = REGION_SHAPES_2D if dim == 2 else REGION_SHAPES_3D
    shape = s.string("shape", choices=shapes)
    s.check_keys(BODY_KEYS + BODY_SIZE_KEYS[shape], required=("shape", "material"))
    name = R.text(s, "name", "body") or "body"
    size = _size_item(s.length_unit)
    if shape == "cylinder":
        if s.has("radius") == s.has("semi_axes"):
            raise InputError(s.where.child("radius"), "a cylinder needs exactly one of 'radius' "
                             "and 'semi_axes'", "radius: 100, or semi_axes: [150, 100]")
        if not s.has("height"):
            raise s.error("height", "missing required field 'height'", "add it")
    if shape in ("circle", "sphere") or (shape == "cylinder" and s.has("radius")):
        draws = [read_draw(s.raw("radius"), s.at("radius"), size)]
        axes, factors = (0,) * min(dim, 2), (1.0,) * min(dim, 2)
        if shape == "sphere":
            axes, factors = (0, 0, 0), (1.0, 1.0, 1.0)
    else:
        key = "semi_axes" if s.has("semi_axes") else "size"
        n = 2 if shape == "cylinder" else dim
        items = s.sequence(key)
        if len(items) != n:
            raise s.error(key, f"expected a list of {n} values, got {len(items)}",
                          f"a list of {n} sizes, each a value or a distribution")
        draws = [read_draw(item, at, size) for item, at in items]
        axes = tuple(range(n))
        factors = (0.5 if key == "size" else 1.0,) * n
    if shape == "cylinder":
        draws.append(read_draw(s.raw("height"), s.at("height"), size))
        axes, factors = axes + (len(draws) - 1,), factors + (0.5,)
    material, _, roi, _ = _flags(reader, s)
    fat = read_draw(s.raw("fat_layer"), s.at("fat_layer"), _thickness_item(s.length_unit)
                    ) if s.has("fat_layer") else None
    fat_material = reader.named_material(s.raw("fat_material", "adipose"), s.at("fat_material")
                                         ) if fat is not None else -1
    if s.has("fat_material") and fat is None:
        raise s.error("fat_material", "a fat material without a fat layer",
                      "add fat_layer, or remove fat_material")
    centre = R.point(s, "centre", dim)
    body = BodySpec(shape, name, material, roi, tuple(centre), tuple(draws), axes, factors, fat,
                    fat_material, 2 if shape == "cylinder" else dim, s.where)
    if fat is not None:
        thinnest = min(body.extreme("low").half_sizes[:body.fat_axes]) + fat.high
        if fat.high >= thinnest:
            raise s.error("fat_layer", f"the fat layer may be {fat.high:.6g} mm thick but the "
                          f"body may be only {thinnest:.6g} mm from centre to edge",
                          "a fat layer thinner than the smallest half size of the body")
    return body


def _flags(reader, s: Section):
    from simbench.phantom.language import _read_material_and_flags

    return _read_material_and_flags(reader, s)


def _read_region(reader, s: Section, key: str, body: BodySpec | None) -> Region | None:
    value = s.raw(key, "body")
    if value == "body":
        if body is None:
            raise s.error(key, "there is no drawn body to place the objects in",
                          "a region such as {shape: circle, radius: 100}, or a 'body' in the "
                          "random section")
        return None
    if not isinstance(value, dict):
        raise s.error(key, f"expected 'body' or a region, got {value!r}",
                      "body, or a mapping such as {shape: ellipse, semi_axes: [150, 100]}")
    r = s.section(key)
    dim = reader.dimension
    shape = r.string("shape", choices=REGION_SHAPES_2D if dim == 2 else REGION_SHAPES_3D)
    r.check_keys(("shape", "centre") + BODY_SIZE_KEYS[shape], required=("shape",))
    if shape in ("circle", "sphere"):
        half = (R.size(r, "radius"),) * dim
    elif shape in ("ellipse", "ellipsoid"):
        half = R.sizes(r, "semi_axes", dim)
    elif shape in ("rectangle", "box"):
        half = tuple(v / 2.0 for v in R.sizes(r, "size", dim))
    else:
        if r.has("radius") == r.has("semi_axes"):
            raise InputError(r.where.child("radius"), "a cylinder needs exactly one of 'radius' "
                             "and 'semi_axes'", "radius: 100, or semi_axes: [150, 100]")
        xy = (R.size(r, "radius"),) * 2 if r.has("radius") else R.sizes(r, "semi_axes", 2)
        half = tuple(xy) + (R.size(r, "height") / 2.0,)
    return Region(shape, tuple(R.point(r, "centre", dim)), tuple(half))


def _read_set(reader, s: Section, body: BodySpec | None) -> SetSpec:
    dim = reader.dimension
    shapes = DRAWN_SHAPES_2D if dim == 2 else DRAWN_SHAPES_3D
    turn_key = "angle" if dim == 2 else "rotate"
    s.check_keys(SET_KEYS + (turn_key,), required=("count", "shape", "radius", "material"))
    name = R.text(s, "name")
    count = read_draw(s.raw("count"), s.at("count"), lambda v, w: check_integer(
        v, w, minimum=0, maximum=MAX_SET_COUNT), integer=True)
    shape = read_draw(s.raw("shape"), s.at("shape"), _text_item(shapes, "shape"), text=True)
    radius = read_draw(s.raw("radius"), s.at("radius"), _size_item(s.length_unit))
    aspect = read_draw(s.raw("aspect", 1.0), s.at("aspect"), _aspect_item)
    angle = rotate_random = None
    if dim == 2:
        angle = read_draw(s.raw("angle", 0.0), s.at("angle"), _angle_item)
    else:
        rotate = s.raw("rotate", "none")
        if rotate not in ("random", "none"):
            raise s.error("rotate", f"expected random or none, got {rotate!r}",
                          "random (uniform over all orientations) or none")
        rotate_random = rotate == "random"
    material = read_draw(s.raw("material"), s.at("material"), _material_item(reader), text=True)
    scale = None
    if s.has("density_scale"):
        scale = read_draw(s.raw("density_scale"), s.at("density_scale"), _scale_item)
        from simbench.phantom.language import Reader

        probe = Reader(reader.source, reader.dimension, reader.directory, custom=reader.custom)
        for option in material.options:
            spec = probe.materials[probe.named_material(option, material.where)]
            if spec.density_g_cm3 * scale.high > R.MAX_DENSITY_G_CM3:
                raise s.error("density_scale", f"{option} ({spec.density_g_cm3:g} g/cm3) scaled "
                              f"by {scale.high:g} is denser than any material",
                              f"a scale keeping the density at most {R.MAX_DENSITY_G_CM3:g} g/cm3")
    region = _read_region(reader, s, "region", body)
    apart = s.boolean("apart", True)
    gap = parse_length(s.raw("gap", 0.0), s.at("gap"), s.length_unit, nonnegative=True)
    if gap:
        R.check_size(gap, s.at("gap"))
    avoid = tuple((R.text(Section({"avoid": item}, at), "avoid", required=True), at)
                  for item, at in s.sequence("avoid", []))
    roi = s.boolean("roi", False)
    if roi and "{i}" not in name:
        name = (name or "roi") + " {i}"
    return SetSpec(name, count, shape, radius, aspect, angle, bool(rotate_random), material,
                   scale, region, apart, gap, avoid, roi, s.where)


def _bound_factor(shape: str, aspect: float) -> float:
    """Bounding radius over ``radius`` for a drawn shape of the given aspect."""
    if shape == "rectangle":
        return math.hypot(1.0, aspect)
    if shape == "box":
        return math.sqrt(1.0 + 2.0 * aspect * aspect)
    if shape == "cylinder":
        return math.hypot(1.0, aspect)
    return 1.0


def _ball(radius: float, dim: int) -> float:
    return math.pi * radius ** 2 if dim == 2 else 4.0 / 3.0 * math.pi * radius ** 3


def _inscribed(region: Region) -> float:
    return float(np.max(region.clearance(np.asarray(region.centre)[None, :])))


@dataclass(frozen=True, eq=False)
class RandomSpec:
    """The checked ``random`` section of a phantom file."""

    name: str
    dimension: int
    body: BodySpec | None
    sets: tuple

    def draw(self, reader, fixed, root_seed: int, index: int) -> tuple[tuple, tuple, dict]:
        """Draw sample ``index``: the templates painted under and over the fixed objects
        (``fixed``, placed by :func:`simbench.phantom.build.expand`), and the drawn
        parameters."""
        from simbench.seeding import rng_for

        rng = rng_for(root_seed, STREAM, self.name, index)
        return _draw_sample(self, reader, fixed, rng, root_seed, index)

    def check_names(self, reader, fixed) -> None:
        """Check that every fixed object a set avoids exists (without drawing)."""
        for item in self.sets:
            if item.avoid:
                _avoided(item, reader, fixed, self.dimension)


def read_random(top: Section, reader, fixed_objects: int, *, warn: bool = True) -> RandomSpec:
    """Read and check the ``random`` section of a phantom document.

    Parameters
    ----------
    top : Section
        The document's top-level mapping.
    reader : simbench.phantom.language.Reader
        The reader of the document (custom materials already read).
    fixed_objects : int
        How many objects the fixed ``objects`` expand to.
    warn : bool
        Warn about sets that may fail to place at their largest draw.

    Raises
    ------
    InputError
        A bad key or distribution; more objects than the limit or the memory budget allows
        at the largest draw; objects that cannot be placed even at the smallest draw.
    """
    s = top.section("random")
    s.check_keys(RANDOM_KEYS)
    if not s.has("body") and not s.has("objects"):
        raise InputError(s.where, "the random section draws nothing",
                         "a 'body' and/or an 'objects' list of drawn sets")
    body = _read_body(reader, s.section("body")) if s.has("body") else None
    sets = tuple(_read_set(reader, Section(item, where, s.length_unit), body)
                 for item, where in s.sequence("objects", []))
    spec = RandomSpec(top.string("name"), reader.dimension, body, sets)
    _check_cost(spec, s, fixed_objects)
    _check_placement(spec, warn)
    return spec


def _check_cost(spec: RandomSpec, s: Section, fixed_objects: int) -> None:
    body = 0 if spec.body is None else 1 + (spec.body.fat is not None)
    most = fixed_objects + body + sum(item.count.high for item in spec.sets)
    where = spec.sets[-1].count.where if spec.sets else s.where
    if most > MAX_OBJECTS:
        raise InputError(where, f"the phantom may hold {most:,} objects at the largest draw",
                         f"at most {MAX_OBJECTS:,} objects in all")
    budget.check_bytes(most * BYTES_PER_OBJECT, where,
                       f"a sample of {most:,} objects at the largest draw, which",
                       "fewer drawn objects")


def _check_placement(spec: RandomSpec, warn: bool) -> None:
    """Refuse sets that cannot be placed even at their smallest draw; warn about those that
    may fail at their largest.

    The coverage of a region is the total area (volume) of the apart objects' circles,
    grown by half the gap, over the region's area; random sequential placement is refused
    beyond :data:`~simbench.phantom.placement.MAX_COVERAGE_2D` (3-D: ``MAX_COVERAGE_3D``).
    """
    dim = spec.dimension
    bound = MAX_COVERAGE_2D if dim == 2 else MAX_COVERAGE_3D
    coverage_low: dict = {}
    coverage_high: dict = {}
    for item in spec.sets:
        smallest = item.region or spec.body.extreme("low")
        largest = item.region or spec.body.extreme("high")
        factors = [_bound_factor(shape, a) for shape in item.shape.options
                   for a in (item.aspect.low, item.aspect.high)]
        r_low = item.radius.low * min(factors)
        r_high = item.radius.high * max(factors)
        room = _inscribed(largest)
        if item.count.high > 0 and r_low > room:
            raise InputError(item.radius.where, f"an object at least {r_low:.6g} mm in radius "
                             f"cannot fit in its region, at most {room:.6g} mm from centre to "
                             "edge", "smaller objects or a larger region")
        if warn and item.count.high > 0 and r_high > _inscribed(smallest):
            warn_input(item.radius.where, f"objects up to {r_high:.6g} mm in radius may not fit "
                       f"the smallest region ({_inscribed(smallest):.6g} mm from centre to edge);"
                       " such samples fail")
        if not item.apart:
            continue
        key = id(item.region) if item.region is not None else "body"
        grown_low = _ball(r_low + item.gap / 2.0, dim) * item.count.low
        grown_high = _ball(r_high + item.gap / 2.0, dim) * item.count.high
        coverage_low[key] = coverage_low.get(key, 0.0) + grown_low / largest.measure
        coverage_high[key] = coverage_high.get(key, 0.0) + grown_high / smallest.measure
        what = "area" if dim == 2 else "volume"
        if coverage_low[key] > bound:
            raise InputError(item.count.where, f"even the smallest draw covers "
                             f"{100 * coverage_low[key]:.0f} % of the region's {what} with objects "
                             f"kept apart (their circles grown by half the gap)" if dim == 2 else
                             f"even the smallest draw fills {100 * coverage_low[key]:.0f} % of the "
                             f"region's {what} with objects kept apart (their spheres grown by "
                             "half the gap)",
                             f"at most {100 * bound:.0f} % (random placement jams near "
                             f"{'55' if dim == 2 else '38'} %): fewer or smaller objects, a "
                             "smaller gap or a larger region")
        if warn and coverage_high[key] > bound:
            warn_input(item.count.where, f"the largest draw covers {100 * coverage_high[key]:.0f}"
                       f" % of the region's {what}; beyond {100 * bound:.0f} % some samples may "
                       "find no place for every object")


# --------------------------------------------------------------------------------------------
# Drawing a sample
# --------------------------------------------------------------------------------------------

_BODY_CODES = {"circle": C.ELLIPSE_2D, "ellipse": C.ELLIPSE_2D, "rectangle": C.RECTANGLE_2D,
               "sphere": C.ELLIPSOID, "ellipsoid": C.ELLIPSOID, "box": C.BOX,
               "cylinder": C.CYLINDER}


def _template(reader, shape: str, centre, rotation, half: tuple, material: int, name: str,
              roi: bool, where: Where):
    """An object template of a drawn shape (half sizes in mm, ``inf`` along z in 2-D)."""
    code = _BODY_CODES[shape]
    if code == C.RECTANGLE_2D:
        bound = math.hypot(half[0], half[1])
    elif code == C.BOX:
        bound = math.sqrt(sum(h * h for h in half))
    elif code == C.CYLINDER:
        bound = math.hypot(max(half[0], half[1]), half[2])
    else:
        bound = max(half[:2]) if code == C.ELLIPSE_2D else max(half)
    full = np.zeros(3)
    full[:len(centre)] = centre
    return reader.object_template(
        code=code, centre=full, rotation=rotation, half_sizes=tuple(float(h) for h in half),
        params=(0.0, 0.0, 0.0, 0.0), polygon=None, material=material, mode=C.REPLACE,
        name=name, roi=roi, edge=False, bound_radius=float(bound), where=where)


def _scaled_material(reader, name: str, where: Where, scale: float) -> int:
    if scale == 1.0:
        return reader.named_material(name, where)
    from simbench.materials import catalogue

    base = reader.custom[name] if name in reader.custom else catalogue.get_material(name)
    return reader.use_material(("scaled", name, scale), lambda: dataclasses.replace(
        base, name=f"{base.name} x{scale:.6g}", density_g_cm3=base.density_g_cm3 * scale))


def _avoided(item: SetSpec, reader, fixed, dim: int) -> tuple[np.ndarray, np.ndarray]:
    """Centres and bounding radii of the fixed objects a set keeps clear of."""
    names = np.array([] if fixed is None else [reader.objects[t].name for t in fixed.template],
                     dtype=object)
    rows = []
    for name, where in item.avoid:
        hits = np.flatnonzero(names == name)
        if not hits.size:
            known = sorted({n for n in names if n})
            raise InputError(where, f"no fixed object is named '{name}'",
                             "the name of an object of 'objects': " + (", ".join(known) or
                                                                       "(none is named)"))
        rows.extend(hits.tolist())
    rows = np.array(sorted(set(rows)), dtype=np.int64)  # found, so fixed is not None
    radii = np.array([reader.objects[fixed.template[k]].bound_radius for k in rows])
    return fixed.centre[rows, :dim].reshape(-1, dim), radii.reshape(-1)


def _draw_sample(spec: RandomSpec, reader, fixed, rng: np.random.Generator, root_seed: int,
                 index: int) -> tuple[tuple, tuple, dict]:
    from scipy.spatial.transform import Rotation

    dim = spec.dimension
    z_inf = (math.inf,) if dim == 2 else ()
    under: list = []
    over: list = []
    parameters: dict = {}
    body_region = None
    if spec.body is not None:
        b = spec.body
        values = [d.draw(rng) for d in b.draws]
        fat = b.fat.draw(rng) if b.fat is not None else 0.0
        outer = [values[a] * f for a, f in zip(b.axes, b.factors)]
        body_region = b.region(values, fat)
        if fat > 0.0:
            under.append(_template(reader, b.shape, b.centre, None, tuple(outer) + z_inf,
                                   b.fat_material, f"{b.name} fat", False, b.where))
        under.append(_template(reader, b.shape, b.centre, None, body_region.half_sizes + z_inf,
                               b.material, b.name, b.roi, b.where))
        parameters["body"] = {"shape": b.shape, "half_sizes_mm": [float(v) for v in outer],
                              "fat_layer_mm": float(fat)}
    drawn: list = []
    apart_centres = np.zeros((0, dim))
    apart_radii = np.zeros(0)
    for item in spec.sets:
        count = item.count.draw(rng)
        objects = []
        for _ in range(count):
            shape = item.shape.draw(rng)
            radius = item.radius.draw(rng)
            aspects = [item.aspect.draw(rng) for _ in range(dim - 1)] if shape not in (
                "circle", "sphere") else [1.0] * (dim - 1)
            if dim == 2:
                turn = item.angle.draw(rng)
                rotation = np.array([[math.cos(turn), -math.sin(turn), 0.0],
                                     [math.sin(turn), math.cos(turn), 0.0], [0.0, 0.0, 1.0]])
            else:
                rotation = (Rotation.random(random_state=rng).as_matrix()
                            if item.rotate_random else np.eye(3))
            material = item.material.draw(rng)
            scale = item.density_scale.draw(rng) if item.density_scale is not None else 1.0
            objects.append((shape, radius, aspects, rotation, material, scale,
                            turn if dim == 2 else None))
        order = sorted(range(count), key=lambda k: -objects[k][1] * _bound_factor(
            objects[k][0], max(objects[k][2])))  # largest first: the easiest to place
        objects = [objects[k] for k in order]
        radii = np.array([o[1] * _bound_factor(o[0], max(o[2])) for o in objects])
        region = item.region or body_region
        others_c = apart_centres if item.apart else np.zeros((0, dim))
        others_r = apart_radii if item.apart else np.zeros(0)
        if item.avoid:
            clear_c, clear_r = _avoided(item, reader, fixed, dim)
            others_c = np.concatenate([others_c, clear_c])
            others_r = np.concatenate([others_r, clear_r])
        centres, failed = place_apart(rng, region, radii, item.gap, others_c, others_r,
                                      item.apart)
        if centres is None:
            raise InputError(item.count.where, f"sample {index} of seed {root_seed}: object "
                             f"{failed + 1} of {count} ({radii[failed]:.6g} mm in radius) found "
                             f"no place in {placement.MAX_ATTEMPTS:,} random positions",
                             "fewer or smaller objects, a smaller gap or a larger region")
        if item.apart:
            apart_centres = np.concatenate([apart_centres, centres])
            apart_radii = np.concatenate([apart_radii, radii])
        for k, (shape, radius, aspects, rotation, material, scale, turn) in enumerate(objects):
            name = item.name.replace("{i}", str(k + 1))
            half = (radius,) + tuple(radius * a for a in aspects) + z_inf
            mat = _scaled_material(reader, material, item.material.where, scale)
            over.append(_template(reader, shape, centres[k], rotation, half, mat, name,
                                  item.roi, item.where))
            record = {"name": name, "shape": shape, "centre_mm": [float(v) for v in centres[k]],
                      "half_sizes_mm": [float(v) for v in half[:dim]], "material": material,
                      "density_scale": float(scale)}
            if dim == 2:
                record["angle_deg"] = math.degrees(turn)
            else:
                record["rotation"] = [[float(v) for v in row] for row in rotation]
            drawn.append(record)
    if spec.sets:
        parameters["objects"] = drawn
    return tuple(under), tuple(over), parameters
