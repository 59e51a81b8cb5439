"""Magnify a raster file: plan, run, write, sidecars.

:func:`magnify_raster` glues the three lower layers together; its keyword
names match the command-line options (``--chunk`` is ``chunk_size``,
``--co`` is ``creation_options``, ...). Each step is a short function:
:func:`_check_options` settles the options, :func:`_plan` the bands, the
models and the blocks (:mod:`geosr.pipeline.plan`), :func:`_describe_output`
the profile and tags, :func:`_write_outputs` runs the blocks into a
temporary file and adds the sidecars, renaming everything into place at the
end.
"""

from __future__ import annotations

import contextlib
import dataclasses
import logging
import os
import time
import warnings
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from .._validation import check_bool, check_int, check_scale
from ..enums import Method
from ..errors import DestinationError, GeoreferencingWarning, InputError, ParameterError
from ..parallel.schedule import ProgressCallback, SchedulerSpec, resolve_scheduler, run_tasks
from ..raster.blocks import BlockPlan, DetailStats, ResidualStats, magnify_one_block
from ..raster.io import (
    SourceInfo,
    TempFiles,
    check_destination,
    inspect_source,
    remove_stale_temps,
)
from ..raster.io import (
    check_free_space as _check_free_space,
)
from ..raster.masks import MaskMode
from ..raster.profiles import (
    choose_blocksize,
    cog_options,
    gtiff_options,
    parse_creation_options,
    validate_creation_options,
)
from ..raster.stac import stac_item, stac_path, write_stac_item
from ..raster.tags import (
    carried_band_tags,
    carried_tags,
    file_sha256,
    options_json,
    provenance_tags,
    utc_now,
)
from ..raster.transforms import scale_gcps, scaled_transform
from ..raster.windows import Block, check_chunk_size
from .array import magnify_array
from .guided import (
    GUIDED_DEFAULTS,
    GUIDED_METHOD,
    BicubicFallback,
    GuidedPlan,
    check_guided_model,
    check_guided_options,
    guided_block_plan,
    guided_tags,
    learn_guided,
    learning_block_plan,
    warn_weak_correlation,
)
from .plan import (
    MagnifyPlan,
    check_models,
    model_method,
    model_sha,
    plan_blocks,
    resolve_models,
    split_bands,
)
from .results import (
    CONSISTENCY_TOLERANCE,
    ConsistencyResidual,
    MagnifyResult,
    consistency_residuals,
    consistency_tags,
)
from .train import train_from_rasters

__all__ = [
    "magnify_raster",
    "magnify_array",
    "train_from_rasters",
    "MagnifyResult",
    "ConsistencyResidual",
    "CONSISTENCY_TOLERANCE",
    "DEFAULT_MAX_OUTPUT_BYTES",
    "output_options",
]

#: Largest uncompressed output accepted unless raised (guards against a
#: header that declares an enormous raster in a tiny file).
DEFAULT_MAX_OUTPUT_BYTES = 256 * 2**30

log = logging.getLogger(__name__)

#: Keys of ``training`` that the run sets itself.
_RUN_KEYS = ("bands", "scheduler", "workers")


@dataclasses.dataclass(frozen=True)
class _MagnifyJob:
    plan: BlockPlan
    block: Block


def _magnify_task(job, models):
    return magnify_one_block(job.plan, job.block, models)


@dataclasses.dataclass(frozen=True)
class _Options:
    """The checked options of one :func:`magnify_raster` call."""

    scale: int | None
    method: Method | None
    chunk_size: int
    overwrite: bool
    cog: bool
    consistency: bool
    ensemble: bool
    spectral_guard: bool
    stac: bool
    self_train: bool
    training: dict[str, Any] | None
    check_free_space: bool
    max_output_bytes: int
    retries: int
    scheduler: SchedulerSpec
    creation_options: dict[str, str]
    progress: ProgressCallback | None
    detail_map: Any = None
    options: str = "{}"


