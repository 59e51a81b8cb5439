"""Writing the magnified raster: profile, metadata, blocks, COG copy.

One writer in the main process writes finished blocks as they arrive (in
completion order) into a temporary tiled GeoTIFF beside the destination.
For a Cloud Optimized GeoTIFF that file is then copied by GDAL's COG driver,
which streams it and builds the overviews, to a second temporary. The
caller renames the result into place (see :class:`geosr.raster.io.TempFiles`).
"""

from __future__ import annotations

import contextlib
import errno
import os
import shutil
import warnings

import numpy as np
import rasterio
import rasterio.shutil
from rasterio.enums import ColorInterp
from rasterio.errors import NotGeoreferencedWarning

from ..errors import DestinationError
from .blocks import READ_ERRORS
from .transforms import scale_gcps, scale_rpcs, scaled_transform

__all__ = ["output_profile", "OutputRaster", "copy_to_cog"]


def output_profile(info, bands, dtype, scale, nodata, options):
    """The rasterio profile of the magnified raster.

    Parameters
    ----------
    info : SourceInfo
    bands : tuple of int
    dtype : str
    scale : int
    nodata : float or None
    options : dict
        GeoTIFF creation options (upper-case keys).

    Returns
    -------
    dict
    """
    profile = {
        "driver": "GTiff",
        "width": info.width * scale,
        "height": info.height * scale,
        "count": len(bands),
        "dtype": dtype,
        "nodata": nodata,
    }
    if info.crs is not None and not info.transform.is_identity:
        profile["crs"] = info.crs
    # A raster georeferenced by GCPs or RPCs alone gets no geotransform:
    # GDAL would prefer it to them.
    if not info.transform.is_identity or not (info.gcps or info.rpcs is not None):
        profile["transform"] = scaled_transform(info.transform, scale)
    colors = [info.colorinterp[b - 1] for b in bands]
    opts = dict(options)
    nbits = {info.nbits[b - 1] if b <= len(info.nbits) else None for b in bands}
    if nbits == {1} and "NBITS" not in opts and np.dtype(dtype) == np.uint8:
        # 1-bit categories stay 1-bit (magnified by nearest neighbour, values stay 0 and 1).
        opts["NBITS"] = "1"
        opts.pop("PREDICTOR", None)
    if (
        "PHOTOMETRIC" not in opts
        and colors[:3] == [ColorInterp.red, ColorInterp.green, ColorInterp.blue]
        and np.dtype(dtype).kind == "u" and np.dtype(dtype).itemsize <= 2
    ):
        opts["PHOTOMETRIC"] = "RGB"
    profile.update(opts)
    return profile


def _error_detail(exc):
    """The text of ``exc``, with the GDAL errors it chains to ("see previous exception")."""
    texts = []
    seen = exc
    while seen is not None and len(texts) < 4:
        text = " ".join(str(seen).split())
        if text and text not in texts:
            texts.append(text)
        seen = seen.__cause__ or seen.__context__
    detail = "; ".join(t for t in texts if "See previous exception" not in t) or "; ".join(texts)
    return detail or type(exc).__name__


def _destination_error(path, exc, what="writing"):
    detail = _error_detail(exc)
    if isinstance(exc, OSError) and exc.errno == errno.ENOSPC:
        full = True
    else:
        try:
            full = shutil.disk_usage(os.path.dirname(os.path.abspath(path))).free < 2**20
        except OSError:
            full = False
    if full and "No space left" not in detail:
        detail = f"No space left on device ({detail})"
    return DestinationError(
        f"The destination must be writable, got an error while {what} {str(path)!r} "
        f"(disk full or folder removed?): {detail}"
    )


def _write_colormaps(ds, info, bands):
    """Carry the colour tables of the selected palette bands.

    GeoTIFF holds one colour table, for the first band of a byte or 16-bit
    file: a table the format cannot hold is reported, not silently dropped.
    """
    for i, b in enumerate(bands, start=1):
        cmap = info.colormaps[b - 1] if b <= len(info.colormaps) else None
        if not cmap:
            continue
        if i != 1 or np.dtype(ds.dtypes[0]) not in (np.uint8, np.uint16):
            warnings.warn(
                f"The colour table of band {b} of {info.name!r} is not carried: a GeoTIFF holds "
                "one colour table, for its first band, of byte or 16-bit pixels; select the "
                "band first (--bands) to keep it",
                UserWarning,
                stacklevel=4,
            )
            continue
        ds.write_colormap(i, cmap)


