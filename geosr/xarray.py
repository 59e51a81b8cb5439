"""Magnify an xarray DataArray: a lazy, dask-backed result on the refined grid.

:func:`magnify` takes a georeferenced ``(band, y, x)`` or ``(y, x)``
DataArray (as :func:`rioxarray.open_rasterio` gives, chunked or not) and
returns a lazy DataArray ``scale`` times finer along each axis. Its
coordinates are the centres of the new pixels, its CRS and transform are
written through rioxarray (so ``.rio.to_raster`` writes a georeferenced
GeoTIFF) and its attrs carry the ``GEOSR_*`` provenance tags and the caution,
as the files :func:`~geosr.pipeline.magnify.magnify_raster` writes do.

The work is planned as in ``magnify_raster``: the array is extended by the
model's halo symmetrically at the raster's edges, cut into the same blocks of
``chunk_size`` source pixels, each block given its halo from its neighbours
with :func:`dask.array.overlap.overlap`, and magnified by one task. The
values therefore equal ``magnify_raster``'s output on the same pixels,
nodata and pixel type included.

xarray and rioxarray are an optional extra: ``pip install geosr[xarray]``.
"""

from __future__ import annotations

import dataclasses
import os
import warnings
from collections.abc import Sequence
from typing import Any

import numpy as np

from ._validation import check_bool, check_scale
from .core.spectral import guard_spectra
from .enums import Method
from .errors import GeoreferencingWarning, GeosrError, InputError, ParameterError
from .pipeline.plan import model_method, model_sha, resolve_models
from .raster.blocks import BlockPlan, block_result, spectral_guard_applies
from .raster.io import check_bands
from .raster.masks import MaskMode, nearest_magnify
from .raster.tags import carried_tags, provenance_tags
from .raster.transforms import scaled_transform
from .raster.windows import Block, block_grid, check_chunk_size

__all__ = ["magnify", "MissingDependencyError"]

#: What to install when xarray or rioxarray is missing.
INSTALL_HINT = "pip install geosr[xarray]"


class MissingDependencyError(GeosrError, ImportError):
    """An optional dependency of geosr (here xarray or rioxarray) is not installed."""


def _require() -> Any:
    """The xarray module, with rioxarray's ``.rio`` accessor registered."""
    try:
        import rioxarray  # noqa: F401  (registers the .rio accessor)
        import xarray
    except ImportError as exc:
        raise MissingDependencyError(
            f"geosr.xarray needs xarray and rioxarray, got {exc.name or exc} missing; "
            f"install them with `{INSTALL_HINT}`"
        ) from None
    return xarray


@dataclasses.dataclass(frozen=True)
class _Source:
    """A DataArray as the pipeline sees it: (band, y, x) data and its georeferencing."""

    array: Any  # the selected bands, transposed to (band, y, x)
    dims: tuple[str, str, str]
    flat: bool  # the input had no band dimension
    bands: tuple[int, ...]
    transform: Any
    crs: Any
    nodata: float | None
    encoded_nodata: float | None
    name: str

    @property
    def dtype(self) -> np.dtype:
        return np.dtype(self.array.dtype)


def _spatial_dims(da: Any) -> tuple[str, str]:
    from rioxarray.exceptions import RioXarrayError

    try:
        return da.rio.y_dim, da.rio.x_dim
    except RioXarrayError:
        raise InputError(
            f"The DataArray must have x and y spatial dimensions (x/y or longitude/latitude), "
            f"got dimensions {tuple(map(str, da.dims))}"
        ) from None


def _check_regular(da: Any, dim: str) -> None:
    """Coordinates along ``dim`` exist and step evenly (rioxarray reads only the first two)."""
    if dim not in da.coords:
        raise InputError(f"The DataArray must have coordinates along {dim!r}, got none")
    values = np.asarray(da[dim].values)
    if values.dtype.kind not in "iuf":
        raise InputError(f"The DataArray's {dim!r} coordinates must be numbers, got {values.dtype}")
    steps = np.diff(values.astype(np.float64))
    if steps.size and not np.allclose(steps, steps[0], rtol=1e-6, atol=0):
        raise InputError(
            f"The DataArray must have regularly spaced x and y coordinates, got steps along {dim!r} "
            f"from {steps.min():g} to {steps.max():g}"
        )


