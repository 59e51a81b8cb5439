"""Relief and random texture of the demo scene: smooth random fields, elevation, hill shading."""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

__all__ = ["base_texture", "fractal", "hillshade", "relief", "smooth_field"]


def smooth_field(rng, shape, sigma):
    """Smooth random field of unit standard deviation.

    Wide fields are drawn on a coarser grid and interpolated (same look,
    a fraction of the filtering time).
    """
    step = int(sigma // 3) if sigma >= 6 else 1
    if step > 1:
        small = tuple(-(-n // step) + 2 for n in shape)
        f = ndimage.gaussian_filter(rng.standard_normal(small), sigma / step, mode="reflect")
        f = ndimage.zoom(f, step, order=1, mode="nearest", grid_mode=True)[: shape[0], : shape[1]]
    else:
        f = ndimage.gaussian_filter(rng.standard_normal(shape), sigma, mode="reflect")
    f = f - f.mean()
    return f / (f.std() + 1e-12)


def fractal(rng, shape, sigmas, weights):
    """Weighted sum of smooth fields of the given widths (drawn in that order)."""
    return sum(w * smooth_field(rng, shape, s) for s, w in zip(sigmas, weights))


def hillshade(elev, azimuth=315.0, altitude=45.0):
    """Relief shading in [0, 1] (the usual slope/aspect formula, sun from the north-west)."""
    dy, dx = np.gradient(elev)
    slope = np.arctan(np.hypot(dx, dy))
    aspect = np.arctan2(dy, -dx)
    zenith = math.radians(90.0 - altitude)
    az = math.radians(360.0 - azimuth + 90.0)
    shade = math.cos(zenith) * np.cos(slope) + math.sin(zenith) * np.sin(slope) * np.cos(az - aspect)
    return np.clip(shade, 0.0, 1.0)


def relief(rng, grid, river_distance):
    """A valley floor along the river rising to hills, plus rolling ground.

    Returns
    -------
    elev : ndarray, shape (n, n)
        Elevation (arbitrary units).
    shading : ndarray, shape (n, n)
        Brightness factor of land, 1 on flat ground.
    """
    k = grid.k
    rolling = fractal(rng, grid.shape, (6 * k, 20 * k, 60 * k), (0.2, 0.6, 1.4))
    elev = 0.05 * np.abs(river_distance) + 0.00018 * np.abs(river_distance) ** 2 + 4.0 * rolling
    shade = hillshade(elev * 1.6)
    flat = hillshade(np.zeros((3, 3)))[1, 1]
    return elev, 1.0 + 0.9 * (shade - flat)


def base_texture(rng, grid):
    """Fine grain and broad patchiness of every surface."""
    return 0.04 * smooth_field(rng, grid.shape, 1.0) + 0.05 * smooth_field(rng, grid.shape, 8 * grid.k)