class OutputRaster:
    """A temporary output GeoTIFF open for writing blocks.

    Parameters
    ----------
    path : str or os.PathLike
        The temporary file.
    profile : dict
        From :func:`output_profile`.
    scale : int
    write_mask : bool
        Write an internal per-dataset mask from ``BlockResult.mask``.
    """

    def __init__(self, path, profile, scale, write_mask=False):
        self.path = path
        self.profile = profile
        self.scale = scale
        self.write_mask = write_mask
        self.ds = None
        self.blocks_written = 0

    def open(self):
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", NotGeoreferencedWarning)
                self.ds = rasterio.open(self.path, "w", **self.profile)
        except READ_ERRORS as exc:
            raise _destination_error(self.path, exc, "creating") from None
        return self

    def set_metadata(self, info, bands, tags, band_tags, colorinterp=True):
        """Carry the source's band metadata and write the tags.

        Parameters
        ----------
        info : SourceInfo
        bands : tuple of int
            Source bands in output order.
        tags : dict
            Dataset tags (default domain).
        band_tags : sequence of dict
            One per output band.
        """
        ds = self.ds
        try:
            ds.update_tags(**tags)
            for i, b in enumerate(bands, start=1):
                if band_tags[i - 1]:
                    ds.update_tags(i, **band_tags[i - 1])
                if info.descriptions[b - 1]:
                    ds.set_band_description(i, info.descriptions[b - 1])
                if info.units[b - 1]:
                    ds.set_band_unit(i, info.units[b - 1])
            ds.scales = tuple(info.scales[b - 1] for b in bands)
            ds.offsets = tuple(info.offsets[b - 1] for b in bands)
            _write_colormaps(ds, info, bands)
            if colorinterp:
                ds.colorinterp = tuple(info.colorinterp[b - 1] for b in bands)
            if info.transform.is_identity and info.gcps:
                ds.gcps = (scale_gcps(info.gcps, self.scale), info.gcps_crs)
            if info.rpcs is not None:
                ds.rpcs = scale_rpcs(info.rpcs, self.scale)
        except READ_ERRORS as exc:
            raise _destination_error(self.path, exc, "tagging") from None

    def update_tags(self, tags, band_tags=()):
        """Add dataset tags and per-band tags (one dict per band) before closing."""
        try:
            self.ds.update_tags(**tags)
            for i, bt in enumerate(band_tags, start=1):
                if bt:
                    self.ds.update_tags(i, **bt)
        except READ_ERRORS as exc:
            raise _destination_error(self.path, exc, "tagging") from None

    def write(self, result):
        """Write one finished block (see ``BlockResult``)."""
        window = result.block.scaled(self.scale)
        try:
            self.ds.write(result.data, window=window)
            if self.write_mask and result.mask is not None:
                self.ds.write_mask(result.mask, window=window)
        except READ_ERRORS as exc:
            raise _destination_error(self.path, exc) from None
        self.blocks_written += 1

    def close(self):
        if self.ds is None:
            return
        ds, self.ds = self.ds, None
        try:
            ds.close()
        except READ_ERRORS as exc:
            raise _destination_error(self.path, exc, "finishing") from None

    def abandon(self):
        """Close without caring for errors (the file will be removed)."""
        if self.ds is not None:
            with contextlib.suppress(Exception):
                self.ds.close()
            self.ds = None

    def __enter__(self):
        return self.open()

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            self.close()
        else:
            self.abandon()
        return False


def copy_to_cog(src, dst, options):
    """Copy a finished GeoTIFF to a Cloud Optimized GeoTIFF with GDAL's COG driver.

    GDAL streams the copy block by block and adds the overviews; the whole
    raster is never held in memory.

    Parameters
    ----------
    src, dst : str or os.PathLike
    options : dict
        COG creation options.
    """
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", NotGeoreferencedWarning)
            rasterio.shutil.copy(str(src), str(dst), driver="COG", **options)
    except READ_ERRORS as exc:
        raise _destination_error(dst, exc, "writing the COG") from None
