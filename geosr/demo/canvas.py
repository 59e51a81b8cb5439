"""The grid the demo scene is painted on, and the layers each landscape feature paints into."""

from __future__ import annotations

import dataclasses

import numpy as np

from .landcover import CODE, codes

__all__ = ["Grid", "Layers"]


@dataclasses.dataclass(frozen=True)
class Grid:
    """Pixel coordinates of a square truth grid.

    Attributes
    ----------
    n : int
        Rows and columns.
    k : float
        Length unit: lengths of the generator are tuned for 768 pixels and
        multiplied by ``k = n / 768``.
    yy, xx : ndarray, shape (n, n), float64
        Row and column of every pixel.
    """

    n: int
    k: float
    yy: np.ndarray
    xx: np.ndarray

    @classmethod
    def square(cls, n, tuned_for):
        """The grid of ``n`` x ``n`` pixels, lengths scaled from a ``tuned_for`` grid."""
        yy, xx = np.mgrid[0:n, 0:n].astype(np.float64)
        return cls(n, n / tuned_for, yy, xx)

    @property
    def shape(self):
        return (self.n, self.n)

    @property
    def ys(self):
        """Row coordinates, shape (n,)."""
        return np.arange(self.n, dtype=np.float64)


@dataclasses.dataclass
class Layers:
    """What the features paint: land cover and the modulations of its reflectance.

    Attributes
    ----------
    landcover : ndarray, shape (n, n), uint8
        Index into :data:`geosr.demo.landcover.LANDCOVER`.
    texture : ndarray, shape (n, n), float64
        Relative brightness change (0 = the class's spectrum).
    nir_vigour : ndarray, shape (n, n), float64
        Relative NIR change of vegetation (crop vigour).
    """

    landcover: np.ndarray
    texture: np.ndarray
    nir_vigour: np.ndarray

    def paint(self, mask, name):
        """Set the pixels of ``mask`` to the land-cover class ``name``."""
        self.landcover[mask] = CODE[name]

    def covered_by(self, *names):
        """Mask of the pixels of the named land-cover classes."""
        return np.isin(self.landcover, codes(*names))
