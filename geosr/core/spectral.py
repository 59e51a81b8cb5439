"""Keeping magnified spectra close to the interpolated ones (a cross-band step).

Each band is magnified on its own, so the synthesized detail of a pixel
(output minus the bicubic interpolation, across bands) has a part along the
interpolated spectrum, which only changes brightness, and a part
perpendicular to it, which turns the spectrum. The spectral angle (SAM,
Kruse et al., RSE 1993) of the product depends on both: the perpendicular
part adds angle, and a brightness part that darkens a pixel below zero
flips or zeroes its spectrum. :func:`guard_spectra` keeps the brightness
change but not below a fraction of the interpolated brightness, and caps
the angle the perpendicular part may add. This is the injection rule of
multiplicative (modulation) detail injection in pansharpening, which leaves
the interpolated spectrum's angle untouched (Liu, IJRS 2000; Alparone et
al., IEEE TGRS 2007), relaxed by a small angle so that real colour edges keep
part of their detail.

Everything is pointwise across bands: a pixel's result depends only on its
own output and interpolated values, so a chunked product equals the whole
image's exactly.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike

from .._validation import check_float
from ..errors import InputError

__all__ = ["guard_spectra", "DEFAULT_MAX_ANGLE", "DEFAULT_MIN_GAIN"]

#: Largest angle in degrees the perpendicular detail may add to a pixel's
#: interpolated spectrum (measured on RGB.byte.tif and held-out scikit-image
#: photos at x2 and x3; see DEVELOPERS.md "Choices and departures").
DEFAULT_MAX_ANGLE = 2.0

#: Smallest ratio of output to interpolated brightness along the
#: interpolated spectrum (measured as above).
DEFAULT_MIN_GAIN = 0.5


def guard_spectra(output: ArrayLike, base: ArrayLike, valid: ArrayLike | None = None, *,
                  max_angle: float = DEFAULT_MAX_ANGLE, min_gain: float = DEFAULT_MIN_GAIN) -> np.ndarray:
    """Limit how far per-band detail turns and darkens each pixel's spectrum.

    For every pixel with interpolated spectrum ``b`` (norm ``|b|``, direction
    ``u``) and detail ``d = output - b`` the result is
    ``g * b + f * p`` where ``g = max(1 + <d, u> / |b|, min_gain)`` is the
    brightness gain along ``u``, ``p = d - <d, u> u`` is the perpendicular
    detail, and ``f = min(1, tan(max_angle) * g * |b| / |p|)``, so that the
    angle between the result and ``b`` never exceeds ``max_angle``.

    Parameters
    ----------
    output : ndarray, shape (bands, ...)
        Per-band magnified values, float.
    base : ndarray, same shape
        The interpolated image the detail was added to.
    valid : ndarray of bool, shape ``output.shape[1:]``, optional
        Pixels to guard; others (and pixels with a non-finite value or a
        zero interpolated spectrum) are returned unchanged, as are pixels
        within both limits (bit for bit).
    max_angle : float
        Cap in degrees on the angle added, in [0, 90).
    min_gain : float
        Floor on the brightness gain, in [0, 1].

    Returns
    -------
    ndarray, same shape and dtype as ``output``
        A new array. With one band the output is returned unchanged (a copy):
        a spectral angle needs two bands.

    Raises
    ------
    InputError
        When the shapes disagree.
    ParameterError
        When ``max_angle`` or ``min_gain`` is out of range.
    """
    output = np.asarray(output)
    base = np.asarray(base)
    if output.shape != base.shape or output.ndim < 2:
        raise InputError(
            "The 'output' and 'base' arrays must have the same shape (bands, ...), got "
            f"{output.shape} and {base.shape}"
        )
    max_angle = check_float(max_angle, "max_angle", 0, 90, high_open=True)
    min_gain = check_float(min_gain, "min_gain", 0, 1)
    dtype = output.dtype if output.dtype.kind == "f" else np.dtype(np.float64)
    result = output.astype(dtype, copy=True)
    if output.shape[0] < 2:
        return result
    b = base.astype(dtype, copy=False)
    norm = np.sqrt(np.einsum("i...,i...->...", b, b))
    ok = np.isfinite(result).all(axis=0) & np.isfinite(norm) & (norm > 0)
    if valid is not None:
        valid = np.asarray(valid, dtype=bool)
        if valid.shape != output.shape[1:]:
            raise InputError(
                f"The 'valid' mask must have shape {output.shape[1:]}, got {valid.shape}"
            )
        ok &= valid
    if not ok.any():
        return result
    bo = b[:, ok]
    no = norm[ok]
    unit = bo / no
    detail = result[:, ok] - bo
    along = np.einsum("ij,ij->j", detail, unit)
    perp = detail - along * unit
    gain = np.maximum(1 + along / no, dtype.type(min_gain))
    perp_norm = np.sqrt(np.einsum("ij,ij->j", perp, perp))
    allowed = dtype.type(math.tan(math.radians(float(max_angle)))) * gain * no
    limited = (perp_norm > allowed) | (1 + along / no < min_gain)
    if not limited.any():
        return result
    shrink = np.where(perp_norm > allowed, allowed / np.where(perp_norm > 0, perp_norm, 1), 1)
    fixed = gain * bo + shrink.astype(dtype, copy=False) * perp
    # Only limited pixels are rewritten: the others keep their values bit for bit.
    flat = result.reshape(result.shape[0], -1)
    where = np.flatnonzero(ok.ravel())[limited]
    flat[:, where] = fixed[:, limited]
    return flat.reshape(result.shape)
