"""Export to open formats (simbench/export/, `simbench export`): NeXus NXtomo read back with
h5py, TIFF stacks read back with tifffile bit for bit, DICOM CT series read back with pydicom
with the right spacing, positions and HU; bad input one line each, no output folder left.

Sources of the check values:
- NXtomo: the NeXus application definition NXtomo (NXDL applications/NXtomo.nxdl.xml,
  NeXus International Advisory Committee): entry/definition = "NXtomo", instrument/detector
  data and image_key (0 projection, 1 flat field, 2 dark field), sample/rotation_angle
  (NX_ANGLE), the NXdata group linking data, rotation_angle and image_key.
- DICOM PS3.3 (Information Object Definitions): C.7.6.2.1.1 (Image Position and Image
  Orientation (Patient): centre of the first voxel, direction cosines of rows then columns),
  10.7.1.3 (Pixel Spacing: adjacent row spacing, then adjacent column spacing),
  C.11.1.1.2 (Modality LUT: output = slope * stored + intercept), A.3 (CT Image IOD);
  PS3.4 B.5 (CT Image Storage SOP Class UID 1.2.840.10008.5.1.4.1.1.2); PS3.5 9.1 and B.2
  (UIDs: digits and dots, at most 64 characters; the 2.25 root for UUID-derived UIDs).
- Hounsfield units: HU = 1000 (mu - mu_water) / (mu_water - mu_air) (the definition of the
  CT number; water 0 HU, air -1000 HU).
- TIFF 6.0 section 8 (XResolution, YResolution, ResolutionUnit 3 = centimetre).
"""

from __future__ import annotations

import json
import math
import re
import shutil

import numpy as np
import pytest

h5py = pytest.importorskip("h5py")
tifffile = pytest.importorskip("tifffile")
pydicom = pytest.importorskip("pydicom")

import simbench  # noqa: E402
from simbench.cli import main  # noqa: E402
from simbench.export.dicom import (SeriesIdentity, rescale_for, synthetic_uid,  # noqa: E402
                                   write_dicom_series)
from simbench.export.nxtomo import write_nxtomo  # noqa: E402
from simbench.export.tiff import write_tiff_stack  # noqa: E402
from simbench.geometry.grid import ImageGrid  # noqa: E402

INSERT_MU = 0.04  # 1/mm, the insert's explicit attenuation (demo value)

PHANTOM = """\
name: export-disc
dimension: 2
units: mm
objects:
  - {name: water, shape: circle, radius: 40, material: water, roi: true}
  - {name: insert, shape: circle, centre: [16, 0], radius: 9, mu: 0.04 /mm, roi: true}
  - {name: air hole, shape: circle, centre: [-16, 0], radius: 9, material: air, roi: true}
"""

SCENARIO = """\
name: export-check
description: a small fan-beam run whose counts are kept, for the export tests
phantom: export-disc.yaml
scanner:
  name: small fan beam
  geometry: {type: fan, sid: 300 mm, sdd: 500 mm, columns: 96, column_pitch: 1.5 mm,
             views: 60, arc: 360 deg}
  source: {energy: 60 keV}
  exposure: {air_counts: 1.0e5}
grid: {size: 48, voxel_size: 2 mm}
reference_energy: 60 keV
seed: 11
realizations: 2
doses: [1.0, 0.5]
algorithms:
  - {name: ramp, use: fbp}
  - {name: from-counts, use: fbp-from-counts, options: {water_correction: false}}
metrics: [rmse]
"""


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """A real run: 2 algorithms x 2 doses x 2 realizations, raw counts kept."""
    folder = tmp_path_factory.mktemp("export-run")
    (folder / "export-disc.yaml").write_text(PHANTOM, encoding="utf-8")
    (folder / "export-check.yaml").write_text(SCENARIO, encoding="utf-8")
    out = folder / "run"
    assert main(["run", str(folder / "export-check.yaml"), "-o", str(out), "--quiet"]) == 0
    return out


def _export(source, fmt, out, *extra) -> None:
    assert main(["export", str(source), "--format", fmt, "-o", str(out), *extra]) == 0


def _metrics(run) -> dict:
    return json.loads((run / "metrics.json").read_text(encoding="utf-8"))


