"""Coupled low-/high-resolution dictionaries: training, magnification, model files.

Two ways to synthesize the detail patch of a low-res feature ``f``:

``"sparse"``
    Sparse coding over coupled dictionaries (Zeyde, Elad & Protter 2010):
    ``f ~ D_l a`` with at most ``sparsity`` atoms found by OMP, the patch is
    ``D_h a``. ``D_l`` by K-SVD, ``D_h`` by least squares on the training
    codes.
``"anchored"``
    Anchored neighbourhood regression in its adjusted form (A+, Timofte,
    De Smet & Van Gool 2014): every atom of ``D_l`` anchors a ridge
    regression ``P_j`` learned on the training features most correlated with
    it; the patch is ``P_j f`` for the atom most correlated with ``f``.

Both are positively homogeneous and shift-equivariant in value
(``magnify(c x + b) = c magnify(x) + b`` for ``c > 0``), so one model serves
8-bit, 16-bit and float data without rescaling.
"""

from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import json
import math
import os
import tempfile
import warnings
from importlib import resources

import numba
import numpy as np
import scipy.sparse
from sklearn.base import BaseEstimator
from threadpoolctl import threadpool_limits

from .. import _version
from ..enums import Degradation, Method
from ..errors import InputError, ModelError, NotFittedError, ParameterError
from .nodata import FILL_DISTANCE, fill_invalid
from .features import (
    FEATURE_RADIUS,
    PATCH_REACH,
    canvas_average,
    detail_patches,
    lowres_windows,
    overlap_add,
    overlap_average,
    overlap_canvas,
    pca_basis,
    raw_feature_kernel,
)
from .resample import (
    UPSCALE_MARGIN,
    check_scale,
    degradation_margin,
    degrade_valid,
    rescale,
    upscale_valid,
    _check_sigma,
)
from .sparse import ksvd, omp_codes

__all__ = [
    "CoupledDictionary",
    "PairSample",
    "model_sha256",
]


#: Centres processed at once when magnifying; bounds the working memory.
_STRIP_CENTRES = 1 << 16

#: Relative feature norm under which a training patch counts as flat.
_FLAT_FRACTION = 0.02

#: Index of the centre pixel in a flattened feature window.
_CENTRE = ((2 * FEATURE_RADIUS + 1) ** 2) // 2

#: Shrink factor of the extra training copies (0.98**k, k = 0 .. copies - 1).
_RESCALE_STEP = 0.98

#: Side, in low-res cells, of the dense training tiles of ``high_fit="image"``.
_TILE_CELLS = 24

#: Conjugate-gradient iterations of the image-level high-res dictionary.
_IMAGE_FIT_ITERATIONS = 30

#: Parameters added after format version 1, written to model files only when
#: they differ from these defaults (older files and checksums stay valid).
_LATER_PARAMS = {"high_fit": "patch"}


@dataclasses.dataclass
class PairSample:
    """Training pairs collected from one high-res image or window.

    Attributes
    ----------
    windows : ndarray, shape (n, (2*FEATURE_RADIUS + 1)**2), float32
        Low-res windows around each patch centre (the features are a fixed
        linear map of them).
    details : ndarray, shape (n, (3*scale)**2), float32
        High-res detail patches ``y_h - y_l``.
    scale : int
    n_images : int
        How many source images the sample came from.
    tiles : list of (ndarray, ndarray)
        Only for ``high_fit="image"``: dense tiles of ``t x t`` low-res cells,
        each as the windows of its ``(t + 2)**2`` patch centres (row-major,
        one ring outside the tile) and its detail image ``(s*t, s*t)``.
    """

    windows: np.ndarray
    details: np.ndarray
    scale: int
    n_images: int = 1
    tiles: list = dataclasses.field(default_factory=list)

    @property
    def tile_cells(self):
        """Low-res cells covered by the tiles."""
        return sum(d.shape[0] * d.shape[1] for _, d in self.tiles) // self.scale**2

    def __len__(self):
        return len(self.windows)


