"""The measurement entry point: Beer–Lambert exactness, beam hardening, rings, seeds, inputs."""

from __future__ import annotations

import hashlib
import subprocess
import sys

import numpy as np
import pytest

from simbench.errors import InputError
from simbench.measure import SpectrumArrays, log_normalize, measure
from simbench.measure.config import (
    DetectorConfig,
    ExposureConfig,
    Physics,
    SourceConfig,
    parse_exposure,
    parse_source,
)
from simbench.measure.noise import rng_for
from simbench.spec import Section, parse_yaml_text

MONO60 = SourceConfig("monochromatic", energy_kev=60.0)


def _section(text: str) -> Section:
    return Section.root(parse_yaml_text(text, "scanner.yaml"), "scanner.yaml")


# --------------------------------------------------------------------------------------------
# Noise-free exactness
# --------------------------------------------------------------------------------------------


def test_noise_free_monochromatic_log_is_the_line_integral():
    # Beer–Lambert with air calibration: ln(flat / counts) = sum_m mu_m L_m (fact of the trade),
    # here with mu of water and cortical bone at 60 keV from the materials module.
    from simbench.materials import get_material, mu_table

    mats = [get_material("water"), get_material("cortical-bone"), get_material("air")]
    rng = np.random.default_rng(0)
    lengths = rng.uniform(0.0, 120.0, size=(3, 30, 40))
    lengths[:, :, :5] = 0.0
    phys = Physics(MONO60, ExposureConfig(air_counts=1.0e6))
    m = measure(lengths, mats, phys, noise=False, dtype=np.float64)
    truth = np.einsum("m,mvc->vc", mu_table(mats, [60.0])[:, 0], lengths)
    # tolerances: float64 rounding of exp and log (common practice)
    assert np.allclose(np.log(m.flat / m.counts), truth, rtol=1e-12, atol=1e-14)
    assert np.allclose(m.projections, truth, rtol=1e-12, atol=1e-14)
    assert np.allclose(m.counts, 1.0e6 * np.exp(-truth), rtol=1e-12)
    assert m.metadata["starvation"]["starved_cells"] == 0


def test_sub_rays_are_averaged_in_intensity():
    # A cell half covered by 20 mm of mu = 0.05/mm: counts = N0 (1 + exp(-1)) / 2 (partial-volume
    # effect, fact of the trade); averaging path lengths instead would give N0 exp(-0.5).
    lengths = np.zeros((1, 2, 3, 2))
    lengths[..., 1] = 20.0
    phys = Physics(MONO60, ExposureConfig(air_counts=1000.0))
    m = measure(lengths, np.array([[0.05]]), phys, subrays=True, noise=False, dtype=np.float64)
    assert np.allclose(m.counts, 1000.0 * (1.0 + np.exp(-1.0)) / 2.0, rtol=1e-13)


def test_mas_exposure_follows_tube_output_model():
    # counts = fluence x (1000 mm / SDD)^2 x cell area x mAs (the tube-output model of the brief).
    energies = np.array([50.0, 70.0])
    fluence = np.array([3.0e5, 1.0e5])  # photons / (mm^2 mAs) at 1 m (demo values)
    phys = Physics(SourceConfig("file"), ExposureConfig(mas_per_view=0.5))
    m = measure(np.zeros((1, 2, 4)), np.zeros((1, 2)), phys, spectrum=SpectrumArrays(energies, fluence),
                pitch_mm=(1.0, 1.5), sdd_mm=1250.0, noise=False, dtype=np.float64)
    # inverse-square law from 1 m to SDD 1250 mm, cell area 1.0 x 1.5 mm^2, 0.5 mAs (closed form)
    expected = fluence.sum() * (1000.0 / 1250.0) ** 2 * 1.5 * 0.5
    assert np.allclose(m.flat, expected, rtol=1e-13)


# --------------------------------------------------------------------------------------------
# Beam hardening
# --------------------------------------------------------------------------------------------


