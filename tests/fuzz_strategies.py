"""Hypothesis strategies for the fuzzing harness: valid input files, then mutated ones.

The valid files follow docs/phantom-language.md, docs/geometry.md and docs/physics.md (and the
shipped files in simbench/data): phantoms in 2-D and 3-D with shapes, groups, rings, arrays,
bars, custom materials, mu with units and voxel volumes from small ``.npy`` files; scanners of
every geometry type (parallel, fan, cone, helical, poses inline or from a ``.npy``/``.csv``
file) with small detectors and few views, and the physics sections source, exposure, detector
and scatter. A valid file also takes, now and then, a value at the edge of the documented
ranges (1e9 air counts, a mu of 1e5 /mm, a 100 mm lead filter, the smallest sizes), some just
inside and some just outside, because those must end in a valid, finite result or one error
line too.

The mutations then break them in the ways people and programs do: dropped, misspelt and
unknown keys, wrong types, extreme and non-finite numbers ('.nan', '.inf', 1e308, -0, numbers
with hundreds of digits), huge counts, deep nesting, YAML anchors and aliases (up to an alias
bomb of groups of groups), odd unicode, raw bytes that are not UTF-8, control characters,
truncation and empty documents; side files (voxel and pose ``.npy``, pose and spectrum
``.csv``) get forged headers, wrong dtypes, NaN, missing columns and the like.

A case is a :class:`Case`: the files to write (name -> bytes), the main file, and notes saying
what was done, which the harness prints with a failure.
"""

from __future__ import annotations

import copy
import io
import json
import math
import re
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import yaml
from hypothesis import strategies as st

# --------------------------------------------------------------------------------------------
# Writing YAML text from a tree (so that hostile scalars, anchors and aliases can be written)
# --------------------------------------------------------------------------------------------


class Raw(str):
    """A scalar written into the YAML text exactly as given (``.nan``, ``!!binary ...``)."""


@dataclass
class Anchor:
    """A node written with an anchor, ``&name node``."""

    name: str
    node: Any


@dataclass
class Alias:
    """A reference to an anchored node, ``*name``."""

    name: str


_RESOLVER = yaml.resolver.Resolver()
_PLAIN = re.compile(r"[A-Za-z0-9_][A-Za-z0-9 _./+\-]*[A-Za-z0-9_./]|[A-Za-z_]")


def _float_text(value: float) -> str:
    if math.isnan(value):
        return ".nan"
    if math.isinf(value):
        return ".inf" if value > 0 else "-.inf"
    text = repr(value)
    mantissa, e, exponent = text.partition("e")
    if e and "." not in mantissa:
        text = f"{mantissa}.0e{exponent}"  # YAML 1.1 floats need a dot
    return text


def scalar_text(value: Any) -> str:
    """One scalar as YAML text: plain where that reads back the same, else double-quoted."""
    if isinstance(value, Raw):
        return str(value)
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return _float_text(value)
    text = str(value)
    if _PLAIN.fullmatch(text) and _RESOLVER.resolve(yaml.ScalarNode, text, (True, False)) == \
            "tag:yaml.org,2002:str":
        return text
    try:
        text.encode("utf-8")
        return json.dumps(text, ensure_ascii=False)
    except UnicodeEncodeError:  # lone surrogates: written as \u escapes, read back as such
        return json.dumps(text, ensure_ascii=True)


def flow_text(node: Any) -> str:
    """A node in flow style: ``{a: 1, b: [2, 3]}``."""
    if isinstance(node, Anchor):
        return f"&{node.name} {flow_text(node.node)}"
    if isinstance(node, Alias):
        return f"*{node.name}"
    if isinstance(node, dict):
        return "{" + ", ".join(f"{scalar_text(k)}: {flow_text(v)}" for k, v in node.items()) + "}"
    if isinstance(node, list):
        return "[" + ", ".join(flow_text(v) for v in node) + "]"
    return scalar_text(node)


def _block_lines(node: Any, indent: int, depth: int, flow_depth: int) -> list[str]:
    pad = " " * indent
    lines: list[str] = []

    def nested(value: Any) -> bool:
        return isinstance(value, (dict, list)) and bool(value) and depth + 1 < flow_depth

    if isinstance(node, dict):
        for key, value in node.items():
            if nested(value):
                lines.append(f"{pad}{scalar_text(key)}:")
                lines.extend(_block_lines(value, indent + 2, depth + 1, flow_depth))
            else:
                lines.append(f"{pad}{scalar_text(key)}: {flow_text(value)}")
    else:
        for item in node:
            if nested(item):
                sub = _block_lines(item, indent + 2, depth + 1, flow_depth)
                sub[0] = pad + "- " + sub[0][indent + 2:]
                lines.extend(sub)
            else:
                lines.append(f"{pad}- {flow_text(item)}")
    return lines


def to_yaml(document: Any, flow_depth: int = 3) -> str:
    """YAML text of a tree: block style down to ``flow_depth`` levels, flow style below."""
    if isinstance(document, (dict, list)) and document and flow_depth > 0:
        return "\n".join(_block_lines(document, 0, 0, flow_depth)) + "\n"
    return flow_text(document) + "\n"


def npy_bytes(array: np.ndarray) -> bytes:
    """The bytes of ``numpy.save(array)``."""
    buffer = io.BytesIO()
    np.save(buffer, array, allow_pickle=False)
    return buffer.getvalue()


# --------------------------------------------------------------------------------------------
# Cases
# --------------------------------------------------------------------------------------------


@dataclass
class Tree:
    """A document as a tree plus its side files, before it is written."""

    document: Any
    side: dict[str, bytes] = field(default_factory=dict)
    flow_depth: int = 3
    notes: list[str] = field(default_factory=list)


@dataclass
class Case:
    """Files to write (name -> bytes), the main file's name, and what was done to them."""

    files: dict[str, bytes]
    main: str
    notes: list[str] = field(default_factory=list)

    @property
    def text(self) -> bytes:
        return self.files[self.main]

    def __repr__(self) -> str:  # the harness shows the files themselves; keep this short
        sizes = ", ".join(f"{name}: {len(data)} bytes" for name, data in self.files.items())
        return f"Case({sizes}; {'; '.join(self.notes) or 'no mutations'})"

    def _repr_pretty_(self, printer, cycle) -> None:  # used by hypothesis for its report
        printer.text(repr(self))


def render(tree: Tree, main: str) -> Case:
    files = {main: to_yaml(tree.document, tree.flow_depth).encode("utf-8")}
    files.update(tree.side)
    return Case(files, main, list(tree.notes))


# --------------------------------------------------------------------------------------------
# Values
# --------------------------------------------------------------------------------------------

CATALOGUE = ["water", "air", "aluminium", "cortical-bone", "pmma", "adipose", "lung", "muscle",
             "iodine-5mg/ml", "copper", "hydroxyapatite-200mg/ml", "titanium", "graphite"]
FORMULAS = ["H2O", "C2H4", "CaCO3", "C5H8O2", "NaCl", "SiO2", "C8H8"]
SENSORS = ["CsI", "Gd2O2S", "CdTe", "Si", "GaAs"]
NAME_WORDS = ["body", "insert", "rod", "bone", "gel", "edge", "lung", "disc", "ROI 1"]


def _round(x: float) -> float:
    return float(f"{x:.4g}")


