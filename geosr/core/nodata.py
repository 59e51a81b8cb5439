"""Filling invalid pixels from valid neighbours, locally, so that they never leak.

The fill is an iterative neighbour mean: at each step every unknown pixel with
at least one known pixel among its eight neighbours takes the mean of those
neighbours. After ``distance`` steps every pixel within that Chebyshev
distance of a valid pixel holds a value computed from valid pixels only, and
that value depends on input pixels within ``distance`` of it. Pixels further
away get the value of no measured pixel (zero); the magnified values they
influence lie under the output mask.

A mean is positively homogeneous and shift-equivariant, so the fill keeps the
value symmetries of the method.
"""

from __future__ import annotations

import numpy as np

__all__ = ["FILL_DISTANCE", "fill_invalid"]

#: Steps of neighbour filling; at least the context radius of the magnifier
#: so that every input a valid output pixel uses was filled from valid data.
FILL_DISTANCE = 5


def _neighbour_sum(a):
    """Sum over the 3 x 3 neighbourhood with zeros outside the array."""
    p = np.pad(a, 1)
    out = np.zeros_like(a)
    h, w = a.shape
    for di in range(3):
        for dj in range(3):
            out += p[di : di + h, dj : dj + w]
    return out


def fill_invalid(image: np.ndarray, valid: np.ndarray, distance: int = FILL_DISTANCE) -> np.ndarray:
    """Replace invalid pixels by iterated means of valid neighbours.

    Parameters
    ----------
    image : ndarray, shape (rows, cols), float
        Values at invalid pixels are ignored (they may be NaN).
    valid : ndarray of bool, shape (rows, cols)
    distance : int
        Number of filling steps.

    Returns
    -------
    ndarray, shape (rows, cols)
        A new array of the dtype of ``image``; valid pixels are unchanged.
    """
    known = np.asarray(valid, dtype=bool)
    out = np.where(known, image, 0).astype(image.dtype, copy=False)
    if known.all():
        return out.copy()
    for _ in range(int(distance)):
        weight = known.astype(out.dtype)
        total = _neighbour_sum(out * weight)
        count = _neighbour_sum(weight)
        grow = ~known & (count > 0)
        if not grow.any():
            break
        out = np.where(grow, total / np.where(count > 0, count, 1), out)
        known = known | grow
    return out
