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
from rasterio.errors import NotGeoreferencedWarning, RasterioError

from ..errors import ParameterError

__all__ = [
    "DEFAULT_GTIFF_OPTIONS",
    "DEFAULT_COG_OPTIONS",
    "parse_creation_options",
    "gtiff_options",
    "cog_options",
    "choose_blocksize",
    "validate_creation_options",
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


def validate_creation_options(options, *, driver, dtype, count, name="creation_options"):
    """Let GDAL check creation options on a tiny in-memory raster.

    Parameters
    ----------
    options : dict
        Upper-case keys, string values.
    driver : {"GTiff", "COG"}
    dtype : str
    count : int

    Raises
    ------
    ParameterError
        When GDAL rejects an option or one of its values.
    """
    size = 64
    mem = f"/vsimem/geosr-check-{uuid.uuid4().hex}.tif"
    src = f"/vsimem/geosr-check-src-{uuid.uuid4().hex}.tif"
    try:
        with _gdal_warnings() as messages, warnings.catch_warnings():
            warnings.simplefilter("ignore", NotGeoreferencedWarning)
            try:
                if driver == "COG":
                    with rasterio.open(src, "w", driver="GTiff", width=size, height=size,
                                       count=count, dtype=dtype) as ds:
                        ds.write(np.zeros((count, size, size), dtype=dtype))
                    rasterio.shutil.copy(src, mem, driver="COG", **options)
                else:
                    with rasterio.open(mem, "w", driver=driver, width=size, height=size,
                                       count=count, dtype=dtype, **options) as ds:
                        ds.write(np.zeros((count, size, size), dtype=dtype))
            except (RasterioError, ValueError, TypeError) as exc:
                messages.append(str(exc))
        if messages:
            given = ", ".join(f"{k}={v}" for k, v in options.items())
            raise ParameterError(
                f"The {name!r} parameter must hold options the {driver} driver accepts, got "
                f"{given}; GDAL says: {'; '.join(dict.fromkeys(messages))}"
            )
    finally:
        for path in (mem, src):
            with contextlib.suppress(Exception):
                rasterio.shutil.delete(path)