def _stored_transform(da: Any, dims: tuple[str, str]) -> Any:
    """The GeoTransform rioxarray stored (``open_rasterio`` keeps the file's), if the coordinates fit it.

    Rebuilding the transform from the coordinates rounds its last digits;
    the stored one is the file's own, and is used while the coordinates are
    still its pixel centres (not after a slice, for example).
    """
    from affine import Affine

    mapping = da.coords.get(da.rio.grid_mapping)
    text = mapping.attrs.get("GeoTransform") if mapping is not None else None
    try:
        t = Affine.from_gdal(*map(float, str(text).split()))
    except (TypeError, ValueError):
        return None
    if t.b != 0 or t.d != 0:
        return None
    y, x = (np.asarray(da[d].values, dtype=np.float64) for d in dims)
    fits_x = np.allclose(x, t.c + (np.arange(x.size) + 0.5) * t.a, rtol=0, atol=1e-6 * abs(t.a))
    fits_y = np.allclose(y, t.f + (np.arange(y.size) + 0.5) * t.e, rtol=0, atol=1e-6 * abs(t.e))
    return t if fits_x and fits_y else None


def _transform(da: Any, dims: tuple[str, str]) -> Any:
    """The DataArray's geotransform (stored, or from its coordinates), checked to be north-up."""
    for dim in dims:
        _check_regular(da, dim)
    stored = _stored_transform(da, dims)
    if stored is not None:
        return stored
    try:
        transform = da.rio.transform(recalc=True)
    except Exception as exc:  # rioxarray raises several types for irregular coordinates
        raise InputError(
            "The DataArray must have regularly spaced x and y coordinates, got "
            f"{type(exc).__name__}: {exc}"
        ) from None
    if transform.b != 0 or transform.d != 0:
        raise InputError(
            f"The DataArray's transform must have no rotation or shear, got {tuple(transform)[:6]}"
        )
    return transform


def _source_name(da: Any) -> str:
    source = da.encoding.get("source")
    if source:
        return os.path.basename(os.fspath(source))
    return str(da.name) if da.name is not None else "DataArray"


def _nodata(value: Any) -> float | None:
    return None if value is None else float(value)


def _source(da: Any, bands: Any) -> _Source:
    """Check a DataArray and bring it to (band, y, x) with the selected bands."""
    xr = _require()
    if not isinstance(da, xr.DataArray):
        raise ParameterError(f"The 'da' parameter must be an xarray.DataArray, got {type(da).__name__}")
    if da.ndim not in (2, 3):
        raise InputError(f"The DataArray must have 2 (y, x) or 3 (band, y, x) dimensions, got {da.ndim}")
    if np.dtype(da.dtype).kind not in "iuf":
        raise InputError(f"The DataArray must hold integers or floats, got {da.dtype}")
    y_dim, x_dim = _spatial_dims(da)
    band_dim = next((str(d) for d in da.dims if d not in (y_dim, x_dim)), "band")
    if 0 in (da.sizes[y_dim], da.sizes[x_dim]):
        raise InputError(f"The DataArray must have at least one pixel, got sizes {dict(da.sizes)}")
    transform = _transform(da, (y_dim, x_dim))
    flat = da.ndim == 2
    array = (da.expand_dims(band_dim) if flat else da).transpose(band_dim, y_dim, x_dim)
    selected = check_bands(bands, array.sizes[band_dim])
    array = array.isel({band_dim: [b - 1 for b in selected]})
    crs = da.rio.crs
    if crs is None:
        warnings.warn(f"The DataArray {_source_name(da)!r} has no CRS; the output has no CRS either",
                      GeoreferencingWarning, stacklevel=3)
    return _Source(array, (band_dim, y_dim, x_dim), flat, selected, transform, crs,
                   _nodata(da.rio.nodata), _nodata(da.rio.encoded_nodata), _source_name(da))


