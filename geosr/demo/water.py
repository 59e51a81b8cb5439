"""Water of the demo scene: a meandering river with gravel bars, a reservoir behind a dam."""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from .terrain import smooth_field

__all__ = ["RiverCourse", "paint_reservoir", "paint_river", "river_course"]


@dataclasses.dataclass(frozen=True)
class RiverCourse:
    """Where the river runs.

    Attributes
    ----------
    centre : ndarray, shape (n,)
        Column of the centre line in each row.
    distance : ndarray, shape (n, n)
        Signed distance of every pixel from the centre line, about
        perpendicular to it.
    half_width : ndarray, shape (n,)
        Half the channel width in each row.
    curvature : ndarray, shape (n,)
        Second derivative of the centre line (the sign tells the bend).
    """

    centre: np.ndarray
    distance: np.ndarray
    half_width: np.ndarray
    curvature: np.ndarray

    @property
    def channel(self):
        """Mask of the river's open water."""
        return np.abs(self.distance) < self.half_width[:, None]


def river_course(rng, grid):
    """The centre line x_c(y): three meander wavelengths around a north-south line."""
    n, k = grid.n, grid.k
    ph = rng.uniform(0, 2 * math.pi, 3)
    ys = grid.ys
    xc = (
        0.45 * n
        + 70 * k * np.sin(2 * math.pi * ys / (520 * k) + ph[0])
        + 24 * k * np.sin(2 * math.pi * ys / (170 * k) + ph[1])
        + 10 * k * np.sin(2 * math.pi * ys / (95 * k) + ph[2])
    )
    slope = np.gradient(xc)
    distance = (grid.xx - xc[:, None]) / np.sqrt(1.0 + slope[:, None] ** 2)  # signed, ~perpendicular
    half_width = 6.5 * k + 1.5 * k * smooth_field(rng, (n, 1), 40)[:, 0]
    return RiverCourse(xc, distance, half_width, np.gradient(slope))


def paint_river(layers, course, k):
    """Paint the river, with gravel bars on the inside of bends; return its mask."""
    river = course.channel
    bar_side = -np.sign(course.curvature)[:, None]  # inside of the bend
    bars = (
        ~river
        & (np.abs(course.distance) < course.half_width[:, None] + 4 * k)
        & (np.sign(course.distance) == bar_side)
        & (np.abs(course.curvature)[:, None] > np.quantile(np.abs(course.curvature), 0.55))
    )
    layers.paint(bars, "gravel")
    layers.paint(river, "river")
    return river


def paint_reservoir(rng, grid, layers, course, river):
    """Paint a reservoir behind a concrete dam and its outflow stream to the river.

    Returns
    -------
    ndarray, shape (2,)
        (row, col) of the reservoir's centre.
    """
    n, k, yy, xx = grid.n, grid.k, grid.yy, grid.xx
    rc = np.array([0.2 * n, 0.78 * n])
    radius = 78 * k
    ang = np.arctan2(yy - rc[0], xx - rc[1])
    wobble = sum(a * np.cos(m * ang + rng.uniform(0, 6.3)) for m, a in ((2, 0.12), (3, 0.08), (5, 0.04)))
    blob = np.hypot(yy - rc[0], xx - rc[1]) < radius * (1.0 + wobble)
    dam_col = rc[1] - 0.55 * radius
    reservoir = blob & (xx >= dam_col)
    dam_rows = np.where(reservoir.any(axis=1))[0]
    dam = (
        (xx >= dam_col - 4 * k)
        & (xx < dam_col)
        & (yy >= dam_rows.min() - 2)
        & (yy <= dam_rows.max() + 2)
    )
    layers.paint(reservoir, "reservoir")
    layers.paint(dam, "concrete")
    stream_row = rc[0] + 6 * k * np.sin(2 * math.pi * xx[0] / (60 * k))
    outflow_x = xx[0] < dam_col - 4 * k
    outflow_x &= xx[0] > course.centre[int(rc[0])]
    stream = (np.abs(yy - stream_row[None, :]) < 1.4 * k) & outflow_x[None, :]
    layers.paint(stream & ~river, "river")
    return rc
