"""Quality metrics for magnified rasters: PSNR, SSIM, ERGAS, SAM, Q, QNR, consistency.

Conventions shared by every function here:

- Images are arrays shaped ``(bands, rows, cols)`` like rasterio's ``read()``;
  a 2-D array ``(rows, cols)`` is one band. Any integer or float dtype is
  accepted and everything is computed in float64.
- ``valid`` is an optional bool mask, ``(rows, cols)`` (the same for every
  band) or ``(bands, rows, cols)``. Only valid pixels count: the values at
  invalid pixels are never read (they may hold nodata, NaN or anything else).
  Without a mask every pixel is valid.
- Values at valid pixels must be finite, every band must keep at least one
  valid pixel, and the two images must have the same shape; otherwise
  :class:`~geosr.errors.InputError` is raised.
- ``data_range`` (PSNR, SSIM) defaults to ``max - min`` of the reference over
  its valid pixels, pooled over all bands, whatever the dtype. This differs on
  purpose from scikit-image, which uses the dtype's range for integer images
  (255 for uint8): a 16-bit reflectance band rarely spans 0..65535, and the
  dtype range would inflate PSNR. Pass ``data_range`` to fix the peak.
- ``per_band=False`` returns a Python float for the whole image,
  ``per_band=True`` a 1-D float64 array with one value per band. How the
  overall value pools the bands is stated in each function.

References
----------
Wang, Bovik, Sheikh & Simoncelli, "Image quality assessment: from error
visibility to structural similarity", IEEE TIP 13(4), 2004 (SSIM).
Wald, "Data fusion: definitions and architectures", Presses de l'Ecole des
Mines, 2002 (ERGAS).
Kruse et al., "The spectral image processing system (SIPS)", Remote Sensing
of Environment 44, 1993 (SAM).
Wang & Bovik, "A universal image quality index", IEEE Signal Processing
Letters 9(3), 2002 (Q).
Alparone, Aiazzi, Baronti, Garzelli, Nencini & Selva, "Multispectral and
panchromatic data fusion assessment without reference", PE&RS 74(2), 2008
(QNR).
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from numpy.typing import ArrayLike
from scipy import ndimage

from .._validation import check_float, check_int, check_scale
from ..errors import InputError, ParameterError
from .resample import degradation_margin, degradation_taps, degrade

__all__ = [
    "psnr",
    "ssim",
    "ergas",
    "sam",
    "sam_map",
    "q_index",
    "consistency_error",
    "ConsistencyError",
    "qnr",
    "d_lambda",
    "d_s",
]

#: SSIM constants and window of Wang et al. (IEEE TIP 2004), with the Gaussian
#: truncated as scikit-image does for ``gaussian_weights=True``.
SSIM_K1 = 0.01
SSIM_K2 = 0.03
SSIM_SIGMA = 1.5
SSIM_TRUNCATE = 3.5
SSIM_RADIUS = int(SSIM_TRUNCATE * SSIM_SIGMA + 0.5)  # 5, as scipy.ndimage rounds it
SSIM_WINDOW = 2 * SSIM_RADIUS + 1  # 11


# --------------------------------------------------------------------------
# Shared input checks
# --------------------------------------------------------------------------


def _as_bands(image, name):
    """``image`` as a float64 array (bands, rows, cols); checks dtype and rank."""
    a = np.asarray(image)
    if a.dtype.kind not in "iuf":
        raise InputError(
            f"The {name!r} parameter must be an integer or float array, got dtype {a.dtype}"
        )
    if a.ndim not in (2, 3):
        raise InputError(
            f"The {name!r} parameter must be a 2-D (rows, cols) or 3-D "
            f"(bands, rows, cols) array, got shape {a.shape}"
        )
    if a.size == 0:
        raise InputError(f"The {name!r} parameter must not be empty, got shape {a.shape}")
    a = a.astype(np.float64, copy=False)
    return a[np.newaxis] if a.ndim == 2 else a


def _as_mask(valid, shape, name="valid"):
    """The bool mask broadcast to ``shape`` (bands, rows, cols); all True for None.

    Every band must keep at least one valid pixel.
    """
    if valid is None:
        return np.ones(shape, dtype=bool)
    v = np.asarray(valid)
    if v.dtype != np.bool_:
        raise InputError(f"The {name!r} mask must be a bool array, got dtype {v.dtype}")
    if v.shape not in (shape[1:], shape):
        raise InputError(
            f"The {name!r} mask must have shape {shape[1:]} or {shape}, got {v.shape}"
        )
    v = np.broadcast_to(v, shape)
    counts = v.reshape(shape[0], -1).sum(axis=1)
    if not counts.all():
        band = int(np.flatnonzero(counts == 0)[0]) + 1
        raise InputError(
            f"The {name!r} mask must mark at least one pixel of every band as valid, "
            f"got none in band {band}"
        )
    return v


def _check_finite(a, mask, name):
    """Raise if ``a`` holds NaN or inf at a valid pixel."""
    bad = ~np.isfinite(a) & mask
    if bad.any():
        per_band = bad.reshape(a.shape[0], -1).sum(axis=1)
        band = int(np.flatnonzero(per_band)[0]) + 1
        raise InputError(
            f"The {name!r} values must be finite at valid pixels, got "
            f"{int(per_band.sum())} NaN or infinite value(s), the first in band {band}"
        )


def _prepare(reference, estimate, valid):
    """Check a (reference, estimate, valid) triple once for every metric.

    Returns float64 copies shaped (bands, rows, cols) with invalid pixels set
    to 0 (so that no value there can reach a result) and the broadcast mask.
    """
    ref = _as_bands(reference, "reference")
    est = _as_bands(estimate, "estimate")
    if ref.shape != est.shape:
        raise InputError(
            f"The 'estimate' parameter must have the shape of 'reference' "
            f"{np.shape(reference)}, got {np.shape(estimate)}"
        )
    mask = _as_mask(valid, ref.shape)
    _check_finite(ref, mask, "reference")
    _check_finite(est, mask, "estimate")
    return np.where(mask, ref, 0.0), np.where(mask, est, 0.0), mask


def _data_range(data_range, ref, mask):
    """The peak used by PSNR and SSIM (see the module notes)."""
    if data_range is None:
        values = ref[mask]
        value = float(values.max() - values.min())
        if not value > 0.0:
            raise InputError(
                "The 'data_range' parameter must be given when the reference is constant "
                f"over its valid pixels (its max - min is {value}), got None"
            )
        return value
    try:
        value = float(data_range)
    except (TypeError, ValueError):
        value = float("nan")
    if not (math.isfinite(value) and value > 0.0):
        raise ParameterError(
            f"The 'data_range' parameter must be a positive finite number, got {data_range!r}"
        )
    return value


def _window_all_valid(mask2d, k):
    """True for each k x k window (valid mode) that holds only valid pixels.

    Returns shape (rows - k + 1, cols - k + 1); entry (i, j) is the window
    whose top-left pixel is (i, j). Exact integer counting.
    """
    bad = np.zeros((mask2d.shape[0] + 1, mask2d.shape[1] + 1), dtype=np.int64)
    bad[1:, 1:] = np.cumsum(np.cumsum(~mask2d, axis=0, dtype=np.int64), axis=1)
    count = bad[k:, k:] - bad[:-k, k:] - bad[k:, :-k] + bad[:-k, :-k]
    return count == 0


def _box_valid(filter_func, a, k, **kwargs):
    """Apply a separable k x k scipy.ndimage window filter and keep valid mode.

    For a window of size k scipy centres the footprint at ``k // 2``; the
    slice keeps the windows lying wholly inside the image, indexed by their
    top-left pixel like :func:`_window_all_valid`.
    """
    out = filter_func(a, size=k, mode="nearest", **kwargs)
    start = k // 2
    stop_r = a.shape[0] - (k - 1 - k // 2)
    stop_c = a.shape[1] - (k - 1 - k // 2)
    return out[start:stop_r, start:stop_c]


def _overall_or_bands(values, per_band):
    values = np.asarray(values, dtype=np.float64)
    return values if per_band else float(values.mean())


# --------------------------------------------------------------------------
# PSNR
# --------------------------------------------------------------------------


def psnr(reference: ArrayLike, estimate: ArrayLike, *, data_range: float | None = None,
         valid: ArrayLike | None = None, per_band: bool = False) -> float | np.ndarray:
    """Peak signal-to-noise ratio in decibels.

    ``PSNR = 10 log10(R^2 / MSE)`` with ``R`` the data range and ``MSE`` the
    mean squared difference over valid pixels.

    Parameters
    ----------
    reference, estimate : array_like, shape (bands, rows, cols) or (rows, cols)
        Reference (truth) and estimate; any integer or float dtype.
    data_range : float, optional
        The peak ``R``; default ``max - min`` of the reference over its valid
        pixels, pooled over all bands (not the dtype range, see the module
        notes). The same ``R`` serves every band.
    valid : ndarray of bool, shape (rows, cols) or (bands, rows, cols), optional
        Pixels to use; default all.
    per_band : bool
        Return one value per band instead of the overall value.

    Returns
    -------
    float or ndarray of float64, shape (bands,)
        Overall: from the MSE pooled over the valid pixels of all bands (the
        sum of squared errors divided by the number of valid band-pixels), not
        the mean of the band PSNRs. ``inf`` where the MSE is 0.

    Raises
    ------
    InputError
        Shape mismatch, no valid pixel in a band, non-finite valid values, or
        a constant reference without ``data_range``.
    ParameterError
        ``data_range`` not a positive finite number.
    """
    ref, est, mask = _prepare(reference, estimate, valid)
    peak = _data_range(data_range, ref, mask)
    sq = (ref - est) ** 2  # invalid pixels are 0 in both
    n = mask.reshape(mask.shape[0], -1).sum(axis=1)
    sse = sq.reshape(sq.shape[0], -1).sum(axis=1)
    if per_band:
        return _psnr_from_mse(peak, sse / n)
    return float(_psnr_from_mse(peak, np.array([sse.sum() / n.sum()]))[0])


def _psnr_from_mse(peak, mse):
    out = np.full(mse.shape, np.inf)
    nz = mse > 0
    out[nz] = 10.0 * np.log10(peak**2 / mse[nz])
    return out


# --------------------------------------------------------------------------
# SSIM
# --------------------------------------------------------------------------


def ssim(reference: ArrayLike, estimate: ArrayLike, *, data_range: float | None = None,
         valid: ArrayLike | None = None, per_band: bool = False) -> float | np.ndarray:
    """Mean structural similarity index (Wang et al., IEEE TIP 2004).

    The parameters of the paper: a Gaussian window of sigma 1.5 (truncated at
    3.5 sigma, 11 x 11 pixels), ``K1 = 0.01``, ``K2 = 0.03``, population
    (weighted) variances and covariance. Without a mask each band's value
    equals ``skimage.metrics.structural_similarity(ref, est,
    gaussian_weights=True, sigma=1.5, use_sample_covariance=False,
    data_range=R)``: the SSIM map is computed with ``mode="reflect"`` borders
    and averaged after cropping 5 pixels (the window radius) on every side.

    Parameters
    ----------
    reference, estimate : array_like, shape (bands, rows, cols) or (rows, cols)
        Reference and estimate, at least 11 x 11 pixels; any numeric dtype.
    data_range : float, optional
        ``R`` in ``C1 = (K1 R)^2`` and ``C2 = (K2 R)^2``; default ``max - min``
        of the reference over its valid pixels, pooled over all bands.
    valid : ndarray of bool, shape (rows, cols) or (bands, rows, cols), optional
        With a mask the SSIM map of a band is averaged only over pixels whose
        whole 11 x 11 window is valid (which also keeps them inside the
        5-pixel border crop), so no invalid value reaches the result.
    per_band : bool
        Return one value per band instead of the overall value.

    Returns
    -------
    float or ndarray of float64, shape (bands,)
        Overall: the mean of the band values (as scikit-image does with
        ``channel_axis``). 1 for identical images.

    Raises
    ------
    InputError
        As :func:`psnr`; also images smaller than 11 x 11, or a band without
        any wholly valid window.
    ParameterError
        ``data_range`` not a positive finite number.
    """
    ref, est, mask = _prepare(reference, estimate, valid)
    rows, cols = ref.shape[1:]
    if rows < SSIM_WINDOW or cols < SSIM_WINDOW:
        raise InputError(
            f"The images must be at least {SSIM_WINDOW} x {SSIM_WINDOW} pixels for SSIM "
            f"(its Gaussian window), got {rows} x {cols}"
        )
    peak = _data_range(data_range, ref, mask)
    c1 = (SSIM_K1 * peak) ** 2
    c2 = (SSIM_K2 * peak) ** 2
    r = SSIM_RADIUS
    values = []
    for b in range(ref.shape[0]):
        smap = _ssim_map(ref[b], est[b], c1, c2)
        use = np.zeros((rows, cols), dtype=bool)
        use[r : rows - r, r : cols - r] = _window_all_valid(mask[b], SSIM_WINDOW)
        if not use.any():
            raise InputError(
                f"The 'valid' mask must leave a whole {SSIM_WINDOW} x {SSIM_WINDOW} window "
                f"of valid pixels for SSIM, got none in band {b + 1}"
            )
        values.append(smap[use].mean(dtype=np.float64))
    return _overall_or_bands(values, per_band)


def _ssim_map(x, y, c1, c2):
    """The SSIM map of two 2-D float64 images, in scikit-image's operation order."""

    def filt(a):
        return ndimage.gaussian_filter(a, SSIM_SIGMA, mode="reflect", truncate=SSIM_TRUNCATE)

    ux, uy = filt(x), filt(y)
    vx = filt(x * x) - ux * ux
    vy = filt(y * y) - uy * uy
    vxy = filt(x * y) - ux * uy
    a1 = 2 * ux * uy + c1
    a2 = 2 * vxy + c2
    b1 = ux**2 + uy**2 + c1
    b2 = vx + vy + c2
    return (a1 * a2) / (b1 * b2)


