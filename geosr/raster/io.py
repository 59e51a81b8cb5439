"""Opening and checking source rasters; checking and committing destinations.

Sources are only ever opened read-only. Destinations are written to a
temporary file beside the final path and renamed into place, so a failed or
interrupted run leaves no destination and no temporary file (a process
killed outright leaves a temporary that the next run to the same
destination recognises by its name and removes).
"""

from __future__ import annotations

import contextlib
import dataclasses
import logging
import os
import re
import secrets
import shutil
import socket
import warnings
from pathlib import Path

import numpy as np
import rasterio
from rasterio.enums import ColorInterp, MaskFlags
from rasterio.errors import NotGeoreferencedWarning, RasterioError

from .._validation import MAX_BAND
from ..errors import DestinationError, InputError, ParameterError

__all__ = [
    "SUPPORTED_DTYPES",
    "SourceInfo",
    "check_utf8_path",
    "inspect_source",
    "open_source",
    "parse_bands",
    "check_bands",
    "check_destination",
    "check_free_space",
    "TempFiles",
    "temp_path",
    "remove_stale_temps",
]

#: Pixel types geosr magnifies (complex and 64-bit integers are refused).
SUPPORTED_DTYPES = ("uint8", "int8", "uint16", "int16", "uint32", "int32", "float32", "float64")

_TEMP_TAG = ".geosr-tmp-"


def _is_local_path(path):
    """Whether ``path`` names a local file (not a /vsi path, URL or subdataset)."""
    text = os.fspath(path)
    if text.startswith("/vsi"):
        return False
    if re.match(r"^[A-Za-z][A-Za-z0-9+.\-]*://", text):
        return False
    # A GDAL subdataset, NETCDF:"f.nc":var, or as rasterio lists it, netcdf:/f.nc:var
    # (two characters at least: C:\\ is a drive).
    if re.match(r"^[A-Za-z][A-Za-z0-9_]+:", text) and not os.path.exists(text):
        return False
    return True


def _shown(text):
    """``text`` for a message; bytes that are not UTF-8 shown as ``\\xe9``."""
    return text.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")


def check_utf8_path(text, where, error):
    """Refuse a path GDAL cannot be given: one with bytes that are not UTF-8.

    Parameters
    ----------
    text : str
        The path (undecodable bytes arrive as surrogate escapes).
    where : str
        What the path is, for the message ("The source raster").
    error : type
        The :class:`~geosr.errors.GeosrError` subclass to raise.
    """
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        raise error(
            f"{where} '{_shown(text)}' must have a name GDAL can open (valid UTF-8), got bytes "
            "that are not UTF-8; rename the file or link to it under a UTF-8 name"
        ) from None


def _check_path_type(path, name):
    if not isinstance(path, (str, os.PathLike)) or isinstance(path, bytes):
        raise ParameterError(f"The {name!r} parameter must be a path, got {type(path).__name__}")
    text = os.fspath(path)
    if not text:
        raise ParameterError(f"The {name!r} parameter must be a non-empty path, got ''")
    return text


@dataclasses.dataclass(frozen=True)
class SourceInfo:
    """What the pipeline needs to know about a source raster.

    Attributes
    ----------
    path : str
        The path to open (absolute for local files, so that worker processes
        find it too).
    name : str
        The file name, for provenance.
    width, height, count : int
    dtypes : tuple of str
        One per band.
    nodatavals : tuple of float or None
    mask_flags : tuple of tuple of MaskFlags
    colorinterp : tuple of ColorInterp
    descriptions, units : tuple of str or None
    scales, offsets : tuple of float
    crs : rasterio.crs.CRS or None
    transform : affine.Affine
    gcps : list of rasterio.control.GroundControlPoint
        Empty unless the raster is georeferenced by ground control points.
    gcps_crs : rasterio.crs.CRS or None
    has_rpcs : bool
    tags : dict
        Default-domain dataset tags.
    band_tags : tuple of dict
    driver : str
    rpcs : rasterio.rpc.RPC or None
        The rational polynomial coefficients, when the raster has them.
    colormaps : tuple of dict or None
        One per band: the colour table (value -> RGBA), or None.
    nbits : tuple of int or None
        One per band: the ``NBITS`` image-structure value, or None.
    """

    path: str
    name: str
    width: int
    height: int
    count: int
    dtypes: tuple
    nodatavals: tuple
    mask_flags: tuple
    colorinterp: tuple
    descriptions: tuple
    units: tuple
    scales: tuple
    offsets: tuple
    crs: object
    transform: object
    gcps: tuple
    gcps_crs: object
    has_rpcs: bool
    tags: dict
    band_tags: tuple
    driver: str
    rpcs: object = None
    colormaps: tuple = ()
    nbits: tuple = ()

    @property
    def georeferenced(self):
        """Whether the raster has a geotransform (not the identity) or GCPs."""
        return (not self.transform.is_identity) or bool(self.gcps)

    def is_alpha(self, band):
        """Whether 1-based ``band`` is an alpha band."""
        return self.colorinterp[band - 1] == ColorInterp.alpha

    def is_categorical(self, band):
        """Whether 1-based ``band`` holds categories: a palette (colour table) or 1-bit data."""
        i = band - 1
        palette = self.colorinterp[i] == ColorInterp.palette or (
            i < len(self.colormaps) and self.colormaps[i] is not None)
        return palette or (i < len(self.nbits) and self.nbits[i] == 1)

    def may_be_masked(self, band):
        """Whether some pixels of 1-based ``band`` can be invalid."""
        flags = self.mask_flags[band - 1]
        return (MaskFlags.all_valid not in flags) or np.dtype(self.dtypes[band - 1]).kind == "f"


