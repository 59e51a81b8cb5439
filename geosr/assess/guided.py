"""Assessment of guided magnification: Wald's protocol with a finer co-registered guide.

The reference (REF) holds the coarse bands at their native resolution. The
guide is brought onto REF's grid: a guide ``s_g`` times finer (``s_g >= 2``,
e.g. a 15 m panchromatic band beside 30 m bands) is degraded by ``s_g`` with
the protocol's degradation model; a guide already on REF's grid
(``s_g = 1``) is used as it is. REF is then degraded by the scale ``S``
(Wald, Ranchin & Mangolini, PE&RS 63(6), 1997) and magnified back by every
method, the guided ones reading the guide on REF's grid as their fine guide.

Methods: the single-image rows of :func:`geosr.assess.protocol.assess_raster`
(geosr with its shipped model, GDAL bicubic and Lanczos, nearest neighbour),
geosr's own bicubic interpolation (the base the guided methods add detail
to), the classical baselines of :mod:`geosr.core.injection` (high-pass
injection with regression gains, Aiazzi et al. 2006; GSA, Aiazzi, Baronti &
Selva 2007) and geosr's guided regression (:class:`GuidedRegression`,
learned on the degraded reference and the guide degraded once more).

No-reference quality (QNR, D_lambda, D_s; Alparone et al., PE&RS 74(2),
2008) is measured at the guide's native resolution: with ``s_g >= 2`` REF
itself is magnified by ``s_g`` with the native guide; with ``s_g = 1`` the
Wald run's outputs are scored against the low-res input and the guide.
"""

from __future__ import annotations

import dataclasses
import logging
import os
import warnings
from typing import Any

import numpy as np

from .._version import __version__
from ..core import metrics as _metrics
from ..core.guided import GuidedRegression
from ..core.injection import GUIDED_BASELINES
from ..core.metrics import qnr
from ..core.nodata import fill_invalid
from ..core.resample import check_scale, degrade, upscale_bicubic
from ..errors import GeoreferencingWarning, InputError, ParameterError
from ..pipeline.guided import GUIDED_DEFAULTS, WEAK_CORRELATION, warn_weak_correlation
from ..pipeline.plan import model_method, model_sha
from ..raster.guide import sha256_file
from ..raster.io import check_bands
from .protocol import (
    _check_degradation,
    _degrade_reference,
    _magnify_back,
    _metric_set,
    _protocol,
    _read_reference,
    _resolve_models,
    low_res_valid,
)
from .report import METHODS, prepare_destination, write_guided_report

__all__ = ["GUIDED_METHODS", "QNR_METHODS", "assess_guided"]

log = logging.getLogger(__name__)

#: Methods of a guided assessment, in report order.
GUIDED_METHODS = ("guided", "highpass", "substitution", "geosr", "interpolation") + METHODS[1:]
#: Methods scored with QNR ("interpolation" is geosr's bicubic, the reference row).
QNR_METHODS = ("guided", "highpass", "substitution", "interpolation")
#: Relative tolerance of the pixel-size ratio (geotransforms stored as text lose digits).
RATIO_TOLERANCE = 1e-3
#: Window side of QNR's Q index (Alparone et al. 2008 use 32).
QNR_BLOCK = 32


# --------------------------------------------------------------------------
# The guide on the reference's grid
# --------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class _Grid:
    """The reference's georeferencing."""

    transform: Any
    crs: Any
    height: int
    width: int


@dataclasses.dataclass(frozen=True)
class _Guide:
    """The guide on the grid ``ratio`` times finer than the reference's, whole scene."""

    files: list[str]
    sha256: list[str]
    bands: list[int]
    ratio: int
    data: np.ndarray  # (k, ratio * height, ratio * width) float64
    valid: np.ndarray  # (ratio * height, ratio * width): valid in every guide band
    resampled: list[str]


def _reference_grid(path):
    import rasterio

    path = os.fspath(path)
    if not os.path.exists(path):
        raise InputError(f"The 'reference' parameter must name an existing raster, got {path!r}")
    try:
        with rasterio.open(path) as ds:
            return _Grid(ds.transform, ds.crs, ds.height, ds.width)
    except rasterio.errors.RasterioError as exc:
        raise InputError(f"The 'reference' parameter must be a readable raster, got {path!r} ({exc})") from None


