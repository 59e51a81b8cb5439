"""Assessment under Wald's protocol: degrade a reference, magnify it back, compare.

Wald, Ranchin & Mangolini, "Fusion of satellite images of different spatial
resolutions: assessing the quality of resulting images", PE&RS 63(6), 1997:
a high-res reference is degraded by the scale factor, the degraded image is
magnified back to the reference grid, and the result is compared with the
reference. geosr is assessed beside the baselines an analyst would otherwise
use: GDAL's bicubic and Lanczos resampling (through rasterio) and nearest
neighbour.

This module is in the raster layer: it reads the reference with rasterio and
holds the whole scene in memory, which is fine for scenes up to a few
thousand pixels on a side.
"""

from __future__ import annotations

import dataclasses
import logging
import os
import warnings
from collections.abc import Sequence
from typing import Any

import numpy as np

from .._validation import check_bool, check_int
from .._version import __version__
from ..core import metrics as _metrics
from ..core.nodata import fill_invalid
from ..core.resample import (
    check_scale,
    crop_to_multiple,
    default_sigma,
    degradation_margin,
    degradation_taps,
    degrade,
)
from ..core.spectral import guard_spectra
from ..enums import Degradation, Method
from ..errors import InputError, ParameterError
from ..pipeline.plan import (
    ModelChoice,
    check_models,
    model_method,
    model_sha,
    resolve_models,
    self_training_params,
)
from ..raster.io import check_bands
from .report import HIGHER_IS_BETTER, METHODS, prepare_destination, write_report

__all__ = ["assess_raster", "METHODS", "HIGHER_IS_BETTER"]

log = logging.getLogger(__name__)

# --------------------------------------------------------------------------
# Protocol pieces (arrays only)
# --------------------------------------------------------------------------


def _window_any(bad, start, length, scale, n_out, axis):
    """For each low-res index i: does ``bad`` hold a True at positions
    ``start + scale*i ... start + scale*i + length - 1`` along ``axis``?"""
    bad = np.moveaxis(bad, axis, -1).astype(np.int64)
    c = np.zeros(bad.shape[:-1] + (bad.shape[-1] + 1,), dtype=np.int64)
    c[..., 1:] = np.cumsum(bad, axis=-1)
    first = start + scale * np.arange(n_out)
    out = (c[..., first + length] - c[..., first]) > 0
    return np.moveaxis(out, -1, axis)


def low_res_valid(valid, scale, degradation="bicubic", sigma=None):
    """Valid low-res cells: every high-res pixel under the degradation support is valid.

    Parameters
    ----------
    valid : ndarray of bool, shape (..., rows, cols)
        High-res mask, rows and cols multiples of ``scale``.

    Returns
    -------
    ndarray of bool, shape (..., rows // scale, cols // scale)
    """
    s = check_scale(scale)
    taps, start = degradation_taps(s, degradation, sigma)
    margin = max(degradation_margin(s, degradation, sigma))
    valid = np.asarray(valid, dtype=bool)
    pad = [(0, 0)] * (valid.ndim - 2) + [(margin, margin)] * 2
    bad = ~np.pad(valid, pad, mode="symmetric")
    h, w = valid.shape[-2] // s, valid.shape[-1] // s
    rows_bad = _window_any(bad, margin + start, len(taps), s, h, -2)
    both = _window_any(rows_bad, margin + start, len(taps), s, w, -1)
    return ~both


def _nearest_mask(low_valid, scale):
    """The low-res valid mask magnified by nearest neighbour."""
    return np.repeat(np.repeat(low_valid, scale, axis=-2), scale, axis=-1)


