"""The feature operator, patch extraction and overlap-averaged reassembly.

Geometry
--------
A *patch* is a ``3s x 3s`` block of high-res pixels made of the 3 x 3
low-res cells around a *centre* cell ``c = (i, j)``: high-res rows
``s*(i-1) ... s*(i+2) - 1`` and the same for columns. There is a patch at
every low-res cell, so each high-res pixel is covered by exactly nine
patches, and the reassembled detail is their plain average.

Features
--------
The low-res feature of a centre is built from the bicubic interpolation
``y_l`` of the low-res image: first and second derivative filters along both
axes with taps spaced by the scale (first ``[1, 0, .., 0, -1]`` of length
``s + 1``, second ``[1, 0, .., -2, .., 0, 1] / 2`` of length ``2s + 1``),
sampled over the patch and concatenated into ``4 * (3s)**2`` *raw* values.
Every step of that chain is linear and shift-equivariant by one low-res
pixel, so the raw feature of a centre is a fixed linear map of the low-res
window of radius :data:`FEATURE_RADIUS` around it. That map is computed once
(:func:`raw_feature_kernel`) and the PCA projection is folded into it, so at
run time the features are a small bank of correlations evaluated on the
low-res grid only.

Derivatives annihilate constants, hence the features of ``c * x + b`` are
``c`` times those of ``x``: the property that makes the whole method
positively homogeneous and shift-equivariant in value.
"""

from __future__ import annotations

from functools import lru_cache

import numba
import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from numpy.typing import DTypeLike

from .resample import UPSCALE_MARGIN, upscale_valid

__all__ = [
    "FEATURE_RADIUS",
    "PATCH_REACH",
    "WINDOW_CENTRE",
    "derivative_filters",
    "raw_feature_kernel",
    "lowres_windows",
    "raw_features",
    "detail_patches",
    "overlap_canvas",
    "overlap_add",
    "canvas_average",
    "overlap_average",
    "pca_basis",
]

#: Low-res pixels of context one centre's feature needs on each side:
#: 1 (the patch) + 1 (derivative taps, at most s high-res pixels) + 2 (bicubic).
FEATURE_RADIUS = 4

#: Centres needed around a window so that each of its cells has all nine patches.
PATCH_REACH = 1

#: Index of the centre pixel in a flattened low-res window (:func:`lowres_windows`).
WINDOW_CENTRE = ((2 * FEATURE_RADIUS + 1) ** 2) // 2


