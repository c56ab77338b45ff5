"""Properties of the tracer: invariances, composition rules, divergent geometries, sub-rays,
chunking, thread independence and input checks."""

from __future__ import annotations

import numba
import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from trace_builders import (
    divergent_poses, line_poses, obj, parallel_poses, phantom_of, planar_lines, random_lines,
    random_rotation, rot_z, rotated_poses,
)
from simbench.errors import InputError
from simbench.geometry.poses import Poses
from simbench.geometry.rays import cell_rays
from simbench.trace import edge_truncation, iter_trace, line_integrals, trace

SETTINGS = settings(max_examples=25, deadline=None)
# Tolerances below (atol 1e-12 to 1e-9 mm on chords of up to ~100 mm, at coordinates of up to
# ~600 mm): float64 rounding of exact path lengths with margin (common practice).
seeds = st.integers(0, 2**32 - 1)
KINDS_3D = ("ellipsoid", "box", "cylinder", "cone")
KINDS_2D = ("ellipse", "rectangle", "polygon")


def random_items(rng, n, kinds, n_materials=3, spread=30.0, modes=("replace", "add")):
    items = []
    for _ in range(n):
        kind = kinds[rng.integers(len(kinds))]
        centre = rng.uniform(-spread, spread, 3)
        if kind in KINDS_2D:
            centre[2] = 0.0
            rot = rot_z(rng.uniform(0, 2 * np.pi))
        else:
            rot = random_rotation(rng)
        hs = tuple(rng.uniform(3.0, 20.0, 3))
        extra = {}
        if kind == "cone":
            extra["radii"] = tuple(rng.uniform(0.0, 15.0, 2) + [1.0, 0.0])
        if kind == "polygon":
            ang = np.sort(rng.uniform(0, 2 * np.pi, 7))
            rad = rng.uniform(4.0, 18.0, 7)
            extra["vertices"] = np.stack([rad * np.cos(ang), rad * np.sin(ang)], axis=1)
        items.append(obj(kind, centre=tuple(centre), half_sizes=hs, rotation=rot,
                         mode=modes[rng.integers(len(modes))],
                         material=int(rng.integers(n_materials)), **extra))
    return items


def moved(items, shift=(0.0, 0.0, 0.0), turn=None):
    """The items translated by ``shift`` and/or turned rigidly by world rotation ``turn``."""
    out = []
    for it in items:
        it = dict(it)
        c = np.asarray(it["centre"], float)
        if turn is not None:
            c = turn @ c
            it["rotation"] = it["rotation"] @ turn.T
        it["centre"] = tuple(c + np.asarray(shift))
        out.append(it)
    return out


# ------------------------------------------------------------------------ invariances


@SETTINGS
@given(seed=seeds, two_d=st.booleans())
def test_translation_shifts_parallel_projections(seed, two_d):
    rng = np.random.default_rng(seed)
    kinds = KINDS_2D if two_d else KINDS_3D
    items = random_items(rng, 4, kinds)
    shift = rng.uniform(-10, 10, 3)
    if two_d:
        shift[2] = 0.0
    angles = rng.uniform(0, 2 * np.pi, 3)
    rows = 1 if two_d else 5
    base = phantom_of(items, 3, 2 if two_d else 3)
    moved_ph = phantom_of(moved(items, shift), 3, 2 if two_d else 3)
    for a in angles:
        poses = parallel_poses([a], 64, 1.3, n_rows=rows, pitch_v=4.0)
        u = np.array([np.cos(a), np.sin(a), 0.0])
        # p_T(phi, u + T.u, v + T_z) = p(phi, u, v)  (definition of the parallel projection)
        shifted = parallel_poses([a], 64, 1.3, n_rows=rows, pitch_v=4.0,
                                 offset_u=float(shift @ u))
        if not two_d:
            shifted = Poses(**{**shifted.__dict__, "row_v_mm": shifted.row_v_mm + shift[2]})
        np.testing.assert_allclose(trace(moved_ph, shifted), trace(base, poses), rtol=0,
                                   atol=1e-9)