def _gdal_resample(low, out_shape, resampling, transform=None, crs=None):
    """Magnify (bands, h, w) float64 bands with GDAL through a rasterio MemoryFile."""
    import rasterio
    from affine import Affine
    from rasterio.io import MemoryFile

    bands, h, w = low.shape
    profile = {
        "driver": "GTiff",
        "height": h,
        "width": w,
        "count": bands,
        "dtype": "float64",
        "transform": transform if transform is not None else Affine(1.0, 0, 0, 0, -1.0, h),
    }
    if crs is not None:
        profile["crs"] = crs
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", rasterio.errors.NotGeoreferencedWarning)
        with MemoryFile() as mem:
            with mem.open(**profile) as ds:
                ds.write(low)
            with mem.open() as ds:
                return ds.read(out_shape=(bands,) + tuple(out_shape), resampling=resampling)


def _metric_set(ref, est, valid, scale, data_range, low, low_valid, degradation, sigma):
    """Every metric for (bands, rows, cols) arrays, overall and per band."""
    m = _metrics
    est_c = np.where(valid, est, 0.0)  # values outside the mask are never read
    overall = {
        "psnr": m.psnr(ref, est_c, data_range=data_range, valid=valid),
        "ergas": m.ergas(ref, est_c, scale, valid=valid),
        "sam": m.sam(ref, est_c, valid=valid) if ref.shape[0] > 1 else None,
    }
    cons = m.consistency_error(low, est, scale, degradation=degradation, sigma=sigma, valid=low_valid)
    overall["consistency_rms"], overall["consistency_max"] = cons.rms, cons.max_abs
    per = {
        "psnr": m.psnr(ref, est_c, data_range=data_range, valid=valid, per_band=True),
        "ssim": m.ssim(ref, est_c, data_range=data_range, valid=valid, per_band=True),
        "ergas": m.ergas(ref, est_c, scale, valid=valid, per_band=True),
        "q": m.q_index(ref, est_c, valid=valid, per_band=True),
    }
    # SSIM and Q pool the bands by their mean (geosr.core.metrics): no second pass.
    overall["ssim"] = float(per["ssim"].mean())
    overall["q"] = float(per["q"].mean())
    bands = []
    for b in range(ref.shape[0]):
        entry = {k: float(v[b]) for k, v in per.items()}
        entry["sam"] = None  # a spectral angle needs several bands
        c = m.consistency_error(low[b], est[b], scale, degradation=degradation, sigma=sigma,
                                valid=low_valid)
        entry["consistency_rms"], entry["consistency_max"] = c.rms, c.max_abs
        bands.append({k: entry[k] for k in HIGHER_IS_BETTER})
    overall = {k: (None if overall[k] is None else float(overall[k])) for k in HIGHER_IS_BETTER}
    return {"overall": overall, "bands": bands}


# --------------------------------------------------------------------------
# Models
# --------------------------------------------------------------------------


def _resolve_models(model, self_train, scale, method, low, low_valid, degradation, sigma, training,
                    bands):
    """A :class:`~geosr.pipeline.plan.ModelChoice`; trains when self_train."""
    from ..core.model import CoupledDictionary

    if self_train:
        if model is not None:
            raise ParameterError("The 'model' parameter must not be given with self_train=True, got a model")
        params = self_training_params("assess", training, method)
        params.update(scale=scale, degradation=degradation, sigma=sigma)
        shared = bool(params.pop("shared", False))
        if shared:
            m = CoupledDictionary(**params).fit(list(low), valid=list(low_valid))
            models = [m]
        else:
            models = [CoupledDictionary(**params).fit([low[b]], valid=[low_valid[b]])
                      for b in range(low.shape[0])]
        check_models(models, scale, method, bands, "assessed")
        return ModelChoice(tuple(models), scale, "self-trained on the degraded reference")
    if training is not None:
        raise ParameterError("The 'training' parameter must only be given with self_train=True")
    return resolve_models(model, scale=scale, method=method, bands=bands, role="assessed")


# --------------------------------------------------------------------------
# The steps of assess_raster
# --------------------------------------------------------------------------


