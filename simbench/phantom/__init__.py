"""The phantom language: parse, check and compile phantom files; rasterize the truth.

Public API
----------
load_phantom(path) -> Phantom
parse_phantom_text(text, source="<text>") -> Phantom
rasterize(phantom, grid, energy_kev, supersample=4) -> mu image (1/mm)
label_map(phantom, grid, supersample=1) -> int32 ROI labels
shipped_phantom_path(name), shipped_phantom_names()
"""

from simbench.phantom.compiled import CompiledObjects, Phantom, VoxelVolume
from simbench.phantom.loader import (load_phantom, parse_phantom_text, shipped_phantom_names,
                                     shipped_phantom_path)
from simbench.phantom.rasterize import label_map, object_mu, rasterize

__all__ = [
    "CompiledObjects", "Phantom", "VoxelVolume", "load_phantom", "parse_phantom_text",
    "shipped_phantom_path", "shipped_phantom_names", "rasterize", "label_map", "object_mu",
]