@contextlib.contextmanager
def open_source(path):
    """Open a source raster read-only, turning every failure into InputError.

    Parameters
    ----------
    path : str or os.PathLike

    Yields
    ------
    rasterio.io.DatasetReader
    """
    text = _check_path_type(path, "src")
    check_utf8_path(text, "The source raster", InputError)
    where = f"The source raster {text!r}"
    if _is_local_path(text):
        if not os.path.exists(text):
            raise InputError(f"{where} must exist, got no such file")
        if os.path.isdir(text):
            raise InputError(f"{where} must be a file, got a directory")
        if os.path.getsize(text) == 0:
            raise InputError(f"{where} must be a raster file, got an empty file")
        if not os.access(text, os.R_OK):
            raise InputError(f"{where} must be readable, got a file without read permission")
    try:
        with warnings.catch_warnings(), _io_warnings() as problems:
            warnings.simplefilter("ignore", NotGeoreferencedWarning)
            dataset = rasterio.open(text, "r")
    except RasterioError as exc:
        raise InputError(f"{where} must be a raster that GDAL can read, got an error: {exc}") from None
    if problems:
        dataset.close()
        raise InputError(
            f"{where} must be an intact raster, got a damaged or truncated file: {problems[0]}"
        )
    missing = _missing_members(dataset)
    if missing:
        dataset.close()
        raise InputError(f"{where} must have every file it reads from, got a missing file {missing!r}")
    try:
        yield dataset
    finally:
        dataset.close()


def _missing_members(ds):
    """The first local file a VRT (or another multi-file raster) reads that is missing, or None."""
    try:
        files = list(ds.files or ())
    except RasterioError:
        return None
    for name in files[1:]:  # the first is the dataset's own file
        if _is_local_path(name) and not os.path.exists(name):
            return name
    return None


def _no_bands_message(ds, where):
    """The error for a raster with no band: a container lists its subdatasets."""
    try:
        subs = list(ds.subdatasets)
    except (RasterioError, AttributeError):
        subs = []
    if not subs:
        return (f"{where} must have at least one band of 1 x 1 pixels, got {ds.count} bands "
                f"of {ds.width} x {ds.height}")
    shown = ", ".join(subs[:_SUBDATASETS_SHOWN]) + (", …" if len(subs) > _SUBDATASETS_SHOWN else "")
    return (f"{where} must have bands, got a container of {len(subs)} subdatasets; name one of "
            f"them as the source: {shown}")


#: Subdatasets named in the error for a container with no bands.
_SUBDATASETS_SHOWN = 4


class _IOProblems(logging.Handler):
    """Collects GDAL's warnings about I/O errors while a file is opened."""

    def __init__(self):
        super().__init__(level=logging.WARNING)
        self.messages = []

    def emit(self, record):
        msg = record.getMessage()
        if "IO error" in msg or "truncated" in msg.lower() or "Cannot read" in msg:
            self.messages.append(msg.split(": ", 1)[-1])


@contextlib.contextmanager
def _io_warnings():
    handler = _IOProblems()
    logger = logging.getLogger("rasterio._env")
    logger.addHandler(handler)
    try:
        yield handler.messages
    finally:
        logger.removeHandler(handler)


