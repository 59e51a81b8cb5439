"""Anchored neighbourhood regression (A+, Timofte, De Smet & Van Gool 2014).

Every atom of the low-res dictionary anchors a ridge regression ``P_j``
learned on the training features most correlated with it
(:func:`fit_projections`); a feature ``f`` is magnified into the patch
``P_j f`` for the atom ``j`` most correlated with it (:func:`nearest_anchors`,
:func:`apply_projections`).
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import math

import numba
import numpy as np

from .sparse import one_blas_thread

__all__ = [
    "AnchorGroups",
    "anchor_groups",
    "nearest_anchors",
    "grouped_anchors",
    "find_anchors",
    "apply_projections",
    "fit_projections",
]

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


#: Dictionaries with at least this many atoms are searched in two levels
#: (:func:`find_anchors`); smaller ones exhaustively.
GROUPED_SEARCH_ATOMS = 1024

#: Groups probed per feature by the two-level search. With 64 groups of a
#: 1024-atom dictionary, 6 probes found the exhaustive anchor for 95 % of
#: the features of a held-out photo and cost at most 0.011 dB (docs/decisions.md).
PROBED_GROUPS = 6


@dataclasses.dataclass(frozen=True)
class AnchorGroups:
    """Atoms of a dictionary clustered for the two-level anchor search.

    Attributes
    ----------
    centres : ndarray, shape (n_groups, d), float64
        Unit-norm group centres.
    members : ndarray of int64, shape (n_atoms,)
        Atom indices, group after group, ascending within a group.
    bounds : ndarray of int64, shape (n_groups + 1,)
        Group ``g`` holds ``members[bounds[g]:bounds[g + 1]]``.
    atoms : ndarray, shape (n_atoms, d), float64
        The atoms in the order of ``members``.
    """

    centres: np.ndarray
    members: np.ndarray
    bounds: np.ndarray
    atoms: np.ndarray

    @functools.cached_property
    def centres32(self) -> np.ndarray:
        """The centres in float32, for screening."""
        return np.ascontiguousarray(self.centres, dtype=np.float32)

    @functools.cached_property
    def atoms32(self) -> np.ndarray:
        """The grouped atoms in float32, for screening."""
        return np.ascontiguousarray(self.atoms, dtype=np.float32)


def anchor_groups(dictionary_low: np.ndarray, n_groups: int | None = None, n_iter: int = 25) -> AnchorGroups:
    """Cluster unit atoms by absolute correlation (spherical k-means, sign-blind).

    Deterministic: the centres start from a fixed-seed choice of atoms, and
    an atom joins the centre of largest ``|<atom, centre>|``, its sign
    aligned to that centre.

    Parameters
    ----------
    dictionary_low : ndarray, shape (d, n_atoms)
        Unit-norm atoms.
    n_groups : int, optional
        Default: twice the square root of the number of atoms, rounded.
    n_iter : int
        k-means iterations.

    Returns
    -------
    AnchorGroups
    """
    atoms = np.ascontiguousarray(np.asarray(dictionary_low, dtype=np.float64).T)  # (k, d)
    k = len(atoms)
    g = max(1, min(k, int(round(2 * math.sqrt(k))) if n_groups is None else int(n_groups)))
    centres = atoms[np.sort(np.random.default_rng(0).choice(k, size=g, replace=False))].copy()
    # One BLAS thread: the same groups in every thread, process and worker.
    with one_blas_thread():
        for _ in range(n_iter):
            corr = atoms @ centres.T  # (k, g)
            label = np.argmax(np.abs(corr), axis=1)
            signed = atoms * np.sign(corr[np.arange(k), label])[:, None]
            sums = np.zeros_like(centres)
            np.add.at(sums, label, signed)
            norms = np.linalg.norm(sums, axis=1)
            used = norms > 0
            centres[used] = sums[used] / norms[used, None]
        label = np.argmax(np.abs(atoms @ centres.T), axis=1)
    members = np.argsort(label, kind="stable").astype(np.int64)
    bounds = np.searchsorted(label[members], np.arange(g + 1)).astype(np.int64)
    return AnchorGroups(centres, members, bounds, np.ascontiguousarray(atoms[members]))


_GROUPS_CACHE: dict[bytes, AnchorGroups] = {}


def _cached_groups(dictionary_low: np.ndarray) -> AnchorGroups:
    """:func:`anchor_groups` of a dictionary, computed once per distinct dictionary."""
    key = hashlib.blake2b(np.ascontiguousarray(dictionary_low, dtype=np.float32).tobytes(),
                          digest_size=16).digest()
    groups = _GROUPS_CACHE.get(key)
    if groups is None:
        if len(_GROUPS_CACHE) >= 16:
            _GROUPS_CACHE.clear()
        groups = _GROUPS_CACHE[key] = anchor_groups(dictionary_low)
    return groups


def grouped_anchors(features: np.ndarray, groups: AnchorGroups, probe: int = PROBED_GROUPS) -> np.ndarray:
    """The atom of largest absolute correlation among the ``probe`` nearest groups.

    The two-level search: the features are compared with the group centres,
    then with every atom of the ``probe`` groups whose centres correlate
    most (in absolute value) with them, as in :func:`nearest_anchors`
    (float32 screening, float64 decision among the atoms within
    :data:`ANCHOR_TOLERANCE` of the best, the same tie rule). Each
    feature's answer depends on that feature alone.

    Parameters
    ----------
    features : ndarray, shape (n, d)
    groups : AnchorGroups
        From :func:`anchor_groups`.
    probe : int
        Groups searched per feature.

    Returns
    -------
    ndarray of int64, shape (n,)
    """
    f64 = np.ascontiguousarray(features, dtype=np.float64)
    anchors = np.empty(len(f64), dtype=np.int64)
    probe = max(1, min(int(probe), len(groups.centres)))
    _grouped_kernel(f64, groups.centres32, groups.members, groups.bounds, groups.atoms32,
                    groups.atoms, probe, ANCHOR_TOLERANCE, anchors)
    return anchors


@numba.njit(nogil=True, cache=True)
def _dot64(a, b):  # pragma: no cover - compiled
    """A float64 dot product summed in order (no reassociation)."""
    c = 0.0
    for t in range(a.shape[0]):
        c += a[t] * b[t]
    return c


@numba.njit(nogil=True, cache=True, fastmath={"nsz", "arcp", "contract", "reassoc"})
def _dot32(a, b):  # pragma: no cover - compiled
    """A float32 dot product for screening (vectorised: the order of the sum is free)."""
    v = np.float32(0.0)
    for t in range(a.shape[0]):
        v += a[t] * b[t]
    return v


@numba.njit(nogil=True, cache=True)
def _grouped_kernel(features, centres32, members, bounds, atoms32, atoms64, probe, tolerance,
                    anchors):  # pragma: no cover - compiled
    n, d = features.shape
    g = centres32.shape[0]
    score = np.empty(g, dtype=np.float32)
    row = np.empty(atoms32.shape[0], dtype=np.float32)
    chosen = np.empty(probe, dtype=np.int64)
    f32 = np.empty(d, dtype=np.float32)
    for i in range(n):
        norm = _dot64(features[i], features[i])
        if norm == 0.0:
            anchors[i] = 0  # every correlation is exactly zero
            continue
        for t in range(d):
            f32[t] = np.float32(features[i, t])
        for c in range(g):
            score[c] = abs(_dot32(f32, centres32[c]))
        top = np.float32(0.0)
        for q in range(probe):
            best = 0
            for c in range(1, g):
                if score[c] > score[best]:
                    best = c
            score[best] = -1.0
            chosen[q] = best
            for m in range(bounds[best], bounds[best + 1]):
                row[m] = _dot32(f32, atoms32[m])
                top = max(top, abs(row[m]))
        threshold = top - tolerance * math.sqrt(norm)
        hi_value = -np.inf
        lo_value = np.inf
        hi = -1
        lo = -1
        for q in range(probe):
            for m in range(bounds[chosen[q]], bounds[chosen[q] + 1]):
                if abs(row[m]) < threshold:
                    continue
                c = _dot64(features[i], atoms64[m])
                j = members[m]
                if c > hi_value or (c == hi_value and j < hi):
                    hi_value = c
                    hi = j
                if c < lo_value or (c == lo_value and j < lo):
                    lo_value = c
                    lo = j
        anchors[i] = hi if hi_value >= -lo_value else lo


def find_anchors(features: np.ndarray, dictionary_low: np.ndarray) -> np.ndarray:
    """The anchors magnification uses: exhaustive for small dictionaries, two-level for large ones.

    Dictionaries of :data:`GROUPED_SEARCH_ATOMS` atoms or more use
    :func:`grouped_anchors` over :func:`anchor_groups` (computed once per
    dictionary); smaller ones :func:`nearest_anchors`.
    """
    if dictionary_low.shape[1] < GROUPED_SEARCH_ATOMS:
        return nearest_anchors(features, dictionary_low)
    return grouped_anchors(features, _cached_groups(dictionary_low))


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
