"""The material catalogue: what a CT lab scans, by composition (mass fractions) and density.

Names are plain lowercase words joined by hyphens (``water``, ``soft-tissue``,
``cortical-bone``). Contrast dilutions and calcium inserts are named by solute and
concentration: ``iodine-10mg/ml``, ``gadolinium-5mg/ml``, ``hydroxyapatite-400mg/ml``. The
catalogue lists the usual concentrations (:func:`material_names`), and :func:`get_material`
also accepts any other concentration written the same way (``iodine-7.5mg/ml``), between 0 and
the limits in :data:`DILUTION_LIMITS_MG_ML`.

Sources
-------
* Tissues (``soft-tissue``, ``adipose``, ``muscle``, ``cortical-bone``, ``lung``):
  ICRU Report 44 (1989), *Tissue Substitutes in Radiation Dosimetry and Measurement*,
  elemental composition by mass (percent) and density of adult body tissues.
* Tissues by the ICRP compilation (``soft-tissue-icrp``, ``adipose-icrp``,
  ``cortical-bone-icrp``, ``blood``, ``brain``, ``compact-bone-icru``), ``water``, ``air``,
  ``pmma``, ``polyethylene``, ``polystyrene``, ``ptfe``, ``polycarbonate``, ``nylon``: the NIST
  material composition data (Hubbell & Seltzer, NISTIR 5632, and the ESTAR/XCOM composition
  tables derived from ICRU Report 37 and ICRP Publication 23) as shipped with xraylib
  (``xraylib.GetCompoundDataNISTByName``).
* Elements (``aluminium``, ``titanium``, ``iron``, ``copper``, ``tin``, ``tungsten``,
  ``lead``, ``graphite``): pure element; density from Hubbell & Seltzer, NISTIR 5632, Table 1,
  as shipped with xraylib (``xraylib.ElementDensity``), except graphite (1.70 g/cm^3,
  a typical density of polycrystalline graphite, common practice).
* ``steel``: stainless steel AISI 304 (UNS S30400), mid-range composition of ASTM A240
  (Cr 19 %, Ni 9.25 %, Mn 1 %, Si 0.5 %, C 0.04 %, Fe balance), density 8.00 g/cm^3.

Mixing rules for dilutions
--------------------------
``iodine-*`` and ``gadolinium-*`` (contrast agents) use the *added-mass rule*: one millilitre
of the dilution holds one millilitre of water plus ``c`` mg of the element, i.e. the solute adds
mass but no volume, so ``rho = rho_water + c/1000`` (g/cm^3) and the solute mass fraction is
``(c/1000) / rho``. This is the convention of material-decomposition work, where a contrast
dilution is described by its element concentration in mg/mL on a water background.

``hydroxyapatite-*`` (calcium hydroxyapatite Ca10(PO4)6(OH)2 inserts, base water) use the
*volume-additive rule*: ``c`` mg of hydroxyapatite occupy ``c / (1000 rho_HA)`` mL with
``rho_HA = 3.16`` g/cm^3 (crystal density of hydroxyapatite), and water fills the rest of the
millilitre, so ``rho = c/1000 + rho_water (1 - c/(1000 rho_HA))``.
"""

from __future__ import annotations

import math
import re
from functools import lru_cache
from typing import Mapping, Sequence

import xraylib

from simbench.materials.spec import MaterialSpec

# --------------------------------------------------------------------------------------------
# Elements and compositions
# --------------------------------------------------------------------------------------------

#: Highest atomic number whose cross sections xraylib tabulates for both total attenuation and
#: energy absorption.
MAX_ATOMIC_NUMBER = 92

_ICRU44 = "ICRU Report 44 (1989), adult body tissue composition and density"
_NIST = "NIST material composition data (Hubbell & Seltzer, NISTIR 5632) via xraylib, entry '{}'"
_ELEMENT = "pure element, density from Hubbell & Seltzer, NISTIR 5632, Table 1 (via xraylib)"

#: Density of calcium hydroxyapatite in g/cm^3 (crystal density, used by the volume rule).
HYDROXYAPATITE_DENSITY_G_CM3 = 3.16

