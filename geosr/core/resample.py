"""Degradation models and bicubic interpolation on integer scale factors.

Every operation here is separable and works in *valid mode* on an array that
already carries enough context around the region of interest. The public
functions add that context by symmetric extension (``numpy.pad`` mode
``"symmetric"``), which is the border convention of the whole core: the
chunked pipeline reproduces it by reading real neighbours instead.

Coordinates: the centre of high-res pixel ``x`` sits at low-res coordinate
``(x + 0.5) / s - 0.5`` (pixel centres, not corners), so low-res pixel ``i``
covers high-res pixels ``s*i ... s*i + s - 1``.
"""

from __future__ import annotations

import math
from functools import lru_cache
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from .._validation import check_scale, crop_to_multiple, working_dtype
from ..enums import Degradation
from ..errors import InputError, ParameterError

__all__ = [
    "keys_kernel",
    "degrade",
    "upscale_bicubic",
    "default_sigma",
    "crop_to_multiple",
    "rescale",
]

#: Keys (1981) cubic convolution parameter; -0.5 is the value that makes the
#: interpolation third-order accurate and the one the benchmarks use.
KEYS_A = -0.5


def keys_kernel(x: ArrayLike, a: float = KEYS_A) -> np.ndarray:
    """Cubic convolution kernel of Keys (IEEE TASSP 29(6), 1981).

    Parameters
    ----------
    x : array_like
        Distances in pixels.
    a : float
        The kernel parameter, -0.5 by default.

    Returns
    -------
    ndarray
        Kernel weights, zero for ``|x| >= 2``.
    """
    x = np.abs(np.asarray(x, dtype=np.float64))
    x2, x3 = x * x, x * x * x
    near = (a + 2.0) * x3 - (a + 3.0) * x2 + 1.0
    far = a * x3 - 5.0 * a * x2 + 8.0 * a * x - 4.0 * a
    return np.where(x <= 1.0, near, np.where(x < 2.0, far, 0.0))


def default_sigma(scale: int) -> float:
    """Default Gaussian PSF width in high-res pixels for a scale factor.

    A Gaussian whose modulation transfer at the low-res Nyquist frequency is
    0.3, a typical value for optical satellite sensors (common practice in
    Wald-protocol studies; the 0.3 figure is from memory):
    ``exp(-2 pi^2 sigma^2 / (2 s)^2) = 0.3``.
    """
    return float(scale) * math.sqrt(-2.0 * math.log(0.3)) / math.pi


@lru_cache(maxsize=64)
def _degradation_taps(scale, model, sigma):
    """Weights and first offset of the 1-D low-pass used before decimation.

    Low-res pixel ``i`` is ``sum_t w[t] * x[s*i + start + t]``.
    """
    s = scale
    centre = (s - 1) / 2.0
    if model is Degradation.AREA:
        return np.full(s, 1.0 / s), 0
    if model is Degradation.BICUBIC:
        support = 2.0 * s
        lo = math.floor(centre - support) + 1
        hi = math.ceil(centre + support) - 1
        offsets = np.arange(lo, hi + 1)
        w = keys_kernel((offsets - centre) / s)
    else:  # Gaussian point-spread function
        radius = math.ceil(4.0 * sigma)
        lo = math.floor(centre - radius)
        hi = math.ceil(centre + radius)
        offsets = np.arange(lo, hi + 1)
        w = np.exp(-0.5 * ((offsets - centre) / sigma) ** 2)
    keep = np.abs(w) > 1e-12
    first, last = np.flatnonzero(keep)[[0, -1]]
    w = w[first : last + 1]
    return w / w.sum(), int(offsets[first])


def degradation_taps(
    scale: int, model: str = "bicubic", sigma: float | None = None
) -> tuple[np.ndarray, int]:
    """Return ``(weights, start)`` of the separable degradation filter.

    Low-res pixel ``i`` is ``sum_t weights[t] * x[scale*i + start + t]``
    along each axis.
    """
    scale = check_scale(scale)
    model = Degradation.parse(model, "degradation")
    sigma = _check_sigma(scale, model, sigma)
    w, start = _degradation_taps(scale, model, sigma)
    return w.copy(), start