@SETTINGS
@given(seed=seeds, alpha=st.floats(-np.pi, np.pi), parallel=st.booleans())
def test_start_angle_rotates_projections(seed, alpha, parallel):
    # turning the phantom by alpha about z and starting the views alpha later gives the
    # same projections (rotation invariance of the circular geometry)
    rng = np.random.default_rng(seed)
    items = random_items(rng, 4, KINDS_3D + KINDS_2D)
    angles = np.linspace(0, 2 * np.pi, 5, endpoint=False)
    turn = rot_z(alpha).T  # world rotation by +alpha
    ph, ph_turned = phantom_of(items, 3), phantom_of(moved(items, turn=turn), 3)
    if parallel:
        p0 = trace(ph, parallel_poses(angles, 50, 1.5, n_rows=4, pitch_v=5.0))
        p1 = trace(ph_turned, parallel_poses(angles + alpha, 50, 1.5, n_rows=4, pitch_v=5.0))
    else:
        p0 = trace(ph, divergent_poses(angles, 300, 600, 50, 3.0, n_rows=4, pitch_v=8.0))
        p1 = trace(ph_turned, divergent_poses(angles + alpha, 300, 600, 50, 3.0, n_rows=4,
                                              pitch_v=8.0))
    np.testing.assert_allclose(p1, p0, rtol=0, atol=1e-9)


@SETTINGS
@given(seed=seeds, kind=st.sampled_from(["parallel", "flat", "curved"]))
def test_rigid_motion_of_scanner_and_phantom_changes_nothing(seed, kind):
    # turns the detector out of the horizontal plane: exercises the general culling windows
    rng = np.random.default_rng(seed)
    items = random_items(rng, 5, KINDS_3D)
    angles = np.linspace(0, 2 * np.pi, 4, endpoint=False)
    if kind == "parallel":
        poses = parallel_poses(angles, 40, 2.0, n_rows=6, pitch_v=6.0)
    else:
        poses = divergent_poses(angles, 250, 500, 40, 4.0, n_rows=6, pitch_v=12.0,
                                curved=kind == "curved")
    turn = random_rotation(rng)
    p0 = trace(phantom_of(items, 3), poses)
    p1 = trace(phantom_of(moved(items, turn=turn), 3), rotated_poses(poses, turn))
    np.testing.assert_allclose(p1, p0, rtol=0, atol=1e-9)


# ------------------------------------------------------------------------ composition


def composed_reference(items, o, d, mu):
    """Sphere chords [t_m - h, t_m + h] (closed form); the ray cut at every breakpoint; each
    piece takes the mu of the last replace sphere covering its midpoint plus the add
    spheres after it (the rule in compiled.py)."""
    out = np.zeros(o.shape[0])
    for r in range(o.shape[0]):
        spans = []
        for it in items:
            c = np.asarray(it["centre"])
            rad = it["half_sizes"][0]
            tm = (c - o[r]) @ d[r]
            h2 = rad ** 2 - np.sum(np.cross(c - o[r], d[r]) ** 2)
            spans.append((tm - np.sqrt(h2), tm + np.sqrt(h2)) if h2 > 0 else (0.0, 0.0))
        ts = np.unique(np.ravel(spans))
        for a, b in zip(ts[:-1], ts[1:]):
            m = 0.5 * (a + b)
            value = 0.0
            for it, (s0, s1) in zip(items, spans):
                if s0 < m < s1:
                    value = mu[it["material"]] if it["mode"] == 0 else value + mu[it["material"]]
            out[r] += value * (b - a)
    return out


@SETTINGS
@given(seed=seeds)
def test_composition_matches_breakpoint_reference(seed):
    rng = np.random.default_rng(seed)
    items = []
    for _ in range(6):
        r = rng.uniform(5, 25)
        items.append(obj("ellipsoid", centre=tuple(rng.uniform(-20, 20, 3)),
                         half_sizes=(r, r, r), mode=["replace", "add"][rng.integers(2)],
                         material=int(rng.integers(4))))
    mu = np.array([0.02, 0.05, -0.01, 0.1])
    o, d = random_lines(rng, (0.0, 0.0, 0.0), 40.0, n=40)
    got = line_integrals(trace(phantom_of(items, 4), line_poses(o, d)), mu)[:, 0, 0]
    np.testing.assert_allclose(got, composed_reference(items, o, d, mu), rtol=0, atol=1e-10)


