"""From painted land cover to the recorded bands: shadows, spectra, optics and sensor noise."""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from .landcover import LANDCOVER, NODATA, PAN_WEIGHTS, REFLECTANCE_SCALE, SPECTRA, VEGETATION
from .terrain import smooth_field

__all__ = ["NOISE", "cast_shadows", "panchromatic", "record", "surface", "swath_edge"]

#: Darkening of blue, green, red and NIR in shadow.
_SHADOW = (0.55, 0.5, 0.45, 0.4)

#: Standard deviation of the sensor noise, in reflectance.
NOISE = 0.0012


def cast_shadows(grid, layers, buildings, canopy_height, crowns):
    """Shadows of buildings and tall crowns, cast to the south-east (sun in the north-west)."""
    sh = round(2 * grid.k) or 1
    tall = np.where(buildings, 4.0, canopy_height)
    shadow = np.zeros(grid.shape, dtype=bool)
    shadow[sh:, sh:] = tall[:-sh, :-sh] > 0.5
    shadow[2 * sh:, 2 * sh:] |= tall[: -2 * sh, : -2 * sh] > 2.0
    shadow &= ~buildings & ~crowns & ~layers.covered_by("river", "reservoir")
    return shadow


def surface(rng, grid, layers, shading, shadow):
    """The reflectance reaching the sensor, float (4, rows, cols), blurred by the optics.

    Each class's spectrum, modulated by texture, hill shading (land only),
    crop vigour (NIR of vegetation), sediment (water) and shadow.
    """
    lc = layers.landcover
    spectra = np.array([SPECTRA[c] for c in LANDCOVER])  # (classes, 4)
    refl = spectra[lc].transpose(2, 0, 1).copy()  # (4, n, n)
    water = layers.covered_by("river", "reservoir")
    land = ~water
    factor = 1.0 + layers.texture
    factor[land] *= shading[land]
    refl *= factor[None]
    veg = layers.covered_by(*VEGETATION)
    refl[3][veg] *= 1.0 + layers.nir_vigour[veg]
    sediment = 1.0 + 0.12 * smooth_field(rng, grid.shape, 25 * grid.k) + 0.03 * smooth_field(rng, grid.shape, 1.5)
    refl[:, water] *= sediment[water][None]
    refl[:, shadow] *= np.array(_SHADOW)[:, None]
    return ndimage.gaussian_filter(refl, sigma=(0, 0.55, 0.55), mode="reflect")  # optics


def record(rng, refl):
    """Add sensor noise to a reflectance array and store it as uint16 x 10,000 (1 at least: 0 is nodata)."""
    noisy = refl + rng.normal(0.0, NOISE, refl.shape)
    return np.clip(np.rint(noisy * REFLECTANCE_SCALE), 1, 65535).astype(np.uint16)


def panchromatic(rng, refl):
    """A panchromatic-like band, uint16 (rows, cols), from the noise-free reflectance (4, rows, cols).

    The broad-band response is ``PAN_WEIGHTS`` applied to the four bands,
    recorded with its own sensor noise (drawn from ``rng``).
    """
    broad = np.tensordot(np.asarray(PAN_WEIGHTS), refl, axes=1)
    return record(rng, broad)


def swath_edge(grid, data):
    """Blank a wedge in the lower-left corner, like the edge of a swath; return the valid mask."""
    valid = ~(grid.xx < 0.2 * (grid.yy - 0.35 * grid.n))
    data[:, ~valid] = NODATA
    return valid
