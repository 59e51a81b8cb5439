"""Guided magnification of a raster file: learn on the scene, then sharpen block by block.

A finer co-registered raster (the guide) supplies measured detail. The
model (:class:`geosr.core.guided.GuidedRegression`) is learned per band on
the scene itself at reduced resolution, in two passes over the scene's
blocks that only sum statistics, so memory stays flat in scene size and the
model does not depend on how the scene is cut. The magnification pass then
reads each coarse block and its guide window with their halos; where the
guide has no valid pixel the block falls back to single-image magnification
for those pixels.
"""

from __future__ import annotations

import dataclasses
import logging
import os
import warnings
from collections.abc import Sequence
from typing import Any

import numpy as np

from ..core.guided import (
    CombinationStatistics,
    GuidedRegression,
    combination_statistics,
    guided_halo,
    training_statistics,
)
from ..core.nodata import FILL_DISTANCE, fill_invalid
from ..core.resample import UPSCALE_MARGIN, upscale_valid
from ..errors import InputError, ModelError, ParameterError
from ..parallel.schedule import run_tasks
from ..raster.blocks import (
    BlockPlan,
    block_result,
    block_values,
    nearest_magnify,
    read_block,
    work_dtype,
)
from ..raster.guide import GuideSpec, read_guide_block
from ..raster.windows import Block, block_grid

__all__ = [
    "GUIDED_METHOD",
    "GUIDED_DEFAULTS",
    "GuidedPlan",
    "learn_guided",
    "BicubicFallback",
    "check_guided_model",
    "check_guided_options",
    "guided_block_plan",
    "warn_weak_correlation",
    "guided_tags",
    "WEAK_CORRELATION",
    "learning_block_plan",
    "train_guided",
]

log = logging.getLogger(__name__)

#: The ``GEOSR_METHOD`` of a guided run.
GUIDED_METHOD = "guided"

#: Learning parameters of a guided run when the caller gives none.
GUIDED_DEFAULTS: dict[str, Any] = {"max_samples": 200_000, "random_state": 0}

#: Below this correlation between a band and its guide, the run warns: the
#: guide's detail may not describe the band (a rule of thumb, common practice
#: in the sharpening literature, not a measured threshold).
WEAK_CORRELATION = 0.6


# ------------------------------------------------------------------ learning
@dataclasses.dataclass(frozen=True)
class _LearnJob:
    """One training window: the coarse block plan, the guide and the block."""

    plan: BlockPlan
    guide: GuideSpec
    block: Block
    degradation: str
    sigma: Any


def _read_learn_block(job):
    """Coarse block (filled), its validity, guide block (filled) and its validity."""
    bp, block, h = job.plan, job.block, job.plan.halo
    data, valid = read_block(bp.path, bp.bands, block, h, bp.height, bp.width,
                             masked=bp.masked, retries=bp.read_retries)
    work = work_dtype(bp)
    filled = np.stack([fill_invalid(data[i].astype(work), valid[i]) for i in range(len(bp.bands))])
    guide, guide_valid = read_guide_block(job.guide, block, h, retries=bp.read_retries)
    guide = np.stack([fill_invalid(g.astype(work), guide_valid) for g in guide])
    return filled, valid, guide, guide_valid


def _combination_task(job, shared):
    coarse, valid, guide, guide_valid = _read_learn_block(job)
    return job.block.index, combination_statistics(
        coarse, guide, valid, guide_valid, job.plan.scale, margin=job.plan.halo,
        degradation=job.degradation, sigma=job.sigma)


def _training_task(job, shared):
    combination, sample_rate, random_state = shared
    coarse, valid, guide, guide_valid = _read_learn_block(job)
    return job.block.index, training_statistics(
        coarse, guide, valid, guide_valid, combination, job.plan.scale, margin=job.plan.halo,
        origin=(job.block.row_off, job.block.col_off), sample_rate=sample_rate,
        random_state=random_state, degradation=job.degradation, sigma=job.sigma,
    )


def _sum_in_order(task, jobs, shared, empty, *, scheduler, retries, progress, label):
    """Run ``task`` on every job and sum the statistics in job order.

    Summing in a fixed order (not in completion order) makes the model the
    same bytes on threads, processes and a cluster.
    """
    results = {}

    def keep(result):
        results[result[0]] = result[1]

    run_tasks(task, jobs, shared, keep, scheduler=scheduler, retries=retries, progress=progress,
              label=label)
    total = empty
    for index in sorted(results):
        total = results[index] if total is None else total + results[index]
    return total


