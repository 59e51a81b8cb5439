"""Guide rasters: finer co-registered files read on the exact fine grid.

Guided magnification takes the scale from the guides: it is the ratio of the
source's pixel size to the guides' (an integer from 2 to 8). The fine grid
is the source's grid with its pixel size divided by that scale and the same
origin (:func:`geosr.raster.transforms.scaled_transform`), ``s * height`` by
``s * width`` pixels. A guide file that lies exactly on that grid is read
directly by window; any other (another CRS, a shifted origin, a rotation, a
slightly different pixel size) is resampled onto it through a GDAL warped
VRT, with a warning.

Decisions
---------
- Scale tolerance: the pixel-size ratio must be within a relative 1e-3 of an
  integer in both axes when guide and source share a CRS (geotransforms
  stored as text lose digits, e.g. 0.000277778 degrees); for a guide in
  another CRS its pixel size is estimated in the source's pixels at the
  centre of the overlap and the tolerance is 1e-2, since the two
  projections' scale factors differ across a scene by up to about 1e-3
  (UTM: 0.9996 at the central meridian, about 1.001 at a zone's edge) and
  the guide is resampled onto the fine grid anyway.
- Resampling defaults to cubic (GDAL's cubic convolution): the guide is
  there for its finest detail; nearest neighbour would move edges by up to
  half a pixel and bilinear interpolation smooths the very frequencies the
  guide supplies.
- Warped reads use a near-exact transformer (error bound 1e-9 pixels instead
  of GDAL's default 1/8 pixel) and fix the kernel scale to 1 (GDAL
  otherwise estimates it per request), so that a pixel of the fine grid gets
  the same value whatever block it is read with: blocks reproduce the whole
  image.
- A guide without georeferencing (no CRS and an identity geotransform) is
  accepted only with a source that has none either, and then only when it is
  exactly ``s`` times the source's size in both axes (it is taken to cover the
  same ground, pixel corner on pixel corner); a guide or source with a CRS
  facing one without is refused, as is a guide (or source) located by ground
  control points only.
- Alpha bands are masks, not measurements: they are left out of the default
  band selection and refused when selected.
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
import os
import warnings

import numpy as np
import rasterio
from affine import Affine
from rasterio.enums import Resampling
from rasterio.errors import NotGeoreferencedWarning, RasterioError
from rasterio.vrt import WarpedVRT
from rasterio.warp import transform as warp_points
from rasterio.warp import transform_bounds
from rasterio.windows import Window

from ..errors import GeoreferencingWarning, InputError, ParameterError
from .blocks import READ_ERRORS
from .io import _check_path_type, _is_local_path, check_bands, inspect_source
from .transforms import apply_transform, crs_summary, scaled_transform
from .windows import Block, halo_read, pad_symmetric

__all__ = [
    "GUIDE_RESAMPLING",
    "GuideSpec",
    "open_guides",
    "read_guide_block",
    "sha256_file",
]

#: Resampling methods for guides that are not on the fine grid (interpolators only).
GUIDE_RESAMPLING = ("nearest", "bilinear", "cubic", "cubic_spline", "lanczos")
#: Relative tolerance of the pixel-size ratio for a guide in the source's CRS.
SCALE_TOLERANCE = 1e-3
#: Relative tolerance of the estimated ratio for a guide in another CRS.
REPROJECTED_SCALE_TOLERANCE = 1e-2
#: How far (in guide pixels, anywhere over the fine grid) a guide may be from
#: the fine grid and still be read directly.
ALIGN_TOLERANCE = 1e-3
#: Error bound of GDAL's approximate transformer for warped reads, in pixels.
WARP_TOLERANCE = 1e-9
_SMALL_DTYPES = ("uint8", "int8", "uint16", "int16", "float32")


@dataclasses.dataclass(frozen=True)
class GuideSpec:
    """Opened guides: plain data only, so it pickles to worker processes.

    Attributes
    ----------
    paths : tuple of str
        The guide files (absolute for local files).
    names : tuple of str
        Their file names, for messages and tags.
    bands : tuple of (int, int)
        ``(file index, 1-based band)`` per selected guide band, in stacking order.
    scale : int
        Source pixel size over guide pixel size, 2 to 8.
    fine_height, fine_width : int
        ``scale`` times the source's height and width.
    fine_transform : affine.Affine
        The source's geotransform with its pixel size divided by ``scale``.
    crs : rasterio.crs.CRS or None
        The source's CRS (the fine grid's).
    aligned : tuple of bool
        Per file: whether it lies exactly on the fine grid (read directly).
    offsets : tuple of (int, int) or None
        Per file: row and column of the fine grid's origin in the file's
        pixels; None for files that are resampled.
    resampling : str
        Method for files that are not aligned (one of ``GUIDE_RESAMPLING``).
    sha256 : tuple of str or None
        Hex digest per file; None for paths that are not local files.
    dtype : str
        ``"float32"`` when every selected band is an integer of at most 16
        bits or float32, else ``"float64"``.
    descriptions : tuple of str or None
        Per selected band, its description in its file.
    """

    paths: tuple
    names: tuple
    bands: tuple
    scale: int
    fine_height: int
    fine_width: int
    fine_transform: Affine
    crs: object
    aligned: tuple
    offsets: tuple
    resampling: str
    sha256: tuple
    dtype: str
    descriptions: tuple

    @property
    def count(self):
        """Number of selected guide bands."""
        return len(self.bands)


# ---------------------------------------------------------------- parameters
def _check_paths(paths):
    if isinstance(paths, (str, os.PathLike)):
        paths = [paths]
    try:
        paths = list(paths)
    except TypeError:
        raise ParameterError(
            f"The 'guides' parameter must be a path or a list of paths, got {type(paths).__name__}"
        ) from None
    if not paths:
        raise ParameterError("The 'guides' parameter must name at least one guide file, got none")
    texts = [_check_path_type(p, "guides") for p in paths]
    full = [os.path.abspath(t) if _is_local_path(t) else t for t in texts]
    if len(set(full)) != len(full):
        raise ParameterError(f"The 'guides' parameter must not repeat a file, got {texts}")
    return texts


def _check_scale(scale):
    if scale is None:
        return None
    if isinstance(scale, bool) or not isinstance(scale, (int, np.integer)) or not 2 <= scale <= 8:
        raise ParameterError(f"The 'scale' parameter must be an integer from 2 to 8, got {scale!r}")
    return int(scale)


def _check_resampling(resampling):
    name = resampling.name if isinstance(resampling, Resampling) else resampling
    if name not in GUIDE_RESAMPLING:
        raise ParameterError(
            f"The 'resampling' parameter must be one of {', '.join(GUIDE_RESAMPLING)}, "
            f"got {resampling!r}"
        )
    return str(name)


def _inspect_guide(path):
    """:func:`inspect_source` with messages that name the file a guide."""
    try:
        return inspect_source(path)
    except InputError as exc:
        raise InputError(str(exc).replace("The source raster", "The guide raster", 1)) from None


def sha256_file(path, chunk=1 << 20):
    """Hex sha256 of a local file's bytes, read in chunks; None for other paths."""
    if not _is_local_path(path):
        return None
    digest = hashlib.sha256()
    try:
        with open(path, "rb") as fh:
            for block in iter(lambda: fh.read(chunk), b""):
                digest.update(block)
    except OSError as exc:
        raise InputError(f"The guide raster {path!r} must be readable, got: {exc}") from None
    return digest.hexdigest()