def _representable(value: float, dtype: np.dtype) -> bool:
    """Whether a nodata value can be stored in ``dtype`` (NaN only in floats)."""
    if dtype.kind == "f":
        return True
    info = np.iinfo(dtype)
    return bool(np.isfinite(value)) and float(value).is_integer() and info.min <= value <= info.max


def _block_plan(src: _Source, models: Sequence[Any], scale: int, *, consistency: bool,
                ensemble: bool, spectral_guard: bool) -> BlockPlan:
    """The plan every block task receives, built as magnify_raster builds it."""
    masked = src.nodata is not None or src.dtype.kind == "f"
    halo = max(int(m.context_radius(consistency=consistency, masked=masked)) for m in models)
    nodata = src.nodata if src.nodata is not None and _representable(src.nodata, src.dtype) else None
    shared = len(models) == 1
    return BlockPlan(
        path=src.name,
        height=int(src.array.shape[1]),
        width=int(src.array.shape[2]),
        bands=src.bands,
        roles=tuple(0 if shared else i for i in range(len(src.bands))),
        halo=halo,
        scale=check_scale(scale),
        dtype=str(src.dtype),
        mode=MaskMode.NODATA if nodata is not None else MaskMode.NONE,
        nodata=nodata,
        masked=masked,
        consistency=consistency,
        ensemble=ensemble,
        spectral_guard=spectral_guard_applies(spectral_guard, models, len(src.bands), consistency),
    )


def _valid(data: np.ndarray, nodata: float | None) -> np.ndarray:
    """Measured pixels: finite, and not the nodata value (as GDAL's nodata mask reads it)."""
    valid = np.isfinite(data) if data.dtype.kind == "f" else np.ones(data.shape, dtype=bool)
    if nodata is not None and not np.isnan(nodata):
        valid &= data != np.asarray(nodata).astype(data.dtype)
    return valid


def _magnified_values(plan: BlockPlan, data: np.ndarray, models: Sequence[Any], nodata: float | None):
    """Magnified values of a block carrying its halo, and where they are valid."""
    s, h = plan.scale, plan.halo
    valid = _valid(data, nodata)
    rows, cols = data.shape[1] - 2 * h, data.shape[2] - 2 * h
    inner = (slice(h, h + rows), slice(h, h + cols))
    work = np.float32 if np.dtype(plan.dtype) == np.float32 else np.float64
    values = np.zeros((data.shape[0], s * rows, s * cols), dtype=work)
    ok = np.zeros(values.shape, dtype=bool)
    bases = np.zeros(values.shape, dtype=work) if plan.spectral_guard else None
    for i, role in enumerate(plan.roles):
        v_in = valid[i][inner]
        if not v_in.any():
            continue
        v = None if valid[i].all() else valid[i]
        values[i] = models[role].magnify_block(data[i], h, v, consistency=plan.consistency,
                                               ensemble=plan.ensemble)
        ok[i] = nearest_magnify(v_in, s) & np.isfinite(values[i])
        if bases is not None:
            bases[i] = models[role].interpolate_block(data[i], h, v, consistency=plan.consistency)
    if bases is not None:
        values = guard_spectra(values, bases, ok.all(axis=0))
    return values, ok


def _chunk(block: np.ndarray, models: Sequence[Any], plan: BlockPlan, nodata: float | None):
    """One output chunk: a block with its halo, magnified and in the output pixel type."""
    values, ok = _magnified_values(plan, block, models, nodata)
    h = plan.halo
    shape = Block(0, 0, 0, block.shape[1] - 2 * h, block.shape[2] - 2 * h)
    return block_result(plan, shape, values, ok).data