def _check_options(model, *, scale, method, chunk_size, workers, scheduler, creation_options,
                   max_output_bytes, training, retries, progress, guided=False, detail_map=None, **flags):
    """Validate every option before the source is opened.

    ``guided``: a guide is given; it learns on the scene unless a guided
    model is, so ``training`` applies without ``self_train``.
    """
    flags = {name: check_bool(value, name) for name, value in flags.items()}
    if scale is not None:
        scale = check_scale(scale)
    if method is not None:
        method = Method.parse(method, "method")
    max_output_bytes = check_int(max_output_bytes, "max_output_bytes", 1)
    if flags["self_train"] and model is not None:
        raise ParameterError("The 'model' parameter must not be given with self_train=True, got a model")
    if training is not None and not flags["self_train"] and not guided:
        raise ParameterError("The 'training' parameter must only be given with self_train=True")
    if progress is not None and not callable(progress):
        raise ParameterError(f"The 'progress' parameter must be callable, got {type(progress).__name__}")
    # A resolved spec (a batch run's one cluster) is used as it is.
    spec = scheduler if isinstance(scheduler, SchedulerSpec) and workers is None \
        else resolve_scheduler(scheduler, workers)
    user_opts = parse_creation_options(creation_options)
    check_chunk_size(chunk_size)
    return _Options(
        scale=scale, method=method, chunk_size=chunk_size, training=training, retries=retries,
        progress=progress,
        check_free_space=flags.pop("check_free_space"), max_output_bytes=max_output_bytes,
        scheduler=spec, creation_options=user_opts, detail_map=detail_map, **flags,
    )


def _listed(values):
    """A band list (``"1,2"``, ``[1, 2]`` or None) as a list of text, for the options tag."""
    if values is None:
        return None
    if isinstance(values, str):
        return [v.strip() for v in values.split(",")]
    return [str(v) for v in values]


def output_options(*, scale=None, method=None, bands=None, consistency=False, ensemble=False,
                   spectral_guard=True, self_train=False, training=None, guide=None,
                   guide_bands=None, cog=False, creation_options=None, stac=False, **_ignored):
    """The options that change what a run writes, as canonical JSON (``GEOSR_OPTIONS``).

    Takes :func:`magnify_raster`'s keywords; those that cannot change the
    output files (``chunk_size``: chunked equals whole; ``workers``,
    ``scheduler``, ``retries``, ``progress``, the size checks) are ignored.
    Guides are recorded by file name, not by checksum.

    Returns
    -------
    str
    """
    return options_json({
        "scale": None if scale is None else int(scale),
        "method": None if method is None else str(Method.parse(method, "method")),
        "bands": _listed(bands),
        "consistency": bool(consistency),
        "ensemble": bool(ensemble),
        "spectral_guard": bool(spectral_guard),
        "self_train": bool(self_train),
        "training": None if training is None else {k: v for k, v in training.items() if k != "progress"},
        "guide": None if guide is None else [
            os.path.basename(os.fspath(g)) for g in
            ([guide] if isinstance(guide, (str, os.PathLike)) else guide)
        ],
        "guide_bands": _listed(guide_bands),
        "cog": bool(cog),
        "creation_options": parse_creation_options(creation_options),
        "stac": bool(stac),
    })


def _output_dtype(info: SourceInfo, bands: Sequence[int]) -> str:
    return str(np.result_type(*[info.dtypes[b - 1] for b in bands]))


def _check_detail_destination(detail_map, reads, models, outputs, overwrite):
    """The detail map's path, checked: none of the files read, and not another output."""
    path = check_destination(detail_map, reads, overwrite, name="detail_map", reads=models, sidecars=(".aux.xml",))
    for out in outputs:
        if out is not None and os.path.realpath(out) == os.path.realpath(path):
            raise DestinationError(
                f"The detail map {os.fspath(detail_map)!r} must differ from the other outputs, "
                f"got {os.fspath(out)!r}"
            )
    return path


def _check_destinations(info, dst, count, scale, dtype, opts, reads=None, models=()):
    """The output, STAC and detail map paths (or None), checked; the size refused early.

    ``reads`` lists the rasters the run reads (the source by default, then
    the guides); each one's own files (VRT members, mask, overview and
    metadata sidecars) are never written, nor the ``models`` files.
    """
    reads = list(reads or [info.path])
    dst_path = check_destination(dst, reads, opts.overwrite, reads=models, sidecars=(".aux.xml",))
    stac_dst = detail_dst = None
    if opts.stac:
        stac = stac_path(dst_path)
        if os.path.abspath(stac) == os.fspath(dst_path):
            raise DestinationError(
                f"The STAC sidecar {str(stac)!r} must differ from the destination, got the destination "
                "itself (the sidecar is DST with '.json'); give DST a raster extension such as .tif"
            )
        stac_dst = check_destination(stac, reads, opts.overwrite, name="stac", reads=[*models, dst_path])
    if opts.detail_map is not None:
        detail_dst = _check_detail_destination(opts.detail_map, reads, models, (dst_path, stac_dst), opts.overwrite)
    out_bytes = scale * scale * info.width * info.height * count * np.dtype(dtype).itemsize
    if out_bytes > opts.max_output_bytes:
        raise InputError(
            f"The output of {info.name!r} magnified x{scale} ({scale * info.width} x "
            f"{scale * info.height} pixels, {count} band{'s' if count != 1 else ''} "
            f"of {dtype}) must be at most max_output_bytes={opts.max_output_bytes} bytes "
            f"uncompressed, got {out_bytes}; raise max_output_bytes (--max-output) if this "
            "size is intended"
        )
    if opts.check_free_space:
        _check_free_space(dst_path.parent, out_bytes * (2 if opts.cog else 1))
    return dst_path, stac_dst, detail_dst