def _ratio(ds, grid, path):
    """The whole ratio of the reference's pixel size to the guide's."""
    from rasterio.warp import transform_bounds

    if (ds.crs is None) != (grid.crs is None):
        raise InputError(f"The guide and the reference must both have a CRS or both none, got {path!r}")
    if ds.crs is None or ds.crs == grid.crs:
        left, bottom, right, top = ds.bounds
        tol = RATIO_TOLERANCE
    else:
        left, bottom, right, top = transform_bounds(ds.crs, grid.crs, *ds.bounds, densify_pts=21)
        tol = 10 * RATIO_TOLERANCE  # the two projections' scale factors differ across a scene
    rl, rb, rr, rt = _bounds(grid)
    if min(right, rr) <= max(left, rl) or min(top, rt) <= max(bottom, rb):
        raise InputError(f"The guide must overlap the reference, got {path!r} outside it")
    rx = abs(grid.transform.a) * ds.width / (right - left)
    ry = abs(grid.transform.e) * ds.height / (top - bottom)
    r = round((rx + ry) / 2)
    if r < 1 or abs(rx - r) > tol * r or abs(ry - r) > tol * r:
        raise InputError(
            f"The guide's pixel size must divide the reference's a whole number of times, "
            f"got a ratio of {rx:.4g} x {ry:.4g} for {path!r}"
        )
    return r


def _bounds(grid):
    t = grid.transform
    xs = [t.c, t.c + t.a * grid.width]
    ys = [t.f, t.f + t.e * grid.height]
    return min(xs), min(ys), max(xs), max(ys)


def _read_one(ds, indexes, grid, r, path, resampled):
    """The bands ``indexes`` of an open guide on the grid ``r`` times finer than REF's."""
    from affine import Affine
    from rasterio.enums import Resampling
    from rasterio.warp import reproject
    from rasterio.windows import Window

    fine = grid.transform @ Affine.scale(1 / r)
    shape = (r * grid.height, r * grid.width)
    t = ds.transform
    col, row = ~t @ (fine.c, fine.f)
    aligned = (ds.crs == grid.crs and t.b == 0 and t.d == 0
               and abs(t.a - fine.a) <= 1e-6 * abs(fine.a) and abs(t.e - fine.e) <= 1e-6 * abs(fine.e)
               and abs(col - round(col)) < 1e-3 and abs(row - round(row)) < 1e-3)
    if aligned:
        # the part of the fine grid inside the guide; outside it the guide is invalid
        c0, r0 = round(col), round(row)
        cs, rs = max(c0, 0), max(r0, 0)
        ce, re = min(c0 + shape[1], ds.width), min(r0 + shape[0], ds.height)
        data = np.zeros((len(indexes),) + shape)
        valid = np.zeros(data.shape, dtype=bool)
        masked = ds.read(indexes, window=Window(cs, rs, ce - cs, re - rs), masked=True)
        inside = (slice(None), slice(rs - r0, re - r0), slice(cs - c0, ce - c0))
        data[inside] = np.ma.getdata(masked)
        valid[inside] = ~np.ma.getmaskarray(masked)
    else:
        resampled.append(os.path.basename(path))
        warnings.warn(f"the guide {os.path.basename(path)} is not on the reference's grid: "
                      "resampled onto it (cubic)", GeoreferencingWarning, stacklevel=2)
        data = np.full((len(indexes),) + shape, np.nan)
        for i, b in enumerate(indexes):
            src = ds.read(b, masked=True).astype(np.float64).filled(np.nan)
            reproject(src, data[i], src_transform=t, src_crs=ds.crs or grid.crs, src_nodata=np.nan,
                      dst_transform=fine, dst_crs=grid.crs, dst_nodata=np.nan,
                      resampling=Resampling.cubic)
        valid = np.isfinite(data)
    return data, valid & np.isfinite(data)