def _padded(x: Any, halo: int) -> Any:
    """``x`` extended by ``halo`` on both spatial sides, as numpy's symmetric pad does."""
    import dask.array as da

    width = ((0, 0), (halo, halo), (halo, halo))
    if halo <= min(x.shape[1:]):
        return da.pad(x, width, mode="symmetric")
    # dask's pad differs from numpy's once the pad outgrows the array: pad a tiny raster whole.
    whole = x.rechunk(-1)
    shape = (x.shape[0], x.shape[1] + 2 * halo, x.shape[2] + 2 * halo)
    return whole.map_blocks(np.pad, width, mode="symmetric", chunks=tuple((n,) for n in shape))


def _lazy(src: _Source, plan: BlockPlan, models: Sequence[Any], chunk: int) -> Any:
    """The magnified (band, y, x) dask array, one task per block of the source."""
    import dask
    import dask.array as da
    from dask.base import tokenize

    h, s = plan.halo, plan.scale
    blocks = block_grid(plan.height, plan.width, chunk)
    rows = tuple(b.height for b in blocks if b.col_off == 0)
    cols = tuple(b.width for b in blocks if b.row_off == 0)

    def with_pads(sizes: tuple[int, ...]) -> tuple[int, ...]:
        # the symmetric extension joins the first and last blocks
        grown = list(sizes)
        grown[0] += h
        grown[-1] += h
        return tuple(grown)

    x = da.asarray(src.array.data)
    padded = _padded(x, h).rechunk(((x.shape[0],), with_pads(rows), with_pads(cols)))
    haloed = da.overlap.overlap(padded, depth={0: 0, 1: h, 2: h}, boundary="none")
    shas = [model_sha(m) for m in models]
    name = "geosr-xarray-" + tokenize(x.name, plan, shas, chunk, src.nodata)
    shared = dask.delayed(list(models), name=name + "-models", traverse=False)
    chunks = ((x.shape[0],), tuple(s * r for r in rows), tuple(s * c for c in cols))
    return da.map_blocks(_chunk, haloed, shared, plan, src.nodata, name=name, chunks=chunks,
                         dtype=src.dtype, meta=np.empty((0, 0, 0), dtype=src.dtype))


def _attrs(src: _Source, models: Sequence[Any], plan: BlockPlan) -> dict[str, Any]:
    """The source attrs worth keeping, then the provenance tags (the caution among them)."""
    kept = {k: v for k, v in carried_tags(dict(src.array.attrs)).items()
            if k not in ("_FillValue", "nodata", "STATISTICS_MAXIMUM", "STATISTICS_MINIMUM",
                         "STATISTICS_MEAN", "STATISTICS_STDDEV", "STATISTICS_VALID_PERCENT")}
    kept.update(provenance_tags(
        scale=plan.scale, method=model_method(models[0]),
        model_sha256=[model_sha(models[r]) for r in plan.roles], source_name=src.name,
        consistency=plan.consistency, ensemble=plan.ensemble, spectral_guard=plan.spectral_guard,
    ))
    return kept


def _wrap(src: _Source, data: Any, plan: BlockPlan, models: Sequence[Any]) -> Any:
    """The magnified dask array as a georeferenced DataArray on the refined grid."""
    xr = _require()
    band_dim, y_dim, x_dim = src.dims
    t = scaled_transform(src.transform, plan.scale)
    # pixel centres of the new grid: x' = x0 - dx/2 + (i + 0.5) dx/s (and likewise y)
    coords: dict[str, Any] = {
        y_dim: t.f + (np.arange(data.shape[1]) + 0.5) * t.e,
        x_dim: t.c + (np.arange(data.shape[2]) + 0.5) * t.a,
    }
    if band_dim in src.array.coords and not src.flat:
        coords[band_dim] = src.array[band_dim].values
    out = xr.DataArray(data, dims=src.dims, coords=coords, attrs=_attrs(src, models, plan))
    out.name = src.array.name  # not the dask array's name, which xarray would take
    for axis in (y_dim, x_dim):  # units and names of the spatial coordinates stay
        out[axis].attrs.update(src.array[axis].attrs)
    if src.flat:
        out = out.squeeze(band_dim, drop=True)
    if src.crs is not None:
        out = out.rio.write_crs(src.crs)
    out = out.rio.write_transform(t)
    if plan.nodata is not None:
        out = out.rio.write_nodata(plan.nodata, encoded=False)
    elif src.encoded_nodata is not None:
        out = out.rio.write_nodata(src.encoded_nodata, encoded=True)
    return out


