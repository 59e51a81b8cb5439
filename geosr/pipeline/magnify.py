"""File-level functions: magnify a raster, train models from rasters.

These glue the three lower layers together; their keyword names match the
command-line options (``--chunk`` is ``chunk_size``, ``--co`` is
``creation_options``, ...).
"""

from __future__ import annotations

import dataclasses
import os
import time
import warnings
from pathlib import Path

import numpy as np

from ..enums import Method
from ..errors import GeoreferencingWarning, InputError, ModelError, ParameterError
from ..parallel.progress import Progress
from ..raster.blocks import BlockPlan, ResidualStats, magnify_one_block, spectral_guard_applies
from ..raster.io import (
    TempFiles,
    check_bands,
    check_destination,
    check_free_space as _check_free_space,
    inspect_source,
    remove_stale_temps,
    terminate_as_interrupt,
)
from ..raster.masks import MaskMode, mask_mode
from ..raster.profiles import (
    choose_blocksize,
    cog_options,
    gtiff_options,
    parse_creation_options,
    validate_creation_options,
)
from ..raster.stac import stac_item, stac_path, write_stac_item
from ..raster.tags import carried_band_tags, carried_tags, provenance_tags, utc_now
from ..raster.training import (
    TrainJob,
    TrainPlan,
    collect_window_pairs,
    training_blocks,
    window_quota,
)
from ..raster.transforms import scaled_transform
from ..raster.windows import Block, block_grid, check_chunk_size
from .._validation import check_bool, check_scale
from .plan import (
    SELF_TRAIN_DEFAULTS,
    check_models,
    model_method as _model_method,
    model_sha as _model_sha,
    plan_blocks,
    resolve_models,
    split_bands,
)
from ..parallel.schedule import SchedulerSpec, resolve_scheduler, run_tasks

__all__ = [
    "magnify_raster",
    "magnify_array",
    "train_from_rasters",
    "MagnifyResult",
    "ConsistencyResidual",
    "CONSISTENCY_TOLERANCE",
    "DEFAULT_MAX_OUTPUT_BYTES",
]

#: Largest uncompressed output accepted unless raised (guards against a
#: header that declares an enormous raster in a tiny file).
DEFAULT_MAX_OUTPUT_BYTES = 256 * 2**30

#: Pairs collected per model, before the model's own random subset.
_OVERSAMPLE = 1.5


@dataclasses.dataclass(frozen=True)
class MagnifyResult:
    """What :func:`magnify_raster` wrote.

    Attributes
    ----------
    dst : pathlib.Path
    stac : pathlib.Path or None
    width, height, count : int
        Output size and band count.
    scale : int
    method : str
    model_sha256 : str
        One checksum, or a comma-separated list for per-band models.
    blocks : int
        Blocks computed.
    halo : int
        Source pixels of context per side each block carried.
    chunk_size : int
    seconds : float
    scheduler : str
    consistency : tuple of ConsistencyResidual or None
        With the consistency option: the residual of each output band.
    """

    dst: Path
    stac: object
    width: int
    height: int
    count: int
    scale: int
    method: str
    model_sha256: str
    blocks: int
    halo: int
    chunk_size: int
    seconds: float
    scheduler: str
    consistency: object = None


#: The stated tolerance of the consistency option: RMS of degrade(output) -
#: input as a fraction of the band's valid range.
CONSISTENCY_TOLERANCE = 0.005


@dataclasses.dataclass(frozen=True)
class ConsistencyResidual:
    """How far degrading one magnified band is from its source.

    Attributes
    ----------
    band : int
        1-based output band.
    rms, max : float
        RMS and largest absolute value of ``degrade(output) - input`` over
        the valid source pixels, in the band's units, before rounding to
        the output type (None for alpha bands and empty bands).
    percent : float
        ``rms`` as a percentage of the band's valid range (0 for a constant
        band with zero residual).
    within_tolerance : bool
        ``percent <= 100 * CONSISTENCY_TOLERANCE``.
    """

    band: int
    rms: object
    max: object
    percent: object
    within_tolerance: bool


def _consistency_residuals(stats, roles):
    """Per-band :class:`ConsistencyResidual` from the summed block statistics."""
    rms, span = stats.rms(), stats.value_range()
    found = []
    for i, role in enumerate(roles):
        if role < 0 or stats.count[i] == 0:
            found.append(ConsistencyResidual(i + 1, None, None, None, True))
            continue
        percent = 100.0 * rms[i] / span[i] if span[i] > 0 else (0.0 if rms[i] == 0 else float("inf"))
        found.append(ConsistencyResidual(
            i + 1, float(rms[i]), float(stats.max_abs[i]), float(percent),
            bool(percent <= 100 * CONSISTENCY_TOLERANCE),
        ))
    return tuple(found)


