"""Materials: the catalogue, custom materials, attenuation mu(E) and X-ray spectra."""

from simbench.materials.attenuation import (
    VALID_ENERGY_RANGE_KEV,
    mass_attenuation_cm2_g,
    mass_energy_absorption_cm2_g,
    mu_per_mm,
    mu_table,
)
from simbench.materials.catalogue import (
    custom_material,
    dilution,
    get_material,
    material_names,
    resolve_material,
)
from simbench.materials.spec import MaterialSpec

__all__ = [
    "MaterialSpec",
    "VALID_ENERGY_RANGE_KEV",
    "custom_material",
    "dilution",
    "get_material",
    "mass_attenuation_cm2_g",
    "mass_energy_absorption_cm2_g",
    "material_names",
    "mu_per_mm",
    "mu_table",
    "resolve_material",
]
