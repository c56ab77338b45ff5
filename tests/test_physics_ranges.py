"""Every number of the physics sections has a physical range, checked when the file is read.

Each bad input ends as one :class:`InputError` line that names the file, the line and column
of the field, the field, and what would be valid. The ranges are the constants of
:mod:`simbench.measure.config` (its module table and docs/physics.md). Line numbers in the
cases below are those of the texts built here, counted by hand.
"""

from __future__ import annotations

import re

import numpy as np
import pytest

from simbench.errors import InputError, InputWarning, Where
from simbench.measure import measure
from simbench.measure.config import (
    AIR_COUNTS_RANGE,
    DetectorConfig,
    ExposureConfig,
    Physics,
    SourceConfig,
)
from simbench.scanner import parse_scanner_text

GEOMETRY = """\
name: range case
geometry:
  type: fan
  sid: 500 mm
  sdd: 1000 mm
  columns: 64
  column_pitch: 2 mm
  views: 8
"""  # 8 lines

SOURCE = "source:\n  kvp: 100\n"                      # lines 9 and 10
EXPOSURE = "exposure:\n  air_counts: 1.0e4\n"           # lines 11 and 12


def _scanner(source: str = SOURCE, exposure: str = EXPOSURE, rest: str = "",
             geometry: str = GEOMETRY):
    return parse_scanner_text(geometry + source + exposure + rest, "scanner.yaml")


def _refused(line: int, field: str, needle: str, **parts) -> str:
    with pytest.raises(InputError) as err:
        _scanner(**parts)
    text = str(err.value)
    assert "\n" not in text and "Traceback" not in text
    assert re.match(rf"scanner\.yaml:{line}:\d+: ", text), text
    assert field in text and needle in text and "(valid:" in text, text
    return text


DETECTOR = "detector:\n"  # line 13; its fields from line 14
SCATTER = "scatter:\n"    # line 13; its fields from line 14