def number(draw, lo: float, hi: float, edges: tuple = ()) -> float:
    """A number in [lo, hi], now and then one of ``edges`` (values the docs still allow)."""
    if edges and draw(st.integers(0, 9)) == 0:
        return draw(st.sampled_from(edges))
    return _round(draw(st.floats(lo, hi, allow_nan=False, allow_infinity=False)))


def length(draw, lo: float, hi: float, units: str = "mm", edges: tuple = ()) -> Any:
    """A length written as a bare number (in the file's units) or with a unit."""
    mm = number(draw, lo, hi, edges)
    style = draw(st.integers(0, 3))
    if style == 0:
        return f"{_round(mm)} mm"
    if style == 1:
        return f"{_round(mm / 10)} cm"
    return _round(mm / 10) if units == "cm" else mm


def angle(draw, lo: float = -360.0, hi: float = 360.0) -> Any:
    deg = number(draw, lo, hi, (0.0, -0.0, 90.0, 360.0))
    style = draw(st.integers(0, 3))
    if style == 0:
        return f"{deg} deg"
    if style == 1:
        return f"{_round(math.radians(deg))} rad"
    return deg


def mu_text(draw, negative: bool = False) -> str:
    value = number(draw, -0.05 if negative else 0.0, 0.08, (0.0, 1e-9, 5.0, 1e5))
    unit = draw(st.sampled_from(["/mm", "1/mm", "/cm", "1/cm", "/m"]))
    scale = {"/mm": 1, "1/mm": 1, "/cm": 10, "1/cm": 10, "/m": 1000}[unit]
    return f"{_round(value * scale)} {unit}"


def energy_text(draw, lo: float, hi: float, edges: tuple = ()) -> Any:
    kev = number(draw, lo, hi, edges)
    style = draw(st.integers(0, 2))
    if style == 0:
        return f"{kev} keV"
    if style == 1:
        return f"{_round(kev / 1000)} MeV"
    return kev


def name_text(draw) -> str:
    return draw(st.one_of(st.sampled_from(NAME_WORDS),
                          st.text(st.characters(codec="utf-8", categories=("L", "N")),
                                  min_size=1, max_size=12)))


# --------------------------------------------------------------------------------------------
# Valid phantoms
# --------------------------------------------------------------------------------------------


def _material(draw, doc_materials: list[str], negative_mu: bool = False) -> dict:
    choice = draw(st.integers(0, 4))
    if choice == 0:
        return {"mu": mu_text(draw, negative_mu)}
    if choice == 1 and doc_materials:
        return {"material": draw(st.sampled_from(doc_materials))}
    return {"material": draw(st.sampled_from(CATALOGUE))}


def _flags(draw, item: dict, dim: int, doc_materials: list[str]) -> dict:
    add = draw(st.integers(0, 4)) == 0
    item.update(_material(draw, doc_materials, negative_mu=add))
    if add:
        item["mode"] = "add"
    elif draw(st.integers(0, 5)) == 0:
        item["mode"] = "replace"
    if draw(st.booleans()):
        item["name"] = name_text(draw)
    if draw(st.integers(0, 3)) == 0:
        item["roi"] = draw(st.booleans())
    if draw(st.integers(0, 5)) == 0:
        item["edge"] = draw(st.booleans())
    return item


def _centre(draw, dim: int, units: str, spread: float = 40.0) -> list:
    return [length(draw, -spread, spread, units, (0.0, -0.0)) for _ in range(dim)]


def _rotate(draw) -> list:
    steps = draw(st.lists(st.sampled_from("xyz"), min_size=1, max_size=3))
    return [{axis: angle(draw)} for axis in steps]


def _polygon(draw, units: str) -> list:
    # star-shaped about the origin with angular gaps under 180 deg: always simple
    n = draw(st.integers(4, 8))
    points = []
    for k in range(n):
        phi = (k + draw(st.floats(0.0, 0.45))) * 2 * math.pi / n
        r = number(draw, 2.0, 20.0)
        points.append([_round(r * math.cos(phi)), _round(r * math.sin(phi))])
    if draw(st.booleans()):
        points.reverse()
    return [[p[0] / 10 if units == "cm" else p[0], p[1] / 10 if units == "cm" else p[1]]
            for p in points]


def _shape(draw, dim: int, units: str, doc_materials: list[str]) -> dict:
    small = (1e-5, 0.001)  # the smallest sizes the phantom language allows
    if dim == 2:
        shape = draw(st.sampled_from(["circle", "ellipse", "rectangle", "polygon"]))
        item: dict[str, Any] = {"shape": shape}
        if shape == "circle":
            item["radius"] = length(draw, 0.5, 30.0, units, small)
        elif shape == "ellipse":
            item["semi_axes"] = [length(draw, 0.5, 30.0, units, small) for _ in range(2)]
        elif shape == "rectangle":
            item["size"] = [length(draw, 0.5, 40.0, units, small) for _ in range(2)]
        else:
            item["vertices"] = _polygon(draw, units)
        if draw(st.booleans()):
            item["angle"] = angle(draw)
    else:
        shape = draw(st.sampled_from(["sphere", "ellipsoid", "box", "cylinder", "cone"]))
        item = {"shape": shape}
        if shape == "sphere":
            item["radius"] = length(draw, 0.5, 30.0, units, small)
        elif shape == "ellipsoid":
            item["semi_axes"] = [length(draw, 0.5, 30.0, units, small) for _ in range(3)]
        elif shape == "box":
            item["size"] = [length(draw, 0.5, 40.0, units, small) for _ in range(3)]
        elif shape == "cylinder":
            if draw(st.booleans()):
                item["radius"] = length(draw, 0.5, 30.0, units, small)
            else:
                item["semi_axes"] = [length(draw, 0.5, 30.0, units, small) for _ in range(2)]
            item["height"] = length(draw, 0.5, 60.0, units, small)
        else:
            radii = [length(draw, 0.0, 20.0, units), length(draw, 0.5, 20.0, units)]
            if draw(st.booleans()):
                radii.reverse()
            item["base_radius"], item["top_radius"] = radii
            item["height"] = length(draw, 0.5, 60.0, units, small)
        if shape in ("cylinder", "cone") and draw(st.booleans()):
            item["axis"] = draw(st.sampled_from([[0, 0, 1], [1, 1, 1], [0, 0, -1], [1, 0, 0],
                                                 [0.3, -2, 0.5]]))
        if draw(st.integers(0, 2)) == 0:
            item["rotate"] = _rotate(draw)
    if draw(st.booleans()):
        item["centre"] = _centre(draw, dim, units)
    return _flags(draw, item, dim, doc_materials)


def _placement(draw, body: dict, dim: int, units: str) -> dict:
    if draw(st.booleans()):
        body["centre"] = _centre(draw, dim, units)
    if draw(st.integers(0, 2)) == 0:
        if dim == 2:
            body["angle"] = angle(draw)
        else:
            body["rotate"] = _rotate(draw)
    if draw(st.integers(0, 3)) == 0:
        body["name"] = name_text(draw)
    return body