def _spekpy_spectrum(kvp=120.0):
    spekpy = pytest.importorskip("spekpy")
    spek = spekpy.Spek(kvp=kvp, th=12, dk=1)
    spek.filter("Al", 2.5)
    energies, fluence = spek.get_spectrum()
    return np.asarray(energies, float), np.asarray(fluence, float)


def test_polychromatic_water_projection_is_concave_in_thickness():
    # Beam hardening: the polychromatic projection through water grows slower than linearly
    # (concave), below the line of the lowest-energy mu (fact of the trade); a monochromatic
    # source gives the straight line mu * t.
    from simbench.materials import get_material, mu_table

    water = [get_material("water")]
    energies, fluence = _spekpy_spectrum()
    thickness = np.linspace(0.0, 400.0, 41)
    lengths = thickness[None, None, :]
    phys = Physics(SourceConfig("file"), ExposureConfig(air_counts=1e6))
    m = measure(lengths, water, phys, spectrum=SpectrumArrays(energies, fluence), noise=False,
                dtype=np.float64)
    p = m.projections[0]
    assert np.all(np.diff(p) > 0)
    assert np.all(np.diff(p, 2) < 0)                      # strictly concave
    slope = p[1:] / thickness[1:]
    assert np.all(np.diff(slope) < 0)                     # effective mu falls with thickness
    mono = measure(lengths, water, Physics(MONO60, ExposureConfig(air_counts=1e6)),
                   noise=False, dtype=np.float64).projections[0]
    mu60 = mu_table(water, [60.0])[0, 0]
    # tolerances: float64 rounding (common practice)
    assert np.allclose(mono, mu60 * thickness, rtol=1e-12, atol=1e-14)
    assert np.allclose(np.diff(mono, 2), 0.0, atol=1e-12)


def test_polychromatic_with_single_energy_spectrum_reduces_to_monochromatic():
    # A one-bin spectrum is a monochromatic source (Beer–Lambert).
    lengths = np.linspace(0, 300, 31)[None, None, :]
    mu = np.array([[0.0206]])
    phys = Physics(SourceConfig("file"), ExposureConfig(air_counts=1e5))
    m = measure(lengths, mu, phys, spectrum=SpectrumArrays(np.array([60.0]), np.array([7.0])),
                noise=False, dtype=np.float64)
    assert np.allclose(m.projections[0], 0.0206 * lengths[0, 0], rtol=1e-12)


# --------------------------------------------------------------------------------------------
# Rings from the detector's gain
# --------------------------------------------------------------------------------------------


def _cylinder_sinogram(n_views=180, n_cols=128, radius_cells=40.0):
    t = np.arange(n_cols) - (n_cols - 1) / 2.0
    chord = 2.0 * np.sqrt(np.clip(radius_cells ** 2 - t ** 2, 0.0, None))  # closed form
    return np.broadcast_to(chord, (n_views, n_cols))[None].copy(), np.linspace(0, 180, n_views,
                                                                               endpoint=False)


def _ring_power(projections, angles_deg):
    """High-pass power of the angular mean of an FBP image along the radius."""
    from skimage.transform import iradon

    image = iradon(projections.T, theta=angles_deg, filter_name="ramp", circle=True)
    n = image.shape[0]
    yy, xx = np.indices(image.shape) - (n - 1) / 2.0
    radius = np.hypot(xx, yy).astype(int)
    inside = radius < 34  # well inside the 40-cell cylinder, away from its edge
    profile = np.bincount(radius[inside], image[inside]) / np.bincount(radius[inside])
    smooth = np.convolve(profile, np.ones(7) / 7, mode="same")
    return float(np.sum((profile - smooth)[3:-3] ** 2))