# ---------------------------------------------------------------- geometry
def _crs_label(crs):
    if crs is None:
        return "no CRS"
    summary = crs_summary(crs)
    return summary["code"] or summary["name"]


def _unit(crs):
    if crs is None:
        return " (pixel units)"
    unit = crs_summary(crs)["units"]
    return {"metre": " m", "degree": "°", None: ""}.get(unit, f" {unit}")


def _size_text(transform, crs):
    sx, sy = math.hypot(transform.a, transform.d), math.hypot(transform.b, transform.e)
    text = f"{sx:.6g}" if math.isclose(sx, sy, rel_tol=1e-9) else f"{sx:.6g} x {sy:.6g}"
    return text + _unit(crs)


def _compose(outer, inner):
    """``outer * inner`` written out (pixel coordinates through ``inner`` first)."""
    a, b, c, d, e, f = outer.a, outer.b, outer.c, outer.d, outer.e, outer.f
    return Affine(a * inner.a + b * inner.d, a * inner.b + b * inner.e,
                  a * inner.c + b * inner.f + c, d * inner.a + e * inner.d,
                  d * inner.b + e * inner.e, d * inner.c + e * inner.f + f)


def _corners(transform, width, height):
    cols = np.array([0.0, width, width, 0.0])
    rows = np.array([0.0, 0.0, height, height])
    return apply_transform(transform, cols, rows)


