"""Detector response: sensor efficiency, energy bins, PSF, lag, fixed pattern, detector inputs."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from simbench.errors import InputError
from simbench.measure import SpectrumArrays, measure
from simbench.measure.config import (
    MAX_THRESHOLDS,
    DetectorConfig,
    ExposureConfig,
    Physics,
    SourceConfig,
    parse_detector,
)
from simbench.measure.detector import (
    apply_lag,
    apply_psf,
    bin_response,
    deposited_energy_kev,
    detector_pattern,
    sensor_efficiency,
    swank_factor,
)
from simbench.spec import Section, parse_yaml_text


def _section(text: str) -> Section:
    return Section.root(parse_yaml_text(text, "scanner.yaml"), "scanner.yaml")


# --------------------------------------------------------------------------------------------
# Sensor
# --------------------------------------------------------------------------------------------


def test_sensor_efficiency_matches_xraylib_beer_lambert():
    # eta = 1 - exp(-(mu/rho) rho t), with mu/rho of CsI from xraylib's CS_Total_CP
    # (independent reference library) and rho = 4.51 g/cm^3 (recalled from memory).
    import xraylib

    det = DetectorConfig(material="CsI", density_g_cm3=4.51, thickness_mm=0.6)
    energies = np.array([40.0, 60.0, 100.0])
    eta = sensor_efficiency(energies, det)
    ref = [1 - math.exp(-xraylib.CS_Total_CP("CsI", e) * 4.51 * 0.06) for e in energies]
    assert eta == pytest.approx(ref, rel=1e-3)  # two cross-section routes, 0.1 % (common practice)
    # 0.6 mm CsI stops nearly all photons just above its K edges and about half at 100 keV
    # (common practice)
    assert eta[0] > 0.99 and 0.3 < eta[2] < 0.8


def test_deposited_energy_follows_energy_absorption_ratio():
    # Local deposition: w(E) = E mu_en / mu, checked against xraylib's CS_Energy_CP / CS_Total_CP
    # (independent reference library). Above the I and Cs K edges (33.2 and 36.0 keV, recalled
    # from memory) K fluorescence carries energy away, so the deposited fraction drops.
    import xraylib

    det = DetectorConfig(material="CsI", density_g_cm3=4.51, thickness_mm=0.6)
    energies = np.array([30.0, 40.0, 80.0])
    deposit = deposited_energy_kev(energies, det)
    ref = [e * xraylib.CS_Energy_CP("CsI", e) / xraylib.CS_Total_CP("CsI", e) for e in energies]
    assert deposit == pytest.approx(ref, rel=0.05)  # two mu_en models differ by ~3 % at K edges
    assert np.all(deposit < energies)
    # K escape above the edges removes a large part of the energy (fluorescence yield of I
    # and Cs about 0.88, K alpha about 29-31 keV, recalled from memory); the 0.2 margin is
    # engineering judgement (common practice)
    assert deposit[0] / 30.0 > deposit[1] / 40.0 + 0.2
    # an ideal detector deposits the full photon energy (definition of the ideal sensor)
    assert deposited_energy_kev(energies, DetectorConfig()) == pytest.approx(energies)


def test_mas_exposure_with_sensor_counts_absorbed_photons():
    import xraylib

    det = DetectorConfig(material="CsI", density_g_cm3=4.51, thickness_mm=0.3)
    phys = Physics(SourceConfig("file"), ExposureConfig(mas_per_view=1.0), det)
    spec = SpectrumArrays(np.array([80.0]), np.array([1.0e6]))
    m = measure(np.zeros((1, 2, 3)), np.zeros((1, 1)), phys, spectrum=spec, pitch_mm=(1.0, 1.0),
                sdd_mm=1000.0, noise=False, dtype=np.float64)
    # flat = photons x absorbed fraction 1 - exp(-(mu/rho) rho t) (Beer-Lambert, mu/rho from
    # xraylib's CS_Total_CP; CsI 4.51 g/cm^3 recalled from memory); 0.1 % for two
    # cross-section routes (common practice)
    eta = 1 - math.exp(-xraylib.CS_Total_CP("CsI", 80.0) * 4.51 * 0.03)
    assert np.allclose(m.flat, 1.0e6 * eta, rtol=1e-3)


def test_swank_factor_closed_forms():
    # One energy: I = 1; two equal-count lines at E and 2E: I = (3/2)^2 / (5/2) = 0.9 (closed form).
    assert swank_factor(np.array([5.0]), np.array([60.0])) == pytest.approx(1.0)
    assert swank_factor(np.array([1.0, 1.0]), np.array([1.0, 2.0])) == pytest.approx(0.9)


# --------------------------------------------------------------------------------------------
# Photon-counting bins
# --------------------------------------------------------------------------------------------


def test_ideal_bins_are_indicators():
    det = DetectorConfig(type="photon-counting", thresholds_kev=(20.0, 50.0, 80.0))
    energies = np.array([10.0, 20.0, 49.0, 50.0, 90.0])
    r = bin_response(energies, det)
    # ideal bins are the indicators of [t_b, t_b+1), the last bin open above (definition)
    assert r.tolist() == [[0, 1, 1, 0, 0], [0, 0, 0, 1, 0], [0, 0, 0, 0, 1]]


def test_bins_with_energy_resolution_follow_the_normal_law():
    # P(t_b <= E' < t_b+1) with E' ~ N(E, FWHM / 2.3548) (normal law, scipy.stats reference).
    det = DetectorConfig(type="photon-counting", thresholds_kev=(30.0, 60.0),
                         energy_resolution_kev=10.0)
    energies = np.array([40.0, 58.0, 70.0])
    sigma = 10.0 / (2 * math.sqrt(2 * math.log(2)))
    r = bin_response(energies, det)
    ref0 = stats.norm.cdf(60.0, energies, sigma) - stats.norm.cdf(30.0, energies, sigma)
    ref1 = stats.norm.sf(60.0, energies, sigma)
    assert r[0] == pytest.approx(ref0, rel=1e-12)  # float64 rounding (common practice)
    assert r[1] == pytest.approx(ref1, rel=1e-12)


def test_photon_counting_bins_split_a_two_line_spectrum():
    phys = Physics(SourceConfig("file"), ExposureConfig(air_counts=1000.0),
                   DetectorConfig(type="photon-counting", thresholds_kev=(25.0, 55.0)))
    spec = SpectrumArrays(np.array([40.0, 70.0]), np.array([3.0, 1.0]))
    mu = np.array([[0.04, 0.02]])
    m = measure(np.full((1, 2, 3), 10.0), mu, phys, spectrum=spec, noise=False, dtype=np.float64)
    assert m.counts.shape == (2, 2, 3) and m.flat.shape == (2, 3)
    # closed form: 1000 air counts split 3 : 1 between the 40 and 70 keV lines
    assert np.allclose(m.flat[0], 750.0) and np.allclose(m.flat[1], 250.0)
    # each bin is monochromatic here: its projection is its own mu * L (Beer–Lambert):
    # 0.04 x 10 = 0.4 and 0.02 x 10 = 0.2; rtol: float64 rounding (common practice)
    assert np.allclose(m.projections[0], 0.4, rtol=1e-12)
    assert np.allclose(m.projections[1], 0.2, rtol=1e-12)


def test_threshold_above_the_spectrum_is_an_input_error():
    phys = Physics(SourceConfig("file"), ExposureConfig(air_counts=1000.0),
                   DetectorConfig(type="photon-counting", thresholds_kev=(25.0, 150.0)))
    spec = SpectrumArrays(np.array([40.0, 70.0]), np.array([3.0, 1.0]))
    with pytest.raises(InputError, match="gets no photons"):
        measure(np.zeros((1, 2, 3)), np.zeros((1, 2)), phys, spectrum=spec, noise=False)


# --------------------------------------------------------------------------------------------
# PSF and lag
# --------------------------------------------------------------------------------------------


def test_gaussian_psf_has_the_stated_width_and_keeps_the_signal():
    # A Gaussian of FWHM f has sigma = f / (2 sqrt(2 ln 2)) (closed form).
    det = DetectorConfig(blur_fwhm_mm=(2.0, 0.0))
    x = np.zeros((1, 201))
    x[0, 100] = 1.0
    y = apply_psf(x, det, (0.5, 1.0), (-1,))
    pos = (np.arange(201) - 100) * 0.5
    assert y.sum() == pytest.approx(1.0, rel=1e-12)  # a normalised kernel keeps the signal
    sigma = math.sqrt(np.sum(y[0] * pos ** 2))
    # 0.1 % allows for sampling and truncating the kernel on the 0.5 mm grid (common practice)
    assert sigma == pytest.approx(2.0 / (2 * math.sqrt(2 * math.log(2))), rel=1e-3)


def test_crosstalk_shares_with_neighbours():
    det = DetectorConfig(crosstalk=0.05)
    x = np.zeros((3, 9))
    x[1, 4] = 100.0
    y = apply_psf(x, det, (1.0, 1.0), (-1, -2))
    # closed form of the separable kernel [c, 1 - 2c, c] along u and along v, c = 0.05
    assert y[1, 3] == pytest.approx(0.05 * 0.9 * 100.0)   # one step along u, none along v
    assert y[0, 3] == pytest.approx(0.05 * 0.05 * 100.0)  # one step along each
    assert y[1, 4] == pytest.approx(0.9 * 0.9 * 100.0)
    assert y.sum() == pytest.approx(100.0)


def test_lag_step_response_is_geometric():
    # y[v] = (1 - a) x[v] + a y[v - 1]: after a step from x0 to x1 at view k,
    # y[k + j] = x1 + a^(j + 1) (x0 - x1) (closed form of the first-order recursion).
    a = 0.2
    x = np.concatenate([np.full(5, 100.0), np.full(10, 40.0)])[:, None]
    y = apply_lag(x, a, view_axis=0)[:, 0]
    assert y[:5] == pytest.approx(100.0)
    j = np.arange(10)
    assert y[5:] == pytest.approx(40.0 + a ** (j + 1) * 60.0, rel=1e-12)


def test_lag_and_blur_in_a_scan_keep_uniform_signals():
    det = DetectorConfig(lag=0.3, blur_fwhm_mm=(1.0, 1.0), crosstalk=0.02)
    phys = Physics(SourceConfig("monochromatic", energy_kev=60.0),
                   ExposureConfig(air_counts=1e4), det)
    m = measure(np.full((1, 6, 4, 5), 10.0), np.array([[0.03]]), phys, noise=False,
                dtype=np.float64)
    # normalised blur and lag leave a uniform signal unchanged: mu L = 0.03 x 10 = 0.3
    # (Beer-Lambert); rtol: float64 rounding (common practice)
    assert np.allclose(m.projections, 0.3, rtol=1e-12)


# --------------------------------------------------------------------------------------------
# Fixed pattern
# --------------------------------------------------------------------------------------------


def test_fixed_pattern_depends_only_on_pattern_seed():
    det = DetectorConfig(gain_spread=0.02, dead_fraction=0.05, pattern_seed=3)
    a = detector_pattern(det, 4, 500)
    b = detector_pattern(det, 4, 500)
    assert np.array_equal(a.gain, b.gain) and np.array_equal(a.dead, b.dead)
    # 2000 cells: the sample std is within 1 / sqrt(2 n) = 1.6 % (1 sigma) of the stated
    # spread, and the dead fraction within sqrt(p (1 - p) / n) = 0.005 (1 sigma) of 0.05
    # (sampling statistics); the bounds are about 6 and 3 sigma (common practice)
    assert a.gain.std() == pytest.approx(0.02, rel=0.1)
    assert a.dead.mean() == pytest.approx(0.05, abs=0.015)
    c = detector_pattern(DetectorConfig(gain_spread=0.02, pattern_seed=4), 4, 500)
    assert not np.array_equal(a.gain, c.gain)


def test_listed_cell_outside_detector_is_an_input_error():
    with pytest.raises(InputError, match="outside the detector"):
        detector_pattern(DetectorConfig(dead_cells=((0, 99),)), 1, 10)


# --------------------------------------------------------------------------------------------
# Detector section
# --------------------------------------------------------------------------------------------


def test_parse_full_detector():
    det = parse_detector(_section(
        "type: photon-counting\nthresholds: [20, 45 keV, 70]\nenergy_resolution: 6 keV\n"
        "material: CdTe\nthickness: 2 mm\ndark_level: 0\ngain_spread: 0.01\n"
        "dead_cells: [3, [0, 7]]\nblur: [0.3 mm, 0.2 mm]\ncrosstalk: 0.02\nlag: 0.01\n"
        "flat_frames: 50\ndark_frames: 10\npattern_seed: 9"))
    assert det.photon_counting and det.thresholds_kev == (20.0, 45.0, 70.0) and det.n_bins == 3
    # CdTe density 5.85 g/cm^3 (recalled from memory), filled in from the material name
    assert det.density_g_cm3 == 5.85 and det.thickness_mm == 2.0
    assert det.dead_cells == ((0, 3), (0, 7)) and det.blur_fwhm_mm == (0.3, 0.2)


@pytest.mark.parametrize("text, needle", [
    ("type: photon-counting", "needs thresholds"),
    ("type: photon-counting\nthresholds: [" + ", ".join(str(10 + 5 * i) for i in range(MAX_THRESHOLDS + 1)) + "]",
     "9 thresholds given"),  # MAX_THRESHOLDS + 1 = 9 (config.py)
    ("type: photon-counting\nthresholds: [20, 50, 40]", "not above the previous"),
    ("type: photon-counting\nthresholds: [20, 20]", "not above the previous"),
    ("type: photon-counting\nthresholds: [-20]", "energy must be a positive"),
    ("type: photon-counting\nthresholds: [20]\nelectronic_noise: 3", "counts no electronic noise"),
    ("thresholds: [20]", "photon-counting detectors only"),
    ("type: spectral", "'spectral' is not known"),
    ("material: CsI\nthickness: -0.5 mm", "-0.5 mm is too small"),
    ("material: CsI\nthickness: 0 mm", "0 mm is too small"),
    ("material: CsI", "missing the sensor thickness"),
    ("material: Xq2\nthickness: 1 mm\ndensity_g_cm3: 3", "not a chemical formula"),
    ("material: PbWO4\nthickness: 1 mm", "no density known"),
    ("thickness: 1 mm", "needs a sensor 'material'"),
    ("gain_spread: -0.1", "-0.1 is too small"),
    ("dead_cells: 0.9", "0.9 is too large"),
    ("dead_cells: [[1, 2, 3]]", "[row, column] pair"),
    ("hot_cells: [4]", "no 'full_scale'"),
    ("lag: 1.0", "1 is too large"),
    ("flat_frames: 0", "must be >= 1"),
    ("blur: [1 mm, 2 mm, 3 mm]", "list of 2"),
    ("colour: red", "unknown field 'colour'"),
])
def test_bad_detector(text, needle):
    with pytest.raises(InputError) as err:
        parse_detector(_section(text))
    message = str(err.value)
    assert needle in message
    assert "\n" not in message and message.startswith("scanner.yaml:")
