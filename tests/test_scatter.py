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
    ("model: centre\nspr_at_centre: -0.1", "-0.1 is too small"),
    ("model: centre\nspr_at_centre: 0.1\nmax_spr: 0.3", "does not apply"),
    ("model: centre\nspr_at_centre: 0.1\nkernel_width: 0 mm", "0 mm is too small"),
    ("model: centre\nspr_at_centre: 0.1\ngrid_transmission: 1.5", "1.5 is too large"),
])
def test_bad_scatter(text, needle):
    with pytest.raises(InputError) as err:
        parse_scatter(_section(text))
    assert needle in str(err.value) and "\n" not in str(err.value)


# --------------------------------------------------------------------------------------------
# Scatter comes only from what the object removes; the reported SPR is the requested one
# --------------------------------------------------------------------------------------------

CYLINDER = """\
name: water cylinder
dimension: 2
objects:
  - {shape: circle, radius: 100, material: water}
"""

WIDE_FAN = """\
name: fan beam wider than the object
geometry:
  type: fan
  sid: 500 mm
  sdd: 1000 mm
  columns: 300
  column_pitch: 2 mm
  views: 12
source:
  SOURCE
exposure:
  air_counts: 1.0e5
scatter:
  model: centre
  spr_at_centre: 0.2
  kernel_width: 120 mm
"""


def _fan_scan(source: str, extra: str = ""):
    from simbench.phantom import parse_phantom_text
    from simbench.scanner import parse_scanner_text
    from simbench.trace import trace

    phantom = parse_phantom_text(CYLINDER, "cylinder.yaml")
    scanner = parse_scanner_text(WIDE_FAN.replace("SOURCE", source) + extra, "fan.yaml")
    poses = scanner.geometry.poses()
    lengths = trace(phantom, poses)
    m = measure(lengths, phantom.materials, scanner.physics, poses=poses,
                spectrum=scanner.spectrum(), noise=False, dtype=np.float64)
    return lengths, m


@pytest.mark.parametrize("source", [
    "energy: 60 keV",
    "kvp: 120\n  filtration:\n    - {material: aluminium, thickness: 3 mm}",
])
def test_centre_scatter_leaves_the_air_beside_the_object_near_zero(source):
    # A 200 mm water cylinder in a fan beam (magnification 2: a 400 mm shadow on a 600 mm
    # detector, 96 air cells per view), SPR 0.2 at the central cell, kernel FWHM 120 mm.
    # Measured here: the air cells read at most 0.0051 (60 keV) and 0.0049 (120 kV) from
    # zero, the reported SPR is 0.2 to 1e-15; the former model, which blurred the whole
    # primary, read -0.14 in the air. Acceptance: within 0.01 of zero (the task's figure).
    lengths, m = _fan_scan(source)
    air = lengths[0] == 0
    assert air.sum() == 12 * 96  # 2 x 48 cells per view beside the shadow (geometry above)
    assert np.abs(m.projections[air]).max() < 0.01
    record = m.metadata["scatter"]
    # the requested SPR, reported back as the quantity asked for, within 2 % (the task's
    # tolerance); grid transmission 1
    assert record["spr_at_central_cell"] == pytest.approx(0.2, rel=0.02)
    assert record["spr_at_centre_requested"] == 0.2
    assert record["views_short_of_requested_spr"] == 0
    lo, hi = record["spr_at_central_cell_range"]
    assert lo == pytest.approx(0.2, rel=0.02) and hi == pytest.approx(0.2, rel=0.02)


def test_centre_source_is_the_once_scattered_photons_of_each_ray():
    from simbench.measure.scatter import scatter_source

    # s = P ln(P_air / P) = P_air tau exp(-tau) (closed form of the model); an open ray
    # (tau = 0) and a ray with no primary left have no source
    air = 1000.0
    tau = np.array([0.0, 0.5, 1.0, 3.0])
    p = np.append(air * np.exp(-tau), 0.0)
    s = scatter_source(p[None, None, :], p[None, :], air,
                       ScatterConfig(model="centre", spr_at_centre=0.1), 0.02)
    assert s[0, 0, :4] == pytest.approx(air * tau * np.exp(-tau), rel=1e-12)
    assert s[0, 0, 0] == 0.0 and s[0, 0, 4] == 0.0


