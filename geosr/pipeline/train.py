"""Train models from high-res reference rasters, read window by window."""

from __future__ import annotations

import logging
import os
from collections.abc import Sequence
from typing import Any

import numpy as np

from .._validation import check_bool, check_int, check_scale
from ..enums import Method
from ..errors import InputError, ParameterError
from ..parallel.schedule import ProgressCallback, SchedulerSpec, resolve_scheduler, run_tasks
from ..raster.io import SourceInfo, check_bands, check_destination, inspect_source
from ..raster.training import (
    TrainJob,
    TrainPlan,
    collect_window_pairs,
    crop_to_scale,
    training_blocks,
    window_quota,
)
from ..raster.windows import check_chunk_size
from .plan import SELF_TRAIN_DEFAULTS

__all__ = ["train_from_rasters"]

log = logging.getLogger(__name__)

#: Pairs collected per model, before the model's own random subset.
_OVERSAMPLE = 1.5

_DEFAULTS = SELF_TRAIN_DEFAULTS["magnify"]


def _collect_task(job, models):
    return collect_window_pairs(job, models)


def _model_params(scale, method, max_samples, random_state, model_params):
    """CoupledDictionary parameters, checked by building one."""
    from ..core.model import CoupledDictionary

    params = dict(model_params)
    if method is not None:
        params["method"] = str(Method.parse(method, "method"))
    params["max_samples"] = int(max_samples)
    params["random_state"] = random_state
    try:
        CoupledDictionary(scale=scale, **params).get_params()
    except TypeError as exc:
        raise ParameterError(f"The model parameters must be CoupledDictionary's, got: {exc}") from None
    return params


def _select_bands(infos: Sequence[SourceInfo], bands: Any, shared: bool) -> list[tuple[int, ...]]:
    """The bands each reference lends (never alpha or categorical); equal counts for per-band models."""
    selections = []
    for info in infos:
        sel = tuple(b for b in check_bands(bands, info.count)
                    if not (info.is_alpha(b) or info.is_categorical(b)))
        if not sel:
            raise InputError(
                f"The reference {info.name!r} must have a band that is not alpha or categorical "
                "(palette, 1-bit), got none"
            )
        selections.append(sel)
    n_bands = len(selections[0])
    if not shared and any(len(s) != n_bands for s in selections):
        counts = ", ".join(f"{i.name}: {len(s)}" for i, s in zip(infos, selections))
        raise InputError(
            "The references must have the same number of bands for per-band models, got "
            f"{counts}; select bands or use shared=True"
        )
    return selections


def _too_small(infos, scale):
    """Refuse references none of which holds one training patch (a window of MIN_CELLS cells)."""
    from ..core.pairs import MIN_CELLS

    side = MIN_CELLS * scale
    if any(min(crop_to_scale(i.height, i.width, scale)) >= side for i in infos):
        return side
    sizes = ", ".join(f"{i.name}: {i.width} x {i.height}" for i in infos)
    raise InputError(
        f"The references must be at least {side} x {side} pixels to give one training patch "
        f"at scale {scale}, got too small ones ({sizes})"
    )


def _train_jobs(infos, selections, scale, chunk, shared, halo, retries, budget, random_state):
    """One :class:`TrainJob` per window of every reference, each with its quota and seed."""
    # Windows hold at least one patch: a smaller window would give no pair.
    chunk = max(chunk, _too_small(infos, scale))
    areas = [h * w for h, w in (crop_to_scale(i.height, i.width, scale) for i in infos)]
    total = sum(areas) * (len(selections[0]) if shared else 1)
    found = []
    for info, sel in zip(infos, selections):
        blocks = training_blocks(info.height, info.width, scale, chunk)
        if not blocks:
            continue
        hh, ww = crop_to_scale(info.height, info.width, scale)
        plan = TrainPlan(
            path=info.path, height=hh, width=ww, bands=sel,
            groups=tuple(0 if shared else i for i in range(len(sel))),
            halo=halo, masked=any(info.may_be_masked(b) for b in sel), read_retries=retries,
        )
        for b in blocks:
            found.append((plan, b, window_quota(budget, b.height * b.width, total)))
    seeds = np.random.SeedSequence(random_state).spawn(len(found))
    return [TrainJob(i, plan, b, quota, seeds[i]) for i, (plan, b, quota) in enumerate(found)]


def _collect(jobs, models, spec, retries, progress):
    """Run the collection tasks; the pairs pooled per model, in job order."""
    results = {}

    def consume(result):
        order, samples = result
        results[order] = samples

    run_tasks(_collect_task, jobs, models, consume, scheduler=spec, retries=retries,
              progress=progress, label="train")
    pooled = [[] for _ in models]
    for order in sorted(results):
        for group, sample in results[order]:
            pooled[group].append(sample)
    return pooled


def _fit(models, pooled, names, max_samples):
    for model, samples, name in zip(models, pooled, names):
        n = sum(len(s) for s in samples)
        log.info("fitting the model for %s on %d pairs", name, min(n, max_samples))
        if not samples:
            raise InputError(
                f"The references must have textured valid pixels in {name}, got no usable "
                "training patch (all nodata or flat?)"
            )
        model.fit_pairs(samples)
        model.band_name_ = name