# --------------------------------------------------------------------------
# ERGAS
# --------------------------------------------------------------------------


def ergas(reference: ArrayLike, estimate: ArrayLike, scale: float, *, valid: ArrayLike | None = None,
          per_band: bool = False) -> float | np.ndarray:
    """Relative dimensionless global error in synthesis (Wald 2002).

    ``ERGAS = 100 (h / l) sqrt(mean_k(RMSE_k^2 / mu_k^2))`` with ``h / l =
    1 / scale`` the ratio of the high-res to the low-res pixel size,
    ``RMSE_k`` the root mean squared error of band ``k`` and ``mu_k`` the mean
    of the reference band ``k``, both over that band's valid pixels.
    Lower is better; 0 for identical images.

    Parameters
    ----------
    reference, estimate : array_like, shape (bands, rows, cols) or (rows, cols)
        Reference and estimate; any numeric dtype.
    scale : float
        The magnification factor ``l / h`` (> 0), e.g. 2 for 20 m bands
        magnified to 10 m.
    valid : ndarray of bool, shape (rows, cols) or (bands, rows, cols), optional
        Pixels to use; default all.
    per_band : bool
        Return each band's term ``100 (h / l) RMSE_k / |mu_k|`` (the ERGAS of
        that band alone); the overall value is the root mean square of these.

    Returns
    -------
    float or ndarray of float64, shape (bands,)

    Raises
    ------
    InputError
        As :func:`psnr`; also a reference band whose valid mean is 0.
    ParameterError
        ``scale`` not a positive finite number.
    """
    ref, est, mask = _prepare(reference, estimate, valid)
    try:
        ratio = float(scale)
    except (TypeError, ValueError):
        ratio = float("nan")
    if isinstance(scale, bool) or not (math.isfinite(ratio) and ratio > 0.0):
        raise ParameterError(
            f"The 'scale' parameter must be a positive finite number, got {scale!r}"
        )
    bands = ref.shape[0]
    n = mask.reshape(bands, -1).sum(axis=1)
    mse = ((ref - est) ** 2).reshape(bands, -1).sum(axis=1) / n
    mu = ref.reshape(bands, -1).sum(axis=1) / n
    if np.any(mu == 0.0):
        band = int(np.flatnonzero(mu == 0.0)[0]) + 1
        raise InputError(
            f"The reference band mean must be non-zero for ERGAS, got 0 in band {band}"
        )
    terms = mse / mu**2
    if per_band:
        return 100.0 / ratio * np.sqrt(terms)
    return float(100.0 / ratio * math.sqrt(terms.mean()))