def test_uncorrected_gain_gives_rings_and_flat_field_removes_the_fixed_pattern():
    # A per-cell gain that the flat field does not see (drift between flat and scan) makes ring
    # artefacts in FBP of a uniform cylinder (fact of the trade); the fixed gain pattern seen by
    # both the flat and the scan cancels in ln(flat / counts).
    lengths, angles = _cylinder_sinogram()
    mu = np.array([[0.02]])
    base = Physics(MONO60, ExposureConfig(air_counts=1e5))
    clean = measure(lengths, mu, base, noise=False, dtype=np.float64).projections

    spread = Physics(MONO60, ExposureConfig(air_counts=1e5), DetectorConfig(gain_spread=0.05))
    fixed = measure(lengths, mu, spread, noise=False, dtype=np.float64).projections
    assert np.allclose(fixed, clean, rtol=1e-12, atol=1e-12)

    drift = Physics(MONO60, ExposureConfig(air_counts=1e5),
                    DetectorConfig(gain_spread=0.05, gain_drift=0.01))
    ringed = measure(lengths, mu, drift, noise=False, dtype=np.float64).projections
    # a factor of 100 over the clean image's discretisation ripple: engineering judgement
    # (common practice)
    assert _ring_power(ringed, angles) > 100.0 * _ring_power(clean, angles)


def test_dead_and_hot_cells():
    # A dead cell reads no signal: flat and scan are clamped to the floor (recorded); a hot cell
    # reads full scale in flat and scan, so its projection is 0.
    lengths = np.full((1, 5, 10), 10.0)
    det = DetectorConfig(dead_cells=((0, 2),), hot_cells=((0, 7),), full_scale=60000.0,
                         dark_level=100.0)
    m = measure(lengths, np.array([[0.05]]), Physics(MONO60, ExposureConfig(air_counts=1e4), det),
                noise=False, dtype=np.float64)
    assert np.all(m.projections[:, 7] == 0.0)
    assert np.all(m.projections[:, 2] == 0.0)   # ln(floor / floor)
    assert m.metadata["starvation"]["starved_flat_cells"] == 1  # the one dead cell
    assert m.metadata["starvation"]["starved_cells"] == 5       # dead cell x 5 views
    ok = np.delete(m.projections, [2, 7], axis=1)
    assert np.allclose(ok, 0.5, rtol=1e-12)  # mu L = 0.05 x 10 (Beer-Lambert)


# --------------------------------------------------------------------------------------------
# Photon starvation
# --------------------------------------------------------------------------------------------


def test_photon_starvation_is_clamped_and_recorded():
    lengths = np.full((1, 20, 30), 10.0)
    lengths[0, :, 10:20] = 2000.0  # transmission exp(-100): no photon gets through
    phys = Physics(MONO60, ExposureConfig(air_counts=1e3), DetectorConfig(electronic_noise=0.0))
    m = measure(lengths, np.array([[0.05]]), phys, rng=rng_for(1, "starve"), dtype=np.float64)
    assert np.all(np.isfinite(m.projections))
    rec = m.metadata["starvation"]
    assert rec["floor_counts"] == 0.5  # the documented default floor (measure/calibration.py)
    assert rec["starved_cells"] == 200  # 20 views x 10 blocked columns
    assert np.allclose(m.projections[:, 10:20], np.log(m.flat[10:20] / 0.5))


def test_log_normalize_floor_policy():
    p, rec = log_normalize(np.array([[50.0, 9.0, 12.0]]), np.array([110.0, 110.0, 110.0]),
                           np.array([10.0, 10.0, 10.0]), floor=2.0)
    # closed form: ln((flat - dark) / max(counts - dark, floor)) = ln(100 / 40), ln(100 / 2) twice
    assert p[0] == pytest.approx([np.log(100.0 / 40.0), np.log(100.0 / 2.0), np.log(100.0 / 2.0)])
    assert rec["starved_cells"] == 1 and rec["floor_counts"] == 2.0  # 12 - 10 = floor is kept


# --------------------------------------------------------------------------------------------
# Reproducibility
# --------------------------------------------------------------------------------------------

_PHYS_NOISY = Physics(MONO60, ExposureConfig(air_counts=500.0),
                      DetectorConfig(electronic_noise=2.0, dark_level=20.0, gain_spread=0.01,
                                     gain_drift=0.01, dead_fraction=0.01, blur_fwhm_mm=(0.8, 0.0),
                                     crosstalk=0.02, lag=0.05))