def _check_degradation(scale, degradation, sigma):
    """The degradation name and the sigma it uses (None means bicubic)."""
    deg = Degradation.parse("bicubic" if degradation is None else degradation, "degradation")
    sigma_used = default_sigma(scale) if deg is Degradation.GAUSSIAN and sigma is None else sigma
    degradation_taps(scale, str(deg), sigma_used)  # validates sigma
    return str(deg), sigma_used


@dataclasses.dataclass(frozen=True)
class _Reference:
    """The reference, cropped to a multiple of the scale, as float64 bands."""

    path: str
    bands: tuple[int, ...]
    band_names: list[str]
    dtype: np.dtype
    data: np.ndarray
    valid: np.ndarray
    transform: Any
    crs: Any
    full_shape: tuple[int, int]


def _read_reference(reference, bands, s):
    """Read the reference whole; masked, nodata and non-finite pixels are invalid."""
    import rasterio
    from rasterio.enums import ColorInterp

    path = os.fspath(reference)
    if not os.path.exists(path):
        raise InputError(f"The 'reference' parameter must name an existing raster, got {path!r}")
    try:
        with rasterio.open(path) as ds:
            if bands is None:
                sel = tuple(b for b in range(1, ds.count + 1)
                            if ds.colorinterp[b - 1] != ColorInterp.alpha)
            else:
                sel = check_bands(bands, ds.count)
            band_names = [ds.descriptions[b - 1] or str(b) for b in sel]
            dtype = np.dtype(ds.dtypes[sel[0] - 1])
            data = ds.read(list(sel)).astype(np.float64)
            valid = np.stack([ds.read_masks(b) > 0 for b in sel])
            transform, crs = ds.transform, ds.crs
            full_shape = (ds.height, ds.width)
    except rasterio.errors.RasterioError as exc:
        raise InputError(f"The 'reference' parameter must be a readable raster, got {path!r} ({exc})") from None
    valid &= np.isfinite(data)
    ref = crop_to_multiple(data, s)
    valid = crop_to_multiple(valid, s)
    if ref.shape[1] < 4 * s or ref.shape[2] < 4 * s:
        raise InputError(
            f"The reference must be at least {4 * s} x {4 * s} pixels at scale {s}, "
            f"got {ref.shape[1]} x {ref.shape[2]} after cropping"
        )
    return _Reference(path, sel, band_names, dtype, ref, valid, transform, crs, full_shape)


@dataclasses.dataclass(frozen=True)
class _LowRes:
    """The degraded reference and the masks of the comparison."""

    data: np.ndarray
    valid: np.ndarray
    eval_valid: np.ndarray


def _degrade_reference(ref, s, deg_name, sigma):
    """Wald's protocol: degrade the reference by the scale, invalid pixels filled first."""
    n_bands = ref.data.shape[0]
    filled = np.stack([fill_invalid(ref.data[b], ref.valid[b]) for b in range(n_bands)])
    low = degrade(filled, s, deg_name, sigma)
    low_valid = low_res_valid(ref.valid, s, deg_name, sigma).all(axis=0)  # 2-D, every band
    if not low_valid.any():
        raise InputError("The reference must have a low-res cell whose degradation reads only valid pixels, got none")
    low = np.stack([fill_invalid(low[b], low_valid) for b in range(n_bands)])
    eval_valid = _nearest_mask(low_valid, s) & ref.valid.all(axis=0)
    if not eval_valid.any():
        raise InputError("The reference must keep at least one valid pixel to compare, got none")
    return _LowRes(low, low_valid, eval_valid)


def _magnify_geosr(low, models, s, consistency, ensemble, spectral_guard):
    """geosr's magnification of every band, and whether the spectral guard applied."""
    n_bands = low.data.shape[0]
    out = np.stack([
        np.asarray(models[0 if len(models) == 1 else b].magnify(
            low.data[b], valid=low.valid, consistency=consistency, ensemble=ensemble), dtype=np.float64)
        for b in range(n_bands)
    ])
    # As in the raster pipeline: never with consistency (measured pixels take precedence).
    guarded = bool(spectral_guard) and not consistency and n_bands >= 2 and all(
        hasattr(m, "interpolate") for m in models)
    if guarded:
        base = np.stack([
            np.asarray(models[0 if len(models) == 1 else b].interpolate(low.data[b], valid=low.valid),
                       dtype=np.float64)
            for b in range(n_bands)
        ])
        out = guard_spectra(out, base, _nearest_mask(low.valid, s))
    return out, guarded


