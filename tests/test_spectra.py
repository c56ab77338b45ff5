"""X-ray spectra: the tube model against SpekPy and standard beam qualities, filtration, files."""

from __future__ import annotations

import math

import numpy as np
import pytest
import xraylib
from scipy.optimize import brentq

from simbench.errors import InputError
from simbench.materials import (
    Spectrum,
    air_kerma_ugy,
    effective_energy_kev,
    filtered,
    get_material,
    hvl_mm_al,
    load_spectrum,
    monochromatic,
    mu_table,
    tube_spectrum,
)
from simbench.report.spectrum_figure import plot_spectrum

spekpy = pytest.importorskip("spekpy")

AL_25 = (("aluminium", 2.5),)


def _spekpy(kvp, filtration_mm_al=2.5, char=True):
    reference = spekpy.Spek(kvp=kvp, th=12, dk=0.5, char=char)
    reference.filter("Al", filtration_mm_al)
    return reference


@pytest.fixture(scope="module")
def spekpy_reference():
    return {kvp: _spekpy(kvp) for kvp in (50, 70, 100, 120, 150)}


# --------------------------------------------------------------------------------------------
# Against SpekPy (test-only reference model), same anode angle and filtration
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("kvp", [50, 70, 100, 120, 150])
def test_hvl_and_mean_energy_match_spekpy(kvp, spekpy_reference):
    ours = tube_spectrum(kvp, anode_angle_deg=12.0, filtration=AL_25)
    reference = spekpy_reference[kvp]
    hvl_ref, mean_ref = reference.get_hvl1(), reference.get_emean()
    print(f"{kvp} kV, 2.5 mm Al: HVL {ours.hvl_mm_al:.3f} vs SpekPy {hvl_ref:.3f} mm Al; "
          f"mean {ours.mean_energy_kev:.2f} vs {mean_ref:.2f} keV; fluence ratio "
          f"{ours.total_fluence * 100.0 / reference.get_flu():.3f}; air kerma "
          f"{air_kerma_ugy(ours):.1f} vs {reference.get_kerma():.1f} uGy/mAs")
    # The tube model's one adjusted number (mean depth fraction) was set against SpekPy's
    # first HVL; this is a consistency check at 10 % (task requirement).
    # Mean energy 5 % and second HVL 12 %: engineering judgement for a simplified tube model
    # (common practice).
    assert ours.hvl_mm_al == pytest.approx(hvl_ref, rel=0.10)
    assert ours.mean_energy_kev == pytest.approx(mean_ref, rel=0.05)
    assert ours.second_hvl_mm_al == pytest.approx(reference.get_hvl2(), rel=0.12)
    # Absolute output comes from cross sections only (no fitted constant): fluence within
    # 25 %, air kerma within 35 % (engineering judgement, common practice).
    assert ours.total_fluence * 100.0 == pytest.approx(reference.get_flu(), rel=0.25)
    assert air_kerma_ugy(ours) == pytest.approx(reference.get_kerma(), rel=0.35)


def test_characteristic_fraction_matches_spekpy():
    for kvp in (100, 150):
        ours = tube_spectrum(kvp, filtration=AL_25)
        k_bins = (ours.energies_kev > 57.5) & (ours.energies_kev < 69.5)
        smooth = np.interp(ours.energies_kev[k_bins], ours.energies_kev[~k_bins],
                           ours.fluence[~k_bins])
        ours_fraction = float((ours.fluence[k_bins] - smooth).sum() / ours.fluence.sum())
        reference = 1.0 - _spekpy(kvp, char=False).get_flu() / _spekpy(kvp).get_flu()
        print(f"{kvp} kV: K-line fraction of fluence {ours_fraction:.3f} vs SpekPy {reference:.3f}")
        # a factor-of-two band: the K-line share is a small, model-dependent part of the
        # fluence (engineering judgement, common practice)
        assert 0.4 * reference < ours_fraction < 1.5 * reference


# --------------------------------------------------------------------------------------------
# Standard beam qualities: IEC 61267 RQR first HVLs (recalled from memory)
# --------------------------------------------------------------------------------------------

RQR = [("RQR 3", 50, 1.78), ("RQR 5", 70, 2.58), ("RQR 8", 100, 3.97), ("RQR 9", 120, 5.00),
       ("RQR 10", 150, 6.57)]


@pytest.mark.parametrize("name, kvp, hvl", RQR)
def test_rqr_beam_qualities_reachable_with_aluminium(name, kvp, hvl):
    bare = tube_spectrum(kvp, anode_angle_deg=12.0, bin_kev=1.0)
    added = brentq(lambda t: hvl_mm_al(filtered(bare, "aluminium", t)) - hvl, 0.0, 30.0,
                   xtol=1e-4)
    print(f"{name} ({kvp} kV, HVL {hvl} mm Al): total aluminium filtration {added:.2f} mm")
    # RQR qualities are made with a few mm of aluminium (IEC 61267, recalled from memory);
    # 0 to 10 mm is a loose plausibility band (common practice)
    assert 0.0 < added < 10.0