# ------------------------------------------------------------------------------------------
# NXtomo
# ------------------------------------------------------------------------------------------


def test_nxtomo_of_a_run_carries_the_required_fields_angles_and_units(run, tmp_path):
    out = tmp_path / "nx"
    _export(run, "nxtomo", out, "--measured", "--dose", "1", "--realization", "1")
    measured = run / "measured" / "dose-1" / "realization-1" / "measured"
    counts, flat, dark = (np.load(measured / f"{n}.npy") for n in ("counts", "flat", "dark"))
    with h5py.File(out / "measured" / "dose-1" / "realization-1.nxs", "r") as f:
        entry = f["entry"]
        assert entry.attrs["NX_class"] == "NXentry"
        assert entry["definition"][()].decode() == "NXtomo"  # NXtomo: obligatory value
        assert entry["instrument"].attrs["NX_class"] == "NXinstrument"
        detector = entry["instrument/detector"]
        assert detector.attrs["NX_class"] == "NXdetector"
        assert entry["sample"].attrs["NX_class"] == "NXsample"
        assert entry["data"].attrs["NX_class"] == "NXdata"
        data = detector["data"]
        assert data.shape == (60 + 2, 1, 96)  # nFrames = dark + flat + 60 views; 2-D: one row
        key = detector["image_key"][()]
        # image_key (NXtomo): 2 dark, 1 flat, 0 projection; darks and flats first
        assert key.tolist() == [2, 1] + [0] * 60
        assert np.array_equal(data[0, 0], dark) and np.array_equal(data[1, 0], flat)
        assert np.array_equal(data[2:, 0], counts)  # the raw counts, bit for bit
        angle = entry["sample/rotation_angle"]
        assert angle.attrs["units"] == "degree"
        # 60 views over 360 degrees from 0: 6 degrees apart (the scanner file; closed form)
        np.testing.assert_allclose(angle[2:], np.arange(60) * 6.0, atol=1e-9)
        # NXdata links the detector's data and image_key and the sample's rotation_angle
        assert entry["data/data"].id == data.id
        assert entry["data/image_key"].id == detector["image_key"].id
        assert entry["data/rotation_angle"].id == angle.id
        assert entry["data"].attrs["signal"] == "data"
        # distances: the sample sits at the isocentre; SID 300 mm, SDD 500 mm (scanner file)
        assert entry["instrument/source/distance"][()] == pytest.approx(-300.0)
        assert detector["distance"][()] == pytest.approx(200.0)
        for name in ("x_pixel_size", "y_pixel_size", "distance"):
            assert detector[name].attrs["units"] == "mm"
        assert detector["x_pixel_size"][()] == pytest.approx(1.5)
        # no column offset: the axis projects on the detector's middle, (96 - 1) / 2
        assert detector["x_rotation_axis_pixel_position"][()] == pytest.approx(47.5)
        assert entry["instrument/source/probe"][()].decode() == "x-ray"
        assert simbench.CAUTION in entry["notes/description"][()].decode()
        assert entry["instrument/geometry/source_position"].shape == (60, 3)


def test_nxtomo_truth_is_the_exact_line_integrals_at_the_reference_energy(run, tmp_path):
    out = tmp_path / "nx"
    _export(run, "nxtomo", out, "--truth")
    exact = np.load(run / "truth" / "line_integrals.npy")
    with h5py.File(out / "truth" / "line_integrals.nxs", "r") as f:
        data = f["entry/instrument/detector/data"]
        assert data.dtype == np.float64
        assert np.array_equal(data[:, 0], exact)
        assert f["entry/instrument/detector/image_key"][()].tolist() == [0] * 60
        energy = f["entry/instrument/beam/incident_energy"]
        assert energy[()] == pytest.approx(60.0) and energy.attrs["units"] == "keV"