def _read_guides(paths, grid, guide_bands):
    """Every guide file on the grid of their common ratio, stacked, then ``guide_bands`` picked."""
    import rasterio
    from rasterio.enums import ColorInterp

    files = [os.fspath(p) for p in paths]
    if not files:
        raise ParameterError("The 'guide' parameter must name at least one raster, got none")
    for f in files:
        if not os.path.exists(f):
            raise InputError(f"The 'guide' parameter must name existing rasters, got {f!r}")
    datas, valids, ratios, resampled = [], [], [], []
    for f in files:
        try:
            with rasterio.open(f) as ds:
                r = _ratio(ds, grid, f)
                if ratios and r != ratios[0]:
                    raise InputError(f"The guides must share one pixel size, got ratios {ratios[0]} and {r} ({f!r})")
                ratios.append(r)
                idx = [b for b in range(1, ds.count + 1) if ds.colorinterp[b - 1] != ColorInterp.alpha]
                d, v = _read_one(ds, idx, grid, r, f, resampled)
        except rasterio.errors.RasterioError as exc:
            raise InputError(f"The 'guide' parameter must name readable rasters, got {f!r} ({exc})") from None
        datas.append(d)
        valids.append(v)
    data, valid = np.concatenate(datas), np.concatenate(valids)
    sel = check_bands(guide_bands, data.shape[0])
    data, valid = data[[b - 1 for b in sel]], valid[[b - 1 for b in sel]].all(axis=0)
    if not valid.any():
        raise InputError("The guide must have valid pixels over the reference, got none")
    return _Guide(files, [sha256_file(f) for f in files], list(sel), ratios[0], data, valid, resampled)


def _derive_scale(scale, ratio):
    """The scale of the Wald run: the guide's ratio, or --scale for a guide on REF's grid."""
    if ratio == 1:
        if scale is None:
            raise ParameterError("The 'scale' parameter is needed with a guide on the reference's grid, got none")
        return check_scale(scale)
    if ratio > 8:
        raise InputError(f"The guide must be 2 to 8 times finer than the reference, got {ratio} times")
    if scale is not None and check_scale(scale) != ratio:
        raise ParameterError(
            f"The 'scale' parameter must equal the guide's ratio {ratio} (or be left out), got {scale}"
        )
    return ratio


# --------------------------------------------------------------------------
# Magnifying with the guide
# --------------------------------------------------------------------------


def _filled(data, valid):
    """Bands with invalid pixels replaced from valid neighbours (``valid`` 2-D or per band)."""
    valid = np.broadcast_to(valid, data.shape)
    return np.stack([fill_invalid(data[b], valid[b]) for b in range(data.shape[0])])


def _guided_outputs(coarse, coarse_valid, guide, guide_valid, s, deg_name, sigma):
    """geosr's bicubic, the two baselines and the guided regression; and the fitted regression."""
    interp = upscale_bicubic(coarse, s)
    out = {"interpolation": interp}
    for name, fn in GUIDED_BASELINES.items():
        out[name] = np.asarray(fn(coarse, guide, s, degradation=deg_name, sigma=sigma, valid=coarse_valid,
                                  guide_valid=guide_valid), dtype=np.float64)
    cv = np.broadcast_to(coarse_valid, coarse.shape)
    # the learning parameters of ``geosr magnify --guide``: the product a user gets is assessed
    model = GuidedRegression(scale=s, degradation=deg_name, sigma=sigma, **GUIDED_DEFAULTS)
    model.fit(coarse, guide, cv, guide_valid)
    values, ok = model.predict(coarse, guide, guide_valid)
    out["guided"] = np.where(ok, values, interp)  # bicubic where the guide's footprint is invalid
    return out, model, ok


