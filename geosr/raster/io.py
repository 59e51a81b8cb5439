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
import errno
import hashlib
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
    "dataset_files",
    "check_free_space",
    "TempFiles",
    "publish",
    "temp_path",
    "remove_stale_temps",
]

#: Pixel types geosr magnifies (complex and 64-bit integers are refused).
SUPPORTED_DTYPES = ("uint8", "int8", "uint16", "int16", "uint32", "int32", "float32", "float64")

_TEMP_TAG = ".geosr-tmp-"

log = logging.getLogger(__name__)


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


#: Sidecar files GDAL reads beside a raster (masks, overviews, PAM metadata).
_SIDECARS = (".msk", ".ovr", ".msk.ovr", ".aux.xml", ".ovr.aux.xml")

#: VRTs opened while following the members of a VRT (a VRT of VRTs).
_NESTED_VRT_LIMIT = 64


def _local_file(text):
    """The local file behind a path GDAL reads: itself, an archive, a subdataset's file, or None."""
    if text.startswith("/vsi"):
        parts = text.split("/", 2)[2].split("/")  # after '/vsizip/': the archive is the longest file prefix
        for n in range(len(parts), 0, -1):
            candidate = "/".join(parts[:n])
            if candidate and os.path.isfile(candidate):
                return os.path.abspath(candidate)
        return None
    if re.match(r"^[A-Za-z][A-Za-z0-9+.\-]*://", text):
        return None
    if not os.path.exists(text):
        m = re.match(r'^[A-Za-z0-9_]+:"([^"]+)"', text)  # e.g. NETCDF:"f.nc":var
        return os.path.abspath(m.group(1)) if m else os.path.abspath(text)
    return os.path.abspath(text)


def _gdal_file_list(text):
    """GDAL's file list of a dataset (rasterio's ``files``), or [] when it does not open."""
    try:
        with warnings.catch_warnings(), rasterio.Env(CPL_DEBUG=False):
            warnings.simplefilter("ignore")
            with rasterio.open(text) as ds:
                return list(ds.files)
    except Exception:  # noqa: BLE001 - anything GDAL cannot open lists only itself
        return []


def dataset_files(path):
    """Every local file that reading the raster ``path`` may read.

    The dataset's own list (rasterio's ``DatasetReader.files``: the file, VRT
    members, ``.msk``/``.ovr``/``.aux.xml`` sidecars), the sidecars of each
    member that exist, and the members of nested VRTs. A ``/vsizip/`` or
    ``/vsitar/`` path gives its archive, a subdataset name its file, a remote
    path nothing; a file GDAL cannot open gives only itself.

    Parameters
    ----------
    path : str or os.PathLike

    Returns
    -------
    list of str
        Absolute paths (symbolic links not resolved), ``path``'s own file first.
    """
    top = os.fspath(path)
    files: list[str] = []
    todo, opened = [top], 0
    while todo:
        current = todo.pop(0)
        listed = [current]
        if opened < _NESTED_VRT_LIMIT and (current == top or current.lower().endswith(".vrt")):
            opened += 1
            listed += _gdal_file_list(current)
        for f in listed:
            local = _local_file(f)
            if local is None or local in files:
                continue
            files.append(local)
            files += [c for c in (local + ext for ext in _SIDECARS) if os.path.isfile(c) and c not in files]
            if local != _local_file(current) and local.lower().endswith(".vrt"):
                todo.append(local)
    return files


def _identity(path):
    """(resolved path, (device, inode) or None) of a file that may not exist."""
    real = os.path.realpath(path)
    try:
        st = os.stat(path)
    except (OSError, ValueError):
        return real, None
    return real, (st.st_dev, st.st_ino)


def _same(a, b):
    return a[0] == b[0] or (a[1] is not None and a[1] == b[1])


def _sidecar_name(target):
    return f"The sidecar {str(target)!r} that geosr writes beside the destination"


def _refuse_read_files(what, targets, sources, reads):
    """Refuse when a path the run writes is a file it reads (after links)."""
    wanted = [(t, _identity(t)) for t in targets]
    for n, src in enumerate(sources):
        src_text = os.fspath(src)
        files = dataset_files(src_text)
        for i, f in enumerate(files):
            ident = _identity(f)
            for k, (target, t_ident) in enumerate(wanted):
                if not _same(ident, t_ident):
                    continue
                who = what if k == 0 else _sidecar_name(target)
                if i == 0 and n == 0 and k == 0:
                    raise DestinationError(f"{who} must differ from the source, got the source itself")
                got = f"the input {src_text!r} itself" if i == 0 else f"{f!r}, which the run reads for {src_text!r}"
                raise DestinationError(f"{who} must differ from every file the run reads, got {got}")
    for r in reads:
        ident = _identity(os.fspath(r))
        for k, (target, t_ident) in enumerate(wanted):
            if _same(ident, t_ident):
                who = what if k == 0 else _sidecar_name(target)
                raise DestinationError(
                    f"{who} must differ from every file the run reads, got {os.fspath(r)!r}, "
                    "which the run reads"
                )