def test_nxtomo_of_a_helical_cone_scan_moves_the_sample_and_streams_blocks(tmp_path,
                                                                         monkeypatch):
    from simbench.export import nxtomo
    from simbench.geometry.circular import cone_poses

    poses = cone_poses(sid_mm=500.0, sdd_mm=800.0, n_cols=8, n_rows=4, pitch_u_mm=1.0,
                       pitch_v_mm=2.0, n_views=10, table_feed_per_turn_mm=20.0,
                       start_z_mm=-5.0)
    projections = np.random.default_rng(1).random((10, 4, 8)).astype(np.float32)
    monkeypatch.setattr(nxtomo, "BYTES_PER_BLOCK", 3 * 4 * 8 * 4)  # 3 views per block
    info = write_nxtomo(tmp_path / "h.nxs", projections, poses, signal="line integrals")
    assert info["image_key_counts"] == {"projection": 10, "flat": 0, "dark": 0}
    with h5py.File(tmp_path / "h.nxs", "r") as f:
        assert np.array_equal(f["entry/data/data"][()], projections)
        # a helix: source and detector rise by 20 mm per turn from -5 mm; the sample's
        # translation is the opposite (10 views per turn: 2 mm per view)
        z = f["entry/sample/z_translation"]
        assert z.attrs["units"] == "mm"
        np.testing.assert_allclose(z[()], 5.0 - 2.0 * np.arange(10), atol=1e-9)
        assert f["entry/instrument/detector/y_pixel_size"][()] == pytest.approx(2.0)
        assert f["entry/instrument/geometry/row_position"].shape == (4,)


# ------------------------------------------------------------------------------------------
# TIFF
# ------------------------------------------------------------------------------------------


def test_tiff_stacks_of_a_run_read_back_bit_identical(run, tmp_path):
    out = tmp_path / "tif"
    _export(run, "tiff", out, "--truth", "--algorithm", "all", "--dose", "0.5")
    pairs = [("truth/image", "truth/image"), ("truth/labels", "truth/labels"),
             ("truth/line_integrals", "truth/line_integrals")]
    pairs += [(f"recon/{a}/dose-0.5/realization-{r}", f"recon/{a}/dose-0.5/realization-{r}")
              for a in ("ramp", "from-counts") for r in (0, 1)]
    for tif, npy in pairs:
        back, array = tifffile.imread(out / f"{tif}.tif"), np.load(run / f"{npy}.npy")
        assert back.dtype == array.dtype and back.shape == array.shape
        assert back.tobytes() == array.tobytes(), tif
    assert not (out / "recon" / "ramp" / "dose-1").exists()
    with tifffile.TiffFile(out / "truth" / "image.tif") as t:
        assert t.imagej_metadata["unit"] == "mm"
        x = t.pages[0].tags["XResolution"].value
        assert x[0] / x[1] == pytest.approx(1 / 2.0)  # ImageJ: pixels per mm; 2 mm voxels
    assert simbench.CAUTION in (out / "README.txt").read_text(encoding="utf-8")


def test_tiff_writer_keeps_every_dtype_and_the_spacing(tmp_path):
    rng = np.random.default_rng(4)
    volume = rng.normal(size=(3, 5, 7)).astype(np.float32)
    info = write_tiff_stack(tmp_path / "v.tif", volume, (0.5, 0.25, 3.0))
    assert info["layout"] == "imagej"
    with tifffile.TiffFile(tmp_path / "v.tif") as t:
        assert t.asarray().tobytes() == volume.tobytes()
        assert t.imagej_metadata["spacing"] == pytest.approx(3.0)
        assert t.pages[0].tags["YResolution"].value[0] / t.pages[0].tags["YResolution"].value[1] \
            == pytest.approx(4.0)
    exact = rng.normal(size=(4, 6))  # float64: plain TIFF, centimetre resolution
    assert write_tiff_stack(tmp_path / "d.tif", exact, (0.5, 0.25))["layout"] == "plain"
    with tifffile.TiffFile(tmp_path / "d.tif") as t:
        assert t.asarray().tobytes() == exact.tobytes()
        page = t.pages[0]
        assert int(page.tags["ResolutionUnit"].value) == 3  # TIFF 6.0: 3 = centimetre
        x = page.tags["XResolution"].value
        assert x[0] / x[1] == pytest.approx(20.0)  # 0.5 mm = 20 pixels per cm


# ------------------------------------------------------------------------------------------
# DICOM
# ------------------------------------------------------------------------------------------


def _hu(ds) -> np.ndarray:
    from pydicom.pixels import apply_rescale

    return apply_rescale(ds.pixel_array, ds)


