"""Material catalogue, custom materials and attenuation against published tables."""

from __future__ import annotations

import math

import numpy as np
import pytest
import xraylib

from simbench.errors import InputError
from simbench.materials import (
    MaterialSpec,
    VALID_ENERGY_RANGE_KEV,
    custom_material,
    dilution,
    get_material,
    mass_attenuation_cm2_g,
    mass_energy_absorption_cm2_g,
    material_names,
    mu_table,
)
from simbench.materials.attenuation import klein_nishina_transfer_fraction

# --------------------------------------------------------------------------------------------
# Mass attenuation (total, with coherent scattering) against NIST XCOM / Hubbell & Seltzer
# --------------------------------------------------------------------------------------------

# Hubbell & Seltzer, NISTIR 5632 (XCOM, total with coherent), cm^2/g (recalled from memory).
WATER_MU_RHO = [(40.0, 0.2683), (60.0, 0.2059), (80.0, 0.1837), (100.0, 0.1707)]
# Hubbell & Seltzer, NISTIR 5632, Table 3, aluminium, cm^2/g (recalled from memory).
ALUMINIUM_MU_RHO = [(40.0, 0.5685), (60.0, 0.2778), (80.0, 0.2018), (100.0, 0.1704)]
# Hubbell & Seltzer, NISTIR 5632, Table 4, "Bone, Cortical (ICRU-44)", cm^2/g
# (recalled from memory).
CORTICAL_BONE_MU_RHO = [(40.0, 0.6655), (60.0, 0.3148), (80.0, 0.2229), (100.0, 0.1855)]


@pytest.mark.parametrize("energy, expected", WATER_MU_RHO)
def test_water_mass_attenuation_matches_xcom(energy, expected):
    value = mass_attenuation_cm2_g(get_material("water"), [energy])[0]
    # 1 %: the spread between cross-section compilations at these energies (common practice)
    assert value == pytest.approx(expected, rel=0.01)
    # Cross-check: xraylib's own compound routine on the NIST water entry (reference library;
    # 1e-6 because both sum the same elemental cross sections).
    assert value == pytest.approx(xraylib.CS_Total_CP("Water, Liquid", energy), rel=1e-6)


@pytest.mark.parametrize("energy, expected", ALUMINIUM_MU_RHO)
def test_aluminium_mass_attenuation_matches_xcom(energy, expected):
    # 1 %: the spread between cross-section compilations (common practice)
    assert mass_attenuation_cm2_g(get_material("aluminium"), [energy])[0] == pytest.approx(
        expected, rel=0.01)


@pytest.mark.parametrize("energy, expected", CORTICAL_BONE_MU_RHO)
def test_cortical_bone_mass_attenuation_matches_table(energy, expected):
    # 1 %: the spread between cross-section compilations (common practice)
    assert mass_attenuation_cm2_g(get_material("cortical-bone"), [energy])[0] == pytest.approx(
        expected, rel=0.01)


# Hubbell & Seltzer, NISTIR 5632, mu_en/rho in cm^2/g (recalled from memory).
AIR_MU_EN_RHO = [(10.0, 4.742), (20.0, 0.5389), (30.0, 0.1537), (40.0, 0.06833),
                 (60.0, 0.03041), (80.0, 0.02407), (100.0, 0.02325), (150.0, 0.02496)]
WATER_MU_EN_RHO = [(10.0, 4.944), (20.0, 0.5503), (40.0, 0.06947), (60.0, 0.03190),
                   (80.0, 0.02597), (100.0, 0.02546)]
ALUMINIUM_MU_EN_RHO = [(20.0, 3.094), (40.0, 0.3601), (60.0, 0.1099), (100.0, 0.03794)]


@pytest.mark.parametrize("name, rows", [("air", AIR_MU_EN_RHO), ("water", WATER_MU_EN_RHO),
                                        ("aluminium", ALUMINIUM_MU_EN_RHO)])
def test_energy_absorption_matches_hubbell_seltzer(name, rows):
    energies = [e for e, _ in rows]
    values = mass_energy_absorption_cm2_g(get_material(name), energies)
    for (energy, expected), value in zip(rows, values):
        # 1 %: energy-absorption models differ by about that below 150 keV (common practice)
        assert value == pytest.approx(expected, rel=0.01), f"{name} at {energy} keV"


