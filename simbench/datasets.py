"""Reading datasets written by ``simbench generate``: NumPy arrays by sample index.

>>> from simbench.datasets import open_dataset          # doctest: +SKIP
>>> ds = open_dataset("my-dataset")                       # doctest: +SKIP
>>> len(ds), sorted(ds[0])                                # doctest: +SKIP
(100, ['labels', 'line_integrals', 'projections/dose-1', 'truth_image'])

A :class:`Dataset` is a sequence: ``len(ds)``, ``ds[i]`` (random access, negative indices
too), ``for sample in ds``. Each sample is a dict of NumPy arrays; the keys are those the
dataset's spec asked for (``ds.keys``):

=========================  =======  ====================================================
key                        dtype    what
=========================  =======  ====================================================
``truth_image``            float32  mu (1/mm) at the reference energy on the grid,
                                    (ny, nx) or (nz, ny, nx)
``labels``                 int32    ROI labels, 0 outside every ROI, label k is
                                    ``sample_info(i)["phantom"]["roi_names"][k - 1]``
``line_integrals``         float64  exact line integrals at the reference energy,
                                    (n_views, n_cols) or (n_views, n_rows, n_cols)
``path_lengths``           float64  path length per material, mm, (n_materials, ...)
``projections/dose-D``     float32  measured ln((flat - dark) / (counts - dark)) at dose D
``counts/dose-D``          float32  raw readings (dark level included) at dose D
``flat/dose-D``,           float32  air and dark frames at dose D, (n_cols,) or
``dark/dose-D``                     (n_rows, n_cols)
``reconstruction/dose-D``  float32  the spec's reconstruction from dose D's data, mu (1/mm)
=========================  =======  ====================================================

``D`` is the dose factor as written (``dose-1``, ``dose-0.25``). Photon-counting detectors
with several energy bins put the bin first in the measured arrays.

``ds.sample_info(i)`` is sample i's manifest record (drawn phantom parameters, seeds and
random streams, each array's dtype, shape and SHA-256) together with what all samples share:
``grid`` (shape, spacing_mm, centre_mm), ``geometry`` (per-view poses, as
:meth:`simbench.geometry.Poses.from_record` reads them), ``reference_energy_kev``,
``hu_scale`` (``mu_water_per_mm``, ``mu_air_per_mm``: HU = 1000 (mu - mu_water) /
(mu_water - mu_air)), ``doses``.

The shard files are opened lazily, once per process: a dataset object can be handed to the
worker processes of a training framework's data loader (it pickles without its open files,
and a forked copy reopens them).
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Iterator

import numpy as np

from simbench.errors import InputError, Where


class Dataset:
    """A dataset written by ``simbench generate``, read by sample index.

    Parameters
    ----------
    path : str or Path
        The dataset folder.
    verify : bool
        Compare every array read with its SHA-256 in the manifest (costs a hash per read).

    Raises
    ------
    InputError
        Not a dataset folder, or an incomplete one (generation interrupted), or a shard
        missing its marker.
    """

    def __init__(self, path: str | Path, *, verify: bool = False):
        from simbench.execute.dataset import MANIFEST, SHARDS, read_record
        from simbench.folders import verify_folder

        self.path = Path(path)
        self.verify = verify
        self.record = read_record(self.path)
        if self.record.get("state") != "complete":
            raise InputError(Where(str(self.path)), "the dataset is incomplete (generation was "
                             "interrupted or is still running)", "run simbench generate again "
                             "to finish it")
        for name in self.record.get("shards", {}):
            verify_folder(self.path / SHARDS / name, "dataset-shard", checksums=False)
        self._records = []
        manifest = self.path / MANIFEST
        with open(manifest, encoding="utf-8") as lines:
            for number, line in enumerate(lines, 1):
                try:
                    self._records.append(json.loads(line))
                except ValueError:
                    raise InputError(Where(str(manifest), number), "not a sample record",
                                     "run simbench verify on the dataset") from None
        spec = self.record["spec"]
        self.keys = tuple(spec["arrays"])
        self.shared = {"dataset": spec["name"], "grid": spec["grid"],
                       "geometry": self.record["geometry"],
                       "reference_energy_kev": spec["reference_energy_kev"],
                       "hu_scale": spec["hu_scale"], "doses": spec["doses"],
                       "noise": spec["noise"], "scanner": spec["scanner"]["name"]}
        self._handles: dict = {}
        self._pid = os.getpid()

    # -- the sequence --------------------------------------------------------------------
    def __len__(self) -> int:
        return len(self._records)

    def __getitem__(self, index: int) -> dict[str, np.ndarray]:
        return self.get(index)

    def __iter__(self) -> Iterator[dict[str, np.ndarray]]:
        for index in range(len(self)):
            yield self.get(index)

    def get(self, index: int, keys=None) -> dict[str, np.ndarray]:
        """The arrays of sample ``index`` (only ``keys``, if given).

        Parameters
        ----------
        index : int
            0 to ``len(self) - 1``, or negative from the end.
        keys : iterable of str, optional
            A subset of :attr:`keys`.
        """
        record = self._record(index)
        wanted = record["arrays"] if keys is None else list(keys)
        group = self._file(record["shard"])[record["group"]]
        out = {}
        for key in wanted:
            if key not in record["arrays"]:
                raise KeyError(f"sample {record['index']} has no array {key!r}; it has "
                               f"{', '.join(record['arrays'])}")
            array = group[key][()]
            if self.verify:
                from simbench.execute.dataset import array_sha256

                if array_sha256(array) != record["arrays"][key]["sha256"]:
                    raise InputError(Where(str(self.path / "shards" / record["shard"])),
                                     f"sample {record['index']}: {key}: SHA-256 differs from "
                                     "the manifest", "run simbench verify on the dataset")
            out[key] = array
        return out

    def sample_info(self, index: int) -> dict:
        """Sample ``index``'s manifest record with what every sample shares (grid, geometry,
        reference energy, HU scale, doses)."""
        return dict(self._record(index), **self.shared)

    # -- files ---------------------------------------------------------------------------
    def _record(self, index: int) -> dict:
        n = len(self._records)
        if isinstance(index, (bool, np.bool_)) or not isinstance(index, (int, np.integer)):
            raise TypeError(f"a sample index is a whole number, got {type(index).__name__}")
        if not -n <= index < n:
            raise IndexError(f"sample {index} is out of range (the dataset has {n} samples)")
        return self._records[int(index) % n]

    def _file(self, shard: str):
        import h5py

        if os.getpid() != self._pid:  # a forked copy: the parent's handles are not ours
            self._handles, self._pid = {}, os.getpid()
        handle = self._handles.get(shard)
        if handle is None:
            path = self.path / "shards" / shard / "samples.h5"
            handle = self._handles[shard] = h5py.File(path, "r", locking=False)
        return handle

    def close(self) -> None:
        """Close the open shard files (they reopen on the next read)."""
        if os.getpid() == self._pid:
            for handle in self._handles.values():
                handle.close()
        self._handles = {}

    def __enter__(self) -> "Dataset":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __getstate__(self) -> dict:
        state = dict(self.__dict__)
        state["_handles"] = {}
        return state

    def __setstate__(self, state: dict) -> None:
        self.__dict__.update(state)
        self._pid = os.getpid()

    def __repr__(self) -> str:
        return f"Dataset({str(self.path)!r}, {len(self)} samples, keys={list(self.keys)})"


def open_dataset(path: str | Path, *, verify: bool = False) -> Dataset:
    """Open a dataset folder written by ``simbench generate``.

    Parameters
    ----------
    path : str or Path
    verify : bool
        Check each array read against its SHA-256 (``simbench verify`` checks them all).

    Returns
    -------
    Dataset
    """
    return Dataset(path, verify=verify)