def _subset_tiles(tiles, scale, max_cells, rng):
    """A seeded random subset of tiles covering at most ``max_cells`` cells."""
    cells = [d.shape[0] * d.shape[1] // scale**2 for _, d in tiles]
    if sum(cells) <= max_cells:
        return list(tiles)
    keep, total = [], 0
    for i in rng.permutation(len(tiles)):
        if total + cells[i] <= max_cells:
            keep.append(i)
            total += cells[i]
    return [tiles[i] for i in sorted(keep)]

def _rng(random_state):
    if isinstance(random_state, np.random.Generator):
        return random_state
    if isinstance(random_state, np.random.RandomState):
        return np.random.default_rng(random_state.randint(0, 2**31 - 1))
    return np.random.default_rng(random_state)


def _work_dtype(a):
    return np.dtype(np.float32) if a.dtype == np.float32 else np.dtype(np.float64)


def _check_int(value, name, low, high=None):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise ParameterError(f"The {name!r} parameter must be an integer, got {value!r}")
    if value < low or (high is not None and value > high):
        bound = f"from {low} to {high}" if high is not None else f"of at least {low}"
        raise ParameterError(f"The {name!r} parameter must be an integer {bound}, got {value!r}")
    return int(value)


def _check_float(value, name, low, high, low_open=False):
    try:
        v = float(value)
    except (TypeError, ValueError):
        v = float("nan")
    ok = math.isfinite(v) and (v > low if low_open else v >= low) and v <= high
    if not ok or isinstance(value, bool):
        op = "greater than" if low_open else "at least"
        raise ParameterError(
            f"The {name!r} parameter must be a number {op} {low} and at most {high}, got {value!r}"
        )
    return v


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


#: Relative bound, in units of the feature norm, under which two float32
#: correlations with unit atoms may be misordered; about 50 times the
#: worst-case rounding of a 30-term float32 dot product (Higham 2002, eq. 3.5).
_ANCHOR_TOLERANCE = 1e-4


def _nearest_anchors(features, dictionary_low):
    """Index of the atom of largest absolute correlation with each feature.

    The choice of ``argmax`` / ``argmin`` of ``features @ D_l`` taken in
    float64 (the first index wins a tie, and a positive correlation wins
    against a negative one of equal size). One compiled pass per feature
    computes its correlations in float32 (kept in cache, never written out);
    the atoms within :data:`_ANCHOR_TOLERANCE` of the best are compared again
    in float64, so the answer is the float64 one.
    """
    f64 = np.ascontiguousarray(features, dtype=np.float64)
    atoms32 = np.ascontiguousarray(dictionary_low, dtype=np.float32)  # (d, k)
    atoms64 = np.ascontiguousarray(dictionary_low.T, dtype=np.float64)  # (k, d)
    anchors = np.empty(len(f64), dtype=np.int64)
    _anchor_kernel(f64, atoms32, atoms64, _ANCHOR_TOLERANCE, anchors)
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


def _apply_projections(features, anchors, projections):
    """Patches ``P_a f`` for features (n, d) and their anchors, grouped by anchor."""
    dtype = features.dtype
    proj = projections.astype(dtype, copy=False)
    out = np.empty((len(features), proj.shape[1]), dtype=dtype)
    order = np.argsort(anchors, kind="stable")
    bounds = np.searchsorted(anchors[order], np.arange(proj.shape[0] + 1))
    with threadpool_limits(limits=1, user_api="blas"):
        for j in np.flatnonzero(np.diff(bounds)):
            sel = order[bounds[j] : bounds[j + 1]]
            out[sel] = features[sel] @ proj[j].T
    return out

class CoupledDictionary(BaseEstimator):
    """Magnify 2-D images by an integer factor with a learned sparse prior.

    Parameters
    ----------
    scale : int
        Magnification factor, 2 to 8.
    method : {"sparse", "anchored"}
        ``"sparse"``: OMP over coupled K-SVD dictionaries; ``"anchored"``:
        anchored neighbourhood regression (A+), faster and sharper.
    n_atoms : int
        Dictionary size (anchors for ``"anchored"``).
    sparsity : int
        Atoms per patch in OMP (training and the sparse path).
    n_iter : int
        K-SVD iterations; 0 keeps the initial dictionary of training features.
    degradation : {"bicubic", "gaussian", "area"}
        The model that turns high-res training images into low-res ones; it
        should describe how the data to magnify was formed.
    sigma : float, optional
        Gaussian point-spread width in high-res pixels (``"gaussian"`` only).
    max_samples : int
        At most this many training pairs are used (a seeded random subset).
    energy : float
        Fraction of the feature energy the PCA keeps.
    neighbours : int
        Training features per anchor (``"anchored"``).
    ridge : float
        Ridge weight of the anchored regressions.
    rescaled_copies : int
        Training copies of each in-memory reference rescaled by 0.98**k,
        k = 0 .. rescaled_copies - 1 (1 means the reference only).
    high_fit : {"patch", "image"}
        How ``"sparse"`` learns its high-res dictionary: ``"patch"`` by least
        squares on the training patches; ``"image"`` then refines it by
        conjugate gradients so that the overlap-averaged reconstruction of
        dense training tiles matches their detail (the averaging that
        magnification applies is part of the fit).
    random_state : int, numpy Generator or None
        Seed for sample selection and K-SVD.

    Attributes
    ----------
    feature_kernel_ : ndarray, shape (n_features, (2*FEATURE_RADIUS + 1)**2)
        The PCA-projected feature operator on low-res windows.
    pca_eigenvalues_ : ndarray, shape (n_features,)
    dictionary_low_ : ndarray, shape (n_features, n_atoms)
        Unit-norm low-res atoms.
    dictionary_high_ : ndarray, shape ((3*scale)**2, n_atoms)
        High-res detail atoms (``"sparse"``).
    projections_ : ndarray, shape (n_atoms, (3*scale)**2, n_features)
        Anchored regressions (``"anchored"``).
    training_ : dict
        Provenance of the training (image and sample counts, degradation).
    sha256_ : str
        Checksum of the learned arrays, as written in the model file.
    """

    def __init__(
        self,
        scale=3,
        method="sparse",
        n_atoms=1000,
        sparsity=3,
        n_iter=40,
        degradation="bicubic",
        sigma=None,
        max_samples=100_000,
        energy=0.999,
        neighbours=2048,
        ridge=0.1,
        rescaled_copies=1,
        high_fit="patch",
        random_state=0,
    ):
        self.scale = scale
        self.method = method
        self.n_atoms = n_atoms
        self.sparsity = sparsity
        self.n_iter = n_iter
        self.degradation = degradation
        self.sigma = sigma
        self.max_samples = max_samples
        self.energy = energy
        self.neighbours = neighbours
        self.ridge = ridge
        self.rescaled_copies = rescaled_copies
        self.high_fit = high_fit
        self.random_state = random_state

    # ------------------------------------------------------------------ checks
    def _validate_params(self):
        """Check every parameter and return them normalised in a dict."""
        p = {}
        p["scale"] = check_scale(self.scale)
        p["method"] = Method.parse(self.method, "method")
        p["n_atoms"] = _check_int(self.n_atoms, "n_atoms", 2, 100_000)
        p["sparsity"] = _check_int(self.sparsity, "sparsity", 1, 64)
        p["n_iter"] = _check_int(self.n_iter, "n_iter", 0, 1000)
        p["degradation"] = Degradation.parse(self.degradation, "degradation")
        p["sigma"] = _check_sigma(p["scale"], p["degradation"], self.sigma)
        p["max_samples"] = _check_int(self.max_samples, "max_samples", 10)
        p["energy"] = _check_float(self.energy, "energy", 0.0, 1.0, low_open=True)
        p["neighbours"] = _check_int(self.neighbours, "neighbours", 1)
        p["ridge"] = _check_float(self.ridge, "ridge", 0.0, 1e6, low_open=True)
        p["rescaled_copies"] = _check_int(self.rescaled_copies, "rescaled_copies", 1, 64)
        if self.high_fit not in ("patch", "image"):
            raise ParameterError(
                f"The 'high_fit' parameter must be 'patch' or 'image', got {self.high_fit!r}"
            )
        if self.high_fit == "image" and p["method"] is not Method.SPARSE:
            raise ParameterError(
                "The 'high_fit' parameter 'image' applies to the sparse method only, got "
                f"method={str(p['method'])!r}"
            )
        p["high_fit"] = self.high_fit
        return p

    def _check_fitted(self):
        if not hasattr(self, "feature_kernel_"):
            raise NotFittedError(
                "This CoupledDictionary is not fitted yet; call fit() or load a model file first"
            )

    @property
    def _scale(self):
        return check_scale(self.scale)

    # ----------------------------------------------------------------- context
    def context_radius(self, consistency=False, masked=False):
        """Low-res pixels of context one output block needs on each side.

        Parameters
        ----------
        consistency : bool
            Whether measurement consistency will be enforced.
        masked : bool
            Whether some input pixels are invalid (they are filled first).

        Returns
        -------
        int
            The radius R: the output of a window depends on input pixels at
            most R low-res pixels away from it. It is the feature radius plus
            one ring of patch centres, plus the fill distance when masked,
            plus the reach of the consistency step.
        """
        radius = FEATURE_RADIUS + PATCH_REACH
        if masked:
            radius += FILL_DISTANCE
        if consistency:
            radius += self._consistency_reach()
        return radius

    def _consistency_reach(self):
        p_scale = self._scale
        deg = Degradation.parse(self.degradation, "degradation")
        if deg is Degradation.AREA:
            return 0
        left, right = degradation_margin(p_scale, deg, self.sigma)
        cells = math.ceil(max(left, right) / p_scale)
        # Each step reads the degradation support and the interpolation margin
        # around what it corrects; the last ring measures the final residual.
        return _CONSISTENCY_STEPS * (UPSCALE_MARGIN + cells) + cells

    def training_halo(self):
        """High-res pixels of context per side that :meth:`collect_pairs` needs.

        A multiple of the scale: the degradation support plus the feature
        radius, so that features near a window edge are those the whole
        image would give.
        """
        s = self._scale
        deg = Degradation.parse(self.degradation, "degradation")
        margin = max(degradation_margin(s, deg, _check_sigma(s, deg, self.sigma)))
        return s * (FEATURE_RADIUS + math.ceil(margin / s))

    # ---------------------------------------------------------------- training
    def collect_pairs(self, hr_block, halo, valid=None, max_pairs=None, random_state=None):
        """Collect training pairs from a high-res window with context.

        Parameters
        ----------
        hr_block : ndarray, shape (rows + 2*halo, cols + 2*halo)
            High-res reference window with ``halo`` pixels of real context on
            each side (symmetric extension where it leaves the image).
            ``rows`` and ``cols`` are cropped down to multiples of the scale.
        halo : int
            At least :meth:`training_halo`.
        valid : ndarray of bool, same shape, optional
            Measured pixels; patches whose context touches an invalid pixel
            are skipped, and so are non-finite pixels.
        max_pairs : int, optional
            Keep at most this many pairs (a seeded random subset).
        random_state : int, Generator or None
            Defaults to the model's ``random_state``.

        Returns
        -------
        PairSample
            Values are divided by the standard deviation of the valid
            interior so that references of any dynamic range weigh alike.
        """
        p = self._validate_params()
        s = p["scale"]
        need = self.training_halo()
        block = np.asarray(hr_block)
        if block.ndim != 2:
            raise InputError(f"The training block must be a 2-D array, got shape {block.shape}")
        halo = _check_int(halo, "halo", need)
        if valid is None:
            valid = np.ones(block.shape, dtype=bool)
        valid = np.asarray(valid, dtype=bool)
        if valid.shape != block.shape:
            raise InputError(
                f"The valid mask must have the block's shape {block.shape}, got {valid.shape}"
            )
        rng = _rng(self.random_state if random_state is None else random_state)
        block = block.astype(np.float64)
        valid = valid & np.isfinite(block)
        # Candidate centres per copy: enough to keep max_pairs after the flat ones go.
        budget = None if max_pairs is None else 3 * int(max_pairs) // p["rescaled_copies"] + 1
        samples = [self._pairs_from_block(block, halo, valid, p, budget, rng)]
        for k in range(1, p["rescaled_copies"]):
            factor = _RESCALE_STEP**k
            inner = block[halo:-halo, halo:-halo]
            inner_valid = valid[halo:-halo, halo:-halo]
            small = rescale(np.where(inner_valid, inner, 0.0), factor)
            small_valid = rescale(inner_valid.astype(np.float64), factor) > 0.999
            if min(small.shape) < 4 * s:
                break
            small_block = np.pad(small, need, mode="symmetric")
            small_valid = np.pad(small_valid, need, mode="symmetric")
            samples.append(self._pairs_from_block(small_block, need, small_valid, p, budget, rng))
        windows = np.concatenate([w for w, _, _ in samples])
        details = np.concatenate([d for _, d, _ in samples])
        tiles = [t for _, _, ts in samples for t in ts]
        if max_pairs is not None and len(windows) > max_pairs:
            keep = np.sort(rng.choice(len(windows), size=int(max_pairs), replace=False))
            windows, details = windows[keep], details[keep]
        if max_pairs is not None:
            tiles = _subset_tiles(tiles, s, int(max_pairs), rng)
        return PairSample(windows, details, s, 1, tiles)

    def _pairs_from_block(self, block, halo, valid, p, budget, rng):
        s = p["scale"]
        r = FEATURE_RADIUS
        margin_cells = halo // s - r
        rows = (block.shape[0] - 2 * halo) // s
        cols = (block.shape[1] - 2 * halo) // s
        n_raw = (2 * r + 1) ** 2
        empty = (np.empty((0, n_raw), np.float32), np.empty((0, (3 * s) ** 2), np.float32), [])
        if rows < 3 or cols < 3:
            return empty
        # Keep whole cells: the interior starts at halo and spans rows*s.
        ext = slice(halo - s * (r + margin_cells), halo + s * (rows + r + margin_cells))
        block = block[ext, ext.start : halo + s * (cols + r + margin_cells)]
        valid = valid[ext, ext.start : halo + s * (cols + r + margin_cells)]
        inner = (slice(s * (r + margin_cells), s * (r + margin_cells + rows)),
                 slice(s * (r + margin_cells), s * (r + margin_cells + cols)))
        good = valid[inner]
        if good.sum() < 2:
            return empty
        spread = float(block[inner][good].std())
        if not spread > 0:
            return empty
        block = np.where(valid, block, 0.0) / spread
        lr = degrade_valid(block, s, p["degradation"], p["sigma"], s * margin_cells)
        # lr covers cells -r .. rows + r - 1.
        m = UPSCALE_MARGIN
        y_l = upscale_valid(lr[r - m : r + rows + m, r - m : r + cols + m], s, m)
        detail = block[inner] - y_l
        # A cell is unusable if any high-res pixel its degradation reads is invalid.
        from scipy.ndimage import maximum_filter

        left, right = degradation_margin(s, p["degradation"], p["sigma"])
        bad_hr = ~valid
        # Centred at a cell's first pixel, this window covers every pixel it reads.
        bad_hr = maximum_filter(bad_hr, size=2 * (max(left, right) + s) + 1, mode="nearest")
        bad_lr = bad_hr[s * margin_cells :: s, s * margin_cells :: s][: rows + 2 * r, : cols + 2 * r]
        bad_centre = maximum_filter(bad_lr.astype(np.uint8), size=2 * r + 1, mode="nearest")[
            r : r + rows, r : r + cols
        ].astype(bool)
        all_windows = lowres_windows(lr)  # one row per cell 0..rows-1 x 0..cols-1
        tiles = []
        if p["high_fit"] == "image":
            tiles = self._tiles_from_block(all_windows, detail, bad_centre, rows, cols, s, budget, rng)
        ci, cj = np.meshgrid(np.arange(1, rows - 1), np.arange(1, cols - 1), indexing="ij")
        ci, cj = ci.ravel(), cj.ravel()
        keep = ~bad_centre[ci, cj]
        ci, cj = ci[keep], cj[keep]
        if budget is not None and len(ci) > budget:
            pick = np.sort(rng.choice(len(ci), size=budget, replace=False))
            ci, cj = ci[pick], cj[pick]
        if len(ci) == 0:
            return empty[0], empty[1], tiles
        windows = all_windows[ci * cols + cj]
        kernel = raw_feature_kernel(s)
        gram = kernel.T @ kernel
        norms = np.sqrt(np.maximum(np.sum((windows @ gram) * windows, axis=1), 0.0))
        textured = norms > _FLAT_FRACTION * norms.mean() if norms.mean() > 0 else norms > 0
        windows = windows[textured]
        details = detail_patches(detail, s, ci[textured], cj[textured])
        return windows.astype(np.float32), details.astype(np.float32), tiles

    @staticmethod
    def _tiles_from_block(all_windows, detail, bad_centre, rows, cols, s, budget, rng):
        """Dense tiles (windows of every centre, detail image) of a block.

        Tiles sit on a grid of step ``_TILE_CELLS`` (smaller blocks give one
        smaller tile); a tile is kept only when none of its centres, the ring
        outside it included, touches an invalid pixel.
        """
        t = min(_TILE_CELLS, rows - 2, cols - 2)
        if t < 4:
            return []
        windows = all_windows.reshape(rows, cols, -1)
        tiles = []
        # Tile cells c0 .. c0 + t - 1 with centres c0 - 1 .. c0 + t inside the block.
        for r0 in range(1, rows - t, t):
            for c0 in range(1, cols - t, t):
                if bad_centre[r0 - 1 : r0 + t + 1, c0 - 1 : c0 + t + 1].any():
                    continue
                w = windows[r0 - 1 : r0 + t + 1, c0 - 1 : c0 + t + 1].reshape((t + 2) ** 2, -1)
                d = detail[s * r0 : s * (r0 + t), s * c0 : s * (c0 + t)]
                tiles.append((w.astype(np.float32), d.astype(np.float32)))
        if budget is not None:
            tiles = _subset_tiles(tiles, s, int(budget), rng)
        return tiles

    def fit(self, images, valid=None):
        """Learn the dictionaries from high-res training images.

        Parameters
        ----------
        images : sequence of ndarray, each shape (rows, cols)
            High-res references (any real dtype); each is cropped to a
            multiple of the scale. Bootstrapping from a scene is
            ``fit([scene])`` followed by ``magnify(scene)``.
        valid : sequence of bool ndarray, optional
            Measured pixels of each image.

        Returns
        -------
        self
        """
        p = self._validate_params()
        if isinstance(images, np.ndarray) and images.ndim == 2:
            raise InputError(
                "The 'images' parameter must be a sequence of 2-D arrays, got one 2-D array; "
                "pass [image]"
            )
        images = list(images)
        if not images:
            raise InputError("The 'images' parameter must hold at least one image, got none")
        if valid is not None:
            valid = list(valid)
            if len(valid) != len(images):
                raise InputError(
                    f"The 'valid' parameter must hold one mask per image ({len(images)}), "
                    f"got {len(valid)}"
                )
        rng = _rng(self.random_state)
        halo = self.training_halo()
        per_image = max(1, int(math.ceil(p["max_samples"] * 1.5 / len(images))))
        samples = []
        for n, image in enumerate(images):
            image = np.asarray(image)
            if image.ndim != 2 or not np.issubdtype(image.dtype, np.number) or np.iscomplexobj(image):
                raise InputError(
                    f"Training image {n} must be a 2-D real array, got shape {image.shape} "
                    f"and dtype {image.dtype}"
                )
            mask = None if valid is None else np.asarray(valid[n], dtype=bool)
            rows = image.shape[0] - image.shape[0] % p["scale"]
            cols = image.shape[1] - image.shape[1] % p["scale"]
            image = image[:rows, :cols]
            if mask is not None:
                mask = np.pad(mask[:rows, :cols], halo, mode="symmetric")
            block = np.pad(image.astype(np.float64), halo, mode="symmetric")
            samples.append(self.collect_pairs(block, halo, mask, per_image, rng))
        return self.fit_pairs(samples)

    def fit_pairs(self, samples):
        """Learn the dictionaries from collected training pairs.

        Parameters
        ----------
        samples : sequence of PairSample
            From :meth:`collect_pairs`, all at this model's scale.

        Returns
        -------
        self
        """
        p = self._validate_params()
        samples = list(samples)
        for smp in samples:
            if smp.scale != p["scale"]:
                raise InputError(
                    f"Training pairs must be collected at scale {p['scale']}, got scale {smp.scale}"
                )
        n_images = sum(smp.n_images for smp in samples)
        windows = np.concatenate([smp.windows for smp in samples]) if samples else np.empty((0, 81))
        details = np.concatenate([smp.details for smp in samples]) if samples else np.empty((0, 1))
        tiles = [t for smp in samples for t in smp.tiles]
        rng = _rng(self.random_state)
        if len(windows) > p["max_samples"]:
            keep = np.sort(rng.choice(len(windows), size=p["max_samples"], replace=False))
            windows, details = windows[keep], details[keep]
        n = len(windows)
        if n < max(2 * p["n_atoms"], 50):
            raise InputError(
                f"Training needs at least {max(2 * p['n_atoms'], 50)} textured patches for "
                f"{p['n_atoms']} atoms, got {n}; give more or larger references, or fewer atoms"
            )
        s = p["scale"]
        raw = raw_feature_kernel(s)
        w64 = windows.astype(np.float64)
        cov = raw @ (w64.T @ w64) @ raw.T
        basis, eigenvalues = pca_basis(cov, p["energy"])
        kernel = basis.T @ raw  # (d, window size)
        features = (windows @ kernel.T.astype(np.float32)).astype(np.float32)
        details = details.astype(np.float32)
        dictionary, info = ksvd(
            features.T, p["n_atoms"], p["sparsity"], p["n_iter"], random_state=rng
        )
        dictionary = np.asarray(dictionary, dtype=np.float32)
        for name in ("dictionary_high_", "projections_"):
            if hasattr(self, name):
                delattr(self, name)
        n_tile_cells = kept = 0
        if p["method"] is Method.SPARSE:
            high = self._fit_high_dictionary(dictionary, features, details, p)
            if p["high_fit"] == "image":
                tiles = _subset_tiles(tiles, s, p["max_samples"], rng)
                if not tiles:
                    raise InputError(
                        "The image-level fit (high_fit='image') needs dense tiles of "
                        f"{_TILE_CELLS} x {_TILE_CELLS} valid low-res cells, got none; give larger "
                        "references or use high_fit='patch'"
                    )
                n_tile_cells = sum(d.size for _, d in tiles) // s**2
                high, kept = _refine_high_dictionary(
                    high, dictionary, kernel.astype(np.float32), tiles, p["sparsity"], s
                )
            self.dictionary_high_ = high
        else:
            self.projections_ = self._fit_projections(dictionary, features, details, p)
        self.feature_kernel_ = kernel.astype(np.float32)
        self.pca_eigenvalues_ = eigenvalues.astype(np.float32)
        self.dictionary_low_ = dictionary
        self.training_ = {
            "n_images": int(n_images),
            "n_samples": int(n),
            "n_features": int(kernel.shape[0]),
            "degradation": str(p["degradation"]),
            "sigma": p["sigma"],
            "rescaled_copies": p["rescaled_copies"],
            "ksvd_iterations": int(info.get("n_iter", p["n_iter"])) if isinstance(info, dict) else p["n_iter"],
        }
        if p["high_fit"] == "image":
            self.training_["image_fit_cells"] = int(n_tile_cells)
            self.training_["image_fit_iterations"] = int(kept)
        self.sha256_ = model_sha256(self._arrays(), self._header_params())
        return self

    @staticmethod
    def _fit_high_dictionary(dictionary, features, details, p):
        """Least-squares high-res atoms: D_h = P_h A^T (A A^T)^-1."""
        idx, coef = omp_codes(dictionary, features.T, p["sparsity"])
        n, k = idx.shape
        codes = scipy.sparse.csc_matrix(
            (coef.ravel().astype(np.float64), (idx.ravel(), np.repeat(np.arange(n), k))),
            shape=(dictionary.shape[1], n),
        )
        gram = (codes @ codes.T).toarray()
        rhs = (codes @ details.astype(np.float64)).T  # (patch, atoms)
        reg = 1e-6 * max(np.trace(gram) / len(gram), 1e-12)
        gram[np.diag_indices_from(gram)] += reg
        high = np.linalg.solve(gram, rhs.T).T
        return high.astype(np.float32)

    @staticmethod
    def _fit_projections(dictionary, features, details, p):
        """Ridge regressions anchored at every atom (A+)."""
        norms = np.linalg.norm(features, axis=1)
        norms[norms == 0] = 1.0
        fn = features / norms[:, None]
        dn = details / norms[:, None]
        n_atoms = dictionary.shape[1]
        d = features.shape[1]
        k = min(p["neighbours"], len(features))
        projections = np.empty((n_atoms, details.shape[1], d), dtype=np.float32)
        eye = p["ridge"] * np.eye(d)
        block = max(1, (1 << 25) // max(len(features), 1))
        for a0 in range(0, n_atoms, block):
            atoms = dictionary[:, a0 : a0 + block]
            corr = np.abs(atoms.T @ fn.T)  # (block, n)
            if k < corr.shape[1]:
                near = np.argpartition(-corr, k - 1, axis=1)[:, :k]
            else:
                near = np.broadcast_to(np.arange(corr.shape[1]), corr.shape)
            with threadpool_limits(limits=1, user_api="blas"):
                for j in range(atoms.shape[1]):
                    nl = fn[near[j]].astype(np.float64)  # (k, d)
                    nh = dn[near[j]].astype(np.float64)  # (k, patch)
                    # P = N_h N_l^T (N_l N_l^T + ridge I)^-1: the d x d form of the ridge
                    # solution N_h (N_l^T N_l + ridge I)^-1 N_l^T (push-through identity).
                    projections[a0 + j] = np.linalg.solve(nl.T @ nl + eye, nl.T @ nh).T
        return projections

    # ------------------------------------------------------------- magnifying
    def magnify(self, image, valid=None, *, consistency=False, ensemble=False):
        """Magnify a whole 2-D image.

        Parameters
        ----------
        image : ndarray, shape (h, w)
            Low-res image, any real dtype. Non-finite pixels are invalid.
        valid : ndarray of bool, shape (h, w), optional
            Measured pixels; invalid ones never influence valid outputs.
        consistency : bool
            Enforce that degrading the output reproduces the input.
        ensemble : bool
            Average over the eight flips and rotations.

        Returns
        -------
        ndarray, shape (scale*h, scale*w)
            float32 for float32 input, float64 otherwise; NaN under invalid
            input pixels (magnified by nearest neighbour).
        """
        self._check_fitted()
        image = self._check_image(image, "image")
        s = self._scale
        valid = self._valid_mask(image, valid)
        masked = valid is not None and not valid.all()
        r = self.context_radius(consistency=consistency, masked=masked)
        block = np.pad(image, r, mode="symmetric")
        vblock = None if valid is None else np.pad(valid, r, mode="symmetric")
        out = self.magnify_block(block, r, vblock, consistency=consistency, ensemble=ensemble)
        if valid is not None and not valid.all():
            hr_valid = np.repeat(np.repeat(valid, s, axis=0), s, axis=1)
            out[~hr_valid] = np.nan
        return out

    @staticmethod
    def _check_image(image, name):
        image = np.asarray(image)
        if image.ndim != 2:
            raise InputError(f"The {name!r} must be a 2-D array, got shape {image.shape}")
        if image.size == 0:
            raise InputError(f"The {name!r} must not be empty, got shape {image.shape}")
        if not np.issubdtype(image.dtype, np.number) or np.iscomplexobj(image):
            raise InputError(f"The {name!r} must hold real numbers, got dtype {image.dtype}")
        return image

    @staticmethod
    def _valid_mask(image, valid):
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

    def magnify_block(self, block, halo, valid=None, *, consistency=False, ensemble=False,
                      return_residual=False):
        """Magnify one window that carries its own context.

        Parameters
        ----------
        block : ndarray, shape (h + 2*halo, w + 2*halo)
            The low-res window plus ``halo`` pixels of context on each side;
            outside the image the context is the symmetric extension of what
            was read.
        halo : int
            At least :meth:`context_radius` for the same options (with
            ``masked=True`` when ``valid`` marks invalid pixels).
        valid : ndarray of bool, same shape, optional
            Measured pixels.
        consistency, ensemble : bool
            As in :meth:`magnify`.
        return_residual : bool
            Also return the consistency residual (needs ``consistency``).

        Returns
        -------
        out : ndarray, shape (scale*h, scale*w)
            Exactly the part of ``magnify(whole_image)`` that covers the
            window, to float rounding. Values under invalid pixels are
            meaningless.
        residual : ndarray, shape (h, w)
            Only with ``return_residual``: ``degrade(output) - input`` on the
            window's low-res cells, degrading the whole-image output (the
            context makes it exact at the window's edges). Meaningless at
            invalid pixels.
        """
        if return_residual and not consistency:
            raise ParameterError(
                "The 'return_residual' parameter needs consistency=True, got consistency=False"
            )
        block, need, dtype, h, w = self._prepare_block(block, halo, valid, consistency)
        if block is None:
            out = np.zeros((self._scale * h, self._scale * w), dtype=dtype)
            return (out, np.zeros((h, w), dtype=dtype)) if return_residual else out
        if not ensemble:
            out, residual = self._magnify_padded(block, need, consistency)
            return (out, residual) if return_residual else out
        acc = res_acc = None
        for k in range(8):
            out, residual = self._magnify_padded(_dihedral(block, k), need, consistency)
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

    def _prepare_block(self, block, halo, valid, consistency):
        """Checked, cropped and filled block with the halo the options need.

        Returns ``(block, need, dtype, h, w)``; ``block`` is None when no
        pixel of the window is valid.
        """
        self._check_fitted()
        block = self._check_image(block, "block")
        dtype = _work_dtype(block)
        block = block.astype(dtype, copy=False)
        valid = self._valid_mask(block, valid)
        masked = valid is not None and not valid.all()
        need = self.context_radius(consistency=consistency, masked=masked)
        halo = _check_int(halo, "halo", 0)
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

    def interpolate_block(self, block, halo, valid=None, *, consistency=False):
        """The interpolation that :meth:`magnify_block` adds its detail to.

        Parameters
        ----------
        block, halo, valid, consistency :
            As in :meth:`magnify_block` (``consistency`` only decides the
            halo the block must carry).

        Returns
        -------
        ndarray, shape (scale*h, scale*w)
            Bicubic interpolation of the window (invalid pixels filled the
            same way as for magnifying); the detail of ``magnify_block`` is
            its output minus this.
        """
        block, need, dtype, h, w = self._prepare_block(block, halo, valid, consistency)
        if block is None:
            return np.zeros((self._scale * h, self._scale * w), dtype=dtype)
        m = UPSCALE_MARGIN
        crop = need - m
        return upscale_valid(block[crop : block.shape[0] - crop, crop : block.shape[1] - crop],
                             self._scale, m)

    def interpolate(self, image, valid=None):
        """The interpolation that :meth:`magnify` adds its detail to.

        Parameters
        ----------
        image : ndarray, shape (h, w)
        valid : ndarray of bool, shape (h, w), optional

        Returns
        -------
        ndarray, shape (scale*h, scale*w)
            float32 for float32 input, float64 otherwise.
        """
        self._check_fitted()
        image = self._check_image(image, "image")
        valid = self._valid_mask(image, valid)
        masked = valid is not None and not valid.all()
        r = self.context_radius(masked=masked)
        block = np.pad(image, r, mode="symmetric")
        vblock = None if valid is None else np.pad(valid, r, mode="symmetric")
        return self.interpolate_block(block, r, vblock)

    def _magnify_padded(self, block, halo, consistency):
        """Magnify a block whose halo is exactly what the options need.

        Returns the output and, with ``consistency``, its residual (else None).
        """
        s = self._scale
        dtype = block.dtype
        reach = self._consistency_reach() if consistency else 0
        # The detail step produces the window plus ``reach`` cells of margin.
        inner = halo - reach
        base = FEATURE_RADIUS + PATCH_REACH
        h = block.shape[0] - 2 * inner
        w = block.shape[1] - 2 * inner
        core = block[inner - base : inner - base + h + 2 * base, inner - base : inner - base + w + 2 * base]
        out = self._synthesize(core, h, w, dtype)
        if not consistency:
            return out, None
        return self._make_consistent(out, block[inner:-inner or None, inner:-inner or None])

    def _synthesize(self, core, h, w, dtype):
        """Interpolation plus averaged detail for a core of halo FEATURE_RADIUS + 1."""
        s = self._scale
        r = FEATURE_RADIUS
        base = r + PATCH_REACH
        m = UPSCALE_MARGIN
        y_l = upscale_valid(core[base - m : base + h + m, base - m : base + w + m], s, m)
        # Centres -1 .. h need windows of radius r: rows base-1-r .. base+h+r.
        lr = core[base - 1 - r : base + h + 1 + r, base - 1 - r : base + w + 1 + r]
        kernel = self.feature_kernel_.astype(dtype, copy=False)
        canvas = overlap_canvas(h, w, s, dtype)
        wp = w + 2
        rows_per_strip = max(1, _STRIP_CENTRES // wp)
        size = 2 * r + 1
        for c0 in range(0, h + 2, rows_per_strip):
            c1 = min(h + 2, c0 + rows_per_strip)
            windows = lowres_windows(lr[c0 : c1 - 1 + size])
            if np.may_share_memory(windows, lr):  # a view, not the usual copy
                windows = windows.copy()
            # The kernel annihilates constants; removing the centre value makes
            # that exact in floating point (a constant image stays constant).
            windows -= windows[:, _CENTRE : _CENTRE + 1].copy()
            features = windows @ kernel.T
            patches = self._predict(features).reshape(c1 - c0, wp, -1)
            overlap_add(canvas, patches, c0)
        return y_l + canvas_average(canvas)

    def _predict(self, features):
        """Detail patches (n, (3s)**2) for features (n, d)."""
        dtype = features.dtype
        dl = self.dictionary_low_.astype(dtype, copy=False)
        if Method.parse(self.method, "method") is Method.SPARSE:
            dh = self.dictionary_high_.T.astype(dtype, copy=False)  # (atoms, patch)
            idx, coef = omp_codes(dl, features.T, _check_int(self.sparsity, "sparsity", 1, 64))
            out = coef[:, :1] * dh[idx[:, 0]]
            for t in range(1, idx.shape[1]):
                out += coef[:, t : t + 1] * dh[idx[:, t]]
            return out
        return _apply_projections(features, _nearest_anchors(features, dl), self.projections_)

    def _make_consistent(self, out, lr):
        """Back-project the degradation residual (see _CONSISTENCY_STEPS).

        ``out`` and ``lr`` cover the window plus the consistency reach on each
        side. Returns the corrected window and its final residual
        ``degrade(out) - lr`` on the window's cells.
        """
        s = self._scale
        deg = Degradation.parse(self.degradation, "degradation")
        sigma = _check_sigma(s, deg, self.sigma)
        if deg is Degradation.AREA:
            # Exact: adding each cell's error to its s x s block fixes its mean.
            resid = lr - out.reshape(lr.shape[0], s, lr.shape[1], s).mean(axis=(1, 3))
            out = out + np.repeat(np.repeat(resid, s, axis=0), s, axis=1)
            return out, out.reshape(lr.shape[0], s, lr.shape[1], s).mean(axis=(1, 3)) - lr
        left, right = degradation_margin(s, deg, sigma)
        mc = math.ceil(max(left, right) / s)
        m = UPSCALE_MARGIN
        per_step = m + mc

        def error(out, lr):
            # degrade(out) - lr on the cells whose degradation support out covers.
            return degrade_valid(out, s, deg, sigma, s * mc) - lr[mc : lr.shape[0] - mc, mc : lr.shape[1] - mc]

        for _ in range(_CONSISTENCY_STEPS):
            # Each step shrinks the covered area by the support it reads.
            corr = upscale_valid(-error(out, lr), s, m)
            out = out[s * per_step : out.shape[0] - s * per_step, s * per_step : out.shape[1] - s * per_step] + corr
            lr = lr[per_step : lr.shape[0] - per_step, per_step : lr.shape[1] - per_step]
        return out[s * mc : out.shape[0] - s * mc, s * mc : out.shape[1] - s * mc], error(out, lr)

    # ----------------------------------------------------------------- files
    def _arrays(self):
        self._check_fitted()
        arrays = {
            "feature_kernel": self.feature_kernel_,
            "pca_eigenvalues": self.pca_eigenvalues_,
            "dictionary_low": self.dictionary_low_,
        }
        if Method.parse(self.method, "method") is Method.SPARSE:
            arrays["dictionary_high"] = self.dictionary_high_
        else:
            arrays["projections"] = self.projections_
        return arrays

    def _header_params(self):
        params = self.get_params()
        for name, default in _LATER_PARAMS.items():
            if params.get(name) == default:
                del params[name]
        params = {k: (str(v) if isinstance(v, (Method, Degradation)) else v) for k, v in params.items()}
        if not isinstance(params.get("random_state"), (int, np.integer, type(None))):
            params["random_state"] = None
        elif params.get("random_state") is not None:
            params["random_state"] = int(params["random_state"])
        return params

    def _header(self):
        return {"params": self._header_params(), "training": self.training_, "sha256": self.sha256_}

    def save(self, path):
        """Write the model to an ``.npz`` file (see :func:`geosr.modelfile.save_models`)."""
        from ..modelfile import save_models

        save_models(path, [self])

    @classmethod
    def load(cls, path):
        """Read a model file holding one model (see :func:`geosr.modelfile.load_models`)."""
        from ..modelfile import load_models

        models = load_models(path)
        if len(models) != 1:
            raise ModelError(
                f"The model file {os.fspath(path)!r} must hold one model, got {len(models)} "
                "per-band models; use geosr.load_models()"
            )
        return models[0]


#: Back-projection steps of the consistency option (a fixed count keeps the
#: context radius, and so chunked output, exact).
_CONSISTENCY_STEPS = 8


def _refine_high_dictionary(high, dictionary, kernel, tiles, sparsity, scale,
                            n_iter=_IMAGE_FIT_ITERATIONS):
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
        See :class:`PairSample`.
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
    from numpy.lib.stride_tricks import sliding_window_view

    s = int(scale)
    n_atoms = dictionary.shape[1]
    codes, targets, sides = [], [], []
    for windows, detail in tiles:
        windows = windows - windows[:, _CENTRE : _CENTRE + 1]
        idx, coef = omp_codes(dictionary, (windows @ kernel.T).T, sparsity)
        n, k = idx.shape
        codes.append(scipy.sparse.csr_matrix(
            (coef.ravel().astype(np.float64), (idx.ravel(), np.repeat(np.arange(n), k))),
            shape=(n_atoms, n),
        ))
        targets.append(detail.astype(np.float64))
        sides.append(detail.shape[0] // s)

    def forward(x):
        # Magnification's detail for every tile: code, patch, overlap-average.
        xt = np.ascontiguousarray(x.T)
        return [overlap_average((a.T @ xt).reshape(t + 2, t + 2, -1), s)
                for a, t in zip(codes, sides)]

    def adjoint(images):
        # Transpose of forward: each centre's patch of residual / 9, coded back.
        g = np.zeros((n_atoms, (3 * s) ** 2))
        for a, t, r in zip(codes, sides, images):
            padded = np.pad(r / 9.0, 2 * s)
            patches = sliding_window_view(padded, (3 * s, 3 * s))[::s, ::s]
            g += a @ patches.reshape((t + 2) ** 2, -1)
        return g.T

    def inner(u, v):
        return float(sum(np.vdot(a, b) for a, b in zip(u, v)))

    # Every fifth tile is held out: the iterations stop where its loss is least
    # (early stopping; the overlapped fit is loosely determined and overfits).
    held = [n % 5 == 4 for n in range(len(codes))] if len(codes) >= 5 else [False] * len(codes)
    fit_idx = [n for n, h in enumerate(held) if not h] or list(range(len(codes)))
    check_idx = [n for n, h in enumerate(held) if h]
    fit_codes, fit_sides = [codes[n] for n in fit_idx], [sides[n] for n in fit_idx]
    fit_targets = [targets[n] for n in fit_idx]

    check_codes, check_sides = [codes[n] for n in check_idx], [sides[n] for n in check_idx]
    check_targets = [targets[n] for n in check_idx]
    codes, sides = fit_codes, fit_sides

    def check_loss(x):
        xt = np.ascontiguousarray(x.T)
        return sum(float(np.sum((e - overlap_average((a.T @ xt).reshape(t + 2, t + 2, -1), s)) ** 2))
                   for a, t, e in zip(check_codes, check_sides, check_targets))
    x = high.astype(np.float64)
    best, best_loss, kept = x.copy(), check_loss(x), 0
    resid = [e - f for e, f in zip(fit_targets, forward(x))]
    grad = adjoint(resid)
    direction = grad.copy()
    gamma = float(np.vdot(grad, grad))
    for it in range(1, int(n_iter) + 1):
        if gamma <= 1e-30:
            break
        q = forward(direction)
        qq = inner(q, q)
        if qq <= 0:
            break
        alpha = gamma / qq
        x += alpha * direction
        loss = check_loss(x)
        if loss < best_loss or not check_idx:
            best, best_loss, kept = x.copy(), loss, it
        elif check_idx:
            break
        resid = [r - alpha * qi for r, qi in zip(resid, q)]
        grad = adjoint(resid)
        gamma, previous = float(np.vdot(grad, grad)), gamma
        direction = grad + (gamma / previous) * direction
    return best.astype(np.float32), kept


# ------------------------------------------------------------- checksum
def model_sha256(arrays, params):
    """Checksum of a model's arrays and parameters (hand edits are detected)."""
    digest = hashlib.sha256()
    digest.update(json.dumps(params, sort_keys=True).encode())
    for name in sorted(arrays):
        a = np.ascontiguousarray(arrays[name])
        digest.update(name.encode())
        digest.update(str(a.dtype).encode())
        digest.update(str(a.shape).encode())
        digest.update(a.tobytes())
    return digest.hexdigest()