def test_open_views_get_no_scatter_and_thin_objects_are_capped():
    # Nothing in the beam: no scatter at all (exactly). A 2 mm water rod asked for SPR 5 at
    # the centre would need more scattered photons than it removes: capped, counted, warned.
    from simbench.errors import InputWarning

    config = ScatterConfig(model="centre", spr_at_centre=5.0, kernel_fwhm_mm=50.0)
    phys = Physics(MONO60, ExposureConfig(air_counts=1e5), scatter=config)
    empty = measure(np.zeros((1, 3, 64)), _water(), phys, noise=False, dtype=np.float64)
    assert np.array_equal(empty.counts, np.full((3, 64), 1e5))
    rod = _cylinder(n_views=3, n_cols=64, radius_mm=1.0)
    with pytest.warns(InputWarning, match="more scattered photons than the object removes"):
        m = measure(rod, _water(), phys, noise=False, dtype=np.float64)
    assert m.metadata["scatter"]["views_short_of_requested_spr"] == 3
    primary = 1e5 * np.exp(-rod[0] * _mu_water_60())  # Beer-Lambert (closed form)
    removed = (1e5 - primary).sum(axis=1)
    scatter = m.counts - primary
    assert np.all(np.isfinite(m.projections))
    # total scatter of each view at most what the rod removes (the cap), to rounding
    assert np.all(scatter.sum(axis=1) <= removed * (1 + 1e-3))


def _mu_water_60():
    from simbench.materials import mu_table

    return mu_table(_water(), [60.0])[0, 0]


def test_object_off_the_central_ray_gives_finite_capped_scatter():
    from simbench.errors import InputWarning

    lengths = np.zeros((1, 2, 200))
    lengths[0, :, 150:180] = 100.0  # a slab far from the central cells
    config = ScatterConfig(model="centre", spr_at_centre=0.2, kernel_fwhm_mm=20.0)
    phys = Physics(MONO60, ExposureConfig(air_counts=1e5), scatter=config)
    with pytest.warns(InputWarning):
        m = measure(lengths, _water(), phys, noise=False, dtype=np.float64)
    assert np.all(np.isfinite(m.counts)) and np.all(np.isfinite(m.projections))
    assert m.counts.max() < 2e5  # at most the removed photons, spread by the kernel


def test_thickness_model_reports_spr_and_thickness_at_the_central_cell():
    config = ScatterConfig(model="thickness", max_spr=0.8, thickness_scale_mm=150.0,
                           kernel_fwhm_mm=50.0)
    phys = Physics(MONO60, ExposureConfig(air_counts=1e5), scatter=config)
    m = measure(np.full((1, 2, 64), 200.0), _water(), phys, noise=False, dtype=np.float64)
    record = m.metadata["scatter"]
    # uniform 200 mm slab, monochromatic: t_w = 200 mm and SPR = 0.8 (1 - exp(-200/150))
    # (closed form of the model)
    assert record["water_equivalent_thickness_at_central_cell_mm"] == pytest.approx(200.0,
                                                                                    rel=1e-9)
    assert record["spr_at_central_cell"] == pytest.approx(0.8 * -math.expm1(-200.0 / 150.0),
                                                          rel=1e-6)


def test_scatter_kernel_over_the_memory_budget_is_refused():
    from simbench.budget import set_memory_budget
    from simbench.scanner import parse_scanner_text

    # a 2000 mm kernel over 2 mm cells: 1274 cells of half-width, so its padded work arrays
    # of one projection need 64 B x (300 + 4 x 1274 + 1) = 345 KB; the budget here is 100 KB
    text = WIDE_FAN.replace("SOURCE", "energy: 60 keV").replace("120 mm", "2000 mm")
    previous = set_memory_budget(100_000)
    try:
        with pytest.raises(InputError, match="scatter kernel") as err:
            parse_scanner_text(text, "fan.yaml")
    finally:
        set_memory_budget(previous)
    assert str(err.value).startswith("fan.yaml:16:")  # kernel_width's line (by hand)
    assert "kernel_width" in str(err.value)