#: Concentrations the catalogue lists for each dilution family (mg of solute per mL).
LISTED_CONCENTRATIONS_MG_ML = {
    "iodine": (2.0, 5.0, 10.0, 20.0),
    "gadolinium": (2.0, 5.0, 10.0, 20.0),
    "hydroxyapatite": (50.0, 100.0, 200.0, 400.0, 800.0),
}

#: Highest concentration accepted for each dilution family, mg/mL (a physically plausible
#: bound: iodinated contrast stock is about 400 mg I/mL; hydroxyapatite inserts stop near
#: 1200 mg/mL).
DILUTION_LIMITS_MG_ML = {"iodine": 400.0, "gadolinium": 400.0, "hydroxyapatite": 1500.0}


def element_symbol_to_z(symbol: str) -> int:
    """Atomic number of an element symbol (``"Ca"`` -> 20); ValueError if unknown."""
    try:
        z = int(xraylib.SymbolToAtomicNumber(symbol))
    except (ValueError, TypeError):
        z = 0
    if z < 1 or z > MAX_ATOMIC_NUMBER:
        raise ValueError(
            f"unknown element '{symbol}' (valid: element symbols H to U, written like 'Ca')"
        )
    return z


def _normalised(fractions: Mapping[str, float]) -> tuple:
    """Sort by atomic number and renormalise to an exact sum of 1."""
    total = math.fsum(fractions.values())
    items = sorted(fractions.items(), key=lambda kv: element_symbol_to_z(kv[0]))
    return tuple((symbol, float(w) / total) for symbol, w in items if w > 0)


def _percent(**percent: float) -> dict:
    return {symbol: value / 100.0 for symbol, value in percent.items()}


def _from_nist(name: str, nist_name: str, density: float | None = None, note: str = "") -> MaterialSpec:
    data = xraylib.GetCompoundDataNISTByName(nist_name)
    fractions = {xraylib.AtomicNumberToSymbol(z): w
                 for z, w in zip(data["Elements"], data["massFractions"])}
    reference = _NIST.format(nist_name)
    if note:
        reference += "; " + note
    return MaterialSpec(name=name, kind="catalogue", mass_fractions=_normalised(fractions),
                        density_g_cm3=float(data["density"] if density is None else density),
                        reference=reference)


def _element(name: str, symbol: str, density: float | None = None, reference: str = _ELEMENT) -> MaterialSpec:
    z = element_symbol_to_z(symbol)
    rho = float(xraylib.ElementDensity(z)) if density is None else density
    return MaterialSpec(name=name, kind="catalogue", mass_fractions=((symbol, 1.0),),
                        density_g_cm3=rho, reference=reference)


def _mixture(name: str, fractions: Mapping[str, float], density: float, reference: str) -> MaterialSpec:
    return MaterialSpec(name=name, kind="catalogue", mass_fractions=_normalised(fractions),
                        density_g_cm3=float(density), reference=reference)


# ICRU Report 44 (1989) tissue compositions, percent by mass, and densities in g/cm^3.
_ICRU44_TISSUES = {
    "soft-tissue": (1.06, _percent(H=10.2, C=14.3, N=3.4, O=70.8, Na=0.2, P=0.3, S=0.3,
                                   Cl=0.2, K=0.3)),
    "adipose": (0.95, _percent(H=11.4, C=59.8, N=0.7, O=27.8, Na=0.1, S=0.1, Cl=0.1)),
    "muscle": (1.05, _percent(H=10.2, C=14.3, N=3.4, O=71.0, Na=0.1, P=0.2, S=0.3, Cl=0.1,
                              K=0.4)),
    "cortical-bone": (1.92, _percent(H=3.4, C=15.5, N=4.2, O=43.5, Na=0.1, Mg=0.2, P=10.3,
                                     S=0.3, Ca=22.5)),
    "lung": (0.26, _percent(H=10.3, C=10.5, N=3.1, O=74.9, Na=0.2, P=0.2, S=0.3, Cl=0.3,
                            K=0.2)),
}
_ICRU44_LABELS = {
    "soft-tissue": "soft tissue",
    "adipose": "adipose tissue",
    "muscle": "skeletal muscle",
    "cortical-bone": "cortical bone",
    "lung": "lung (healthy, inflated)",
}

_STEEL_304 = {"C": 0.0004, "Si": 0.005, "Cr": 0.19, "Mn": 0.01, "Ni": 0.0925}
_STEEL_304["Fe"] = 1.0 - math.fsum(_STEEL_304.values())