@SETTINGS
@given(seed=seeds)
def test_add_of_two_objects_is_the_sum(seed):
    rng = np.random.default_rng(seed)
    a, b = random_items(rng, 2, KINDS_3D + KINDS_2D, modes=("add",))
    a["material"], b["material"] = 0, 1
    poses = divergent_poses(np.linspace(0, np.pi, 3), 200, 400, 40, 3.0, n_rows=5,
                            pitch_v=10.0)
    both = trace(phantom_of([a, b], 2), poses)
    np.testing.assert_allclose(both[0], trace(phantom_of([a], 2), poses)[0], atol=1e-12)
    np.testing.assert_allclose(both[1], trace(phantom_of([b], 2), poses)[1], atol=1e-12)
    b["material"] = 0
    same = trace(phantom_of([a, b], 2), poses)[0]
    np.testing.assert_allclose(same, both[0] + both[1], rtol=0, atol=1e-10)


@SETTINGS
@given(seed=seeds, mu_a=st.floats(0.0, 0.1), mu_b=st.floats(0.0, 0.1))
def test_replace_equals_add_with_difference(seed, mu_a, mu_b):
    # for B inside A: replace B (mu_B) == add B with mu_B - mu_A (compiled.py composition)
    rng = np.random.default_rng(seed)
    host = obj("ellipsoid", half_sizes=(40.0, 30.0, 35.0), rotation=random_rotation(rng))
    r = rng.uniform(2, 12)
    inner_c = tuple(rng.uniform(-8, 8, 3))
    inner = dict(kind="box", centre=inner_c, half_sizes=(r, r / 2, r / 3),
                 rotation=random_rotation(rng))
    poses = parallel_poses(np.linspace(0, np.pi, 4), 60, 1.5, n_rows=8, pitch_v=9.0)
    rep = phantom_of([host, obj(**inner, mode="replace", material=1)], 2)
    add = phantom_of([host, obj(**inner, mode="add", material=1)], 2)
    p_rep = line_integrals(trace(rep, poses), [mu_a, mu_b])
    p_add = line_integrals(trace(add, poses), [mu_a, mu_b - mu_a])
    np.testing.assert_allclose(p_rep, p_add, rtol=0, atol=1e-10)


@SETTINGS
@given(seed=seeds)
def test_nonnegative_mu_gives_nonnegative_projections_and_misses_give_zero(seed):
    rng = np.random.default_rng(seed)
    items = random_items(rng, 6, KINDS_3D + KINDS_2D, n_materials=3)
    poses = divergent_poses(np.linspace(0, 2 * np.pi, 4), 300, 600, 40, 4.0, n_rows=5,
                            pitch_v=12.0)
    lengths = trace(phantom_of(items, 3), poses)
    assert np.all(lengths >= 0)
    assert np.all(line_integrals(lengths, rng.uniform(0, 0.1, 3)) >= 0)
    # rays far outside every bounding sphere of the 3-D objects: exactly zero
    solids = [it for it in items if it["kind"] in KINDS_3D]
    o, d = planar_lines(rng, (0.0, 0.0, 500.0), 40.0, n=8)  # whole lines in z = 500
    assert np.all(trace(phantom_of(solids, 3), line_poses(o, d)) == 0.0)
    assert np.all(trace(phantom_of([], 2), poses) == 0.0)


# --------------------------------------------------------- fan and cone through a sphere


@pytest.mark.parametrize("curved", [False, True])
@pytest.mark.parametrize("rows", [1, 24])
@pytest.mark.parametrize("centre", [(0.0, 0.0, 0.0), (30.0, -20.0, 15.0)])
def test_divergent_rays_through_a_sphere(curved, rows, centre):
    radius, mu = 60.0, 0.019
    phantom = phantom_of([obj("ellipsoid", centre=centre, half_sizes=(radius,) * 3)], 1)
    poses = divergent_poses(np.linspace(0, 2 * np.pi, 16, endpoint=False), 400.0, 800.0, 96,
                            2.6 if not curved else 2.7, n_rows=rows, pitch_v=6.0,
                            curved=curved, offset_u=1.3)
    p = line_integrals(trace(phantom, poses), [mu])
    rays = cell_rays(poses)
    w = np.asarray(centre) - rays[..., :3]
    dist = np.linalg.norm(np.cross(w, rays[..., 3:6]), axis=-1)
    # closed form: 2 mu sqrt(R^2 - d^2), d the ray's distance to the centre
    want = 2 * mu * np.sqrt(np.clip(radius ** 2 - dist ** 2, 0, None))
    want = want[:, 0] if rows == 1 else want
    assert p.shape == want.shape
    assert want.max() > 2.0  # not vacuous: the central chord is 2 x 0.019 x 60 = 2.28
    np.testing.assert_allclose(p, want, rtol=0, atol=1e-10 * 2 * mu * radius)