def _model_files(model):
    """The model file a run reads, as a list (empty for model objects or the shipped model)."""
    return [os.fspath(model)] if isinstance(model, (str, os.PathLike)) else []


def _self_train(info, magnified, scale, opts):
    """Models learned from the source itself (treated as the high-res reference)."""
    options = dict(opts.training or {})
    for key in _RUN_KEYS:
        if key in options:
            raise ParameterError(f"The 'training' parameter must not set {key!r}; it is taken from the run")
    options.setdefault("chunk_size", max(opts.chunk_size, 64))
    options.setdefault("retries", opts.retries)
    models = train_from_rasters(
        [info.path], scale, bands=list(magnified), method=opts.method, scheduler=opts.scheduler,
        **options,
    )
    check_models(models, scale, opts.method, magnified)
    return models


def _plan(src, dst, model, bands, opts):
    """Source, bands, models and blocks; the destinations checked before any training."""
    info = inspect_source(src)
    split = split_bands(info, bands)
    dtype = _output_dtype(info, split.selected)
    scale, models = opts.scale, None
    # A given model (or the shipped one) fixes the scale before the destination checks.
    if not opts.self_train:
        choice = resolve_models(model, scale=scale, method=opts.method, bands=split.magnified)
        models, scale = choice.models, choice.scale
    elif scale is None:
        raise ParameterError("The 'scale' parameter must be given when no model is, got None")
    dests = _check_destinations(info, dst, len(split.selected), scale, dtype, opts, models=_model_files(model))
    if models is None:
        models = _self_train(info, split.magnified, scale, opts)
    plan = plan_blocks(info, split, list(models), scale, dtype=dtype, chunk_size=opts.chunk_size,
                       consistency=opts.consistency, ensemble=opts.ensemble,
                       spectral_guard=opts.spectral_guard, retries=opts.retries)
    if opts.detail_map is not None:
        plan = dataclasses.replace(plan, block_plan=dataclasses.replace(plan.block_plan, detail=True))
    return plan, dests


@dataclasses.dataclass(frozen=True)
class _Output:
    """What is written besides the pixels: profile, tags, creation options."""

    profile: dict[str, Any]
    tags: dict[str, str]
    band_tags: list[dict[str, str]]
    cog_options: dict[str, str] | None
    method: str
    created: str


def _creation_options(plan, opts):
    """GeoTIFF and COG creation options, checked by GDAL when the user gave some."""
    dtype, count, user = plan.block_plan.dtype, len(plan.bands.selected), opts.creation_options
    gt_opts = gtiff_options({} if opts.cog else user, dtype, choose_blocksize(plan.scale * plan.chunk))
    info = plan.info
    geo = {"crs": info.crs, "transform": scaled_transform(info.transform, plan.scale)} \
        if info.crs is not None and not info.transform.is_identity else {}
    if user and not opts.cog:
        validate_creation_options(gt_opts, driver="GTiff", dtype=dtype, count=count, **geo)
    cog_opts = cog_options(user, dtype) if opts.cog else None
    if opts.cog and user:
        validate_creation_options(cog_opts, driver="COG", dtype=dtype, count=count, **geo)
    return gt_opts, cog_opts


def _warn_georeferencing(info):
    # RPCs are carried, scaled to the new grid (geosr.raster.transforms.scale_rpcs).
    if info.crs is None and not (info.gcps and info.gcps_crs is not None) and info.rpcs is None:
        what = "a geotransform" if not info.transform.is_identity else "no georeferencing"
        warnings.warn(
            f"The source raster {info.name!r} has no CRS ({what}); the output has no CRS either",
            GeoreferencingWarning,
            stacklevel=4,
        )


