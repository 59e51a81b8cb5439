"""Validity masks, their nearest-neighbour magnification, and output values.

Which pixels are measured comes from GDAL's mask bands (nodata values,
per-dataset masks, alpha bands), read with ``read_masks``, and from the
values themselves: NaN and infinity are never valid. The output mask is the
input mask magnified by nearest neighbour; at integer scales each source
pixel becomes an ``s x s`` block, which is what GDAL's nearest resampling
gives for the same grid.
"""

from __future__ import annotations

import enum

import numpy as np

__all__ = [
    "MaskMode",
    "mask_mode",
    "nearest_magnify",
    "to_output_dtype",
]


class MaskMode(str, enum.Enum):
    """How the output records invalid pixels."""

    NODATA = "nodata"  # one nodata value for the file; each band's own invalid pixels
    MASK = "mask"  # an internal per-dataset mask band
    ALPHA = "alpha"  # an alpha band among the output bands
    NONE = "none"  # no mask; NaN in float bands where the input was not finite


def mask_mode(info, bands, alpha_bands):
    """Choose how the output marks invalid pixels.

    Parameters
    ----------
    info : SourceInfo
    bands : tuple of int
        Selected 1-based bands.
    alpha_bands : tuple of int
        Those of ``bands`` that are alpha bands.

    Returns
    -------
    mode : MaskMode
    nodata : float or None
        The output nodata value (only for ``MaskMode.NODATA``).

    Notes
    -----
    A GeoTIFF holds one nodata value for all its bands. When the selected
    bands have different nodata values (a VRT or a netCDF can give each band
    its own), or only some have one, the output takes one value for every
    band: NaN for a float output, else the first band's value the output
    type can hold. Each band's invalid pixels take it, so every band keeps
    its own validity; a valid pixel that equals it is moved one step (see
    :func:`to_output_dtype`).
    """
    from rasterio.enums import MaskFlags

    nodata = [info.nodatavals[b - 1] for b in bands]
    defined = [float(v) for v in nodata if v is not None]
    dtype = np.dtype(np.result_type(*[info.dtypes[b - 1] for b in bands]))
    if defined:
        first = defined[0]
        same = len(defined) == len(nodata) and all(
            (np.isnan(v) and np.isnan(first)) or v == first for v in defined)
        if same and _representable(first, dtype):
            return MaskMode.NODATA, first
        if not same and dtype.kind == "f":
            return MaskMode.NODATA, float("nan")
        shared = next((v for v in defined if _representable(v, dtype)), None)
        if not same and shared is not None:
            return MaskMode.NODATA, shared
    if alpha_bands:
        return MaskMode.ALPHA, None
    flags = [info.mask_flags[b - 1] for b in bands]
    if any(MaskFlags.all_valid not in f for f in flags):
        return MaskMode.MASK, None
    return MaskMode.NONE, None


def _representable(value, dtype):
    """Whether a nodata value can be stored in ``dtype``."""
    if not np.isfinite(value):  # NaN and +-inf: float types hold them
        return dtype.kind == "f"
    if dtype.kind in "iu":
        lo, hi = _dtype_range(dtype)
        return float(value).is_integer() and lo <= value <= hi
    return abs(value) <= np.finfo(dtype).max


def nearest_magnify(array, scale):
    """Magnify the last two axes by pixel replication (nearest neighbour).

    Parameters
    ----------
    array : ndarray, shape (..., h, w)
    scale : int

    Returns
    -------
    ndarray, shape (..., scale*h, scale*w), same dtype
    """
    return np.repeat(np.repeat(array, scale, axis=-2), scale, axis=-1)


def _dtype_range(dtype):
    if dtype.kind in "iu":
        info = np.iinfo(dtype)
        return float(info.min), float(info.max)
    info = np.finfo(dtype)
    return float(info.min), float(info.max)


def to_output_dtype(values, valid, dtype, nodata=None, fill=None):
    """Convert magnified values to the output pixel type.

    Integers are rounded half to even and clipped to the type's range;
    floats are cast. A valid pixel that would take the nodata value is moved
    one step (1 for integers, one unit in the last place for floats) toward
    its unrounded value, or into the type's range when nodata sits at an end
    of it. Invalid pixels take ``nodata``, else ``fill`` (0 for integers,
    NaN for floats).

    Parameters
    ----------
    values : ndarray of float, shape (..., rows, cols)
    valid : ndarray of bool, same shape
        Valid pixels; non-finite values are made invalid too.
    dtype : numpy dtype
    nodata : float, optional
    fill : float, optional

    Returns
    -------
    out : ndarray of ``dtype``
    valid : ndarray of bool
        ``valid`` without the pixels whose values were not finite.
    """
    dtype = np.dtype(dtype)
    values = np.asarray(values)
    valid = np.asarray(valid, dtype=bool) & np.isfinite(values)
    lo, hi = _dtype_range(dtype)
    if dtype.kind in "iu":
        work = np.where(valid, values, 0.0)
        out = np.clip(np.rint(work), lo, hi).astype(dtype)
    else:
        with np.errstate(over="ignore", invalid="ignore"):
            out = np.where(valid, values, 0.0).astype(dtype)
        too_big = valid & ~np.isfinite(out)  # overflow of float64 -> float32
        if too_big.any():
            out[too_big] = np.clip(values[too_big], lo, hi).astype(dtype)
    if nodata is not None and not np.isnan(nodata):
        nd = dtype.type(nodata)
        hit = valid & (out == nd)
        if hit.any():
            raw = values[hit]
            # One step toward the unrounded value; on a tie toward zero (the
            # data side of the usual 0, -9999 or type-maximum nodata values).
            up = np.where(raw == float(nd), float(nd) <= 0.0, raw > float(nd))
            if float(nd) >= hi:
                up[:] = False
            elif float(nd) <= lo:
                up[:] = True
            if dtype.kind in "iu":
                step = np.where(up, 1, -1)
                out[hit] = (np.asarray(nd, dtype=np.int64) + step).astype(dtype)
            else:
                toward = np.where(up, np.inf, -np.inf).astype(dtype)
                out[hit] = np.nextafter(np.full(raw.shape, nd, dtype=dtype), toward)
    if fill is None:
        fill = nodata if nodata is not None else np.nan
    if dtype.kind in "iu" and (fill is None or np.isnan(fill)):
        fill = 0
    out[~valid] = dtype.type(fill)
    return out, valid