def _bounds(transform, width, height):
    xs, ys = _corners(transform, width, height)
    return float(xs.min()), float(ys.min()), float(xs.max()), float(ys.max())


def _kind(info):
    """``"gcps"``, ``"none"`` (no georeferencing), ``"local"`` (no CRS) or ``"crs"``."""
    if info.transform.is_identity:
        return "gcps" if info.gcps else ("none" if info.crs is None else "crs")
    return "local" if info.crs is None else "crs"


def _check_georeferencing(info, coarse):
    """Refuse guide/source pairs whose georeferencing cannot be compared."""
    where = f"The guide raster {info.path!r}"
    ck, gk = _kind(coarse), _kind(info)
    if ck == "gcps":
        raise InputError(
            f"The source raster {coarse.path!r} must have a geotransform to be magnified onto "
            "a guide's grid, got ground control points only"
        )
    if gk == "gcps":
        raise InputError(f"{where} must have a geotransform, got ground control points only")
    if ck == "crs" and gk != "crs":
        raise InputError(
            f"{where} must have a CRS like the source {coarse.name!r} "
            f"({_crs_label(coarse.crs)}), got none"
        )
    if ck != "crs" and gk == "crs":
        raise InputError(
            f"{where} must have no CRS like the source {coarse.name!r}, "
            f"got {_crs_label(info.crs)}"
        )
    if ck != gk:
        raise InputError(
            f"{where} must be georeferenced like the source {coarse.name!r} (both with a "
            "geotransform, or neither), got "
            + ("a geotransform" if gk == "local" else "none")
        )
    return gk


def _guide_bounds_in_source(info, coarse):
    bounds = _bounds(info.transform, info.width, info.height)
    if info.crs is None or info.crs == coarse.crs:
        return bounds
    try:
        return transform_bounds(info.crs, coarse.crs, *bounds, densify_pts=21)
    except (RasterioError, ValueError) as exc:
        raise InputError(
            f"The guide raster {info.path!r} must be in a CRS that can be transformed to the "
            f"source's ({_crs_label(coarse.crs)}), got {_crs_label(info.crs)}: {exc}"
        ) from None


def _overlap_centre(info, coarse):
    """Centre of the guide/source overlap in the source's CRS; refuse no overlap."""
    g = _guide_bounds_in_source(info, coarse)
    c = _bounds(coarse.transform, coarse.width, coarse.height)
    left, bottom = max(g[0], c[0]), max(g[1], c[1])
    right, top = min(g[2], c[2]), min(g[3], c[3])
    if not (right > left and top > bottom):
        fmt = ", ".join
        raise InputError(
            f"The guide {info.name!r} must overlap the source {coarse.name!r}, got none: guide "
            f"bounds ({fmt(f'{v:.6g}' for v in g)}) against source bounds "
            f"({fmt(f'{v:.6g}' for v in c)}) in {_crs_label(coarse.crs)}"
        )
    return (left + right) / 2.0, (bottom + top) / 2.0


def _steps_in_source_pixels(info, coarse, centre):
    """A guide pixel's column and row steps, measured in source pixels.

    Exact through the geotransforms in a shared CRS; for another CRS, the
    steps of the guide pixel at the overlap's centre mapped by the CRS
    transformation.
    """
    if info.crs is None or info.crs == coarse.crs:
        m = _compose(~coarse.transform, info.transform)
        return (m.a, m.d), (m.b, m.e)
    gx, gy = warp_points(coarse.crs, info.crs, [centre[0]], [centre[1]])
    col, row = apply_transform(~info.transform, gx[0], gy[0])
    cols = np.array([col, col + 1.0, col])
    rows = np.array([row, row, row + 1.0])
    wx, wy = apply_transform(info.transform, cols, rows)
    sx, sy = warp_points(info.crs, coarse.crs, list(wx), list(wy))
    pc, pr = apply_transform(~coarse.transform, np.asarray(sx), np.asarray(sy))
    return (pc[1] - pc[0], pr[1] - pr[0]), (pc[2] - pc[0], pr[2] - pr[0])