def _consistency_tags(residuals):
    """Dataset tags and per-band tags that state the residual and the tolerance."""
    measured = [r for r in residuals if r.rms is not None]
    tags = {
        "GEOSR_CONSISTENCY_TOLERANCE": f"RMS of degrade(output) - input at most "
                                       f"{100 * CONSISTENCY_TOLERANCE:g} % of each band's valid range",
        "GEOSR_CONSISTENCY_MET": "yes" if all(r.within_tolerance for r in measured) else "no",
    }
    band_tags = []
    for r in residuals:
        band_tags.append({} if r.rms is None else {
            "GEOSR_CONSISTENCY_RMS": f"{r.rms:.6g}",
            "GEOSR_CONSISTENCY_MAX": f"{r.max:.6g}",
            "GEOSR_CONSISTENCY_RMS_PERCENT": f"{r.percent:.4g}",
        })
    return tags, band_tags


@dataclasses.dataclass(frozen=True)
class _MagnifyJob:
    plan: BlockPlan
    block: Block


def _magnify_task(job, models):
    return magnify_one_block(job.plan, job.block, models)


def _check_bool(value, name):
    return check_bool(value, name)


def magnify_raster(
    src,
    dst,
    model=None,
    *,
    scale=None,
    method=None,
    chunk_size=1024,
    workers=None,
    scheduler=None,
    bands=None,
    overwrite=False,
    cog=False,
    creation_options=None,
    consistency=False,
    ensemble=False,
    spectral_guard=True,
    stac=False,
    quiet=False,
    retries=2,
    self_train=False,
    training=None,
    max_output_bytes=DEFAULT_MAX_OUTPUT_BYTES,
    check_free_space=True,
):
    """Magnify a georeferenced raster and write it as a GeoTIFF (or COG).

    The raster is read in blocks of ``chunk_size`` source pixels, each with
    the halo of context the model needs (computed from its parameters), so
    the output equals what magnifying the whole image at once would give
    and memory is bounded by the block size. Fine detail is synthesized:
    the output says so in its tags.

    Parameters
    ----------
    src : str or os.PathLike
        Any raster GDAL reads; never modified.
    dst : str or os.PathLike
        Output path. Written to a temporary file beside it and renamed into
        place; must differ from ``src``.
    model : CoupledDictionary, list of them, or path, optional
        One shared model, one model per magnified band, or a model file.
        Without it the model shipped for ``scale`` is used (or, with
        ``self_train``, one is learned from ``src`` itself).
    scale : int, optional
        Magnification; must match the model's when both are given.
    method : {"sparse", "anchored"}, optional
        Must match the model's when given; selects the method to learn with
        ``self_train``.
    chunk_size : int
        Block side in source pixels (at least 16 and at least the halo).
    workers : int, optional
        Without ``scheduler``: start a dask.distributed LocalCluster of this
        many worker processes. With ``"threads"``/``"processes"``: the pool size.
    scheduler : str or distributed.Client, optional
        ``"threads"`` (default), ``"processes"``, ``"synchronous"``, or a
        cluster address ``"tcp://host:port"`` (the workers must reach
        ``src`` under the same path).
    bands : sequence of int or str, optional
        1-based bands to magnify, in output order (``"1,2,3"`` works too).
        Alpha bands are magnified by nearest neighbour.
    overwrite : bool
        Replace an existing ``dst``.
    cog : bool
        Write a Cloud Optimized GeoTIFF (with overviews).
    creation_options : mapping or sequence of "KEY=VALUE", optional
        GDAL creation options, for the GeoTIFF driver (or the COG driver
        with ``cog=True``); checked by GDAL before the run.
    consistency, ensemble : bool
        Options of the model's reconstruction.
    spectral_guard : bool
        With two or more magnified bands, limit how far the per-band detail
        turns each pixel's spectrum (:func:`geosr.core.spectral.guard_spectra`).
        Not applied with ``consistency`` (measured pixels take precedence);
        the ``GEOSR_SPECTRAL_GUARD`` tag says whether it was.
    stac : bool
        Also write a STAC Item sidecar (``dst`` with ``.json``).
    quiet : bool
        No progress bar on stderr.
    retries : int
        Extra attempts for a failing block task.
    self_train : bool
        Learn the model from ``src`` itself (treated as the high-res
        reference) before magnifying it.
    training : dict, optional
        Keyword arguments of :func:`train_from_rasters` for ``self_train``
        (``shared``, ``max_samples``, ``n_atoms``, ...).
    max_output_bytes : int
        Refuse outputs larger than this, uncompressed.
    check_free_space : bool
        Refuse to start when the destination's file system has less room
        than the uncompressed output (twice that for a COG).

    Returns
    -------
    MagnifyResult

    Raises
    ------
    InputError
        The source cannot be read or used.
    ModelError
        The model does not fit (scale, method, band count) or is damaged.
    DestinationError
        ``dst`` exists, equals ``src``, or cannot be written.
    ParameterError
        A bad option.
    RunError
        A task failed for good, or the cluster could not be reached.
    """
    started = time.monotonic()
    overwrite = _check_bool(overwrite, "overwrite")
    cog = _check_bool(cog, "cog")
    consistency = _check_bool(consistency, "consistency")
    ensemble = _check_bool(ensemble, "ensemble")
    spectral_guard = _check_bool(spectral_guard, "spectral_guard")
    stac = _check_bool(stac, "stac")
    quiet = _check_bool(quiet, "quiet")
    self_train = _check_bool(self_train, "self_train")
    check_space = _check_bool(check_free_space, "check_free_space")
    if scale is not None:
        scale = check_scale(scale)
    if method is not None:
        method = Method.parse(method, "method")
    if isinstance(max_output_bytes, bool) or not isinstance(max_output_bytes, (int, np.integer)) \
            or max_output_bytes < 1:
        raise ParameterError(
            f"The 'max_output_bytes' parameter must be a positive integer, got {max_output_bytes!r}"
        )
    if self_train and model is not None:
        raise ParameterError("The 'model' parameter must not be given with self_train=True, got a model")
    if training is not None and not self_train:
        raise ParameterError("The 'training' parameter must only be given with self_train=True")
    spec = resolve_scheduler(scheduler, workers)
    user_opts = parse_creation_options(creation_options)
    check_chunk_size(chunk_size)

    info = inspect_source(src)
    split = split_bands(info, bands)
    band_sel, model_bands = split.selected, split.magnified
    dtype = str(np.result_type(*[info.dtypes[b - 1] for b in band_sel]))

    # Models: a given one fixes the scale before the destination checks.
    models = None
    if model is not None or not self_train:
        choice = resolve_models(model, scale=scale, method=method, bands=model_bands)
        models, scale = list(choice.models), choice.scale
    elif scale is None:
        raise ParameterError("The 'scale' parameter must be given when no model is, got None")
    dst_path = check_destination(dst, [info.path], overwrite)
    stac_dst = None
    if stac:
        stac_dst = check_destination(stac_path(dst_path), [info.path, dst_path], overwrite, name="stac")
    out_bytes = scale * scale * info.width * info.height * len(band_sel) * np.dtype(dtype).itemsize
    if out_bytes > max_output_bytes:
        raise InputError(
            f"The output of {info.name!r} magnified x{scale} ({scale * info.width} x "
            f"{scale * info.height} pixels, {len(band_sel)} band{'s' if len(band_sel) != 1 else ''} "
            f"of {dtype}) must be at most max_output_bytes={max_output_bytes} bytes uncompressed, "
            f"got {out_bytes}; raise max_output_bytes (--max-output) if this size is intended"
        )
    if check_space:
        _check_free_space(dst_path.parent, out_bytes * (2 if cog else 1))

    if models is None:
        options = dict(training or {})
        for key in ("bands", "scheduler", "workers", "quiet"):
            if key in options:
                raise ParameterError(
                    f"The 'training' parameter must not set {key!r}; it is taken from the run"
                )
        options.setdefault("chunk_size", max(chunk_size, 64))
        options.setdefault("retries", retries)
        models = train_from_rasters(
            [info.path], scale, bands=list(model_bands), method=method, scheduler=spec,
            quiet=quiet, **options,
        )
        check_models(models, scale, method, model_bands)

    mplan = plan_blocks(info, split, models, scale, dtype=dtype, chunk_size=chunk_size,
                        consistency=consistency, ensemble=ensemble,
                        spectral_guard=spectral_guard, retries=retries)
    plan, blocks, halo, chunk, roles = mplan.block_plan, mplan.blocks, mplan.halo, mplan.chunk, mplan.roles
    mode, nodata = plan.mode, plan.nodata

    gt_opts = gtiff_options({} if cog else user_opts, dtype, choose_blocksize(scale * chunk))
    if user_opts and not cog:
        validate_creation_options(gt_opts, driver="GTiff", dtype=dtype, count=len(band_sel))
    cog_opts = cog_options(user_opts, dtype) if cog else None
    if cog and user_opts:
        validate_creation_options(cog_opts, driver="COG", dtype=dtype, count=len(band_sel))

    if info.crs is None and not (info.gcps and info.gcps_crs is not None):
        what = "a geotransform" if not info.transform.is_identity else "no georeferencing"
        warnings.warn(
            f"The source raster {info.name!r} has no CRS ({what}); the output has no CRS either",
            GeoreferencingWarning,
            stacklevel=2,
        )
    if info.has_rpcs:
        warnings.warn(
            f"The source raster {info.name!r} has RPCs; they are not carried to the output",
            GeoreferencingWarning,
            stacklevel=2,
        )

    shas = [_model_sha(models[r]) for r in roles if r >= 0]
    method_name = _model_method(models[0])
    created = utc_now()
    tags = carried_tags(info.tags)
    tags.update(provenance_tags(
        scale=scale, method=method_name, model_sha256=shas, source_name=info.name,
        created=created, consistency=consistency, ensemble=ensemble,
        spectral_guard=plan.spectral_guard,
    ))
    band_tags = []
    for b, r in zip(band_sel, roles):
        bt = carried_band_tags(info.band_tags[b - 1])
        if r >= 0:
            bt["GEOSR_MODEL_SHA256"] = _model_sha(models[r])
        else:
            bt["GEOSR_RESAMPLING"] = "nearest"
        band_tags.append(bt)
    from ..raster.writing import OutputRaster, copy_to_cog, output_profile

    profile = output_profile(info, band_sel, dtype, scale, nodata, gt_opts)
    jobs = [_MagnifyJob(plan, b) for b in blocks]

    remove_stale_temps(dst_path)
    if stac_dst is not None:
        remove_stale_temps(stac_dst)
    with terminate_as_interrupt(), TempFiles() as temps:
        tmp = temps.scratch(dst_path, ".tif") if cog else temps.new(dst_path, ".tif")
        with OutputRaster(tmp, profile, scale, write_mask=mode is MaskMode.MASK) as out:
            out.set_metadata(info, band_sel, tags, band_tags)
            counts = {"valid": 0, "residual": ResidualStats.empty(len(band_sel))}

            def consume(result):
                out.write(result)
                counts["valid"] += result.n_valid
                if result.residual is not None:
                    counts["residual"] = counts["residual"] + result.residual

            with Progress(len(jobs), "magnify", quiet=quiet) as bar:
                run_tasks(_magnify_task, jobs, models, consume, scheduler=spec,
                          retries=retries, progress=bar, label="magnify")
            residuals = None
            if consistency:
                residuals = _consistency_residuals(counts["residual"], roles)
                res_tags, res_band_tags = _consistency_tags(residuals)
                out.update_tags(res_tags, res_band_tags)
                worst = [r for r in residuals if not r.within_tolerance]
                if worst:
                    warnings.warn(
                        f"The consistency residual of band {worst[0].band} is {worst[0].percent:.3g} % "
                        f"of its range, above the stated {100 * CONSISTENCY_TOLERANCE:g} %; the "
                        "degradation model may not describe this data",
                        UserWarning,
                        stacklevel=2,
                    )
        if counts["valid"] == 0:
            warnings.warn(
                f"The source raster {info.name!r} has no valid pixel in the magnified bands; "
                "the output is entirely nodata",
                UserWarning,
                stacklevel=2,
            )
        if cog:
            final = temps.new(dst_path, ".tif")
            if not quiet:
                import sys

                print("magnify: writing the Cloud Optimized GeoTIFF", file=sys.stderr)
            copy_to_cog(tmp, final, cog_opts)
            temps.discard(tmp)
        if stac_dst is not None:
            item = stac_item(
                dst=dst_path, src=info.path, width=info.width * scale, height=info.height * scale,
                count=len(band_sel), crs=info.crs,
                transform=scaled_transform(info.transform, scale), scale=scale,
                method=method_name, model_sha256=tags["GEOSR_MODEL_SHA256"], created=created,
                cog=cog, source_name=info.name,
                band_names=[info.descriptions[b - 1] or f"band{b}" for b in band_sel],
            )
            stmp = temps.new(stac_dst, ".json")
            write_stac_item(stmp, item)
        temps.commit()
    return MagnifyResult(
        dst=dst_path,
        stac=stac_dst,
        width=info.width * scale,
        height=info.height * scale,
        count=len(band_sel),
        scale=scale,
        method=method_name,
        model_sha256=tags["GEOSR_MODEL_SHA256"],
        blocks=len(blocks),
        halo=halo,
        chunk_size=chunk,
        seconds=time.monotonic() - started,
        scheduler=spec.describe(),
        consistency=residuals,
    )