@lru_cache(maxsize=1)
def _base_catalogue() -> dict[str, MaterialSpec]:
    entries: list[MaterialSpec] = []
    for name, (rho, fractions) in _ICRU44_TISSUES.items():
        entries.append(_mixture(name, fractions, rho, f"{_ICRU44}: {_ICRU44_LABELS[name]}"))
    entries += [
        _from_nist("water", "Water, Liquid"),
        _from_nist("air", "Air, Dry (near sea level)"),
        _from_nist("soft-tissue-icrp", "Tissue, Soft (ICRP)"),
        _from_nist("adipose-icrp", "Adipose Tissue (ICRP)"),
        _from_nist("muscle-icrp", "Muscle, Skeletal"),
        _from_nist("cortical-bone-icrp", "Bone, Cortical (ICRP)"),
        _from_nist("compact-bone-icru", "Bone, Compact (ICRU)"),
        _from_nist("blood", "Blood (ICRP)"),
        _from_nist("brain", "Brain (ICRP)"),
        _from_nist("pmma", "Polymethyl Methacralate (Lucite, Perspex)"),
        _from_nist("polyethylene", "Polyethylene"),
        _from_nist("polystyrene", "Polystyrene"),
        _from_nist("polycarbonate", "Polycarbonate (Makrolon, Lexan)"),
        _from_nist("ptfe", "Polytetrafluoroethylene (Teflon)"),
        _from_nist("nylon", "Nylon, type 6 and type 6/6"),
        _element("aluminium", "Al"),
        _element("titanium", "Ti"),
        _element("iron", "Fe"),
        _element("copper", "Cu"),
        _element("tin", "Sn"),
        _element("tungsten", "W"),
        _element("lead", "Pb"),
        _element("graphite", "C", 1.70, "pure carbon, density 1.70 g/cm^3 (typical "
                                         "polycrystalline graphite, common practice)"),
        _mixture("steel", _STEEL_304, 8.00,
                 "stainless steel AISI 304 (UNS S30400), mid-range composition of ASTM A240, "
                 "density 8.00 g/cm^3"),
    ]
    catalogue = {spec.name: spec for spec in entries}
    for solute, concentrations in LISTED_CONCENTRATIONS_MG_ML.items():
        for c in concentrations:
            spec = _dilution_entry(solute, c, catalogue["water"])
            catalogue[spec.name] = spec
    return catalogue


# --------------------------------------------------------------------------------------------
# Dilutions
# --------------------------------------------------------------------------------------------

_DILUTION_NAME = re.compile(r"^(iodine|gadolinium|hydroxyapatite)-(\d+(?:\.\d+)?)mg/ml$")


def _concentration_label(mg_per_ml: float) -> str:
    return f"{mg_per_ml:g}"


