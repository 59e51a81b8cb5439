"""Collecting training pairs from high-res reference rasters, window by window.

A reference is never read whole: it is cut into windows on the low-res grid
of the scale (offsets and sizes multiples of the scale, the raster cropped
at the bottom and right to a multiple of it), each window is read with the
halo the model's pair collection needs (symmetric extension outside the
raster, as for a whole in-memory image), and the model keeps a bounded,
seeded random share of that window's usable patches (patches touching
invalid pixels or without texture are skipped by the core). The share of a
window is proportional to its area, so the total stays near the sample
budget whatever the size of the references.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from .blocks import read_block
from .windows import Block, block_grid

__all__ = [
    "TrainPlan",
    "TrainJob",
    "collect_window_pairs",
    "window_quota",
    "crop_to_scale",
    "training_blocks",
]


@dataclasses.dataclass(frozen=True)
class TrainPlan:
    """What a pair-collection task needs besides its window and the models.

    Attributes
    ----------
    path : str
    height, width : int
        The raster size cropped to multiples of the scale.
    bands : tuple of int
        1-based source bands to sample.
    groups : tuple of int
        Index of the model that learns from each band.
    halo : int
        High-res context per side (``model.training_halo()``).
    masked : bool
        Read GDAL's mask bands.
    read_retries : int
    """

    path: str
    height: int
    width: int
    bands: tuple
    groups: tuple
    halo: int
    masked: bool
    read_retries: int = 2


@dataclasses.dataclass(frozen=True)
class TrainJob:
    """One window of one reference.

    Attributes
    ----------
    order : int
        Position of the job over all references (results are pooled in
        this order, so runs repeat whatever order tasks finish in).
    plan : TrainPlan
    block : Block
    quota : int
        At most this many pairs per band from this window.
    seed : numpy.random.SeedSequence
    """

    order: int
    plan: TrainPlan
    block: Block
    quota: int
    seed: object


def window_quota(budget, window_area, total_area):
    """Pairs one window may give: its share of ``budget`` by area, at least 1."""
    return max(1, int(math.ceil(budget * window_area / max(total_area, 1))))


def collect_window_pairs(job, models):
    """Read one window with its halo and collect training pairs from each band.

    Parameters
    ----------
    job : TrainJob
    models : sequence of model objects
        With ``collect_pairs(hr_block, halo, valid, max_pairs, random_state)``.

    Returns
    -------
    order : int
    samples : list of (int, PairSample)
        The model index and the pairs of each band that gave any.
    """
    plan, block = job.plan, job.block
    data, valid = read_block(plan.path, plan.bands, block, plan.halo, plan.height, plan.width,
                             masked=plan.masked, retries=plan.read_retries)
    h = plan.halo
    seeds = job.seed.spawn(len(plan.bands))
    out = []
    for i, group in enumerate(plan.groups):
        if not valid[i][h:h + block.height, h:h + block.width].any():
            continue
        v = None if valid[i].all() else valid[i]
        sample = models[group].collect_pairs(
            data[i].astype(np.float64), h, v, max_pairs=job.quota,
            random_state=np.random.default_rng(seeds[i]),
        )
        if len(sample):
            out.append((group, sample))
    return job.order, out


def crop_to_scale(height, width, scale):
    """Raster size cropped down to multiples of the scale."""
    return height - height % scale, width - width % scale


def training_blocks(height, width, scale, chunk_size):
    """Windows over the cropped raster, on the low-res grid of ``scale``."""
    h, w = crop_to_scale(height, width, scale)
    if h == 0 or w == 0:
        return []
    return block_grid(h, w, chunk_size, multiple=scale)