def _name_max(folder):
    try:
        return int(os.pathconf(folder, "PC_NAME_MAX"))
    except (OSError, ValueError):
        return 255


def _name_fits(path):
    """Whether ``path``'s file name is within its file system's limit (255 bytes on most)."""
    return len(os.fsencode(Path(path).name)) <= _name_max(Path(path).parent)


def _check_name_length(path, what):
    limit = _name_max(path.parent)
    size = len(os.fsencode(path.name))
    if size > limit:
        raise DestinationError(f"{what} must have a file name of at most {limit} bytes, got {size} bytes")


def check_destination(dst, sources=(), overwrite=False, name="dst", *, reads=(), sidecars=()):
    """Check that ``dst`` can be written and is none of the files the run reads.

    Parameters
    ----------
    dst : str or os.PathLike
        A local file path (not a folder, not ending in ``/``).
    sources : sequence of str
        Rasters the run reads; each one's files (:func:`dataset_files`) must
        never be written. Compared after resolving symbolic links and relative
        paths, and by device and inode (hard links). Refused even with
        ``overwrite``.
    overwrite : bool
        Whether an existing ``dst`` may be replaced.
    name : str
        The parameter's name, for the messages (``"stac"`` names the STAC sidecar).
    reads : sequence of str
        Other files the run reads (model files), compared the same way.
    sidecars : sequence of str
        Suffixes of files written or replaced beside ``dst`` (``".aux.xml"``):
        they must not be read files either, and must not exist without ``overwrite``.

    Returns
    -------
    pathlib.Path
        The absolute destination path.
    """
    text = _check_path_type(dst, name)
    check_utf8_path(text, "The destination", DestinationError)
    what = f"The STAC sidecar {text!r}" if name == "stac" else f"The destination {text!r}"
    if not _is_local_path(text):
        raise DestinationError(f"{what} must be a local file path, got a GDAL or URL path")
    if text.endswith(("/", os.sep)) or os.path.basename(text) in (".", ".."):
        raise DestinationError(f"{what} must be a file path, got a folder path (ending in '/', '.' or '..')")
    path = Path(os.path.abspath(text))
    _check_name_length(path, what)
    sidecars = [s for s in sidecars if _name_fits(Path(str(path) + s))]  # longer names cannot exist
    _refuse_read_files(what, [path, *(Path(str(path) + s) for s in sidecars)], sources, reads)
    if os.path.isdir(path):
        raise DestinationError(f"{what} must be a file path, got a directory")
    if os.path.lexists(path) and not overwrite:
        raise DestinationError(
            f"{what} must not exist yet, got an existing file; "
            "pass overwrite=True (--overwrite) to replace it"
        )
    for suffix in sidecars if not overwrite else ():
        side = Path(str(path) + suffix)
        if os.path.lexists(side):
            raise DestinationError(
                f"{what} must not have a sidecar yet, got an existing {str(side)!r} that would describe "
                "the new file; remove it, or pass overwrite=True (--overwrite) to replace it"
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


#: Bytes of a temporary's name kept for the final name: what is left of 255
#: after the dot, the tag, the longest host (32) and pid (10), the token (8),
#: their separators and 16 for the suffix and a GDAL sidecar (".msk.ovr").
_TEMP_STEM_BYTES = 255 - 1 - len(_TEMP_TAG) - 32 - 1 - 10 - 1 - 8 - 16


def _temp_stem(name):
    """``name``, or a shortened form of it (prefix + hash) that keeps temporaries under 255 bytes."""
    raw = os.fsencode(name)
    if len(raw) <= _TEMP_STEM_BYTES:
        return name
    digest = hashlib.sha256(raw).hexdigest()[:16]
    head = raw[: _TEMP_STEM_BYTES - len(digest) - 1].decode("utf-8", "ignore")  # whole characters only
    return f"{head}~{digest}"


def temp_path(final, suffix=""):
    """A fresh temporary path beside ``final`` that names this process.

    The name is ``.<final name>.geosr-tmp-<host>-<pid>-<token><suffix>``, so
    :func:`remove_stale_temps` can tell a dead run's leftovers from a live
    run's files. A final name too long to leave room for the rest is
    shortened to its first bytes and a hash of the whole name, so the
    temporary stays within the 255-byte limit of file names.
    """
    final = Path(final)
    token = secrets.token_hex(4)
    return final.parent / f".{_temp_stem(final.name)}{_TEMP_TAG}{_host()}-{os.getpid()}-{token}{suffix}"


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
    prefix = f".{_temp_stem(final.name)}{_TEMP_TAG}{_host()}-"
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


#: errno values of file systems that do not support hard links.
_NO_HARD_LINKS = {errno.EPERM, errno.ENOTSUP, errno.EOPNOTSUPP, errno.ENOSYS, errno.EMLINK, errno.EXDEV}


def _reserve(final, suffix):
    """A temporary path beside ``final``, created empty and exclusively (it never replaces a file)."""
    for _ in range(64):
        tmp = temp_path(final, suffix)
        try:
            os.close(os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666))
        except FileExistsError:
            continue
        except OSError as exc:
            raise DestinationError(
                f"The destination folder {str(Path(final).parent)!r} must be writable, got an error "
                f"creating a temporary file: {exc.strerror or exc}"
            ) from None
        return tmp
    raise DestinationError(f"The destination folder {str(Path(final).parent)!r} must allow a new temporary file")


