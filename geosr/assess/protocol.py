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

import contextlib
import json
import math
import os
import shutil
import tempfile
import warnings

import numpy as np

from ..cautions import SCORES_CAUTION
from ..core import metrics as _metrics
from .._version import __version__
from ..enums import Degradation, Method
from ..errors import DestinationError, InputError, ParameterError
from ..core.nodata import fill_invalid
from ..core.spectral import guard_spectra
from ..pipeline.plan import (
    ModelChoice,
    check_models,
    model_method,
    model_sha,
    resolve_models,
    self_training_params,
)
from ..core.resample import (
    check_scale,
    crop_to_multiple,
    default_sigma,
    degradation_margin,
    degradation_taps,
    degrade,
)

__all__ = ["assess_raster", "METHODS", "HIGHER_IS_BETTER"]

#: Methods compared, in report order.
METHODS = ("geosr", "bicubic", "lanczos", "nearest")

#: Metric keys of metrics.json and whether a higher value is better.
HIGHER_IS_BETTER = {
    "psnr": True,
    "ssim": True,
    "ergas": False,
    "sam": False,
    "q": True,
    "consistency_rms": False,
    "consistency_max": False,
}


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


def _most_textured(ref, valid, size):
    """Top-left (row, col) of the size x size window of highest local variance."""
    from scipy import ndimage

    x = np.where(valid, ref, 0.0).mean(axis=0)
    mean = ndimage.uniform_filter(x, size, mode="constant")
    var = ndimage.uniform_filter(x * x, size, mode="constant") - mean * mean
    ok = ndimage.uniform_filter(valid.astype(np.float64), size, mode="constant") > 1 - 1e-9
    h = size // 2
    rows, cols = x.shape
    score = np.where(ok, var, -np.inf)
    # keep windows wholly inside the image
    score[: h, :] = -np.inf
    score[:, : h] = -np.inf
    score[rows - (size - h) + 1 :, :] = -np.inf
    score[:, cols - (size - h) + 1 :] = -np.inf
    if not np.isfinite(score).any():
        score = var
    r, c = np.unravel_index(int(np.argmax(score)), score.shape)
    return max(0, int(r) - h), max(0, int(c) - h)


# --------------------------------------------------------------------------
# Report writing
# --------------------------------------------------------------------------


def _fmt(value):
    if value is None:
        return "-"
    if math.isinf(value):
        return "inf"
    return f"{value:.4f}" if abs(value) < 100 else f"{value:.2f}"


def _table(rows_by_method, title):
    keys = list(HIGHER_IS_BETTER)
    lines = [f"**{title}**", "", "| method | " + " | ".join(keys) + " |",
             "|---" * (len(keys) + 1) + "|"]
    best = {}
    for k in keys:
        vals = [rows_by_method[m][k] for m in rows_by_method if rows_by_method[m][k] is not None]
        if vals:
            best[k] = max(vals) if HIGHER_IS_BETTER[k] else min(vals)
    for method, row in rows_by_method.items():
        cells = []
        for k in keys:
            text = _fmt(row[k])
            if row[k] is not None and k in best and row[k] == best[k]:
                text = f"**{text}**"
            cells.append(text)
        lines.append(f"| {method} | " + " | ".join(cells) + " |")
    return lines + [""]


def _write_markdown(path, result, band_names, figures):
    p = result["protocol"]
    lines = [
        "# geosr assessment under Wald's protocol",
        "",
        f"Reference: `{p['reference']}`; bands {', '.join(map(str, p['bands']))}; "
        f"scale x{p['scale']}; degradation {p['degradation']}"
        + (f" (sigma {p['sigma']:.4f} high-res pixels)" if p["sigma"] is not None else "")
        + f"; crop {p['crop']['rows']} x {p['crop']['cols']} pixels; "
        f"{p['valid_pixels']} valid pixels compared.",
        "",
        f"geosr {result['geosr_version']}; model: {result['model']['source']} "
        f"(method {result['model']['method']}, sha256 {result['model_sha256']}); spectral guard "
        f"{'on' if result['model']['spectral_guard'] else 'off'}.",
        "",
        "The reference was degraded by the scale, magnified back by each method and compared "
        "with the reference over valid pixels (Wald, Ranchin & Mangolini, PE&RS 1997). "
        "Bold marks the better value of each metric: higher PSNR, SSIM and Q; lower ERGAS, "
        "SAM (degrees) and consistency error (RMS and max of degrade(output) - low-res input).",
        "",
        f"> **Caution.** {SCORES_CAUTION}",
        "",
    ]
    lines += _table({m: result[m]["overall"] for m in METHODS}, "Overall")
    for b, name in enumerate(band_names):
        lines += _table({m: result[m]["bands"][b] for m in METHODS}, f"Band {name}")
    lines += ["## Figures", ""] + [f"- `{f}`" for f in figures] + [""]
    with open(path, "w", encoding="utf-8") as fh:
        fh.write("\n".join(lines))


