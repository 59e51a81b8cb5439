"""Classical guided magnification: high-pass detail injection and GSA.

Two published baselines that magnify coarse bands with the measured detail of
a finer co-registered guide, on a grid exactly ``scale`` times finer:

- :func:`highpass_injection`, the GLP/HPF family with regression-fitted gains
  and an MTF-matched low-pass of the guide (Aiazzi, Alparone, Baronti,
  Garzelli & Selva, "MTF-tailored multiscale fusion of high-resolution MS and
  Pan imagery", PE&RS 72(5), 2006);
- :func:`component_substitution`, Gram-Schmidt adaptive (GSA) component
  substitution with a regression-fitted intensity (Aiazzi, Baronti & Selva,
  "Improving component substitution pansharpening through multivariate
  regression of MS+Pan data", IEEE TGRS 45(10), 2007).

Both work on whole arrays with the core's conventions: bands first,
symmetric borders, the degradation models of :mod:`geosr.core.resample`,
float32 output for float32 inputs (float64 otherwise; the statistics are
computed in float64).

Masks: ``valid`` marks valid coarse pixels, ``guide_valid`` valid guide
pixels. Invalid values are never read: they are first replaced from valid
neighbours (:func:`geosr.core.nodata.fill_invalid`). Gains and regression
weights are fitted only on pixels whose computation read no filled value
(falling back to all valid pixels when none is left). Where the guide is
invalid no detail is injected and the output is the bicubic interpolation.
An output pixel is valid where the coarse mask magnified by nearest
neighbour is; its value elsewhere is finite but meaningless.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, NamedTuple

import numpy as np
from numpy.typing import ArrayLike

from .._validation import check_scale, working_dtype
from .metrics import (
    _as_bands,
    _as_mask,
    _check_finite,
    _check_guide,
    _degraded_mask,
    _erode,
    _magnify_mask,
)
from .nodata import fill_invalid
from .resample import UPSCALE_MARGIN, degradation_margin, degradation_taps, degrade, upscale_bicubic

__all__ = ["highpass_injection", "component_substitution", "GUIDED_BASELINES"]


class _Prepared(NamedTuple):
    """Checked and filled inputs shared by both baselines."""

    upsampled: np.ndarray  # (n, H, W) bicubic interpolation of the filled coarse bands
    guide: np.ndarray  # (k, H, W) filled guide, float64
    guide_mask: np.ndarray  # (H, W) valid in every guide band
    fit: np.ndarray  # (n, H, W) pixels that read no filled value (or the valid ones)
    coarse: np.ndarray  # (n, h, w) filled coarse bands, float64
    coarse_fit: np.ndarray  # (n, h, w) coarse pixels whose degraded guide is clean
    scale: int
    dtype: np.dtype
    squeeze: bool


def _prepare_guided(coarse, guide, scale, degradation, sigma, valid, guide_valid):
    s = check_scale(scale)
    degradation_taps(s, degradation, sigma)  # validates the model and sigma
    dtype = working_dtype(np.asarray(coarse), np.asarray(guide))
    squeeze = np.ndim(coarse) == 2
    x = _as_bands(coarse, "coarse")
    n, h, w = x.shape
    g, gmask = _check_guide(guide, guide_valid, (s * h, s * w), f"{s} times finer than 'coarse'")
    mask = _as_mask(valid, x.shape)
    _check_finite(x, mask, "coarse")
    # Fine pixels of context the low-passed guide reads: two coarse pixels of
    # interpolation (plus the one the pixel sits in) and the degradation taps.
    radius = s * (UPSCALE_MARGIN + 1) + max(degradation_margin(s, degradation, sigma))
    x = np.stack([fill_invalid(x[b], mask[b], UPSCALE_MARGIN + 1) for b in range(n)])
    g = np.stack([fill_invalid(band, gmask, radius) for band in g])
    clean_guide = _erode(gmask, radius)
    fit = np.empty((n, s * h, s * w), dtype=bool)
    for b in range(n):
        fit[b] = _magnify_mask(_erode(mask[b], UPSCALE_MARGIN), s) & clean_guide
        if not fit[b].any():
            fit[b] = _magnify_mask(mask[b], s) & gmask
    coarse_fit = mask & _degraded_mask(gmask, s, degradation, sigma)
    return _Prepared(upscale_bicubic(x, s), g, gmask, fit, x, coarse_fit, s, dtype, squeeze)


def _lowpass(image, scale, degradation, sigma):
    """``upscale_bicubic(degrade(image))``: the guide through the degradation model."""
    return upscale_bicubic(degrade(image, scale, degradation, sigma), scale)


def _gain(y, x, use):
    """``cov(y, x) / var(x)`` over the pixels ``use``; 0 when ``var(x)`` is negligible.

    "Negligible" is at most 1e-12 of the mean square of ``x`` (rounding noise
    of a constant), which covers an exactly constant ``x`` too.
    """
    if not use.any():
        return 0.0
    xv = x[use].astype(np.float64, copy=False)
    yv = y[use].astype(np.float64, copy=False)
    xc = xv - xv.mean()
    var = float(np.dot(xc, xc))
    if var <= 1e-12 * float(np.dot(xv, xv)):
        return 0.0
    return float(np.dot(yv - yv.mean(), xc) / var)


def _finish(out, prep):
    out = out.astype(prep.dtype, copy=False)
    return out[0] if prep.squeeze else out


def _fit_combination(target, planes, use):
    """Least-squares ``target ~ sum_j w_j planes_j + c`` over ``use``; returns ``(w, c)``."""
    design = np.column_stack([pl[use] for pl in planes] + [np.ones(int(use.sum()))])
    coef = np.linalg.lstsq(design, target[use], rcond=None)[0]
    return coef[:-1], float(coef[-1])


def highpass_injection(coarse: ArrayLike, guide: ArrayLike, scale: int, *, degradation: str = "bicubic",
                       sigma: float | None = None, valid: ArrayLike | None = None,
                       guide_valid: ArrayLike | None = None) -> np.ndarray:
    """High-pass detail injection with regression gains (GLP/HPF, Aiazzi et al. 2006).

    For each band ``b``: ``U_b = upscale_bicubic(coarse_b, s)``, the guide's
    low-pass ``P_L = upscale_bicubic(degrade(P, s, degradation, sigma), s)``
    (the guide through the same degradation model, "MTF-matched"), the gain
    ``g_b = cov(U_b, P_L) / var(P_L)`` over the valid pixels (0 when
    ``var(P_L)`` is negligible, e.g. a constant guide), and the output
    ``U_b + g_b (P - P_L)``.

    With one guide band ``P`` is that band. With ``k > 1`` guide bands, ``P``
    is fitted per target band at the coarse grid by least squares,
    ``coarse_b ~ sum_j w_j degrade(G_j) + c``, and ``P = sum_j w_j G_j`` (the
    constant ``c`` cancels in ``P - P_L``).

    Parameters
    ----------
    coarse : array_like, shape (n, h, w) or (h, w)
        The coarse bands; any numeric dtype.
    guide : array_like, shape (k, s*h, s*w) or (s*h, s*w)
        The co-registered guide on the grid ``scale`` times finer.
    scale : int
        Integer scale factor, 2 to 8.
    degradation : {"bicubic", "gaussian", "area"}
        The degradation model of :func:`geosr.core.resample.degrade`.
    sigma : float, optional
        Gaussian width in fine pixels, only for ``"gaussian"``.
    valid : ndarray of bool, shape (h, w) or (n, h, w), optional
        Valid coarse pixels; default all.
    guide_valid : ndarray of bool, shape (s*h, s*w) or (k, s*h, s*w), optional
        Valid guide pixels (valid when valid in every guide band); default all.

    Returns
    -------
    ndarray, shape (n, s*h, s*w) or (s*h, s*w)
        float32 when both inputs are float32, float64 otherwise.

    Raises
    ------
    InputError
        A guide off the fine grid, bad masks, or non-finite valid values.
    ParameterError
        A bad ``scale``, ``degradation`` or ``sigma``.
    """
    prep = _prepare_guided(coarse, guide, scale, degradation, sigma, valid, guide_valid)
    s = prep.scale
    low = _lowpass(prep.guide, s, degradation, sigma)
    detail = np.where(prep.guide_mask, prep.guide - low, 0.0)
    out = np.empty(prep.upsampled.shape, dtype=np.float64)
    if prep.guide.shape[0] > 1:
        degraded = degrade(prep.guide, s, degradation, sigma)
    for b in range(out.shape[0]):
        if prep.guide.shape[0] == 1:
            p_low, p_detail = low[0], detail[0]
        else:
            use = prep.coarse_fit[b] if prep.coarse_fit[b].any() else np.ones_like(prep.coarse_fit[b])
            w = _fit_combination(prep.coarse[b], degraded, use)[0]
            p_low, p_detail = np.tensordot(w, low, 1), np.tensordot(w, detail, 1)
        gain = _gain(prep.upsampled[b], p_low, prep.fit[b])
        out[b] = prep.upsampled[b] + gain * p_detail
    return _finish(out, prep)


def component_substitution(coarse: ArrayLike, guide: ArrayLike, scale: int, *,
                           degradation: str = "bicubic", sigma: float | None = None,
                           valid: ArrayLike | None = None,
                           guide_valid: ArrayLike | None = None) -> np.ndarray:
    """Gram-Schmidt adaptive component substitution (GSA, Aiazzi et al. 2007).

    ``U_b = upscale_bicubic(coarse_b, s)``; ``P_L = upscale_bicubic(
    degrade(P, s, degradation, sigma), s)``; the intensity ``I = sum_b
    alpha_b U_b + alpha_0`` with ``alpha`` the least-squares regression of
    ``P_L`` on the upsampled bands and a constant; the guide equalised to
    ``I`` by mean and standard deviation,
    ``P_eq = (P - mean(P)) * std(I) / std(P) + mean(I)`` (population
    standard deviations, all four statistics over the fitting pixels); the
    gains ``g_b = cov(U_b, I) / var(I)``; and the output ``U_b + g_b (P_eq -
    I)``. A guide of ``k > 1`` bands is replaced by their mean ``P``.

    The intensity is fitted on the pixels valid in every band. With no such
    pixel, or a guide without variance (nothing to inject), the output is
    the bicubic interpolation. A band whose ``var(I)`` is negligible gets
    gain 0.

    Parameters
    ----------
    coarse, guide, scale, degradation, sigma, valid, guide_valid
        As :func:`highpass_injection`.

    Returns
    -------
    ndarray, shape (n, s*h, s*w) or (s*h, s*w)
        float32 when both inputs are float32, float64 otherwise.

    Raises
    ------
    InputError
        As :func:`highpass_injection`.
    ParameterError
        A bad ``scale``, ``degradation`` or ``sigma``.
    """
    prep = _prepare_guided(coarse, guide, scale, degradation, sigma, valid, guide_valid)
    upsampled = prep.upsampled.astype(np.float64, copy=False)
    pan = prep.guide.mean(axis=0)
    use = prep.fit.all(axis=0)
    pv = pan[use]
    if not use.any() or float(np.dot(pv - pv.mean(), pv - pv.mean())) <= 1e-12 * float(np.dot(pv, pv)):
        return _finish(upsampled.copy(), prep)
    p_low = _lowpass(pan, prep.scale, degradation, sigma)
    alpha, intercept = _fit_combination(p_low, upsampled, use)
    intensity = np.tensordot(alpha, upsampled, 1) + intercept
    iv = intensity[use]
    pan_eq = (pan - pv.mean()) * (iv.std() / pv.std()) + iv.mean()
    detail = np.where(prep.guide_mask, pan_eq - intensity, 0.0)
    out = np.empty(upsampled.shape, dtype=np.float64)
    for b in range(out.shape[0]):
        out[b] = upsampled[b] + _gain(upsampled[b], intensity, prep.fit[b]) * detail
    return _finish(out, prep)


#: The classical guided baselines by name, for the assessment to iterate.
GUIDED_BASELINES: dict[str, Callable[..., Any]] = {
    "highpass": highpass_injection,
    "substitution": component_substitution,
}
