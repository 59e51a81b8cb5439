"""``geosr magnify SRC DST`` (one raster) or ``geosr magnify SRC... --output-dir DIR`` (many)."""

from __future__ import annotations

import click

from . import options


@click.command(short_help="Magnify a raster (or many) by an integer factor.")
@click.argument("paths", nargs=-1, metavar="SRC... [DST]")
@click.option(
    "--output-dir",
    "-O",
    "output_dir",
    type=click.Path(file_okay=False),
    default=None,
    metavar="DIR",
    help="Magnify every SRC into DIR (then there is no DST); @LIST.txt reads sources "
    "from a file, one per line. Up-to-date outputs are skipped.",
)
@click.option(
    "--name",
    "name_template",
    default=None,
    metavar="TEMPLATE",
    help="With --output-dir: output file names from {stem}, {scale} and {method}. "
    "Default: {stem}-x{scale}.tif.",
)
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
    "--detail-map",
    type=click.Path(dir_okay=False),
    default=None,
    metavar="PATH",
    help="Also write a float32 GeoTIFF of the synthesized detail per pixel (RMS over bands "
    "of DST minus the bicubic interpolation of SRC).",
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
def magnify(ctx, paths, output_dir, name_template, model, self_train, train_atoms, train_samples, degradation, scale, method, bands,
            guides, guide_bands, chunk, workers, scheduler, creation_options, cog, overwrite, consistency, ensemble, spectral_guard,
            stac, detail_map, max_output_bytes, no_space_check, quiet):
    """Magnify the raster SRC by an integer factor into DST.

    The CRS is kept, the geotransform refined, nodata and band metadata
    carried over, and DST is tagged as synthesized detail, not measured data.
    Without --model or --self-train the model shipped for --scale is used.

    With --output-dir every path is a source (@LIST.txt: the paths listed in
    that file), magnified in one run with one scheduler; outputs already up
    to date are skipped, a failing file is reported and the others go on, a
    summary ends the run and the exit code is 1 if any file failed.

    \b
    Examples:
      geosr magnify scene.tif scene-x3.tif --scale 3
      geosr magnify tile.tif tile-x4.tif --model drone-x4.npz --cog
      geosr magnify big.tif big-x2.tif -s 2 --scheduler tcp://10.0.0.5:8786
      geosr magnify tiles/*.tif --output-dir out -s 2 --workers 4
      geosr magnify @tiles.txt --output-dir out -s 3 --name '{stem}_sr{scale}.tif'
    """
    src, dst = _check_paths(ctx, paths, output_dir, name_template)
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
    run = dict(
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
        guide=list(guides) or None,
        guide_bands=list(guide_bands) if guide_bands else None,
    )
    if output_dir is not None:
        if detail_map is not None:
            raise click.UsageError("--detail-map applies to one SRC and DST, got it with --output-dir", ctx=ctx)
        _magnify_batch(ctx, paths, output_dir, name_template, model, run, quiet)
        return
    from ..pipeline.magnify import magnify_raster
    from .progress import library_output, progress_bars

    with library_output(quiet), progress_bars("magnify", quiet) as bar, \
            progress_bars("learn" if guides else "train: collect", quiet) as train_bar:
        if (self_train or guides) and train_bar is not None:
            run["training"] = {**training, "progress": train_bar}
        result = magnify_raster(src, dst, model, progress=bar, detail_map=detail_map, **run)
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


def _check_paths(ctx, paths, output_dir, name_template):
    """SRC and DST of the one-file form (None, None for the batch form), usage checked."""
    if output_dir is not None:
        if not paths:
            raise click.UsageError("Missing argument 'SRC...': --output-dir needs at least one source", ctx=ctx)
        return None, None
    if name_template is not None:
        raise click.UsageError("--name only applies with --output-dir, got it without", ctx=ctx)
    if len(paths) != 2 or paths[0].startswith("@"):
        raise click.UsageError(
            f"magnify takes SRC DST for one raster, or SRC... --output-dir DIR for many; got "
            f"{len(paths)} path{'s' if len(paths) != 1 else ''} without --output-dir",
            ctx=ctx,
        )
    return paths[0], paths[1]


def _magnify_batch(ctx, paths, output_dir, name_template, model, run, quiet):
    """The batch form: every path a source, one line per failure, a summary, exit 1 on failures."""
    from ..pipeline.batch import DEFAULT_NAME, magnify_many, summary_table
    from .progress import library_output, progress_bars

    # On a terminal the bar's line is cleared first; the bar redraws below the error.
    clear = "\r\x1b[K" if not quiet and click.get_text_stream("stderr").isatty() else ""

    def on_item(item):
        if item.status == "failed":
            click.echo(f"{clear}geosr: error: {item.source}: {item.error}", err=True)

    with library_output(quiet), progress_bars("magnify", quiet, unit="files") as bar:
        items = magnify_many(paths, output_dir, model, name=name_template or DEFAULT_NAME,
                             progress=bar, on_item=on_item, **run)
    for line in summary_table(items):
        options.report(ctx, line)
    if any(item.status == "failed" for item in items):
        ctx.exit(1)


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