# --------------------------------------------------------------------------
# SAM
# --------------------------------------------------------------------------


def _angle_map(ref, est, mask):
    """Spectral angle in degrees per pixel; NaN where undefined. Inputs checked."""
    use = mask.all(axis=0)
    nr = np.sqrt((ref * ref).sum(axis=0))
    ne = np.sqrt((est * est).sum(axis=0))
    use &= (nr > 0) & (ne > 0)
    angle = np.full(use.shape, np.nan)
    r = ref[:, use] / nr[use]
    e = est[:, use] / ne[use]
    # arccos(<r, e>) of the unit spectra, computed as 2 atan2(|r - e|, |r + e|),
    # the same angle without arccos's loss of precision near 0 and 180 degrees.
    diff = np.sqrt(((r - e) ** 2).sum(axis=0))
    summ = np.sqrt(((r + e) ** 2).sum(axis=0))
    angle[use] = np.degrees(2.0 * np.arctan2(diff, summ))
    return angle


def sam_map(reference: ArrayLike, estimate: ArrayLike, *, valid: ArrayLike | None = None) -> np.ndarray:
    """Per-pixel spectral angle (Kruse et al., RSE 1993) in degrees.

    ``angle = arccos(<r, e> / (|r| |e|))`` between the reference spectrum
    ``r`` and the estimated spectrum ``e`` of a pixel (its values across the
    bands), computed as ``2 atan2(|r/|r| - e/|e||, |r/|r| + e/|e||)``, the
    same angle with full precision near 0.

    Parameters
    ----------
    reference, estimate : array_like, shape (bands, rows, cols) or (rows, cols)
        Reference and estimate; any numeric dtype. With one band the angle is
        0 or 180 degrees (the sign of the values).
    valid : ndarray of bool, shape (rows, cols) or (bands, rows, cols), optional
        A pixel counts when it is valid in every band.

    Returns
    -------
    ndarray of float64, shape (rows, cols)
        Angles in degrees, 0 to 180; NaN at invalid pixels and where either
        spectrum is all zeros (the angle is undefined).

    Raises
    ------
    InputError
        As :func:`psnr`.
    """
    ref, est, mask = _prepare(reference, estimate, valid)
    return _angle_map(ref, est, mask)