def _display(stack, lo, hi):
    """(bands, r, c) -> image for imshow: RGB from the first three bands or grey."""
    scaled = np.clip((stack - lo) / (hi - lo if hi > lo else 1.0), 0, 1)
    if stack.shape[0] >= 3:
        return np.moveaxis(scaled[:3], 0, -1), None
    return scaled[0], "gray"


def _write_figures(folder, ref, outputs, valid, window, band_names):
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    names = []
    r, c, size = window
    crop = (slice(None), slice(r, r + size), slice(c, c + size))
    vals = ref[crop][:, valid[r : r + size, c : c + size]]
    lo, hi = (np.percentile(vals, [2, 98]) if vals.size else (ref.min(), ref.max()))
    fig = Figure(figsize=(12, 4.4))
    for i, (title, img) in enumerate(
        [("reference", ref), ("GDAL bicubic", outputs["bicubic"]), ("geosr", outputs["geosr"])]
    ):
        ax = fig.add_subplot(1, 3, i + 1)
        shown, cmap = _display(np.nan_to_num(img[crop]), lo, hi)
        ax.imshow(shown, cmap=cmap, interpolation="nearest")
        ax.set_title(title)
        ax.set_axis_off()
    fig.suptitle(f"Most textured {size} x {size} window at row {r}, col {c} "
                 "(geosr detail is synthesized)")
    names.append("crop_comparison.png")
    fig.savefig(os.path.join(folder, names[-1]), dpi=100)

    errs = {m: np.abs(np.nan_to_num(outputs[m]) - ref).mean(axis=0) for m in METHODS}
    vmax = max(float(np.percentile(e[valid], 99)) for e in errs.values()) or 1.0
    for m in METHODS:
        fig = Figure(figsize=(6, 6))
        ax = fig.add_subplot(1, 1, 1)
        im = ax.imshow(np.ma.masked_array(errs[m], ~valid), cmap="magma", vmin=0, vmax=vmax,
                       interpolation="nearest")
        fig.colorbar(im, ax=ax, shrink=0.8, label="absolute error (band mean)")
        ax.set_title(f"|{m} - reference|")
        ax.set_axis_off()
        names.append(f"error_{m}.png")
        fig.savefig(os.path.join(folder, names[-1]), dpi=100)
    return names


def _write_gain_chart(folder, result, band_names):
    from matplotlib.figure import Figure

    gain = [g["psnr"] - b["psnr"] for g, b in zip(result["geosr"]["bands"], result["bicubic"]["bands"])]
    fig = Figure(figsize=(max(4, 1 + 0.8 * len(gain)), 4))
    ax = fig.add_subplot(1, 1, 1)
    ax.bar([str(n) for n in band_names], gain, color=["tab:green" if g >= 0 else "tab:red" for g in gain])
    ax.axhline(0, color="black", linewidth=0.8)
    ax.set_xlabel("band")
    ax.set_ylabel("PSNR gain over GDAL bicubic (dB)")
    ax.set_title("geosr - bicubic, per band")
    fig.tight_layout()
    fig.savefig(os.path.join(folder, "psnr_gain.png"), dpi=100)
    return ["psnr_gain.png"]


