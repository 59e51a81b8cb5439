"""Roads of the demo scene: one across the valley (bridging the river), one joining it."""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from .terrain import smooth_field

__all__ = ["Roads", "paint_roads", "smooth_hard_surfaces"]

#: Surfaces without crop texture: they only get a weak fine grain.
_HARD_SURFACES = ("river", "reservoir", "road", "track", "gravel", "concrete")


@dataclasses.dataclass(frozen=True)
class Roads:
    """Where the roads run.

    Attributes
    ----------
    mask : ndarray of bool, shape (n, n)
    main_row : ndarray, shape (n,)
        Row of the main road's centre line in each column.
    bridge : tuple of int
        (row, col) where the main road crosses the river.
    """

    mask: np.ndarray
    main_row: np.ndarray
    bridge: tuple

    @property
    def bridge_col(self):
        return self.bridge[1]


def paint_roads(rng, grid, layers, course):
    """Paint the two roads; return them with the bridge position."""
    n, k, yy, xx = grid.n, grid.k, grid.yy, grid.xx
    ph2 = rng.uniform(0, 6.3)
    yr = 0.6 * n + 26 * k * np.sin(2 * math.pi * xx[0] / (700 * k) + ph2)
    road1 = np.abs(yy - yr[None, :]) < 2.3 * k
    xr2 = 0.88 * n + 18 * k * np.sin(2 * math.pi * grid.ys / (800 * k))
    road2 = (np.abs(xx - xr2[:, None]) < 2.0 * k) & (yy > yr[None, :])
    roads = road1 | road2
    layers.paint(roads, "road")
    bridge_col = int(np.argmin(np.abs(np.arange(n) - course.centre[np.clip(yr.astype(int), 0, n - 1)])))
    return Roads(roads, yr, (int(yr[bridge_col]), bridge_col))


def smooth_hard_surfaces(rng, grid, layers):
    """Replace the texture of water, roads, tracks, gravel and concrete by a weak fine grain."""
    plain = layers.covered_by(*_HARD_SURFACES)
    layers.texture[plain] = 0.03 * smooth_field(rng, grid.shape, 1.0)[plain]