def _item(draw, dim: int, units: str, doc_materials: list[str], depth: int) -> dict:
    patterns = ["group", "ring", "array", "bars"] if depth == 0 else (
        ["group", "ring", "array", "bars"] if depth == 1 and draw(st.integers(0, 2)) == 0
        else ["bars"])
    kind = draw(st.sampled_from(["shape"] * 4 + patterns))
    if kind == "shape":
        return _shape(draw, dim, units, doc_materials)
    if kind == "group":
        objects = [_item(draw, dim, units, doc_materials, depth + 1)
                   for _ in range(draw(st.integers(1, 2)))]
        return {"group": _placement(draw, {"objects": objects}, dim, units)}
    if kind == "ring":
        body = {"radius": length(draw, 1.0, 40.0, units), "count": draw(st.integers(1, 6)),
                "object": _item(draw, dim, units, doc_materials, depth + 1)}
        if draw(st.booleans()):
            body["start_angle"] = angle(draw)
        if draw(st.booleans()):
            body["turn_copies"] = draw(st.booleans())
        return {"ring": _placement(draw, body, dim, units)}
    if kind == "array":
        body = {"count": draw(st.integers(1, 5)),
                "step": [length(draw, -10.0, 10.0, units, (0.0,)) for _ in range(dim)],
                "object": _item(draw, dim, units, doc_materials, depth + 1)}
        return {"array": _placement(draw, body, dim, units)}
    body = {"line_pairs_per_mm": number(draw, 0.1, 3.0, (0.1, 3.0, 5e4)),
            "count": draw(st.integers(1, 6)), "length": length(draw, 1.0, 20.0, units)}
    if dim == 3:
        body["thickness"] = length(draw, 0.5, 10.0, units)
    body = _placement(draw, body, dim, units)
    _flags(draw, body, dim, doc_materials)
    return {"bars": body}


def _custom_materials(draw) -> dict:
    out = {}
    for k in range(draw(st.integers(1, 2))):
        density = number(draw, 0.2, 8.0, (1e-3, 22.6, 30.0))
        if draw(st.booleans()):
            density = f"{density} g/cm3"
        if draw(st.booleans()):
            entry: dict[str, Any] = {"formula": draw(st.sampled_from(FORMULAS)), "density": density}
        else:
            entry = {"mass_fractions": draw(st.sampled_from([
                {"H": 0.112, "O": 0.888}, {"C": 0.6, "H": 0.08, "O": 0.32},
                {"H": 0.105, "C": 0.256, "N": 0.027, "O": 0.602, "P": 0.01}])),
                "density": density}
        out[draw(st.sampled_from(["gel", "my-tissue", "foam", "water"])) + ("" if k == 0
                                                                              else "-2")] = entry
    return out


def _voxels(draw, dim: int, doc_materials: list[str]) -> tuple[dict, dict[str, bytes]]:
    shape = tuple(draw(st.integers(1, 5)) for _ in range(dim))
    body: dict[str, Any] = {"file": "volume.npy"}
    size = [length(draw, 0.2, 4.0) for _ in range(dim)]
    body["voxel_size"] = size if draw(st.booleans()) else size[0]
    if draw(st.booleans()):
        body["centre"] = [length(draw, -20.0, 20.0, edges=(0.0,)) for _ in range(dim)]
    seed = draw(st.integers(0, 2**16))
    rng = np.random.default_rng(seed)
    if draw(st.booleans()):
        dtype = draw(st.sampled_from([np.uint8, np.int16, np.int32, np.int64, np.uint16]))
        labels = rng.integers(0, 3, size=shape).astype(dtype)
        names = doc_materials + CATALOGUE
        body["labels"] = {k: draw(st.sampled_from(names)) for k in (1, 2)}
        return body, {"volume.npy": npy_bytes(labels)}
    dtype = draw(st.sampled_from([np.float32, np.float64]))
    mu = (rng.random(shape) * 0.05).astype(dtype)
    body["mu_unit"] = draw(st.sampled_from(["/mm", "/cm", "1/cm"]))
    return body, {"volume.npy": npy_bytes(mu)}


@st.composite
def phantom_trees(draw, dimension: int | None = None, voxels: bool = True,
                  max_objects: int = 3) -> Tree:
    """A valid phantom document (and its voxel file, if any)."""
    dim = dimension or draw(st.sampled_from([2, 3]))
    units = draw(st.sampled_from(["mm", "mm", "cm"]))
    doc: dict[str, Any] = {"name": name_text(draw), "dimension": dim}
    if units == "cm" or draw(st.integers(0, 3)) == 0:
        doc["units"] = units
    if draw(st.integers(0, 2)) == 0:
        doc["description"] = draw(st.text(st.characters(codec="utf-8", exclude_categories=(
            "Cs", "Cc")), max_size=40))
    doc_materials: list[str] = []
    if draw(st.integers(0, 2)) == 0:
        doc["materials"] = _custom_materials(draw)
        doc_materials = list(doc["materials"])
    side: dict[str, bytes] = {}
    if voxels and draw(st.integers(0, 5)) == 0:
        doc["voxels"], side = _voxels(draw, dim, doc_materials)
    else:
        doc["objects"] = [_item(draw, dim, units, doc_materials, 0)
                          for _ in range(draw(st.integers(1, max_objects)))]
    return Tree(doc, side, draw(st.integers(1, 4)))


# --------------------------------------------------------------------------------------------
# Valid scanners
# --------------------------------------------------------------------------------------------

GEOMETRY_TYPES = ("parallel", "fan", "cone", "helical", "poses")


def _orbit(draw, body: dict, kind: str, max_views: int) -> None:
    body["views"] = draw(st.integers(1, max_views))
    if draw(st.booleans()):
        if kind != "helical" and draw(st.integers(0, 3)) == 0:
            body["arc"] = "short"
        else:
            top = 720.0 if kind == "helical" else (180.0 if kind == "parallel" else 360.0)
            body["arc"] = angle(draw, 1.0, top)
            if isinstance(body["arc"], str) and body["arc"].endswith("rad"):
                body["arc"] = f"{number(draw, 1.0, top)} deg"
    if draw(st.integers(0, 2)) == 0:
        body["start_angle"] = angle(draw)
    if draw(st.integers(0, 3)) == 0:
        body["direction"] = draw(st.sampled_from(["counterclockwise", "clockwise"]))
    if draw(st.integers(0, 3)) == 0:
        body["include_arc_end"] = draw(st.booleans())


def _pose_rows(draw, n_views: int, parallel: bool, sid: float, sdd: float) -> np.ndarray:
    """Views of a circular orbit, a little tilted now and then: (V, 12) in file column order."""
    start = draw(st.floats(0.0, 2 * math.pi))
    tilt = draw(st.sampled_from([0.0, 0.0, 0.05]))
    rows = []
    for i in range(n_views):
        phi = start + 2 * math.pi * i / max(n_views, 1)
        d = np.array([-math.sin(phi), math.cos(phi), 0.0])
        u = np.array([math.cos(phi), math.sin(phi), 0.0])
        v = np.array([tilt * math.cos(phi), tilt * math.sin(phi), 1.0])
        v = v - (v @ u) * u
        v /= np.linalg.norm(v)
        first = d if parallel else -sid * d
        rows.append(np.concatenate([first, (sdd - sid) * d, u, v]))
    return np.round(np.array(rows), 9)


def _pose_csv(table: np.ndarray, parallel: bool, draw) -> bytes:
    first = "direction" if parallel else "source"
    names = [f"{n}_{a}" for n in (first, "detector_centre", "u_axis", "v_axis") for a in "xyz"]
    order = list(range(12))
    if draw(st.booleans()):
        order = draw(st.permutations(order))
    lines = [",".join(names[k] for k in order)]
    for row in table:
        lines.append(",".join(repr(float(row[k])) for k in order))
    return ("\n".join(lines) + "\n").encode("utf-8")


