"""Placing drawn objects: regions, exact clearance to a region's edge, random sequential
placement without overlap.

An object is placed through the circle (in 3-D the sphere) about its centre that contains it
(its bounding radius): it is inside a region when that circle is, and apart from another
object when the two circles are at least the gap apart. This is exact for circles and
spheres and errs on the safe side for other shapes.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Coverage beyond which random sequential placement is refused before drawing: the
#: objects' smallest total area (their circles grown by half the gap) over the region's
#: area. Random sequential adsorption of equal discs jams at a coverage of about 0.547
#: (Feder, J. Theor. Biol. 87, 237 (1980); Hinrichsen, Feder and Jossang, J. Stat. Phys. 44,
#: 793 (1986); recalled from memory), beyond which no further disc fits anywhere; well
#: before it the free area shrinks so fast that placement needs very many attempts.
MAX_COVERAGE_2D = 0.5
#: The same for spheres in 3-D: random sequential adsorption of equal spheres jams at a
#: volume fraction of about 0.38 (Cooper, Phys. Rev. A 38, 522 (1988); recalled from memory).
MAX_COVERAGE_3D = 0.35
#: Candidate positions tried for one object before the sample is given up.
MAX_ATTEMPTS = 5000
#: Candidates drawn and tested at once (whole batches are drawn, so the stream consumed does
#: not depend on how fast a position is found within a batch).
BATCH = 64
#: Bisection steps of the distance to an ellipse: the bracket starts at most 1 wide, so 64
#: halvings reach the spacing of float64 near 1.
BISECTION_STEPS = 64

REGION_SHAPES_2D = ("circle", "ellipse", "rectangle")
REGION_SHAPES_3D = ("sphere", "ellipsoid", "box", "cylinder")


@dataclass(frozen=True)
class Region:
    """An axis-aligned region that drawn objects are placed in.

    Attributes
    ----------
    shape : str
        circle, ellipse, rectangle (2-D); sphere, ellipsoid, box, cylinder (3-D, cylinder
        along z).
    centre : tuple of float
        mm, ``dimension`` values.
    half_sizes : tuple of float
        Semi-axes or half sides, mm (``dimension`` values; a cylinder's third is half its
        height).
    """

    shape: str
    centre: tuple
    half_sizes: tuple

    @property
    def dimension(self) -> int:
        return len(self.centre)

    @property
    def measure(self) -> float:
        """Area (2-D) or volume (3-D), mm^2 or mm^3."""
        h = self.half_sizes
        if self.shape in ("circle", "ellipse"):
            return math.pi * h[0] * h[1]
        if self.shape == "rectangle":
            return 4.0 * h[0] * h[1]
        if self.shape in ("sphere", "ellipsoid"):
            return 4.0 / 3.0 * math.pi * h[0] * h[1] * h[2]
        if self.shape == "box":
            return 8.0 * h[0] * h[1] * h[2]
        return 2.0 * math.pi * h[0] * h[1] * h[2]

    def clearance(self, points: np.ndarray) -> np.ndarray:
        """Distance from each point to the region's edge, mm; negative outside.

        Parameters
        ----------
        points : float64 (N, dimension)
            World coordinates, mm.

        Returns
        -------
        float64 (N,)
            A ball of radius r about a point lies inside the region exactly when its clearance
            is >= r; for an ellipsoid that is not a sphere the value is a lower bound
            ``(1 - |D^-1 p|) * min(semi-axes)``, which errs on the safe side.
        """
        p = np.asarray(points, dtype=np.float64) - np.asarray(self.centre)
        h = self.half_sizes
        if self.shape in ("circle", "sphere"):
            return h[0] - np.sqrt(np.einsum("ij,ij->i", p, p))
        if self.shape in ("rectangle", "box"):
            return np.min(np.asarray(h) - np.abs(p), axis=1)
        if self.shape == "ellipse":
            return ellipse_clearance(p[:, 0], p[:, 1], h[0], h[1])
        if self.shape == "cylinder":
            return np.minimum(ellipse_clearance(p[:, 0], p[:, 1], h[0], h[1]),
                              h[2] - np.abs(p[:, 2]))
        scaled = np.sqrt(np.einsum("ij,ij->i", p / np.asarray(h), p / np.asarray(h)))
        return (1.0 - scaled) * min(h)

    def uniform_points(self, rng: np.random.Generator, count: int) -> np.ndarray:
        """``count`` points drawn uniformly in the region's bounding box, (count, dimension)."""
        h = np.asarray(self.half_sizes)
        return np.asarray(self.centre) + (2.0 * rng.random((count, len(h))) - 1.0) * h