def _check_sigma(scale, model, sigma):
    if model is not Degradation.GAUSSIAN:
        return None
    if sigma is None:
        return default_sigma(scale)
    try:
        sigma = float(sigma)
    except (TypeError, ValueError):
        sigma = float("nan")
    if not (math.isfinite(sigma) and 0.1 <= sigma <= 10.0 * scale):
        raise ParameterError(
            f"The 'sigma' parameter must be a number from 0.1 to {10 * scale} "
            f"high-res pixels, got {sigma!r}"
        )
    return sigma


def degradation_margin(scale: int, model: str = "bicubic", sigma: float | None = None) -> tuple[int, int]:
    """High-res pixels of context the degradation needs on each side of a block.

    Returns ``(left, right)``: pixel ``s*i`` needs ``left`` pixels before it
    and pixel ``s*i + s - 1`` needs ``right`` after it.
    """
    w, start = degradation_taps(scale, model, sigma)
    left = max(0, -start)
    right = max(0, start + len(w) - scale)
    return left, right


def degrade_valid(padded: ArrayLike, scale: int, model: str = "bicubic", sigma: float | None = None,
                  margin: int | None = None) -> np.ndarray:
    """Degrade an array that carries ``margin`` high-res pixels of context.

    ``padded`` has shape ``(s*h + 2*margin, s*w + 2*margin)`` (leading axes
    are batch axes); returns the ``(h, w)`` low-res image of the interior.
    """
    w, start = degradation_taps(scale, model, sigma)
    if margin is None:
        margin = max(degradation_margin(scale, model, sigma))
    out = np.asarray(padded)
    dtype = working_dtype(out)
    for axis in (-2, -1):
        n_out = (out.shape[axis] - 2 * margin) // scale
        acc: Any = None
        for t, wt in enumerate(w):
            first = margin + start + t
            sl = [slice(None)] * out.ndim
            sl[axis] = slice(first, first + scale * (n_out - 1) + 1, scale)
            term = out[tuple(sl)] * dtype.type(wt)
            acc = term if acc is None else acc + term
        out = acc
        # The other axis still carries its margin; only this one is consumed.
    return out.astype(dtype, copy=False)


def degrade(image: ArrayLike, scale: int, model: str = "bicubic", sigma: float | None = None) -> np.ndarray:
    """Degrade a high-res image to low resolution.

    Parameters
    ----------
    image : array_like, shape (..., rows, cols)
        High-res image; ``rows`` and ``cols`` must be multiples of ``scale``
        (see :func:`crop_to_multiple`). Leading axes (bands) are kept.
    scale : int
        Integer scale factor, 2 to 8.
    model : {"bicubic", "gaussian", "area"}
        ``"bicubic"``: antialiased bicubic, the Keys kernel (a = -0.5)
        stretched by the scale, weights normalised to sum 1. ``"gaussian"``:
        Gaussian point-spread function of width ``sigma`` (high-res pixels,
        default :func:`default_sigma`), then decimation. ``"area"``: the
        mean of each ``scale x scale`` block.
    sigma : float, optional
        Gaussian width, only for ``model="gaussian"``.

    Returns
    -------
    ndarray, shape (..., rows // scale, cols // scale)
        float32 for float32 input, float64 otherwise. Borders use symmetric
        extension.
    """
    scale = check_scale(scale)
    image = np.asarray(image)
    if image.ndim < 2:
        raise InputError(f"The image must have at least 2 dimensions, got shape {image.shape}")
    if image.shape[-2] % scale or image.shape[-1] % scale:
        raise InputError(
            f"The image size must be a multiple of the scale {scale}, got "
            f"{image.shape[-2]} x {image.shape[-1]}; crop it with crop_to_multiple()"
        )
    if image.shape[-2] == 0 or image.shape[-1] == 0:
        raise InputError(f"The image must not be empty, got shape {image.shape}")
    image = image.astype(working_dtype(image), copy=False)
    margin = max(degradation_margin(scale, model, sigma))
    pad = [(0, 0)] * (image.ndim - 2) + [(margin, margin)] * 2
    return degrade_valid(np.pad(image, pad, mode="symmetric"), scale, model, sigma, margin)


@lru_cache(maxsize=16)
def _upscale_taps(scale):
    """Per-phase 4-tap bicubic weights and first low-res offsets.

    High-res pixel ``s*j + p`` is ``sum_t w[p, t] * lr[j + first[p] + t]``.
    """
    w = np.empty((scale, 4))
    first = np.empty(scale, dtype=np.int64)
    for p in range(scale):
        d = (p + 0.5) / scale - 0.5
        f = math.floor(d)
        taps = f - 1 + np.arange(4)
        w[p] = keys_kernel(d - taps)
        first[p] = f - 1
    return w, first