def _derive_scale(info, coarse, kind):
    """The integer scale one guide file gives, or InputError naming both pixel sizes."""
    if kind == "none":
        ratios = (info.width / coarse.width, info.height / coarse.height)
        tol = 0.0
    else:
        centre = _overlap_centre(info, coarse)
        step_c, step_r = _steps_in_source_pixels(info, coarse, centre)
        ratios = (1.0 / math.hypot(*step_c), 1.0 / math.hypot(*step_r))
        same = info.crs is None or info.crs == coarse.crs
        tol = SCALE_TOLERANCE if same else REPROJECTED_SCALE_TOLERANCE
    s = round(ratios[0])
    if 2 <= s <= 8 and all(abs(r - s) <= tol * s for r in ratios):
        return s
    ratio = (f"{ratios[0]:.4g}" if math.isclose(*ratios, rel_tol=1e-3)
             else f"{ratios[0]:.4g} across, {ratios[1]:.4g} down")
    if kind == "none":
        raise InputError(
            f"The guide {info.name!r} must be 2 to 8 times the size of the ungeoreferenced "
            f"source {coarse.name!r} in both axes, got {info.width} x {info.height} against "
            f"{coarse.width} x {coarse.height} pixels (ratio {ratio})"
        )
    raise InputError(
        f"The guide {info.name!r} must have a pixel size that divides the source's by an "
        f"integer from 2 to 8, got {_size_text(info.transform, info.crs)} against "
        f"{_size_text(coarse.transform, coarse.crs)} (ratio {ratio})"
    )


def _alignment(info, fine_transform, fine_width, fine_height, kind):
    """``(offset, None)`` for a guide on the fine grid, else ``(None, reason)``."""
    if kind == "none":
        return (0, 0), None
    m = _compose(~info.transform, fine_transform)
    r0, c0 = round(m.f), round(m.c)
    cols = np.array([0.0, fine_width, 0.0, fine_width])
    rows = np.array([0.0, 0.0, fine_height, fine_height])
    u, v = apply_transform(m, cols, rows)
    drift = max(float(np.abs(u - cols - c0).max()), float(np.abs(v - rows - r0).max()))
    if drift <= ALIGN_TOLERANCE:
        return (int(r0), int(c0)), None
    if abs(m.b) > 1e-9 or abs(m.d) > 1e-9:
        return None, "it is rotated against the fine grid"
    if abs(m.a - 1) > 1e-9 or abs(m.e - 1) > 1e-9:
        return None, "its pixel size differs slightly from the fine grid's"
    return None, (f"its origin is offset from the fine grid's by a fraction of a pixel "
                  f"({m.f - r0:+.3g} rows, {m.c - c0:+.3g} columns)")


# ---------------------------------------------------------------- bands
def _select_bands(infos, guide_bands):
    """``(file index, band)`` pairs for a selection over the stacked bands."""
    stack = [(f, b) for f, info in enumerate(infos) for b in range(1, info.count + 1)]
    alpha = {i + 1 for i, (f, b) in enumerate(stack) if infos[f].is_alpha(b)}
    if guide_bands is None:
        picks = tuple(i for i in range(1, len(stack) + 1) if i not in alpha)
        if not picks:
            raise InputError("The guides must hold at least one band that is not alpha, got none")
    else:
        try:
            picks = check_bands(guide_bands, len(stack))
        except ParameterError as exc:
            layout = "; ".join(f"{info.name}: {info.count}" for info in infos)
            raise ParameterError(
                str(exc).replace("The 'bands' parameter", "The 'guide_bands' parameter", 1)
                + f" (bands per guide file, stacked in order: {layout})"
            ) from None
        bad = sorted(alpha.intersection(picks))
        if bad:
            raise ParameterError(
                f"The 'guide_bands' parameter must select measured bands, got alpha band(s) {bad}"
            )
    return tuple(stack[i - 1] for i in picks)


def _work_dtype(infos, bands):
    small = all(infos[f].dtypes[b - 1] in _SMALL_DTYPES for f, b in bands)
    return "float32" if small else "float64"