def test_klein_nishina_transfer_fraction_closed_form():
    # Closed form of sigma_tr/sigma for free electrons (Attix, Introduction to Radiological
    # Physics and Radiation Dosimetry, eq. 7.20-7.21): low-energy limit -> k (Thomson
    # recoil), and at 1 MeV (k = 1.957) the fraction is 0.440 (recalled from memory).
    # electron rest energy 510.99895 keV (CODATA, recalled from memory); the next term of the
    # low-energy expansion is of order k = 0.001, well inside 2 % (closed form)
    low = klein_nishina_transfer_fraction([0.5])[0]
    assert low == pytest.approx(0.5 / 510.99895, rel=0.02)
    assert klein_nishina_transfer_fraction([1000.0])[0] == pytest.approx(0.440, abs=0.005)


# --------------------------------------------------------------------------------------------
# Catalogue compositions and densities against their sources
# --------------------------------------------------------------------------------------------


def _fractions(name):
    return dict(get_material(name).mass_fractions)


def test_water_and_air_against_nist_compositions():
    # NIST material composition data (ESTAR/XCOM): water H 0.111894, O 0.888106, 1.0 g/cm^3;
    # dry air N 0.755267, O 0.231781, Ar 0.012827, C 0.000124, 1.20479e-3 g/cm^3
    # (recalled from memory).
    # tolerances: the last digit of the published values (common practice)
    water = get_material("water")
    assert water.density_g_cm3 == pytest.approx(1.0)
    assert _fractions("water") == pytest.approx({"H": 0.111894, "O": 0.888106}, abs=1e-6)
    air = get_material("air")
    assert air.density_g_cm3 == pytest.approx(1.20479e-3, rel=1e-3)
    assert _fractions("air") == pytest.approx(
        {"C": 0.000124, "N": 0.755267, "O": 0.231781, "Ar": 0.012827}, abs=1e-5)


def test_pmma_against_nist_and_formula():
    # NIST: PMMA H 0.080538, C 0.599848, O 0.319614, 1.19 g/cm^3 (recalled from memory);
    # the monomer formula C5H8O2 gives the same fractions.
    assert get_material("pmma").density_g_cm3 == pytest.approx(1.19)
    assert _fractions("pmma") == pytest.approx({"H": 0.080538, "C": 0.599848, "O": 0.319614},
                                              abs=1e-5)
    by_formula = custom_material("my-pmma", formula="C5H8O2", density_g_cm3=1.19)
    mu = mu_table([get_material("pmma"), by_formula], [30.0, 70.0, 120.0])
    # the two fraction sets differ in the 5th digit: 0.1 % (common practice)
    np.testing.assert_allclose(mu[0], mu[1], rtol=1e-3)


@pytest.mark.parametrize("name, density, checks", [
    # ICRU Report 44 (1989), body tissues (recalled from memory).
    ("soft-tissue", 1.06, {"H": 0.102, "O": 0.708}),
    ("cortical-bone", 1.92, {"Ca": 0.225, "P": 0.103}),
    ("lung", 0.26, {"H": 0.103, "O": 0.749}),
    ("adipose", 0.95, {"C": 0.598}),
    ("muscle", 1.05, {"O": 0.710}),
])
def test_icru44_tissues(name, density, checks):
    spec = get_material(name)
    assert spec.density_g_cm3 == pytest.approx(density)
    for symbol, fraction in checks.items():
        assert _fractions(name)[symbol] == pytest.approx(fraction, abs=1e-6)
    assert "ICRU Report 44" in spec.reference


def test_tissue_compilations_agree():
    # Two published compilations of the same tissue: mu/rho within 3 % at 70 keV
    # (common practice: tissue compilations differ by a few percent in composition).
    for a, b in [("soft-tissue", "soft-tissue-icrp"), ("muscle", "muscle-icrp"),
                 ("cortical-bone", "cortical-bone-icrp")]:
        mu_a = mass_attenuation_cm2_g(get_material(a), [70.0])[0]
        mu_b = mass_attenuation_cm2_g(get_material(b), [70.0])[0]
        assert mu_a == pytest.approx(mu_b, rel=0.03), (a, b)