#: The open-time probe skips blocks larger than this (a huge strip would be
#: a large allocation; block reads during the run still find the damage).
_PROBE_MAX_BYTES = 16 * 2**20


def _probe(ds, where):
    """Decode the last block of the raster: truncation and damage show at once."""
    from rasterio.windows import Window

    try:
        bh, bw = ds.block_shapes[0]
    except (RasterioError, IndexError):
        return
    itemsize = max(np.dtype(d).itemsize for d in ds.dtypes)
    if bh * bw * itemsize * ds.count > _PROBE_MAX_BYTES:
        return
    try:
        with _io_warnings() as problems:
            ds.read(window=Window(ds.width - 1, ds.height - 1, 1, 1))
    except RasterioError as exc:
        problems = [str(exc)]
    if problems:
        raise InputError(
            f"{where} must be readable, got a read error in its last block "
            f"(damaged or truncated file?): {problems[0]}"
        )


def inspect_source(path):
    """Open a source raster, check it, and describe it.

    Parameters
    ----------
    path : str or os.PathLike

    Returns
    -------
    SourceInfo

    Raises
    ------
    InputError
        Missing, unreadable, empty, or of an unsupported pixel type.
    """
    text = _check_path_type(path, "src")
    where = f"The source raster {text!r}"
    with open_source(text) as ds:
        if ds.width < 1 or ds.height < 1 or ds.count < 1:
            raise InputError(_no_bands_message(ds, where))
        for band, dtype in enumerate(ds.dtypes, start=1):
            if dtype not in SUPPORTED_DTYPES:
                raise InputError(
                    f"{where} must have bands of a supported pixel type "
                    f"({', '.join(SUPPORTED_DTYPES)}), got {dtype} in band {band}"
                )
        _probe(ds, where)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", NotGeoreferencedWarning)
            gcps, gcps_crs = ds.gcps
            try:
                rpcs = ds.rpcs
            except (RasterioError, AttributeError):
                rpcs = None
            transform = ds.transform
        try:
            band_tags = tuple(ds.tags(b) for b in ds.indexes)
            tags = ds.tags()
        except RasterioError:
            band_tags, tags = tuple({} for _ in ds.indexes), {}
        return SourceInfo(
            path=os.path.abspath(text) if _is_local_path(text) else text,
            name=os.path.basename(text.rstrip("/")) or text,
            width=ds.width,
            height=ds.height,
            count=ds.count,
            dtypes=tuple(ds.dtypes),
            nodatavals=tuple(ds.nodatavals),
            mask_flags=tuple(tuple(f) for f in ds.mask_flag_enums),
            colorinterp=tuple(ds.colorinterp),
            descriptions=tuple(ds.descriptions),
            units=tuple(ds.units),
            scales=tuple(ds.scales),
            offsets=tuple(ds.offsets),
            crs=ds.crs,
            transform=transform,
            gcps=tuple(gcps or ()),
            gcps_crs=gcps_crs,
            has_rpcs=rpcs is not None,
            tags=dict(tags),
            band_tags=band_tags,
            driver=ds.driver,
            rpcs=rpcs,
            colormaps=tuple(_colormap(ds, b) for b in ds.indexes),
            nbits=tuple(_nbits(ds, b) for b in ds.indexes),
        )


def _colormap(ds, band):
    """The colour table of a band (value -> RGBA), or None."""
    try:
        return dict(ds.colormap(band))
    except (ValueError, RasterioError):
        return None


def _nbits(ds, band):
    """The ``NBITS`` of a band (from its IMAGE_STRUCTURE metadata), or None."""
    try:
        value = ds.tags(band, ns="IMAGE_STRUCTURE").get("NBITS")
        return int(value) if value else None
    except (ValueError, RasterioError):
        return None


def _out_of_range(band, count):
    """The error for a band number beyond a raster's ``count`` bands."""
    has = f"the raster has {count} band{'s' if count != 1 else ''}"
    return ParameterError(
        f"The 'bands' parameter must hold band numbers from 1 to {count}, got {band}; {has}"
    )