def _digest(seed: int) -> str:
    lengths = np.linspace(0, 80, 7 * 9 * 11).reshape(1, 7, 9, 11)
    m = measure(lengths, np.array([[0.03]]), _PHYS_NOISY, rng=rng_for(seed, "scan", 1))
    h = hashlib.sha256()
    for a in (m.counts, m.flat, m.dark, m.projections):
        h.update(np.ascontiguousarray(a).tobytes())
    return h.hexdigest()


def test_same_seed_same_bits_twice_and_across_processes():
    first = _digest(42)
    assert _digest(42) == first
    assert _digest(43) != first
    code = ("import sys; sys.path.insert(0, 'tests'); import test_measure as t; "
            "print(t._digest(42))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, env={"NUMBA_NUM_THREADS": "1", "PATH": ""}, cwd=".")
    assert out.stdout.strip() == first


def test_same_bits_with_one_or_two_threads():
    import numba

    lengths = np.random.default_rng(1).uniform(0, 50, size=(3, 40, 300))
    mu = np.random.default_rng(2).uniform(0.0, 0.05, size=(3, 20))
    spec = SpectrumArrays(np.linspace(20, 120, 20), np.linspace(1, 2, 20))
    phys = Physics(SourceConfig("file"), ExposureConfig(air_counts=1e4))
    before = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        one = measure(lengths, mu, phys, spectrum=spec, rng=7).counts
        numba.set_num_threads(min(2, numba.config.NUMBA_NUM_THREADS))
        two = measure(lengths, mu, phys, spectrum=spec, rng=7).counts
    finally:
        numba.set_num_threads(before)
    assert one.tobytes() == two.tobytes()


def test_rng_for_is_stable():
    # Streams depend only on the seed and the identity (NumPy SeedSequence design).
    a = rng_for(1, "scenario", "dose=1", 0).integers(0, 2**31, 4)
    b = rng_for(1, "scenario", "dose=1", 0).integers(0, 2**31, 4)
    c = rng_for(1, "scenario", "dose=1", 1).integers(0, 2**31, 4)
    assert (a == b).all() and not (a == c).all()


# --------------------------------------------------------------------------------------------
# Bad input: source and exposure sections
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("text, needle", [
    ("kvp: 500", "outside the tube model's range"),
    ("kvp: 5", "outside the tube model's range"),
    ("energy: 5000 keV", "outside the attenuation tables"),
    ("energy: 0.2 keV", "outside the attenuation tables"),
    ("energy: -3 keV", "energy must be a positive"),
    ("kvp: 120\nfiltration:\n  - {material: aluminium, thickness: -2 mm}", "-2 mm is too small"),
    ("kvp: 120\nfiltration:\n  - {material: unobtainium, thickness: 2 mm}", "unknown filter"),
    ("energy: 60\nkvp: 120", "give only one of"),
    ("focal_spot: 1 mm", "no source spectrum"),
    ("energy: 60\nanode_angle: 12", "does not apply"),
    ("kvp: 120\nvoltage: 3", "unknown field 'voltage'"),
])
def test_bad_source(text, needle):
    with pytest.raises(InputError) as err:
        parse_source(_section(text))
    message = str(err.value)
    assert needle in message
    assert "\n" not in message and message.startswith("scanner.yaml:")


@pytest.mark.parametrize("text, needle", [
    ("air_counts: 0", "0 is too small"),
    ("air_counts: -100", "-100 is too small"),
    ("mas_per_view: 0", "0 mAs is too small"),
    ("tube_current_ma: 200", "missing required field 'view_time_ms'"),
    ("tube_current_ma: 200\nview_time_ms: -1", "-1 ms is too small"),
    ("air_counts: 100\nmas_per_view: 1", "give only one of"),
    ("{}", "no exposure given"),
])
def test_bad_exposure(text, needle):
    with pytest.raises(InputError) as err:
        parse_exposure(_section(text))
    assert needle in str(err.value)
    assert "\n" not in str(err.value)


def test_good_source_and_exposure():
    src = parse_source(_section(
        "kvp: 120\nanode_angle: 10 deg\nfiltration:\n  - {material: aluminium, thickness: 2.5 mm}\n"
        "focal_spot: [1.2 mm, 0.8 mm]\nfocal_spot_samples: 3"))
    assert src.kind == "tube" and src.filtration == (("aluminium", 2.5),)
    assert src.anode_angle_deg == pytest.approx(10.0)
    assert src.focal_spot_mm == (1.2, 0.8) and src.focal_spot_samples == (3, 3)
    exp = parse_exposure(_section("tube_current_ma: 200\nview_time_ms: 0.5"))
    assert exp.mas_per_view == pytest.approx(0.1)  # 200 mA x 0.5 ms = 0.1 mAs (unit definition)


def test_error_names_line_and_column():
    with pytest.raises(InputError) as err:
        parse_exposure(_section("# exposure\nair_counts: -5\n"))
    assert str(err.value).startswith("scanner.yaml:2:13: air_counts:")  # the value's place, by hand


@pytest.mark.parametrize("text, needle", [
    ("source: {energy: 60}\nexposure: {mas_per_view: 1}", "no tube output per mAs"),
    ("source: {kvp: 80}\nexposure: {air_counts: 1e4}\n"
     "detector: {type: photon-counting, thresholds: [90]}", "not below the source's highest"),
    ("source: {kvp: 120, anode_angle: 45}\nexposure: {air_counts: 1e4}", "anode angle 45 deg"),
    ("source: {kvp: 120, energy_bin: 5 keV}\nexposure: {air_counts: 1e4}", "energy bin 5 keV"),
    ("exposure: {air_counts: 1e4}", "missing required field 'source'"),
])
def test_bad_physics_across_sections(text, needle):
    from simbench.measure import parse_physics

    with pytest.raises(InputError) as err:
        parse_physics(_section(text))
    assert needle in str(err.value) and "\n" not in str(err.value)


def test_tube_source_through_the_spectrum_model():
    # 120 kVp tube with mAs exposure: the flat equals the model's fluence x (1000/SDD)^2 x area x
    # mAs (tube-output model), and the water projection shows beam hardening (p/t falls).
    from simbench.materials import get_material, spectra
    from simbench.measure import parse_physics

    phys = parse_physics(_section(
        "source: {kvp: 120, filtration: [{material: aluminium, thickness: 2.5 mm}], "
        "energy_bin: 2 keV}\nexposure: {tube_current_ma: 100, view_time_ms: 1}"))
    spec = spectra.tube_spectrum(120, anode_angle_deg=12.0, filtration=(("aluminium", 2.5),),
                                 bin_kev=2.0)
    lengths = np.array([0.0, 100.0, 200.0, 300.0])[None, None, :]
    m = measure(lengths, [get_material("water")], phys, pitch_mm=(1.0, 1.0), sdd_mm=1000.0,
                noise=False, dtype=np.float64)
    # SDD 1000 mm (no inverse-square factor), 1 mm^2 cell, 100 mA x 1 ms = 0.1 mAs
    assert m.flat[0] == pytest.approx(spec.fluence.sum() * 1.0 * 1.0 * 0.1, rel=1e-12)
    slope = m.projections[0, 1:] / lengths[0, 0, 1:]
    assert np.all(np.diff(slope) < 0)


def test_kernel_exponential_matches_numpy():
    # The forward kernel's vectorised exp(-tau) against numpy.exp (reference library).
    from simbench.measure.forward import exp_neg

    tau = np.concatenate([np.linspace(0.0, 700.0, 70001),
                          np.random.default_rng(0).uniform(0.0, 30.0, 10000)])
    # a few hundred ulp: a vectorised exp is not correctly rounded (common practice)
    assert np.max(np.abs(exp_neg(tau) / np.exp(-tau) - 1.0)) < 3e-14
    assert exp_neg(np.array([0.0]))[0] == 1.0
