"""Magnifying with a learned model: interpolation plus synthesized, overlap-averaged detail.

Each low-res cell is the centre of a ``3s x 3s`` detail patch predicted from
its feature (sparse coding over the coupled dictionaries, or the anchored
regression of its nearest atom); the patches are overlap-averaged and added
to the bicubic interpolation. Options: the average over the eight flips and
rotations (``ensemble``) and back-projection of the degradation residual
(``consistency``, :mod:`geosr.core.consistency`).

The functions take the checked parameters (:class:`geosr.core.params.ModelParams`)
and the learned arrays by their model-file names (``feature_kernel``,
``dictionary_low``, and ``dictionary_high`` or ``projections``).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from .._validation import check_int, working_dtype
from ..enums import Method
from ..errors import InputError, ParameterError
from .anchored import apply_projections, find_anchors
from .consistency import consistency_reach, make_consistent
from .features import (
    FEATURE_RADIUS,
    PATCH_REACH,
    WINDOW_CENTRE,
    canvas_average,
    lowres_windows,
    overlap_add,
    overlap_canvas,
)
from .nodata import FILL_DISTANCE, fill_invalid
from .params import ModelParams
from .resample import UPSCALE_MARGIN, upscale_valid
from .sparse import omp_codes

__all__ = [
    "context_radius",
    "magnify",
    "magnify_block",
    "interpolate",
    "interpolate_block",
    "predict",
    "check_image",
    "valid_mask",
]

#: Centres processed at once when magnifying; bounds the working memory.
STRIP_CENTRES = 1 << 16

Arrays = Mapping[str, np.ndarray]


def context_radius(params: ModelParams, consistency: bool = False, masked: bool = False) -> int:
    """Low-res pixels of context one output block needs on each side.

    The feature radius plus one ring of patch centres, plus the fill
    distance when masked, plus the reach of the consistency step.
    """
    radius = FEATURE_RADIUS + PATCH_REACH
    if masked:
        radius += FILL_DISTANCE
    if consistency:
        radius += consistency_reach(params)
    return radius


def check_image(image: Any, name: str) -> np.ndarray:
    """A non-empty 2-D real array, or InputError naming ``name``."""
    image = np.asarray(image)
    if image.ndim != 2:
        raise InputError(f"The {name!r} must be a 2-D array, got shape {image.shape}")
    if image.size == 0:
        raise InputError(f"The {name!r} must not be empty, got shape {image.shape}")
    if not np.issubdtype(image.dtype, np.number) or np.iscomplexobj(image):
        raise InputError(f"The {name!r} must hold real numbers, got dtype {image.dtype}")
    return image


def valid_mask(image: np.ndarray, valid: Any) -> np.ndarray | None:
    """The measured pixels: ``valid`` and finite, or None when every pixel counts."""
    finite = np.isfinite(image) if np.issubdtype(image.dtype, np.floating) else None
    if valid is not None:
        valid = np.asarray(valid, dtype=bool)
        if valid.shape != image.shape:
            raise InputError(
                f"The valid mask must have the image's shape {image.shape}, got {valid.shape}"
            )
        return valid if finite is None else valid & finite
    if finite is not None and not finite.all():
        return finite
    return None


def _pad_whole(params, image, valid, consistency):
    """An image with the context of its symmetric extension, as a block for the block functions."""
    image = check_image(image, "image")
    valid = valid_mask(image, valid)
    masked = valid is not None and not valid.all()
    r = context_radius(params, consistency=consistency, masked=masked)
    block = np.pad(image, r, mode="symmetric")
    vblock = None if valid is None else np.pad(valid, r, mode="symmetric")
    return block, r, vblock, valid


def magnify(params: ModelParams, arrays: Arrays, image: Any, valid: Any = None, *,
            consistency: bool = False, ensemble: bool = False) -> np.ndarray:
    """Magnify a whole 2-D image (see ``CoupledDictionary.magnify``)."""
    block, r, vblock, valid = _pad_whole(params, image, valid, consistency)
    out = magnify_block(params, arrays, block, r, vblock, consistency=consistency, ensemble=ensemble)
    if valid is not None and not valid.all():
        s = params.scale
        hr_valid = np.repeat(np.repeat(valid, s, axis=0), s, axis=1)
        out[~hr_valid] = np.nan
    return out


def interpolate(params: ModelParams, image: Any, valid: Any = None) -> np.ndarray:
    """The interpolation that :func:`magnify` adds its detail to."""
    block, r, vblock, _ = _pad_whole(params, image, valid, False)
    return interpolate_block(params, block, r, vblock)


def _prepare_block(params, block, halo, valid, consistency):
    """Checked, cropped and filled block with the halo the options need.

    Returns ``(block, need, dtype, h, w)``; ``block`` is None when no
    pixel of the window is valid.
    """
    block = check_image(block, "block")
    dtype = working_dtype(block)
    block = block.astype(dtype, copy=False)
    valid = valid_mask(block, valid)
    masked = valid is not None and not valid.all()
    need = context_radius(params, consistency=consistency, masked=masked)
    halo = check_int(halo, "halo", 0)
    if halo < need:
        raise ParameterError(
            f"The 'halo' parameter must be at least the context radius {need}, got {halo}"
        )
    h, w = block.shape[0] - 2 * halo, block.shape[1] - 2 * halo
    if h <= 0 or w <= 0:
        raise InputError(
            f"The block must be larger than twice the halo {halo}, got shape {block.shape}"
        )
    crop = halo - need
    block = block[crop : block.shape[0] - crop, crop : block.shape[1] - crop]
    if masked:
        valid = valid[crop : valid.shape[0] - crop, crop : valid.shape[1] - crop]
        if not valid.any():
            return None, need, dtype, h, w
        block = fill_invalid(block, valid)[FILL_DISTANCE:-FILL_DISTANCE, FILL_DISTANCE:-FILL_DISTANCE]
        need -= FILL_DISTANCE
    elif valid is not None:
        block = np.where(valid, block, 0).astype(dtype, copy=False)
    return block, need, dtype, h, w


def interpolate_block(params: ModelParams, block: Any, halo: int, valid: Any = None, *,
                      consistency: bool = False) -> np.ndarray:
    """The interpolation that :func:`magnify_block` adds its detail to."""
    block, need, dtype, h, w = _prepare_block(params, block, halo, valid, consistency)
    s = params.scale
    if block is None:
        return np.zeros((s * h, s * w), dtype=dtype)
    m = UPSCALE_MARGIN
    crop = need - m
    return upscale_valid(block[crop : block.shape[0] - crop, crop : block.shape[1] - crop], s, m)


def magnify_block(params: ModelParams, arrays: Arrays, block: Any, halo: int,
                  valid: Any = None, *, consistency: bool = False,
                  ensemble: bool = False, return_residual: bool = False):
    """Magnify one window that carries its own context (see ``CoupledDictionary.magnify_block``)."""
    if return_residual and not consistency:
        raise ParameterError(
            "The 'return_residual' parameter needs consistency=True, got consistency=False"
        )
    block, need, dtype, h, w = _prepare_block(params, block, halo, valid, consistency)
    if block is None:
        out = np.zeros((params.scale * h, params.scale * w), dtype=dtype)
        return (out, np.zeros((h, w), dtype=dtype)) if return_residual else out
    arrays = _in_dtype(arrays, dtype)
    if not ensemble:
        out, residual = _magnify_padded(params, arrays, block, need, consistency)
        return (out, residual) if return_residual else out
    acc = res_acc = None
    for k in range(8):
        out, residual = _magnify_padded(params, arrays, _dihedral(block, k), need, consistency)
        out = _dihedral_inverse(out, k)
        acc = out.copy() if acc is None else acc + out
        if residual is not None:
            # The degradation is separable and symmetric, so it commutes with
            # flips and rotations: the mean's residual is the residuals' mean.
            residual = _dihedral_inverse(residual, k)
            res_acc = residual.copy() if res_acc is None else res_acc + residual
    acc /= dtype.type(8)
    if return_residual:
        return acc, res_acc / dtype.type(8)
    return acc


def _in_dtype(arrays, dtype):
    """The learned arrays magnifying uses, converted once to the working dtype."""
    out = {
        "feature_kernel": arrays["feature_kernel"].astype(dtype, copy=False),
        "dictionary_low": arrays["dictionary_low"].astype(dtype, copy=False),
    }
    if "dictionary_high" in arrays:
        out["dictionary_high_rows"] = arrays["dictionary_high"].T.astype(dtype, copy=False)
    if "projections" in arrays:
        out["projections"] = arrays["projections"].astype(dtype, copy=False)
    return out


def _dihedral(a, k):
    """The k-th of the eight flips and rotations of the last two axes."""
    if k >= 4:
        a = a[..., ::-1]
    return np.rot90(a, k % 4, axes=(-2, -1))


def _dihedral_inverse(a, k):
    a = np.rot90(a, -(k % 4), axes=(-2, -1))
    if k >= 4:
        a = a[..., ::-1]
    return a


def _magnify_padded(params, arrays, block, halo, consistency):
    """Magnify a block whose halo is exactly what the options need.

    Returns the output and, with ``consistency``, its residual (else None).
    """
    reach = consistency_reach(params) if consistency else 0
    # The detail step produces the window plus ``reach`` cells of margin.
    inner = halo - reach
    base = FEATURE_RADIUS + PATCH_REACH
    h = block.shape[0] - 2 * inner
    w = block.shape[1] - 2 * inner
    core = block[inner - base : inner - base + h + 2 * base, inner - base : inner - base + w + 2 * base]
    out = _synthesize(params, arrays, core, h, w, block.dtype)
    if not consistency:
        return out, None
    return make_consistent(params, out, block[inner:-inner or None, inner:-inner or None])


def _synthesize(params, arrays, core, h, w, dtype):
    """Interpolation plus averaged detail for a core of halo FEATURE_RADIUS + 1."""
    s = params.scale
    r = FEATURE_RADIUS
    base = r + PATCH_REACH
    m = UPSCALE_MARGIN
    y_l = upscale_valid(core[base - m : base + h + m, base - m : base + w + m], s, m)
    # Centres -1 .. h need windows of radius r: rows base-1-r .. base+h+r.
    lr = core[base - 1 - r : base + h + 1 + r, base - 1 - r : base + w + 1 + r]
    kernel = arrays["feature_kernel"]
    canvas = overlap_canvas(h, w, s, dtype)
    wp = w + 2
    rows_per_strip = max(1, STRIP_CENTRES // wp)
    size = 2 * r + 1
    for c0 in range(0, h + 2, rows_per_strip):
        c1 = min(h + 2, c0 + rows_per_strip)
        windows = lowres_windows(lr[c0 : c1 - 1 + size])
        if np.may_share_memory(windows, lr):  # a view, not the usual copy
            windows = windows.copy()
        # The kernel annihilates constants; removing the centre value makes
        # that exact in floating point (a constant image stays constant).
        windows -= windows[:, WINDOW_CENTRE : WINDOW_CENTRE + 1].copy()
        features = windows @ kernel.T
        patches = _predict_in_dtype(params, arrays, features).reshape(c1 - c0, wp, -1)
        overlap_add(canvas, patches, c0)
    return y_l + canvas_average(canvas)


def predict(params: ModelParams, arrays: Arrays, features: np.ndarray) -> np.ndarray:
    """Detail patches for features.

    Parameters
    ----------
    params : ModelParams
    arrays : mapping of ndarray
        The learned arrays by their model-file names.
    features : ndarray, shape (n, d)

    Returns
    -------
    ndarray, shape (n, (3s)**2), the dtype of ``features``
    """
    return _predict_in_dtype(params, _in_dtype(arrays, features.dtype), features)


def _predict_in_dtype(params, arrays, features):
    """:func:`predict` with the arrays already in the features' dtype (:func:`_in_dtype`)."""
    dl = arrays["dictionary_low"]
    if params.method is Method.SPARSE:
        dh = arrays["dictionary_high_rows"]  # (atoms, patch)
        idx, coef = omp_codes(dl, features.T, params.sparsity)
        out = coef[:, :1] * dh[idx[:, 0]]
        for t in range(1, idx.shape[1]):
            out += coef[:, t : t + 1] * dh[idx[:, t]]
        return out
    return apply_projections(features, find_anchors(features, dl), arrays["projections"])