#: Low-res pixels of context bicubic interpolation needs on each side.
UPSCALE_MARGIN = 2


def upscale_valid(padded: ArrayLike, scale: int, margin: int = UPSCALE_MARGIN) -> np.ndarray:
    """Bicubic interpolation of the interior of an array with ``margin`` of context.

    ``padded`` has shape ``(h + 2*margin, w + 2*margin)`` on its last two
    axes; returns ``(s*h, s*w)``.
    """
    w, first = _upscale_taps(scale)
    out = np.asarray(padded)
    dtype = working_dtype(out)
    for axis in (-2, -1):
        n = out.shape[axis] - 2 * margin
        shape = list(out.shape)
        shape[axis] = n * scale
        res = np.empty(shape, dtype=dtype)
        for p in range(scale):
            acc = None
            for t in range(4):
                lo = margin + first[p] + t
                sl = [slice(None)] * out.ndim
                sl[axis] = slice(lo, lo + n)
                term = out[tuple(sl)] * dtype.type(w[p, t])
                acc = term if acc is None else acc + term
            dst = [slice(None)] * out.ndim
            dst[axis] = slice(p, None, scale)
            res[tuple(dst)] = acc
        out = res
    return out


def upscale_bicubic(image: ArrayLike, scale: int) -> np.ndarray:
    """Bicubic interpolation by an integer factor, pixel centres aligned.

    Parameters
    ----------
    image : array_like, shape (..., rows, cols)
    scale : int

    Returns
    -------
    ndarray, shape (..., scale*rows, scale*cols)
        float32 for float32 input, float64 otherwise; symmetric borders.
    """
    scale = check_scale(scale)
    image = np.asarray(image)
    if image.ndim < 2 or image.shape[-2] == 0 or image.shape[-1] == 0:
        raise InputError(f"The image must be a non-empty 2-D array, got shape {image.shape}")
    image = image.astype(working_dtype(image), copy=False)
    m = UPSCALE_MARGIN
    pad = [(0, 0)] * (image.ndim - 2) + [(m, m)] * 2
    return upscale_valid(np.pad(image, pad, mode="symmetric"), scale, m)


def _rescale_matrix(n_in, n_out, factor):
    """Dense 1-D antialiased Keys resampling matrix (n_out, n_in), symmetric borders."""
    stretch = max(1.0, 1.0 / factor)
    centres = (np.arange(n_out) + 0.5) / factor - 0.5
    support = 2.0 * stretch
    offsets = np.arange(-math.ceil(support), math.ceil(support) + 1)
    taps = np.floor(centres)[:, None] + offsets[None, :]
    w = keys_kernel((centres[:, None] - taps) / stretch)
    w /= w.sum(axis=1, keepdims=True)
    # Fold taps outside the image back in by symmetric reflection.
    idx = taps.astype(np.int64)
    period = 2 * n_in
    idx = np.mod(idx, period)
    idx = np.where(idx >= n_in, period - 1 - idx, idx)
    m = np.zeros((n_out, n_in))
    np.add.at(m, (np.repeat(np.arange(n_out), idx.shape[1]), idx.ravel()), w.ravel())
    return m


def rescale(image: ArrayLike, factor: float) -> np.ndarray:
    """Resample a 2-D image by a real factor with an antialiased Keys kernel.

    Used to make extra training copies of a reference at slightly smaller
    scales. The kernel is stretched by ``1 / factor`` when shrinking, the
    output size is ``round(n * factor)`` on each axis, pixel centres are
    aligned and borders are symmetric.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
    factor : float
        Positive resampling factor; 1 returns a copy.

    Returns
    -------
    ndarray
        float32 for float32 input, float64 otherwise.
    """
    image = np.asarray(image)
    dtype = working_dtype(image)
    if not (math.isfinite(factor) and factor > 0):
        raise ParameterError(f"The 'factor' parameter must be a positive number, got {factor!r}")
    if factor == 1:
        return image.astype(dtype, copy=True)
    rows = max(1, int(round(image.shape[-2] * factor)))
    cols = max(1, int(round(image.shape[-1] * factor)))
    mr = _rescale_matrix(image.shape[-2], rows, factor).astype(dtype)
    mc = _rescale_matrix(image.shape[-1], cols, factor).astype(dtype)
    return (mr @ image.astype(dtype, copy=False) @ mc.T).astype(dtype, copy=False)