def _warn_categorical(info, categorical):
    """Say that palette and 1-bit bands are copied by nearest neighbour, not synthesized."""
    if categorical:
        warnings.warn(
            f"The source raster {info.name!r} has categorical band"
            f"{'s' if len(categorical) > 1 else ''} {', '.join(map(str, categorical))} (palette or "
            "1-bit); categorical bands are not synthesized: they are magnified by nearest "
            "neighbour, which keeps every value one of the source's categories",
            UserWarning,
            stacklevel=4,
        )


def _describe_output(plan: MagnifyPlan, opts: _Options, guided: Any = None) -> _Output:
    """Profile, provenance tags and creation options of the output.

    ``guided`` (a :class:`~geosr.pipeline.guided.GuidedPlan`) describes a
    guided run: its method, model checksum and per-band guide correlation.
    """
    from ..raster.writing import output_profile

    info, bp = plan.info, plan.block_plan
    gt_opts, cog_opts = _creation_options(plan, opts)
    _warn_georeferencing(info)
    _warn_categorical(info, plan.bands.categorical)
    if guided is None:
        method_name = model_method(plan.models[0])
        shas = [model_sha(plan.models[r]) for r in bp.roles if r >= 0] or ["none"]
    else:
        method_name, shas = GUIDED_METHOD, [guided.model.sha256_]
    created = utc_now()
    tags = carried_tags(info.tags)
    tags.update(provenance_tags(
        scale=plan.scale, method=method_name, model_sha256=shas,
        source_name=info.name, created=created, consistency=opts.consistency, ensemble=opts.ensemble,
        spectral_guard=bp.spectral_guard, source_sha256=file_sha256(info.path), options=opts.options,
    ))
    band_tags = []
    n_magnified = 0
    for b, r in zip(bp.bands, bp.roles):
        bt = carried_band_tags(info.band_tags[b - 1])
        if r >= 0 and guided is not None:
            bt["GEOSR_MODEL_SHA256"] = guided.model.sha256_
            bt["GEOSR_GUIDE_CORRELATION"] = f"{float(guided.model.correlation_[n_magnified]):.4f}"
            n_magnified += 1
        elif r >= 0:
            bt["GEOSR_MODEL_SHA256"] = model_sha(plan.models[r])
        else:
            bt["GEOSR_RESAMPLING"] = "nearest"
        band_tags.append(bt)
    profile = output_profile(info, bp.bands, bp.dtype, plan.scale, bp.nodata, gt_opts)
    return _Output(profile, tags, band_tags, cog_opts, method_name, created)


@dataclasses.dataclass(frozen=True)
class BlockRun:
    """How the blocks of a run are computed: the task, its jobs and shared arguments.

    ``finish(counts)`` (optional) returns ``(tags, band_tags)`` to add to the
    output once every block is written; ``counts`` holds ``valid``,
    ``fallback`` and ``pixels`` (output pixels of the magnified bands).
    """

    task: Any
    jobs: list[Any]
    shared: list[Any]
    finish: Any = None


def _single_image_run(plan):
    bp = plan.block_plan
    return BlockRun(_magnify_task, [_MagnifyJob(bp, b) for b in plan.blocks], list(plan.models))


