"""Learning a model from training pairs: PCA features, K-SVD, high-res atoms or A+ regressions.

:func:`learn_from_pairs` is the whole fit: the feature operator (raw
derivative features projected on the PCA basis that keeps ``energy`` of
their energy), the low-res dictionary by K-SVD, then either the high-res
dictionary by least squares on the training codes (``"sparse"``, Zeyde,
Elad & Protter 2010), optionally refined at image level
(:func:`refine_high_dictionary`), or the anchored regressions (``"anchored"``,
A+, :func:`geosr.core.anchored.fit_projections`).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import scipy.sparse
from numpy.lib.stride_tricks import sliding_window_view

from ..enums import Method
from ..errors import InputError
from .anchored import fit_projections
from .features import WINDOW_CENTRE, overlap_average, pca_basis, raw_feature_kernel
from .pairs import TILE_CELLS, PairSample, subset_tiles
from .params import ModelParams
from .sparse import ksvd, omp_codes

__all__ = ["learn_from_pairs", "fit_high_dictionary", "refine_high_dictionary"]

#: Conjugate-gradient iterations of the image-level high-res dictionary.
IMAGE_FIT_ITERATIONS = 30


def learn_from_pairs(
    params: ModelParams, samples: Sequence[PairSample], rng: np.random.Generator
) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
    """Learn a model's arrays from collected training pairs.

    Parameters
    ----------
    params : ModelParams
    samples : sequence of PairSample
        All at ``params.scale``.
    rng : numpy.random.Generator
        Draws the subsets and seeds K-SVD.

    Returns
    -------
    arrays : dict of ndarray
        ``feature_kernel``, ``pca_eigenvalues``, ``dictionary_low`` and
        ``dictionary_high`` (sparse) or ``projections`` (anchored), named as
        in model files.
    training : dict
        Provenance: image and sample counts, the degradation, iterations.
    """
    samples = list(samples)
    for smp in samples:
        if smp.scale != params.scale:
            raise InputError(
                f"Training pairs must be collected at scale {params.scale}, got scale {smp.scale}"
            )
    n_images = sum(smp.n_images for smp in samples)
    windows = np.concatenate([smp.windows for smp in samples]) if samples else np.empty((0, 81))
    details = np.concatenate([smp.details for smp in samples]) if samples else np.empty((0, 1))
    tiles = [t for smp in samples for t in smp.tiles]
    if len(windows) > params.max_samples:
        keep = np.sort(rng.choice(len(windows), size=params.max_samples, replace=False))
        windows, details = windows[keep], details[keep]
    n = len(windows)
    if n < max(2 * params.n_atoms, 50):
        raise InputError(
            f"Training needs at least {max(2 * params.n_atoms, 50)} textured patches for "
            f"{params.n_atoms} atoms, got {n}; give more or larger references, or fewer atoms"
        )
    kernel, eigenvalues = _feature_kernel(windows, params.scale, params.energy)
    features = (windows @ kernel.T.astype(np.float32)).astype(np.float32)
    details = details.astype(np.float32)
    dictionary, info = ksvd(
        features.T, params.n_atoms, params.sparsity, params.n_iter, random_state=rng
    )
    dictionary = np.asarray(dictionary, dtype=np.float32)
    arrays = {
        "feature_kernel": kernel.astype(np.float32),
        "pca_eigenvalues": eigenvalues.astype(np.float32),
        "dictionary_low": dictionary,
    }
    n_iter = int(info.get("n_iter", params.n_iter)) if isinstance(info, dict) else params.n_iter
    training = {
        "n_images": int(n_images),
        "n_samples": int(n),
        "n_features": int(kernel.shape[0]),
        "degradation": str(params.degradation),
        "sigma": params.sigma,
        "rescaled_copies": params.rescaled_copies,
        "ksvd_iterations": n_iter,
    }
    if params.method is Method.ANCHORED:
        arrays["projections"] = fit_projections(
            dictionary, features, details, params.neighbours, params.ridge
        )
        return arrays, training
    high = fit_high_dictionary(dictionary, features, details, params.sparsity)
    if params.high_fit == "image":
        high, cells, kept = _image_fit(params, high, dictionary, kernel, tiles, rng)
        training["image_fit_cells"] = int(cells)
        training["image_fit_iterations"] = int(kept)
    arrays["dictionary_high"] = high
    return arrays, training


def _feature_kernel(windows, scale, energy):
    """The PCA-projected feature operator on low-res windows, and the PCA eigenvalues."""
    raw = raw_feature_kernel(scale)
    w64 = windows.astype(np.float64)
    cov = raw @ (w64.T @ w64) @ raw.T
    basis, eigenvalues = pca_basis(cov, energy)
    return basis.T @ raw, eigenvalues  # (d, window size), (d,)


def _image_fit(params, high, dictionary, kernel, tiles, rng):
    """The image-level refinement of ``high_fit="image"`` on a subset of the tiles."""
    s = params.scale
    tiles = subset_tiles(tiles, s, params.max_samples, rng)
    if not tiles:
        raise InputError(
            "The image-level fit (high_fit='image') needs dense tiles of "
            f"{TILE_CELLS} x {TILE_CELLS} valid low-res cells, got none; give larger "
            "references or use high_fit='patch'"
        )
    cells = sum(d.size for _, d in tiles) // s**2
    high, kept = refine_high_dictionary(
        high, dictionary, kernel.astype(np.float32), tiles, params.sparsity, s
    )
    return high, cells, kept


def _sparse_codes(dictionary, features, sparsity, fmt):
    """OMP codes of the features (n, d) as a scipy sparse (n_atoms, n) matrix in float64."""
    idx, coef = omp_codes(dictionary, features.T, sparsity)
    n, k = idx.shape
    return fmt(
        (coef.ravel().astype(np.float64), (idx.ravel(), np.repeat(np.arange(n), k))),
        shape=(dictionary.shape[1], n),
    )


def fit_high_dictionary(
    dictionary: np.ndarray, features: np.ndarray, details: np.ndarray, sparsity: int
) -> np.ndarray:
    """Least-squares high-res atoms: ``D_h = P_h A^T (A A^T)^-1``.

    Parameters
    ----------
    dictionary, features, details :
        As in :func:`geosr.core.anchored.fit_projections`.
    sparsity : int
        Atoms per OMP code.

    Returns
    -------
    ndarray of float32, shape (patch size, n_atoms)
    """
    codes = _sparse_codes(dictionary, features, sparsity, scipy.sparse.csc_matrix)
    gram = (codes @ codes.T).toarray()
    rhs = (codes @ details.astype(np.float64)).T  # (patch, atoms)
    reg = 1e-6 * max(np.trace(gram) / len(gram), 1e-12)
    gram[np.diag_indices_from(gram)] += reg
    high = np.linalg.solve(gram, rhs.T).T
    return high.astype(np.float32)


class _TileOperator:
    """Magnification's detail of dense tiles as a linear map of the high-res dictionary.

    ``forward(x)``: for every tile, code each centre, take its patch from
    ``x`` and overlap-average; ``adjoint`` is its transpose; ``loss`` the
    squared distance of ``forward(x)`` to the tiles' detail images.
    """

    def __init__(self, codes, sides, targets, scale, n_atoms):
        self.codes, self.sides, self.targets = codes, sides, targets
        self.s, self.n_atoms = scale, n_atoms

    def forward(self, x):
        xt = np.ascontiguousarray(x.T)
        return [overlap_average((a.T @ xt).reshape(t + 2, t + 2, -1), self.s)
                for a, t in zip(self.codes, self.sides)]

    def adjoint(self, images):
        # Transpose of forward: each centre's patch of residual / 9, coded back.
        s = self.s
        g = np.zeros((self.n_atoms, (3 * s) ** 2))
        for a, t, r in zip(self.codes, self.sides, images):
            padded = np.pad(r / 9.0, 2 * s)
            patches = sliding_window_view(padded, (3 * s, 3 * s))[::s, ::s]
            g += a @ patches.reshape((t + 2) ** 2, -1)
        return g.T

    def loss(self, x):
        xt = np.ascontiguousarray(x.T)
        s = self.s
        return sum(float(np.sum((e - overlap_average((a.T @ xt).reshape(t + 2, t + 2, -1), s)) ** 2))
                   for a, t, e in zip(self.codes, self.sides, self.targets))

    def subset(self, keep):
        return _TileOperator([self.codes[n] for n in keep], [self.sides[n] for n in keep],
                             [self.targets[n] for n in keep], self.s, self.n_atoms)


def refine_high_dictionary(
    high: np.ndarray,
    dictionary: np.ndarray,
    kernel: np.ndarray,
    tiles: Sequence[tuple[np.ndarray, np.ndarray]],
    sparsity: int,
    scale: int,
    n_iter: int = IMAGE_FIT_ITERATIONS,
) -> tuple[np.ndarray, int]:
    """Image-level least squares for the high-res dictionary.

    Minimises ``sum_t || average_t(D_h A_t) - E_t ||^2`` over the dense tiles,
    where ``A_t`` are the OMP codes of every patch centre of tile ``t``,
    ``average_t`` the overlap averaging of magnification and ``E_t`` the
    tile's detail image, by conjugate gradients on the normal equations
    (CGLS, Hestenes & Stiefel 1952) started from the patch-level solution.

    Parameters
    ----------
    high : ndarray, shape ((3s)**2, n_atoms)
        Patch-level dictionary, the starting point.
    dictionary : ndarray, shape (d, n_atoms)
    kernel : ndarray, shape (d, window size)
    tiles : list of (windows, detail)
        See :class:`geosr.core.pairs.PairSample`.
    sparsity, scale : int
    n_iter : int

    Returns
    -------
    high : ndarray, float32, same shape as ``high``
    iterations : int
        Iterations kept: every fifth tile (with five or more) is held out
        and the iterations stop where its loss is least, so the result is
        never worse than the start on held-out tiles.
    """
    s = int(scale)
    codes, targets, sides = [], [], []
    for windows, detail in tiles:
        windows = windows - windows[:, WINDOW_CENTRE : WINDOW_CENTRE + 1]
        codes.append(_sparse_codes(dictionary, windows @ kernel.T, sparsity, scipy.sparse.csr_matrix))
        targets.append(detail.astype(np.float64))
        sides.append(detail.shape[0] // s)
    every = _TileOperator(codes, sides, targets, s, dictionary.shape[1])
    # Every fifth tile is held out: the iterations stop where its loss is least
    # (early stopping; the overlapped fit is loosely determined and overfits).
    held = [n % 5 == 4 for n in range(len(codes))] if len(codes) >= 5 else [False] * len(codes)
    fit = every.subset([n for n, h in enumerate(held) if not h] or list(range(len(codes))))
    check = every.subset([n for n, h in enumerate(held) if h])
    return _cgls(fit, check, high.astype(np.float64), int(n_iter), bool(check.codes))


def _cgls(fit, check, x, n_iter, early_stop):
    """Conjugate gradients on the normal equations of ``fit``, stopped by ``check``'s loss."""
    best, best_loss, kept = x.copy(), check.loss(x), 0
    resid = [e - f for e, f in zip(fit.targets, fit.forward(x))]
    grad = fit.adjoint(resid)
    direction = grad.copy()
    gamma = float(np.vdot(grad, grad))
    for it in range(1, n_iter + 1):
        if gamma <= 1e-30:
            break
        q = fit.forward(direction)
        qq = float(sum(np.vdot(a, a) for a in q))
        if qq <= 0:
            break
        alpha = gamma / qq
        x += alpha * direction
        loss = check.loss(x)
        if loss < best_loss or not early_stop:
            best, best_loss, kept = x.copy(), loss, it
        elif early_stop:
            break
        resid = [r - alpha * qi for r, qi in zip(resid, q)]
        grad = fit.adjoint(resid)
        gamma, previous = float(np.vdot(grad, grad)), gamma
        direction = grad + (gamma / previous) * direction
    return best.astype(np.float32), kept