def sam(reference: ArrayLike, estimate: ArrayLike, *, valid: ArrayLike | None = None) -> float:
    """Mean spectral angle mapper (Kruse et al., RSE 1993) in degrees.

    The per-pixel angle of :func:`sam_map` averaged over the pixels valid in
    every band where both spectra have a non-zero norm. Lower is better; 0
    for identical images, and unchanged when a pixel's spectrum is multiplied
    by a positive number.

    Parameters
    ----------
    reference, estimate : array_like, shape (bands, rows, cols) or (rows, cols)
        Reference and estimate; any numeric dtype.
    valid : ndarray of bool, shape (rows, cols) or (bands, rows, cols), optional
        Pixels to use; default all.

    Returns
    -------
    float
        Mean angle in degrees.

    Raises
    ------
    InputError
        As :func:`psnr`; also when no valid pixel has two non-zero spectra.
    """
    ref, est, mask = _prepare(reference, estimate, valid)
    angle = _angle_map(ref, est, mask)
    defined = np.isfinite(angle)
    if not defined.any():
        raise InputError(
            "The images must have a valid pixel where both spectra are non-zero for SAM, "
            "got none"
        )
    return float(angle[defined].mean())


# --------------------------------------------------------------------------
# Q (universal image quality index)
# --------------------------------------------------------------------------


