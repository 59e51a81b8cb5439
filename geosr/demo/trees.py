"""Trees of the demo scene: wooded hills, and single crowns in hedges, orchards and along the river."""

from __future__ import annotations

import math

import numpy as np

from .landcover import codes
from .terrain import smooth_field

__all__ = ["crown_sites", "paint_crowns", "paint_forest"]

#: Ground a free-standing crown may grow on.
_CROWN_GROUND = ("grass", "green-crop", "ripe-cereal", "bare-soil", "gravel", "track")
#: Surfaces a crown never hides.
_HARD = ("road", "river", "reservoir", "red-roof", "grey-roof", "concrete")


def paint_forest(rng, grid, layers, elev):
    """Woods on the higher ground, with a canopy texture and a few gaps; return their mask."""
    forest = (elev > np.quantile(elev, 0.84)) & (smooth_field(rng, grid.shape, 10 * grid.k) > -0.6)
    layers.paint(forest, "trees")
    canopy = smooth_field(rng, grid.shape, 1.1 * grid.k)
    layers.texture[forest] += 0.10 * canopy[forest]
    gaps = forest & (canopy < -1.3)
    layers.paint(gaps, "grass")
    return forest


def _line_points(rng, p0, p1, spacing, jitter):
    """Points every ``spacing`` pixels from p0 to p1 (row, col), jittered."""
    p0, p1 = np.asarray(p0, float), np.asarray(p1, float)
    n = max(int(np.hypot(*(p1 - p0)) / spacing), 1)
    t = (np.arange(n) + 0.5) / n
    pts = p0[None, :] + t[:, None] * (p1 - p0)[None, :]
    return pts + rng.normal(0.0, jitter, pts.shape)


def _hedge_and_orchard_trees(rng, parcels, k, centres, radii):
    """Append crowns along the hedge lines and in the orchards' rows."""
    for (u0, v0), (u1, v1) in parcels.hedge_lines:
        r0, c0 = parcels.to_rowcol(u0, v0)
        r1, c1 = parcels.to_rowcol(u1, v1)
        pts = _line_points(rng, (r0, c0), (r1, c1), 3.2 * k, 0.6 * k)
        centres.extend(pts)
        radii.extend(rng.uniform(1.6, 2.9, len(pts)) * k)
    for u0, u1, v0, v1 in parcels.orchards:
        for pu in np.arange(u0 + 4, u1 - 3, 6.0 * k):
            for pv in np.arange(v0 + 4, v1 - 3, 6.0 * k):
                centres.append(parcels.to_rowcol(pu, pv))
                radii.append(rng.uniform(1.5, 2.2) * k)


def _riparian_trees(rng, grid, course, centres, radii):
    """Append scattered crowns on the river banks."""
    k = grid.k
    distance, half_width = np.abs(course.distance), course.half_width[:, None]
    bank = (distance > half_width + 1) & (distance < half_width + 9 * k)
    bank &= smooth_field(rng, grid.shape, 6 * k) > 0.2
    by, bx = np.nonzero(bank)
    pick = rng.random(by.size) < 0.06
    centres.extend(np.column_stack([by[pick], bx[pick]]) + rng.normal(0, 0.5, (pick.sum(), 2)))
    radii.extend(rng.uniform(2.0, 3.6, pick.sum()) * k)


def crown_sites(rng, grid, layers, parcels, course):
    """Centres (row, col) and radii of the single trees that stand on open ground.

    Returns
    -------
    centres : ndarray, shape (trees, 2)
    radii : ndarray, shape (trees,)
    """
    n = grid.n
    centres, radii = [], []
    _hedge_and_orchard_trees(rng, parcels, grid.k, centres, radii)
    _riparian_trees(rng, grid, course, centres, radii)
    centres = np.asarray(centres, float).reshape(-1, 2)
    radii = np.asarray(radii, float)
    inside = (centres[:, 0] >= 0) & (centres[:, 0] < n) & (centres[:, 1] >= 0) & (centres[:, 1] < n)
    centres, radii = centres[inside], radii[inside]
    ground = layers.landcover[centres[:, 0].astype(int), centres[:, 1].astype(int)]
    allowed = np.isin(ground, codes(*_CROWN_GROUND))
    return centres[allowed], radii[allowed]


def _dome_heights(shape, centres, radii):
    """Canopy height of dome-shaped crowns (max-combined), 0 between them."""
    height = np.zeros(shape)
    rows, cols = shape
    for (cy, cx), r in zip(centres, radii):
        r0 = math.ceil(r) + 1
        y0, y1 = max(int(cy) - r0, 0), min(int(cy) + r0 + 1, rows)
        x0, x1 = max(int(cx) - r0, 0), min(int(cx) + r0 + 1, cols)
        if y0 >= y1 or x0 >= x1:
            continue
        yy, xx = np.ogrid[y0:y1, x0:x1]
        d2 = ((yy - cy) ** 2 + (xx - cx) ** 2) / (r * r)
        dome = np.sqrt(np.clip(1.0 - d2, 0.0, None)) * r
        np.maximum(height[y0:y1, x0:x1], dome, out=height[y0:y1, x0:x1])
    return height


def paint_crowns(grid, layers, centres, radii):
    """Paint the crowns, lit from the north-west.

    Returns
    -------
    height : ndarray, shape (n, n)
        Canopy height of the single trees (for their shadows).
    crowns : ndarray of bool, shape (n, n)
    """
    height = _dome_heights(grid.shape, centres, radii)
    crowns = (height > 0.15) & ~layers.covered_by(*_HARD)
    layers.paint(crowns, "trees")
    gy, gx = np.gradient(height)
    lit = np.where(crowns, 0.18 * np.tanh(gx + gy) + 0.12 * (height / 3.0 - 0.5), 0.0)
    layers.texture += lit
    return height, crowns
