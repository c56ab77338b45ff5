"""Dataset specs: one YAML file describing a dataset that ``simbench generate`` writes.

A dataset spec names a phantom family (a phantom file, with or without a ``random`` section, or
a shipped phantom name), a scanner, the grid of the truth images, the dose levels, the number of
samples and the root seed, what each sample stores, and how the samples are packed into shards.
Every error names the spec file, line, column and field, like every other input.

Keys (docs/datasets.md has the full description)::

    name: inserts-train             # required; part of every random stream's identity
    description: ...                # optional text
    phantom: my-family.yaml         # required: phantom (family) file or shipped phantom name
    scanner: parallel-bench-2d      # required: shipped name, path, or an inline mapping
    grid: {size: 64, voxel_size: 0.5 mm}   # as in scenarios; default covers the field of view
    reference_energy: effective     # 'effective' (default) or an energy such as 60 keV
    doses: [1.0, 0.25]              # factors on the scanner's exposure (default [1])
    samples: 1000                   # required: number of samples, 1 to 10 000 000
    seed: 7                         # root seed (default 0)
    noise: true                     # counting and electronic noise (default true)
    store: [truth_image, labels, line_integrals, projections]   # (this is the default)
    reconstruction:                 # optional: also store a reconstruction per dose
      use: fbp
      options: {filter: hann}
    samples_per_shard: 16           # samples in one shard file (default 16)
    compression: gzip               # gzip (default), lzf or none
    compression_level: 4            # gzip only, 1 to 9 (default 4)
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from simbench.errors import InputError, Where
from simbench.spec import Section, load_yaml

TOP_KEYS = ("name", "description", "phantom", "scanner", "grid", "reference_energy", "doses",
            "samples", "seed", "noise", "store", "reconstruction", "samples_per_shard",
            "compression", "compression_level")
RECONSTRUCTION_KEYS = ("use", "options")

#: what a sample can store, by the name used in spec files
STORE_CHOICES = ("truth_image", "labels", "line_integrals", "path_lengths", "projections",
                 "counts")
DEFAULT_STORE = ("truth_image", "labels", "line_integrals", "projections")
COMPRESSIONS = ("gzip", "lzf", "none")
#: limits of the counts a spec may ask for
MAX_SAMPLES = 10_000_000
MAX_SAMPLES_PER_SHARD = 100_000
DEFAULT_SAMPLES_PER_SHARD = 16


@dataclass(frozen=True)
class DatasetSpec:
    """A parsed, validated dataset spec.

    Attributes
    ----------
    name, description : str
    family : simbench.phantom.families.PhantomFamily
    scanner : simbench.scanner.Scanner
        With a physics section.
    family_ref, scanner_ref : str
        As written (``inline`` for an inline scanner).
    grid : dict
        ``size``, ``voxel_size``, ``centre`` as written (None where absent), as in scenarios.
    reference_energy_kev : float or None
        None: the effective energy in water of the detected spectrum.
    doses : tuple of float
    samples, seed : int
    noise : bool
    store : tuple of str
        Names from :data:`STORE_CHOICES`.
    reconstruction : tuple of (str, dict) or None
        The reconstructor's name and its options as written.
    samples_per_shard : int
    compression : str
        One of :data:`COMPRESSIONS`.
    compression_level : int
    source : str
        The spec file.
    allow_code : bool
        The reconstructor may be a module or file path (``--allow-code``).
    """

    name: str
    description: str
    family: Any
    scanner: Any
    family_ref: str
    scanner_ref: str
    grid: dict
    reference_energy_kev: float | None
    doses: tuple
    samples: int
    seed: int
    noise: bool
    store: tuple
    reconstruction: tuple | None
    samples_per_shard: int
    compression: str
    compression_level: int
    source: str
    wheres: dict = field(default_factory=dict, compare=False, repr=False)
    allow_code: bool = field(default=False, compare=False)

    def at(self, key: str) -> Where:
        """The place of a top-level field (for messages about it)."""
        return self.wheres.get(key, Where(self.source, field=key))


def load_dataset_spec(path: str | Path, *, allow_code: bool = False) -> DatasetSpec:
    """Read and validate a dataset spec (and the phantom family and scanner it names).

    Parameters
    ----------
    path : str or Path
        A spec file, or the name of a shipped one (``simbench/data/datasets``).
    allow_code : bool
        Allow a ``module:function`` or ``file.py:function`` reconstructor (the command
        line's ``--allow-code``); code named in a file is not run otherwise.

    Raises
    ------
    InputError
        One line naming the file, line, column and field of the first problem.
    """
    from simbench.data import shipped_files

    path = Path(path)
    if not path.exists() and path.parent == Path("."):
        stem = path.name[:-5] if path.name.endswith(".yaml") else path.name
        path = shipped_files("datasets").get(stem, path)
    return read_dataset_spec(load_yaml(path, "dataset spec"), str(path), path.parent,
                             allow_code=allow_code)


def read_dataset_spec(document: Any, source: str, directory: Path, *,
                      allow_code: bool = False) -> DatasetSpec:
    """Turn a located YAML document into a :class:`DatasetSpec`."""
    from simbench.scenario.spec import (MAX_SEED, check_dimensions, read_doses, read_grid,
                                        read_header, read_reference_energy, read_scanner)
    from simbench.spec import check_integer

    top, name, description = read_header(document, source, "dataset spec", TOP_KEYS,
                                         ("name", "phantom", "scanner", "samples"))
    family, family_ref = _family(top, directory)
    scanner, scanner_ref = read_scanner(top, directory)
    check_dimensions(top, family, scanner)
    samples = check_integer(top.raw("samples"), top.at("samples"), minimum=1,
                            maximum=MAX_SAMPLES)
    seed = top.integer("seed", 0, minimum=0, maximum=MAX_SEED)
    noise = top.boolean("noise", True)
    store = _store(top)
    reconstruction = _reconstruction(top, allow_code)
    per_shard = top.integer("samples_per_shard", DEFAULT_SAMPLES_PER_SHARD, minimum=1,
                            maximum=MAX_SAMPLES_PER_SHARD)
    compression = top.string("compression", "gzip", choices=COMPRESSIONS)
    level = 4
    if top.has("compression_level"):
        if compression != "gzip":
            raise top.error("compression_level", f"{compression} compression has no level",
                            "remove compression_level, or use compression: gzip")
        level = top.integer("compression_level", minimum=1, maximum=9)
    wheres = {key: top.at(key) for key in TOP_KEYS}
    return DatasetSpec(name, description, family, scanner, family_ref, scanner_ref,
                       read_grid(top, scanner), read_reference_energy(top), read_doses(top),
                       samples, seed, noise, store, reconstruction, per_shard, compression,
                       level, source, wheres, allow_code)


def _family(top: Section, directory: Path):
    from simbench.phantom.families import load_family
    from simbench.scenario.spec import resolve_file

    value = top.raw("phantom")
    if not isinstance(value, str) or not value.strip():
        raise top.error("phantom", "expected a phantom (family) file or shipped phantom name",
                        "a shipped phantom name (simbench list) or a phantom file path")
    path = resolve_file(value, "phantoms", directory)
    if not path.exists():
        raise top.error("phantom", f"no phantom '{value}' (not a shipped name, and no file "
                        f"'{path}')", "a shipped phantom name (simbench list) or a file path")
    return load_family(path), value


def _store(top: Section) -> tuple:
    if not top.has("store"):
        return DEFAULT_STORE
    items = top.sequence("store")
    names = []
    for item, where in items:
        if item not in STORE_CHOICES:
            raise InputError(where, f"cannot store {item!r}",
                             "one or more of " + ", ".join(STORE_CHOICES))
        if item in names:
            raise InputError(where, f"{item!r} is listed twice", "each array once")
        names.append(item)
    if not names and not top.has("reconstruction"):
        raise top.error("store", "nothing to store", "one or more of " + ", ".join(STORE_CHOICES))
    return tuple(names)


def _reconstruction(top: Section, allow_code: bool) -> tuple | None:
    if not top.has("reconstruction"):
        return None
    from simbench.recon.registry import find_reconstructor

    s = top.section("reconstruction")
    s.check_keys(RECONSTRUCTION_KEYS, required=("use",))
    use = s.string("use")
    reconstructor = find_reconstructor(use, allow_code=allow_code, where=s.at("use"))
    options = {}
    if s.has("options"):
        section = s.section("options")
        for key in section.keys():
            value = section.raw(key)
            if isinstance(value, (dict, list)) or value is None:
                raise section.error(key, "an option value must be a plain value",
                                    "a number, text, or true/false")
            options[str(key)] = value
    reconstructor.check_options(options, s.at("options"))
    return use, options