def q_index(reference: ArrayLike, estimate: ArrayLike, *, valid: ArrayLike | None = None,
            block_size: int = 8, per_band: bool = False) -> float | np.ndarray:
    """Universal image quality index Q (Wang & Bovik, IEEE SPL 2002).

    In each ``block_size x block_size`` window, sliding by one pixel as in the
    paper, ``Q = 4 s_xy mx my / ((s_x^2 + s_y^2)(mx^2 + my^2))`` with ``mx``,
    ``my`` the window means, ``s_x^2``, ``s_y^2`` the variances and ``s_xy``
    the covariance (the normalisation, N or N - 1, cancels in the ratio); a
    band's Q is the mean over its windows. 1 is a perfect match; the range is
    -1 to 1.

    The undefined case: Q is the product ``V * L`` of ``V = 2 s_xy / (s_x^2 +
    s_y^2)`` (correlation times contrast) and ``L = 2 mx my / (mx^2 +
    my^2)`` (luminance). A factor whose numerator and denominator are both 0
    is taken as 1. So two constant windows score ``L`` (1 when equal, less
    when offset), two all-zero windows score 1, and zero-mean windows score
    ``V``. Constant windows are detected exactly (window min equals max).
    Q is meant for non-negative data such as intensities or reflectances.

    Parameters
    ----------
    reference, estimate : array_like, shape (bands, rows, cols) or (rows, cols)
        Reference and estimate, at least ``block_size`` pixels on each side;
        any numeric dtype.
    valid : ndarray of bool, shape (rows, cols) or (bands, rows, cols), optional
        Windows containing any invalid pixel are skipped.
    block_size : int
        Window side, default 8 (the paper's choice).
    per_band : bool
        Return one value per band instead of the overall value.

    Returns
    -------
    float or ndarray of float64, shape (bands,)
        Overall: the mean of the band values.

    Raises
    ------
    InputError
        As :func:`psnr`; also images smaller than the window, or a band
        without a wholly valid window.
    ParameterError
        ``block_size`` not an integer >= 2.
    """
    k = check_int(block_size, "block_size", 2)
    ref, est, mask = _prepare(reference, estimate, valid)
    rows, cols = ref.shape[1:]
    if rows < k or cols < k:
        raise InputError(
            f"The images must be at least {k} x {k} pixels for Q with block_size={k}, "
            f"got {rows} x {cols}"
        )
    values = []
    for b in range(ref.shape[0]):
        use = _window_all_valid(mask[b], k)
        if not use.any():
            raise InputError(
                f"The 'valid' mask must leave a whole {k} x {k} window of valid pixels "
                f"for Q, got none in band {b + 1}"
            )
        values.append(_q_map(ref[b], est[b], mask[b], k)[use].mean(dtype=np.float64))
    return _overall_or_bands(values, per_band)


def _q_map(x, y, mask, k):
    """Q of every k x k window (valid mode) of two 2-D float64 images."""

    def box(a):
        return _box_valid(ndimage.uniform_filter, a, k)

    # Moments of data shifted by the band mean keep E[x^2] - E[x]^2 accurate.
    cx, cy = x[mask].mean(), y[mask].mean()
    xc, yc = x - cx, y - cy
    mxc, myc = box(xc), box(yc)
    sxx = np.maximum(box(xc * xc) - mxc * mxc, 0.0)
    syy = np.maximum(box(yc * yc) - myc * myc, 0.0)
    sxy = box(xc * yc) - mxc * myc
    mx, my = mxc + cx, myc + cy
    # Constant windows, exactly: variance and covariance 0, mean the value.
    xmin = _box_valid(ndimage.minimum_filter, x, k)
    ymin = _box_valid(ndimage.minimum_filter, y, k)
    x_const = xmin == _box_valid(ndimage.maximum_filter, x, k)
    y_const = ymin == _box_valid(ndimage.maximum_filter, y, k)
    sxx[x_const] = 0.0
    syy[y_const] = 0.0
    sxy[x_const | y_const] = 0.0
    mx[x_const] = xmin[x_const]
    my[y_const] = ymin[y_const]

    den_v = sxx + syy
    den_l = mx * mx + my * my
    v = np.ones_like(den_v)
    np.divide(2.0 * sxy, den_v, out=v, where=den_v > 0)
    lum = np.ones_like(den_l)
    np.divide(2.0 * mx * my, den_l, out=lum, where=den_l > 0)
    return v * lum


# --------------------------------------------------------------------------
# Consistency with the input
# --------------------------------------------------------------------------


class ConsistencyError(NamedTuple):
    """RMS and maximum absolute value of ``degrade(output) - low_res``."""

    rms: float
    max_abs: float


