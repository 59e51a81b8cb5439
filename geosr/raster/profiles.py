"""Output profiles: tiled compressed GeoTIFF by default, COG on request.

Creation options are parsed once (``KEY=VALUE`` strings or a mapping) and
checked by GDAL itself on a tiny in-memory raster before any real writing,
so a misspelt option fails at once instead of being ignored with a warning.
"""

from __future__ import annotations

import contextlib
import logging
import re
import uuid
import warnings

import numpy as np
import rasterio
import rasterio.shutil
from rasterio.errors import NotGeoreferencedWarning

from ..errors import ParameterError
from .blocks import READ_ERRORS
from .writing import _error_detail

__all__ = [
    "DEFAULT_GTIFF_OPTIONS",
    "DEFAULT_COG_OPTIONS",
    "parse_creation_options",
    "gtiff_options",
    "cog_options",
    "choose_blocksize",
    "validate_creation_options",
    "creation_option_error",
    "COG_BLOCKSIZES",
]

#: Defaults of the tiled GeoTIFF output (the block size is chosen per run).
DEFAULT_GTIFF_OPTIONS = {"TILED": "YES", "COMPRESS": "DEFLATE", "BIGTIFF": "IF_SAFER"}

#: Defaults of the Cloud Optimized GeoTIFF output (GDAL's COG driver).
DEFAULT_COG_OPTIONS = {"COMPRESS": "DEFLATE", "BLOCKSIZE": "512", "BIGTIFF": "IF_SAFER",
                       "OVERVIEWS": "AUTO"}

_KEY = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")


def parse_creation_options(options, name="creation_options"):
    """Normalise creation options to a dict of upper-case keys and string values.

    Parameters
    ----------
    options : None, mapping, or sequence of ``"KEY=VALUE"`` strings

    Returns
    -------
    dict
    """
    if options is None:
        return {}
    items = []
    if isinstance(options, str):
        options = [options]
    if hasattr(options, "items"):
        items = [(str(k), v) for k, v in options.items()]
    else:
        try:
            options = list(options)
        except TypeError:
            raise ParameterError(
                f"The {name!r} parameter must be KEY=VALUE strings or a mapping, got {options!r}"
            ) from None
        for opt in options:
            if not isinstance(opt, str) or "=" not in opt:
                raise ParameterError(
                    f"The {name!r} parameter must hold KEY=VALUE strings, got {opt!r}"
                )
            key, value = opt.split("=", 1)
            items.append((key.strip(), value.strip()))
    out = {}
    for key, value in items:
        if not _KEY.match(key):
            raise ParameterError(
                f"The {name!r} parameter must have keys of letters, digits and '_', got {key!r}"
            )
        if isinstance(value, bool):
            value = "YES" if value else "NO"
        value = str(value)
        if value == "" or "\n" in value:
            raise ParameterError(f"The {name!r} parameter must give {key.upper()} a value, got {value!r}")
        out[key.upper()] = value
    return out


def choose_blocksize(out_chunk):
    """GeoTIFF tile side that divides the output block side when possible.

    Blocks written whole are compressed once; a tile shared by two blocks
    is written twice. Picks the largest of 512, 256, 128, 64, 32, 16 that
    divides ``out_chunk`` (GeoTIFF tiles must be multiples of 16), else 256.
    """
    for size in (512, 256, 128, 64, 32, 16):
        if out_chunk % size == 0 and size <= max(out_chunk, 16):
            return size
    return 256


def gtiff_options(user, dtype, blocksize):
    """Creation options of the tiled GeoTIFF: defaults overridden by ``user``."""
    opts = dict(DEFAULT_GTIFF_OPTIONS)
    opts["BLOCKXSIZE"] = str(blocksize)
    opts["BLOCKYSIZE"] = str(blocksize)
    opts["PREDICTOR"] = "3" if np.dtype(dtype).kind == "f" else "2"
    opts.update(user or {})
    # A predictor only goes with the lossless dictionary codecs.
    if "PREDICTOR" not in (user or {}) and str(opts.get("COMPRESS", "")).upper() not in (
        "DEFLATE", "LZW", "ZSTD", "LZMA"
    ):
        opts.pop("PREDICTOR")
    return opts


def cog_options(user, dtype):
    """Creation options of the COG copy: defaults overridden by ``user``."""
    opts = dict(DEFAULT_COG_OPTIONS)
    opts["PREDICTOR"] = "YES"
    opts.update(user or {})
    return opts


class _Collect(logging.Handler):
    def __init__(self):
        super().__init__(level=logging.WARNING)
        self.messages = []

    def emit(self, record):
        msg = record.getMessage()
        if "CPLE_NotSupported" in msg or "CPLE_IllegalArg" in msg:
            self.messages.append(msg.split(" in ", 1)[-1])


