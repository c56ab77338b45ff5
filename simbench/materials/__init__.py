"""Materials: the catalogue, custom materials, attenuation mu(E) and X-ray spectra."""

from simbench.materials.attenuation import (
    MAX_MU_PER_MM,
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
from simbench.materials.spectra import (
    KVP_RANGE,
    Spectrum,
    air_kerma_ugy,
    effective_energy_kev,
    filtered,
    half_value_layer_mm,
    hvl_mm_al,
    mean_energy_kev,
    monochromatic,
    second_hvl_mm_al,
    tube_spectrum,
)
from simbench.materials.spectrum_file import load_spectrum

__all__ = [
    "KVP_RANGE",
    "MAX_MU_PER_MM",
    "MaterialSpec",
    "Spectrum",
    "air_kerma_ugy",
    "effective_energy_kev",
    "filtered",
    "half_value_layer_mm",
    "hvl_mm_al",
    "load_spectrum",
    "mean_energy_kev",
    "monochromatic",
    "second_hvl_mm_al",
    "tube_spectrum",
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
