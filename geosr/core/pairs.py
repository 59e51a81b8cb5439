"""Training pairs: low-res windows and the high-res detail patches they should give.

A high-res reference window (with real context around it) is degraded with
the model's degradation, interpolated back, and every textured low-res cell
away from invalid pixels gives one pair: the low-res window around it (its
features are a fixed linear map of that window) and the ``3s x 3s`` detail
patch ``y_h - y_l`` around it. For ``high_fit="image"`` the pairs also carry
dense tiles (every centre of a ``t x t`` block of cells and its detail image).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from .._validation import check_int
from ..enums import Degradation
from ..errors import InputError
from .features import FEATURE_RADIUS, detail_patches, lowres_windows, raw_feature_kernel
from .params import ModelParams
from .resample import (
    UPSCALE_MARGIN,
    degradation_margin,
    degrade_valid,
    rescale,
    upscale_valid,
)

__all__ = ["PairSample", "collect_pairs", "subset_tiles", "training_halo", "TILE_CELLS", "MIN_CELLS"]

#: Relative feature norm under which a training patch counts as flat.
_FLAT_FRACTION = 0.02

#: Shrink factor of the extra training copies (0.98**k, k = 0 .. copies - 1).
_RESCALE_STEP = 0.98

#: Side, in low-res cells, of the dense training tiles of ``high_fit="image"``.
TILE_CELLS = 24

#: Low-res cells a training window needs along each side: a patch centre and
#: the ring of cells around it. A window of fewer than ``MIN_CELLS * scale``
#: high-res pixels along a side gives no training pair.
MIN_CELLS = 3


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
    def tile_cells(self) -> int:
        """Low-res cells covered by the tiles."""
        return sum(d.shape[0] * d.shape[1] for _, d in self.tiles) // self.scale**2

    def __len__(self) -> int:
        return len(self.windows)


def training_halo(params: ModelParams) -> int:
    """High-res pixels of context per side that :func:`collect_pairs` needs.

    A multiple of the scale: the degradation support plus the feature
    radius, so that features near a window edge are those the whole image
    would give.
    """
    s = params.scale
    margin = max(degradation_margin(s, params.degradation, params.sigma))
    return s * (FEATURE_RADIUS + math.ceil(margin / s))


def subset_tiles(tiles: list, scale: int, max_cells: int, rng: np.random.Generator) -> list:
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


def collect_pairs(
    params: ModelParams,
    hr_block: np.ndarray,
    halo: object,
    valid: np.ndarray | None,
    max_pairs: int | None,
    rng: np.random.Generator,
) -> PairSample:
    """Training pairs of a high-res window with ``halo`` pixels of context.

    See :meth:`geosr.core.model.CoupledDictionary.collect_pairs`; ``rng``
    is the generator to draw the subsets from.
    """
    s = params.scale
    need = training_halo(params)
    block = np.asarray(hr_block)
    if block.ndim != 2:
        raise InputError(f"The training block must be a 2-D array, got shape {block.shape}")
    halo = check_int(halo, "halo", need)
    if valid is None:
        valid = np.ones(block.shape, dtype=bool)
    valid = np.asarray(valid, dtype=bool)
    if valid.shape != block.shape:
        raise InputError(
            f"The valid mask must have the block's shape {block.shape}, got {valid.shape}"
        )
    block = block.astype(np.float64)
    valid = valid & np.isfinite(block)
    # Candidate centres per copy: enough to keep max_pairs after the flat ones go.
    budget = None if max_pairs is None else 3 * int(max_pairs) // params.rescaled_copies + 1
    samples = [_pairs_from_block(params, block, halo, valid, budget, rng)]
    for k in range(1, params.rescaled_copies):
        factor = _RESCALE_STEP**k
        inner = block[halo:-halo, halo:-halo]
        inner_valid = valid[halo:-halo, halo:-halo]
        small = rescale(np.where(inner_valid, inner, 0.0), factor)
        small_valid = rescale(inner_valid.astype(np.float64), factor) > 0.999
        if min(small.shape) < 4 * s:
            break
        small_block = np.pad(small, need, mode="symmetric")
        small_valid = np.pad(small_valid, need, mode="symmetric")
        samples.append(_pairs_from_block(params, small_block, need, small_valid, budget, rng))
    windows = np.concatenate([w for w, _, _ in samples])
    details = np.concatenate([d for _, d, _ in samples])
    tiles = [t for _, _, ts in samples for t in ts]
    if max_pairs is not None and len(windows) > max_pairs:
        keep = np.sort(rng.choice(len(windows), size=int(max_pairs), replace=False))
        windows, details = windows[keep], details[keep]
    if max_pairs is not None:
        tiles = subset_tiles(tiles, s, int(max_pairs), rng)
    return PairSample(windows, details, s, 1, tiles)


def _pairs_from_block(params, block, halo, valid, budget, rng):
    """Windows, detail patches and tiles of one block (the original or a rescaled copy)."""
    s = params.scale
    r = FEATURE_RADIUS
    margin_cells = halo // s - r
    rows = (block.shape[0] - 2 * halo) // s
    cols = (block.shape[1] - 2 * halo) // s
    n_raw = (2 * r + 1) ** 2
    empty = (np.empty((0, n_raw), np.float32), np.empty((0, (3 * s) ** 2), np.float32), [])
    if rows < MIN_CELLS or cols < MIN_CELLS:
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
    lr = degrade_valid(block, s, params.degradation, params.sigma, s * margin_cells)
    # lr covers cells -r .. rows + r - 1.
    m = UPSCALE_MARGIN
    y_l = upscale_valid(lr[r - m : r + rows + m, r - m : r + cols + m], s, m)
    detail = block[inner] - y_l
    bad_centre = _bad_centres(valid, s, params.degradation, params.sigma, margin_cells, rows, cols)
    all_windows = lowres_windows(lr)  # one row per cell 0..rows-1 x 0..cols-1
    tiles = []
    if params.high_fit == "image":
        tiles = _tiles_from_block(all_windows, detail, bad_centre, rows, cols, s, budget, rng)
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


def _bad_centres(valid, s, degradation: Degradation, sigma, margin_cells, rows, cols):
    """Cells whose feature window reads a low-res cell degraded from an invalid pixel."""
    # Imported here, not at import: it slows the core's import down.
    from scipy.ndimage import maximum_filter

    r = FEATURE_RADIUS
    left, right = degradation_margin(s, degradation, sigma)
    # A cell is unusable if any high-res pixel its degradation reads is invalid;
    # centred at a cell's first pixel, this window covers every pixel it reads.
    bad_hr = maximum_filter(~valid, size=2 * (max(left, right) + s) + 1, mode="nearest")
    bad_lr = bad_hr[s * margin_cells :: s, s * margin_cells :: s][: rows + 2 * r, : cols + 2 * r]
    return maximum_filter(bad_lr.astype(np.uint8), size=2 * r + 1, mode="nearest")[
        r : r + rows, r : r + cols
    ].astype(bool)


def _tiles_from_block(all_windows, detail, bad_centre, rows, cols, s, budget, rng):
    """Dense tiles (windows of every centre, detail image) of a block.

    Tiles sit on a grid of step :data:`TILE_CELLS` (smaller blocks give one
    smaller tile); a tile is kept only when none of its centres, the ring
    outside it included, touches an invalid pixel.
    """
    t = min(TILE_CELLS, rows - 2, cols - 2)
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
        tiles = subset_tiles(tiles, s, int(budget), rng)
    return tiles