# --------------------------------------------------------------------------- sub-rays


@pytest.mark.parametrize("kind", ["parallel", "flat", "curved"])
def test_cell_and_spot_samples_equal_shifted_rays(kind):
    rng = np.random.default_rng(11)
    ph = phantom_of(random_items(rng, 5, KINDS_3D + KINDS_2D), 3)
    angles = np.linspace(0, 2 * np.pi, 3, endpoint=False)
    cells = np.array([[-0.4, -0.3], [0.4, 0.2], [0.0, 0.0]])
    spots = np.array([[-0.6, 0.3], [0.5, -0.4]])

    def poses(du=0.0, dv=0.0, su=0.0, sv=0.0):
        if kind == "parallel":
            p = parallel_poses(angles, 30, 2.5, n_rows=4, pitch_v=10.0, offset_u=du)
        else:
            p = divergent_poses(angles, 200, 400, 30, 5.0, n_rows=4, pitch_v=20.0,
                                curved=kind == "curved", offset_u=du)
        src = p.source + su * p.u_axis + sv * p.v_axis
        return Poses(**{**p.__dict__, "row_v_mm": p.row_v_mm + dv, "source": src})

    spot_arg = None if kind == "parallel" else spots
    sub = trace(ph, poses(), cell_samples=cells, spot_samples=spot_arg)
    n_spot = 1 if spot_arg is None else len(spots)
    assert sub.shape == (3, 3, 4, 30, n_spot * len(cells))
    for f in range(n_spot):
        for s, (du, dv) in enumerate(cells):
            if kind == "curved" and spot_arg is not None:
                # reference: the detector point is fixed about the central source, the ray
                # leaves from the offset spot (rays.detector_ray)
                ref = _curved_spot_reference(ph, poses(du, dv), spots[f])
            else:
                su, sv = (0.0, 0.0) if spot_arg is None else spots[f]
                ref = trace(ph, poses(du, dv, su, sv))
            np.testing.assert_allclose(sub[..., f * len(cells) + s], ref, rtol=0, atol=1e-10)


def _curved_spot_reference(ph, p, spot):
    """Rays from the offset spot to the curved detector points, as explicit line segments."""
    rays = cell_rays(p)  # from the spot centre
    ends = rays[..., :3] + rays[..., 7:8] * rays[..., 3:6]
    start = p.source[:, None, None, :] + spot[0] * p.u_axis[:, None, None, :] + \
        spot[1] * p.v_axis[:, None, None, :]
    start = np.broadcast_to(start, ends.shape).reshape(-1, 3)
    vec = ends.reshape(-1, 3) - start
    seg = np.linalg.norm(vec, axis=1)
    out = trace(ph, line_poses(start, vec / seg[:, None], seg))[:, :, 0, 0]
    return out.reshape((out.shape[0],) + ends.shape[:3])


# ------------------------------------------------------- chunks, views, threads, errors


def test_chunks_views_and_threads_give_the_same_bits():
    rng = np.random.default_rng(5)
    ph = phantom_of(random_items(rng, 8, KINDS_3D + KINDS_2D), 3)
    poses = divergent_poses(np.linspace(0, 2 * np.pi, 9, endpoint=False), 300, 600, 33, 4.0,
                            n_rows=7, pitch_v=12.0)
    full = trace(ph, poses)
    assert np.array_equal(trace(ph, poses, chunk_views=2), full)
    views = np.array([7, 2, 4])
    assert np.array_equal(trace(ph, poses, views=views), full[:, views])
    chunks = list(iter_trace(ph, poses, chunk_views=4))
    assert [c[0].tolist() for c in chunks] == [[0, 1, 2, 3], [4, 5, 6, 7], [8]]
    assert np.array_equal(np.concatenate([c[1] for c in chunks], axis=1), full)
    before = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        one = trace(ph, poses)
    finally:
        numba.set_num_threads(before)
    assert np.array_equal(one, full)