def _run_blocks(plan, output, tmp, opts, run=None, detail=None):
    """Magnify every block into ``tmp``; the consistency residuals (or None).

    ``detail`` (a :class:`_DetailMap`) also writes the blocks' detail
    magnitude into its temporary and sums its statistics.
    """
    from ..raster.writing import OutputRaster

    bp = plan.block_plan
    run = run or _single_image_run(plan)
    n_magnified = sum(1 for r in bp.roles if r >= 0)
    counts = {"valid": 0, "fallback": 0, "residual": ResidualStats.empty(len(bp.bands)),
              "pixels": plan.scale ** 2 * plan.info.width * plan.info.height * n_magnified}
    with OutputRaster(tmp, output.profile, plan.scale, write_mask=bp.mode is MaskMode.MASK) as out, \
            contextlib.ExitStack() as stack:
        out.set_metadata(plan.info, bp.bands, output.tags, output.band_tags)
        detail_out = None
        if detail is not None:
            detail_out = stack.enter_context(detail.raster(plan, output))
            detail.describe(detail_out, plan, output)

        def consume(result):
            out.write(result)
            if detail_out is not None:
                detail.write(detail_out, result)
            counts["valid"] += result.n_valid
            counts["fallback"] += result.n_fallback
            if result.residual is not None:
                counts["residual"] = counts["residual"] + result.residual

        run_tasks(run.task, run.jobs, run.shared, consume, scheduler=opts.scheduler,
                  retries=opts.retries, progress=opts.progress, label="magnify")
        residuals = None
        if opts.consistency:
            residuals = consistency_residuals(counts["residual"], bp.roles)
            out.update_tags(*consistency_tags(residuals))
            _warn_residuals(residuals)
        if run.finish is not None:
            out.update_tags(*run.finish(counts))
        if detail_out is not None:
            out.update_tags(detail.tags())
            detail_out.update_tags(detail.tags())
    if counts["valid"] == 0 and n_magnified:
        warnings.warn(
            f"The source raster {plan.info.name!r} has no valid pixel in the magnified bands; "
            "the output is entirely nodata",
            UserWarning,
            stacklevel=4,
        )
    return residuals


#: What a detail map holds (its ``GEOSR_DETAIL_DEFINITION`` tag).
DETAIL_DEFINITION = (
    "per pixel, the RMS over the magnified bands of the output minus the bicubic "
    "interpolation of the input, in the output's units; NaN where the output is invalid"
)


@dataclasses.dataclass
class _DetailMap:
    """The detail map of a run: final path, temporary and running statistics."""

    path: Any
    tmp: Any
    stats: DetailStats = dataclasses.field(default_factory=DetailStats)

    def raster(self, plan, output):
        """The temporary float32 GeoTIFF on the output grid (not yet open)."""
        from ..raster.writing import OutputRaster

        profile = {"driver": "GTiff", "count": 1, "dtype": "float32", "nodata": float("nan")}
        profile.update({k: output.profile[k] for k in ("width", "height", "crs", "transform")
                        if k in output.profile})
        profile.update(gtiff_options({}, "float32", choose_blocksize(plan.scale * plan.chunk)))
        return OutputRaster(self.tmp, profile, plan.scale)

    def describe(self, raster, plan, output):
        """The output's provenance tags, the definition and the georeferencing by GCPs or RPCs."""
        from ..raster.transforms import scale_rpcs

        info = plan.info
        tags = dict(output.tags)
        tags["GEOSR_DETAIL_DEFINITION"] = DETAIL_DEFINITION
        tags["TIFFTAG_IMAGEDESCRIPTION"] = f"geosr detail map: {DETAIL_DEFINITION}"
        raster.update_tags(tags)
        raster.ds.set_band_description(1, "detail magnitude")
        if info.transform.is_identity and info.gcps:
            raster.ds.gcps = (scale_gcps(info.gcps, plan.scale), info.gcps_crs)
        if info.rpcs is not None:
            raster.ds.rpcs = scale_rpcs(info.rpcs, plan.scale)

    def write(self, raster, result):
        """Write a block's detail and add it to the statistics."""
        raster.write(dataclasses.replace(result, data=result.detail[np.newaxis], mask=None))
        self.stats.add(result.detail)

    def tags(self):
        """``GEOSR_DETAIL_*`` tags: the map's file name and its mean, 95th percentile and maximum."""
        summary = self.stats.summary()
        tags = {f"GEOSR_DETAIL_{k.upper()}": f"{v:.6g}" for k, v in summary.items()}
        tags["GEOSR_DETAIL_MAP"] = os.path.basename(os.fspath(self.path))
        return tags

    def add_to_stac(self, item, dst_path):
        """A second asset (the map, role "metadata") and its statistics as properties."""
        item["assets"]["detail"] = {
            "href": os.path.relpath(os.path.abspath(self.path), os.path.dirname(os.path.abspath(dst_path))),
            "type": "image/tiff; application=geotiff",
            "title": "Detail magnitude (output minus bicubic interpolation of the input)",
            "description": DETAIL_DEFINITION,
            "roles": ["metadata", "detail-map"],
        }
        for key, value in self.stats.summary().items():
            item["properties"][f"geosr:detail_{key}"] = value if np.isfinite(value) else None
        return item


