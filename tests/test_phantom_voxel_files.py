"""Voxel files that are not what they claim: one InputError line at ``voxels.file``, never a
traceback, never reading past what the header declares or what the budget allows.

Forged files are written byte by byte after the .npy format description of numpy
(numpy.lib.format: magic ``\\x93NUMPY``, version bytes, a little-endian header length, a
header dict padded with spaces to a multiple of 64 bytes and ended by a newline).
"""

from __future__ import annotations

import os
import struct

import numpy as np
import pytest

from simbench import budget
from simbench.errors import InputError
from simbench.phantom import load_phantom

VOX = "name: v\ndimension: {dim}\nvoxels:\n  file: {file}\n  voxel_size: 1\n  {kind}\n"
MU = "mu_unit: /mm"
LABELS = "labels: {1: water}"


def npy_bytes(header: str, data: bytes = b"", version: tuple = (1, 0)) -> bytes:
    """A .npy file with a given header text (numpy.lib.format layout)."""
    prefix = 10 if version == (1, 0) else 12
    text = header.encode("latin1")
    pad = 64 - (prefix + len(text) + 1) % 64
    text += b" " * pad + b"\n"
    size = struct.pack("<H", len(text)) if version == (1, 0) else struct.pack("<I", len(text))
    return b"\x93NUMPY" + bytes(version) + size + text + data


def refused(tmp_path, file: str, *, dim: int = 2, kind: str = MU, words: tuple = ()) -> str:
    path = tmp_path / "phantom.yaml"
    path.write_text(VOX.format(dim=dim, file=file, kind=kind))
    with pytest.raises(InputError) as info:
        load_phantom(path)
    message = str(info.value)
    assert "\n" not in message
    assert message.startswith(f"{path}:4:9: voxels.file: "), message
    for word in words:
        assert word in message, message
    return message


def test_device_is_refused_without_reading(tmp_path):
    # reading /dev/zero never ends (fact of the trade)
    refused(tmp_path, "/dev/zero", words=("a device, not a regular file",))


def test_fifo_is_refused_without_opening(tmp_path):
    os.mkfifo(tmp_path / "pipe.npy")  # opening it for reading would wait for a writer
    refused(tmp_path, "pipe.npy", words=("FIFO",))


def test_folder_is_refused(tmp_path):
    (tmp_path / "dir.npy").mkdir()
    refused(tmp_path, "dir.npy", words=("folder",))


def test_missing_file(tmp_path):
    refused(tmp_path, "absent.npy", words=("not found",))


def test_not_an_npy_file(tmp_path):
    (tmp_path / "v.npy").write_text("just text\n")
    refused(tmp_path, "v.npy", words=("not a readable .npy file",))


def test_header_claiming_a_trillion_values_is_refused_before_reading(tmp_path):
    header = "{'descr': '<f8', 'fortran_order': False, 'shape': (1000000, 1000000), }"
    (tmp_path / "v.npy").write_bytes(npy_bytes(header, b"\0" * 64))
    # 1e12 float64 values are 8e12 bytes, the file holds 64 (arithmetic)
    refused(tmp_path, "v.npy", words=("truncated", "8000000000000"))


def test_truncated_data(tmp_path):
    raw = npy_bytes("{'descr': '<f8', 'fortran_order': False, 'shape': (4, 4), }",
                    np.zeros(16).tobytes())
    (tmp_path / "v.npy").write_bytes(raw[:-8])
    refused(tmp_path, "v.npy", words=("truncated", "120 bytes", "128"))


def test_data_longer_than_declared(tmp_path):
    (tmp_path / "v.npy").write_bytes(npy_bytes(
        "{'descr': '<f8', 'fortran_order': False, 'shape': (2, 2), }", np.zeros(5).tobytes()))
    refused(tmp_path, "v.npy", words=("longer than declared",))


def test_object_array_is_refused(tmp_path):
    np.save(tmp_path / "v.npy", np.array([[1, "a"], [None, 2.0]], dtype=object),
            allow_pickle=True)
    refused(tmp_path, "v.npy", words=("not plain numbers",))


@pytest.mark.parametrize("descr", ["'<c16'", "[('a', '<f8'), ('b', '<i4')]", "'<U3'",
                                   "('<f8', (3,))", "'|V8'"])
def test_dtypes_that_are_not_plain_numbers(tmp_path, descr):
    (tmp_path / "v.npy").write_bytes(npy_bytes(
        f"{{'descr': {descr}, 'fortran_order': False, 'shape': (2, 2), }}", b"\0" * 1024))
    refused(tmp_path, "v.npy")


def test_negative_dimension(tmp_path):
    (tmp_path / "v.npy").write_bytes(npy_bytes(
        "{'descr': '<f8', 'fortran_order': False, 'shape': (-2, 4), }"))
    refused(tmp_path, "v.npy", words=("impossible shape",))


def test_header_that_is_not_a_dict(tmp_path):
    (tmp_path / "v.npy").write_bytes(npy_bytes("__import__('os').system('true')"))
    refused(tmp_path, "v.npy", words=("not a readable .npy file",))


def test_unknown_format_version(tmp_path):
    data = npy_bytes("{'descr': '<f8', 'fortran_order': False, 'shape': (2, 2), }",
                     np.zeros(4).tobytes())
    (tmp_path / "v.npy").write_bytes(data[:6] + bytes((9, 0)) + data[8:])
    refused(tmp_path, "v.npy", words=("format version 9.0",))


def test_version_two_header_is_read(tmp_path):
    volume = np.arange(6, dtype=np.float64).reshape(2, 3) / 10
    (tmp_path / "v.npy").write_bytes(npy_bytes(
        "{'descr': '<f8', 'fortran_order': False, 'shape': (2, 3), }", volume.tobytes(),
        version=(2, 0)))
    path = tmp_path / "p.yaml"
    path.write_text(VOX.format(dim=2, file="v.npy", kind=MU))
    np.testing.assert_array_equal(load_phantom(path).voxels.values[0], volume)


@pytest.mark.parametrize("dtype", [">f4", "<f8"])
def test_fortran_order_and_byte_order_give_the_same_volume(tmp_path, dtype):
    volume = (np.arange(24, dtype=np.float64).reshape(2, 3, 4) / 100).astype(dtype)
    np.save(tmp_path / "v.npy", np.asfortranarray(volume))
    path = tmp_path / "p.yaml"
    path.write_text(VOX.format(dim=3, file="v.npy", kind=MU))
    np.testing.assert_array_equal(load_phantom(path).voxels.values,
                                  volume.astype(np.float64))


def test_volume_over_the_memory_budget_is_refused_before_reading(tmp_path):
    np.save(tmp_path / "v.npy", np.zeros((256, 256), np.float32))
    budget.set_memory_budget(2**20)  # 1 MiB; 65536 voxels x (4 + 24) B = 1.75 MiB
    try:
        refused(tmp_path, "v.npy", words=("256x256 voxels", "memory", "over the budget"))
    finally:
        budget.set_memory_budget(None)
