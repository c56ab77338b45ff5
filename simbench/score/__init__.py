"""Scoring: metrics of a reconstruction against the exact truth.

Every metric takes arrays (the image, the truth on the same grid, a ROI label map or masks,
and the grid where positions in mm are needed) and knows nothing of how the image was made.
Formulas, units and sources: docs/metrics.md and each function's docstring.

Public API
----------
pixel errors      rmse, nrmse, mae, psnr, ssim, ssim_map
ROIs              hounsfield, roi_statistics, RoiStatistics, cnr, uniformity, cupping,
                  disc_mask, annulus_mask
resolution        ttf_circular_insert, mtf_wire, frequency_at, TransferFunction
noise             noise_power_spectrum, NoisePowerSpectrum, radial_average, square_roi,
                  noise_std, ensemble_noise_std
detectability     npw_detectability, DiscTask
artifacts         streak_index, projection_rmse
realizations      mean_confidence_interval, Estimate
"""

from simbench.score.detectability import DiscTask, npw_detectability
from simbench.score.noise import (NoisePowerSpectrum, ensemble_noise_std, noise_power_spectrum,
                                  noise_std, radial_average, square_roi)
from simbench.score.pixels import mae, nrmse, psnr, rmse, ssim, ssim_map
from simbench.score.resolution import (TransferFunction, frequency_at, mtf_wire,
                                       ttf_circular_insert)
from simbench.score.rois import (RoiStatistics, annulus_mask, cnr, cupping, disc_mask,
                                 hounsfield, roi_statistics, uniformity)
from simbench.score.statistics import Estimate, mean_confidence_interval
from simbench.score.streaks import projection_rmse, streak_index

__all__ = [
    "rmse", "nrmse", "mae", "psnr", "ssim", "ssim_map",
    "hounsfield", "roi_statistics", "RoiStatistics", "cnr", "uniformity", "cupping",
    "disc_mask", "annulus_mask",
    "ttf_circular_insert", "mtf_wire", "frequency_at", "TransferFunction",
    "noise_power_spectrum", "NoisePowerSpectrum", "radial_average", "square_roi", "noise_std",
    "ensemble_noise_std",
    "npw_detectability", "DiscTask",
    "streak_index", "projection_rmse",
    "mean_confidence_interval", "Estimate",
]
