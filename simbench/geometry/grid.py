"""Image grids: where the voxels of a truth image or a reconstruction sit."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class ImageGrid:
    """A regular image grid on the convention of ARCHITECTURE.md.

    Voxel (iz, iy, ix) has its centre at
    ``((ix-(nx-1)/2)*dx + cx, (iy-(ny-1)/2)*dy + cy, (iz-(nz-1)/2)*dz + cz)`` in mm.
    A 2-D grid has ``nz == 1`` and ``dimension == 2``; its images are shaped (ny, nx).

    Attributes
    ----------
    shape : tuple (nz, ny, nx)
    spacing_mm : tuple (dx, dy, dz)
    centre_mm : tuple (cx, cy, cz)
    dimension : int
    """

    shape: tuple
    spacing_mm: tuple
    centre_mm: tuple = (0.0, 0.0, 0.0)
    dimension: int = 3

    @classmethod
    def square_2d(cls, n: int, pixel_mm: float, centre_mm=(0.0, 0.0)) -> "ImageGrid":
        """An n x n 2-D grid of square pixels."""
        return cls((1, n, n), (pixel_mm, pixel_mm, pixel_mm),
                   (float(centre_mm[0]), float(centre_mm[1]), 0.0), 2)

    def axis_mm(self, axis: str) -> np.ndarray:
        """Voxel-centre coordinates along ``"x"``, ``"y"`` or ``"z"`` (mm)."""
        index = {"x": 0, "y": 1, "z": 2}[axis]
        n = self.shape[2 - index]
        return (np.arange(n) - (n - 1) / 2.0) * self.spacing_mm[index] + self.centre_mm[index]

    @property
    def image_shape(self) -> tuple:
        """(ny, nx) for 2-D grids, (nz, ny, nx) otherwise."""
        return tuple(self.shape[1:]) if self.dimension == 2 else tuple(self.shape)

    def extent_mm(self) -> tuple:
        """(xmin, xmax, ymin, ymax) of the pixel edges, for ``imshow(origin='lower')``."""
        x, y = self.axis_mm("x"), self.axis_mm("y")
        dx, dy = self.spacing_mm[0], self.spacing_mm[1]
        return (x[0] - dx / 2, x[-1] + dx / 2, y[0] - dy / 2, y[-1] + dy / 2)