def parse_bands(text, count=None):
    """Parse a band list such as ``"1,2,4"`` or ``"1-3"`` into 1-based indexes.

    Linear in the number of bands; a range reaching above ``count`` (or
    :data:`~geosr._validation.MAX_BAND`) is refused before it is expanded.

    Parameters
    ----------
    text : str
    count : int, optional
        Bands in the raster.

    Returns
    -------
    list of int
    """
    out: list[int] = []
    for part in str(text).replace(" ", "").split(","):
        if not part:
            continue
        m = re.fullmatch(r"(\d+)(?:-(\d+))?", part)
        if not m:
            raise ParameterError(
                f"The 'bands' parameter must be a list of band numbers such as '1,2,4' or "
                f"'1-3', got {text!r}"
            )
        lo = int(m.group(1))
        hi = int(m.group(2)) if m.group(2) else lo
        if hi < lo:
            raise ParameterError(f"The 'bands' parameter must have increasing ranges, got {part!r}")
        if hi > (MAX_BAND if count is None else count):
            if count is not None:
                raise _out_of_range(hi, count)
            raise ParameterError(f"The 'bands' parameter must hold band numbers from 1 to {MAX_BAND}, got {hi}")
        out.extend(range(lo, hi + 1))
    return out


def check_bands(bands, count):
    """Validate a selection of 1-based band indexes against a band count.

    Linear in the number of bands; a string's ranges are checked against
    ``count`` before they are expanded.

    Parameters
    ----------
    bands : None, int, str or sequence of int
        None selects every band; a string is parsed by :func:`parse_bands`.
    count : int
        Bands in the raster.

    Returns
    -------
    tuple of int
    """
    if bands is None:
        return tuple(range(1, count + 1))
    if isinstance(bands, str):
        bands = parse_bands(bands, count)
    elif isinstance(bands, (int, np.integer)) and not isinstance(bands, bool):
        bands = [bands]
    try:
        bands = list(bands)
    except TypeError:
        raise ParameterError(f"The 'bands' parameter must be a list of band numbers, got {bands!r}") from None
    if not bands:
        raise ParameterError("The 'bands' parameter must select at least one band, got none")
    for b in bands:
        if isinstance(b, bool) or not isinstance(b, (int, np.integer)):
            raise ParameterError(f"The 'bands' parameter must hold integers, got {b!r}")
        if not 1 <= b <= count:
            raise _out_of_range(int(b), count)
    if len(set(bands)) != len(bands):
        shown = list(map(int, bands[:20])) + (["..."] if len(bands) > 20 else [])
        raise ParameterError(f"The 'bands' parameter must not repeat a band, got {shown}")
    return tuple(int(b) for b in bands)


def check_destination(dst, sources=(), overwrite=False, name="dst"):
    """Check that ``dst`` can be written and is none of the ``sources``.

    Parameters
    ----------
    dst : str or os.PathLike
        A local file path.
    sources : sequence of str
        Paths that must never be overwritten (compared after resolving
        symbolic links and relative paths, and by inode).
    overwrite : bool
        Whether an existing ``dst`` may be replaced.

    Returns
    -------
    pathlib.Path
        The absolute destination path.
    """
    text = _check_path_type(dst, name)
    check_utf8_path(text, "The destination", DestinationError)
    if not _is_local_path(text):
        raise DestinationError(f"The destination {text!r} must be a local file path, got a GDAL or URL path")
    path = Path(os.path.abspath(text))
    real = os.path.realpath(path)
    for src in sources:
        src = os.fspath(src)
        same = os.path.realpath(src) == real
        if not same and os.path.exists(src) and os.path.exists(path):
            with contextlib.suppress(OSError):
                same = os.path.samefile(src, path)
        if same:
            raise DestinationError(
                f"The destination {text!r} must differ from the source, got the source itself"
            )
    if path.is_dir():
        raise DestinationError(f"The destination {text!r} must be a file path, got a directory")
    if (path.exists() or path.is_symlink()) and not overwrite:
        raise DestinationError(
            f"The destination {text!r} must not exist yet, got an existing file; "
            "pass overwrite=True (--overwrite) to replace it"
        )
    folder = path.parent
    if not folder.is_dir():
        raise DestinationError(f"The destination folder {str(folder)!r} must exist, got no such folder")
    if not os.access(folder, os.W_OK | os.X_OK):
        raise DestinationError(f"The destination folder {str(folder)!r} must be writable, got a read-only folder")
    return path