def _no_reference(ref, low, guide, g_ref, gv_ref, wald, s, deg_name, sigma):
    """QNR, D_lambda and D_s of the guided methods at the guide's native resolution."""
    if guide.ratio == 1:
        coarse, cvalid, fine, fvalid, ratio, outputs = low.data, low.valid, g_ref, gv_ref, s, wald
        setup = (f"Guide on the reference's grid: the Wald run's outputs (x{s}) scored against the "
                 "low-res input and the guide on the reference's grid.")
    else:
        ratio = guide.ratio
        rows, cols = ref.data.shape[1:]
        coarse, cvalid = _filled(ref.data, ref.valid), ref.valid
        fine, fvalid = guide.data[:, : ratio * rows, : ratio * cols], guide.valid[: ratio * rows, : ratio * cols]
        outputs = _guided_outputs(coarse, cvalid, fine, fvalid, ratio, deg_name, sigma)[0]
        setup = (f"The reference itself magnified x{ratio} with the guide at its native resolution "
                 "(no reference exists there) and scored against the reference and the guide.")
    block = min(QNR_BLOCK, *coarse.shape[1:])
    scores = {m: qnr(outputs[m], coarse, fine, ratio, valid=cvalid, guide_valid=fvalid, block=block,
                     degradation=deg_name, sigma=sigma) for m in QNR_METHODS}
    return {"name": "QNR (Alparone et al. 2008)", "setup": setup, "scale": ratio, "block": block,
            "methods": scores}


# --------------------------------------------------------------------------
# The public function
# --------------------------------------------------------------------------


def _crop_square(ref, s):
    """The reference cropped further to a multiple of ``s * s`` (the guided fit needs it)."""
    m = s * s
    rows, cols = ref.data.shape[1:]
    rows, cols = rows - rows % m, cols - cols % m
    if rows < 4 * m or cols < 4 * m:
        raise InputError(f"The reference must be at least {4 * m} x {4 * m} pixels for a guided "
                         f"assessment at scale {s}, got {ref.data.shape[1]} x {ref.data.shape[2]}")
    return dataclasses.replace(ref, data=ref.data[:, :rows, :cols], valid=ref.valid[:, :rows, :cols])


def _guide_on_reference(guide, rows, cols, deg_name, sigma):
    """The guide on the reference's grid (degraded by its ratio when finer) and its mask."""
    r = guide.ratio
    data, valid = guide.data[:, : r * rows, : r * cols], guide.valid[: r * rows, : r * cols]
    if r == 1:
        return data, valid
    return degrade(_filled(data, valid), r, deg_name, sigma), low_res_valid(valid, r, deg_name, sigma)


def _as_reference_type(outputs, dtype):
    """Every product as a raster of the reference's dtype holds it (rounded and clipped)."""
    if dtype.kind in "iu":
        info = np.iinfo(dtype)
        return {m: np.clip(np.rint(v), info.min, info.max) for m, v in outputs.items()}
    return outputs


def _footprint(ref, outputs, valid, ok, data_range):
    """The share of compared pixels where the guided output is plain bicubic (the guide's
    footprint there is not wholly valid), and every method's PSNR over the other pixels."""
    inside = valid & ok
    psnr = None
    if inside.any():
        psnr = {m: float(_metrics.psnr(ref, np.where(inside, outputs[m], 0.0), data_range=data_range,
                                       valid=inside)) for m in GUIDED_METHODS}
    return {"fallback_share": float((valid & ~ok).sum() / valid.sum()), "footprint_psnr": psnr}


def _guide_entry(guide, correlation, band_names, s):
    weak = [name for name, c in zip(band_names, correlation) if not c >= WEAK_CORRELATION]  # NaN is weak
    return {"files": [os.path.basename(f) for f in guide.files], "sha256": guide.sha256,
            "bands": guide.bands, "scale_ratio": guide.ratio, "scale": s,
            "resampled": guide.resampled, "correlation": correlation,
            "weak_correlation_below": WEAK_CORRELATION, "weak_bands": weak,
            "on_reference_grid": ("as read" if guide.ratio == 1
                                  else f"degraded x{guide.ratio} with the protocol's degradation")}