def magnify(
    da: Any,
    scale: int | None = None,
    *,
    model: Any = None,
    method: str | Method | None = None,
    bands: Sequence[int] | str | None = None,
    consistency: bool = False,
    ensemble: bool = False,
    spectral_guard: bool = True,
    chunk_size: int = 1024,
) -> Any:
    """Magnify a georeferenced DataArray; a lazy, dask-backed DataArray on the refined grid.

    Nothing is computed until the result is (``.compute()``, ``.values``,
    ``.rio.to_raster(...)``); each block of ``chunk_size`` source pixels is
    one dask task that receives the halo of context the model needs from its
    neighbours, so the values equal
    :func:`~geosr.pipeline.magnify.magnify_raster`'s output on the same
    pixels. Fine detail is synthesized: the attrs say so.

    Parameters
    ----------
    da : xarray.DataArray, dims (band, y, x) or (y, x)
        Integer or float pixels with regularly spaced x and y coordinates
        (north-up) and, usually, a CRS (``da.rio.crs``), as
        :func:`rioxarray.open_rasterio` gives (with or without ``chunks=``).
        Its nodata (``da.rio.nodata``, the ``_FillValue`` attr) and NaN mark
        invalid pixels. Never modified.
    scale : int, optional
        Magnification; must match the model's when both are given.
    model : CoupledDictionary, list of them, or path, optional
        One shared model, one per selected band, or a model file; the model
        shipped for ``scale`` when omitted.
    method : {"sparse", "anchored"}, optional
        Must match the model's when given.
    bands : sequence of int or str, optional
        1-based positions along the band dimension, in output order (all by
        default). Every selected band is magnified by the model (a DataArray
        has no alpha or palette bands).
    consistency, ensemble, spectral_guard : bool
        As in :func:`~geosr.pipeline.magnify.magnify_raster`.
    chunk_size : int
        Block side in source pixels (at least 16 and the model's halo);
        output chunks are ``scale`` times that.

    Returns
    -------
    xarray.DataArray
        Same dims, name and pixel type as ``da`` (selected bands), ``scale``
        times as many pixels along x and y, coordinates at the new pixel
        centres; CRS, transform and nodata written with rioxarray; attrs
        with the ``GEOSR_*`` tags and ``TIFFTAG_IMAGEDESCRIPTION`` (the
        caution). Invalid pixels take the nodata value (NaN for floats
        without one, 0 for integers without one).

    Raises
    ------
    MissingDependencyError
        xarray or rioxarray is not installed.
    InputError
        ``da`` has no x/y dimensions, irregular or rotated coordinates, or
        pixels that are not numbers.
    ModelError
        The model does not fit (scale, method, band count) or is damaged.
    ParameterError
        A bad option.
    """
    consistency = check_bool(consistency, "consistency")
    ensemble = check_bool(ensemble, "ensemble")
    spectral_guard = check_bool(spectral_guard, "spectral_guard")
    if scale is not None:
        scale = check_scale(scale)
    if method is not None:
        method = Method.parse(method, "method")
    check_chunk_size(chunk_size)
    src = _source(da, bands)
    choice = resolve_models(model, scale=scale, method=method, bands=src.bands)
    models = list(choice.models)
    plan = _block_plan(src, models, choice.scale, consistency=consistency, ensemble=ensemble,
                       spectral_guard=spectral_guard)
    chunk = check_chunk_size(chunk_size, plan.halo)
    return _wrap(src, _lazy(src, plan, models, chunk), plan, models)
