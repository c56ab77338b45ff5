"""Every bad input to a metric is one clear InputError line; the package stays low in the layers."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from simbench.errors import InputError
from simbench.geometry.grid import ImageGrid
from simbench.score import (DiscTask, annulus_mask, cnr, cupping, disc_mask, ensemble_noise_std,
                            frequency_at, hounsfield, mae, mean_confidence_interval, mtf_wire,
                            noise_power_spectrum, noise_std, npw_detectability, nrmse,
                            projection_rmse, psnr, radial_average, rmse, roi_statistics,
                            square_roi, ssim, streak_index, ttf_circular_insert, uniformity)

A = np.ones((16, 16))
B = np.arange(256.0).reshape(16, 16)
G = ImageGrid.square_2d(16, 1.0)
LABELS = np.zeros((16, 16), np.int32)
LABELS[2:6, 2:6] = 1
LABELS[8:12, 8:12] = 2
NAN = B.copy()
NAN[3, 3] = np.nan
NPS = noise_power_spectrum(np.random.default_rng(0).normal(size=(2, 8, 8)), (1.0, 1.0))

CASES = [
    ("rmse", lambda: rmse(A, np.ones((16, 15))), "differs from image's"),
    ("rmse", lambda: rmse(A, NAN), "NaN or infinite"),
    ("rmse", lambda: rmse("image", A), "real-valued numeric array"),
    ("rmse", lambda: rmse(np.ones(5), np.ones(5)), "1 dimensions"),
    ("rmse", lambda: rmse(A, B, mask=np.zeros((16, 16), bool)), "has no pixels"),
    ("mae", lambda: mae(A, B, mask=np.ones((16, 16))), "boolean array"),
    ("nrmse", lambda: nrmse(B, A), "no data range"),
    ("psnr", lambda: psnr(B, A, data_range=-1.0), "must be > 0"),
    ("ssim", lambda: ssim(np.ones((8, 30)), np.arange(240.0).reshape(8, 30)), "11-pixel"),
    ("ssim", lambda: ssim(B, B + 1, mask=np.indices((16, 16))[0] == 0), "border"),
    ("hounsfield", lambda: hounsfield(0.02, 0.02, 0.03), "0 <= mu_air < mu_water"),
    ("hounsfield", lambda: hounsfield(0.02, -1.0, 0.0), "must be > 0"),
    ("roi_statistics", lambda: roi_statistics(A, LABELS.astype(float)), "integer label map"),
    ("roi_statistics", lambda: roi_statistics(A, LABELS, mu_water=0.02), "mu_air: is missing"),
    ("cnr", lambda: cnr(A, 5, 2, LABELS), "label 5 has no pixels"),
    ("cnr", lambda: cnr(A, 1, 2), "no label map"),
    ("cnr", lambda: cnr(A, 0, 2, LABELS), "background"),
    ("cnr", lambda: cnr(A, True, 2, LABELS), "ROI label"),
    ("cnr", lambda: cnr(A, 1, LABELS == 3, LABELS), "has no pixels"),
    ("uniformity", lambda: uniformity(A, 1, [], 0.02, 0.0, LABELS), "is empty"),
    ("cupping", lambda: cupping(-A, 1, [2], LABELS), "not > 0"),
    ("disc_mask", lambda: disc_mask(G, (0, 0), 0.0), "radius_mm: must be > 0"),
    ("disc_mask", lambda: disc_mask("grid", (0, 0), 1.0), "ImageGrid"),
    ("annulus_mask", lambda: annulus_mask(G, (0, 0), 3.0, 2.0), "inner_mm < outer_mm"),
    ("annulus_mask", lambda: annulus_mask(G, (0,), 1.0, 2.0), "(x, y) point"),
    ("ttf_circular_insert", lambda: ttf_circular_insert(A, G, (0, 0), 6.0), "leaves the image"),
    ("ttf_circular_insert", lambda: ttf_circular_insert(np.ones((3, 16, 16)), G, (0, 0), 2.0),
     "2-D"),
    ("ttf_circular_insert", lambda: ttf_circular_insert(np.ones((16, 17)), G, (0, 0), 2.0),
     "x-y plane"),
    ("ttf_circular_insert", lambda: ttf_circular_insert(A, G, (0, 0), 3.0), "no edge"),
    ("ttf_circular_insert", lambda: ttf_circular_insert(B, G, (0, 0), 3.0, window="box"),
     "'hann'"),
    ("ttf_circular_insert", lambda: ttf_circular_insert(B, G, (0, 0), 3.0, bin_fraction=2),
     "bin_fraction"),
    ("mtf_wire", lambda: mtf_wire(A, G, (7.0, 0.0)), "leaves the image"),
    ("mtf_wire", lambda: mtf_wire(A, G, (0.0, 0.0), half_size_mm=4.0), "no wire"),
    ("frequency_at", lambda: frequency_at([0, 1], [1, 0.5], 1.5), "0 < level < 1"),
    ("noise_power_spectrum", lambda: noise_power_spectrum(A, (1, 1)), "3-D"),
    ("noise_power_spectrum", lambda: noise_power_spectrum(np.ones((1, 16, 16)), (1, 1),
                                                          "ensemble"), "n >= 2"),
    ("noise_power_spectrum", lambda: noise_power_spectrum(np.ones((2, 16, 16)), (1, 1), "cubic"),
     "mean, plane, ensemble"),
    ("noise_power_spectrum", lambda: noise_power_spectrum(np.ones((2, 16, 16)), 1.0),
     "(dx, dy)"),
    ("noise_power_spectrum", lambda: noise_power_spectrum(np.ones((2, 3, 16)), (1, 1)),
     "at least 4 x 4"),
    ("radial_average", lambda: radial_average(A, np.arange(15.0), np.arange(16.0)),
     "does not match"),
    ("square_roi", lambda: square_roi(G, (7.0, 0.0), 8), "leaves the grid along x"),
    ("square_roi", lambda: square_roi(G, (0.0, 0.0), 2), "integer >= 4"),
    ("noise_std", lambda: noise_std(A, LABELS == 3), "has no pixels"),
    ("noise_std", lambda: noise_std(A, np.indices((16, 16))[0] + np.indices((16, 16))[1] == 0),
     "one pixel"),
    ("ensemble_noise_std", lambda: ensemble_noise_std(np.ones((1, 4, 4))), "n >= 2"),
    ("DiscTask", lambda: DiscTask(0.0, 1.0), "diameter_mm"),
    ("DiscTask", lambda: DiscTask(1.0, 0.0), "nonzero contrast"),
    ("npw_detectability", lambda: npw_detectability(DiscTask(1.0, 1.0), A), "NoisePowerSpectrum"),
    ("npw_detectability", lambda: npw_detectability("disc", NPS), "task function"),
    ("npw_detectability", lambda: npw_detectability(lambda fx, fy: fx, NPS), "shape"),
    ("npw_detectability", lambda: npw_detectability(DiscTask(1.0, 1.0), NPS, ttf=1.0),
     "TransferFunction"),
    ("streak_index", lambda: streak_index(A, B, LABELS == 1, reference=3, labels=LABELS),
     "label 3 has no pixels"),
    ("projection_rmse", lambda: projection_rmse(np.ones((4, 5)), np.ones((4, 6))), "differs"),
    ("mean_confidence_interval", lambda: mean_confidence_interval([]), "empty"),
    ("mean_confidence_interval", lambda: mean_confidence_interval([1.0, 2.0], 95), "level"),
    ("mean_confidence_interval", lambda: mean_confidence_interval([1.0, np.inf]), "NaN"),
]


@pytest.mark.parametrize("function,call,words", CASES, ids=[f"{c[0]}-{i}" for i, c in
                                                             enumerate(CASES)])
def test_bad_input_is_one_clear_line(function, call, words):
    with pytest.raises(InputError) as raised:
        call()
    text = str(raised.value)
    assert "\n" not in text
    assert text.startswith(f"{function}(): ")
    assert words in text


def test_score_imports_nothing_above_it():
    # the layering of DEVELOPERS.md: score knows nothing of how an image was made
    code = ("import sys, simbench.score; bad = [m for m in sys.modules if m.split('.')[:2] in "
            "(['simbench','recon'], ['simbench','execute'], ['simbench','cli'], "
            "['simbench','report'], ['simbench','measure'], ['simbench','trace'])]; print(bad)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