def _geometry(draw, kind: str, units: str, cheap: bool, dim: int | None
              ) -> tuple[dict, dict[str, bytes], int, int, int]:
    """A geometry section, its side files, and its columns, rows and dimension."""
    max_cols, max_views = (16, 6) if cheap else (64, 40)
    body: dict[str, Any] = {"type": kind}
    side: dict[str, bytes] = {}
    sid = float(draw(st.integers(50, 600)))
    sdd = sid + float(draw(st.sampled_from([20, 50, 100, 300, 600])))
    if kind in ("fan", "cone", "helical"):
        cm = units == "cm"
        body["sid"] = draw(st.sampled_from([sid / 10 if cm else sid, f"{sid} mm"]))
        body["sdd"] = draw(st.sampled_from([sdd / 10 if cm else sdd, f"{sdd / 10} cm"]))
        if draw(st.booleans()):
            body["detector_shape"] = draw(st.sampled_from(["flat", "curved"]))
    n_cols = draw(st.integers(1, max_cols))
    body["columns"] = n_cols
    body["column_pitch"] = length(draw, 0.2, 10.0, units, (0.2, 50.0))
    if draw(st.integers(0, 3)) == 0:
        body["column_offset"] = draw(st.one_of(
            st.sampled_from(["0.25 cells", "-0.5 cells", "3 cells"]),
            st.just(length(draw, -5.0, 5.0, units, (0.0,)))))
    if kind == "fan":
        dim = 2
    elif kind in ("cone", "helical"):
        dim = 3
    elif dim is None:
        dim = draw(st.sampled_from([2, 3]))
    n_rows = 1
    if kind == "parallel" and (dim == 2 and draw(st.booleans())):
        body["dimension"] = 2
    if kind == "poses" and (dim == 2 or draw(st.booleans())):
        body["dimension"] = dim
    if dim == 3 and kind != "fan":
        n_rows = draw(st.integers(1, 4))
        body["rows"] = n_rows
        body["row_pitch"] = length(draw, 0.2, 10.0, units)
        if kind == "parallel" and draw(st.booleans()):
            body["dimension"] = 3
        if draw(st.integers(0, 3)) == 0:
            body["row_offset"] = draw(st.sampled_from(["0.5 cells", "1 mm", 0]))
    elif draw(st.integers(0, 3)) == 0:
        body["row_pitch"] = length(draw, 0.2, 10.0, units)
    if kind == "poses":
        parallel = draw(st.booleans())
        if parallel:
            body["beam"] = "parallel"
        elif draw(st.booleans()):
            body["beam"] = "divergent"
            if draw(st.booleans()):
                body["detector_shape"] = draw(st.sampled_from(["flat", "curved"]))
        where = draw(st.sampled_from(["inline", "npy", "csv"]))
        n_views = draw(st.integers(1, min(max_views, 6) if where == "inline" else max_views))
        table = _pose_rows(draw, n_views, parallel, sid, sdd)
        if where == "inline":
            first = "direction" if parallel else "source"
            body["poses"] = [{first: [float(x) for x in row[0:3]],
                              "detector_centre": [float(x) for x in row[3:6]],
                              "u_axis": [float(x) for x in row[6:9]],
                              "v_axis": [float(x) for x in row[9:12]]} for row in table]
        elif where == "npy":
            body["pose_file"] = "poses.npy"
            side["poses.npy"] = npy_bytes(table)
        else:
            body["pose_file"] = "poses.csv"
            side["poses.csv"] = _pose_csv(table, parallel, draw)
        return body, side, n_cols, n_rows, dim
    _orbit(draw, body, kind, max_views)
    if kind == "helical":
        body["table_feed_per_turn"] = length(draw, 1.0, 40.0, units)
        if draw(st.booleans()):
            body["table_feed_per_turn"] = f"-{body['table_feed_per_turn']}" if isinstance(
                body["table_feed_per_turn"], str) else -body["table_feed_per_turn"]
        if draw(st.booleans()):
            body["start_z"] = length(draw, -20.0, 20.0, units, (0.0,))
    return body, side, n_cols, n_rows, dim


def _spectrum_csv(draw) -> bytes:
    lo = draw(st.integers(10, 40))
    n = draw(st.integers(1, 60))
    step = draw(st.sampled_from([0.5, 1.0, 2.0]))
    sep = draw(st.sampled_from([" ", ",", "\t"]))
    lines = ["# energy_kev fluence"]
    for k in range(n):
        lines.append(f"{lo + k * step}{sep}{_round(1000.0 * (1 + math.sin(k)) + (k == 0))}")
    return ("\n".join(lines) + "\n").encode("utf-8")


def _source(draw, cheap: bool) -> tuple[dict, dict[str, bytes], float | None]:
    kind = draw(st.sampled_from(["energy", "kvp", "kvp", "spectrum_file"]))
    side: dict[str, bytes] = {}
    top = None
    if kind == "energy":
        top = number(draw, 15.0, 150.0, (1.0, 800.0))
        body: dict[str, Any] = {"energy": energy_text(draw, top, top)}
    elif kind == "kvp":
        top = number(draw, 40.0, 150.0, (40.0, 150.0))
        body = {"kvp": top}
        if draw(st.booleans()):
            body["anode_angle"] = angle(draw, 5.0, 30.0)
            if isinstance(body["anode_angle"], str) and "rad" in body["anode_angle"]:
                body["anode_angle"] = 12
        if draw(st.booleans()):
            body["energy_bin"] = draw(st.sampled_from([1.0, 2.0, "1 keV"] + ([] if cheap
                                                                            else [0.5, 0.1])))
    else:
        body = {"spectrum_file": "spectrum.csv"}
        side["spectrum.csv"] = _spectrum_csv(draw)
    if kind != "energy" and draw(st.booleans()):
        body["filtration"] = [{"material": draw(st.sampled_from(["aluminium", "copper", "water",
                                                                 "lead", "tin"])),
                               "thickness": length(draw, 0.0, 5.0, edges=(0.0, 100.0))}
                              for _ in range(draw(st.integers(1, 2)))]
    if draw(st.integers(0, 3)) == 0:
        body["focal_spot"] = draw(st.sampled_from(["1 mm", [0.5, 1.2], ["0 mm", "0.3 mm"]]))
        if draw(st.booleans()):
            body["focal_spot_samples"] = draw(st.sampled_from([1, 2, [2, 1], [1, 2]]))
    return body, side, top


def _exposure(draw, source_kind: str) -> dict:
    way = draw(st.sampled_from(["air_counts", "air_counts"] + (
        ["mas_per_view", "tube_current_ma"] if source_kind == "kvp" else [])))
    if way == "air_counts":
        return {"air_counts": number(draw, 10.0, 1e6, (1.0, 1e9))}
    if way == "mas_per_view":
        return {"mas_per_view": number(draw, 0.001, 5.0, (1e-3, 1000.0))}
    return {"tube_current_ma": number(draw, 1.0, 800.0), "view_time_ms": number(draw, 0.1, 5.0)}