# --------------------------------------------------------------------------------------------
# Physics of the spectrum (Kramers-like checks, published constants)
# --------------------------------------------------------------------------------------------


def test_no_photons_above_kvp():
    spectrum = tube_spectrum(80.0, filtration=AL_25)
    upper_edges = spectrum.energies_kev + spectrum.bin_width_kev / 2
    # no photon above the electron energy e x kVp (Duane-Hunt limit, fact of the trade)
    assert upper_edges[-1] == pytest.approx(80.0)
    assert np.all(spectrum.fluence >= 0)
    assert np.all(spectrum.energies_kev < 80.0)


def test_k_lines_only_above_k_edge():
    # Tungsten K edge 69.525 keV (Deslattes et al., Rev. Mod. Phys. 75 (2003) 35; recalled
    # from memory); Kalpha1 59.318 keV, Kalpha2 57.982 keV, Kbeta1 67.244 keV (same source,
    # recalled from memory).
    assert xraylib.EdgeEnergy(74, xraylib.K_SHELL) == pytest.approx(69.525, abs=0.01)
    assert xraylib.LineEnergy(74, xraylib.KL3_LINE) == pytest.approx(59.318, abs=0.01)
    assert xraylib.LineEnergy(74, xraylib.KL2_LINE) == pytest.approx(57.982, abs=0.01)
    assert xraylib.LineEnergy(74, xraylib.KM3_LINE) == pytest.approx(67.244, abs=0.01)

    def line_excess(spectrum):
        e = spectrum.energies_kev
        i = int(np.searchsorted(e + spectrum.bin_width_kev / 2, 59.318))
        neighbours = 0.5 * (spectrum.fluence[i - 3] + spectrum.fluence[i + 3])
        return spectrum.fluence[i] / neighbours

    # below the K edge the continuum is smooth (2 % for its curvature over +-3 bins); at
    # 100 kV the K alpha1 line stands well above it (engineering judgement, common practice)
    assert line_excess(tube_spectrum(69.0)) == pytest.approx(1.0, abs=0.02)
    assert line_excess(tube_spectrum(100.0)) > 2.0


def test_filtration_hardens_and_lowers_fluence():
    bare = tube_spectrum(100.0, filtration=AL_25)
    more = filtered(bare, "copper", 0.3)
    assert more.total_fluence < bare.total_fluence
    assert more.mean_energy_kev > bare.mean_energy_kev
    assert more.hvl_mm_al > bare.hvl_mm_al
    # Filtration by argument equals filtration afterwards.
    direct = tube_spectrum(100.0, filtration=AL_25 + (("copper", 0.3),))
    # Beer-Lambert factors commute: float64 rounding (common practice)
    np.testing.assert_allclose(direct.fluence, more.fluence, rtol=1e-12)


def test_output_rises_with_kvp():
    # Tube output (air kerma per mAs) rises with kVp at fixed filtration (facts of the
    # trade). The power-law exponent over 80-120 kV is compared with SpekPy's; the model is
    # known to give too much output at low kVp (no electron backscatter loss), so the
    # exponent is lower: allow 0.6 below SpekPy's.
    k80 = air_kerma_ugy(tube_spectrum(80.0, filtration=AL_25))
    k120 = air_kerma_ugy(tube_spectrum(120.0, filtration=AL_25))
    ours = math.log(k120 / k80) / math.log(120 / 80)
    reference = math.log(_spekpy(120).get_kerma() / _spekpy(80).get_kerma()) / math.log(1.5)
    print(f"air kerma exponent 80-120 kV: {ours:.2f} vs SpekPy {reference:.2f}")
    assert k120 > k80
    assert reference - 0.6 < ours < reference + 0.3


def test_monochromatic_beam_quality_is_closed_form():
    beam = monochromatic(60.0)
    mu_al = mu_table([get_material("aluminium")], [60.0])[0, 0]
    # HVL = ln 2 / mu, and the second HVL equals the first (closed form for one energy);
    # rel: the root finder's tolerance (common practice)
    assert beam.hvl_mm_al == pytest.approx(math.log(2) / mu_al, rel=1e-8)
    assert beam.second_hvl_mm_al == pytest.approx(beam.hvl_mm_al, rel=1e-6)
    assert beam.effective_energy_kev == pytest.approx(60.0, abs=1e-3)
    assert beam.mean_energy_kev == 60.0 and beam.total_fluence == 1.0
    # Effective energy for water is defined the same way.
    assert effective_energy_kev(beam, "water") == pytest.approx(60.0, abs=1e-3)