def test_dicom_truth_reads_back_with_spacing_positions_and_hu(run, tmp_path):
    out = tmp_path / "dcm"
    _export(run, "dicom", out, "--truth")
    files = sorted((out / "truth" / "image").glob("*.dcm"))
    assert len(files) == 1  # a 2-D run is a one-slice series
    ds = pydicom.dcmread(files[0])
    assert ds.SOPClassUID == "1.2.840.10008.5.1.4.1.1.2"  # PS3.4 B.5 CT Image Storage
    assert ds.file_meta.MediaStorageSOPClassUID == ds.SOPClassUID
    assert ds.Modality == "CT"
    assert str(ds.PatientName) == "SIMBENCH^PHANTOM" and ds.PatientID.startswith("SIMBENCH-")
    assert ds.ImageComments == simbench.CAUTION
    assert [float(v) for v in ds.PixelSpacing] == [2.0, 2.0]
    assert [float(v) for v in ds.ImageOrientationPatient] == [1, 0, 0, 0, 1, 0]
    # first voxel centre: (0 - 47/2) * 2 mm = -47 mm in x and y (ARCHITECTURE.md grid)
    assert [float(v) for v in ds.ImagePositionPatient] == [-47.0, -47.0, 0.0]
    for uid in (ds.SOPInstanceUID, ds.SeriesInstanceUID, ds.StudyInstanceUID,
                ds.FrameOfReferenceUID):
        assert uid.is_valid and uid.startswith("2.25.") and len(uid) <= 64  # PS3.5 9.1
    hu, step = _hu(ds), float(ds.RescaleSlope)
    scale = _metrics(run)["hu_scale"]
    mu_w, mu_a = scale["mu_water_per_mm"], scale["mu_air_per_mm"]
    axis = (np.arange(48) - 23.5) * 2.0
    x, y = np.meshgrid(axis, axis)
    water = np.hypot(x, y - 22) < 8  # inside the water disc, away from the inserts
    air = np.hypot(x + 16, y) < 7
    insert = np.hypot(x - 16, y) < 7
    vacuum = np.hypot(x, y) > 45  # outside the phantom: nothing, mu = 0
    # HU definition: water 0, air -1000, the insert 1000 (0.04 - mu_w) / (mu_w - mu_a),
    # vacuum -1000 mu_w / (mu_w - mu_a); each within half a quantization step
    assert np.abs(hu[water] - 0.0).max() <= step / 2
    assert np.abs(hu[air] + 1000.0).max() <= step / 2
    expected = 1000.0 * (INSERT_MU - mu_w) / (mu_w - mu_a)
    assert np.abs(hu[insert] - expected).max() <= step / 2
    assert np.abs(hu[vacuum] + 1000.0 * mu_w / (mu_w - mu_a)).max() <= step / 2
    truth = np.load(run / "truth" / "image.npy").astype(np.float64)
    assert np.abs(hu - 1000.0 * (truth - mu_w) / (mu_w - mu_a)).max() <= step / 2 + 1e-9


def test_dicom_reexport_gives_the_same_files_and_every_series_its_own_uids(run, tmp_path):
    a, b = tmp_path / "a", tmp_path / "b"
    _export(run, "dicom", a, "--algorithm", "ramp", "--realization", "0")
    _export(run, "dicom", b, "--algorithm", "ramp", "--realization", "0")
    files = sorted(p.relative_to(a) for p in a.rglob("*.dcm"))
    assert len(files) == 2  # ramp at two doses
    for rel in files:
        assert (a / rel).read_bytes() == (b / rel).read_bytes()  # same run, same bits and UIDs
    series = [pydicom.dcmread(a / rel) for rel in files]
    assert len({s.SeriesInstanceUID for s in series}) == 2
    assert len({s.SeriesNumber for s in series}) == 2
    assert len({s.StudyInstanceUID for s in series}) == 1
    assert len({s.FrameOfReferenceUID for s in series}) == 1
    assert {s.ConvolutionKernel for s in series} == {"ramp"}