def ellipse_clearance(x: np.ndarray, y: np.ndarray, a: float, b: float) -> np.ndarray:
    """Distance from points to the ellipse ``(x/a)^2 + (y/b)^2 = 1``; negative outside.

    Parameters
    ----------
    x, y : float64 (N,)
        Coordinates relative to the ellipse centre, mm.
    a, b : float
        Semi-axes along x and y, mm.

    Returns
    -------
    float64 (N,)
        The exact distance to the curve for points inside (to float64 precision), and
        ``-1`` for points outside (their distance is never needed).

    Notes
    -----
    The nearest point of the ellipse to an inside point ``(y0, y1)`` (first quadrant, ``e0 >=
    e1``) is ``x_i = r_i y_i / (s + r_i)`` with ``r_0 = (e0/e1)^2``, ``r_1 = 1`` and ``s`` the
    root in ``[y1/e1 - 1, 0]`` of ``(r0 z0 / (s + r0))^2 + (z1 / (s + 1))^2 = 1``
    (``z_i = y_i / e_i``), found by bisection; points on the major axis are solved in closed
    form. D. Eberly, *Distance from a Point to an Ellipse, an Ellipse, or a Hyperellipsoid*,
    Geometric Tools (2013).
    """
    x = np.abs(np.asarray(x, dtype=np.float64))
    y = np.abs(np.asarray(y, dtype=np.float64))
    if a < b:  # make axis 0 the major axis
        x, y, a, b = y, x, b, a
    z0, z1 = x / a, y / b
    inside = z0 * z0 + z1 * z1 <= 1.0
    r0 = (a / b) ** 2
    lo = np.where(inside, z1 - 1.0, 0.0)
    hi = np.zeros_like(lo)
    with np.errstate(divide="ignore", invalid="ignore"):  # y = 0 is solved apart below
        for _ in range(BISECTION_STEPS):
            s = 0.5 * (lo + hi)
            f = (r0 * z0 / (s + r0)) ** 2 + (z1 / (s + 1.0)) ** 2 - 1.0
            lo = np.where(f > 0.0, s, lo)
            hi = np.where(f > 0.0, hi, s)
        s = 0.5 * (lo + hi)
        nx, ny = r0 * x / (s + r0), y / (s + 1.0)
        distance = np.hypot(nx - x, ny - y)
        # on the major axis (y = 0): the nearest point leaves the axis when x < (a^2-b^2)/a
        cut = (a * a - b * b) / a
        ratio = np.minimum(a * x / (a * a - b * b), 1.0) if a > b else np.ones_like(x)
        off_axis = np.hypot(a * ratio - x, b * np.sqrt(np.maximum(1.0 - ratio * ratio, 0.0)))
    on_axis = np.where(x < cut, off_axis, a - x)
    distance = np.where(y == 0.0, on_axis, np.where(x == 0.0, b - y, distance))
    return np.where(inside, distance, -1.0)


def place_apart(rng: np.random.Generator, region: Region, radii: np.ndarray, gap: float,
                placed_centres: np.ndarray, placed_radii: np.ndarray, apart: bool
                ) -> tuple[np.ndarray | None, int]:
    """Random sequential placement of objects inside a region.

    Parameters
    ----------
    rng : numpy.random.Generator
        The sample's stream.
    region : Region
    radii : float64 (K,)
        Bounding radius of each new object, mm, in placement order.
    gap : float
        Smallest distance between the circles of two objects kept apart, mm.
    placed_centres : float64 (M, dimension), placed_radii : float64 (M,)
        Objects placed earlier that the new ones must keep clear of (by ``gap``).
    apart : bool
        Keep the new objects apart from each other too.

    Returns
    -------
    centres : float64 (K, dimension) or None
        None when object ``failed`` found no position in :data:`MAX_ATTEMPTS` candidates.
    failed : int
        Index of the object that could not be placed (-1 on success).

    Notes
    -----
    Candidates are drawn uniformly in the region's bounding box, in whole batches of
    :data:`BATCH`, and the first candidate that fits is kept: random sequential adsorption
    (J. Feder, J. Theor. Biol. 87, 237 (1980)).
    """
    dim = region.dimension
    centres = np.empty((len(radii), dim))
    others_c = [placed_centres.reshape(-1, dim)]
    others_r = [placed_radii.reshape(-1)]
    for k, radius in enumerate(radii):
        found = None
        oc, orad = np.concatenate(others_c), np.concatenate(others_r)
        for _ in range(MAX_ATTEMPTS // BATCH):
            candidates = region.uniform_points(rng, BATCH)
            ok = region.clearance(candidates) >= radius
            if ok.any() and len(orad):
                d = candidates[:, None, :] - oc[None, :, :]
                dist = np.sqrt(np.einsum("ijk,ijk->ij", d, d))
                ok &= np.all(dist >= radius + orad[None, :] + gap, axis=1)
            hits = np.flatnonzero(ok)
            if hits.size:
                found = candidates[hits[0]]
                break
        if found is None:
            return None, k
        centres[k] = found
        if apart:
            others_c.append(found[None, :])
            others_r.append(np.array([radius]))
    return centres, -1