def check_free_space(folder, needed, name="destination"):
    """Refuse to start when ``folder`` has fewer than ``needed`` bytes free.

    Parameters
    ----------
    folder : str or os.PathLike
    needed : int
        Bytes the run may write.
    """
    try:
        free = shutil.disk_usage(folder).free
    except OSError:
        return
    if free < needed:
        raise DestinationError(
            f"The {name} folder {os.fspath(folder)!r} must have {_human(needed)} free for the "
            f"output (uncompressed size), got {_human(free)}; free some space, or pass "
            "check_free_space=False (--no-space-check) if compression will make it fit"
        )


def _human(n):
    for unit in ("bytes", "KiB", "MiB", "GiB", "TiB"):
        if abs(n) < 1024 or unit == "TiB":
            return f"{n:.0f} {unit}" if unit == "bytes" else f"{n:.1f} {unit}"
        n /= 1024.0
    return str(n)


# ------------------------------------------------------------------ temporaries
def _host():
    return re.sub(r"[^A-Za-z0-9]", "", socket.gethostname())[:32] or "host"


def temp_path(final, suffix=""):
    """A fresh temporary path beside ``final`` that names this process.

    The name is ``.<final name>.geosr-tmp-<host>-<pid>-<token><suffix>``, so
    :func:`remove_stale_temps` can tell a dead run's leftovers from a live
    run's files.
    """
    final = Path(final)
    token = secrets.token_hex(4)
    return final.parent / f".{final.name}{_TEMP_TAG}{_host()}-{os.getpid()}-{token}{suffix}"


def _pid_alive(pid):
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    except OSError:
        return False
    return True


def remove_stale_temps(final):
    """Remove temporaries of ``final`` left by dead runs on this host.

    Returns
    -------
    list of pathlib.Path
        The files removed.
    """
    final = Path(final)
    prefix = f".{final.name}{_TEMP_TAG}{_host()}-"
    removed = []
    try:
        entries = list(final.parent.iterdir())
    except OSError:
        return removed
    for entry in entries:
        if not entry.name.startswith(prefix):
            continue
        m = re.match(r"(\d+)-", entry.name[len(prefix):])
        if not m or _pid_alive(int(m.group(1))):
            continue
        with contextlib.suppress(OSError):
            entry.unlink()
            removed.append(entry)
    return removed


class TempFiles:
    """Temporary files that become final files all together, or not at all.

    Use as a context manager: leaving it with an exception (including
    KeyboardInterrupt) removes every temporary; :meth:`commit` renames them
    into place in the order they were made. GDAL side-car files
    (``.aux.xml``) follow their raster.
    """

    def __init__(self):
        self._pairs = []  # (temp, final)
        self._extra = []  # temporaries with no final path

    def new(self, final, suffix=""):
        """Reserve a temporary for ``final`` and return its path."""
        tmp = temp_path(final, suffix)
        self._pairs.append((tmp, Path(final)))
        return tmp

    def scratch(self, near, suffix=""):
        """Reserve a temporary that is removed at the end, never committed."""
        tmp = temp_path(near, suffix)
        self._extra.append(tmp)
        return tmp

    def discard(self, tmp):
        """Remove one temporary now (and its side-car files); it is not committed."""
        _remove_with_sidecars(tmp)
        self._pairs = [(t, f) for t, f in self._pairs if t != tmp]
        self._extra = [t for t in self._extra if t != tmp]

    def commit(self):
        """Rename every temporary into place (``os.replace``, atomic per file)."""
        for tmp in self._extra:
            _remove_with_sidecars(tmp)
        for tmp, final in self._pairs:
            aux = Path(str(tmp) + ".aux.xml")
            if aux.exists():
                os.replace(aux, str(final) + ".aux.xml")
            else:
                stale = Path(str(final) + ".aux.xml")
                if stale.exists():
                    with contextlib.suppress(OSError):
                        stale.unlink()
            try:
                os.replace(tmp, final)
            except OSError as exc:
                raise DestinationError(
                    f"The destination {str(final)!r} must be writable, got an error when "
                    f"renaming the finished file into place: {exc}"
                ) from None
        self._pairs = []
        self._extra = []

    def cleanup(self):
        """Remove every temporary that was not committed."""
        for tmp, _ in self._pairs:
            _remove_with_sidecars(tmp)
        for tmp in self._extra:
            _remove_with_sidecars(tmp)
        self._pairs = []
        self._extra = []

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        self.cleanup()
        return False


def _remove_with_sidecars(tmp):
    for p in (Path(tmp), Path(str(tmp) + ".aux.xml"), Path(str(tmp) + ".msk"), Path(str(tmp) + ".ovr")):
        with contextlib.suppress(OSError):
            p.unlink()