def test_dicom_volume_positions_step_by_the_slice_spacing():
    grid = ImageGrid((5, 6, 7), (0.7, 0.9, 2.5), (10.0, -5.0, 3.0), 3)
    mu_w, mu_a = 0.02, 0.0
    rng = np.random.default_rng(2)
    volume = (mu_w * (1 + rng.uniform(-1, 1, grid.shape))).astype(np.float32)
    identity = SeriesIdentity(*(synthetic_uid("t", k) for k in ("st", "se", "fr")), "SIMBENCH-T",
                              1, "volume", "test")
    import tempfile
    from pathlib import Path

    with tempfile.TemporaryDirectory() as folder:
        info = write_dicom_series(folder, volume, grid, mu_water=mu_w, mu_air=mu_a,
                                  identity=identity, hu_step=0.25, step_given=True)
        slices = [pydicom.dcmread(Path(folder) / name) for name in info["files"]]
    assert len(slices) == 5 and len({s.SOPInstanceUID for s in slices}) == 5
    positions = np.array([[float(v) for v in s.ImagePositionPatient] for s in slices])
    # voxel centres (ARCHITECTURE.md): x0 = -3 * 0.7 + 10, y0 = -2.5 * 0.9 - 5,
    # z = (iz - 2) * 2.5 + 3
    np.testing.assert_allclose(positions[:, 0], -3 * 0.7 + 10.0, atol=1e-9)
    np.testing.assert_allclose(positions[:, 1], -2.5 * 0.9 - 5.0, atol=1e-9)
    np.testing.assert_allclose(np.diff(positions[:, 2]), 2.5, atol=1e-9)
    assert positions[0, 2] == pytest.approx(-2.0)
    first = slices[0]
    assert [float(v) for v in first.PixelSpacing] == [0.9, 0.7]  # row spacing (dy) first
    assert (first.Rows, first.Columns) == (6, 7)
    assert float(first.SliceThickness) == pytest.approx(2.5)
    assert [s.InstanceNumber for s in slices] == [1, 2, 3, 4, 5]
    hu = np.stack([_hu(s) for s in slices])
    assert np.abs(hu - 1000.0 * (volume - mu_w) / (mu_w - mu_a)).max() <= 0.125 + 1e-9


def test_rescale_keeps_metal_in_16_bits_and_refuses_a_step_too_fine():
    # int16 holds -32768..32767 (PS3.3 C.7.6.3.1.4, Pixel Representation 1)
    assert rescale_for(-1000.0, 3000.0) == (1.0, -1024.0)
    slope, intercept = rescale_for(-1000.0, 60000.0)  # a gold rod at 60 keV is ~1e5 HU
    assert slope == 2.0 and (60000.0 - intercept) / slope <= 32767
    from simbench.errors import InputError

    with pytest.raises(InputError, match="--hu-step"):
        rescale_for(-1000.0, 60000.0, 1.0, step_given=True)


# ------------------------------------------------------------------------------------------
# Scans and bad input
# ------------------------------------------------------------------------------------------


def test_a_scan_exports_counts_with_flat_and_dark_and_no_source_distance(tmp_path):
    scan = tmp_path / "scan"
    assert main(["scan", "water-cylinder", "parallel-bench-2d", "-o", str(scan),
                 "--seed", "3"]) == 0
    _export(scan, "nxtomo", tmp_path / "nx")
    record = json.loads((scan / "scan.json").read_text(encoding="utf-8"))
    with h5py.File(tmp_path / "nx" / "measured.nxs", "r") as f:
        key = f["entry/instrument/detector/image_key"][()]
        assert (key == 0).sum() == record["geometry"]["n_views"]
        assert (key == 1).sum() == 1 and (key == 2).sum() == 1
        assert "distance" not in f["entry/instrument/source"]  # parallel beam: no source
        assert f["entry/instrument/geometry/beam"][()].decode() == "parallel"
    assert main(["export", str(scan), "--format", "dicom", "-o", str(tmp_path / "d")]) == 2
    assert not (tmp_path / "d").exists()