CASES = [
    # (case, parts, line, field, needle)
    ("air counts overflow float32",
     dict(exposure="exposure:\n  air_counts: 1.0e+39\n"), 12, "air_counts", "too large"),
    ("air counts below one photon",
     dict(exposure="exposure:\n  air_counts: 0.5\n"), 12, "air_counts", "too small"),
    ("mAs beyond any tube", dict(exposure="exposure:\n  mas_per_view: 5000\n"), 12,
     "mas_per_view", "too large"),
    ("tube current beyond any tube",
     dict(exposure="exposure:\n  tube_current_ma: 5000\n  view_time_ms: 1\n"), 12,
     "tube_current_ma", "too large"),
    ("mA x ms beyond any tube",
     dict(exposure="exposure:\n  tube_current_ma: 1000\n  view_time_ms: 5000\n"), 13,
     "view_time_ms", "5000 mAs per view"),
    ("mAs giving more than 1e9 photons per cell",
     dict(exposure="exposure:\n  mas_per_view: 900\n"), 12, "mas_per_view",
     "detected photons per cell per view"),
    ("mAs giving less than one photon per cell",
     dict(exposure="exposure:\n  mas_per_view: 1.0e-9\n"), 12, "mas_per_view",
     "detected photons per cell per view"),
    ("mAs on a parallel beam",
     dict(geometry=GEOMETRY.replace("type: fan\n  sid: 500 mm\n  sdd: 1000 mm\n",
                                    "type: parallel\n  dimension: 2\n"),
          exposure="exposure:\n  mas_per_view: 1\n"), 11, "mas_per_view",  # sid, sdd -> dimension
     "parallel beam has none"),
    ("filter that stops every photon",
     dict(source="source:\n  kvp: 100\n  filtration:\n    - {material: lead, thickness: 10 mm}\n",
          exposure=EXPOSURE), 12, "filtration", "the filtration passes"),
    ("filter thicker than any",
     dict(source="source:\n  kvp: 100\n  filtration:\n    - {material: aluminium, thickness: 20 cm}\n"),
     12, "thickness", "200 mm is too large"),
    ("focal spot", dict(source="source:\n  kvp: 100\n  focal_spot: 20 mm\n"), 11, "focal_spot",
     "20 mm is too large"),
    ("focal spot samples", dict(source="source:\n  kvp: 100\n  focal_spot_samples: [3, 65]\n"),
     11, "focal_spot_samples", "must be <= 64"),
    ("full scale equal to the dark level",
     dict(rest=DETECTOR + "  dark_level: 100\n  full_scale: 100\n"), 15, "full_scale",
     "not above the dark level"),
    ("full scale below the dark level",
     dict(rest=DETECTOR + "  dark_level: 100\n  full_scale: 50\n"), 15, "full_scale",
     "fully starved"),
    ("full scale", dict(rest=DETECTOR + "  full_scale: 1.0e+13\n"), 14, "full_scale", "too large"),
    ("dark level", dict(rest=DETECTOR + "  dark_level: 1.0e+10\n"), 14, "dark_level", "too large"),
    ("electronic noise", dict(rest=DETECTOR + "  electronic_noise: 1.0e+7\n"), 14,
     "electronic_noise", "too large"),
    ("sensor density", dict(rest=DETECTOR + "  material: CsI\n  thickness: 1 mm\n"
                            "  density_g_cm3: 30\n"), 16, "density_g_cm3", "osmium"),
    ("sensor thickness", dict(rest=DETECTOR + "  material: CsI\n  thickness: 0.1 um\n"), 15,
     "thickness", "too small"),
    ("energy resolution", dict(rest=DETECTOR + "  type: photon-counting\n  thresholds: [20]\n"
                               "  energy_resolution: 60 keV\n"), 16, "energy_resolution",
     "too large"),
    ("threshold below 1 keV", dict(rest=DETECTOR + "  type: photon-counting\n"
                                   "  thresholds: [0.5, 30]\n"), 15, "thresholds[0]", "too small"),
    ("threshold at the kVp", dict(rest=DETECTOR + "  type: photon-counting\n"
                                  "  thresholds: [20, 100]\n"), 15, "thresholds[1]",
     "not below the source's highest energy"),
    ("bin that starves", dict(rest=DETECTOR + "  type: photon-counting\n"
                              "  thresholds: [20, 99.5]\n"), 15, "thresholds[1]",
     "photons per cell per view in air"),
    ("dead cell off the detector", dict(rest=DETECTOR + "  dead_cells: [3, [0, 64]]\n"), 14,
     "dead_cells[1]", "not on the detector"),
    ("blur", dict(rest=DETECTOR + "  blur: [0.5 mm, 30 mm]\n"), 14, "blur[1]", "too large"),
    ("crosstalk", dict(rest=DETECTOR + "  crosstalk: 0.3\n"), 14, "crosstalk", "too large"),
    ("lag", dict(rest=DETECTOR + "  lag: 0.95\n"), 14, "lag", "too large"),
    ("flat frames", dict(rest=DETECTOR + "  flat_frames: 20000\n"), 14, "flat_frames",
     "must be <= 10000"),
    ("pattern seed", dict(rest=DETECTOR + "  pattern_seed: 18446744073709551616\n"), 14,
     "pattern_seed", "must be <="),
    ("SPR at the centre", dict(rest=SCATTER + "  model: centre\n  spr_at_centre: 20\n"), 15,
     "spr_at_centre", "too large"),
    ("maximum SPR", dict(rest=SCATTER + "  model: thickness\n  max_spr: 20\n"
                         "  thickness_scale: 150 mm\n"), 15, "max_spr", "too large"),
    ("thickness scale", dict(rest=SCATTER + "  model: thickness\n  max_spr: 0.3\n"
                             "  thickness_scale: 20 m\n"), 16, "thickness_scale", "too large"),
    ("kernel width", dict(rest=SCATTER + "  model: centre\n  spr_at_centre: 0.1\n"
                          "  kernel_width: 0.5 mm\n"), 16, "kernel_width", "too small"),
    ("grid transmission", dict(rest=SCATTER + "  model: centre\n  spr_at_centre: 0.1\n"
                               "  grid_transmission: -0.1\n"), 16, "grid_transmission",
     "too small"),
]


@pytest.mark.parametrize("case, parts, line, field, needle", CASES, ids=[c[0] for c in CASES])
def test_bad_physics_number_is_one_line_with_its_place(case, parts, line, field, needle):
    _refused(line, field, needle, **parts)


def test_mas_with_a_spectrum_file_is_refused(tmp_path):
    from simbench.scanner import load_scanner

    rows = "\n".join(f"{e:.1f} 1.0" for e in np.arange(20.0, 100.0, 1.0))
    (tmp_path / "beam.txt").write_text(rows + "\n")
    path = tmp_path / "scanner.yaml"
    path.write_text(GEOMETRY + "source:\n  spectrum_file: beam.txt\n"
                    "exposure:\n  mas_per_view: 1\n")
    with pytest.raises(InputError, match=r"scanner\.yaml:12:\d+: exposure\.mas_per_view: a "
                       "spectrum file"):
        load_scanner(path)


def test_spectrum_file_filter_that_stops_every_photon_names_the_filtration(tmp_path):
    from simbench.scanner import load_scanner

    rows = "\n".join(f"{e:.1f} 1.0" for e in np.arange(20.0, 100.0, 1.0))
    (tmp_path / "beam.txt").write_text(rows + "\n")
    path = tmp_path / "scanner.yaml"
    path.write_text(GEOMETRY + "source:\n  spectrum_file: beam.txt\n  filtration:\n"
                    "    - {material: lead, thickness: 20 mm}\n" + EXPOSURE)
    with pytest.raises(InputError, match=r"scanner\.yaml:12:\d+: source\.filtration: the "
                       "filtration passes"):
        load_scanner(path)