def _warn_residuals(residuals):
    worst = [r for r in residuals if not r.within_tolerance]
    if worst:
        warnings.warn(
            f"The consistency residual of band {worst[0].band} is {worst[0].percent:.3g} % "
            f"of its range, above the stated {100 * CONSISTENCY_TOLERANCE:g} %; the "
            "degradation model may not describe this data",
            UserWarning,
            stacklevel=5,
        )


def _stac_item(plan, output, dst_path, cog, sources=()):
    info = plan.info
    by_gcps = info.transform.is_identity and bool(info.gcps)
    return stac_item(
        sources=sources,
        dst=dst_path, src=info.path, width=info.width * plan.scale, height=info.height * plan.scale,
        count=len(plan.bands.selected), crs=info.gcps_crs if by_gcps else info.crs,
        gcps=scale_gcps(info.gcps, plan.scale) if by_gcps else None,
        transform=scaled_transform(info.transform, plan.scale), scale=plan.scale,
        method=output.method, model_sha256=output.tags["GEOSR_MODEL_SHA256"], created=output.created,
        cog=cog, source_name=info.name,
        band_names=[info.descriptions[b - 1] or f"band{b}" for b in plan.bands.selected],
    )


def _write_sidecar(temps, stac_dst, make_item):
    """Write the STAC sidecar; a failure is a warning, never the loss of the raster."""
    tmp = temps.new(stac_dst, ".json")
    try:
        write_stac_item(tmp, make_item())
    except (OSError, ValueError, TypeError, ArithmeticError) as exc:
        temps.discard(tmp)
        warnings.warn(
            f"The STAC sidecar {os.fspath(stac_dst)!r} was not written ({type(exc).__name__}: {exc}); "
            "the raster is written without it",
            UserWarning,
            stacklevel=4,
        )


def _write_outputs(plan, output, dests, opts, run=None, sources=()):
    """Write the raster (and the COG copy and STAC sidecar) and rename them into place.

    A failure or an interrupt (KeyboardInterrupt) leaves neither the
    destination nor a temporary. Turning SIGTERM into KeyboardInterrupt is
    the program's choice (the command line does).
    """
    from ..raster.writing import copy_to_cog

    dst_path, stac_dst, detail_dst = dests
    for path in (dst_path, stac_dst, detail_dst):
        if path is not None:
            remove_stale_temps(path)
    with TempFiles() as temps:
        tmp = temps.scratch(dst_path, ".tif") if opts.cog else temps.new(dst_path, ".tif")
        detail = _DetailMap(detail_dst, temps.new(detail_dst, ".tif")) if detail_dst is not None else None
        residuals = _run_blocks(plan, output, tmp, opts, run, detail)
        if opts.cog:
            final = temps.new(dst_path, ".tif")
            log.info("writing the Cloud Optimized GeoTIFF")
            copy_to_cog(tmp, final, output.cog_options)
            temps.discard(tmp)
        if stac_dst is not None:
            def make_item():
                item = _stac_item(plan, output, dst_path, opts.cog, sources)
                return item if detail is None else detail.add_to_stac(item, dst_path)

            _write_sidecar(temps, stac_dst, make_item)
        temps.commit(opts.overwrite)
    return residuals


def _given_guided_model(model):
    """A guided model given as an object or a file, or None."""
    if isinstance(model, (str, os.PathLike)):
        from ..modelfile import load_guided_model

        return load_guided_model(model)
    return model


def _learn_guided_model(info, bp, spec, opts):
    """A guided model learned on the scene at reduced resolution."""
    from ..modelfile import guided_model_sha256

    params = dict(GUIDED_DEFAULTS)
    params.update(opts.training or {})
    progress = params.pop("progress", None)
    magnified = tuple(b for b, r in zip(bp.bands, bp.roles) if r >= 0)
    learn_bp = learning_block_plan(info, magnified, bp.scale, degradation=params.get("degradation", "bicubic"),
                                   sigma=params.get("sigma"), retries=opts.retries)
    try:
        model = learn_guided(learn_bp, spec, params, chunk_size=max(opts.chunk_size, learn_bp.halo, 64),
                             scheduler=opts.scheduler, retries=opts.retries, progress=progress)
    except TypeError as exc:
        raise ParameterError(f"The 'training' parameter must hold guided-model parameters, got: {exc}") from None
    model.sha256_ = guided_model_sha256(model)
    return model


def _fallback_models(scale, method, bands):
    """The single-image models used where the guide has no valid pixel."""
    if scale in (2, 3, 4) or method is not None:
        return resolve_models(None, scale=scale, method=method, bands=bands).models
    return (BicubicFallback(scale),)


