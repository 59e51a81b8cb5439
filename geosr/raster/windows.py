"""Block windows over a raster, their halos, and reading them with context.

A block is a window of the source raster (low-res pixels). Its halo is the
context the model needs on every side; where the halo leaves the raster the
context is the symmetric extension (``numpy.pad(..., mode="symmetric")``) of
what was read, which is the border convention of the core, so a block gives
exactly the part of the whole-image result that covers it.
"""

from __future__ import annotations

import dataclasses

import numpy as np
from rasterio.windows import Window

from .._validation import MIN_CHUNK
from ..errors import ParameterError

__all__ = [
    "Block",
    "MIN_CHUNK",
    "block_grid",
    "check_chunk_size",
    "halo_read",
    "pad_symmetric",
]


@dataclasses.dataclass(frozen=True)
class Block:
    """One block of the source raster, in source pixels.

    Attributes
    ----------
    index : int
        Position in row-major order over the grid.
    row_off, col_off : int
        Offset of the block's first pixel.
    height, width : int
        Size of the block.
    """

    index: int
    row_off: int
    col_off: int
    height: int
    width: int

    @property
    def window(self):
        """The block as a :class:`rasterio.windows.Window`."""
        return Window(self.col_off, self.row_off, self.width, self.height)

    def scaled(self, scale):
        """The window this block covers in a raster magnified by ``scale``."""
        return Window(self.col_off * scale, self.row_off * scale,
                      self.width * scale, self.height * scale)


def check_chunk_size(chunk_size, halo=0, name="chunk_size"):
    """Validate a block side in pixels against the minimum and the halo.

    Parameters
    ----------
    chunk_size : int
    halo : int
        Context per side the blocks will carry; a block must be at least as
        large as its halo, or the halo reads would dominate the work.

    Returns
    -------
    int
    """
    if isinstance(chunk_size, bool) or not isinstance(chunk_size, (int, np.integer)):
        if isinstance(chunk_size, (float, np.floating)) and float(chunk_size).is_integer():
            chunk_size = int(chunk_size)
        else:
            raise ParameterError(
                f"The {name!r} parameter must be an integer number of pixels, got {chunk_size!r}"
            )
    chunk_size = int(chunk_size)
    smallest = max(MIN_CHUNK, int(halo))
    if chunk_size < smallest:
        if halo > MIN_CHUNK:
            raise ParameterError(
                f"The {name!r} parameter must be at least the halo of {halo} pixels the "
                f"model needs on each side, got {chunk_size}"
            )
        raise ParameterError(
            f"The {name!r} parameter must be at least {MIN_CHUNK} pixels, got {chunk_size}"
        )
    return chunk_size


def block_grid(height, width, chunk_size, multiple=1):
    """Cut a ``height x width`` raster into blocks of at most ``chunk_size``.

    Parameters
    ----------
    height, width : int
        Raster size in pixels.
    chunk_size : int
        Block side; the last row and column of blocks may be smaller.
    multiple : int
        Block sides and offsets are multiples of this (training windows stay
        on the low-res grid of the scale). ``chunk_size`` is rounded down to
        it.

    Returns
    -------
    list of Block
        Row-major; together they tile the raster exactly once.
    """
    step = max(multiple, (int(chunk_size) // multiple) * multiple)
    blocks = []
    for row in range(0, height, step):
        for col in range(0, width, step):
            blocks.append(Block(len(blocks), row, col, min(step, height - row),
                                min(step, width - col)))
    return blocks


def halo_read(block, halo, height, width):
    """Where to read a block with its halo, and how much to pad afterwards.

    Parameters
    ----------
    block : Block
    halo : int
        Context per side.
    height, width : int
        Size of the raster.

    Returns
    -------
    window : rasterio.windows.Window
        The block grown by ``halo`` on every side, clipped to the raster.
    pads : tuple of (int, int)
        ``((top, bottom), (left, right))``: rows and columns of the halo that
        fall outside the raster, to be filled by :func:`pad_symmetric`.
    """
    r0 = block.row_off - halo
    c0 = block.col_off - halo
    r1 = block.row_off + block.height + halo
    c1 = block.col_off + block.width + halo
    rr0, cc0 = max(r0, 0), max(c0, 0)
    rr1, cc1 = min(r1, height), min(c1, width)
    window = Window(cc0, rr0, cc1 - cc0, rr1 - rr0)
    return window, ((rr0 - r0, r1 - rr1), (cc0 - c0, c1 - cc1))


def pad_symmetric(array, pads):
    """Symmetric extension of the last two axes (the core's border rule).

    Parameters
    ----------
    array : ndarray, shape (..., rows, cols)
    pads : tuple of (int, int)
        ``((top, bottom), (left, right))``.

    Returns
    -------
    ndarray, shape (..., rows + top + bottom, cols + left + right)
    """
    if sum(pads[0]) + sum(pads[1]) == 0:
        return array
    width = [(0, 0)] * (array.ndim - 2) + [tuple(pads[0]), tuple(pads[1])]
    return np.pad(array, width, mode="symmetric")