@pytest.mark.parametrize("command", ["spectrum", "scan"])
def test_command_line_refuses_a_filter_that_stops_every_photon(tmp_path, capsys, command):
    from simbench.cli import main

    scanner = tmp_path / "scanner.yaml"
    scanner.write_text(GEOMETRY + "source:\n  kvp: 100\n  filtration:\n"
                       "    - {material: lead, thickness: 10 mm}\n" + EXPOSURE)
    phantom = tmp_path / "phantom.yaml"
    phantom.write_text("name: disc\ndimension: 2\nobjects:\n"
                       "  - {shape: circle, radius: 40, material: water}\n")
    argv = (["spectrum", str(scanner), "-o", str(tmp_path / "s.png")] if command == "spectrum"
            else ["scan", str(phantom), str(scanner), "-o", str(tmp_path / "scan")])
    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "Traceback" not in err[0]
    assert re.search(r"scanner\.yaml:12:\d+: source\.filtration: the filtration passes", err[0])
    assert not (tmp_path / "s.png").exists() and not (tmp_path / "scan").exists()


def test_saturated_open_beam_warns_with_the_place_of_full_scale():
    with pytest.warns(InputWarning, match=r"scanner\.yaml:14:\d+: detector\.full_scale: the "
                      "open beam"):
        _scanner(rest=DETECTOR + "  full_scale: 5000\n")


def test_shipped_scanners_are_within_range():
    from simbench.data import shipped_files
    from simbench.scanner import load_scanner

    for path in shipped_files("scanners").values():
        load_scanner(path)


# --------------------------------------------------------------------------------------------
# The largest allowed exposure stays finite in float32
# --------------------------------------------------------------------------------------------


def test_largest_exposure_and_levels_stay_finite_in_float32():
    # AIR_COUNTS_RANGE[1] = 1e9 photons per cell per view with the largest dark level and
    # electronic noise and a wide gain spread: every reading below float32's 3.4e38
    # (IEEE 754) by orders of magnitude, every projection finite
    det = DetectorConfig(dark_level=1e9, electronic_noise=1e6, gain_spread=0.5, gain_drift=0.5)
    phys = Physics(SourceConfig("monochromatic", energy_kev=60.0),
                   ExposureConfig(air_counts=AIR_COUNTS_RANGE[1]), det)
    lengths = np.linspace(0.0, 300.0, 4 * 32).reshape(1, 4, 32)
    for noise in (False, True):
        m = measure(lengths, np.array([[0.02]]), phys, noise=noise, dtype=np.float32)
        for array in (m.counts, m.flat, m.dark, m.projections):
            assert array.dtype == np.float32 and np.all(np.isfinite(array))


# --------------------------------------------------------------------------------------------
# Attenuation tables: energies outside them, materials no real substance matches
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("energy", [1e6, 0.5])
def test_energy_outside_the_tables_names_the_callers_field(energy):
    from simbench.materials import (
        VALID_ENERGY_RANGE_KEV,
        get_material,
        mass_attenuation_cm2_g,
        mass_energy_absorption_cm2_g,
        mu_per_mm,
        mu_table,
    )

    lo, hi = VALID_ENERGY_RANGE_KEV
    where = Where("<command line>", field="--energy")
    water = get_material("water")
    for call in (lambda: mu_table([water], [energy], where=where),
                 lambda: mu_per_mm(water, energy, where=where),
                 lambda: mass_attenuation_cm2_g(water, [energy], where=where),
                 lambda: mass_energy_absorption_cm2_g(water, [energy], where=where)):
        with pytest.raises(InputError) as err:
            call()
        assert str(err.value) == (f"<command line>: --energy: energy {energy:g} keV is outside "
                                  f"the attenuation tables (valid: an energy from {lo:g} to "
                                  f"{hi:g} keV)")


@pytest.mark.parametrize("density", [1e308, 1e3])
def test_absurd_density_is_refused_naming_the_material(density):
    from simbench.materials import MAX_MU_PER_MM, custom_material, mu_table

    # 1e308 g/cm^3 overflows mu to inf; 1000 g/cm^3 of lead gives 5e5 /mm at 1 keV, above
    # MAX_MU_PER_MM = 1e5 /mm (the densest elements reach 1.4e4 /mm at 1 keV: xraylib CS_Total
    # times the element density)
    dense = custom_material("dense-lead", formula="Pb", density_g_cm3=density)
    with pytest.raises(InputError, match="material 'dense-lead'") as err:
        mu_table([dense], [1.0, 60.0])
    assert "\n" not in str(err.value) and f"{MAX_MU_PER_MM:g} /mm" in str(err.value)


def test_densest_real_materials_pass():
    from simbench.materials import MAX_MU_PER_MM, get_material, mu_table

    # lead and tungsten at 1 keV, the most attenuating catalogue entries at the lowest energy
    mu = mu_table([get_material("lead"), get_material("tungsten")], [1.0, 60.0])
    assert np.all(np.isfinite(mu)) and mu.max() < MAX_MU_PER_MM