def _detector(draw, top: float | None, n_cols: int, n_rows: int, cheap: bool) -> dict:
    body: dict[str, Any] = {}
    counting = draw(st.integers(0, 3)) == 0
    if counting:
        body["type"] = "photon-counting"
        hi = (top - 1.0) if top is not None else 100.0
        lo = min(10.0, hi - 1.0)
        count = draw(st.integers(1, 3))
        values = sorted({_round(draw(st.floats(lo, max(lo, hi)))) for _ in range(count)})
        body["thresholds"] = values
        if draw(st.booleans()):
            body["energy_resolution"] = draw(st.sampled_from([0, "4 keV", 8.0]))
    elif draw(st.integers(0, 4)) == 0:
        body["type"] = "energy-integrating"
    if draw(st.booleans()):
        body["material"] = draw(st.sampled_from(SENSORS))
        body["thickness"] = length(draw, 0.05, 2.0, edges=(1e-3, 100.0))
    if not counting and draw(st.booleans()):
        body["electronic_noise"] = number(draw, 0.0, 10.0, (0.0, 1e6))
    if draw(st.booleans()):
        body["dark_level"] = number(draw, 0.0, 200.0, (0.0, 1e9))
    if draw(st.integers(0, 3)) == 0:
        body["full_scale"] = number(draw, 100.0, 65535.0, (1e-3, 1.0, 5.0))
    options = {
        "gain_spread": lambda: number(draw, 0.0, 0.05, (0.0, 0.5)),
        "gain_drift": lambda: number(draw, 0.0, 0.01, (0.5,)),
        "blur": lambda: length(draw, 0.0, 2.0, edges=(0.0, 20.0)),
        "crosstalk": lambda: number(draw, 0.0, 0.1, (0.25,)),
        "lag": lambda: number(draw, 0.0, 0.3, (0.9,)),
        "flat_frames": lambda: draw(st.integers(1, 5)),
        "dark_frames": lambda: draw(st.integers(1, 5)),
        "pattern_seed": lambda: draw(st.integers(0, 2**31)),
        "aperture_samples": lambda: draw(st.sampled_from([1, 2, [2, 1]])),
        "dead_cells": lambda: draw(st.one_of(
            st.floats(0.0, 0.5).map(_round),
            st.lists(st.integers(0, n_cols - 1), max_size=3),
            st.lists(st.tuples(st.integers(0, n_rows - 1), st.integers(0, n_cols - 1))
                     .map(list), min_size=1, max_size=2))),
    }
    for key in draw(st.lists(st.sampled_from(sorted(options)), unique=True, max_size=5)):
        body[key] = options[key]()
    if "full_scale" in body and draw(st.integers(0, 2)) == 0:
        body["hot_cells"] = [draw(st.integers(0, n_cols - 1))]
    return body


def _scatter(draw) -> dict:
    model = draw(st.sampled_from(["none", "centre", "thickness"]))
    body: dict[str, Any] = {"model": model}
    if model == "centre":
        body["spr_at_centre"] = number(draw, 0.0, 1.0, (0.0, 10.0))
    elif model == "thickness":
        body["max_spr"] = number(draw, 0.0, 1.0, (10.0,))
        body["thickness_scale"] = length(draw, 10.0, 300.0, edges=(1.0, 1e4))
    if model != "none" and draw(st.booleans()):
        body["kernel_width"] = length(draw, 1.0, 200.0, edges=(1.0, 2000.0))
    if draw(st.integers(0, 3)) == 0:
        body["grid_transmission"] = number(draw, 0.0, 1.0, (0.0, 1.0))
    return body


@st.composite
def scanner_trees(draw, kinds: tuple = GEOMETRY_TYPES, physics: bool | None = None,
                  cheap: bool = True, dimension: int | None = None) -> Tree:
    """A valid scanner document (and its pose or spectrum file, if any).

    ``physics`` None: sometimes; ``dimension`` 2 or 3 keeps only geometries of that kind.
    """
    if dimension == 2:
        kinds = tuple(k for k in kinds if k in ("parallel", "fan", "poses"))
    elif dimension == 3:
        kinds = tuple(k for k in kinds if k != "fan")
    kind = draw(st.sampled_from(kinds))
    units = draw(st.sampled_from(["mm", "mm", "cm"]))
    doc: dict[str, Any] = {"name": name_text(draw)}
    if draw(st.integers(0, 3)) == 0:
        doc["description"] = draw(st.text(max_size=30).filter(
            lambda s: all(c.isprintable() for c in s)))
    if units == "cm" or draw(st.integers(0, 3)) == 0:
        doc["units"] = units
    geometry, side, n_cols, n_rows, _ = _geometry(draw, kind, units, cheap, dimension)
    doc["geometry"] = geometry
    with_physics = draw(st.booleans()) if physics is None else physics
    if with_physics:
        source, more, top = _source(draw, cheap)
        side.update(more)
        doc["source"] = source
        doc["exposure"] = _exposure(draw, "kvp" if "kvp" in source else "other")
        if draw(st.booleans()):
            doc["detector"] = _detector(draw, top, n_cols, n_rows, cheap)
        if draw(st.integers(0, 2)) == 0:
            doc["scatter"] = _scatter(draw)
    return Tree(doc, side, draw(st.integers(1, 4)))


# --------------------------------------------------------------------------------------------
# Mutations
# --------------------------------------------------------------------------------------------

HUGE_DIGITS = "1" + "0" * 400
HOSTILE_NUMBERS = [
    Raw(".nan"), Raw(".NaN"), Raw(".inf"), Raw("-.inf"), Raw("1.0e+308"), Raw("-1.0e+308"),
    Raw("1.0e+309"), Raw("4.9e-324"), Raw("-0"), Raw("-0.0"), Raw(HUGE_DIGITS),
    Raw("9" * 300 + ".5"), Raw("0." + "0" * 350 + "1"), Raw("-" + HUGE_DIGITS),
    Raw("0x7fffffffffffffff"), Raw("0o777"), Raw("1_000_000"), Raw("12:30:00"), Raw("+.5"),
    0, -1, -0.5, 10**9, 10**12, 2**63, -(2**63), 2**64, 1e-300,
    "nan mm", "inf mm", "-inf /mm", "1e400 mm", "1e400 /cm", "nan deg", "1e999 keV", "NaN",
    "1e308 cm", "1e-400 mm", "0 cells", "1e308 cells", "nan cells",
]
HOSTILE_COUNTS = [0, -1, 10**6, 10**9, 10**12, 2**31, 2**63, 10**30, 1.5, Raw(HUGE_DIGITS),
                  Raw("1.0e+9"), "1000000000", True]