def _plan_guided(src, dst, model, bands, guide, guide_bands, opts):
    """Source, guide, fallback and guided models, blocks; destinations checked before learning."""
    from ..raster.guide import open_guides

    check_guided_options(opts)
    info = inspect_source(src)
    split = split_bands(info, bands)
    if not split.magnified:
        raise ParameterError(
            f"The bands of {info.name!r} must include one that is not alpha or categorical for "
            "guided magnification, got none"
        )
    guides = [guide] if isinstance(guide, (str, os.PathLike)) else list(guide)
    spec = open_guides(guides, info, scale=opts.scale, guide_bands=guide_bands)
    dtype = _output_dtype(info, split.selected)
    fallback = _fallback_models(spec.scale, opts.method, split.magnified)
    single = plan_blocks(info, split, list(fallback), spec.scale, dtype=dtype,
                         chunk_size=opts.chunk_size, spectral_guard=False, retries=opts.retries)
    given = _given_guided_model(model)
    if given is not None:
        given = check_guided_model(given, spec.scale, len(split.magnified), len(spec.bands))
        where = given.get_params()
    else:
        where = {"degradation": "bicubic", "sigma": None, **(opts.training or {})}
    bp = guided_block_plan(single.block_plan, where["degradation"], where["sigma"])
    bp = dataclasses.replace(bp, detail=opts.detail_map is not None)
    check_chunk_size(opts.chunk_size, bp.halo)
    dests = _check_destinations(info, dst, len(split.selected), spec.scale, dtype, opts, [info.path, *spec.paths],
                                _model_files(model))
    guided_model = given if given is not None else _learn_guided_model(info, bp, spec, opts)
    names = [info.descriptions[b - 1] or f"band {b}" for b in split.magnified]
    warn_weak_correlation(guided_model, names)
    plan = dataclasses.replace(single, block_plan=bp, halo=bp.halo)
    guided = GuidedPlan(spec, guided_model, bp, single.block_plan, fallback, given is None)
    return plan, guided, dests


def _magnify_guided(src, dst, model, bands, guide, guide_bands, opts, started):
    plan, guided, dests = _plan_guided(src, dst, model, bands, guide, guide_bands, opts)
    output = _describe_output(plan, opts, guided)
    spec = guided.guide
    fraction: dict[str, float] = {}

    def finish(counts):
        tags = guided_tags(spec, guided.model, counts)
        fraction["value"] = float(tags["GEOSR_GUIDE_FALLBACK_FRACTION"])
        return tags, ()

    run = BlockRun(guided.task, guided.jobs(plan.blocks), guided.shared, finish)
    sources = [(p, f"Guide raster {os.path.basename(p)}") for p in spec.paths]
    _write_outputs(plan, output, dests, opts, run, sources)
    info = plan.info
    return MagnifyResult(
        dst=dests[0], stac=dests[1], width=info.width * plan.scale, height=info.height * plan.scale,
        count=len(plan.bands.selected), scale=plan.scale, method=GUIDED_METHOD,
        model_sha256=guided.model.sha256_, blocks=len(plan.blocks), halo=plan.halo,
        chunk_size=plan.chunk, seconds=time.monotonic() - started,
        scheduler=opts.scheduler.describe(), guide=tuple(spec.paths),
        guide_correlation=tuple(float(r) for r in guided.model.correlation_),
        fallback_fraction=fraction.get("value"),
    )


