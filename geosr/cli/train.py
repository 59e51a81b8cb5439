"""``geosr train HR_RASTER... -o MODEL``: learn a model from high-res references."""

from __future__ import annotations

import os

import click

from . import options


@click.command(short_help="Learn a model from high-resolution reference rasters.")
@click.argument("references", nargs=-1, required=True, metavar="HR_RASTER...")
@click.option(
    "--output",
    "-o",
    required=True,
    type=click.Path(dir_okay=False),
    metavar="MODEL",
    help="The model file to write (.npz).",
)
@options.scale_option(
    required=False,
    help="Integer magnification factor, 2 to 8. Required without --guide; with it, the "
    "guide's pixel-size ratio (and --scale must agree).",
)
@options.bands_option
@options.guide_option
@options.guide_bands_option
@click.option(
    "--shared",
    is_flag=True,
    default=False,
    help="Learn one model for all bands together instead of one model per band.",
)
@options.method_option
@options.degradation_option
@options.sigma_option
@click.option(
    "--atoms",
    "n_atoms",
    type=options.IntAtLeast(2),
    default=None,
    metavar="N",
    help="Dictionary size (anchors for --method anchored). Default 1000.",
)
@click.option(
    "--sparsity",
    type=options.IntAtLeast(1),
    default=None,
    metavar="L",
    help="Atoms per patch in orthogonal matching pursuit. Default 3.",
)
@click.option(
    "--iterations",
    "n_iter",
    type=options.IntAtLeast(0),
    default=None,
    metavar="N",
    help="K-SVD iterations. Default 40.",
)
@click.option(
    "--neighbours",
    type=options.IntAtLeast(1),
    default=None,
    metavar="N",
    help="Training features per anchor of the anchored method. Default 2048.",
)
@click.option(
    "--high-fit",
    type=click.Choice(["patch", "image"]),
    default=None,
    help="How the sparse method learns its high-res dictionary: least squares on the "
    "training patches, or then refined on dense tiles through the overlap averaging "
    "(stopped early on held-out tiles). Default patch.",
)
@click.option(
    "--samples",
    "max_samples",
    type=options.IntAtLeast(10),
    default=100_000,
    metavar="N",
    help="Training patches sampled across the references. Default 100000.",
)
@click.option(
    "--seed",
    "random_state",
    type=options.IntAtLeast(0),
    default=0,
    show_default=True,
    help="Seed of the sample selection and K-SVD; the same seed gives the same model.",
)
@options.chunk_option
@options.workers_option
@options.scheduler_option
@options.overwrite_option
@options.config_option
@options.quiet_option
@click.pass_context
def train(ctx, references, output, scale, bands, guides, guide_bands, shared, method, degradation, sigma,
          n_atoms, sparsity, n_iter, neighbours, high_fit, max_samples, random_state, chunk,
          workers, scheduler, overwrite, quiet):
    """Learn a model from the high-resolution rasters HR_RASTER and write it to MODEL.

    Training pairs are the references and their degraded copies; choose the
    degradation that describes how your coarse data was formed. By default
    each band gets its own model.

    With --guide, HR_RASTER is one coarse scene and the model is a guided
    one: learned on that scene at reduced resolution, for reuse with
    'geosr magnify --guide --model' on neighbouring tiles of the same
    acquisition.

    \b
    Examples:
      geosr train ref1.tif ref2.tif -o drone-x4.npz --scale 4
      geosr train ortho.tif -o x2.npz -s 2 --method anchored --shared
      geosr train tile-20m.tif --guide tile-10m.tif -o guided-x2.npz
    """
    from ..errors import DestinationError

    workers, scheduler = options.workers_and_scheduler(ctx)
    if os.path.exists(output) and not overwrite:
        raise DestinationError(
            f"The output model {output!r} must not exist already, got an existing file; "
            "use --overwrite to replace it"
        )
    if guides:
        _train_guided(ctx, references, output, scale, bands, guides, guide_bands, degradation, sigma,
                      max_samples, random_state, chunk, workers, scheduler, overwrite, quiet)
        return
    if guide_bands:
        raise click.UsageError("--guide-bands only applies with --guide, got it without", ctx=ctx)
    if scale is None:
        raise click.UsageError("Missing option '--scale' / '-s' (needed without --guide)", ctx=ctx)
    if sigma is not None and degradation not in (None, "gaussian"):
        raise click.UsageError(
            f"--sigma only applies to --degradation gaussian, got --degradation {degradation}",
            ctx=ctx,
        )
    from ..pipeline.train import train_from_rasters
    from .progress import library_output, progress_bars

    # CoupledDictionary parameters: only those given, the model has the defaults
    model_params = {
        name: value
        for name, value in (("degradation", degradation), ("sigma", sigma), ("n_atoms", n_atoms),
                            ("sparsity", sparsity), ("n_iter", n_iter),
                            ("neighbours", neighbours), ("high_fit", high_fit))
        if value is not None
    }
    with library_output(quiet), progress_bars("train: collect", quiet) as bar:
        models = train_from_rasters(
            list(references),
            scale,
            bands=list(bands) if bands else None,
            shared=shared,
            max_samples=max_samples,
            method=method,
            chunk_size=chunk,
            workers=workers,
            scheduler=scheduler,
            random_state=random_state,
            output=output,
            overwrite=overwrite,
            progress=bar,
            **model_params,
        )
    if shared:
        kind = "1 model shared by every band"
    else:
        n = len(models)
        kind = f"{n} model{'s' if n != 1 else ''}, one per band"
    options.report(ctx, f"geosr: wrote {output} ({kind}, x{scale})")


