"""Farmsteads of the demo scene: a concrete yard beside a road, with sheds and houses."""

from __future__ import annotations

import math

import numpy as np

from .terrain import smooth_field

__all__ = ["farm_sites", "paint_farmsteads"]


def _rotated_box(shape, centre, half, theta):
    """Mask of a rectangle of half-sizes ``half`` (along, across) rotated by theta."""
    rows, cols = shape
    yy, xx = np.mgrid[0:rows, 0:cols]
    dy, dx = yy - centre[0], xx - centre[1]
    a = dx * math.cos(theta) + dy * math.sin(theta)
    b = -dx * math.sin(theta) + dy * math.cos(theta)
    return (np.abs(a) <= half[0]) & (np.abs(b) <= half[1])


def farm_sites(grid, roads):
    """Candidate (row, col) centres of the farmsteads, beside the roads."""
    n, k, yr, bridge_col = grid.n, grid.k, roads.main_row, roads.bridge_col
    return [
        (yr[min(bridge_col + int(60 * k), n - 1)] + 26 * k, bridge_col + 60 * k),
        (yr[int(min(0.88 * n, n - 1))] + 40 * k, 0.88 * n - 34 * k),
        (yr[max(bridge_col - int(190 * k), 0)] - 28 * k, bridge_col - 190 * k),
    ]


def _paint_buildings(rng, grid, layers, site, yard, theta):
    """Paint 3 to 5 buildings in a yard; return their mask."""
    cy, cx = site
    k, yy, xx = grid.k, grid.yy, grid.xx
    buildings = np.zeros(grid.shape, dtype=bool)
    for _ in range(rng.integers(3, 6)):
        off = rng.uniform(-12, 12, 2) * k
        half = (rng.uniform(3, 10) * k, rng.uniform(2.5, 6) * k)
        box = _rotated_box(grid.shape, (cy + off[0], cx + off[1]), half, theta) & yard
        roof = "red-roof" if rng.random() < 0.55 else "grey-roof"
        layers.paint(box, roof)
        buildings |= box
        # a ridge line: the two roof halves lit differently
        b = -(xx - cx - off[1]) * math.sin(theta) + (yy - cy - off[0]) * math.cos(theta)
        layers.texture[box & (b > 0)] -= 0.12
    return buildings


def paint_farmsteads(rng, grid, layers, roads, river, theta):
    """Paint the farmsteads that fit on the grid, aligned with the fields.

    Returns
    -------
    buildings : ndarray of bool, shape (n, n)
    farms : list of (int, int)
        (row, col) of each farmstead.
    """
    n, k = grid.n, grid.k
    buildings = np.zeros(grid.shape, dtype=bool)
    farms = []
    for cy, cx in farm_sites(grid, roads):
        if not (30 <= cy < n - 30 and 30 <= cx < n - 30):
            continue
        farms.append((int(cy), int(cx)))
        yard = _rotated_box(grid.shape, (cy, cx), (24 * k, 18 * k), theta) & ~roads.mask & ~river
        layers.paint(yard, "concrete")
        layers.texture[yard] += 0.06 * smooth_field(rng, grid.shape, 2.0)[yard]
        buildings |= _paint_buildings(rng, grid, layers, (cy, cx), yard, theta)
    return buildings, farms