def dilution(solute: str, mg_per_ml: float, solvent: "str | MaterialSpec" = "water", *,
             solute_density_g_cm3: float | None = None, name: str | None = None,
             reference: str = "") -> MaterialSpec:
    """A solute dissolved or suspended in a solvent at a concentration in mg/mL.

    Parameters
    ----------
    solute : str
        An element symbol (``"I"``, ``"Gd"``) or a chemical formula (``"Ca10(PO4)6(OH)2"``).
    mg_per_ml : float
        Mass of solute per millilitre of mixture, mg/mL (>= 0).
    solvent : str or MaterialSpec
        The solvent, by catalogue name or spec (default ``"water"``).
    solute_density_g_cm3 : float, optional
        Density of the pure solute, g/cm^3. If given, the volume-additive rule is used;
        otherwise the added-mass rule.
    name : str, optional
        Name of the result (default ``"<solute>-<c>mg/ml"``).
    reference : str
        Text for the ``reference`` field, appended to the mixing rule.

    Returns
    -------
    MaterialSpec
        Kind ``"catalogue"``, with mass fractions and density.

    Notes
    -----
    With ``c`` in g/mL (= mg/mL / 1000) and solvent density ``rho_s``:

    * added-mass rule: ``rho = rho_s + c``;
    * volume-additive rule: ``rho = c + rho_s (1 - c / rho_solute)``.

    The solute mass fraction is ``c / rho`` and the solvent's own mass fractions are scaled by
    ``1 - c / rho``.
    """
    if not (isinstance(mg_per_ml, (int, float)) and math.isfinite(mg_per_ml)) or mg_per_ml < 0:
        raise ValueError(f"concentration must be a finite number >= 0 mg/mL, got {mg_per_ml!r}")
    base = resolve_material(solvent)
    if not base.mass_fractions:
        raise ValueError(f"solvent '{base.name}' has no composition")
    c = float(mg_per_ml) / 1000.0
    if solute_density_g_cm3 is None:
        rho = base.density_g_cm3 + c
        rule = "added-mass rule (solute adds no volume)"
    else:
        volume = c / solute_density_g_cm3
        if volume > 1.0:
            raise ValueError(f"concentration {mg_per_ml:g} mg/mL exceeds the pure solute "
                             f"({solute_density_g_cm3 * 1000:g} mg/mL)")
        rho = c + base.density_g_cm3 * (1.0 - volume)
        rule = f"volume-additive rule (solute density {solute_density_g_cm3:g} g/cm^3)"
    w_solute = c / rho
    fractions: dict[str, float] = {}
    for symbol, w in base.mass_fractions:
        fractions[symbol] = fractions.get(symbol, 0.0) + w * (1.0 - w_solute)
    for symbol, w in _formula_fractions(solute):
        fractions[symbol] = fractions.get(symbol, 0.0) + w * w_solute
    text = f"{mg_per_ml:g} mg/mL {solute} in {base.name}, {rule}"
    if reference:
        text += "; " + reference
    return MaterialSpec(name=name or f"{solute}-{_concentration_label(mg_per_ml)}mg/ml",
                        kind="catalogue", mass_fractions=_normalised(fractions),
                        density_g_cm3=rho, reference=text)


def _dilution_entry(family: str, mg_per_ml: float, water: MaterialSpec) -> MaterialSpec:
    name = f"{family}-{_concentration_label(mg_per_ml)}mg/ml"
    if family == "iodine":
        return dilution("I", mg_per_ml, water, name=name)
    if family == "gadolinium":
        return dilution("Gd", mg_per_ml, water, name=name)
    return dilution("Ca10(PO4)6(OH)2", mg_per_ml, water,
                    solute_density_g_cm3=HYDROXYAPATITE_DENSITY_G_CM3, name=name,
                    reference="calcium hydroxyapatite insert in a water base")


# --------------------------------------------------------------------------------------------
# Public look-up and custom materials
# --------------------------------------------------------------------------------------------


def material_names() -> list[str]:
    """Sorted names of the catalogue entries (dilutions at their listed concentrations)."""
    return sorted(_base_catalogue())


def get_material(name: str) -> MaterialSpec:
    """The catalogue entry called ``name``.

    Parameters
    ----------
    name : str
        A name from :func:`material_names`, or a dilution at any concentration written like
        ``"iodine-7.5mg/ml"``, ``"gadolinium-1mg/ml"``, ``"hydroxyapatite-300mg/ml"``.

    Returns
    -------
    MaterialSpec

    Raises
    ------
    KeyError
        Unknown name; the message lists what is valid.

    Examples
    --------
    >>> get_material("water").density_g_cm3
    1.0
    """
    catalogue = _base_catalogue()
    if name in catalogue:
        return catalogue[name]
    match = _DILUTION_NAME.match(name) if isinstance(name, str) else None
    if match:
        family, value = match.group(1), float(match.group(2))
        if value <= DILUTION_LIMITS_MG_ML[family]:
            return _dilution_entry(family, value, catalogue["water"])
        raise KeyError(f"'{name}': concentration above {DILUTION_LIMITS_MG_ML[family]:g} mg/mL")
    raise KeyError(f"unknown material '{name}' (valid: " + ", ".join(sorted(
        n for n in catalogue if "mg/ml" not in n)) + ", or iodine-/gadolinium-/"
        "hydroxyapatite-<c>mg/ml)")