@contextlib.contextmanager
def _gdal_warnings():
    handler = _Collect()
    loggers = [logging.getLogger(n) for n in ("rasterio._env", "rasterio._io", "rasterio._base")]
    saved = [(lg, lg.level, lg.propagate) for lg in loggers]
    for lg in loggers:
        lg.addHandler(handler)
        if lg.getEffectiveLevel() > logging.WARNING:
            lg.setLevel(logging.WARNING)
        lg.propagate = False
    try:
        yield handler.messages
    finally:
        for lg, level, propagate in saved:
            lg.removeHandler(handler)
            lg.setLevel(level)
            lg.propagate = propagate


#: Tile sides the COG driver's BLOCKSIZE may take: GDAL's own minimum (128,
#: from its creation option list) to 4096, in steps of 16 (TIFF tiles are
#: multiples of 16). GDAL is given no other value: it hangs or aborts on a
#: negative, zero or non-numeric BLOCKSIZE, and larger tiles defeat a COG's
#: purpose (a reader fetches whole tiles). The upper bound is geosr's choice.
COG_BLOCKSIZES = range(128, 4096 + 1, 16)


def _check_cog_blocksize(options, name):
    """The COG tile side, checked before GDAL sees it."""
    text = options.get("BLOCKSIZE", DEFAULT_COG_OPTIONS["BLOCKSIZE"])
    size = int(text) if re.fullmatch(r"\+?\d{1,6}", text.strip()) else None
    if size not in COG_BLOCKSIZES:
        raise ParameterError(
            f"The {name!r} parameter must give BLOCKSIZE a multiple of 16 from "
            f"{COG_BLOCKSIZES.start} to {COG_BLOCKSIZES.stop - 1} for a COG, got {text!r}"
        )
    return size


def creation_option_error(options, driver, reasons, name="creation_options"):
    """The usage error for options GDAL refused, with GDAL's own reasons."""
    given = ", ".join(f"{k}={v}" for k, v in options.items())
    return ParameterError(
        f"The {name!r} parameter must hold options the {driver} driver accepts, got "
        f"{given}; GDAL says: {'; '.join(dict.fromkeys(reasons))}"
    )


def _try_options(options, driver, dtype, count, crs, transform):
    """Write a small raster with the options in /vsimem/; GDAL's complaints, if any.

    For a COG the raster is one pixel wider than a tile, so that GDAL builds
    overviews and checks the options it reads only then (OVERVIEW_*).
    """
    width, height = 64, 64
    if driver == "COG":
        width, height = int(options.get("BLOCKSIZE", DEFAULT_COG_OPTIONS["BLOCKSIZE"])) + 1, 16
    geo = {"crs": crs, "transform": transform} if crs is not None and transform is not None else {}
    mem = f"/vsimem/geosr-check-{uuid.uuid4().hex}.tif"
    src = f"/vsimem/geosr-check-src-{uuid.uuid4().hex}.tif"
    zeros = np.zeros((count, height, width), dtype=dtype)
    try:
        with _gdal_warnings() as messages, warnings.catch_warnings():
            warnings.simplefilter("ignore", NotGeoreferencedWarning)
            try:
                if driver == "COG":
                    with rasterio.open(src, "w", driver="GTiff", width=width, height=height,
                                       count=count, dtype=dtype, **geo) as ds:
                        ds.write(zeros)
                    rasterio.shutil.copy(src, mem, driver="COG", **options)
                else:
                    with rasterio.open(mem, "w", driver=driver, width=width, height=height,
                                       count=count, dtype=dtype, **geo, **options) as ds:
                        ds.write(zeros)
            except (*READ_ERRORS, ValueError, TypeError) as exc:
                messages.append(_error_detail(exc))
        return [m.replace(mem, "the output").replace(src, "the output") for m in messages]
    finally:
        for path in (mem, src):
            with contextlib.suppress(Exception):
                rasterio.shutil.delete(path)


def validate_creation_options(options, *, driver, dtype, count, name="creation_options",
                              crs=None, transform=None):
    """Let GDAL check creation options on a small in-memory raster.

    For a COG the tile side is checked first (GDAL hangs on some values) and
    the trial raster is wider than a tile, so that the options GDAL reads
    only while it builds overviews (``OVERVIEW_RESAMPLING``...) are checked
    too, before the run rather than after it.

    Parameters
    ----------
    options : dict
        Upper-case keys, string values.
    driver : {"GTiff", "COG"}
    dtype : str
    count : int
    name : str
        The parameter named in the error.
    crs, transform : optional
        The output's georeferencing, given to the trial raster (options such
        as the COG's ``TILING_SCHEME`` need one).

    Raises
    ------
    ParameterError
        When GDAL rejects an option or one of its values (exit 2 on the
        command line), with GDAL's reasons.
    """
    if driver == "COG":
        _check_cog_blocksize(options, name)
    reasons = _try_options(options, driver, dtype, count, crs, transform)
    if reasons:
        raise creation_option_error(options, driver, reasons, name)