def _magnify_back(ref, low, models, s, consistency, ensemble, spectral_guard):
    """Every method's magnification of the degraded reference, as the reference's type holds it."""
    from affine import Affine
    from rasterio.enums import Resampling

    rows, cols = ref.data.shape[1:]
    outputs = {}
    outputs["geosr"], guarded = _magnify_geosr(low, models, s, consistency, ensemble, spectral_guard)
    lr_transform = ref.transform @ Affine.scale(s)
    outputs["bicubic"] = _gdal_resample(low.data, (rows, cols), Resampling.cubic, lr_transform, ref.crs)
    outputs["lanczos"] = _gdal_resample(low.data, (rows, cols), Resampling.lanczos, lr_transform, ref.crs)
    outputs["nearest"] = np.repeat(np.repeat(low.data, s, axis=1), s, axis=2)
    if ref.dtype.kind in "iu":
        # Every method's product as a raster of the reference's dtype holds it:
        # rounded and clipped (the geosr output contract; GDAL does the same).
        info = np.iinfo(ref.dtype)
        for m in METHODS:
            outputs[m] = np.clip(np.rint(outputs[m]), info.min, info.max)
    return outputs, guarded


def _compare(ref, low, outputs, s, deg_name, sigma):
    """The metrics of every method, and the data range they used."""
    valid = low.eval_valid
    data_range = float(ref.data[:, valid].max() - ref.data[:, valid].min())
    if not data_range > 0:
        raise InputError("The reference must not be constant over its valid pixels, got a constant")
    result: dict[str, Any] = {}
    for m in METHODS:
        result[m] = _metric_set(ref.data, outputs[m], valid, s, data_range, low.data, low.valid,
                                deg_name, sigma)
    return result, data_range


def _protocol(ref, low, s, deg_name, sigma, data_range):
    """The ``protocol`` entry of metrics.json."""
    rows, cols = ref.data.shape[1:]
    return {
        "name": "Wald, Ranchin & Mangolini (1997)",
        "reference": os.path.basename(ref.path),
        "bands": list(ref.bands),
        "band_names": ref.band_names,
        "scale": s,
        "degradation": deg_name,
        "sigma": None if sigma is None else float(sigma),
        "crop": {"row_off": 0, "col_off": 0, "rows": rows, "cols": cols,
                 "source_rows": ref.full_shape[0], "source_cols": ref.full_shape[1]},
        "valid_pixels": int(low.eval_valid.sum()),
        "output_dtype": str(ref.dtype) if ref.dtype.kind in "iu" else "float64",
        "data_range": data_range,
        "mask": "reference valid in every band AND low-res valid mask magnified by nearest neighbour",
    }


def _assess_guided(reference, report_dir, scale, kw):
    """``assess_raster`` with a guide: the options that do not apply are refused."""
    from .guided import assess_guided

    for name in ("self_train", "consistency", "ensemble"):
        if check_bool(kw[name], name):
            raise ParameterError(f"The '{name}' parameter does not apply with 'guide', got True")
    if kw["training"] is not None:
        raise ParameterError("The 'training' parameter does not apply with 'guide', got one")
    if kw["workers"] not in (None, 0, 1) or kw["scheduler"] is not None:
        raise ParameterError("The 'workers' and 'scheduler' parameters must be unset for assess_raster")
    method = None if kw["method"] is None else str(Method.parse(kw["method"], "method"))
    return assess_guided(reference, report_dir, scale, guide=kw["guide"], guide_bands=kw["guide_bands"],
                         model=kw["model"], method=method, degradation=kw["degradation"],
                         sigma=kw["sigma"], bands=kw["bands"],
                         spectral_guard=check_bool(kw["spectral_guard"], "spectral_guard"),
                         crop_size=check_int(kw["crop_size"], "crop_size", 8), overwrite=kw["overwrite"])