def _formula_fractions(formula: str) -> tuple:
    """Mass fractions of a chemical formula through xraylib's compound parser."""
    if not isinstance(formula, str) or not formula.strip():
        raise ValueError(f"empty chemical formula {formula!r} (valid: a formula such as 'H2O' "
                         "or 'Ca10(PO4)6(OH)2')")
    try:
        data = xraylib.CompoundParser(formula.strip())
    except ValueError as exc:
        reason = str(exc).replace("Invalid chemical formula: ", "")
        raise ValueError(f"bad chemical formula '{formula}': {reason} (valid: a formula such "
                         "as 'H2O', 'CaCO3' or 'Ca10(PO4)6(OH)2')") from None
    fractions = {}
    for z, w in zip(data["Elements"], data["massFractions"]):
        if z > MAX_ATOMIC_NUMBER:
            raise ValueError(f"formula '{formula}' contains element Z={z} beyond the "
                             "attenuation tables (valid: elements H to U)")
        fractions[xraylib.AtomicNumberToSymbol(z)] = w
    return _normalised(fractions)


def custom_material(name: str, *, formula: str | None = None,
                    mass_fractions: Mapping[str, float] | Sequence[tuple[str, float]] | None = None,
                    density_g_cm3: float) -> MaterialSpec:
    """A material defined by the user, by chemical formula or by mass fractions.

    Parameters
    ----------
    name : str
        The user's name for the material.
    formula : str, optional
        Chemical formula, parsed by xraylib (``"H2O"``, ``"C5H8O2"``, ``"Ca10(PO4)6(OH)2"``).
    mass_fractions : mapping or sequence of (symbol, fraction), optional
        Composition by mass; fractions must be in [0, 1] and sum to 1 within 1e-6. They are
        then renormalised to an exact sum of 1.
    density_g_cm3 : float
        Mass density, g/cm^3 (finite, > 0).

    Returns
    -------
    MaterialSpec
        Kind ``"custom"``; ``mass_fractions`` is filled in both cases (computed from the
        formula when one is given), sorted by atomic number.

    Raises
    ------
    ValueError
        One-line message: bad formula, unknown element, fractions not summing to 1, both or
        neither of formula and fractions, or a density that is not finite and positive.
    """
    if isinstance(density_g_cm3, bool) or not isinstance(density_g_cm3, (int, float)) \
            or not math.isfinite(density_g_cm3) or density_g_cm3 <= 0:
        raise ValueError(f"density must be a finite number > 0 g/cm^3, got {density_g_cm3!r} "
                         "(valid: e.g. 1.19)")
    if (formula is None) == (mass_fractions is None):
        raise ValueError("give exactly one of a chemical formula or mass fractions")
    if formula is not None:
        fractions = _formula_fractions(formula)
        return MaterialSpec(name=name, kind="custom", formula=formula.strip(),
                            mass_fractions=fractions, density_g_cm3=float(density_g_cm3),
                            reference="user-defined by chemical formula")
    items = list(mass_fractions.items()) if isinstance(mass_fractions, Mapping) else list(mass_fractions)
    if not items:
        raise ValueError("mass fractions are empty (valid: e.g. {H: 0.112, O: 0.888})")
    combined: dict[str, float] = {}
    for item in items:
        try:
            symbol, value = item
        except (TypeError, ValueError):
            raise ValueError(f"mass fraction entry {item!r} is not (element, fraction)") from None
        element_symbol_to_z(str(symbol))
        if isinstance(value, bool) or not isinstance(value, (int, float)) \
                or not math.isfinite(value) or not 0.0 <= value <= 1.0:
            raise ValueError(f"mass fraction of {symbol} must be a number in [0, 1], got {value!r}")
        if symbol in combined:
            raise ValueError(f"element {symbol} appears twice in the mass fractions")
        combined[str(symbol)] = float(value)
    total = math.fsum(combined.values())
    if abs(total - 1.0) > 1e-6:
        raise ValueError(f"mass fractions sum to {total:.9g}, not 1 (valid: fractions summing "
                         "to 1 within 1e-6)")
    return MaterialSpec(name=name, kind="custom", mass_fractions=_normalised(combined),
                        density_g_cm3=float(density_g_cm3),
                        reference="user-defined by mass fractions")


def resolve_material(material: "str | MaterialSpec") -> MaterialSpec:
    """A MaterialSpec from itself or from a catalogue name (ValueError if unknown)."""
    if isinstance(material, MaterialSpec):
        return material
    try:
        return get_material(material)
    except KeyError as exc:
        raise ValueError(exc.args[0]) from None