def derivative_filters(scale: int) -> list[tuple[int, np.ndarray, int]]:
    """The four 1-D derivative filters and their first offsets.

    Returns a list of ``(axis, taps, start)``: the filtered value at high-res
    pixel ``x`` is ``sum_t taps[t] * y[x + start + t]`` along ``axis``
    (0 = rows, 1 = columns). Taps are centred at index ``len(taps) // 2``.
    """
    s = int(scale)
    first = np.zeros(s + 1)
    first[0], first[-1] = 1.0, -1.0
    second = np.zeros(2 * s + 1)
    second[0], second[s], second[-1] = 0.5, -1.0, 0.5
    filters = []
    for taps in (first, second):
        for axis in (1, 0):
            filters.append((axis, taps, -(len(taps) // 2)))
    return filters


def _correlate_valid(y, taps, start, axis, margin):
    """Correlate along image ``axis`` (0 rows, 1 columns) in valid mode.

    Drops ``margin`` pixels of context on each side of both image axes.
    """
    ax = -2 if axis == 0 else -1
    other = -1 if ax == -2 else -2
    n = y.shape[ax] - 2 * margin
    acc = None
    for t, w in enumerate(taps):
        if w == 0.0:
            continue
        lo = margin + start + t
        sl = [slice(None)] * y.ndim
        sl[ax] = slice(lo, lo + n)
        term = y[tuple(sl)] * w
        acc = term if acc is None else acc + term
    sl = [slice(None)] * y.ndim
    sl[other] = slice(margin, y.shape[other] - margin)
    return acc[tuple(sl)]


@lru_cache(maxsize=8)
def _raw_feature_kernel(scale):
    s = scale
    r = FEATURE_RADIUS
    size = 2 * r + 1
    impulses = np.eye(size * size).reshape(size * size, size, size)
    # Bicubic interpolation of cells -2..2 around the centre (5s high-res pixels).
    y = upscale_valid(impulses, s, UPSCALE_MARGIN)
    # Each derivative keeps the 3s x 3s patch, consuming s pixels per side.
    maps = [_correlate_valid(y, taps, start, axis, s) for axis, taps, start in derivative_filters(s)]
    raw = np.concatenate([m.reshape(size * size, -1) for m in maps], axis=1)
    return raw.T.copy()  # (4 * (3s)**2, (2r + 1)**2)


def raw_feature_kernel(scale: int) -> np.ndarray:
    """Linear map from a low-res window to the raw feature of its centre.

    Returns
    -------
    ndarray, shape (4 * (3*scale)**2, (2*FEATURE_RADIUS + 1)**2), float64
        ``raw = kernel @ window.ravel()`` for the low-res window of radius
        :data:`FEATURE_RADIUS` centred on the patch centre.
    """
    return _raw_feature_kernel(int(scale)).copy()


def lowres_windows(padded: np.ndarray, radius: int = FEATURE_RADIUS) -> np.ndarray:
    """All ``(2r+1) x (2r+1)`` windows of a padded low-res array, as rows.

    Parameters
    ----------
    padded : ndarray, shape (h + 2r, w + 2r)

    Returns
    -------
    ndarray, shape (h * w, (2r+1)**2)
        A copy in the dtype of ``padded``; row ``i * w + j`` is the window
        centred on interior pixel ``(i, j)``.
    """
    size = 2 * radius + 1
    view = sliding_window_view(padded, (size, size))
    return view.reshape(-1, size * size)


def raw_features(padded: np.ndarray, scale: int) -> np.ndarray:
    """Raw (un-projected) features of every interior centre of a padded array.

    Returns ``(h * w, 4 * (3s)**2)``; used for training and for tests, the
    run-time path uses the projected kernel directly.
    """
    k = raw_feature_kernel(scale).astype(padded.dtype, copy=False)
    return lowres_windows(padded) @ k.T


def detail_patches(detail: np.ndarray, scale: int, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
    """High-res patches of a detail image at the given centres.

    Parameters
    ----------
    detail : ndarray, shape (s*h, s*w)
        High-res image (``y_h - y_l``) aligned with a low-res grid of h x w.
    rows, cols : ndarray of int
        Centre cells; each must have its 3 x 3 neighbourhood inside the grid.

    Returns
    -------
    ndarray, shape (len(rows), (3s)**2)
        Row-major patches.
    """
    s = int(scale)
    view = sliding_window_view(detail, (3 * s, 3 * s))[::s, ::s]
    return view[np.asarray(rows) - 1, np.asarray(cols) - 1].reshape(len(rows), -1)


def overlap_canvas(h: int, w: int, scale: int, dtype: DTypeLike) -> np.ndarray:
    """An empty accumulator for :func:`overlap_add` over an ``h x w`` window."""
    s = int(scale)
    return np.zeros((h + 4, s, w + 4, s), dtype=dtype)


def overlap_add(canvas: np.ndarray, patches: np.ndarray, first_row: int) -> None:
    """Add a strip of patches into an overlap canvas.

    Parameters
    ----------
    canvas : ndarray, shape (h + 4, s, w + 4, s)
        From :func:`overlap_canvas`.
    patches : ndarray, shape (n_rows, w + 2, (3s)**2)
        Patches for centre rows ``first_row - 1 .. first_row + n_rows - 2``
        of the window (row index 0 is the ring of centres above it) and for
        the centre columns ``-1 .. w``.
    first_row : int
        Index of the strip's first centre row, counted from 0 at the ring.
    """
    s = canvas.shape[1]
    nr, wp = patches.shape[:2]
    p = np.ascontiguousarray(patches, dtype=canvas.dtype).reshape(nr, wp, 3, s, 3, s)
    _overlap_add_kernel(canvas, p, int(first_row))


@numba.njit(nogil=True, cache=True)
def _overlap_add_kernel(canvas, p, first_row):  # pragma: no cover - compiled
    # Centre index ci covers canvas row ci + a for patch row a. Every canvas
    # element receives its contributions in the order a = 0..2, then b = 0..2,
    # the order of nine whole-array additions, so the sums are the same.
    nr, wp, _, s, _, _ = p.shape
    for row in range(first_row, first_row + nr + 2):
        for a in range(3):
            i = row - first_row - a
            if i < 0 or i >= nr:
                continue
            for y in range(s):
                for b in range(3):
                    for j in range(wp):
                        for x in range(s):
                            canvas[row, y, b + j, x] += p[i, j, a, y, b, x]


def canvas_average(canvas: np.ndarray) -> np.ndarray:
    """The averaged detail of the window from a filled canvas, (s*h, s*w)."""
    hc, s, wc, _ = canvas.shape
    h, w = hc - 4, wc - 4
    inner = canvas[2 : h + 2, :, 2 : w + 2, :] * canvas.dtype.type(1.0 / 9.0)
    return inner.reshape(h * s, w * s)


def overlap_average(patches: np.ndarray, scale: int) -> np.ndarray:
    """Average the nine patches covering each cell of a window.

    Parameters
    ----------
    patches : ndarray, shape (h + 2, w + 2, (3s)**2)
        Patches for the centres ``-1 .. h`` by ``-1 .. w`` of an ``h x w``
        window (one ring of centres outside it).

    Returns
    -------
    ndarray, shape (s*h, s*w)
        The mean of the nine contributions at every high-res pixel.
    """
    canvas = overlap_canvas(patches.shape[0] - 2, patches.shape[1] - 2, scale, patches.dtype)
    overlap_add(canvas, patches, 0)
    return canvas_average(canvas)


def pca_basis(covariance: np.ndarray, energy: float = 0.999) -> tuple[np.ndarray, np.ndarray]:
    """Principal axes keeping a fraction of the energy (uncentred PCA).

    The features are not centred: centring would break the homogeneity of
    the method, and derivative features have mean close to zero anyway.

    Parameters
    ----------
    covariance : ndarray, shape (n, n)
        Second-moment matrix ``X^T X`` of the raw features.
    energy : float
        Fraction of the trace to keep, in (0, 1].

    Returns
    -------
    basis : ndarray, shape (n, d)
        Orthonormal columns, strongest first.
    eigenvalues : ndarray, shape (d,)
    """
    vals, vecs = np.linalg.eigh((covariance + covariance.T) / 2.0)
    order = np.argsort(vals)[::-1]
    vals = np.clip(vals[order], 0.0, None)
    vecs = vecs[:, order]
    total = vals.sum()
    if total <= 0:
        return vecs[:, :1], vals[:1]
    d = int(np.searchsorted(np.cumsum(vals) / total, energy) + 1)
    d = min(max(d, 1), len(vals))
    # Fix the sign of each axis so that trained models repeat exactly.
    signs = np.sign(vecs[np.argmax(np.abs(vecs[:, :d]), axis=0), np.arange(d)])
    return vecs[:, :d] * signs, vals[:d]