def test_edge_truncation():
    ph = phantom_of([obj("ellipsoid", half_sizes=(50.0, 50.0, 50.0))], 1)
    angles = np.linspace(0, np.pi, 6, endpoint=False)
    # detector half width 20 mm < radius 50 mm: every view truncated
    assert edge_truncation(trace(ph, parallel_poses(angles, 21, 2.0))) == 1.0
    # detector half width 61 mm > radius 50 mm: no view truncated
    assert edge_truncation(trace(ph, parallel_poses(angles, 61, 2.0))) == 0.0
    # object off-centre: only the views whose edge column sees it (at phi = 0 the disc spans
    # u = 35..55 mm past the 50 mm edge column; at phi = 90 deg it is centred): 1 of 2 views
    off = phantom_of([obj("ellipsoid", centre=(45.0, 0.0, 0.0), half_sizes=(10.0,) * 3)], 1)
    lengths = trace(off, parallel_poses(np.array([0.0, np.pi / 2]), 101, 1.0))
    assert edge_truncation(lengths) == 0.5
    sub = trace(ph, parallel_poses(angles, 21, 2.0), cell_samples=[[0.0, 0.0], [0.5, 0.0]])
    assert edge_truncation(sub, sub_rays=True) == 1.0


def test_line_integrals_and_input_errors():
    ph = phantom_of([obj("ellipsoid", half_sizes=(10.0, 10.0, 10.0), material=1)], 2)
    poses = parallel_poses([0.0], 5, 4.0)
    lengths = trace(ph, poses)
    # central ray through a 10 mm sphere: chord 20 mm (closed form)
    assert lengths[1, 0, 2] == pytest.approx(20.0, abs=1e-12)
    # material 1 has mu 0.02 /mm: 0.02 x 20 = 0.4 (Beer-Lambert line integral)
    assert line_integrals(lengths, [0.5, 0.02])[0, 2] == pytest.approx(0.4, abs=1e-12)
    for bad, match in [([0.1], "materials"), ([0.1, np.nan], "NaN")]:
        with pytest.raises(InputError, match=match):
            line_integrals(lengths, bad)
    with pytest.raises(InputError, match="cell_samples"):
        trace(ph, poses, cell_samples=[0.1, 0.2, 0.3])
    with pytest.raises(InputError, match="parallel"):
        trace(ph, poses, spot_samples=[[0.0, 0.0]])
    with pytest.raises(InputError, match="views"):
        trace(ph, poses, views=[3])
    bad_mat = phantom_of([obj("ellipsoid", material=4)], 2)
    with pytest.raises(InputError, match="material"):
        trace(bad_mat, poses)
    for err in (InputError,):
        with pytest.raises(err) as info:
            trace(ph, poses, cell_samples=np.full((2, 2), np.inf))
        assert "\n" not in str(info.value)
    # a ray along the z axis of a 2-D shape would have infinite length: refused
    prism = phantom_of([obj("ellipse", half_sizes=(5.0, 5.0, 1.0))], 1, dimension=2)
    o = np.array([[0.0, 0.0, -10.0]])
    d = np.array([[0.0, 0.0, 1.0]])
    with pytest.raises(InputError, match="infinite"):
        trace(prism, line_poses(o, d))


@SETTINGS
@given(seeds)
def test_turn_about_the_axis_of_a_round_shape_changes_nothing(seed):
    # A sphere, a circular cylinder and a cone are symmetric about their local z axis
    # (closed form: the chord depends only on the distance to the axis and z), so a turn
    # about z must leave every path length unchanged; the tracer drops such turns. An
    # elliptic cylinder is not symmetric: its turned trace must differ (the turn is kept).
    rng = np.random.default_rng(seed)
    lines = random_lines(rng, np.zeros(3), 30.0)
    poses = line_poses(*lines)
    angle = rng.uniform(0.1, 2 * np.pi - 0.1)
    for kind, half, extra in (("ellipsoid", (12.0, 12.0, 12.0), {}),
                              ("cylinder", (10.0, 10.0, 25.0), {}),
                              ("cone", (0.0, 0.0, 20.0), {"radii": (4.0, 14.0)})):
        still = phantom_of([obj(kind, centre=(1.0, -2.0, 3.0), half_sizes=half, **extra)])
        turned = phantom_of([obj(kind, centre=(1.0, -2.0, 3.0), half_sizes=half,
                                 rotation=rot_z(angle), **extra)])
        np.testing.assert_allclose(trace(turned, poses), trace(still, poses), atol=1e-10)
    flat = phantom_of([obj("cylinder", half_sizes=(20.0, 5.0, 25.0))])
    flat_turned = phantom_of([obj("cylinder", half_sizes=(20.0, 5.0, 25.0),
                                  rotation=rot_z(np.pi / 2))])
    assert not np.allclose(trace(flat, poses), trace(flat_turned, poses))