def consistency_error(
    low_res: ArrayLike, output: ArrayLike, scale: int, *, degradation: str = "bicubic",
    sigma: float | None = None, valid: ArrayLike | None = None,
) -> ConsistencyError:
    """How far degrading the magnified output is from the low-res input.

    Computes ``d = degrade(output, scale, degradation, sigma) - low_res``
    with :func:`geosr.core.resample.degrade` (symmetric borders) and returns its
    RMS and maximum absolute value, pooled over all bands. 0 means that the
    output explains the input exactly under that degradation model.

    Parameters
    ----------
    low_res : array_like, shape (bands, rows, cols) or (rows, cols)
        The low-res input; any numeric dtype.
    output : array_like, shape (bands, scale*rows, scale*cols) or (scale*rows, scale*cols)
        The magnified output, same number of bands.
    scale : int
        Integer scale factor, 2 to 8.
    degradation : {"bicubic", "gaussian", "area"}
        The degradation model, as in :func:`geosr.core.resample.degrade`.
    sigma : float, optional
        Gaussian width in high-res pixels, only for ``"gaussian"``.
    valid : ndarray of bool, shape (rows, cols) or (bands, rows, cols), optional
        Valid pixels of ``low_res``. The output is taken as valid where the
        mask magnified by nearest neighbour is (the output contract), and a
        low-res pixel counts only if it is valid and every output pixel its
        degradation reads (symmetric extension included) is valid, so no
        invalid value of either image reaches the result.

    Returns
    -------
    ConsistencyError
        A named tuple ``(rms, max_abs)`` of floats.

    Raises
    ------
    InputError
        Shapes that do not match, no valid pixel in a band, non-finite valid
        values, or no low-res pixel whose degradation reads only valid pixels.
    ParameterError
        A bad ``scale``, ``degradation`` or ``sigma``.
    """
    s = check_scale(scale)
    taps, start = degradation_taps(s, degradation, sigma)  # validates both
    low = _as_bands(low_res, "low_res")
    out = _check_magnified(_as_bands(output, "output"), low, s, "output", "low-res")
    mask = _as_mask(valid, low.shape)
    out_mask = np.repeat(np.repeat(mask, s, axis=1), s, axis=2)
    _check_finite(low, mask, "low_res")
    _check_finite(out, out_mask, "output")
    low = np.where(mask, low, 0.0)
    out = np.where(out_mask, out, 0.0)

    # Low-res pixel i reads output pixels s*i + start ... s*i + start + L - 1
    # (per axis) of the output extended symmetrically by `margin`.
    margin = max(degradation_margin(s, degradation, sigma))
    n_taps = len(taps)
    padded = np.pad(out_mask, [(0, 0), (margin, margin), (margin, margin)], mode="symmetric")
    use = np.empty_like(mask)
    rows, cols = low.shape[1:]
    r0 = margin + start + s * np.arange(rows)
    c0 = margin + start + s * np.arange(cols)
    for b in range(low.shape[0]):
        whole = _window_all_valid(padded[b], n_taps)
        use[b] = mask[b] & whole[np.ix_(r0, c0)]
    if not use.any():
        raise InputError(
            "The 'valid' mask must leave a low-res pixel whose degradation reads only "
            "valid output pixels, got none"
        )
    d = (degrade(out, s, degradation, sigma) - low)[use]
    return ConsistencyError(float(np.sqrt(np.mean(d * d))), float(np.abs(d).max()))


# --------------------------------------------------------------------------
# QNR (quality with no reference)
# --------------------------------------------------------------------------
#
# Alparone, Aiazzi, Baronti, Garzelli, Nencini & Selva, "Multispectral and
# panchromatic data fusion assessment without reference", Photogrammetric
# Engineering & Remote Sensing 74(2), 2008.


def _erode(mask2d, radius):
    """True where every pixel within Chebyshev ``radius`` is valid (symmetric borders)."""
    if radius <= 0 or mask2d.all():
        return mask2d.copy()
    filt = ndimage.minimum_filter(mask2d.astype(np.uint8), size=2 * radius + 1, mode="reflect")
    return filt.astype(bool)