def _checksums(infos):
    """sha256 of each reference file's bytes (None for a non-local path)."""
    from ..raster.guide import sha256_file

    shas = []
    for info in infos:
        try:
            shas.append(sha256_file(info.path))
        except InputError:
            raise InputError(f"The reference {info.name!r} must be readable to record its checksum") from None
    return shas


def _record_provenance(models, infos, selections):
    """Name the references in each model's training provenance: file name, sha256, bands used.

    A shared model learns from every selected band, a per-band model from
    its band of each reference. The core counts the pooled samples as
    ``n_images``; read window by window those are windows, not images, so
    the count is kept as ``n_windows``.
    """
    shas = _checksums(infos)
    for k, model in enumerate(models):
        training = dict(getattr(model, "training_", {}) or {})
        if "n_images" in training:
            training["n_windows"] = training.pop("n_images")
        training["references"] = [
            {"name": info.name, "sha256": sha, "bands": [int(b) for b in (sel if len(models) == 1 else sel[k:k + 1])]}
            for info, sha, sel in zip(infos, shas, selections)
        ]
        model.training_ = training


def train_from_rasters(
    paths: str | os.PathLike[str] | Sequence[str | os.PathLike[str]],
    scale: int,
    *,
    bands: Sequence[int | str] | str | None = None,
    shared: bool = False,
    max_samples: int = _DEFAULTS["max_samples"],
    method: str | Method | None = None,
    chunk_size: int = 1024,
    workers: int | None = None,
    scheduler: Any = None,
    retries: int = 2,
    random_state: int | None = _DEFAULTS["random_state"],
    output: str | os.PathLike[str] | None = None,
    overwrite: bool = False,
    progress: ProgressCallback | None = None,
    **model_params: Any,
) -> list[Any]:
    """Learn models from high-res reference rasters, read window by window.

    Parameters
    ----------
    paths : str, os.PathLike or sequence of them
        High-res references (the scene itself to bootstrap). With per-band
        models every reference must have the selected bands.
    scale : int
    bands : sequence of int or str, optional
        1-based bands to learn from; alpha bands are never used. Default:
        every band that is not alpha.
    shared : bool
        One model pooled over every band instead of one model per band.
    max_samples : int
        Training pairs per model (a seeded random subset of the usable
        patches, drawn in proportion to window areas).
    method : {"sparse", "anchored"}, optional
        Default: the model's default.
    chunk_size : int
        Window side in high-res pixels (rounded down to a multiple of the
        scale).
    workers, scheduler, retries
        As in :func:`geosr.pipeline.magnify.magnify_raster`.
    random_state : int or None
        Seed of the sampling and of the models.
    output : str or os.PathLike, optional
        Also save the models there (``geosr.modelfile.save_models``).
    overwrite : bool
        Replace an existing ``output`` (refused otherwise, also when another
        run writes it meanwhile).
    progress : callable, optional
        Called as ``progress(done, total)`` with the number of windows read:
        ``(0, total)`` before the first, then once per window. Messages go
        to the ``geosr.pipeline.train`` logger.
    **model_params
        Further ``CoupledDictionary`` parameters (``n_atoms``, ``n_iter``,
        ``sparsity``, ``degradation``, ...).

    Returns
    -------
    list of CoupledDictionary
        One per band in band order, or one shared model. Each has a
        ``band_name_`` attribute; its ``training_`` provenance lists the
        ``references`` (file name, sha256 of the file's bytes, bands used)
        and counts the windows read (``n_windows``).
    """
    from ..core.model import CoupledDictionary
    from ..modelfile import save_models

    scale = check_scale(scale)
    shared = check_bool(shared, "shared")
    paths = [paths] if isinstance(paths, (str, os.PathLike)) else list(paths)
    if not paths:
        raise ParameterError("The 'paths' parameter must name at least one raster, got none")
    max_samples = check_int(max_samples, "max_samples", 10)
    spec = scheduler if isinstance(scheduler, SchedulerSpec) else resolve_scheduler(scheduler, workers)
    chunk = check_chunk_size(chunk_size)
    if output is not None:
        output = check_destination(output, paths, overwrite=overwrite, name="output")
    params = _model_params(scale, method, max_samples, random_state, model_params)

    infos = [inspect_source(p) for p in paths]
    selections = _select_bands(infos, bands, shared)
    models = [CoupledDictionary(scale=scale, **params) for _ in range(1 if shared else len(selections[0]))]
    jobs = _train_jobs(infos, selections, scale, chunk, shared, int(models[0].training_halo()),
                       retries, _OVERSAMPLE * max_samples, random_state)
    pooled = _collect(jobs, models, spec, retries, progress)
    first = infos[0]
    names = ["shared"] if shared else [first.descriptions[b - 1] or f"band{b}" for b in selections[0]]
    _fit(models, pooled, names, max_samples)
    _record_provenance(models, infos, selections)
    if output is not None:
        save_models(output, models, band_names=names, overwrite=overwrite)
    return models