HOSTILE_TEXT = [
    "", " ", "\t", "ｗａｔｅｒ", "water\u200b", "\u202ewater", "wa\u0301ter", "💧", "\ud800",
    "\udcff", "x" * 20000, "\x00", "\x1b[31mred", "a\nb", "é" * 50, "../../etc/passwd",
    "/dev/zero", "CON", "\ufeffwater", "water\u2028", "Ω", "𝔴𝔞𝔱𝔢𝔯",
]
HOSTILE_RAW = [
    Raw("null"), Raw("~"), Raw("true"), Raw("yes"), Raw("2001-12-14"),
    Raw("2001-12-14T21:59:43.10-05:00"), Raw("!!binary aGVsbG8="), Raw("!!set {a, b}"),
    Raw("!!omap [a: 1, b: 2]"), Raw("!!python/object:os.system ls"),
    Raw("!!python/name:os.system"), Raw("!unknown x"), Raw("!!int x"), Raw("!!float abc"),
    Raw("!!str 1"), Raw("*undefined"), Raw("&self [*self]"), Raw("{}"), Raw("[]"),
    Raw("{[1, 2]: 3}"), Raw("[[[[[[[[[[]]]]]]]]]]"), Raw("{a: {a: {a: {a: {a: 1}}}}}"),
    Raw("'unterminated"), Raw('"\\ud800"'), Raw('"\\x00"'), Raw("? complex"),
]
TYPOS = [
    lambda k: k[:-1], lambda k: k + "s", lambda k: k.capitalize(), lambda k: k.upper(),
    lambda k: k.replace("_", "-"), lambda k: k.replace("_", " "), lambda k: k[1:] + k[0],
    lambda k: k.replace("a", "а"), lambda k: k + " ", lambda k: " " + k, lambda k: k + "\u200b",
    lambda k: k.replace("e", "é"), lambda k: "colour", lambda k: k.replace("centre", "center"),
]
BAD_BYTES = [b"\xff", b"\xfe\xff", b"\xc3\x28", b"\x80", b"\xed\xa0\x80", b"\xf8\x88\x80\x80",
             b"\xc0\xaf", b"\xe2\x82", b"\x00", b"\x1b", b"\x7f", b"\xc2\x85", b"\xef\xbb\xbf",
             b"\xe2\x80\xa8", b"\xef\xbf\xbe", b"\r", b"\t"]
EMPTY_TEXTS = [b"", b"\n", b"---\n", b"...\n", b"# only a comment\n", b"null\n", b"~\n",
               b"[]\n", b"{}\n", b"42\n", b"'text'\n", b"---\n---\n", b"- a\n- b\n",
               b"\xef\xbb\xbf", b"   \n\t\n", b"!!binary aGVsbG8=\n", b"&a [*a]\n"]


def _positions(node: Any) -> list[tuple[Any, Any]]:
    """Every (container, key) in a tree, containers first; aliases and raws are leaves."""
    out: list[tuple[Any, Any]] = []
    stack = [node]
    while stack:
        current = stack.pop()
        if isinstance(current, dict):
            for key, value in current.items():
                out.append((current, key))
                stack.append(value)
        elif isinstance(current, list):
            for index, value in enumerate(current):
                out.append((current, index))
                stack.append(value)
        elif isinstance(current, Anchor):
            stack.append(current.node)
    return out


def _pick(draw, items: list):
    return items[draw(st.integers(0, len(items) - 1))] if items else None


def _path(node: Any, target: tuple[Any, Any]) -> str:
    """A dotted path to ``target`` for the notes (best effort)."""
    stack: list[tuple[Any, str]] = [(node, "")]
    while stack:
        current, prefix = stack.pop()
        items = current.items() if isinstance(current, dict) else (
            enumerate(current) if isinstance(current, list) else ())
        for key, value in items:
            here = f"{prefix}[{key}]" if isinstance(current, list) else (
                f"{prefix}.{key}" if prefix else str(key))
            if current is target[0] and key == target[1]:
                return here
            stack.append((value, here))
    return "?"


def _numeric_positions(tree: Any) -> list[tuple[Any, Any]]:
    def numeric(value: Any) -> bool:
        if isinstance(value, bool):
            return False
        if isinstance(value, (int, float)):
            return True
        return isinstance(value, str) and bool(re.match(r"^-?[\d.]", value))
    return [(c, k) for c, k in _positions(tree) if numeric(c[k])]


def _set(container: Any, key: Any, value: Any) -> None:
    container[key] = value


def _rename(mapping: dict, old: Any, new: Any) -> None:
    items = list(mapping.items())
    mapping.clear()
    for key, value in items:
        if key == old:
            key = new
        if key in mapping:  # the new name already there: keep both as a duplicate in text
            key = Raw(f"{scalar_text(key)} ")
        mapping[key] = value


def hostile_values(draw) -> Any:
    family = draw(st.integers(0, 6))
    if family == 0:
        return draw(st.sampled_from(HOSTILE_NUMBERS))
    if family == 1:
        return draw(st.sampled_from(HOSTILE_TEXT))
    if family == 2:
        return draw(st.sampled_from(HOSTILE_RAW))
    if family == 3:
        return draw(st.sampled_from(HOSTILE_COUNTS))
    if family == 4:
        return draw(st.one_of(st.floats(), st.integers(), st.booleans(), st.none(),
                              st.text(max_size=8)))
    if family == 5:
        depth = draw(st.sampled_from([3, 40, 70, 200, 1000]))
        return Raw("[" * depth + "]" * depth) if draw(st.booleans()) else Raw(
            "{a: " * depth + "1" + "}" * depth)
    return draw(st.sampled_from([[], {}, [1, 2, 3], {"x": 1}, [[0, 0]], [None], list(range(50))]))


def _tree_mutation(draw, tree: Tree) -> None:
    doc = tree.document
    positions = _positions(doc)
    mappings = [(c, k) for c, k in positions if isinstance(c, dict)]
    op = draw(st.sampled_from(["drop", "misspell", "unknown", "retype", "retype", "number",
                               "count", "alias", "nest", "unicode", "wrap"]))
    if op == "drop" and mappings:
        container, key = _pick(draw, mappings)
        tree.notes.append(f"dropped {_path(doc, (container, key))}")
        del container[key]
    elif op == "misspell" and mappings:
        container, key = _pick(draw, mappings)
        new = draw(st.sampled_from(TYPOS))(str(key)) or "x"
        tree.notes.append(f"renamed {_path(doc, (container, key))} to {new!r}")
        _rename(container, key, new)
    elif op == "unknown" and mappings:
        container, _ = _pick(draw, mappings)
        key = draw(st.sampled_from(["colour", "extra", "Name", "radius", "type", "z", "1",
                                    "objects"]))
        if key in container:
            key = key + "_"
        container[key] = hostile_values(draw)
        tree.notes.append(f"added unknown field {key!r}")
    elif op in ("retype", "nest", "unicode", "wrap") and positions:
        container, key = _pick(draw, positions)
        where = _path(doc, (container, key))
        if op == "retype":
            value = hostile_values(draw)
        elif op == "nest":
            depth = draw(st.sampled_from([65, 100, 1000]))
            value = Raw("[" * depth + "]" * depth)
        elif op == "unicode":
            value = draw(st.one_of(st.sampled_from(HOSTILE_TEXT),
                                   st.text(st.characters(codec="utf-8"), min_size=1,
                                           max_size=20)))
        else:
            value = [container[key]] if draw(st.booleans()) else {"value": container[key]}
        tree.notes.append(f"set {where} to {flow_text(value)[:80]}")
        _set(container, key, value)
    elif op == "number":
        spots = _numeric_positions(doc)
        if spots:
            container, key = _pick(draw, spots)
            value = draw(st.sampled_from(HOSTILE_NUMBERS))
            tree.notes.append(f"set {_path(doc, (container, key))} to {flow_text(value)[:60]}")
            _set(container, key, value)
    elif op == "count":
        spots = [(c, k) for c, k in _numeric_positions(doc) if isinstance(c[k], int)]
        if spots:
            container, key = _pick(draw, spots)
            value = draw(st.sampled_from(HOSTILE_COUNTS))
            tree.notes.append(f"set {_path(doc, (container, key))} to {flow_text(value)[:60]}")
            _set(container, key, value)
    elif op == "alias" and len(positions) >= 2:
        source = _pick(draw, positions)
        target = _pick(draw, positions)
        if source is not target:
            name = f"a{len(tree.notes)}"
            tree.notes.append(f"anchored {_path(doc, source)} as &{name}, "
                              f"aliased at {_path(doc, target)}")
            value = source[0][source[1]]
            _set(source[0], source[1], Anchor(name, value))
            _set(target[0], target[1], Alias(name))