def _degraded_mask(fine_mask, scale, degradation="bicubic", sigma=None):
    """Coarse pixels whose degradation reads only valid fine pixels.

    ``fine_mask`` is 2-D ``(s*h, s*w)``; returns ``(h, w)``. The fine image is
    extended symmetrically as :func:`geosr.core.resample.degrade` does.
    """
    taps, start = degradation_taps(scale, degradation, sigma)
    margin = max(degradation_margin(scale, degradation, sigma))
    padded = np.pad(fine_mask, margin, mode="symmetric")
    whole = _window_all_valid(padded, len(taps))
    r0 = margin + start + scale * np.arange(fine_mask.shape[0] // scale)
    c0 = margin + start + scale * np.arange(fine_mask.shape[1] // scale)
    return whole[np.ix_(r0, c0)]


def _magnify_mask(mask, scale):
    """A (..., h, w) mask magnified by nearest neighbour to (..., s*h, s*w)."""
    return np.repeat(np.repeat(mask, scale, axis=-2), scale, axis=-1)


class _QnrInputs(NamedTuple):
    fused: np.ndarray  # (N, s*h, s*w), 0 at invalid pixels
    fused_mask: np.ndarray  # (N, s*h, s*w)
    coarse: np.ndarray  # (N, h, w), 0 at invalid pixels
    mask: np.ndarray  # (N, h, w)
    block: int


def _check_magnified(fine, coarse, s, name, coarse_name):
    """``fine`` must have ``coarse``'s shape magnified by ``s``."""
    expected = (coarse.shape[0], s * coarse.shape[1], s * coarse.shape[2])
    if fine.shape != expected:
        raise InputError(
            f"The {name!r} parameter must have shape {expected} (the {coarse_name} shape "
            f"{coarse.shape} magnified by {s}), got {fine.shape}"
        )
    return fine


def _qnr_inputs(fused, coarse, scale, valid, block):
    """Check the fused/coarse pair shared by D_lambda, D_s and QNR."""
    s = check_scale(scale)
    k = check_int(block, "block", 2)
    m = _as_bands(coarse, "coarse")
    f = _check_magnified(_as_bands(fused, "fused"), m, s, "fused", "coarse")
    if m.shape[1] < k or m.shape[2] < k:
        raise InputError(
            f"The 'coarse' parameter must be at least {k} x {k} pixels for QNR with "
            f"block={k}, got {m.shape[1]} x {m.shape[2]}"
        )
    mask = _as_mask(valid, m.shape)
    fmask = _magnify_mask(mask, s)
    _check_finite(m, mask, "coarse")
    _check_finite(f, fmask, "fused")
    return _QnrInputs(np.where(fmask, f, 0.0), fmask, np.where(mask, m, 0.0), mask, k)


def _q_mean(x, y, mask, k, what):
    """Mean Q of the wholly valid k x k windows (stride 1) of two 2-D images."""
    use = _window_all_valid(mask, k)
    if not use.any():
        raise InputError(
            f"The 'valid' mask must leave a whole {k} x {k} window of valid pixels "
            f"for {what}, got none"
        )
    x = np.where(mask, x, 0.0)
    y = np.where(mask, y, 0.0)
    return float(_q_map(x, y, mask, k)[use].mean(dtype=np.float64))


def _d_lambda(inp, p):
    n = inp.coarse.shape[0]
    if n < 2:
        return 0.0
    terms = []
    for l_band in range(n):
        for r_band in range(l_band + 1, n):
            fm = inp.fused_mask[l_band] & inp.fused_mask[r_band]
            cm = inp.mask[l_band] & inp.mask[r_band]
            q_f = _q_mean(inp.fused[l_band], inp.fused[r_band], fm, inp.block, "D_lambda")
            q_m = _q_mean(inp.coarse[l_band], inp.coarse[r_band], cm, inp.block, "D_lambda")
            terms.append(abs(q_f - q_m) ** p)
    # Q is symmetric, so the mean over the N(N-1) ordered pairs is the mean
    # over the N(N-1)/2 unordered ones.
    return float(np.mean(terms) ** (1.0 / p))


def _check_guide(guide, guide_valid, fine_shape, grid):
    """The guide as float64 (k, rows, cols) on the fine grid and its 2-D mask.

    A pixel is valid when valid in every guide band; ``grid`` names the fine
    grid in the error message.
    """
    g = _as_bands(guide, "guide")
    if g.shape[1:] != tuple(fine_shape):
        raise InputError(
            f"The 'guide' parameter must be on the grid {grid} ({fine_shape[0]} x "
            f"{fine_shape[1]} pixels), got {g.shape[1]} x {g.shape[2]}"
        )
    gmask = _as_mask(guide_valid, g.shape, "guide_valid").all(axis=0)
    if not gmask.any():
        raise InputError("The 'guide_valid' mask must leave a pixel valid in every guide band, got none")
    _check_finite(g, np.broadcast_to(gmask, g.shape), "guide")
    return g, gmask


def _guide_for_qnr(guide, guide_valid, inp, scale, degradation, sigma):
    """The guide P (fine), its mask, P_L (coarse) and the mask of P_L."""
    g, gmask = _check_guide(guide, guide_valid, inp.fused.shape[1:], "of 'fused'")
    p = np.where(gmask, g.mean(axis=0), 0.0)
    p_low = degrade(p, scale, degradation, sigma)
    return p, gmask, p_low, _degraded_mask(gmask, scale, degradation, sigma)


def _d_s(inp, guide, guide_valid, scale, q, degradation, sigma):
    p, gmask, p_low, lmask = _guide_for_qnr(guide, guide_valid, inp, scale, degradation, sigma)
    terms = []
    for b in range(inp.coarse.shape[0]):
        q_f = _q_mean(inp.fused[b], p, inp.fused_mask[b] & gmask, inp.block, "D_s")
        q_m = _q_mean(inp.coarse[b], p_low, inp.mask[b] & lmask, inp.block, "D_s")
        terms.append(abs(q_f - q_m) ** q)
    return float(np.mean(terms) ** (1.0 / q))


def d_lambda(fused: ArrayLike, coarse: ArrayLike, scale: int, *, valid: ArrayLike | None = None,
             block: int = 32, p: float = 1.0) -> float:
    """Spectral distortion D_lambda of QNR (Alparone et al., PE&RS 2008).

    ``D_lambda = (1 / (N (N - 1)) sum_{l != r} |Q(F_l, F_r) - Q(M_l, M_r)|^p)^(1/p)``
    with ``F`` the fused bands, ``M`` the coarse bands and ``Q`` the universal
    image quality index of :func:`q_index`: its value in every ``block x
    block`` window sliding by one pixel, averaged over the windows. The same
    window size in pixels serves both grids (common practice in QNR
    implementations, from memory). With one band there is no pair and
    ``D_lambda`` is 0 by definition. 0 is best.

    Parameters
    ----------
    fused : array_like, shape (N, s*h, s*w) or (s*h, s*w)
        The fused (magnified) bands; any numeric dtype.
    coarse : array_like, shape (N, h, w) or (h, w)
        The coarse bands it was made from, at least ``block`` pixels a side.
    scale : int
        The integer scale ``s``, 2 to 8.
    valid : ndarray of bool, shape (h, w) or (N, h, w), optional
        Valid coarse pixels; the fused image is valid where this mask
        magnified by nearest neighbour is. A pair uses only the windows wholly
        valid in both bands.
    block : int
        Window side in pixels, default 32.
    p : float
        The exponent, > 0; default 1.

    Returns
    -------
    float

    Raises
    ------
    InputError
        Shapes that do not match, non-finite valid values, a coarse image
        smaller than the window, or a pair without a wholly valid window.
    ParameterError
        A bad ``scale``, ``block`` or ``p``.
    """
    p = check_float(p, "p", 0.0, low_open=True)
    return _d_lambda(_qnr_inputs(fused, coarse, scale, valid, block), p)


def d_s(fused: ArrayLike, coarse: ArrayLike, guide: ArrayLike, scale: int, *,
        valid: ArrayLike | None = None, guide_valid: ArrayLike | None = None, block: int = 32,
        q: float = 1.0, degradation: str = "bicubic", sigma: float | None = None) -> float:
    """Spatial distortion D_s of QNR (Alparone et al., PE&RS 2008).

    ``D_s = (1 / N sum_l |Q(F_l, P) - Q(M_l, P_L)|^q)^(1/q)`` with ``P`` the
    guide on the fused grid and ``P_L = degrade(P, scale, degradation,
    sigma)`` (:func:`geosr.core.resample.degrade`) on the coarse grid. ``Q``
    as in :func:`d_lambda` (``block x block`` windows, stride 1, the same
    window size on both grids). A guide of several bands is replaced by their
    mean. 0 is best.

    Parameters
    ----------
    fused, coarse, scale, valid, block
        As :func:`d_lambda`.
    guide : array_like, shape (s*h, s*w) or (k, s*h, s*w)
        The guide on the fused grid.
    guide_valid : ndarray of bool, shape (s*h, s*w) or (k, s*h, s*w), optional
        Valid guide pixels (a pixel counts when valid in every guide band).
        A coarse pixel of ``P_L`` is valid when its degradation reads only
        valid guide pixels (symmetric extension included).
    q : float
        The exponent, > 0; default 1.
    degradation : {"bicubic", "gaussian", "area"}
        The model that makes ``P_L``.
    sigma : float, optional
        Gaussian width in fine pixels, only for ``"gaussian"``.

    Returns
    -------
    float

    Raises
    ------
    InputError
        As :func:`d_lambda`; also a guide off the fused grid.
    ParameterError
        A bad ``scale``, ``block``, ``q``, ``degradation`` or ``sigma``.
    """
    q = check_float(q, "q", 0.0, low_open=True)
    degradation_taps(check_scale(scale), degradation, sigma)  # validates both
    inp = _qnr_inputs(fused, coarse, scale, valid, block)
    return _d_s(inp, guide, guide_valid, int(scale), q, degradation, sigma)


def qnr(fused: ArrayLike, coarse: ArrayLike, guide: ArrayLike, scale: int, *,
        valid: ArrayLike | None = None, guide_valid: ArrayLike | None = None, block: int = 32,
        alpha: float = 1.0, beta: float = 1.0, p: float = 1.0, q: float = 1.0,
        degradation: str = "bicubic", sigma: float | None = None) -> dict[str, float]:
    """Quality with no reference (Alparone et al., PE&RS 74(2), 2008).

    ``QNR = (1 - D_lambda)^alpha (1 - D_s)^beta`` with the spectral
    distortion of :func:`d_lambda` and the spatial distortion of :func:`d_s`.
    1 is best (both distortions 0). A distortion above 1 (possible only for
    anti-correlated images, since Q lies in -1..1) is clipped so that its
    factor is 0 rather than negative or NaN.

    Parameters
    ----------
    fused, coarse, guide, scale, valid, guide_valid, block, degradation, sigma
        As :func:`d_s`.
    alpha, beta : float
        Exponents of the two factors, >= 0; default 1.
    p, q : float
        Exponents inside ``D_lambda`` and ``D_s``, > 0; default 1.

    Returns
    -------
    dict
        ``{"qnr": float, "d_lambda": float, "d_s": float}``.

    Raises
    ------
    InputError
        As :func:`d_s`.
    ParameterError
        A bad ``scale``, ``block``, exponent, ``degradation`` or ``sigma``.
    """
    alpha = check_float(alpha, "alpha", 0.0)
    beta = check_float(beta, "beta", 0.0)
    p = check_float(p, "p", 0.0, low_open=True)
    q = check_float(q, "q", 0.0, low_open=True)
    degradation_taps(check_scale(scale), degradation, sigma)  # validates both
    inp = _qnr_inputs(fused, coarse, scale, valid, block)
    dl = _d_lambda(inp, p)
    ds = _d_s(inp, guide, guide_valid, int(scale), q, degradation, sigma)
    value = max(0.0, 1.0 - dl) ** alpha * max(0.0, 1.0 - ds) ** beta
    return {"qnr": float(value), "d_lambda": dl, "d_s": ds}