def magnify_raster(
    src: str | os.PathLike[str],
    dst: str | os.PathLike[str],
    model: Any = None,
    *,
    scale: int | None = None,
    method: str | Method | None = None,
    chunk_size: int = 1024,
    workers: int | None = None,
    scheduler: Any = None,
    bands: Sequence[int | str] | str | None = None,
    overwrite: bool = False,
    cog: bool = False,
    creation_options: Mapping[str, Any] | Sequence[str] | None = None,
    consistency: bool = False,
    ensemble: bool = False,
    spectral_guard: bool = True,
    stac: bool = False,
    retries: int = 2,
    self_train: bool = False,
    training: dict[str, Any] | None = None,
    max_output_bytes: int = DEFAULT_MAX_OUTPUT_BYTES,
    check_free_space: bool = True,
    progress: ProgressCallback | None = None,
    guide: str | os.PathLike[str] | Sequence[str | os.PathLike[str]] | None = None,
    guide_bands: Sequence[int] | str | None = None,
    detail_map: str | os.PathLike[str] | None = None,
) -> MagnifyResult:
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
    scheduler : str, distributed.Client or SchedulerSpec, optional
        ``"threads"`` (default), ``"processes"``, ``"synchronous"``, or a
        cluster address ``"tcp://host:port"`` (the workers must reach
        ``src`` under the same path); or a resolved
        :class:`~geosr.parallel.schedule.SchedulerSpec` (used as it is, so
        that many runs share one cluster).
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
    retries : int
        Extra attempts for a failing block task.
    self_train : bool
        Learn the model from ``src`` itself (treated as the high-res
        reference) before magnifying it.
    training : dict, optional
        Keyword arguments of :func:`~geosr.pipeline.train.train_from_rasters` for ``self_train``
        (``shared``, ``max_samples``, ``n_atoms``, ``progress``, ...).
    max_output_bytes : int
        Refuse outputs larger than this, uncompressed.
    check_free_space : bool
        Refuse to start when the destination's file system has less room
        than the uncompressed output (twice that for a COG).
    progress : callable, optional
        Called as ``progress(done, total)`` with the number of finished
        blocks: ``(0, total)`` before the first, then once per block. The
        self-training stage reports through ``training["progress"]``.
        Messages go to the ``geosr.pipeline.magnify`` logger.
    guide : path or sequence of paths, optional
        Finer co-registered rasters whose measured detail guides the
        magnification (guided path). The scale is their pixel-size ratio to
        ``src`` (an integer 2 to 8; ``scale`` must agree when given). Guides
        on another grid are resampled onto the exact fine grid. A guided
        model is learned on the scene at reduced resolution (``training``:
        ``max_samples``, ``ridge``, ``degradation``, ``sigma``,
        ``random_state``, ``progress``) unless ``model`` is one saved by
        ``geosr train --guide``. Where the guide has no valid pixel the
        single-image model shipped for the scale (of ``method``) fills in;
        the tags count those pixels.
    guide_bands : sequence of int or str, optional
        1-based bands over the guide files stacked in order (all by default).
    detail_map : str or os.PathLike, optional
        Also write a float32 GeoTIFF on the output grid holding, per pixel,
        the RMS over the magnified bands of the output minus the bicubic
        interpolation of the input (NaN where the output is invalid), with
        the output's provenance tags. Its mean, 95th percentile and maximum
        go into the output's tags (``GEOSR_DETAIL_MEAN``, ``_P95``,
        ``_MAX``) and the STAC sidecar (asset ``detail``). Must be none of
        the files the run reads or writes; ``overwrite`` applies to it too.

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
    given = dict(scale=scale, method=method, bands=bands, consistency=consistency, ensemble=ensemble,
                 spectral_guard=spectral_guard, self_train=self_train, training=training, guide=guide,
                 guide_bands=guide_bands, cog=cog, creation_options=creation_options, stac=stac)
    opts = _check_options(
        model, scale=scale, method=method, chunk_size=chunk_size, workers=workers,
        scheduler=scheduler, creation_options=creation_options, max_output_bytes=max_output_bytes,
        training=training, retries=retries, overwrite=overwrite, cog=cog, consistency=consistency,
        ensemble=ensemble, spectral_guard=spectral_guard, stac=stac, self_train=self_train,
        check_free_space=check_free_space, progress=progress, guided=guide is not None,
        detail_map=detail_map,
    )
    opts = dataclasses.replace(opts, options=output_options(**given))
    if guide is not None:
        return _magnify_guided(src, dst, model, bands, guide, guide_bands, opts, started)
    if guide_bands is not None:
        raise ParameterError("The 'guide_bands' parameter must only be given with a guide")
    plan, dests = _plan(src, dst, model, bands, opts)
    output = _describe_output(plan, opts)
    residuals = _write_outputs(plan, output, dests, opts)
    info = plan.info
    return MagnifyResult(
        dst=dests[0],
        stac=dests[1],
        width=info.width * plan.scale,
        height=info.height * plan.scale,
        count=len(plan.bands.selected),
        scale=plan.scale,
        method=output.method,
        model_sha256=output.tags["GEOSR_MODEL_SHA256"],
        blocks=len(plan.blocks),
        halo=plan.halo,
        chunk_size=plan.chunk,
        seconds=time.monotonic() - started,
        scheduler=opts.scheduler.describe(),
        consistency=residuals,
    )