def test_elements_use_nist_densities():
    # Hubbell & Seltzer, NISTIR 5632, Table 1 (recalled from memory).
    for name, density in [("aluminium", 2.699), ("titanium", 4.54), ("iron", 7.874),
                          ("copper", 8.96), ("tungsten", 19.3), ("lead", 11.35)]:
        assert get_material(name).density_g_cm3 == pytest.approx(density, rel=1e-3)  # 4 digits


def test_catalogue_is_complete_and_consistent():
    names = material_names()
    assert names == sorted(names)
    for required in ["air", "water", "soft-tissue", "adipose", "muscle", "cortical-bone", "lung",
                     "pmma", "polyethylene", "aluminium", "titanium", "iron", "steel", "copper",
                     "iodine-2mg/ml", "iodine-5mg/ml", "iodine-10mg/ml", "iodine-20mg/ml",
                     "gadolinium-10mg/ml", "hydroxyapatite-100mg/ml", "hydroxyapatite-800mg/ml"]:
        assert required in names
    for name in names:
        spec = get_material(name)
        assert isinstance(spec, MaterialSpec) and spec.kind == "catalogue"
        # mass fractions sum to 1 (definition), to float64 rounding
        assert math.fsum(w for _, w in spec.mass_fractions) == pytest.approx(1.0, abs=1e-12)
        assert spec.density_g_cm3 > 0 and spec.reference
    hash(get_material("water"))  # specs are hashable (mu_table cache key)


def test_unknown_name_is_key_error():
    with pytest.raises(KeyError, match="valid"):
        get_material("unobtainium")


# --------------------------------------------------------------------------------------------
# Dilutions: closed-form checks of the stated mixing rules
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("c", [2.0, 5.0, 10.0, 20.0, 7.5])
def test_iodine_dilution_holds_its_concentration(c):
    spec = get_material(f"iodine-{c:g}mg/ml")
    # added-mass rule: rho = 1 + c/1000 and iodine mass per mL = w_I * rho * 1000 = c
    assert spec.density_g_cm3 == pytest.approx(1.0 + c / 1000.0)
    assert dict(spec.mass_fractions)["I"] * spec.density_g_cm3 * 1000.0 == pytest.approx(c)


def test_hydroxyapatite_volume_rule():
    spec = get_material("hydroxyapatite-400mg/ml")
    # volume-additive rule with HA density 3.16 g/cm^3 (recalled from memory) in water
    expected = 0.4 + 1.0 * (1.0 - 0.4 / 3.16)
    assert spec.density_g_cm3 == pytest.approx(expected)
    # calcium mass per mL = 400 mg * (10 * 40.078 / 1004.6) (Ca10(PO4)6(OH)2 molar mass
    # 1004.6 g/mol from standard atomic weights, Ca 40.078, recalled from memory; 0.1 % for
    # the rounding of 1004.6)
    calcium = dict(spec.mass_fractions)["Ca"] * spec.density_g_cm3 * 1000.0
    assert calcium == pytest.approx(400.0 * 400.78 / 1004.6, rel=1e-3)


def test_iodine_contrast_above_k_edge():
    # The iodine K edge (33.17 keV, published edge energy) raises mu of the dilution:
    # iodine mu/rho jumps from 6.6 to 35 cm^2/g between 33.0 and 33.4 keV (xraylib CS_Total),
    # so 10 mg/mL in water goes from about 0.40 to 0.68 /cm, a factor of about 1.7 > 1.5.
    mu = mu_table([get_material("iodine-10mg/ml")], [33.0, 33.4])[0]
    assert mu[1] > 1.5 * mu[0]


def test_dilution_helper_rejects_negative_concentration():
    with pytest.raises(ValueError, match="mg/mL"):
        dilution("I", -1.0)


# --------------------------------------------------------------------------------------------
# mu_table
# --------------------------------------------------------------------------------------------


def test_mu_table_units_shape_and_explicit_mu():
    water = get_material("water")
    explicit = MaterialSpec(name="mu=0.02/mm", kind="mu", mu_per_mm=0.02)
    energies = np.array([40.0, 60.0, 80.0])
    mu = mu_table([water, explicit], energies)
    assert mu.shape == (2, 3) and mu.dtype == np.float64
    # water, XCOM 0.2059 cm^2/g at 60 keV x 1 g/cm^3 = 0.02059 /mm (recalled from memory)
    assert mu[0, 1] == pytest.approx(0.02059, rel=0.01)
    np.testing.assert_array_equal(mu[1], 0.02)


