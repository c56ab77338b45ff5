"""Scatter kernels: requested SPR, growth with thickness, anti-scatter grid, scatter inputs."""

from __future__ import annotations

import math

import numpy as np
import pytest

from simbench.errors import InputError
from simbench.measure import measure
from simbench.measure.config import (
    ExposureConfig,
    Physics,
    ScatterConfig,
    SourceConfig,
    parse_scatter,
)
from simbench.spec import Section, parse_yaml_text

MONO60 = SourceConfig("monochromatic", energy_kev=60.0)


def _water():
    from simbench.materials import get_material

    return [get_material("water")]


def _cylinder(n_views=8, n_cols=201, radius_mm=150.0, pitch=1.0):
    t = (np.arange(n_cols) - (n_cols - 1) / 2.0) * pitch
    chord = 2.0 * np.sqrt(np.clip(radius_mm ** 2 - t ** 2, 0.0, None))
    return np.broadcast_to(chord, (n_views, n_cols))[None].copy()


def _spr(lengths, scatter, **kw):
    base = Physics(MONO60, ExposureConfig(air_counts=1e5))
    with_s = Physics(MONO60, ExposureConfig(air_counts=1e5), scatter=scatter)
    p = measure(lengths, _water(), base, noise=False, dtype=np.float64, **kw).counts
    s = measure(lengths, _water(), with_s, noise=False, dtype=np.float64, **kw).counts
    return (s - p) / p, s, p


@pytest.mark.parametrize("spr", [0.05, 0.3, 1.5])
def test_requested_spr_at_centre_is_reproduced(spr):
    # The centre model scales scatter so that S / P at the central cell is the requested SPR
    # (within 2 %, the brief's tolerance).
    lengths = _cylinder(n_cols=200)  # even: the centre is the mean of the two middle cells
    ratio, _, _ = _spr(lengths, ScatterConfig(model="centre", spr_at_centre=spr,
                                               kernel_fwhm_mm=120.0), pitch_mm=(1.0, 1.0))
    centre = ratio[:, 99:101].mean(axis=1)
    assert centre == pytest.approx(np.full(centre.shape, spr), rel=0.02)


def test_requested_spr_in_a_cone_beam_projection():
    lengths = np.broadcast_to(_cylinder(n_views=3, n_cols=101)[:, :, None, :],
                              (1, 3, 21, 101)).copy()
    ratio, _, _ = _spr(lengths, ScatterConfig(model="centre", spr_at_centre=0.4,
                                               kernel_fwhm_mm=60.0), pitch_mm=(1.0, 1.0))
    assert ratio[:, 10, 50] == pytest.approx(np.full(3, 0.4), rel=0.02)  # as above, 2 %


def test_thickness_model_matches_closed_form_behind_a_uniform_slab():
    # Behind a uniform slab S / P = SPR_max (1 - exp(-t / t0)) (closed form of the model);
    # monochromatic, so the water-equivalent thickness is the thickness itself.
    config = ScatterConfig(model="thickness", max_spr=0.8, thickness_scale_mm=150.0,
                           kernel_fwhm_mm=50.0)
    ratios = []
    for thickness in (50.0, 100.0, 200.0, 400.0):
        ratio, _, _ = _spr(np.full((1, 2, 64), thickness), config, pitch_mm=(1.0, 1.0))
        expected = 0.8 * (1.0 - math.exp(-thickness / 150.0))
        # a normalised kernel keeps a uniform field uniform: only rounding (common practice)
        assert ratio == pytest.approx(np.full(ratio.shape, expected), rel=1e-6)
        ratios.append(ratio.mean())
    assert np.all(np.diff(ratios) > 0)


def test_grid_scales_scatter_and_scatter_cups_the_projection():
    lengths = _cylinder()
    no_grid = ScatterConfig(model="centre", spr_at_centre=0.5, kernel_fwhm_mm=100.0)
    grid = ScatterConfig(model="centre", spr_at_centre=0.5, kernel_fwhm_mm=100.0,
                         grid_transmission=0.2)
    r1, _, _ = _spr(lengths, no_grid, pitch_mm=(1.0, 1.0))
    r2, _, _ = _spr(lengths, grid, pitch_mm=(1.0, 1.0))
    assert r2 == pytest.approx(0.2 * r1, rel=1e-12)  # the grid scales scatter linearly
    # scatter lowers the measured line integral by ln(1 + SPR), most behind the thickest part
    # (cupping, fact of the trade)
    from simbench.materials import mu_table

    phys = Physics(MONO60, ExposureConfig(air_counts=1e5), scatter=no_grid)
    with_s = measure(lengths, _water(), phys, noise=False, dtype=np.float64).projections
    truth = mu_table(_water(), [60.0])[0, 0] * lengths[0]
    deficit = truth - with_s
    # ln(flat / (P + S)) = ln(flat / P) - ln(1 + S / P) (closed form); float64 rounding
    assert deficit == pytest.approx(np.log1p(r1), rel=1e-9, abs=1e-12)
    assert deficit[0, 100] > deficit[0, 30] > deficit[0, 5] > 0


def _section(text: str) -> Section:
    return Section.root(parse_yaml_text(text, "scanner.yaml"), "scanner.yaml")


def test_parse_scatter():
    cfg = parse_scatter(_section("model: thickness\nmax_spr: 0.6\nthickness_scale: 20 cm\n"
                                 "kernel_width: 150 mm\ngrid_transmission: 0.3"))
    assert cfg.thickness_scale_mm == 200.0 and cfg.kernel_fwhm_mm == 150.0  # 20 cm = 200 mm
    assert parse_scatter(_section("model: none")).model == "none"


@pytest.mark.parametrize("text, needle", [
    ("model: monte-carlo", "is not known"),
    ("model: centre", "needs 'spr_at_centre'"),
    ("model: thickness\nmax_spr: 0.5", "needs 'thickness_scale'"),
    ("model: centre\nspr_at_centre: -0.1", "must be >= 0"),
    ("model: centre\nspr_at_centre: 0.1\nmax_spr: 0.3", "does not apply"),
    ("model: centre\nspr_at_centre: 0.1\nkernel_width: 0 mm", "must be > 0"),
    ("model: centre\nspr_at_centre: 0.1\ngrid_transmission: 1.5", "must be <= 1"),
])
def test_bad_scatter(text, needle):
    with pytest.raises(InputError) as err:
        parse_scatter(_section(text))
    assert needle in str(err.value) and "\n" not in str(err.value)