# ---------------------------------------------------------------- opening
def open_guides(paths, coarse, *, scale=None, guide_bands=None, resampling="cubic"):
    """Open guide files, derive the scale and place them on the fine grid.

    Parameters
    ----------
    paths : str, os.PathLike or sequence of them
        Guide raster files, finer than the source and covering (part of) it.
    coarse : SourceInfo
        The source to magnify (:func:`geosr.raster.io.inspect_source`).
    scale : int, optional
        Expected scale (2 to 8); must agree with the one the pixel sizes give.
    guide_bands : None, int, str or sequence of int
        1-based indexes over the stacked bands of all files in order (the
        first file's bands, then the second's ...); ``"1,3"`` and ``"1-3"``
        strings are accepted. Default: every band that is not alpha.
    resampling : str or rasterio.enums.Resampling
        For files that are not on the fine grid; one of ``GUIDE_RESAMPLING``.

    Returns
    -------
    GuideSpec

    Raises
    ------
    InputError
        A guide is missing or unreadable, its georeferencing does not match
        the source's kind, it does not overlap the source, its pixel size is
        not the source's divided by an integer from 2 to 8, or the files
        give different scales.
    ParameterError
        Bad ``scale``, ``guide_bands`` or ``resampling``, or ``scale``
        disagrees with the pixel sizes.

    Warns
    -----
    GeoreferencingWarning
        Once per file that is resampled onto the fine grid.
    """
    texts = _check_paths(paths)
    wanted = _check_scale(scale)
    method = _check_resampling(resampling)
    infos = [_inspect_guide(t) for t in texts]
    kinds = [_check_georeferencing(info, coarse) for info in infos]
    scales = [_derive_scale(info, coarse, kind) for info, kind in zip(infos, kinds)]
    if len(set(scales)) > 1:
        pairs = ", ".join(f"{s} for {info.name!r}" for s, info in zip(scales, infos))
        raise InputError(f"The guides must all give the same scale, got {pairs}")
    s = scales[0]
    if wanted is not None and wanted != s:
        raise ParameterError(
            f"The 'scale' parameter must agree with the guide {infos[0].name!r}, got {wanted} "
            f"against a pixel-size ratio of {s} ({_size_text(infos[0].transform, infos[0].crs)} "
            f"against {_size_text(coarse.transform, coarse.crs)})"
        )
    fine_transform = scaled_transform(coarse.transform, s)
    fine_h, fine_w = s * coarse.height, s * coarse.width
    aligned, offsets = [], []
    for info, kind in zip(infos, kinds):
        if kind == "crs" and info.crs != coarse.crs:
            offset, reason = None, f"it is in another CRS ({_crs_label(info.crs)})"
        else:
            offset, reason = _alignment(info, fine_transform, fine_w, fine_h, kind)
        if reason is not None and kind != "crs":
            raise InputError(
                f"The guide raster {info.path!r} must lie exactly on the source's fine grid "
                f"when neither has a CRS (it cannot be resampled without one), got: {reason}"
            )
        if reason is not None:
            warnings.warn(
                f"The guide {info.name!r} is not on the source's fine grid ({reason}); it is "
                f"resampled onto it by {method} interpolation",
                GeoreferencingWarning,
                stacklevel=2,
            )
        aligned.append(offset is not None)
        offsets.append(offset)
    bands = _select_bands(infos, guide_bands)
    return GuideSpec(
        paths=tuple(info.path for info in infos),
        names=tuple(info.name for info in infos),
        bands=bands,
        scale=s,
        fine_height=fine_h,
        fine_width=fine_w,
        fine_transform=fine_transform,
        crs=coarse.crs,
        aligned=tuple(aligned),
        offsets=tuple(offsets),
        resampling=method,
        sha256=tuple(sha256_file(info.path) for info in infos),
        dtype=_work_dtype(infos, bands),
        descriptions=tuple(infos[f].descriptions[b - 1] for f, b in bands),
    )


# ---------------------------------------------------------------- reading
def _valid_of(data, masks):
    valid = np.all(masks > 0, axis=0)
    if data.dtype.kind == "f":
        valid &= np.all(np.isfinite(data), axis=0)
    return valid