def test_mu_table_cache_returns_fresh_arrays():
    water = get_material("water")
    first = mu_table([water], [50.0, 70.0])
    first[:] = -1.0
    second = mu_table([water], [50.0, 70.0])
    assert np.all(second > 0)


@pytest.mark.parametrize("energy", [0.5, 900.0, 1e6, float("nan"), -10.0])
def test_energy_outside_tables(energy):
    lo, hi = VALID_ENERGY_RANGE_KEV
    with pytest.raises(InputError, match=f"valid: an energy from {lo:g} to {hi:g} keV") as info:
        mu_table([get_material("water")], [60.0, energy])
    assert "\n" not in str(info.value)


# --------------------------------------------------------------------------------------------
# Custom materials: bad input is one line
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("kwargs, match", [
    (dict(formula="Xx2", density_g_cm3=1.0), "bad chemical formula"),
    (dict(formula="h2o", density_g_cm3=1.0), "bad chemical formula"),
    (dict(formula="", density_g_cm3=1.0), "empty chemical formula"),
    (dict(mass_fractions={"H": 0.5, "O": 0.4}, density_g_cm3=1.0), "sum to 0.9"),
    (dict(mass_fractions={"Qq": 1.0}, density_g_cm3=1.0), "unknown element 'Qq'"),
    (dict(mass_fractions={"H": 1.2, "O": -0.2}, density_g_cm3=1.0), "in \\[0, 1\\]"),
    (dict(formula="H2O", density_g_cm3=0.0), "density"),
    (dict(formula="H2O", density_g_cm3=float("inf")), "density"),
    (dict(formula="H2O", density_g_cm3=-1.0), "density"),
    (dict(formula="H2O", mass_fractions={"H": 1.0}, density_g_cm3=1.0), "exactly one"),
    (dict(density_g_cm3=1.0), "exactly one"),
])
def test_custom_material_bad_input(kwargs, match):
    with pytest.raises(ValueError, match=match) as info:
        custom_material("bad", **kwargs)
    assert "\n" not in str(info.value)


def test_custom_material_fractions_renormalised():
    spec = custom_material("w", mass_fractions=[("O", 0.8881065), ("H", 0.1118940)],
                           density_g_cm3=1.0)
    assert [s for s, _ in spec.mass_fractions] == ["H", "O"]
    assert math.fsum(w for _, w in spec.mass_fractions) == 1.0
    assert spec.kind == "custom"
    water = mu_table([get_material("water"), spec], [60.0])
    # the given fractions equal NIST water's to about 1e-6 after renormalising (common practice)
    assert water[0, 0] == pytest.approx(water[1, 0], rel=1e-5)


def test_attenuation_includes_coherent_scattering():
    # docs/physics.md: mu counts coherent (Rayleigh) scattering. Check against xraylib's
    # separate cross sections: photoelectric + Compton + Rayleigh, mixture rule by mass
    # (water: H 0.111894, O 0.888106 by mass, NIST composition)
    energies = [20.0, 60.0, 120.0]
    water = get_material("water")
    z_w = {1: 0.111894, 8: 0.888106}
    with_coherent = [sum(w * (xraylib.CS_Photo(z, e) + xraylib.CS_Compt(z, e)
                              + xraylib.CS_Rayl(z, e)) for z, w in z_w.items()) for e in energies]
    without = [sum(w * (xraylib.CS_Photo(z, e) + xraylib.CS_Compt(z, e))
                   for z, w in z_w.items()) for e in energies]
    got = mass_attenuation_cm2_g(water, energies)
    assert got == pytest.approx(with_coherent, rel=1e-4)  # catalogue fractions vs NIST's
    assert np.all(got > np.array(without) * 1.01)  # Rayleigh adds > 1 % at these energies


def test_materials_differing_only_in_density_scale_exactly():
    # mu = (mu/rho) rho (the definition of the mass attenuation coefficient): two densities of
    # one composition give mu in the ratio of the densities (to float64 rounding)
    import dataclasses

    from simbench.materials import get_material, mu_table

    water = get_material("water")
    denser = dataclasses.replace(water, name="denser water", density_g_cm3=1.25)
    energies = np.linspace(20.0, 140.0, 7)
    mu = mu_table([water, denser], energies)
    np.testing.assert_allclose(mu[1] / mu[0], 1.25 / water.density_g_cm3, rtol=1e-14)