def _train_guided(ctx, references, output, scale, bands, guides, guide_bands, degradation, sigma,
                  max_samples, random_state, chunk, workers, scheduler, overwrite, quiet):
    """``geosr train SCENE --guide FINE -o MODEL``: learn and save a guided model."""
    if len(references) != 1:
        raise click.UsageError(
            f"With --guide, give exactly one coarse raster to learn from, got {len(references)}",
            ctx=ctx,
        )
    for name in ("shared", "method", "n_atoms", "sparsity", "n_iter", "neighbours", "high_fit"):
        if ctx.params.get(name):
            flag = "--" + {"n_atoms": "atoms", "n_iter": "iterations"}.get(name, name).replace("_", "-")
            raise click.UsageError(f"{flag} does not apply with --guide (it is a single-image option)", ctx=ctx)
    if sigma is not None and degradation not in (None, "gaussian"):
        raise click.UsageError(
            f"--sigma only applies to --degradation gaussian, got --degradation {degradation}", ctx=ctx
        )
    from ..pipeline.guided import GUIDED_DEFAULTS, train_guided
    from .progress import library_output, progress_bars

    params = {k: v for k, v in (("degradation", degradation), ("sigma", sigma)) if v is not None}
    if ctx.get_parameter_source("max_samples") is click.core.ParameterSource.DEFAULT:
        max_samples = GUIDED_DEFAULTS["max_samples"]  # the single-image default is too few here
    with library_output(quiet), progress_bars("train: guided", quiet) as bar:
        model = train_guided(
            references[0], list(guides), output=output, scale=scale, bands=list(bands) if bands else None,
            guide_bands=list(guide_bands) if guide_bands else None, overwrite=overwrite,
            chunk_size=chunk, workers=workers, scheduler=scheduler, progress=bar,
            max_samples=max_samples, random_state=random_state, **params,
        )
    corr = ", ".join(f"{r:.2f}" for r in model.correlation_)
    options.report(
        ctx,
        f"geosr: wrote {output} (guided model, {model.n_targets_} band"
        f"{'s' if model.n_targets_ != 1 else ''}, x{model.scale}; guide correlation {corr})",
    )