def _appeared(final):
    return DestinationError(
        f"The destination {str(final)!r} must not exist yet, got a file that appeared while this run "
        "was writing (another run writing the same file?); pass overwrite=True (--overwrite) to replace it"
    )


def _rename_error(final, exc):
    return DestinationError(
        f"The destination {str(final)!r} must be writable, got an error when "
        f"renaming the finished file into place: {exc}"
    )


def publish(tmp, final, overwrite=False):
    """Move the finished file ``tmp`` to ``final`` in one step.

    With ``overwrite``: :func:`os.replace`. Without: :func:`os.link` then
    unlink of ``tmp``, which fails with ``EEXIST`` (so it refuses) when
    ``final`` exists, even if another process created it a moment ago. On
    file systems without hard links (FAT, some network and FUSE mounts) the
    name is reserved with an exclusive create (``O_CREAT | O_EXCL``, which is
    just as atomic) and ``tmp`` renamed over the reservation; for that
    instant ``final`` exists as an empty file.

    Raises
    ------
    DestinationError
        ``final`` exists (without ``overwrite``) or cannot be written.
    """
    if overwrite:
        try:
            os.replace(tmp, final)
        except OSError as exc:
            raise _rename_error(final, exc) from None
        return
    try:
        os.link(tmp, final)
    except FileExistsError:
        raise _appeared(final) from None
    except OSError as exc:
        if exc.errno not in _NO_HARD_LINKS:
            raise _rename_error(final, exc) from None
        _publish_by_reservation(tmp, final)
        return
    with contextlib.suppress(OSError):
        os.unlink(tmp)


def _publish_by_reservation(tmp, final):
    try:
        os.close(os.open(final, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600))
    except FileExistsError:
        raise _appeared(final) from None
    except OSError as exc:
        raise _rename_error(final, exc) from None
    try:
        os.replace(tmp, final)
    except OSError as exc:
        with contextlib.suppress(OSError):
            os.unlink(final)
        raise _rename_error(final, exc) from None


class TempFiles:
    """Temporary files that become final files all together, or not at all.

    Use as a context manager: leaving it with an exception (including
    KeyboardInterrupt) removes every temporary; :meth:`commit` moves them
    into place in the order they were made. GDAL side-car files
    (``.aux.xml``) follow their raster. Temporaries are created exclusively,
    so a temporary never replaces an existing file.
    """

    def __init__(self):
        self._pairs = []  # (temp, final)
        self._extra = []  # temporaries with no final path

    def new(self, final, suffix=""):
        """Reserve a temporary for ``final`` and return its path."""
        tmp = _reserve(final, suffix)
        self._pairs.append((tmp, Path(final)))
        return tmp

    def scratch(self, near, suffix=""):
        """Reserve a temporary that is removed at the end, never committed."""
        tmp = _reserve(near, suffix)
        self._extra.append(tmp)
        return tmp

    def discard(self, tmp):
        """Remove one temporary now (and its side-car files); it is not committed."""
        _remove_with_sidecars(tmp)
        self._pairs = [(t, f) for t, f in self._pairs if t != tmp]
        self._extra = [t for t in self._extra if t != tmp]

    def commit(self, overwrite=False):
        """Move every temporary into place (:func:`publish`, atomic per file).

        Without ``overwrite`` a final file that exists by now (another run
        wrote it meanwhile) is refused and the files this commit already
        placed are taken back, so nothing is replaced.
        """
        for tmp in self._extra:
            _remove_with_sidecars(tmp)
        self._extra = []
        moves = []
        for tmp, final in self._pairs:
            aux, final_aux = Path(str(tmp) + ".aux.xml"), Path(str(final) + ".aux.xml")
            if os.path.exists(aux) and not _name_fits(final_aux):
                log.warning("dropped GDAL's %s: the name %s.aux.xml is too long", aux.name, final.name)
                _remove_with_sidecars(aux)
            elif os.path.exists(aux):
                moves.append((aux, final_aux))
            elif overwrite and _name_fits(final_aux):
                with contextlib.suppress(OSError):
                    final_aux.unlink()
            moves.append((tmp, final))
        placed = []
        try:
            for tmp, final in moves:
                ident = _identity(tmp)[1]
                publish(tmp, final, overwrite)
                placed.append((final, ident))
        except BaseException:
            if not overwrite:
                _take_back(placed)
            raise
        self._pairs = []

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


def _take_back(placed):
    """Remove files this run placed (only while they are still this run's: same inode)."""
    for final, ident in placed:
        if ident is not None and _identity(final)[1] == ident:
            with contextlib.suppress(OSError):
                os.unlink(final)


def _remove_with_sidecars(tmp):
    for p in (Path(tmp), Path(str(tmp) + ".aux.xml"), Path(str(tmp) + ".msk"), Path(str(tmp) + ".ovr")):
        with contextlib.suppress(OSError):
            p.unlink()
