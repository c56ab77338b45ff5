"""The fused passes of the measurement chain equal the plain steps they replace.

References: scipy.ndimage (Gaussian filter, convolution), numpy's Generator (normal
deviates), and the step-by-step formulas of the detector chain written out with numpy.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from simbench.measure.config import DetectorConfig
from simbench.measure.detector import FWHM_PER_SIGMA, apply_lag, apply_psf, apply_readout
from simbench.measure.forward import expected_signal
from simbench.measure.noise import start_standard_normals


@pytest.mark.parametrize("fwhm,crosstalk", [(0.0, 0.03), (1.2, 0.0), (2.5, 0.02)])
def test_row_blur_equals_scipy(fwhm, crosstalk):
    rng = np.random.default_rng(3)
    values = rng.uniform(100, 1000, (5, 7, 40))
    det = DetectorConfig(blur_fwhm_mm=(fwhm, 0.0), crosstalk=crosstalk)
    got = apply_psf(values, det, (0.8, 1.0), (-1,))
    # scipy.ndimage is the reference: Gaussian of sigma = FWHM / 2.3548 / pitch cells,
    # then the cross-talk kernel [c, 1 - 2c, c], edges repeated ("nearest")
    want = values
    if fwhm > 0:
        want = ndimage.gaussian_filter1d(want, fwhm / FWHM_PER_SIGMA / 0.8, axis=-1,
                                         mode="nearest", truncate=4.0)
    if crosstalk > 0:
        want = ndimage.convolve1d(want, np.array([crosstalk, 1 - 2 * crosstalk, crosstalk]),
                                  axis=-1, mode="nearest")
    np.testing.assert_allclose(got, want, rtol=1e-13)  # float64 rounding (common practice)


def test_readout_pass_equals_the_separate_steps():
    rng = np.random.default_rng(4)
    scan = rng.uniform(10, 5000, (1, 30, 24))
    gain = rng.uniform(0.9, 1.1, 24)
    gain[5] = 0.0  # a dead cell
    hot = np.zeros(24, bool)
    hot[7] = True
    normals = rng.standard_normal(scan.shape)
    # step by step, as the detector chain documents it: lag, gain, dark, noise, saturation
    want = apply_lag(scan.copy(), 0.05, view_axis=1)
    want = np.minimum(want * gain + 50.0 + 3.0 * normals, 4000.0)
    want[..., hot] = 4000.0
    got = apply_readout(np.ascontiguousarray(scan), lag=0.05, gain=gain, dark_level=50.0,
                        electronic_noise=3.0, normals=normals, full_scale=4000.0, hot=hot)
    # same operations in another order: float64 rounding (common practice)
    np.testing.assert_allclose(got, want, rtol=1e-14, atol=1e-12)


def test_background_normals_equal_direct_draws():
    a1, a2 = np.random.default_rng(11), np.random.default_rng(12)
    b1, b2 = np.random.default_rng(11), np.random.default_rng(12)
    wait = start_standard_normals((a1, (1000,)), (a2, (3, 50)))
    got = wait()
    assert np.array_equal(got[0], b1.standard_normal(1000))
    assert np.array_equal(got[1], b2.standard_normal((3, 50)))


def test_forward_pass_refuses_nan_and_inf():
    mu = np.array([[0.02, 0.03]])
    w = np.array([[1.0, 2.0]])
    for bad in (np.nan, np.inf):
        lengths = np.full((1, 3, 4), 5.0)
        lengths[0, 1, 2] = bad
        with pytest.raises(ValueError, match="NaN or inf"):
            expected_signal(lengths, mu, w)


def test_scatter_kernel_by_fft_equals_scipy_gaussian():
    from simbench.measure.scatter import _kernel

    values = np.random.default_rng(5).uniform(1.0, 2.0, (3, 4, 30, 70))
    got = _kernel(values, 60.0, (0.8, 1.1), (-1, -2))
    # reference: scipy.ndimage's Gaussian, edges repeated, truncated at 3 sigma
    want = values
    for sigma, axis in ((60.0 / FWHM_PER_SIGMA / 0.8, -1), (60.0 / FWHM_PER_SIGMA / 1.1, -2)):
        want = ndimage.gaussian_filter1d(want, sigma, axis=axis, mode="nearest", truncate=3.0)
    # FFT against direct convolution: float64 rounding (common practice)
    np.testing.assert_allclose(got, want, rtol=1e-12)


def test_readout_in_blocks_with_lag_state_equals_one_pass():
    # The lag filter y[v] = (1 - a) x[v] + a y[v - 1] is a recursion along the views: read in
    # two blocks with the state carried over, it must give the one-pass result bit for bit.
    rng = np.random.default_rng(6)
    scan = rng.uniform(10, 5000, (2, 40, 33))
    gain = rng.uniform(0.9, 1.1, 33)
    normals = rng.standard_normal(scan.shape)
    kwargs = dict(lag=0.07, gain=gain, dark_level=20.0, electronic_noise=2.0)
    whole = apply_readout(scan.copy(), normals=normals, **kwargs)
    state = np.full((2, 33), np.nan)
    first = apply_readout(np.ascontiguousarray(scan[:, :17]), normals=normals[:, :17],
                          lag_state=state, **kwargs)
    second = apply_readout(np.ascontiguousarray(scan[:, 17:]), normals=normals[:, 17:],
                           lag_state=state, **kwargs)
    assert np.array_equal(np.concatenate([first, second], axis=1), whole)


def test_electronic_noise_adds_its_variance_to_a_polychromatic_scan():
    # Independent noises add their variances (fact of probability): an energy-integrating
    # air scan read with electronic noise sigma has the variance of the same scan without
    # it plus sigma^2. 40 000 readings estimate a variance to about 0.7 % (sqrt(2/n)); 5 %
    # leaves room for the estimate of both scans (common practice).
    from simbench.measure import SpectrumArrays, measure
    from simbench.measure.config import DetectorConfig, ExposureConfig, Physics, SourceConfig
    from simbench.measure.noise import rng_for

    spectrum = SpectrumArrays(np.linspace(30.0, 90.0, 13), np.linspace(2.0, 1.0, 13))
    lengths = np.zeros((1, 200, 200))
    var = {}
    for sigma in (0.0, 40.0):
        phys = Physics(SourceConfig("file"), ExposureConfig(air_counts=1e4),
                       DetectorConfig(electronic_noise=sigma))
        m = measure(lengths, np.zeros((1, 13)), phys, spectrum=spectrum, pitch_mm=(1.0, 1.0),
                    rng=rng_for(3, "electronic", sigma), dtype=np.float64)
        var[sigma] = float(np.var(m.counts))
    assert var[40.0] - var[0.0] == pytest.approx(40.0**2, rel=0.05)
