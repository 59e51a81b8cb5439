"""``geosr magnify SRC DST``: magnify a raster by an integer factor."""

from __future__ import annotations

import click

from . import options


@click.command(short_help="Magnify a raster by an integer factor.")
@click.argument("src", metavar="SRC")
@click.argument("dst", metavar="DST")
@options.model_source_options(
    "SRC",
    "Model file from 'geosr train'. Default: the model shipped for --scale.",
)
@options.degradation_option
@options.scale_option(
    required=False,
    help="Integer magnification factor, 2 to 8. Default: the scale of --model.",
)
@options.method_option
@options.bands_option
@options.guide_option
@options.guide_bands_option
@options.chunk_option
@options.workers_option
@options.scheduler_option
@click.option(
    "--co",
    "creation_options",
    type=options.KeyValueType(),
    multiple=True,
    metavar="KEY=VALUE",
    help="GDAL creation option of the output, e.g. --co COMPRESS=ZSTD; repeatable.",
)
@click.option("--cog", is_flag=True, default=False, help="Write a Cloud Optimized GeoTIFF.")
@options.overwrite_option
@click.option(
    "--consistency",
    is_flag=True,
    default=False,
    help="Back-project so that degrading the output reproduces SRC.",
)
@click.option(
    "--ensemble",
    is_flag=True,
    default=False,
    help="Average the 8 flips and rotations (slower, a little better).",
)
@options.spectral_guard_option
@click.option(
    "--stac", is_flag=True, default=False, help="Also write a STAC Item JSON beside DST."
)
@click.option(
    "--max-output",
    "max_output_bytes",
    type=options.ByteSize(),
    default="256G",  # the library's DEFAULT_MAX_OUTPUT_BYTES, as the help says
    metavar="SIZE",
    help="Refuse outputs larger than SIZE uncompressed, e.g. 500G. Default 256G.",
)
@click.option(
    "--no-space-check",
    "no_space_check",
    is_flag=True,
    default=False,
    help="Start even when the destination's disk has less room than the uncompressed "
    "output (when compression will make it fit).",
)
@options.config_option
@options.quiet_option
@click.pass_context
def magnify(ctx, src, dst, model, self_train, train_atoms, train_samples, degradation, scale, method, bands,
            guides, guide_bands, chunk, workers, scheduler, creation_options, cog, overwrite, consistency, ensemble, spectral_guard,
            stac, max_output_bytes, no_space_check, quiet):
    """Magnify the raster SRC by an integer factor into DST.

    The CRS is kept, the geotransform refined, nodata and band metadata
    carried over, and DST is tagged as synthesized detail, not measured data.
    Without --model or --self-train the model shipped for --scale is used.

    \b
    Examples:
      geosr magnify scene.tif scene-x3.tif --scale 3
      geosr magnify tile.tif tile-x4.tif --model drone-x4.npz --cog
      geosr magnify big.tif big-x2.tif -s 2 --scheduler tcp://10.0.0.5:8786
    """
    model, self_train = options.exclusive(ctx, "model", "self_train")
    workers, scheduler = options.workers_and_scheduler(ctx)
    if model is None and not self_train and scale is None and not guides:
        raise click.UsageError(
            "Missing option '--scale': it is needed to pick the shipped model "
            "when neither --model nor --self-train is given",
            ctx=ctx,
        )
    training = {
        k: v
        for k, v in (("n_atoms", train_atoms), ("max_samples", train_samples),
                     ("degradation", degradation))
        if v is not None
    }
    names = {"n_atoms": "--atoms", "max_samples": "--samples", "degradation": "--degradation"}
    if guides:
        _check_guided_usage(ctx, training, self_train)
    elif training and not self_train:
        given = ", ".join(names[k] for k in training)
        raise click.UsageError(f"{given} only apply with --self-train, got them without it", ctx=ctx)
    elif guide_bands:
        raise click.UsageError("--guide-bands only applies with --guide, got it without", ctx=ctx)
    from ..pipeline.magnify import magnify_raster
    from .progress import library_output, progress_bars

    with library_output(quiet), progress_bars("magnify", quiet) as bar, \
            progress_bars("learn" if guides else "train: collect", quiet) as train_bar:
        if (self_train or guides) and train_bar is not None:
            training["progress"] = train_bar
        result = magnify_raster(
            src,
            dst,
            model,
            scale=scale,
            method=method,
            chunk_size=chunk,
            workers=workers,
            scheduler=scheduler,
            bands=list(bands) if bands else None,
            overwrite=overwrite,
            cog=cog,
            creation_options=dict(creation_options) or None,
            consistency=consistency,
            ensemble=ensemble,
            spectral_guard=spectral_guard,
            stac=stac,
            self_train=self_train,
            training=training or None,
            max_output_bytes=max_output_bytes,
            check_free_space=not no_space_check,
            progress=bar,
            guide=list(guides) or None,
            guide_bands=list(guide_bands) if guide_bands else None,
        )
    options.report(ctx, f"geosr: wrote {_summary(result)}")
    _report_guided(ctx, result)
    for residual in result.consistency or ():
        if residual.rms is not None:
            options.report(
                ctx,
                f"geosr: band {residual.band} consistency residual RMS {residual.rms:.4g} "
                f"({residual.percent:.3g} % of its range), max {residual.max:.4g}",
            )
    if result.stac is not None:
        options.report(ctx, f"geosr: wrote {result.stac}")


def _summary(result):
    """One line about what magnify_raster wrote: a :class:`MagnifyResult`."""
    size = f"{result.width} x {result.height}, {result.count} band"
    size += "s" if result.count != 1 else ""
    return f"{result.dst} ({size}, x{result.scale}, {result.method}, {result.seconds:.1f} s)"


def _check_guided_usage(ctx, training, self_train):
    """Options that do not apply to a guided run."""
    if "n_atoms" in training:
        raise click.UsageError("--atoms does not apply with --guide (a guided model has no atoms)", ctx=ctx)
    if self_train:
        raise click.UsageError(
            "--self-train does not apply with --guide: a guided run learns on SRC unless "
            "--model gives a guided model",
            ctx=ctx,
        )


def _report_guided(ctx, result):
    """The guide's correlation per band and the fallback share of a guided run."""
    if not result.guide:
        return
    corr = ", ".join(f"{r:.2f}" for r in result.guide_correlation)
    options.report(ctx, f"geosr: guide correlation per band: {corr}")
    if result.fallback_fraction:
        options.report(
            ctx,
            f"geosr: {100 * result.fallback_fraction:.3g} % of the output pixels had no valid "
            "guide pixel and were magnified without it",
        )