def _read_aligned(ds, bands, window, offset, dtype):
    """Read a fine-grid window from a file on the fine grid; outside it is invalid."""
    r0 = int(window.row_off) + offset[0]
    c0 = int(window.col_off) + offset[1]
    h, w = int(window.height), int(window.width)
    data = np.zeros((len(bands), h, w), dtype=dtype)
    valid = np.zeros((h, w), dtype=bool)
    rr0, cc0 = max(r0, 0), max(c0, 0)
    rr1, cc1 = min(r0 + h, ds.height), min(c0 + w, ds.width)
    if rr1 <= rr0 or cc1 <= cc0:
        return data, valid
    inner = Window(cc0, rr0, cc1 - cc0, rr1 - rr0)
    raw = ds.read(list(bands), window=inner)
    where = (slice(None), slice(rr0 - r0, rr1 - r0), slice(cc0 - c0, cc1 - c0))
    data[where] = raw
    valid[where[1:]] = _valid_of(raw, ds.read_masks(list(bands), window=inner))
    return data, valid


def _read_warped(ds, spec, bands, window, dtype):
    """Read a fine-grid window from a file resampled onto the fine grid."""
    # An added alpha band marks where no valid source pixel contributed:
    # outside the file's footprint and at its nodata (GDAL's warper). The
    # output type is the float work type, so interpolated values are not
    # rounded to the file's integer type.
    with WarpedVRT(
        ds,
        crs=spec.crs,
        transform=spec.fine_transform,
        width=spec.fine_width,
        height=spec.fine_height,
        resampling=Resampling[spec.resampling],
        tolerance=WARP_TOLERANCE,
        add_alpha=True,
        dtype=spec.dtype,
        XSCALE=1,
        YSCALE=1,
    ) as vrt:
        raw = vrt.read(list(bands), window=window)
        # Read the alpha band itself: GDAL does not flag it as the mask of
        # float bands.
        alpha = vrt.read(vrt.count, window=window)
    return raw.astype(dtype, copy=False), _valid_of(raw, alpha[None])


def _read_file(spec, f, bands, window, retries):
    dtype = np.dtype(spec.dtype)
    last = None
    for _ in range(int(retries) + 1):
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", NotGeoreferencedWarning)
                with rasterio.open(spec.paths[f], "r") as ds:
                    if spec.aligned[f]:
                        return _read_aligned(ds, bands, window, spec.offsets[f], dtype)
                    return _read_warped(ds, spec, bands, window, dtype)
        except READ_ERRORS as exc:
            last = exc
    r0, c0 = int(window.row_off), int(window.col_off)
    raise InputError(
        f"The guide raster {spec.paths[f]!r} must be readable, got a read error in rows "
        f"{r0}-{r0 + int(window.height) - 1}, columns {c0}-{c0 + int(window.width) - 1} of the "
        f"fine grid (damaged or truncated file?): {last}"
    )


def read_guide_block(spec, block, halo, *, retries=2):
    """Read the guide pixels of a source block and its halo on the fine grid.

    Parameters
    ----------
    spec : GuideSpec
    block : Block
        A block of the source, in source pixels.
    halo : int
        Context per side, in source pixels.
    retries : int
        Extra attempts with a fresh handle after a read error.

    Returns
    -------
    data : ndarray, shape (spec.count, s*(block.height + 2*halo), s*(block.width + 2*halo))
        ``spec.dtype``; NaN where ``valid`` is False.
    valid : ndarray of bool, shape (s*(block.height + 2*halo), s*(block.width + 2*halo))
        True where every selected guide band is valid (inside the file's
        footprint, not nodata or masked, finite). Where the window leaves the
        source's extent both are the symmetric extension of what was read,
        like :func:`geosr.raster.blocks.read_block`.

    Raises
    ------
    InputError
        When a guide file cannot be read after every attempt.
    """
    s = spec.scale
    fine = Block(block.index, s * block.row_off, s * block.col_off, s * block.height, s * block.width)
    window, pads = halo_read(fine, s * halo, spec.fine_height, spec.fine_width)
    h, w = int(window.height), int(window.width)
    data = np.empty((spec.count, h, w), dtype=np.dtype(spec.dtype))
    valid = np.ones((h, w), dtype=bool)
    for f in range(len(spec.paths)):
        picks = [i for i, (fi, _) in enumerate(spec.bands) if fi == f]
        if not picks:
            continue
        part, ok = _read_file(spec, f, [spec.bands[i][1] for i in picks], window, retries)
        data[picks] = part
        valid &= ok
    data[:, ~valid] = np.nan
    return pad_symmetric(data, pads), pad_symmetric(valid, pads)
