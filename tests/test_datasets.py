"""Datasets: same bits on every executor, resume after SIGKILL, verify, loader, bad input.

The specs are tiny (a 32 x 32 grid, 24 views of 40 cells, monochromatic) so that the whole
file runs in about a minute on two busy cores, Dask clusters included.
"""

from __future__ import annotations

import contextlib
import errno
import json
import os
import pickle
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from simbench.cli import main

SPEC = """\
name: tiny inserts
description: test data
phantom: random-inserts
scanner:
  name: tiny parallel
  geometry: {type: parallel, dimension: 2, columns: 40, column_pitch: 10 mm, views: 24,
             arc: 180 deg}
  source: {energy: 60 keV}
  exposure: {air_counts: 1.0e4}
  detector: {flat_frames: 10, dark_frames: 10}
grid: {size: 32, voxel_size: 12 mm}
doses: [1.0, 0.5]
samples: {samples}
seed: 11
store: [truth_image, labels, line_integrals, projections, counts]
samples_per_shard: {per_shard}
compression: gzip
"""


def write_spec(folder: Path, samples: int = 6, per_shard: int = 2, extra: str = "") -> Path:
    path = folder / "spec.yaml"
    path.write_text(SPEC.replace("{samples}", str(samples)).replace("{per_shard}", str(per_shard))
                    + extra, encoding="utf-8")
    return path


def manifest(folder: Path) -> list[dict]:
    lines = (folder / "manifest.jsonl").read_text(encoding="utf-8").splitlines()
    return [json.loads(line) for line in lines]


def checksums(folder: Path) -> dict:
    """Every array's sha256, by (sample, key): what bit-identity compares."""
    return {(r["index"], key): a["sha256"] for r in manifest(folder)
            for key, a in r["arrays"].items()}


@pytest.fixture(scope="module")
def reference(tmp_path_factory) -> Path:
    """An uninterrupted dataset made in this process."""
    folder = tmp_path_factory.mktemp("reference")
    spec = write_spec(folder)
    assert main(["generate", str(spec), "-o", str(folder / "data"), "--quiet"]) == 0
    return folder / "data"


def test_same_bits_in_process_local_workers_and_a_dask_cluster(reference, tmp_path, capsys):
    # the acceptance: sha256 of every array equal in process, with --workers 2 and on
    # a LocalCluster of 2 workers started here (numba runs 2 threads here, 1 in each worker)
    from distributed import LocalCluster

    spec = write_spec(tmp_path)
    assert main(["generate", str(spec), "-o", str(tmp_path / "w2"), "--workers", "2",
                 "--quiet"]) == 0
    assert "2 local worker processes" in capsys.readouterr().out
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                      dashboard_address=None) as cluster:
        assert main(["generate", str(spec), "-o", str(tmp_path / "dask"), "--scheduler",
                     cluster.scheduler_address, "--quiet"]) == 0
    expected = checksums(reference)
    assert len(expected) == 6 * (3 + 2 * 4)  # per sample: 3 truth arrays, 4 per dose
    assert checksums(tmp_path / "w2") == expected
    assert checksums(tmp_path / "dask") == expected
    # (the shard files' bytes may differ: two builds of zlib may compress the same array to
    # different, equally valid streams, so the arrays are what is compared)