def assess_guided(reference, report_dir, scale, *, guide, guide_bands=None, model=None, method=None,
                  degradation="bicubic", sigma=None, bands=None, spectral_guard=True, crop_size=96,
                  overwrite=False) -> dict[str, Any]:
    """Assess guided magnification under Wald's protocol; see :func:`assess_raster`.

    Parameters
    ----------
    reference, report_dir, model, method, degradation, sigma, bands, spectral_guard, crop_size, overwrite
        As :func:`geosr.assess.protocol.assess_raster` (``crop_size`` already checked).
    scale : int or None
        The scale of the Wald run: required for a guide on the reference's grid;
        otherwise the guide's ratio, which it must equal when given.
    guide : sequence of path
        Guide rasters, stacked in order.
    guide_bands : sequence of int, optional
        1-based bands of the stacked guides; default every non-alpha band.

    Returns
    -------
    dict
        The content of metrics.json: one entry per method of :data:`GUIDED_METHODS`
        as in the single-image assessment, plus ``guide``, ``no_reference``,
        ``methods``, ``model``, ``model_sha256``, ``protocol``, ``figures``.
    """
    grid = _reference_grid(reference)
    paths = [guide] if isinstance(guide, (str, os.PathLike)) else list(guide)
    g = _read_guides(paths, grid, guide_bands)
    s = _derive_scale(scale, g.ratio)
    deg_name, sigma_used = _check_degradation(s, degradation, sigma)
    model_file = [os.fspath(model)] if isinstance(model, (str, os.PathLike)) else []
    folder = prepare_destination(report_dir, overwrite, [reference, *paths, *model_file])
    ref = _crop_square(_read_reference(reference, bands, s), s)
    rows, cols = ref.data.shape[1:]
    g_ref, gv_ref = _guide_on_reference(g, rows, cols, deg_name, sigma_used)
    log.info("degrading %d band(s) of %d x %d by %d (%s)", ref.data.shape[0], rows, cols, s, deg_name)
    low = _degrade_reference(ref, s, deg_name, sigma_used)
    low = dataclasses.replace(low, eval_valid=low.eval_valid & gv_ref)
    if not low.eval_valid.any():
        raise InputError("The guide must be valid where the reference is, got no pixel valid in both")
    choice = _resolve_models(model, False, s, method, low.data, np.broadcast_to(low.valid, low.data.shape),
                             deg_name, sigma_used, None, ref.bands)
    log.info("magnifying with geosr, the baselines and the guide")
    outputs, guarded = _magnify_back(ref, low, choice.models, s, False, False, spectral_guard)
    wald, fitted, ok = _guided_outputs(low.data, low.valid, g_ref, gv_ref, s, deg_name, sigma_used)
    warn_weak_correlation(fitted, ref.band_names)
    correlation = [float(c) for c in fitted.correlation_]
    outputs.update(_as_reference_type(wald, ref.dtype))
    log.info("computing metrics")
    valid = low.eval_valid
    data_range = float(ref.data[:, valid].max() - ref.data[:, valid].min())
    if not data_range > 0:
        raise InputError("The reference must not be constant over its valid pixels, got a constant")
    result: dict[str, Any] = {m: _metric_set(ref.data, outputs[m], valid, s, data_range, low.data, low.valid,
                                             deg_name, sigma_used) for m in GUIDED_METHODS}
    result["methods"] = list(GUIDED_METHODS)
    result["no_reference"] = _no_reference(ref, low, g, g_ref, gv_ref, wald, s, deg_name, sigma_used)
    result["guide"] = _guide_entry(g, correlation, ref.band_names, s)
    result["guide"].update(_footprint(ref.data, outputs, valid, ok, data_range))
    result["geosr_version"] = __version__
    shas = [model_sha(m) for m in choice.models]
    result["model_sha256"] = shas[0] if len(shas) == 1 else shas
    result["model"] = {"source": choice.source,
                       "method": ", ".join(sorted({model_method(m) for m in choice.models})),
                       "count": len(choice.models), "consistency": False, "ensemble": False,
                       "spectral_guard": guarded}
    result["protocol"] = _protocol(ref, low, s, deg_name, sigma_used, data_range)
    result["protocol"]["mask"] += " AND the guide valid on the reference's grid"
    write_guided_report(folder, result, ref.data, outputs, valid, crop_size, ref.band_names,
                        g_ref.mean(axis=0), overwrite)
    log.info("wrote %s", folder)
    return result