def _learn_jobs(bp, spec, chunk, degradation, sigma):
    """Training windows on the scale's grid (the last partial row/column of cells is left out)."""
    s = bp.scale
    height, width = (bp.height // s) * s, (bp.width // s) * s
    if height < 4 * s or width < 4 * s:
        raise InputError(
            f"The source raster {os.path.basename(bp.path)!r} must be at least {4 * s} x {4 * s} "
            f"pixels to learn a guided model at x{s}, got {bp.width} x {bp.height}"
        )
    return [_LearnJob(bp, spec, b, degradation, sigma)
            for b in block_grid(height, width, chunk, multiple=s)]


def learn_guided(bp: BlockPlan, spec: GuideSpec, params: dict[str, Any], *, chunk_size: int,
                 scheduler: Any, retries: int, progress: Any = None) -> GuidedRegression:
    """Learn a guided model on the scene at reduced resolution, block by block.

    Parameters
    ----------
    bp : BlockPlan
        The coarse bands to learn (their ``halo`` is the guided halo).
    spec : GuideSpec
        The guide, read on the scene's fine grid.
    params : dict
        :class:`~geosr.core.guided.GuidedRegression` parameters.
    chunk_size : int
        Training window side in source pixels.
    scheduler, retries, progress
        As for :func:`geosr.parallel.schedule.run_tasks`; ``progress`` counts
        the windows of both passes.

    Returns
    -------
    GuidedRegression
        Fitted; its ``band_names_`` are set by the caller.
    """
    model = GuidedRegression(scale=bp.scale, **params)
    p = model.get_params()
    jobs = _learn_jobs(bp, spec, chunk_size, p["degradation"], p["sigma"])
    total = 2 * len(jobs)
    done = {"n": 0}

    def step(n, _total):
        if progress is not None:
            progress(done["n"] + n, total)

    run = {"scheduler": scheduler, "retries": retries, "progress": step}
    log.info("learning the guided model: pass 1 of 2 (%d windows)", len(jobs))
    comb = _sum_in_order(_combination_task, jobs, None,
                         CombinationStatistics.empty(len(bp.bands), len(spec.bands)),
                         label="guided-combine", **run)
    done["n"] = len(jobs)
    combination = model.combination_from_statistics(comb)
    rate = _sample_rate(comb, p["max_samples"], bp)
    log.info("learning the guided model: pass 2 of 2 (sample rate %.3g)", rate)
    train = _sum_in_order(_training_task, jobs, [combination, rate, p["random_state"]], None,
                          label="guided-learn", **run)
    return model.fit_statistics(comb, train)


def _sample_rate(comb, max_samples, bp):
    counts = np.asarray(comb.count, dtype=np.float64)
    if counts.size == 0 or counts.max() <= 0:
        raise InputError(
            f"The source raster {os.path.basename(bp.path)!r} and its guide must share valid "
            "pixels, got none where both are valid"
        )
    return float(min(1.0, max_samples / counts.max()))


# -------------------------------------------------------------- magnifying
@dataclasses.dataclass(frozen=True)
class _GuidedJob:
    plan: BlockPlan
    guide: GuideSpec
    block: Block
    fallback: BlockPlan


def _guided_task(job, shared):
    """Magnify one block with the guide; single-image fallback where it has no valid pixel."""
    model, fallback_models = shared[0], shared[1:]
    bp, block, h, s = job.plan, job.block, job.plan.halo, job.plan.scale
    data, valid = read_block(bp.path, bp.bands, block, h, bp.height, bp.width,
                             masked=bp.masked, retries=bp.read_retries)
    work = work_dtype(bp)
    guide, guide_valid = read_guide_block(job.guide, block, h, retries=bp.read_retries)
    guide = np.stack([fill_invalid(g.astype(work), guide_valid) for g in guide])
    magnified = [i for i, role in enumerate(bp.roles) if role >= 0]
    coarse = np.stack([fill_invalid(data[i].astype(work), valid[i]) for i in magnified])
    guided, guide_ok = model.predict_block(coarse, guide, guide_valid, h)
    inner = (slice(h, h + block.height), slice(h, h + block.width))
    shape = (len(bp.bands), s * block.height, s * block.width)
    values = np.zeros(shape, dtype=work)
    ok = np.zeros(shape, dtype=bool)
    for i, role in enumerate(bp.roles):
        if role < 0:
            values[i] = nearest_magnify(data[i][inner], s)
            ok[i] = nearest_magnify(valid[i][inner], s)
            continue
        values[i] = guided[magnified.index(i)]
        ok[i] = nearest_magnify(valid[i][inner], s) & np.isfinite(values[i])
    need = ~guide_ok & ok[magnified].any(axis=0)
    n_fallback = 0
    if need.any():
        back, back_ok, _ = block_values(job.fallback, block, fallback_models, work)
        for i in magnified:
            values[i] = np.where(need, back[i], values[i])
            ok[i] = np.where(need, back_ok[i], ok[i])
            n_fallback += int((need & ok[i]).sum())
    return block_result(bp, block, values, ok, None, n_fallback)


@dataclasses.dataclass(frozen=True)
class GuidedPlan:
    """A guided run: the guide, the model, and the coarse and fallback block plans.

    Attributes
    ----------
    guide : GuideSpec
    model : GuidedRegression
    block_plan : BlockPlan
        Coarse blocks with the guided halo.
    fallback : BlockPlan
        The same blocks with the single-image models' halo.
    fallback_models : tuple
    learned : bool
        The model was learned in this run (not loaded).
    """

    guide: GuideSpec
    model: GuidedRegression
    block_plan: BlockPlan
    fallback: BlockPlan
    fallback_models: tuple[Any, ...]
    learned: bool

    def jobs(self, blocks: Sequence[Block]) -> list[_GuidedJob]:
        return [_GuidedJob(self.block_plan, self.guide, b, self.fallback) for b in blocks]

    @property
    def shared(self) -> list[Any]:
        return [self.model, *self.fallback_models]

    @property
    def task(self):
        return _guided_task


def guided_block_plan(single: BlockPlan, degradation: str = "bicubic", sigma: Any = None) -> BlockPlan:
    """The coarse block plan of a guided run: the single-image plan with the guided halo."""
    halo = guided_halo(single.scale, degradation, sigma)
    return dataclasses.replace(single, halo=halo, consistency=False, ensemble=False,
                               spectral_guard=False, masked=True)


def check_guided_model(model: Any, scale: int, n_bands: int, n_guides: int) -> GuidedRegression:
    """A guided model that fits the run (scale, bands, guide bands)."""
    if not isinstance(model, GuidedRegression):
        raise ModelError(
            "The model must be a guided model (from 'geosr train --guide') when a guide is "
            f"given, got {type(model).__name__}"
        )
    if int(model.scale) != int(scale):
        raise ModelError(f"The guided model must be for x{scale} (the guide's scale), got x{model.scale}")
    if model.n_targets_ != n_bands:
        raise ModelError(
            f"The guided model must have one regression per magnified band ({n_bands}), "
            f"got {model.n_targets_}"
        )
    if model.n_guides_ != n_guides:
        raise ModelError(
            f"The guided model must be learned with {n_guides} guide band"
            f"{'s' if n_guides != 1 else ''}, got {model.n_guides_}"
        )
    return model


def guided_tags(spec: GuideSpec, model: GuidedRegression, counts: dict[str, int]) -> dict[str, str]:
    """Dataset tags of a guided run: the guide files, bands, checksums and the fallback share."""
    names = [os.path.basename(p) for p in spec.paths]
    fraction = counts["fallback"] / counts["pixels"] if counts["pixels"] else 0.0
    return {
        "GEOSR_GUIDE": ",".join(names),
        "GEOSR_GUIDE_SHA256": ",".join(spec.sha256),
        "GEOSR_GUIDE_BANDS": ",".join(f"{names[f]}:{b}" for f, b in spec.bands),
        "GEOSR_GUIDE_FALLBACK_PIXELS": str(int(counts["fallback"])),
        "GEOSR_GUIDE_FALLBACK_FRACTION": f"{fraction:.6g}",
    }


def warn_weak_correlation(model: GuidedRegression, band_names: Sequence[str]) -> None:
    """Warn for each band whose correlation with the guide is weak."""
    for name, r in zip(band_names, model.correlation_):
        if not np.isfinite(r) or r < WEAK_CORRELATION:
            warnings.warn(
                f"The guide correlates weakly with {name} (r = {float(r):.2f}, below "
                f"{WEAK_CORRELATION}); its detail may be wrong for this band",
                UserWarning,
                stacklevel=3,
            )


def check_guided_options(opts: Any) -> None:
    """Options of single-image magnification that do not apply with a guide."""
    for flag, option in (("consistency", "--consistency"), ("ensemble", "--ensemble")):
        if getattr(opts, flag):
            raise ParameterError(
                f"The '{flag}' parameter ({option}) applies to single-image magnification "
                "only, got it with a guide"
            )


class BicubicFallback:
    """Bicubic interpolation behind the block-model interface, for scales with no shipped model.

    Where the guide has no valid pixel, a guided run falls back to the
    single-image model shipped for its scale (x2, x3, x4); at other scales
    it falls back to this interpolation, and its tags say so.

    Parameters
    ----------
    scale : int
    """

    method = "bicubic"
    sha256_ = "bicubic"

    def __init__(self, scale: int):
        self.scale = int(scale)

    def context_radius(self, consistency: bool = False, masked: bool = False) -> int:
        """Source pixels of context per side: the interpolation's and the nodata fill's."""
        return UPSCALE_MARGIN + FILL_DISTANCE

    def magnify_block(self, block, halo, valid=None, *, consistency=False, ensemble=False,
                      return_residual=False):
        """Bicubic interpolation of a block's interior (invalid pixels filled first)."""
        x = np.asarray(block, dtype=np.float64)
        if valid is not None:
            x = fill_invalid(x, valid)
        m = UPSCALE_MARGIN
        inner = x[halo - m: x.shape[0] - halo + m, halo - m: x.shape[1] - halo + m]
        return upscale_valid(inner, self.scale, m)


def learning_block_plan(info: Any, bands: Sequence[int], scale: int, *, degradation: str = "bicubic",
                        sigma: Any = None, retries: int = 2) -> BlockPlan:
    """The coarse block plan that learning reads: the given bands, with the guided halo."""
    from ..raster.masks import MaskMode

    dtype = str(np.result_type(*[info.dtypes[b - 1] for b in bands]))
    return BlockPlan(
        path=info.path, height=info.height, width=info.width, bands=tuple(bands),
        roles=tuple(range(len(bands))), halo=guided_halo(scale, degradation, sigma), scale=scale,
        dtype=dtype, mode=MaskMode.NONE, nodata=None, masked=True, read_retries=retries,
    )


def train_guided(
    src: str | os.PathLike[str],
    guide: str | os.PathLike[str] | Sequence[str | os.PathLike[str]],
    *,
    output: str | os.PathLike[str] | None = None,
    scale: int | None = None,
    bands: Any = None,
    guide_bands: Any = None,
    overwrite: bool = False,
    chunk_size: int = 1024,
    workers: int | None = None,
    scheduler: Any = None,
    retries: int = 2,
    progress: Any = None,
    **params: Any,
) -> GuidedRegression:
    """Learn a guided model on a scene and its guide, to reuse on neighbouring tiles.

    Parameters
    ----------
    src : str or os.PathLike
        The coarse raster; its bands are learned at reduced resolution.
    guide : path or sequence of paths
        The finer co-registered rasters (see :func:`~geosr.pipeline.magnify.magnify_raster`).
    output : str or os.PathLike, optional
        Write the model there (:func:`geosr.modelfile.save_guided_model`).
    scale : int, optional
        Must agree with the guide's pixel-size ratio when given.
    bands, guide_bands : optional
        1-based bands of ``src`` (alpha bands are never learned) and of the
        stacked guides.
    overwrite : bool
        Replace an existing ``output``.
    chunk_size, workers, scheduler, retries, progress
        As for :func:`~geosr.pipeline.magnify.magnify_raster`.
    **params
        :class:`~geosr.core.guided.GuidedRegression` parameters
        (``max_samples``, ``ridge``, ``degradation``, ``sigma``, ``random_state``).

    Returns
    -------
    GuidedRegression
        Fitted, with ``sha256_``, ``band_names_`` and ``training_`` set.
    """
    from ..modelfile import guided_model_sha256, save_guided_model
    from ..parallel.schedule import resolve_scheduler
    from ..raster.guide import open_guides
    from ..raster.io import check_destination, inspect_source
    from ..raster.windows import check_chunk_size
    from .plan import split_bands

    spec_scheduler = resolve_scheduler(scheduler, workers)
    info = inspect_source(src)
    split = split_bands(info, bands)
    guides = [guide] if isinstance(guide, (str, os.PathLike)) else list(guide)
    spec = open_guides(guides, info, scale=scale, guide_bands=guide_bands)
    if output is not None:
        output = check_destination(output, [info.path, *spec.paths], overwrite, name="output")
    p = {**GUIDED_DEFAULTS, **params}
    bp = learning_block_plan(info, split.magnified, spec.scale, degradation=p.get("degradation", "bicubic"),
                             sigma=p.get("sigma"), retries=retries)
    chunk = check_chunk_size(chunk_size, bp.halo)
    try:
        model = learn_guided(bp, spec, p, chunk_size=chunk, scheduler=spec_scheduler, retries=retries,
                             progress=progress)
    except TypeError as exc:
        raise ParameterError(f"The guided model parameters must be GuidedRegression's, got: {exc}") from None
    names = [info.descriptions[b - 1] or f"band {b}" for b in split.magnified]
    model.sha256_ = guided_model_sha256(model)
    model.band_names_ = names
    model.training_ = {
        "source": {"name": info.name, "bands": list(split.magnified)},
        "guides": [{"name": os.path.basename(path), "sha256": sha} for path, sha in zip(spec.paths, spec.sha256)],
        "guide_bands": [f"{os.path.basename(spec.paths[f])}:{b}" for f, b in spec.bands],
        "correlation": [float(r) for r in model.correlation_],
    }
    warn_weak_correlation(model, names)
    if output is not None:
        save_guided_model(output, model, names, model.training_, overwrite=overwrite)
    return model
