"""Anchored neighbourhood regression (A+, Timofte, De Smet & Van Gool 2014).

Every atom of the low-res dictionary anchors a ridge regression ``P_j``
learned on the training features most correlated with it
(:func:`fit_projections`); a feature ``f`` is magnified into the patch
``P_j f`` for the atom ``j`` most correlated with it (:func:`nearest_anchors`,
:func:`apply_projections`).
"""

from __future__ import annotations

import math

import numba
import numpy as np

from .sparse import one_blas_thread

__all__ = ["nearest_anchors", "apply_projections", "fit_projections"]

#: Relative bound, in units of the feature norm, under which two float32
#: correlations with unit atoms may be misordered; about 50 times the
#: worst-case rounding of a 30-term float32 dot product (Higham 2002, eq. 3.5).
ANCHOR_TOLERANCE = 1e-4


def nearest_anchors(features: np.ndarray, dictionary_low: np.ndarray) -> np.ndarray:
    """Index of the atom of largest absolute correlation with each feature.

    The choice of ``argmax`` / ``argmin`` of ``features @ D_l`` taken in
    float64 (the first index wins a tie, and a positive correlation wins
    against a negative one of equal size). One compiled pass per feature
    computes its correlations in float32 (kept in cache, never written out);
    the atoms within :data:`ANCHOR_TOLERANCE` of the best are compared again
    in float64, so the answer is the float64 one.

    Parameters
    ----------
    features : ndarray, shape (n, d)
    dictionary_low : ndarray, shape (d, n_atoms)
        Unit-norm atoms.

    Returns
    -------
    ndarray of int64, shape (n,)
    """
    f64 = np.ascontiguousarray(features, dtype=np.float64)
    atoms32 = np.ascontiguousarray(dictionary_low, dtype=np.float32)  # (d, k)
    atoms64 = np.ascontiguousarray(dictionary_low.T, dtype=np.float64)  # (k, d)
    anchors = np.empty(len(f64), dtype=np.int64)
    _anchor_kernel(f64, atoms32, atoms64, ANCHOR_TOLERANCE, anchors)
    return anchors


@numba.njit(nogil=True, cache=True)
def _anchor_kernel(features, atoms32, atoms64, tolerance, anchors):  # pragma: no cover - compiled
    n, d = features.shape
    k = atoms32.shape[1]
    row = np.empty(k, dtype=np.float32)
    for i in range(n):
        row[:] = 0.0
        norm = 0.0
        for t in range(d):
            ft = features[i, t]
            norm += ft * ft
            f32 = np.float32(ft)
            for j in range(k):
                row[j] += f32 * atoms32[t, j]
        if norm == 0.0:
            anchors[i] = 0  # every correlation is exactly zero
            continue
        high = row[0]
        low = row[0]
        for j in range(k):
            high = max(high, row[j])
            low = min(low, row[j])
        threshold = max(high, -low) - tolerance * math.sqrt(norm)
        hi_value = -np.inf
        lo_value = np.inf
        hi = -1
        lo = -1
        for j in range(k):
            if abs(row[j]) < threshold:
                continue
            c = 0.0
            for t in range(d):
                c += features[i, t] * atoms64[j, t]
            if c > hi_value:
                hi_value = c
                hi = j
            if c < lo_value:
                lo_value = c
                lo = j
        anchors[i] = hi if hi_value >= -lo_value else lo


def apply_projections(features: np.ndarray, anchors: np.ndarray, projections: np.ndarray) -> np.ndarray:
    """Patches ``P_a f`` for features and their anchors, grouped by anchor.

    Parameters
    ----------
    features : ndarray, shape (n, d)
    anchors : ndarray of int, shape (n,)
        From :func:`nearest_anchors`.
    projections : ndarray, shape (n_atoms, patch size, d)

    Returns
    -------
    ndarray, shape (n, patch size), the dtype of ``features``
    """
    dtype = features.dtype
    proj = projections.astype(dtype, copy=False)
    out = np.empty((len(features), proj.shape[1]), dtype=dtype)
    order = np.argsort(anchors, kind="stable")
    bounds = np.searchsorted(anchors[order], np.arange(proj.shape[0] + 1))
    with one_blas_thread():
        for j in np.flatnonzero(np.diff(bounds)):
            sel = order[bounds[j] : bounds[j + 1]]
            out[sel] = features[sel] @ proj[j].T
    return out


def fit_projections(
    dictionary: np.ndarray, features: np.ndarray, details: np.ndarray, neighbours: int, ridge: float
) -> np.ndarray:
    """Ridge regressions anchored at every atom (A+).

    Parameters
    ----------
    dictionary : ndarray, shape (d, n_atoms)
        Unit-norm low-res atoms.
    features : ndarray, shape (n, d)
    details : ndarray, shape (n, patch size)
        The detail patch of each training feature.
    neighbours : int
        Training features, the most correlated with an atom, that its
        regression is learned on.
    ridge : float
        Ridge weight.

    Returns
    -------
    ndarray of float32, shape (n_atoms, patch size, d)
    """
    norms = np.linalg.norm(features, axis=1)
    norms[norms == 0] = 1.0
    fn = features / norms[:, None]
    dn = details / norms[:, None]
    n_atoms = dictionary.shape[1]
    d = features.shape[1]
    k = min(neighbours, len(features))
    projections = np.empty((n_atoms, details.shape[1], d), dtype=np.float32)
    eye = ridge * np.eye(d)
    block = max(1, (1 << 25) // max(len(features), 1))
    for a0 in range(0, n_atoms, block):
        atoms = dictionary[:, a0 : a0 + block]
        corr = np.abs(atoms.T @ fn.T)  # (block, n)
        if k < corr.shape[1]:
            near = np.argpartition(-corr, k - 1, axis=1)[:, :k]
        else:
            near = np.broadcast_to(np.arange(corr.shape[1]), corr.shape)
        with one_blas_thread():
            for j in range(atoms.shape[1]):
                nl = fn[near[j]].astype(np.float64)  # (k, d)
                nh = dn[near[j]].astype(np.float64)  # (k, patch)
                # P = N_h N_l^T (N_l N_l^T + ridge I)^-1: the d x d form of the ridge
                # solution N_h (N_l^T N_l + ridge I)^-1 N_l^T (push-through identity).
                projections[a0 + j] = np.linalg.solve(nl.T @ nl + eye, nl.T @ nh).T
    return projections