@pytest.mark.parametrize("energy", [1.0, 1.5, 3.0, 800.0])
def test_effective_energy_of_a_line_anywhere_on_the_tables(energy):
    # A line's effective energy in water is its own energy (closed form: one energy, so
    # ln 2 / HVL = mu(E)); water has no absorption edge above 1 keV, so the root is unique.
    # At the ends of the tables and below aluminium's K edge (1.56 keV) this used to fail.
    beam = monochromatic(energy)
    assert effective_energy_kev(beam, "water") == pytest.approx(energy, rel=1e-4)
    assert math.isfinite(beam.effective_energy_kev)  # aluminium: the highest root


def test_effective_energy_between_hvl_bounds():
    spectrum = tube_spectrum(120.0, filtration=AL_25)
    # a filtered 120 kV beam has an effective energy below its mean energy and well above
    # 30 keV (common practice)
    assert 30.0 < spectrum.effective_energy_kev < spectrum.mean_energy_kev
    assert spectrum.second_hvl_mm_al > spectrum.hvl_mm_al  # beam hardening


# --------------------------------------------------------------------------------------------
# Bad input
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("kwargs, match", [
    (dict(kvp=30.0), "kVp must be 40 to 150 kV"),
    (dict(kvp=200.0), "kVp must be 40 to 150 kV"),
    (dict(kvp=float("nan")), "kVp"),
    (dict(kvp=100.0, anode_angle_deg=0.0), "anode angle"),
    (dict(kvp=100.0, bin_kev=0.0), "bin width"),
    (dict(kvp=100.0, filtration=(("aluminium", -1.0),)), "thickness of aluminium must be"),
    (dict(kvp=100.0, filtration=(("unobtainium", 1.0),)), "unknown material"),
])
def test_tube_spectrum_bad_input(kwargs, match):
    with pytest.raises(ValueError, match=match) as info:
        tube_spectrum(**kwargs)
    assert "\n" not in str(info.value)


def test_bad_monochromatic_and_filter():
    with pytest.raises(ValueError, match="1 to 800 keV"):
        monochromatic(0.5)
    with pytest.raises(ValueError, match=">= 0 mm"):
        filtered(monochromatic(60.0), "copper", -0.1)


# --------------------------------------------------------------------------------------------
# Spectrum files
# --------------------------------------------------------------------------------------------


def test_load_spectrum_roundtrip(tmp_path):
    path = tmp_path / "beam.txt"
    path.write_text("# energy keV, relative fluence\n20, 1\n\n21 3\n22 0\n")
    spectrum = load_spectrum(path)
    np.testing.assert_allclose(spectrum.energies_kev, [20.0, 21.0, 22.0])
    np.testing.assert_allclose(spectrum.fluence, [0.25, 0.75, 0.0])  # 1, 3, 0 normalised
    assert spectrum.bin_width_kev == 1.0 and not spectrum.absolute


@pytest.mark.parametrize("text, line, match", [
    ("20 1\n21 nan\n", 2, "not finite"),
    ("20 1\n21 -2\n", 2, "negative fluence"),
    ("20 1\n19 2\n", 2, "does not increase"),
    ("20 1\n21 2 3\n", 2, "expected 2 columns"),
    ("20 1\nabc 2\n", 2, "not a number"),
    ("20 1\n21 1\n23 1\n", 3, "differs from the first step"),
    ("0.2 1\n", 1, "outside the attenuation tables"),
])
def test_load_spectrum_bad_rows(tmp_path, text, line, match):
    path = tmp_path / "bad.txt"
    path.write_text(text)
    with pytest.raises(InputError, match=match) as info:
        load_spectrum(path)
    message = str(info.value)
    assert f"{path}:{line}" in message and "\n" not in message and "valid" in message


def test_load_spectrum_missing_file(tmp_path):
    with pytest.raises(InputError, match="not found"):
        load_spectrum(tmp_path / "none.txt")


def test_spectrum_rejects_negative_fluence():
    with pytest.raises(ValueError, match=">= 0"):
        Spectrum(np.array([10.0, 11.0]), 1.0, np.array([1.0, -1.0]))


# --------------------------------------------------------------------------------------------
# Figure
# --------------------------------------------------------------------------------------------


def test_plot_spectrum_writes_png(tmp_path):
    path = plot_spectrum(tube_spectrum(100.0, filtration=AL_25), tmp_path / "figs" / "s.png")
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert [p.name for p in path.parent.iterdir()] == ["s.png"]