def test_sigkill_mid_way_then_rerun_gives_the_uninterrupted_dataset(reference, tmp_path):
    spec = write_spec(tmp_path)
    out = tmp_path / "data"
    child = subprocess.Popen([sys.executable, "-m", "simbench.cli", "generate", str(spec),
                              "-o", str(out), "--quiet"], start_new_session=True,
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 60
    while not list(out.glob("shards/shard-*/complete.json")):
        assert child.poll() is None, child.stderr.read().decode()
        assert time.monotonic() < deadline
        time.sleep(0.005)
    os.killpg(child.pid, signal.SIGKILL)
    child.wait()
    record = json.loads((out / "dataset.json").read_text(encoding="utf-8"))
    assert record["state"] == "in progress"  # never looks complete while incomplete
    assert not (out / "manifest.jsonl").exists()
    done = subprocess.run([sys.executable, "-m", "simbench.cli", "generate", str(spec), "-o",
                           str(out), "--quiet"], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith("reused "), done.stdout
    assert checksums(out) == checksums(reference)
    assert main(["verify", str(out)]) == 0


def test_a_flipped_byte_is_found_and_its_shard_named(reference, tmp_path, capsys):
    copy = tmp_path / "copy"
    shutil.copytree(reference, copy)
    assert main(["verify", str(copy)]) == 0
    capsys.readouterr()
    target = copy / "shards" / "shard-00001" / "samples.h5"
    data = bytearray(target.read_bytes())
    data[len(data) // 2] ^= 0x01
    target.write_bytes(bytes(data))
    assert main(["verify", str(copy)]) == 1
    err = capsys.readouterr().err
    assert "shard-00001" in err and "samples.h5" in err
    assert "shard-00000" not in err and "shard-00002" not in err


def test_an_altered_array_is_named_by_sample_and_key(reference, tmp_path, capsys):
    # rewrite one array in place and the shard's marker with it: only the manifest's
    # per-array checksums can tell
    import h5py

    from simbench.folders import write_marker

    copy = tmp_path / "copy"
    shutil.copytree(reference, copy)
    shard = copy / "shards" / "shard-00002"
    with h5py.File(shard / "samples.h5", "r+") as handle:
        handle["sample-0000005/labels"][0, 0] += 1
    (shard / "complete.json").unlink()
    write_marker(shard, "dataset-shard")
    assert main(["verify", str(copy)]) == 1
    err = capsys.readouterr().err
    assert "shard-00002" in err
    assert "sample 5: labels: SHA-256 differs from the manifest" in err
    assert "sample 4" not in err


def test_loader_random_access_info_and_worker_processes(reference):
    from simbench.datasets import open_dataset

    ds = open_dataset(reference, verify=True)
    assert len(ds) == 6
    sample = ds[-1]
    assert set(sample) == set(ds.keys)
    assert sample["truth_image"].shape == (32, 32) and sample["truth_image"].dtype == np.float32
    assert sample["labels"].dtype == np.int32
    assert sample["line_integrals"].shape == (24, 40)
    assert sample["projections/dose-0.5"].shape == (24, 40)
    assert sample["flat/dose-1"].shape == (40,)
    info = ds.sample_info(5)
    assert info["index"] == 5 and info["shard"] == "shard-00002"
    assert info["grid"]["shape"] == [1, 32, 32] and info["grid"]["dimension"] == 2
    assert info["reference_energy_kev"] == 60.0
    # water at 60 keV: 0.2059 cm^2/g (NIST XCOM, Hubbell & Seltzer tables, recalled from
    # memory), density 1 g/cm^3 -> 0.02059 /mm; the central water ROI in the truth image
    mu_water = info["hu_scale"]["mu_water_per_mm"]
    assert mu_water == pytest.approx(0.02059, rel=0.01)
    labels, image = sample["labels"], sample["truth_image"]
    water = info["phantom"]["roi_names"].index("centre water") + 1
    assert np.allclose(image[labels == water], mu_water, rtol=1e-6)
    # each sample is its own draw of the family, with the parameters drawn in the manifest
    assert info["phantom"]["parameters"]["body"]["shape"] == "ellipse"
    assert ds.sample_info(0)["phantom"]["parameters"] != info["phantom"]["parameters"]
    assert not np.array_equal(ds[0]["line_integrals"], ds[5]["line_integrals"])
    with pytest.raises(IndexError):
        ds[6]
    # a training framework's worker processes: pickled, or forked with the file open
    import multiprocessing

    clone = pickle.loads(pickle.dumps(ds))
    assert np.array_equal(clone[2]["labels"], ds[2]["labels"])
    with multiprocessing.get_context("fork").Pool(2) as pool:
        sums = pool.map(_checksum_of_sample, [(ds, i) for i in range(6)])
    assert sums == [r["arrays"]["projections/dose-1"]["sha256"] for r in manifest(reference)]
    ds.close()


def _checksum_of_sample(item) -> str:
    from simbench.execute.dataset import array_sha256

    ds, index = item
    return array_sha256(ds[index]["projections/dose-1"])


def test_more_samples_later_reuses_the_shards_already_made(reference, tmp_path, capsys):
    # sample i does not depend on how many samples there are: a dataset can grow
    out = tmp_path / "data"
    assert main(["generate", str(write_spec(tmp_path, samples=3)), "-o", str(out),
                 "--quiet"]) == 0
    capsys.readouterr()
    assert main(["generate", str(write_spec(tmp_path, samples=6)), "-o", str(out),
                 "--quiet"]) == 0
    said = capsys.readouterr().out
    # shard 1 held sample 2 only; with 6 samples it holds 2 and 3, so it is made again
    assert said.startswith("reused 1 shard (2 samples), wrote 2 (4 samples)"), said
    assert "removed 1 made for the old sample count" in said
    assert checksums(out) == checksums(reference)


def test_a_changed_spec_is_refused_unless_starting_over(reference, tmp_path, capsys):
    out = tmp_path / "data"
    shutil.copytree(reference, out)
    changed = write_spec(tmp_path).read_text().replace("seed: 11", "seed: 12")
    (tmp_path / "spec.yaml").write_text(changed)
    assert main(["generate", str(tmp_path / "spec.yaml"), "-o", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "another spec (changed: seed)" in err and "--start-over" in err
    assert main(["generate", str(tmp_path / "spec.yaml"), "-o", str(out), "--quiet",
                 "--start-over"]) == 0
    assert checksums(out) != checksums(reference)


def test_a_folder_that_is_not_a_dataset_is_never_written_into(tmp_path, capsys):
    (tmp_path / "mine").mkdir()
    (tmp_path / "mine" / "thesis.tex").write_text("keep me")
    assert main(["generate", str(write_spec(tmp_path)), "-o", str(tmp_path / "mine")]) == 2
    assert "did not write" in capsys.readouterr().err
    assert (tmp_path / "mine" / "thesis.tex").read_text() == "keep me"


def test_unreachable_scheduler_is_one_line_within_30_s(tmp_path, capsys):
    started = time.monotonic()
    code = main(["generate", str(write_spec(tmp_path)), "-o", str(tmp_path / "data"),
                 "--scheduler", "tcp://127.0.0.1:9"])
    assert time.monotonic() - started < 30  # the bound
    assert code == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--scheduler" in err and "tcp://127.0.0.1:9" in err
    assert not (tmp_path / "data").exists()


def test_a_server_that_is_not_a_dask_scheduler_is_one_line(tmp_path, capsys):
    # a web server (or anything else) at the address: its reply is not Dask's protocol
    import socket
    import threading

    server = socket.socket()
    server.bind(("127.0.0.1", 0))
    server.listen()

    def answer() -> None:
        with contextlib.suppress(OSError):
            while True:
                connection, _ = server.accept()
                connection.sendall(b"HTTP/1.1 400 Bad Request\r\n\r\n" * 4)
                connection.close()

    threading.Thread(target=answer, daemon=True).start()
    address = f"tcp://127.0.0.1:{server.getsockname()[1]}"
    try:
        assert main(["generate", str(write_spec(tmp_path)), "-o", str(tmp_path / "data"),
                     "--scheduler", address]) == 2
    finally:
        server.close()
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "is not a Dask scheduler" in err and address in err


def test_a_full_disk_leaves_no_half_written_sample(reference, tmp_path, monkeypatch, capsys):
    import h5py

    real = h5py.Group.create_dataset
    calls = {"n": 0}

    def filling_disk(self, *args, **kwargs):
        calls["n"] += 1
        if calls["n"] > 22:  # the first shard (2 samples x 11 arrays) fits, then the disk is full
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(self.file.filename))
        return real(self, *args, **kwargs)

    monkeypatch.setattr(h5py.Group, "create_dataset", filling_disk)
    out = tmp_path / "data"
    assert main(["generate", str(write_spec(tmp_path)), "-o", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "No space left on device" in err
    # only whole shards, no staging folders, nothing listed as complete
    from simbench.folders import verify_folder

    left = sorted(p.name for p in (out / "shards").iterdir())
    assert left == ["shard-00000"]
    verify_folder(out / "shards" / "shard-00000", "dataset-shard")
    assert not list(tmp_path.rglob("*.partial-*")) and not list(tmp_path.rglob("*.tmp-*"))
    assert json.loads((out / "dataset.json").read_text())["state"] == "in progress"
    assert not (out / "manifest.jsonl").exists()
    monkeypatch.setattr(h5py.Group, "create_dataset", real)
    assert main(["verify", str(out)]) == 1  # incomplete, and says so
    assert "incomplete" in capsys.readouterr().err
    assert main(["generate", str(write_spec(tmp_path)), "-o", str(out), "--quiet"]) == 0
    assert checksums(out) == checksums(reference)


def test_memory_budget_refuses_with_the_estimate(tmp_path, capsys):
    spec = write_spec(tmp_path)
    spec.write_text(spec.read_text().replace("grid: {size: 32, voxel_size: 12 mm}",
                                             "grid: {size: 1024, voxel_size: 0.375 mm}"))
    assert main(["generate", str(spec), "-o", str(tmp_path / "data"),
                 "--memory-budget", "1 MiB"]) == 2
    err = capsys.readouterr().err
    assert "one sample" in err and "would need about" in err and "spec.yaml" in err
    assert not (tmp_path / "data").exists()


@pytest.mark.parametrize("extra, place, words", [
    ("colour: red\n", ":18:1: colour", "unknown field 'colour'"),
    ("reconstruction: {use: no-such-method}\n", ":18:23: reconstruction.use", "no-such-method"),
    ("reconstruction: {use: fbp, options: {filter: square}}\n",
     "reconstruction.options", "square"),
    ("compression_level: 3\n", None, None),  # valid with gzip
])
def test_bad_spec_keys_are_located_one_line_errors(tmp_path, capsys, extra, place, words):
    spec = write_spec(tmp_path, extra=extra)
    if place is None:
        from simbench.execute.dataset_spec import load_dataset_spec

        assert load_dataset_spec(spec).compression_level == 3
        return
    assert main(["generate", str(spec), "-o", str(tmp_path / "data")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and place in err and words in err, err


@pytest.mark.parametrize("old, new, place", [
    ("samples: 6", "samples: 0", "samples"),
    ("samples_per_shard: 2", "samples_per_shard: many", "samples_per_shard"),
    ("store: [truth_image,", "store: [truth_images,", "store[0]"),
    ("compression: gzip", "compression: zstd", "compression"),
    ("compression: gzip", "compression: lzf\ncompression_level: 2", "compression_level"),
    ("phantom: random-inserts", "phantom: no-such-phantom", "phantom"),
    ("doses: [1.0, 0.5]", "doses: [1.0, 1.0]", "doses"),
    # a fan beam whose source passes inside the grid: refused at planning, before the folder
    ("geometry: {type: parallel, dimension: 2, columns: 40, column_pitch: 10 mm, views: 24,\n"
     "             arc: 180 deg}", "geometry: {type: fan, sid: 150 mm, sdd: 300 mm, columns: 40, "
     "column_pitch: 10 mm, views: 24, arc: 360 deg}", "grid"),
])
def test_bad_spec_values_name_the_field(tmp_path, capsys, old, new, place):
    spec = write_spec(tmp_path)
    spec.write_text(spec.read_text().replace(old, new))
    assert main(["generate", str(spec), "-o", str(tmp_path / "data")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and f"spec.yaml:" in err and f": {place}" in err, err
    assert not (tmp_path / "data").exists()


@pytest.mark.parametrize("argv, words", [
    (["--workers", "0"], "--workers"),
    (["--workers", "2", "--scheduler", "tcp://127.0.0.1:9"], "cannot be used together"),
    (["--scheduler", "not an address"], "not a scheduler address"),
])
def test_bad_executor_options(tmp_path, capsys, argv, words):
    assert main(["generate", str(write_spec(tmp_path)), "-o", str(tmp_path / "d")] + argv) == 2
    assert words in capsys.readouterr().err


def test_verify_of_a_folder_that_is_not_a_dataset(tmp_path, capsys):
    assert main(["verify", str(tmp_path)]) == 2
    assert "not a dataset folder" in capsys.readouterr().err


def test_the_shipped_demo_spec_reads():
    from simbench.execute.dataset_spec import load_dataset_spec

    spec = load_dataset_spec("inserts-2d")
    assert spec.samples == 8 and spec.reconstruction[0] == "fbp"


def _dies_first_time(flag: str) -> int:
    """Kill its own worker process the first time it runs for ``flag``; 7 the second time."""
    path = Path(flag)
    if not path.exists():
        path.write_text("ran once")
        os._exit(1)
    return 7


def _always_dies(flag: str) -> int:
    os._exit(1)


def _refuses(name: str) -> int:
    from simbench.errors import InputError, Where

    raise InputError(Where(name, 3, 4, "field"), "is bad", "something good")


def test_a_task_whose_worker_dies_is_run_once_more_and_errors_come_back_as_one_line(
        tmp_path):
    from simbench.errors import InputError
    from simbench.execute.executors import local_processes

    with local_processes(1) as executor:
        flag = str(tmp_path / "flag")
        assert list(executor.map_unordered(_dies_first_time, [flag])) == [(flag, 7)]
        with pytest.raises(InputError, match="died each time it was tried"):
            list(executor.map_unordered(_always_dies, ["shard-00003"]))
        # a bad-input error raised in a worker comes back as the same one line
        with pytest.raises(InputError) as refused:
            list(executor.map_unordered(_refuses, ["spec.yaml"]))
        assert str(refused.value) == "spec.yaml:3:4: field: is bad (valid: something good)"


def test_a_reconstructor_named_by_file_runs_only_with_allow_code(tmp_path, capsys):
    plugin = tmp_path / "my_recon.py"
    plugin.write_text("import numpy as np\n\n\ndef blank(acquisition, grid):\n"
                      "    return np.full(grid.image_shape, 0.5, dtype=np.float32)\n")
    spec = write_spec(tmp_path, samples=2, extra=f"reconstruction: {{use: '{plugin}:blank'}}\n")
    out = tmp_path / "data"
    assert main(["generate", str(spec), "-o", str(out), "--quiet"]) == 2
    assert "--allow-code" in capsys.readouterr().err and not out.exists()
    assert main(["generate", str(spec), "-o", str(out), "--quiet", "--allow-code"]) == 0
    from simbench.datasets import open_dataset

    image = open_dataset(out)[1]["reconstruction/dose-0.5"]
    assert image.shape == (32, 32) and (image == 0.5).all()


def test_scan_arrays_in_memory_are_the_bits_of_a_scan_folder(tmp_path):
    from simbench.execute.dataset_spec import load_dataset_spec
    from simbench.execute.scan import SCAN_ARRAYS, ScanPlan, scan_arrays, scan_into

    spec = load_dataset_spec(write_spec(tmp_path))
    phantom, _ = spec.family.sample(spec.seed, 4)
    plan = ScanPlan(phantom, spec.scanner, tmp_path / "scan", block_views=7)  # 4 blocks
    state = scan_into(tmp_path, plan, seed=3, noise=True, identity=("x",))
    arrays, _ = scan_arrays(plan, seed=3, noise=True, identity=("x",), keep=SCAN_ARRAYS)
    for name in SCAN_ARRAYS:
        part = "truth" if name in ("line_integrals", "path_lengths") else "measured"
        assert np.array_equal(np.load(tmp_path / part / f"{name}.npy"), arrays[name]), name
    only, _ = scan_arrays(plan, seed=3, noise=True, identity=("x",), keep=("projections",))
    assert list(only) == ["projections"] and np.array_equal(only["projections"],
                                                            arrays["projections"])
    assert state.reference_kev == 60.0
