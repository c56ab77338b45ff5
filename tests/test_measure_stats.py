"""Counting statistics of the measurement: Poisson, delta-method variance, Swank factor."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from simbench.measure import SpectrumArrays, measure
from simbench.measure.config import DetectorConfig, ExposureConfig, Physics, SourceConfig
from simbench.measure.noise import GAUSSIAN_MIN_PHOTONS, rng_for

MONO = SourceConfig("monochromatic", energy_kev=60.0)


def _spekpy_spectrum(kvp=120.0, al_mm=2.5):
    """A tube spectrum from spekpy (independent reference library, test-only)."""
    spekpy = pytest.importorskip("spekpy")
    spek = spekpy.Spek(kvp=kvp, th=12, dk=1)
    spek.filter("Al", al_mm)
    energies, fluence = spek.get_spectrum()
    return np.asarray(energies, dtype=float), np.asarray(fluence, dtype=float)


def _dispersion_pvalue(counts: np.ndarray, expected: np.ndarray) -> float:
    """Two-sided p-value of the Poisson dispersion statistic sum (x - m)^2 / m ~ chi2(n)."""
    d = float(np.sum((counts - expected) ** 2 / expected))
    n = counts.size
    cdf = stats.chi2.cdf(d, n)
    return 2.0 * min(cdf, 1.0 - cdf)


def test_monochromatic_counts_are_poisson():
    # Photon counts of a fixed mean are Poisson (fact of the trade): mean and dispersion tested
    # at the 0.1 % level.
    lengths = np.full((1, 100, 500), 20.0)
    mu = np.array([[0.02]])
    phys = Physics(MONO, ExposureConfig(air_counts=1000.0))
    m = measure(lengths, mu, phys, rng=rng_for(11, "poisson"), dtype=np.float64)
    expected = 1000.0 * np.exp(-0.4)  # Beer-Lambert (closed form)
    counts = m.counts.ravel()
    assert np.allclose(counts, np.round(counts))  # whole photon numbers
    z = (counts.mean() - expected) / np.sqrt(expected / counts.size)
    assert 2 * stats.norm.sf(abs(z)) > 1e-3
    assert _dispersion_pvalue(counts, np.full(counts.size, expected)) > 1e-3


def test_photon_counting_bins_are_independent_poisson():
    # Each photon-counting bin is Poisson with the noise-free mean (fact of the trade).
    energies, fluence = _spekpy_spectrum()
    mu = np.vstack([0.02 * (60.0 / energies) ** 1.5])
    lengths = np.full((1, 60, 400), 30.0)
    det = DetectorConfig(type="photon-counting", thresholds_kev=(25.0, 50.0, 75.0))
    phys = Physics(SourceConfig("file"), ExposureConfig(air_counts=2000.0), det)
    spec = SpectrumArrays(energies, fluence)
    clean = measure(lengths, mu, phys, spectrum=spec, noise=False, dtype=np.float64)
    noisy = measure(lengths, mu, phys, spectrum=spec, rng=rng_for(3, "pc"), dtype=np.float64)
    for b in range(3):
        assert _dispersion_pvalue(noisy.counts[b].ravel(), clean.counts[b].ravel()) > 1e-3
    # bins are independent: correlation of bin 0 and bin 1 compatible with zero
    r = np.corrcoef(noisy.counts[0].ravel(), noisy.counts[1].ravel())[0, 1]
    assert abs(r) < 3.3 / np.sqrt(noisy.counts[0].size)  # 0.1 % two-sided normal bound


def test_projection_variance_is_one_over_counts():
    # Delta method: var(ln N) = 1 / N for Poisson N (common practice), within 5 % at N = 1e4.
    n_behind = 1.0e4
    lengths = np.full((1, 200, 500), 1.0)
    mu = np.array([[1.0]])  # transmission exp(-1)
    phys = Physics(MONO, ExposureConfig(air_counts=n_behind * np.e))
    m = measure(lengths, mu, phys, rng=rng_for(5, "var p"), dtype=np.float64)
    # variance along views: each column's flat is one fixed draw, so it drops out
    var = m.projections.var(axis=0, ddof=1).mean()
    # sampling error of the variance over 500 x 199 degrees of freedom is 0.45 %; 5 % is loose
    assert var == pytest.approx(1.0 / n_behind, rel=0.05)
    # mean ln(flat / counts) = mu L = 1 (Beer-Lambert); each column's flat draw of about
    # 2.7e4 photons moves it by 0.6 %, i.e. 2.7e-4 over 500 columns: 1e-3 is about 3.7 sigma
    assert m.projections.mean() == pytest.approx(1.0, abs=1e-3)


@pytest.mark.parametrize("air_counts", [2.0e4, 0.4 * GAUSSIAN_MIN_PHOTONS])
def test_energy_integrating_variance_carries_swank_factor(air_counts):
    # Compound Poisson: relative variance of an energy-weighted count is 1 / (N I) with the
    # Swank factor I = M1^2 / (M0 M2) (Swank, J. Appl. Phys. 44, 4199 (1973)), computed here in
    # closed form from the spekpy spectrum with deposited energy E (ideal sensor). The
    # parameters cover the normal-law branch and the exact per-energy branch.
    energies, fluence = _spekpy_spectrum()
    n = fluence / fluence.sum()
    swank = np.sum(n * energies) ** 2 / (np.sum(n) * np.sum(n * energies ** 2))
    lengths = np.zeros((1, 400, 500))
    mu = np.zeros((1, energies.size))
    phys = Physics(SourceConfig("file"), ExposureConfig(air_counts=air_counts))
    m = measure(lengths, mu, phys, spectrum=SpectrumArrays(energies, fluence),
                rng=rng_for(9, "swank", air_counts), dtype=np.float64)
    assert m.metadata["swank_factor"] == pytest.approx(swank, rel=1e-12)
    assert 0.8 < swank < 1.0  # typical range of a filtered tube spectrum (common practice)
    rel_var = m.counts.var() / m.counts.mean() ** 2
    # 2e5 samples: the mean is within 1 % and the variance within 3 % (0.3 % sampling error,
    # 1 sigma) by a wide margin (common practice)
    assert m.counts.mean() == pytest.approx(air_counts, rel=0.01)
    assert rel_var == pytest.approx(1.0 / (air_counts * swank), rel=0.03)
    # and it is clearly not the plain Poisson value 1 / N
    assert abs(rel_var * air_counts - 1.0) > 3 * 0.01 or swank > 0.97


def test_flat_frame_noise_averages_over_frames():
    # The mean of n independent readings has variance sigma^2 / n (fact of the trade).
    lengths = np.zeros((1, 2, 4000))
    phys = Physics(MONO, ExposureConfig(air_counts=1000.0),
                   DetectorConfig(flat_frames=16, dark_frames=4, electronic_noise=8.0,
                                  dark_level=50.0))
    m = measure(lengths, np.array([[0.01]]), phys, rng=rng_for(2, "frames"), dtype=np.float64)
    # per frame: Poisson variance 1000 plus electronic noise 8^2 = 64 (closed form), over 16
    # flat and 4 dark frames; 10 % is several sigma of the sample variance (common practice)
    assert m.flat.var(ddof=1) == pytest.approx((1000.0 + 64.0) / 16, rel=0.1)
    assert m.dark.var(ddof=1) == pytest.approx(64.0 / 4, rel=0.1)
    assert m.dark.mean() == pytest.approx(50.0, abs=0.5)  # the dark level; loose (common practice)