def _prepare_destination(report_dir, overwrite):
    report_dir = os.path.abspath(os.fspath(report_dir))
    if os.path.exists(report_dir):
        if not os.path.isdir(report_dir):
            raise DestinationError(
                f"The 'report_dir' parameter must be a folder, got an existing file {report_dir!r}"
            )
        if os.listdir(report_dir) and not overwrite:
            raise DestinationError(
                f"The 'report_dir' parameter must be an empty or new folder (or pass "
                f"overwrite=True), got a non-empty folder {report_dir!r}"
            )
    parent = os.path.dirname(report_dir)
    if not os.path.isdir(parent):
        raise DestinationError(f"The 'report_dir' parameter must be in an existing folder, got {report_dir!r}")
    return report_dir


def _publish(tmp, report_dir):
    """Move the finished temp folder into place, replacing an old report."""
    old = None
    if os.path.exists(report_dir):
        old = tempfile.mkdtemp(prefix=".geosr-report-old-", dir=os.path.dirname(report_dir))
        os.rmdir(old)
        os.rename(report_dir, old)
    try:
        os.rename(tmp, report_dir)
    except BaseException:
        if old is not None:
            os.rename(old, report_dir)
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


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
# The public function
# --------------------------------------------------------------------------


def assess_raster(
    reference,
    report_dir,
    scale,
    *,
    model=None,
    self_train=False,
    method=None,
    degradation="bicubic",
    sigma=None,
    bands=None,
    consistency=False,
    ensemble=False,
    spectral_guard=True,
    training=None,
    crop_size=96,
    chunk_size=None,
    workers=None,
    scheduler=None,
    overwrite=False,
    quiet=False,
):
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
    quiet : bool
        No progress messages on stderr.

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
    import rasterio
    from affine import Affine
    from rasterio.enums import ColorInterp, Resampling

    from ..raster.io import check_bands

    s = check_scale(scale)
    deg = Degradation.parse("bicubic" if degradation is None else degradation, "degradation")
    deg_name = str(deg)
    if deg is Degradation.GAUSSIAN and sigma is None:
        sigma_used = default_sigma(s)
    else:
        sigma_used = sigma
    degradation_taps(s, deg_name, sigma_used)  # validates sigma
    if method is not None:
        method = str(Method.parse(method, "method"))
    if not isinstance(spectral_guard, (bool, np.bool_)):
        raise ParameterError(f"The 'spectral_guard' parameter must be True or False, got {spectral_guard!r}")
    if workers not in (None, 0, 1) or scheduler is not None:
        raise ParameterError(
            "The 'workers' and 'scheduler' parameters must be unset for assess_raster, which "
            f"runs in memory in this process, got workers={workers!r}, scheduler={scheduler!r}"
        )
    if isinstance(crop_size, bool) or not isinstance(crop_size, (int, np.integer)) or crop_size < 8:
        raise ParameterError(f"The 'crop_size' parameter must be an integer of at least 8, got {crop_size!r}")
    report_dir = _prepare_destination(report_dir, overwrite)

    def say(msg):
        if not quiet:
            import sys

            print(f"geosr assess: {msg}", file=sys.stderr)

    # ---- read the reference
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
    n_bands, rows, cols = ref.shape

    # ---- degrade (Wald's protocol)
    say(f"degrading {n_bands} band(s) of {rows} x {cols} by {s} ({deg_name})")
    filled = np.stack([fill_invalid(ref[b], valid[b]) for b in range(n_bands)])
    low = degrade(filled, s, deg_name, sigma_used)
    low_valid = low_res_valid(valid, s, deg_name, sigma_used).all(axis=0)  # 2-D, every band
    if not low_valid.any():
        raise InputError("The reference must have a low-res cell whose degradation reads only valid pixels, got none")
    low = np.stack([fill_invalid(low[b], low_valid) for b in range(n_bands)])
    eval_valid = _nearest_mask(low_valid, s) & valid.all(axis=0)
    if not eval_valid.any():
        raise InputError("The reference must keep at least one valid pixel to compare, got none")

    # ---- models
    choice = _resolve_models(model, self_train, s, method, low, np.broadcast_to(low_valid, low.shape),
                             deg_name, sigma_used, training, sel)
    models, source = choice.models, choice.source
    methods_used = sorted({model_method(m) for m in models})
    shas = [model_sha(m) for m in models]

    # ---- magnify back
    say("magnifying with geosr" + (" (self-trained)" if self_train else ""))
    outputs = {}
    outputs["geosr"] = np.stack([
        np.asarray(models[0 if len(models) == 1 else b].magnify(
            low[b], valid=low_valid, consistency=consistency, ensemble=ensemble), dtype=np.float64)
        for b in range(n_bands)
    ])
    # As in the raster pipeline: never with consistency (measured pixels take precedence).
    guarded = bool(spectral_guard) and not consistency and n_bands >= 2 and all(
        hasattr(m, "interpolate") for m in models)
    if guarded:
        base = np.stack([
            np.asarray(models[0 if len(models) == 1 else b].interpolate(low[b], valid=low_valid),
                       dtype=np.float64)
            for b in range(n_bands)
        ])
        outputs["geosr"] = guard_spectra(outputs["geosr"], base, _nearest_mask(low_valid, s))
    lr_transform = transform @ Affine.scale(s)
    outputs["bicubic"] = _gdal_resample(low, (rows, cols), Resampling.cubic, lr_transform, crs)
    outputs["lanczos"] = _gdal_resample(low, (rows, cols), Resampling.lanczos, lr_transform, crs)
    outputs["nearest"] = np.repeat(np.repeat(low, s, axis=1), s, axis=2)
    if dtype.kind in "iu":
        # Every method's product as a raster of the reference's dtype holds it:
        # rounded and clipped (the geosr output contract; GDAL does the same).
        info = np.iinfo(dtype)
        for m in METHODS:
            outputs[m] = np.clip(np.rint(outputs[m]), info.min, info.max)

    # ---- compare
    say("computing metrics")
    data_range = float(ref[:, eval_valid].max() - ref[:, eval_valid].min())
    if not data_range > 0:
        raise InputError("The reference must not be constant over its valid pixels, got a constant")
    result = {}
    for m in METHODS:
        result[m] = _metric_set(ref, outputs[m], eval_valid, s, data_range, low, low_valid, deg_name, sigma_used)
    result["geosr_version"] = __version__
    result["model_sha256"] = shas[0] if len(shas) == 1 else shas
    result["model"] = {"source": source, "method": ", ".join(methods_used), "count": len(models),
                       "consistency": bool(consistency), "ensemble": bool(ensemble),
                       "spectral_guard": guarded}
    result["protocol"] = {
        "name": "Wald, Ranchin & Mangolini (1997)",
        "reference": os.path.basename(path),
        "bands": list(sel),
        "band_names": band_names,
        "scale": s,
        "degradation": deg_name,
        "sigma": None if sigma_used is None else float(sigma_used),
        "crop": {"row_off": 0, "col_off": 0, "rows": rows, "cols": cols,
                 "source_rows": full_shape[0], "source_cols": full_shape[1]},
        "valid_pixels": int(eval_valid.sum()),
        "output_dtype": str(dtype) if dtype.kind in "iu" else "float64",
        "data_range": data_range,
        "mask": "reference valid in every band AND low-res valid mask magnified by nearest neighbour",
    }

    # ---- write the report atomically
    size = int(min(crop_size, rows, cols))
    r0, c0 = _most_textured(ref, eval_valid, size)
    tmp = tempfile.mkdtemp(prefix=".geosr-report-", dir=os.path.dirname(report_dir))
    try:
        figures = _write_figures(tmp, ref, outputs, eval_valid, (r0, c0, size), band_names)
        figures += _write_gain_chart(tmp, result, band_names)
        result["figures"] = figures
        result["protocol"]["figure_window"] = {"row_off": r0, "col_off": c0, "size": size}
        with open(os.path.join(tmp, "metrics.json"), "w", encoding="utf-8") as fh:
            json.dump(result, fh, indent=2, allow_nan=True)
        _write_markdown(os.path.join(tmp, "report.md"), result, band_names, figures)
        _publish(tmp, report_dir)
    except BaseException:
        with contextlib.suppress(OSError):
            shutil.rmtree(tmp)
        raise
    say(f"wrote {report_dir}")
    return result