def test_a_dataset_sample_exports_bit_identical_and_in_hu(tmp_path):
    from simbench.data import shipped_files
    from simbench.datasets import open_dataset

    spec = shipped_files("datasets")["inserts-2d"].read_text(encoding="utf-8")
    two = re.sub(r"(?m)^samples: \d+$", "samples: 2", spec)
    assert two != spec
    (tmp_path / "two.yaml").write_text(two, encoding="utf-8")
    dataset = tmp_path / "dataset"
    assert main(["generate", str(tmp_path / "two.yaml"), "-o", str(dataset), "--quiet"]) == 0
    _export(dataset, "tiff", tmp_path / "tif", "--truth", "--sample", "1")
    _export(dataset, "dicom", tmp_path / "dcm", "--sample", "1")
    _export(dataset, "nxtomo", tmp_path / "nx", "--measured", "--sample", "1")
    with open_dataset(dataset) as ds:
        sample, info = ds[1], ds.sample_info(1)
    image = tifffile.imread(tmp_path / "tif" / "sample-00001" / "truth" / "image.tif")
    assert image.tobytes() == sample["truth_image"].tobytes()
    assert not (tmp_path / "tif" / "sample-00000").exists()
    ds_slice = pydicom.dcmread(tmp_path / "dcm" / "sample-00001" / "truth" / "image" /
                               "slice-0001.dcm")
    mu_w, mu_a = (info["hu_scale"][k] for k in ("mu_water_per_mm", "mu_air_per_mm"))
    hu = 1000.0 * (sample["truth_image"].astype(np.float64) - mu_w) / (mu_w - mu_a)  # HU
    assert np.abs(_hu(ds_slice) - hu).max() <= float(ds_slice.RescaleSlope) / 2 + 1e-9
    assert ds_slice.PatientID.endswith("-1")  # one synthetic patient per sample
    with h5py.File(tmp_path / "nx" / "sample-00001" / "measured" / "dose-1.nxs", "r") as f:
        assert np.array_equal(f["entry/data/data"][:, 0], sample["projections/dose-1"])


def _damaged(run, tmp_path):
    copy = tmp_path / "damaged"
    shutil.copytree(run, copy)
    target = copy / "recon" / "ramp" / "dose-1" / "realization-0.npy"
    data = bytearray(target.read_bytes())
    data[-5] ^= 0x10  # one bit of one pixel
    target.write_bytes(bytes(data))
    return copy


@pytest.mark.parametrize("case, args, names", [
    ("not a run", lambda run, tmp: [str(tmp)], "complete.json is missing"),
    ("damaged", lambda run, tmp: [str(_damaged(run, tmp)), "--algorithm", "ramp"],
     "SHA-256 differs"),
    ("unknown format", lambda run, tmp: [str(run), "--format", "png"], "--format"),
    ("unknown algorithm", lambda run, tmp: [str(run), "--algorithm", "sart"], "--algorithm"),
    ("unknown dose", lambda run, tmp: [str(run), "--dose", "3"], "--dose"),
    ("dicom of projections", lambda run, tmp: [str(run), "--measured"], "--measured"),
])
def test_bad_input_is_one_line_and_leaves_no_output(run, tmp_path, capsys, case, args, names):
    (tmp_path / "not-a-run.txt").write_text("x", encoding="utf-8")
    argv = ["export", *args(run, tmp_path), "-o", str(tmp_path / "out")]
    if "--format" not in argv:
        argv += ["--format", "dicom"]
    assert main(argv) == 2, case
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("simbench: error:") and names in err, err
    assert "Traceback" not in err
    assert not (tmp_path / "out").exists()
    assert not list(tmp_path.glob(".out.*"))  # no staging folder or lock left


def test_a_missing_package_names_what_to_install(run, tmp_path, capsys, monkeypatch):
    import importlib.util

    real = importlib.util.find_spec
    monkeypatch.setattr(importlib.util, "find_spec",
                        lambda name, *a: None if name == "pydicom" else real(name, *a))
    assert main(["export", str(run), "--format", "dicom", "-o", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "pip install" in err and "pydicom" in err
    assert not (tmp_path / "o").exists()


def test_synthetic_uids_are_deterministic_and_distinct():
    assert synthetic_uid("run", "series", 1) == synthetic_uid("run", "series", 1)
    assert synthetic_uid("ab", "c") != synthetic_uid("a", "bc")  # parts are kept apart
    uid = synthetic_uid("x")
    # PS3.5 9.1: components of digits without leading zeros, at most 64 characters
    assert len(uid) <= 64 and all(p == "0" or not p.startswith("0") for p in uid.split("."))
    assert math.isfinite(float(uid.split(".")[-1][:10]))