# --------------------------------------------------------------------------
# The public function
# --------------------------------------------------------------------------


def _model_file(model):
    """The model file the run reads, as a list (empty for model objects)."""
    return [os.fspath(model)] if isinstance(model, (str, os.PathLike)) else []


def assess_raster(
    reference: str | os.PathLike[str],
    report_dir: str | os.PathLike[str],
    scale: int | None,
    *,
    model: Any = None,
    self_train: bool = False,
    method: str | Method | None = None,
    degradation: str | Degradation | None = "bicubic",
    sigma: float | None = None,
    bands: Sequence[int | str] | str | None = None,
    consistency: bool = False,
    ensemble: bool = False,
    spectral_guard: bool = True,
    training: dict[str, Any] | None = None,
    crop_size: int = 96,
    chunk_size: int | None = None,
    workers: int | None = None,
    scheduler: Any = None,
    overwrite: bool = False,
    guide: Sequence[str | os.PathLike[str]] | str | os.PathLike[str] | None = None,
    guide_bands: Sequence[int] | str | None = None,
) -> dict[str, Any]:
    """Assess magnification of a raster under Wald's protocol and write a report.

    The reference is read whole (masked and nodata pixels become invalid),
    cropped at the bottom and right to a multiple of ``scale``, degraded band
    by band with :func:`geosr.core.resample.degrade` (invalid pixels are filled
    from valid neighbours first so no NaN spreads; a low-res cell is invalid
    when any high-res pixel under its degradation support is invalid), then
    magnified back by geosr, by GDAL's bicubic and Lanczos resampling (a
    rasterio ``MemoryFile`` read with ``out_shape``) and by nearest
    neighbour. Each result is compared with the reference over the pixels
    valid in the reference (in every selected band) and under the low-res
    valid mask magnified by nearest neighbour. Everything is held in memory:
    fine for scenes up to a few thousand pixels on a side.

    Parameters
    ----------
    reference : str or os.PathLike
        High-res reference raster (any GDAL format).
    report_dir : str or os.PathLike
        Report folder; written as a temporary folder beside it and renamed
        into place, so a failed run leaves no half report.
    scale : int
        Magnification factor, 2 to 8.
    model : CoupledDictionary, list of them, or str, optional
        One shared model, one per selected band, or a model file. Default:
        the model shipped for ``scale``.
    self_train : bool
        Learn per-band models from the degraded reference itself (treated as
        high-res: bootstrapping) instead of ``model``.
    method : {"sparse", "anchored"}, optional
        Required method of the model (checked), or the self-trained method.
    degradation : {"bicubic", "gaussian", "area"}
        Degradation model of the protocol (None means "bicubic").
    sigma : float, optional
        Gaussian width in high-res pixels (``"gaussian"`` only; default
        :func:`geosr.core.resample.default_sigma`).
    bands : sequence of int or str, optional
        1-based bands to assess; default every non-alpha band.
    consistency, ensemble : bool
        Options of :meth:`CoupledDictionary.magnify`.
    spectral_guard : bool
        With two or more bands, limit how far geosr's per-band detail turns
        each pixel's spectrum (:func:`geosr.core.spectral.guard_spectra`), as
        ``geosr magnify`` does by default.
    training : dict, optional
        CoupledDictionary parameters for ``self_train`` (plus ``shared``),
        over ``SELF_TRAIN_DEFAULTS['assess']`` (:mod:`geosr.pipeline.plan`).
    crop_size : int
        Side in high-res pixels of the side-by-side crop figure.
    chunk_size, workers, scheduler :
        Accepted for parity with ``geosr magnify``; the assessment runs in
        memory in this process, so ``workers`` and ``scheduler`` must be unset.
    overwrite : bool
        Replace an existing non-empty report folder.
    guide : path or sequence of paths, optional
        Finer co-registered rasters (stacked): assess guided magnification
        instead (:func:`geosr.assess.guided.assess_guided`). A guide ``s_g >= 2``
        times finer than the reference is degraded onto its grid and ``scale``
        defaults to (and must equal) ``s_g``; a guide on the reference's grid
        needs ``scale``. The report adds the guided methods, QNR and the
        guide's correlation per band. ``self_train``, ``consistency`` and
        ``ensemble`` do not apply.
    guide_bands : sequence of int or str, optional
        1-based bands of the stacked guides; default every non-alpha band.

    Progress messages go to the ``geosr.assess.protocol`` logger (INFO).

    Returns
    -------
    dict
        The content of ``metrics.json``: one entry per method in
        :data:`METHODS`, each ``{"overall": {metric: float}, "bands":
        [{metric: float}, ...]}`` with metrics ``psnr`` (dB), ``ssim``,
        ``ergas``, ``sam`` (degrees; None per band and for one band), ``q``,
        ``consistency_rms``, ``consistency_max``; plus ``geosr_version``,
        ``model_sha256`` (a string, or a list with one per band for per-band
        models), ``model``, ``protocol`` (reference, bands, scale,
        degradation, sigma, crop, valid_pixels, data_range, mask rule) and
        ``figures`` (file names).

    Raises
    ------
    ParameterError, InputError, ModelError, DestinationError
    """
    if guide is not None:
        return _assess_guided(reference, report_dir, scale, locals())
    if guide_bands is not None:
        raise ParameterError("The 'guide_bands' parameter only applies with 'guide', got it without")
    s = check_scale(scale)
    deg_name, sigma_used = _check_degradation(s, degradation, sigma)
    if method is not None:
        method = str(Method.parse(method, "method"))
    check_bool(spectral_guard, "spectral_guard")
    if workers not in (None, 0, 1) or scheduler is not None:
        raise ParameterError(
            "The 'workers' and 'scheduler' parameters must be unset for assess_raster, which "
            f"runs in memory in this process, got workers={workers!r}, scheduler={scheduler!r}"
        )
    crop_size = check_int(crop_size, "crop_size", 8)
    folder = prepare_destination(report_dir, overwrite, [reference] + _model_file(model))
    ref = _read_reference(reference, bands, s)
    n_bands, rows, cols = ref.data.shape
    log.info("degrading %d band(s) of %d x %d by %d (%s)", n_bands, rows, cols, s, deg_name)
    low = _degrade_reference(ref, s, deg_name, sigma_used)
    choice = _resolve_models(model, self_train, s, method, low.data,
                             np.broadcast_to(low.valid, low.data.shape), deg_name, sigma_used,
                             training, ref.bands)
    log.info("magnifying with geosr%s", " (self-trained)" if self_train else "")
    outputs, guarded = _magnify_back(ref, low, choice.models, s, consistency, ensemble, spectral_guard)
    log.info("computing metrics")
    result, data_range = _compare(ref, low, outputs, s, deg_name, sigma_used)
    result["geosr_version"] = __version__
    shas = [model_sha(m) for m in choice.models]
    result["model_sha256"] = shas[0] if len(shas) == 1 else shas
    result["model"] = {"source": choice.source,
                       "method": ", ".join(sorted({model_method(m) for m in choice.models})),
                       "count": len(choice.models), "consistency": bool(consistency),
                       "ensemble": bool(ensemble), "spectral_guard": guarded}
    result["protocol"] = _protocol(ref, low, s, deg_name, sigma_used, data_range)
    write_report(folder, result, ref.data, outputs, low.eval_valid, crop_size, ref.band_names, overwrite)
    log.info("wrote %s", folder)
    return result