def alias_bomb(fan_out: int, levels: int, dim: int = 2) -> list:
    """An ``objects`` list whose groups of groups expand to about ``fan_out ** levels`` shapes."""
    shape = {"shape": "circle" if dim == 2 else "sphere", "radius": 1, "material": "water"}
    items: list[Any] = [Anchor("g0", shape)]
    for level in range(1, levels + 1):
        items.append(Anchor(f"g{level}", {"group": {"objects": [Alias(f"g{level - 1}")]
                                                     * fan_out}}))
    return items


def _text_mutation(draw, data: bytes, notes: list[str]) -> bytes:
    op = draw(st.sampled_from(["truncate", "bytes", "bytes", "empty", "tabs", "endings",
                               "duplicate", "long", "encoding", "bom"]))
    cut = draw(st.integers(0, max(len(data), 1)))
    if op == "truncate":
        notes.append(f"cut the text at byte {cut}")
        return data[:cut]
    if op == "bytes":
        bad = draw(st.sampled_from(BAD_BYTES))
        notes.append(f"inserted {bad!r} at byte {cut}")
        return data[:cut] + bad + data[cut:]
    if op == "empty":
        text = draw(st.sampled_from(EMPTY_TEXTS))
        notes.append(f"replaced the text by {text!r}")
        return text
    lines = data.split(b"\n")
    if op == "tabs":
        notes.append("indented with tabs")
        return b"\n".join(re.sub(rb"^( +)", lambda m: b"\t" * (len(m.group(1)) // 2), line)
                          for line in lines)
    if op == "endings":
        ending = draw(st.sampled_from([b"\r\n", b"\r", "\u2028".encode(), b"\x85"]))
        notes.append(f"line endings {ending!r}")
        return ending.join(lines)
    if op == "duplicate":
        k = draw(st.integers(0, max(len(lines) - 1, 0)))
        notes.append(f"repeated line {k + 1}")
        return b"\n".join(lines[:k + 1] + lines[k:])
    if op == "long":
        notes.append("appended a 5000 character comment and value")
        return data + b"\n# " + b"x" * 5000 + b"\nzz_long: " + b"y" * 5000 + b"\n"
    if op == "encoding":
        codec = draw(st.sampled_from(["utf-16", "latin-1", "utf-32"]))
        notes.append(f"re-encoded as {codec}")
        text = data.decode("utf-8", "replace") + "# é ü\n"
        return text.encode(codec, "replace")
    notes.append("byte-order mark at the start")
    return b"\xef\xbb\xbf" + data


# -- side files --------------------------------------------------------------------------------


def forged_npy(shape: tuple, descr: str = "<f8", payload: bytes = b"\0" * 64,
               fortran: bool = False) -> bytes:
    """A ``.npy`` whose header claims ``shape`` and ``descr`` over ``payload`` bytes of data."""
    header = repr({"descr": descr, "fortran_order": fortran, "shape": tuple(shape)}) + " "
    header += " " * ((64 - (10 + len(header) + 1) % 64) % 64) + "\n"
    return b"\x93NUMPY\x01\x00" + len(header).to_bytes(2, "little") + header.encode() + payload


def _raw_header_npy(header: str) -> bytes:
    header = header + " " * ((64 - (10 + len(header) + 1) % 64) % 64) + "\n"
    return b"\x93NUMPY\x01\x00" + len(header).to_bytes(2, "little") + header.encode("latin-1") + \
        b"\0" * 64


def _npy_mutation(draw, name: str, data: bytes, notes: list[str]) -> bytes:
    try:
        array = np.load(io.BytesIO(data), allow_pickle=False)
    except (ValueError, OSError, EOFError, MemoryError):  # an earlier mutation forged it
        array = np.zeros((2, 2))
    op = draw(st.sampled_from(["forged", "forged", "dtype", "nan", "shape", "truncate", "text",
                               "empty", "pickle", "npz", "labels", "header", "endian"]))
    if op == "forged":
        shape = draw(st.sampled_from([(100000, 100000, 100000), (10**9, 12), (2**62,), (-1, 12),
                                      (3, 12, 0, 10**18), (40000, 40000), (5, 12)]))
        descr = draw(st.sampled_from(["<f8", "<i4", "|u1", "<f4", "|O", "<U10", ">f8"]))
        notes.append(f"{name}: forged header shape {shape} {descr}")
        return forged_npy(shape, descr)
    if op == "dtype":
        dtype = draw(st.sampled_from([np.complex128, np.bool_, np.float16, "U4", "S3",
                                      [("a", "<f8"), ("b", "<i4")], np.int8, "m8[s]", "M8[D]"]))
        notes.append(f"{name}: dtype {dtype}")
        try:
            return npy_bytes(array.astype(dtype))
        except (TypeError, ValueError):
            return npy_bytes(np.zeros(array.shape, dtype=dtype))
    if op == "nan":
        values = array.astype(np.float64)
        flat = values.reshape(-1)
        if flat.size:
            flat[draw(st.integers(0, flat.size - 1))] = draw(st.sampled_from(
                [np.nan, np.inf, -np.inf, 1e308, -1e308, 5e-324]))
        if array.dtype.kind in "iu" and draw(st.booleans()):
            notes.append(f"{name}: a huge label")
            big = array.astype(np.int64).reshape(-1)
            big[0] = draw(st.sampled_from([2**31, 2**40, 2**62, -1, -(2**63)]))
            return npy_bytes(big.reshape(array.shape))
        notes.append(f"{name}: a non-finite or extreme value")
        return npy_bytes(values)
    if op == "shape":
        new = draw(st.sampled_from([(), (0,), (0, 12), (3,), (2, 2, 2, 2), (1, 11), (1, 13),
                                    (12, 1), (1, 1)]))
        notes.append(f"{name}: shape {new}")
        return npy_bytes(np.ones(new))
    if op == "truncate":
        cut = draw(st.integers(0, max(len(data) - 1, 0)))
        notes.append(f"{name}: cut at byte {cut}")
        return data[:cut]
    if op == "text":
        notes.append(f"{name}: not a .npy file")
        return draw(st.sampled_from([b"1,2,3\n", b"\x93NUMPY", b"\x93NUMPY\x09\x00",
                                     b"PK\x03\x04", "ü".encode("latin-1"), b"\x00" * 100]))
    if op == "empty":
        notes.append(f"{name}: empty file")
        return b""
    if op == "pickle":
        notes.append(f"{name}: an object array (pickle)")
        buffer = io.BytesIO()
        np.save(buffer, np.array([{"a": 1}, None], dtype=object), allow_pickle=True)
        return buffer.getvalue()
    if op == "npz":
        notes.append(f"{name}: an .npz archive")
        buffer = io.BytesIO()
        np.savez(buffer, a=array)
        return buffer.getvalue()
    if op == "labels":
        notes.append(f"{name}: labels out of the table")
        return npy_bytes(np.full(array.shape or (2, 2), 7, dtype=np.int32))
    if op == "header":
        header = draw(st.sampled_from([
            "{'descr': '<f8', 'fortran_order': False, 'shape': (2, 2), 'extra': __import__('os')}",
            "{'descr': '<f8', 'fortran_order': False}", "not a dict", "{'descr': '<f8', "
            "'fortran_order': False, 'shape': (2" + ", 2" * 40 + ",)}",
            "{'descr': '<f8', 'fortran_order': False, 'shape': (" + "9" * 400 + ",)}",
            "{'descr': '<f8', 'fortran_order': True, 'shape': (2, 2)}",
        ]))
        notes.append(f"{name}: header {header[:60]!r}")
        return _raw_header_npy(header)
    notes.append(f"{name}: big-endian, Fortran order")
    return npy_bytes(np.asfortranarray(array.astype(array.dtype.newbyteorder(">"))))


def _csv_mutation(draw, name: str, data: bytes, notes: list[str]) -> bytes:
    lines = data.decode("utf-8").split("\n")
    op = draw(st.sampled_from(["cell", "cell", "column", "rows", "bytes", "field", "empty",
                               "separator", "many"]))
    body = [k for k in range(1, len(lines)) if lines[k].strip() and not lines[k].startswith("#")]
    if op == "cell" and body:
        k = _pick(draw, body)
        cells = re.split(r"([,\t ])", lines[k])
        index = 2 * draw(st.integers(0, len(cells[::2]) - 1))
        value = draw(st.sampled_from(["nan", "inf", "-inf", "1e400", "", "abc", "1,5", "0x10",
                                      "１２", "1e-400", HUGE_DIGITS, "\"1\"", "-0", "NaN"]))
        cells[index] = value
        lines[k] = "".join(cells)
        notes.append(f"{name}: line {k + 1} cell set to {value[:20]!r}")
    elif op == "column":
        header = lines[0].split(",")
        if len(header) > 1:
            drop = draw(st.integers(0, len(header) - 1))
            rename = draw(st.booleans())
            notes.append(f"{name}: header column {header[drop]!r} " +
                         ("misspelt" if rename else "dropped"))
            if rename:
                header[drop] = header[drop].upper()
            else:
                del header[drop]
            lines[0] = ",".join(header)
        else:
            lines.insert(0, "energy,fluence,extra")
            notes.append(f"{name}: a header line where none belongs")
    elif op == "rows":
        k = _pick(draw, body) if body else 0
        lines[k] = lines[k] + draw(st.sampled_from([",1", ",", "", ",,", " 1 2"]))
        notes.append(f"{name}: line {k + 1} has a value too many")
    elif op == "bytes":
        bad = draw(st.sampled_from(BAD_BYTES))
        cut = draw(st.integers(0, len(data)))
        notes.append(f"{name}: inserted {bad!r} at byte {cut}")
        return data[:cut] + bad + data[cut:]
    elif op == "field":
        notes.append(f"{name}: a 140 000 character cell")
        if body:
            lines[body[0]] = "1" * 140_000 + lines[body[0]]
    elif op == "empty":
        text = draw(st.sampled_from([b"", b"\n", lines[0].encode() + b"\n", b"# comment\n"]))
        notes.append(f"{name}: replaced by {text[:40]!r}")
        return text
    elif op == "separator":
        notes.append(f"{name}: semicolons between values")
        lines = [line.replace(",", ";") for line in lines]
    else:
        count = draw(st.sampled_from([5000, 100_000]))
        notes.append(f"{name}: {count} repeated data lines")
        if body:
            lines = lines[:1] + [lines[body[0]]] * count
    return "\n".join(lines).encode("utf-8")


def _side_mutation(draw, files: dict[str, bytes], main: str, notes: list[str]) -> None:
    names = sorted(n for n in files if n != main)
    if not names:
        return
    name = draw(st.sampled_from(names))
    if name.endswith(".npy"):
        files[name] = _npy_mutation(draw, name, files[name], notes)
    else:
        files[name] = _csv_mutation(draw, name, files[name], notes)


@st.composite
def mutated(draw, trees: st.SearchStrategy, main: str, max_mutations: int = 3,
            bomb: bool = False) -> Case:
    """A case from ``trees`` with 0 to ``max_mutations`` mutations of its tree, text or side
    files (about one case in five is left valid)."""
    tree: Tree = copy.deepcopy(draw(trees))
    count = draw(st.integers(0, max_mutations)) if draw(st.integers(0, 4)) else 0
    plan = [draw(st.sampled_from(["tree"] * 5 + ["text"] * 2 + ["side"] * (2 if tree.side
                                                                            else 0)))
            for _ in range(count)]
    if bomb and "objects" in tree.document and draw(st.integers(0, 9)) == 0:
        # either a few dozen shapes (valid) or millions and more (to be refused before they
        # are expanded); tens of thousands are valid but slow to expand, so left out here
        fan_out, levels = draw(st.sampled_from([(2, 2), (3, 3), (4, 3), (8, 2), (2, 5),
                                                (10, 7), (10, 9), (30, 5), (100, 4), (8, 8)]))
        tree.document["objects"] = alias_bomb(fan_out, levels, tree.document["dimension"])
        tree.flow_depth = min(tree.flow_depth, 2)
        tree.notes.append(f"alias bomb: {levels} levels of groups of {fan_out}")
    for step in plan:
        if step == "tree":
            _tree_mutation(draw, tree)
    case = render(tree, main)
    for step in plan:
        if step == "text":
            case.files[main] = _text_mutation(draw, case.files[main], case.notes)
        elif step == "side":
            _side_mutation(draw, case.files, main, case.notes)
    return case


def phantom_cases(dimension: int | None = None, max_mutations: int = 3) -> st.SearchStrategy:
    """Phantom files, valid or mutated (``phantom.yaml`` plus a voxel file, if any)."""
    return mutated(phantom_trees(dimension), "phantom.yaml", max_mutations, bomb=True)


def scanner_cases(physics: bool | None = None, cheap: bool = True,
                  dimension: int | None = None, max_mutations: int = 3) -> st.SearchStrategy:
    """Scanner files, valid or mutated (``scanner.yaml`` plus pose or spectrum files)."""
    return mutated(scanner_trees(physics=physics, cheap=cheap, dimension=dimension),
                   "scanner.yaml", max_mutations)


# --------------------------------------------------------------------------------------------
# Command-line options
# --------------------------------------------------------------------------------------------

ENERGY_OPTIONS = ["60", "60", "70 keV", "0.06 MeV", "20", "150", "1", "800", "0", "-60", "nan",
                  "inf", "-inf", "1e400", "1e-300", "abc", "", " ", "60 eV", "６０", "60keV",
                  "1" * 400, "0x3c", "60;rm -rf", "\udcff"]
PIXEL_OPTIONS = ["8", "16", "32", "24", "7", "1", "0", "-5", "100000", "1000000000000", "abc",
                 "", "1e3", "nan", "16.5", "0x10", "１６"]
SEED_OPTIONS = ["0", "7", "123456789", "-1", "18446744073709551616", "9" * 50, "abc", "1e3",
                "", "0x10"]
BUDGET_OPTIONS = ["64 MiB", "1e400 GiB", "nan", "-1", "0", "1 KiB", "1", "8 GiB", "abc", "",
                  "1e18"]
OUTPUT_NAMES = ["result", "result", "nested/deeper/result", "exists", "a file", "ü ☢",
                "\udcff", ".hidden", "result.", "-", "x" * 300]
