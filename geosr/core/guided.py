"""Guided magnification: a finer co-registered band supplies measured detail.

Per target band, a ridge regression is learned on the scene itself at
reduced resolution (Wald's protocol as used by data-driven sharpening, e.g.
Zhu & Bamler 2013, Lanaras et al. 2018) and applied at full resolution:

1. Stage 1, the synthetic guide: least squares with intercept of the coarse
   band on the degraded guide bands, ``X ~ sum_j w_j degrade(G_j) + b``;
   ``P = sum_j w_j G_j + b`` on the fine grid (band units).
2. Features on one grid from ``U`` (the band's bicubic upsampling) and ``P``:
   ``L = upscale(degrade(P))``, ``D = P - L`` and the local 7 x 7
   least-squares slope of ``U`` on ``L``; per pixel the 5 x 5 neighbourhoods
   of ``D`` (25), ``U - U_centre`` (24), ``L - L_centre`` (24) and ``D * slope``
   (25): 98 features. The target is the missing detail ``X - U``.
3. Training on the coarse grid: truth ``X``, ``U_r = upscale(degrade(X))``,
   guide ``P_r = sum_j w_j degrade(G_j) + b``.
4. Prediction on the fine grid: ``U + predicted detail``, computed as a sum of
   four 5 x 5 correlations (a compiled kernel), not feature by feature.

Every block function works in *valid mode* on arrays carrying ``margin``
coarse pixels (``scale * margin`` fine pixels) of context; the whole-array
functions pad symmetrically and call the same code, so block results equal
whole-image results to float rounding. Validity is propagated through the
same valid-mode operations (a pixel is valid when every input it reads is).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from numbers import Integral
from typing import Any

import numba
import numpy as np
from sklearn.base import BaseEstimator

from .._validation import check_float, check_int, check_scale, working_dtype
from ..enums import Degradation
from ..errors import InputError, ModelError, NotFittedError, ParameterError
from .nodata import fill_invalid
from .resample import (
    UPSCALE_MARGIN,
    degradation_margin,
    degradation_taps,
    degrade_valid,
    upscale_bicubic,
    upscale_valid,
)

__all__ = [
    "GUIDE_PATCH",
    "SLOPE_WINDOW",
    "N_FEATURES",
    "guided_halo",
    "CombinationStatistics",
    "combination_statistics",
    "TrainingStatistics",
    "training_statistics",
    "GuidedRegression",
    "sharpen_with_guide",
]

#: Side of the neighbourhoods the features are taken from.
GUIDE_PATCH = 5
#: Side of the window of the local slope of the band on the low-passed guide.
SLOPE_WINDOW = 7
#: Features per pixel: 25 (D) + 24 (U) + 24 (L) + 25 (D * slope).
N_FEATURES = 2 * GUIDE_PATCH**2 + 2 * (GUIDE_PATCH**2 - 1)
#: The slope is ``cov(U, L) / (var(L) + SLOPE_EPS * var(U))`` over the 7 x 7
#: window: the regulariser is relative to the band's own local variance, so it
#: is scale free and needs no global statistic; it bounds the slope by
#: ``1 / (2 sqrt(SLOPE_EPS)) = 5`` where the guide is flat but the band is not.
SLOPE_EPS = 1e-2
#: Fewest training samples per band (common practice: several per coefficient).
MIN_SAMPLES = 500

_PR = GUIDE_PATCH // 2
_SR = SLOPE_WINDOW // 2
_REACH = _PR + _SR  # grid pixels of U and L that one output pixel reads
_CENTRE = (GUIDE_PATCH**2) // 2
_BATCH = 32768  # training rows gathered at once


def _degradation(scale, degradation, sigma):
    """Checked ``(scale, model, sigma, taps, start, margin)``."""
    s = check_scale(scale)
    model = Degradation.parse(degradation, "degradation")
    w, start = degradation_taps(s, model, sigma)
    dm = max(degradation_margin(s, model, sigma))
    return s, model, sigma, len(w), start, dm


def _reach(s):
    """Low-res pixels of context of the low-pass: ``q + 2``, q = ceil(5 / s)."""
    return -(-_REACH // s) + UPSCALE_MARGIN


def guided_halo(scale: int, degradation: str = "bicubic", sigma: float | None = None) -> int:
    """Coarse pixels of context per side needed by stage 1, training and prediction.

    Parameters
    ----------
    scale : int
        2 to 8.
    degradation : {"bicubic", "gaussian", "area"}
    sigma : float, optional
        Gaussian width in fine pixels (``"gaussian"`` only).

    Returns
    -------
    int
        A multiple of ``scale``. Training is the deepest chain: the coarse
        band is degraded and upsampled again (``scale * (ceil(5/scale) + 2) +
        degradation margin`` coarse pixels) and the guide is degraded once
        more before that.
    """
    s, _, _, _, _, dm = _degradation(scale, degradation, sigma)
    need = s * _reach(s) + dm + -(-dm // s)
    return -(-need // s) * s


# ---------------------------------------------------------------- valid-mode helpers


def _crop(a, r):
    """Drop ``r`` pixels from each side of the last two axes."""
    return a[..., r : a.shape[-2] - r, r : a.shape[-1] - r]


def _lowpass(a, s, model, sigma, dm):
    """``upscale(degrade(a))`` of an array with ``s * reach + dm`` of context.

    Returns the interior with ``s * (reach - 2)`` pixels of context.
    """
    return upscale_valid(degrade_valid(a, s, model, sigma, margin=dm), s, UPSCALE_MARGIN)


def _take(a, axis, start, stop, step=1):
    sl = [slice(None)] * a.ndim
    sl[axis] = slice(start, stop, step)
    return a[tuple(sl)]


def _bad_degrade(bad, s, n_taps, start, margin):
    """Invalidity through :func:`degrade_valid`: any tap invalid."""
    out = bad
    for axis in (-2, -1):
        n_out = (out.shape[axis] - 2 * margin) // s
        acc = None
        for t in range(n_taps):
            first = margin + start + t
            term = _take(out, axis, first, first + s * (n_out - 1) + 1, s)
            acc = term if acc is None else acc | term
        out = acc
    return out


def _bad_upscale(bad, s, margin=UPSCALE_MARGIN):
    """Invalidity through :func:`upscale_valid`: any of the four taps invalid."""
    out = bad
    for axis in (-2, -1):
        n = out.shape[axis] - 2 * margin
        shape = list(out.shape)
        shape[axis] = n * s
        res = np.empty(shape, dtype=bool)
        for p in range(s):
            lo = margin + math.floor((p + 0.5) / s - 0.5) - 1
            acc = _take(out, axis, lo, lo + n)
            for t in range(1, 4):
                acc = acc | _take(out, axis, lo + t, lo + t + n)
            res[tuple([slice(None)] * (out.ndim + axis) + [slice(p, None, s)])] = acc
        out = res
    return out


def _bad_box(bad, r):
    """Invalidity through a (2r+1) x (2r+1) window, valid mode."""
    out = bad
    for axis in (-2, -1):
        n = out.shape[axis] - 2 * r
        acc = _take(out, axis, 0, n)
        for t in range(1, 2 * r + 1):
            acc = acc | _take(out, axis, t, t + n)
        out = acc
    return out


def _lowpass_bad(bad, s, n_taps, start, dm):
    return _bad_upscale(_bad_degrade(bad, s, n_taps, start, dm), s)


# ---------------------------------------------------------------- compiled kernels


@numba.njit(nogil=True, cache=True)
def _slope_kernel(u, low, rel, out):  # pragma: no cover - compiled
    """Local 7 x 7 least-squares slope of ``u`` on ``low`` (float64 sums)."""
    h, w = out.shape
    wide = w + 6
    cols = np.empty((5, wide))
    acc = np.empty(5)
    inv = 1.0 / 49.0
    for i in range(h):
        for j in range(wide):
            a = 0.0
            b = 0.0
            c = 0.0
            d = 0.0
            e = 0.0
            for t in range(7):
                x = np.float64(u[i + t, j])
                y = np.float64(low[i + t, j])
                a += x
                b += y
                c += x * y
                d += y * y
                e += x * x
            cols[0, j] = a
            cols[1, j] = b
            cols[2, j] = c
            cols[3, j] = d
            cols[4, j] = e
        for j in range(w):
            for q in range(5):
                acc[q] = 0.0
                for t in range(7):
                    acc[q] += cols[q, j + t]
            a, b, c, d, e = acc[0], acc[1], acc[2], acc[3], acc[4]
            mu = a * inv
            ml = b * inv
            cov = c * inv - mu * ml
            vl = max(d * inv - ml * ml, 0.0)
            vu = max(e * inv - mu * mu, 0.0)
            den = vl + rel * vu
            out[i, j] = cov / den if den > 0.0 else 0.0


@numba.njit(nogil=True, cache=True, fastmath=True)
def _filter_kernel(u, low, p, ds, ku, kl, kp, ks, bias, out):  # pragma: no cover - compiled
    """``out = bias + corr(u, ku) + corr(low, kl) + corr(p, kp) + corr(ds, ks)`` (5 x 5, valid)."""
    h, w = out.shape
    for i in range(h):
        row = out[i]
        for j in range(w):
            row[j] = bias
        for a in range(5):
            ur = u[i + a]
            lr = low[i + a]
            pr = p[i + a]
            dr = ds[i + a]
            for b in range(5):
                cu = ku[a, b]
                cl = kl[a, b]
                cp = kp[a, b]
                cs = ks[a, b]
                for j in range(w):
                    row[j] += cu * ur[j + b] + cl * lr[j + b] + cp * pr[j + b] + cs * dr[j + b]


def _grid_maps(u, p, low):
    """From U, P, L with 5 of context to U, L, D, D*slope with 2 of context."""
    h, w = u.shape[-2] - 2 * _SR, u.shape[-1] - 2 * _SR
    slope = np.empty((h, w), dtype=np.float64)
    _slope_kernel(np.ascontiguousarray(u), np.ascontiguousarray(low), SLOPE_EPS, slope)
    u2, p2, l2 = _crop(u, _SR), _crop(p, _SR), _crop(low, _SR)
    d2 = p2 - l2
    return u2, l2, d2, (d2 * slope).astype(d2.dtype, copy=False)


# ---------------------------------------------------------------- input checks


def _as_float(a, name):
    a = np.asarray(a)
    if a.dtype.kind not in "biuf":
        raise InputError(f"The {name!r} array must be numeric, got dtype {a.dtype}")
    return a.astype(working_dtype(a), copy=False)


def _as_stack(a, name):
    a = _as_float(a, name)
    if a.ndim == 2:
        a = a[None]
    if a.ndim != 3 or 0 in a.shape:
        raise InputError(f"The {name!r} array must have shape (bands, rows, cols), got {a.shape}")
    return a


def _as_mask(mask, shape, name):
    mask = np.asarray(mask)
    if mask.dtype != bool:
        raise InputError(f"The {name!r} mask must be boolean, got dtype {mask.dtype}")
    if mask.shape != tuple(shape):
        raise InputError(f"The {name!r} mask must have shape {tuple(shape)}, got {mask.shape}")
    return mask


def _require_finite(a, name):
    if not np.isfinite(a).all():
        raise InputError(f"The {name!r} array must hold finite values (fill invalid pixels first)")


def _check_block(coarse, guide, coarse_valid, guide_valid, s, margin, halo):
    """Checked padded block arrays ``(x, g, cv, gv)``; ``cv`` may be None."""
    x = _as_stack(coarse, "coarse")
    g = _as_stack(guide, "guide")
    m = check_int(margin, "margin", halo, what=f"the guided halo at this scale is {halo}")
    n, hp, wp = x.shape
    if hp <= 2 * m or wp <= 2 * m:
        raise InputError(f"The coarse block {hp} x {wp} has no interior inside a margin of {m}")
    if g.shape[1:] != (s * hp, s * wp):
        raise InputError(
            f"The guide must be {s} times finer than the coarse block: expected "
            f"{s * hp} x {s * wp}, got {g.shape[1]} x {g.shape[2]}"
        )
    cv = None if coarse_valid is None else _as_mask(coarse_valid, x.shape, "coarse_valid")
    gv = _as_mask(guide_valid, g.shape[1:], "guide_valid") if guide_valid is not None else None
    _require_finite(x, "coarse")
    _require_finite(g, "guide")
    return x, g, cv, gv


# ---------------------------------------------------------------- statistics


@dataclass
class CombinationStatistics:
    """Sums of stage 1 (the synthetic guide), summable over blocks with ``+``.

    Attributes
    ----------
    gram : ndarray, shape (n_targets, n_guides + 1, n_guides + 1), float64
        ``A^T A`` with ``A = [degraded guide bands, 1]`` over the band's valid pixels.
    cross : ndarray, shape (n_targets, n_guides + 1), float64
        ``A^T x``.
    sq : ndarray, shape (n_targets,), float64
        ``x^T x``.
    count : ndarray, shape (n_targets,), int64
        Valid interior pixels per band.
    """

    gram: np.ndarray
    cross: np.ndarray
    sq: np.ndarray
    count: np.ndarray

    @classmethod
    def empty(cls, n_targets: int, n_guides: int) -> CombinationStatistics:
        """Zero sums for ``n_targets`` bands and ``n_guides`` guide bands."""
        k = n_guides + 1
        return cls(np.zeros((n_targets, k, k)), np.zeros((n_targets, k)),
                   np.zeros(n_targets), np.zeros(n_targets, dtype=np.int64))

    def __add__(self, other: CombinationStatistics) -> CombinationStatistics:
        if not isinstance(other, CombinationStatistics) or other.gram.shape != self.gram.shape:
            raise InputError("Only CombinationStatistics of the same bands can be added")
        return CombinationStatistics(self.gram + other.gram, self.cross + other.cross,
                                     self.sq + other.sq, self.count + other.count)


@dataclass
class TrainingStatistics:
    """Ridge normal equations, summable over blocks with ``+``.

    Attributes
    ----------
    ata : ndarray, shape (n_targets, n_features + 1, n_features + 1), float64
        ``A^T A`` with ``A = [features, 1]``.
    aty : ndarray, shape (n_targets, n_features + 1), float64
    yty : ndarray, shape (n_targets,), float64
    count : ndarray, shape (n_targets,), int64
        Training samples per band.
    """

    ata: np.ndarray
    aty: np.ndarray
    yty: np.ndarray
    count: np.ndarray

    @classmethod
    def empty(cls, n_targets: int, n_features: int = N_FEATURES) -> TrainingStatistics:
        """Zero sums."""
        f = n_features + 1
        return cls(np.zeros((n_targets, f, f)), np.zeros((n_targets, f)),
                   np.zeros(n_targets), np.zeros(n_targets, dtype=np.int64))

    @classmethod
    def from_samples(cls, features: Any, target: Any) -> TrainingStatistics:
        """Sums of explicit samples: ``features (n_targets, n, n_features)``, ``target (n_targets, n)``."""
        a = np.asarray(features, dtype=np.float64)
        y = np.asarray(target, dtype=np.float64)
        ones = np.ones(a.shape[:2] + (1,))
        a1 = np.concatenate([a, ones], axis=2)
        return cls(np.einsum("bni,bnj->bij", a1, a1), np.einsum("bni,bn->bi", a1, y),
                   np.einsum("bn,bn->b", y, y), np.full(a.shape[0], a.shape[1], dtype=np.int64))

    def __add__(self, other: TrainingStatistics) -> TrainingStatistics:
        if not isinstance(other, TrainingStatistics) or other.ata.shape != self.ata.shape:
            raise InputError("Only TrainingStatistics of the same bands can be added")
        return TrainingStatistics(self.ata + other.ata, self.aty + other.aty,
                                  self.yty + other.yty, self.count + other.count)


def _accumulate(gram, cross, a, y):
    """Add ``[a, 1]^T [a, 1]`` and ``[a, 1]^T y`` for rows in batches."""
    for lo in range(0, len(y), _BATCH):
        ab = a[lo : lo + _BATCH]
        a1 = np.empty((len(ab), ab.shape[1] + 1))
        a1[:, :-1] = ab
        a1[:, -1] = 1.0
        gram += a1.T @ a1
        cross += a1.T @ y[lo : lo + _BATCH]


def combination_statistics(coarse, guide, coarse_valid, guide_valid, scale, *, margin,
                           degradation="bicubic", sigma=None) -> CombinationStatistics:
    """Stage-1 sums of one padded block (the synthetic guide's least squares).

    Parameters
    ----------
    coarse : ndarray, shape (n, hc + 2m, wc + 2m)
        Target bands, invalid pixels already filled with finite values.
    guide : ndarray, shape (k, s*(hc + 2m), s*(wc + 2m))
        Guide bands, filled.
    coarse_valid : ndarray of bool, shape of ``coarse``
    guide_valid : ndarray of bool, shape (s*(hc + 2m), s*(wc + 2m))
    scale : int
    margin : int
        ``m``, at least :func:`guided_halo`.
    degradation, sigma
        The degradation model (see :func:`geosr.core.resample.degrade`).

    Returns
    -------
    CombinationStatistics
        Sums over the interior pixels where the band and the degraded guide's
        footprint are valid.
    """
    s, model, sigma, n_taps, start, dm = _degradation(scale, degradation, sigma)
    x, g, cv, gv = _check_block(coarse, guide, coarse_valid, guide_valid, s, margin,
                                guided_halo(s, model, sigma))
    m = int(margin)
    cut = s * m - dm
    dg = degrade_valid(_crop(g, cut), s, model, sigma, margin=dm).astype(np.float64)
    interior = (x.shape[0], x.shape[1] - 2 * m, x.shape[2] - 2 * m)
    ok = np.ones(interior, dtype=bool) if cv is None else _crop(cv, m).copy()
    if gv is not None:
        ok &= ~_bad_degrade(~_crop(gv, cut), s, n_taps, start, dm)
    xi = _crop(x, m).astype(np.float64)
    stats = CombinationStatistics.empty(x.shape[0], g.shape[0])
    for b in range(x.shape[0]):
        sel = ok[b]
        y = xi[b][sel]
        _accumulate(stats.gram[b], stats.cross[b], dg[:, sel].T, y)
        stats.sq[b] = y @ y
        stats.count[b] = y.size
    return stats


def _check_combination(combination, n, k):
    w = np.asarray(combination, dtype=np.float64)
    if w.shape != (n, k + 1) or not np.isfinite(w).all():
        raise ParameterError(
            f"The 'combination' parameter must be finite weights of shape {(n, k + 1)}, got {w.shape}"
        )
    return w


def _splitmix64(x):
    """The splitmix64 finaliser (Steele et al. 2014) on uint64 arrays."""
    with np.errstate(over="ignore"):
        x = x + np.uint64(0x9E3779B97F4A7C15)
        x = (x ^ (x >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        x = (x ^ (x >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        return x ^ (x >> np.uint64(31))


def sample_mask(rows: np.ndarray, cols: np.ndarray, sample_rate: float, random_state: int) -> np.ndarray:
    """Deterministic selection of global pixels ``(rows, cols)`` at ``sample_rate``.

    A hash of the coordinates and the seed, uniform on [0, 1), falls below
    the rate; the result does not depend on how a scene is cut into blocks.
    """
    r = np.asarray(rows, dtype=np.int64).astype(np.uint64)
    c = np.asarray(cols, dtype=np.int64).astype(np.uint64)
    seed = _splitmix64(np.uint64(random_state))
    h = _splitmix64(_splitmix64((r << np.uint64(32)) ^ c) ^ seed)
    u = (h >> np.uint64(11)).astype(np.float64) * 2.0**-53
    return u < sample_rate


def _check_sampling(origin, sample_rate, random_state, s):
    if not (isinstance(origin, (tuple, list)) and len(origin) == 2):
        raise ParameterError(f"The 'origin' parameter must be a (row, col) pair, got {origin!r}")
    r0, c0 = (check_int(v, "origin", 0) for v in origin)
    if r0 % s or c0 % s:
        raise ParameterError(f"The 'origin' parameter must be multiples of the scale {s}, got {origin!r}")
    rate = check_float(sample_rate, "sample_rate", 0.0, 1.0, low_open=True)
    seed = check_int(random_state, "random_state", 0)
    return r0, c0, rate, seed


def _training_bad(x, cv, gv, s, m, c, geo):
    """Invalid training pixels of the interior per band (whole footprint)."""
    n_taps, start, dm, trim = geo
    n, hp, wp = x.shape
    bad = np.zeros((n, hp - 2 * m, wp - 2 * m), dtype=bool)
    if cv is not None:
        xb = ~_crop(cv, m - c)
        ub = _crop(_lowpass_bad(xb, s, n_taps, start, dm), trim)
        bad |= _bad_box(ub, _REACH) | _crop(xb, c)
    if gv is not None:
        pb = _bad_degrade(~_crop(gv, s * (m - c) - dm), s, n_taps, start, dm)
        lb = _crop(_lowpass_bad(pb, s, n_taps, start, dm), trim)
        bad |= (_bad_box(lb, _REACH) | _bad_box(_crop(pb, c - _PR), _PR))[None]
    return bad


def training_statistics(coarse, guide, coarse_valid, guide_valid, combination, scale, *, margin,
                        origin, sample_rate, random_state=0, degradation="bicubic",
                        sigma=None) -> TrainingStatistics:
    """Ridge normal equations of one padded block at reduced resolution.

    Parameters
    ----------
    coarse, guide, coarse_valid, guide_valid, scale, margin, degradation, sigma
        As in :func:`combination_statistics`; the interior size must be a
        multiple of ``scale``.
    combination : ndarray, shape (n, k + 1)
        Stage-1 weights (last column the intercept).
    origin : (int, int)
        Global coarse offset of the interior (multiples of ``scale``).
    sample_rate : float in (0, 1]
        Fraction of valid pixels used (see :func:`sample_mask`).
    random_state : int
        Seed of the sample selection.

    Returns
    -------
    TrainingStatistics
    """
    s, model, sigma, n_taps, start, dm = _degradation(scale, degradation, sigma)
    x, g, cv, gv = _check_block(coarse, guide, coarse_valid, guide_valid, s, margin,
                                guided_halo(s, model, sigma))
    r0, c0, rate, seed = _check_sampling(origin, sample_rate, random_state, s)
    w = _check_combination(combination, x.shape[0], g.shape[0])
    m = int(margin)
    hc, wc = x.shape[1] - 2 * m, x.shape[2] - 2 * m
    if hc % s or wc % s:
        raise InputError(f"The block interior {hc} x {wc} must be a multiple of the scale {s}")
    c = s * _reach(s) + dm  # coarse context of the reduced low-pass
    trim = s * (_reach(s) - UPSCALE_MARGIN) - _REACH
    rows, cols = np.mgrid[r0 : r0 + hc, c0 : c0 + wc]
    chosen = sample_mask(rows, cols, rate, seed)[None] & ~_training_bad(x, cv, gv, s, m, c, (n_taps, start, dm, trim))
    dg = degrade_valid(_crop(g, s * (m - c) - dm), s, model, sigma, margin=dm)
    xc = _crop(x, m - c)
    stats = TrainingStatistics.empty(x.shape[0])
    for b in range(x.shape[0]):
        ii, jj = np.nonzero(chosen[b])
        if ii.size == 0:
            continue
        pr = np.tensordot(w[b, :-1].astype(dg.dtype), dg, axes=1) + dg.dtype.type(w[b, -1])
        ur = _crop(_lowpass(xc[b], s, model, sigma, dm), trim)
        lr = _crop(_lowpass(pr, s, model, sigma, dm), trim)
        maps = _grid_maps(ur, _crop(pr, c - _REACH), lr)
        y = _crop(xc[b], c)[ii, jj].astype(np.float64) - maps[0][ii + _PR, jj + _PR]
        _accumulate_features(stats.ata[b], stats.aty[b], maps, ii, jj, y)
        stats.yty[b] = y @ y
        stats.count[b] = y.size
    return stats


def _accumulate_features(gram, cross, maps, ii, jj, y):
    """Add the normal equations of the feature rows at interior pixels ``(ii, jj)``.

    ``maps`` (U, L, D, D*slope) carry 2 pixels of context. Rows are gathered
    in batches through flat indexes (one fancy-indexing pass per map), so a
    block never holds all its feature rows at once.
    """
    u2, l2, d2, ds2 = (np.ascontiguousarray(m) for m in maps)
    p, width = GUIDE_PATCH, u2.shape[1]
    offsets = (np.arange(p)[:, None] * width + np.arange(p)[None, :]).ravel()
    keep = np.arange(p * p) != _CENTRE
    flat = [m.ravel() for m in (d2, u2, l2, ds2)]
    n_rest = int(keep.sum())
    for lo in range(0, len(y), _BATCH):
        idx = (ii[lo : lo + _BATCH] * width + jj[lo : lo + _BATCH])[:, None] + offsets[None, :]
        a1 = np.empty((len(idx), N_FEATURES + 1))
        a1[:, : p * p] = flat[0][idx]
        col = p * p
        for m in flat[1:3]:
            v = m[idx]
            a1[:, col : col + n_rest] = (v - v[:, _CENTRE : _CENTRE + 1])[:, keep]
            col += n_rest
        a1[:, col : col + p * p] = flat[3][idx]
        a1[:, -1] = 1.0
        gram += a1.T @ a1
        cross += a1.T @ y[lo : lo + _BATCH]


def _ridge(ata, aty, ridge):
    """Ridge with an unpenalised intercept from raw sums; ``(coef, intercept)``.

    The penalty is ``ridge`` times the mean diagonal of the centred normal
    matrix (the features' mean variance).
    """
    f = ata.shape[0] - 1
    n = ata[f, f]
    mean_a = ata[:f, f] / n
    mean_y = aty[f] / n
    cov = ata[:f, :f] / n - np.outer(mean_a, mean_a)
    c = aty[:f] / n - mean_a * mean_y
    lam = ridge * max(np.trace(cov) / f, 0.0)
    try:
        coef = np.linalg.solve(cov + lam * np.eye(f), c)
    except np.linalg.LinAlgError:
        coef = np.linalg.lstsq(cov + lam * np.eye(f), c, rcond=None)[0]
    return coef, float(mean_y - mean_a @ coef)


def _stage1(stats, b):
    """Centred least squares of stage 1 for band ``b``: ``(weights, r)``."""
    k = stats.gram.shape[1] - 1
    n = stats.count[b]
    if n < k + 2:
        raise InputError(
            f"Band {b} has {n} valid pixels under a valid guide; stage 1 needs at least {k + 2}"
        )
    mean_g = stats.gram[b, :k, k] / n
    mean_x = stats.cross[b, k] / n
    cov = stats.gram[b, :k, :k] / n - np.outer(mean_g, mean_g)
    c = stats.cross[b, :k] / n - mean_g * mean_x
    w = np.linalg.lstsq(cov, c, rcond=1e-12)[0]
    var_x = stats.sq[b] / n - mean_x * mean_x
    r2 = float(w @ c) / var_x if var_x > 0 else 0.0
    return np.append(w, mean_x - mean_g @ w), math.sqrt(min(max(r2, 0.0), 1.0))


def _kernels(coef, dtype):
    """The four 5 x 5 correlation kernels (U, L, D, D*slope) of one band's coefficients."""
    p2 = GUIDE_PATCH**2
    cd, cu, cl, cs = np.split(np.asarray(coef, dtype=np.float64), [p2, 2 * p2 - 1, 3 * p2 - 2])
    ku = np.insert(cu, _CENTRE, 1.0 - cu.sum())
    kl = np.insert(cl, _CENTRE, -cl.sum())
    shape = (GUIDE_PATCH, GUIDE_PATCH)
    return tuple(np.ascontiguousarray(k.reshape(shape), dtype=dtype) for k in (ku, kl, cd, cs))


def _fill_stack(a, valid, name):
    """Check finite valid pixels and fill the invalid ones (a new array when filled)."""
    if valid is None:
        _require_finite(a, name)
        return a
    masks = np.broadcast_to(valid, a.shape)
    if not np.isfinite(a[masks]).all():
        raise InputError(f"The {name!r} array must hold finite values at its valid pixels")
    if masks.all():
        return a
    return np.stack([fill_invalid(a[j], masks[j]) for j in range(a.shape[0])])


def _pad(a, r):
    if a is None:
        return None
    return np.pad(a, [(0, 0)] * (a.ndim - 2) + [(r, r)] * 2, mode="symmetric")


_ARRAYS = ("combination_", "coef_", "intercept_", "correlation_", "n_samples_")


class GuidedRegression(BaseEstimator):
    """Magnify coarse bands with a finer co-registered guide, learned per band.

    Parameters
    ----------
    scale : int
        Ratio of the two grids' pixel sizes, 2 to 8.
    degradation : {"bicubic", "gaussian", "area"}
        How the coarse bands relate to the fine grid (used at reduced resolution).
    sigma : float, optional
        Gaussian width in fine pixels (``"gaussian"`` only).
    ridge : float
        Ridge strength relative to the mean variance of the features.
    max_samples : int
        Expected number of training samples per band at most; sets the sample rate.
    random_state : int
        Seed of the (block-independent) sample selection.

    Attributes
    ----------
    combination_ : ndarray, shape (n_targets, n_guides + 1)
        Stage-1 weights of the synthetic guide, last column the intercept.
    coef_ : ndarray, shape (n_targets, 98)
        Ridge coefficients: D (25), U - U_centre (24), L - L_centre (24), D * slope (25),
        each neighbourhood in row-major order.
    intercept_ : ndarray, shape (n_targets,)
    correlation_ : ndarray, shape (n_targets,)
        Multiple correlation of each band with its degraded synthetic guide.
    n_samples_ : ndarray, shape (n_targets,)
        Training samples used per band.
    n_guides_, n_targets_ : int
    """

    _parameter_constraints: dict = {}

    def __init__(self, scale=2, degradation="bicubic", sigma=None, ridge=1e-3,
                 max_samples=200_000, random_state=0):
        self.scale = scale
        self.degradation = degradation
        self.sigma = sigma
        self.ridge = ridge
        self.max_samples = max_samples
        self.random_state = random_state

    def _geometry(self):
        """Checked parameters: ``(s, model, sigma, n_taps, start, dm)``."""
        check_float(self.ridge, "ridge", 0.0)
        check_int(self.max_samples, "max_samples", MIN_SAMPLES)
        if not isinstance(self.random_state, Integral) or isinstance(self.random_state, bool):
            raise ParameterError(
                f"The 'random_state' parameter must be a non-negative integer, got {self.random_state!r}"
            )
        check_int(self.random_state, "random_state", 0)
        return _degradation(self.scale, self.degradation, self.sigma)

    def _whole(self, coarse, guide, coarse_valid, guide_valid, s):
        """Checked and filled whole arrays ``(x, g, cv, gv)``."""
        x = _as_stack(coarse, "coarse")
        g = _as_stack(guide, "guide")
        h, w = x.shape[1:]
        if g.shape[1:] != (s * h, s * w):
            raise InputError(
                f"The guide must be {s} times finer than the coarse bands: expected "
                f"{s * h} x {s * w}, got {g.shape[1]} x {g.shape[2]}"
            )
        cv = None if coarse_valid is None else _as_mask(coarse_valid, x.shape, "coarse_valid")
        gv = None if guide_valid is None else _as_mask(guide_valid, g.shape[1:], "guide_valid")
        return _fill_stack(x, cv, "coarse"), _fill_stack(g, gv, "guide"), cv, gv

    def fit(self, coarse, guide, coarse_valid=None, guide_valid=None) -> GuidedRegression:
        """Learn the model on whole arrays at reduced resolution.

        Parameters
        ----------
        coarse : ndarray, shape (n, h, w)
            Target bands; ``h`` and ``w`` multiples of ``scale``.
        guide : ndarray, shape (k, scale*h, scale*w)
        coarse_valid : ndarray of bool, shape (n, h, w), optional
        guide_valid : ndarray of bool, shape (scale*h, scale*w), optional
            Without masks every pixel must be finite.

        Returns
        -------
        self
        """
        s, model, sigma, *_ = self._geometry()
        x, g, cv, gv = self._whole(coarse, guide, coarse_valid, guide_valid, s)
        if x.shape[1] % s or x.shape[2] % s:
            raise InputError(
                f"The coarse size must be a multiple of the scale {s}, got "
                f"{x.shape[1]} x {x.shape[2]}; crop it with crop_to_multiple()"
            )
        m = guided_halo(s, model, sigma)
        xp, gp, cvp, gvp = _pad(x, m), _pad(g, s * m), _pad(cv, m), _pad(gv, s * m)
        kw = dict(margin=m, degradation=model, sigma=sigma)
        comb = combination_statistics(xp, gp, cvp, gvp, s, **kw)
        rate = min(1.0, self.max_samples / max(int(comb.count.max()), 1))
        train = training_statistics(xp, gp, cvp, gvp, self.combination_from_statistics(comb), s,
                                    origin=(0, 0), sample_rate=rate,
                                    random_state=self.random_state, **kw)
        return self.fit_statistics(comb, train)

    def combination_from_statistics(self, combination: CombinationStatistics) -> np.ndarray:
        """Stage-1 weights ``(n_targets, n_guides + 1)`` from summed statistics."""
        if not isinstance(combination, CombinationStatistics):
            raise ParameterError("The 'combination' parameter must be CombinationStatistics")
        return np.stack([_stage1(combination, b)[0] for b in range(len(combination.count))])

    def fit_statistics(self, combination: CombinationStatistics,
                       training: TrainingStatistics) -> GuidedRegression:
        """Solve stage 1 and the ridge regressions from statistics summed over blocks."""
        self._geometry()
        if not isinstance(training, TrainingStatistics):
            raise ParameterError("The 'training' parameter must be TrainingStatistics")
        if training.ata.shape[1:] != (N_FEATURES + 1,) * 2 or len(training.count) != len(
            combination.count
        ):
            raise ParameterError("The 'training' statistics do not match the combination's bands")
        n = len(training.count)
        for b in range(n):
            if training.count[b] < MIN_SAMPLES:
                raise InputError(
                    f"Band {b} has only {int(training.count[b])} valid training samples; guided "
                    f"magnification needs at least {MIN_SAMPLES} (a larger valid area)"
                )
        stage1 = [_stage1(combination, b) for b in range(n)]
        solved = [_ridge(training.ata[b], training.aty[b], float(self.ridge)) for b in range(n)]
        self.combination_ = np.stack([w for w, _ in stage1])
        self.correlation_ = np.array([r for _, r in stage1])
        self.coef_ = np.stack([c for c, _ in solved])
        self.intercept_ = np.array([i for _, i in solved])
        self.n_samples_ = training.count.astype(np.int64).copy()
        self.n_targets_ = n
        self.n_guides_ = self.combination_.shape[1] - 1
        return self

    def _check_fitted(self):
        if not hasattr(self, "coef_"):
            raise NotFittedError("This GuidedRegression is not fitted yet; call fit() first")

    def predict(self, coarse, guide, guide_valid=None) -> tuple[np.ndarray, np.ndarray]:
        """Magnify whole arrays.

        Parameters
        ----------
        coarse : ndarray, shape (n_targets, h, w), finite
        guide : ndarray, shape (n_guides, scale*h, scale*w)
        guide_valid : ndarray of bool, shape (scale*h, scale*w), optional

        Returns
        -------
        values : ndarray, shape (n_targets, scale*h, scale*w)
            float32 for float32 inputs, float64 otherwise.
        guide_ok : ndarray of bool, shape (scale*h, scale*w)
            Pixels where the guide is valid. Invalid guide pixels within an
            output pixel's reach are first filled from valid neighbours.
        """
        self._check_fitted()
        s, model, sigma, *_ = self._geometry()
        x, g, _, gv = self._whole(coarse, guide, None, guide_valid, s)
        m = guided_halo(s, model, sigma)
        return self.predict_block(_pad(x, m), _pad(g, s * m), _pad(gv, s * m), m)

    def predict_block(self, coarse, guide, guide_valid, margin) -> tuple[np.ndarray, np.ndarray]:
        """Magnify the interior of a padded block.

        Parameters
        ----------
        coarse : ndarray, shape (n_targets, hc + 2m, wc + 2m), finite
        guide : ndarray, shape (n_guides, s*(hc + 2m), s*(wc + 2m))
            Invalid pixels may hold anything finite (they are filled here).
        guide_valid : ndarray of bool, shape (s*(hc + 2m), s*(wc + 2m)), or None
        margin : int
            ``m``, at least :func:`guided_halo`.

        Returns
        -------
        values : ndarray, shape (n_targets, s*hc, s*wc)
        guide_ok : ndarray of bool, shape (s*hc, s*wc)
        """
        self._check_fitted()
        s, model, sigma, n_taps, start, dm = self._geometry()
        x, g, _, gv = _check_block(coarse, guide, None, guide_valid, s, margin,
                                   guided_halo(s, model, sigma))
        if x.shape[0] != self.n_targets_ or g.shape[0] != self.n_guides_:
            raise InputError(
                f"The model was fitted on {self.n_targets_} bands and {self.n_guides_} guide bands, "
                f"got {x.shape[0]} and {g.shape[0]}"
            )
        m, r = int(margin), _reach(s)
        trim = s * (r - UPSCALE_MARGIN) - _REACH
        ctx = s * r + dm  # fine context of the guide the low-pass reads
        if gv is not None and not gv.all():
            # Fill as far as one output pixel reads, so that pixels with a valid
            # guide next to invalid ones read values interpolated from valid
            # pixels only (local: the halo covers ctx twice).
            g = np.stack([fill_invalid(g[j], gv, distance=ctx) for j in range(g.shape[0])])
        u = _crop(upscale_valid(_crop(x, m - r), s, UPSCALE_MARGIN), trim)
        gf = _crop(g, s * (m - r) - dm)
        out = np.empty((x.shape[0], u.shape[1] - 2 * _REACH, u.shape[2] - 2 * _REACH), u.dtype)
        for b in range(x.shape[0]):
            wb = self.combination_[b]
            p = np.tensordot(wb[:-1].astype(gf.dtype), gf, axes=1) + gf.dtype.type(wb[-1])
            low = _crop(_lowpass(p, s, model, sigma, dm), trim)
            u2, l2, d2, ds2 = _grid_maps(u[b], _crop(p, ctx - _REACH), low)
            ku, kl, kd, ks = _kernels(self.coef_[b], u.dtype)
            _filter_kernel(u2, l2, np.ascontiguousarray(d2), np.ascontiguousarray(ds2), ku, kl, kd,
                           ks, u.dtype.type(self.intercept_[b]), out[b])
        ok = np.ones(out.shape[1:], dtype=bool)
        if gv is not None and not gv.all():
            ok = _crop(gv, s * m).copy()  # the guide's own pixel is measured
        return out, ok

    def to_arrays(self) -> dict[str, np.ndarray]:
        """The fitted arrays, for a model file (``from_arrays`` round-trips them exactly)."""
        self._check_fitted()
        return {name.rstrip("_"): np.array(getattr(self, name)) for name in _ARRAYS}

    @classmethod
    def from_arrays(cls, params: dict, arrays: dict) -> GuidedRegression:
        """Rebuild a fitted model from ``get_params()`` and :meth:`to_arrays`."""
        model = cls(**params)
        model._geometry()
        try:
            values = {name: np.asarray(arrays[name.rstrip("_")]) for name in _ARRAYS}
        except KeyError as exc:
            raise ModelError(f"The guided model lacks its {exc.args[0]!r} array") from None
        n = values["coef_"].shape[0] if values["coef_"].ndim == 2 else -1
        shapes_ok = (
            values["coef_"].shape == (n, N_FEATURES)
            and values["combination_"].ndim == 2
            and values["combination_"].shape[0] == n
            and all(values[k].shape == (n,) for k in _ARRAYS[2:])
        )
        if not shapes_ok:
            raise ModelError("The guided model's arrays have inconsistent shapes")
        for name, value in values.items():
            setattr(model, name, value.copy())
        model.n_targets_ = n
        model.n_guides_ = values["combination_"].shape[1] - 1
        return model


def sharpen_with_guide(coarse, guide, scale, *, coarse_valid=None, guide_valid=None,
                       **params) -> np.ndarray:
    """Magnify coarse bands with a finer guide: fit at reduced resolution, predict at full.

    Parameters
    ----------
    coarse : ndarray, shape (n, h, w) or (h, w)
        ``h`` and ``w`` multiples of ``scale``.
    guide : ndarray, shape (k, scale*h, scale*w) or (scale*h, scale*w)
    scale : int
    coarse_valid, guide_valid : ndarray of bool, optional
    **params
        Other :class:`GuidedRegression` parameters.

    Returns
    -------
    ndarray, shape (n, scale*h, scale*w) (or 2-D for a 2-D input)
        Where the guide is not valid, plain bicubic interpolation.
    """
    if coarse_valid is not None and np.ndim(coarse) == 2:
        coarse_valid = np.asarray(coarse_valid)[None]
    model = GuidedRegression(scale=scale, **params).fit(coarse, guide, coarse_valid, guide_valid)
    x = _as_stack(coarse, "coarse")
    x = _fill_stack(x, _as_mask(coarse_valid, x.shape, "coarse_valid") if coarse_valid is not None
                    else None, "coarse")
    values, ok = model.predict(x, guide, guide_valid)
    if not ok.all():
        values[:, ~ok] = upscale_bicubic(x, model.scale)[:, ~ok]
    return values[0] if np.ndim(coarse) == 2 else values
