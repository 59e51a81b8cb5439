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


def _array_block(plan, block, models):
    """A block as float values with NaN where the output is invalid."""
    return magnify_block_values(plan, block, models)


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
    models_key = name + "-models"
    rows = sorted({b.row_off for b in blocks})
    cols = sorted({b.col_off for b in blocks})
    dsk = {models_key: models}
    for b in blocks:
        dsk[(name, 0, rows.index(b.row_off), cols.index(b.col_off))] = (_array_block, plan, b, models_key)
    heights = tuple(scale * min(chunk, info.height - r) for r in rows)
    widths = tuple(scale * min(chunk, info.width - c) for c in cols)
    chunks = ((len(band_sel),), heights, widths)
    from dask.highlevelgraph import HighLevelGraph

    graph = HighLevelGraph.from_collections(name, dsk, dependencies=())
    return da.Array(graph, name, chunks, dtype=np.dtype(work))