def _collect_task(job, models):
    return collect_window_pairs(job, models)


def train_from_rasters(
    paths,
    scale,
    *,
    bands=None,
    shared=False,
    max_samples=100_000,
    method=None,
    chunk_size=1024,
    workers=None,
    scheduler=None,
    retries=2,
    random_state=0,
    quiet=False,
    output=None,
    **model_params,
):
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
        As in :func:`magnify_raster`.
    random_state : int or None
        Seed of the sampling and of the models.
    quiet : bool
        No progress bar.
    output : str or os.PathLike, optional
        Also save the models there (``geosr.modelfile.save_models``).
    **model_params
        Further ``CoupledDictionary`` parameters (``n_atoms``, ``n_iter``,
        ``sparsity``, ``degradation``, ...).

    Returns
    -------
    list of CoupledDictionary
        One per band in band order, or one shared model. Each has a
        ``band_name_`` attribute.
    """
    from ..core.model import CoupledDictionary
    from ..modelfile import save_models

    scale = check_scale(scale)
    shared = _check_bool(shared, "shared")
    quiet = _check_bool(quiet, "quiet")
    if isinstance(paths, (str, os.PathLike)):
        paths = [paths]
    paths = list(paths)
    if not paths:
        raise ParameterError("The 'paths' parameter must name at least one raster, got none")
    if isinstance(max_samples, bool) or not isinstance(max_samples, (int, np.integer)) or max_samples < 10:
        raise ParameterError(f"The 'max_samples' parameter must be an integer of at least 10, got {max_samples!r}")
    spec = scheduler if isinstance(scheduler, SchedulerSpec) else resolve_scheduler(scheduler, workers)
    chunk = check_chunk_size(chunk_size)
    if output is not None:
        output = check_destination(output, paths, overwrite=True, name="output")
    params = dict(model_params)
    if method is not None:
        params["method"] = str(Method.parse(method, "method"))
    params["max_samples"] = int(max_samples)
    params["random_state"] = random_state
    try:
        CoupledDictionary(scale=scale, **params).get_params()
    except TypeError as exc:
        raise ParameterError(f"The model parameters must be CoupledDictionary's, got: {exc}") from None

    infos = [inspect_source(p) for p in paths]
    selections = []
    for info in infos:
        sel = check_bands(bands, info.count)
        sel = tuple(b for b in sel if not info.is_alpha(b))
        if not sel:
            raise InputError(f"The reference {info.name!r} must have a band that is not alpha, got none")
        selections.append(sel)
    n_bands = len(selections[0])
    if not shared and any(len(s) != n_bands for s in selections):
        counts = ", ".join(f"{i.name}: {len(s)}" for i, s in zip(infos, selections))
        raise InputError(
            "The references must have the same number of bands for per-band models, got "
            f"{counts}; select bands or use shared=True"
        )
    n_models = 1 if shared else n_bands
    models = [CoupledDictionary(scale=scale, **params) for _ in range(n_models)]
    halo = int(models[0].training_halo())
    budget = _OVERSAMPLE * max_samples

    areas = []
    for info in infos:
        h, w = info.height - info.height % scale, info.width - info.width % scale
        areas.append(h * w)
    total = sum(areas) * (n_bands if shared else 1)
    if sum(areas) == 0:
        raise InputError(f"The references must be at least {scale} x {scale} pixels, got smaller ones")

    root = np.random.SeedSequence(random_state)
    jobs = []
    for info, sel in zip(infos, selections):
        blocks = training_blocks(info.height, info.width, scale, chunk)
        if not blocks:
            continue
        hh, ww = info.height - info.height % scale, info.width - info.width % scale
        plan = TrainPlan(
            path=info.path, height=hh, width=ww, bands=sel,
            groups=tuple(0 if shared else i for i in range(len(sel))),
            halo=halo, masked=any(info.may_be_masked(b) for b in sel), read_retries=retries,
        )
        for b in blocks:
            jobs.append((plan, b, window_quota(budget, b.height * b.width, total)))
    seeds = root.spawn(len(jobs))
    jobs = [TrainJob(i, plan, b, quota, seeds[i]) for i, (plan, b, quota) in enumerate(jobs)]

    results = {}

    def consume(result):
        order, samples = result
        results[order] = samples

    with terminate_as_interrupt(), Progress(len(jobs), "train: collect", quiet=quiet) as bar:
        run_tasks(_collect_task, jobs, models, consume, scheduler=spec, retries=retries,
                  progress=bar, label="train")
    pooled = [[] for _ in models]
    for order in sorted(results):
        for group, sample in results[order]:
            pooled[group].append(sample)
    names = []
    first = infos[0]
    for g, model in enumerate(models):
        if not shared:
            b = selections[0][g]
            name = first.descriptions[b - 1] or f"band{b}"
        else:
            name = "shared"
        names.append(name)
        if not quiet:
            import sys

            n = sum(len(s) for s in pooled[g])
            print(f"train: fitting the model for {name} on {min(n, max_samples)} pairs",
                  file=sys.stderr)
        if not pooled[g]:
            raise InputError(
                f"The references must have textured valid pixels in {name}, got no usable "
                "training patch (all nodata or flat?)"
            )
        model.fit_pairs(pooled[g])
        model.band_name_ = name
    if output is not None:
        save_models(output, models, band_names=names)
    return models


def _array_block(plan, block, models):
    """A block as float values with NaN where the output is invalid."""
    from ..raster.blocks import magnify_block_values

    return magnify_block_values(plan, block, models)


def magnify_array(src, model=None, *, scale=None, bands=None, chunk_size=1024,
                  consistency=False, ensemble=False, spectral_guard=True):
    """The magnified raster as a lazy dask array, one task per block.

    Each task reads its block plus the halo the model needs from ``src``
    with its own rasterio handle, so computing the array (or any part of
    it) gives exactly what :func:`magnify_raster` writes before the
    conversion to the output pixel type.

    Parameters
    ----------
    src : str or os.PathLike
    model : CoupledDictionary, list of them, or path, optional
        As in :func:`magnify_raster` (the shipped model for ``scale`` when
        omitted).
    scale : int, optional
    bands : sequence of int or str, optional
        Alpha bands are magnified by nearest neighbour.
    chunk_size : int
        Block side in source pixels; array chunks are ``scale`` times that.
    consistency, ensemble : bool
    spectral_guard : bool
        As in :func:`magnify_raster`.

    Returns
    -------
    dask.array.Array, shape (bands, scale*height, scale*width)
        float32 for float32 sources, float64 otherwise; NaN where the output
        is invalid (nodata, masked, or not finite in the input).
    """
    import dask.array as da
    from dask.base import tokenize

    consistency = _check_bool(consistency, "consistency")
    ensemble = _check_bool(ensemble, "ensemble")
    spectral_guard = _check_bool(spectral_guard, "spectral_guard")
    if scale is not None:
        scale = check_scale(scale)
    check_chunk_size(chunk_size)
    info = inspect_source(src)
    split = split_bands(info, bands)
    choice = resolve_models(model, scale=scale, bands=split.magnified)
    models, scale = list(choice.models), choice.scale
    work = "float32" if all(info.dtypes[b - 1] == "float32" for b in split.selected) else "float64"
    mplan = plan_blocks(info, split, models, scale, dtype=work, chunk_size=chunk_size,
                        consistency=consistency, ensemble=ensemble, spectral_guard=spectral_guard)
    plan, chunk, band_sel = mplan.block_plan, mplan.chunk, split.selected
    blocks = block_grid(info.height, info.width, chunk)
    name = "geosr-magnify-" + tokenize(info.path, plan, [_model_sha(m) for m in models], chunk)
    models_key = name + "-models"
    rows = sorted({b.row_off for b in blocks})
    cols = sorted({b.col_off for b in blocks})
    dsk = {models_key: models}
    for b in blocks:
        dsk[(name, 0, rows.index(b.row_off), cols.index(b.col_off))] = (_array_block, plan, b, models_key)
    heights = tuple(scale * min(chunk, info.height - r) for r in rows)
    widths = tuple(scale * min(chunk, info.width - c) for c in cols)
    chunks = ((len(band_sel),), heights, widths)
    from dask.highlevelgraph import HighLevelGraph

    graph = HighLevelGraph.from_collections(name, dsk, dependencies=())
    return da.Array(graph, name, chunks, dtype=np.dtype(work))
