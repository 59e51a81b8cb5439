"""The magnified raster as a lazy dask array."""

from __future__ import annotations

import os
from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

import numpy as np

from .._validation import check_bool, check_scale
from ..raster.blocks import magnify_block_values
from ..raster.io import inspect_source
from ..raster.windows import check_chunk_size
from .plan import model_sha, plan_blocks, resolve_models, split_bands

if TYPE_CHECKING:
    import dask.array

__all__ = ["magnify_array"]


def _array_chunk(plan, grid, models, block_id=None):
    """Chunk ``block_id`` of the array: its block as float values, NaN where invalid."""
    _, i, j = block_id
    return magnify_block_values(plan, grid[i][j], models)


def magnify_array(
    src: str | os.PathLike[str],
    model: Any = None,
    *,
    scale: int | None = None,
    bands: Sequence[int | str] | str | None = None,
    chunk_size: int = 1024,
    consistency: bool = False,
    ensemble: bool = False,
    spectral_guard: bool = True,
) -> dask.array.Array:
    """The magnified raster as a lazy dask array, one task per block.

    Each task reads its block plus the halo the model needs from ``src``
    with its own rasterio handle, so computing the array (or any part of
    it) gives exactly what :func:`~geosr.pipeline.magnify.magnify_raster` writes before the
    conversion to the output pixel type.

    Parameters
    ----------
    src : str or os.PathLike
    model : CoupledDictionary, list of them, or path, optional
        As in :func:`~geosr.pipeline.magnify.magnify_raster` (the shipped model for ``scale`` when
        omitted).
    scale : int, optional
    bands : sequence of int or str, optional
        Alpha bands are magnified by nearest neighbour.
    chunk_size : int
        Block side in source pixels; array chunks are ``scale`` times that.
    consistency, ensemble : bool
    spectral_guard : bool
        As in :func:`~geosr.pipeline.magnify.magnify_raster`.

    Returns
    -------
    dask.array.Array, shape (bands, scale*height, scale*width)
        float32 for float32 sources, float64 otherwise; NaN where the output
        is invalid (nodata, masked, or not finite in the input).
    """
    import dask
    import dask.array as da
    from dask.base import tokenize

    consistency = check_bool(consistency, "consistency")
    ensemble = check_bool(ensemble, "ensemble")
    spectral_guard = check_bool(spectral_guard, "spectral_guard")
    if scale is not None:
        scale = check_scale(scale)
    check_chunk_size(chunk_size)
    info = inspect_source(src)
    split = split_bands(info, bands)
    choice = resolve_models(model, scale=scale, bands=split.magnified)
    models, scale = list(choice.models), choice.scale
    work = "float32" if all(info.dtypes[b - 1] == "float32" for b in split.selected) else "float64"
    mplan = plan_blocks(info, split, models, scale, dtype=work, chunk_size=chunk_size,
                        consistency=consistency, ensemble=ensemble, spectral_guard=spectral_guard)
    plan, chunk, band_sel = mplan.block_plan, mplan.chunk, split.selected
    blocks = mplan.blocks
    name = "geosr-magnify-" + tokenize(info.path, plan, [model_sha(m) for m in models], chunk)
    rows = sorted({b.row_off for b in blocks})
    grid = tuple(tuple(b for b in blocks if b.row_off == r) for r in rows)
    chunks = ((len(band_sel),), tuple(scale * g[0].height for g in grid),
              tuple(scale * b.width for b in grid[0]))
    # One graph node holds the models, named so that dask never hashes their arrays.
    shared = dask.delayed(models, name=name + "-models", traverse=False)
    return da.map_blocks(_array_chunk, plan, grid, shared, name=name, chunks=chunks,
                         dtype=np.dtype(work), meta=np.empty((0, 0, 0), dtype=work))
