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
@options.scale_option(required=True)
@options.bands_option
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
def train(ctx, references, output, scale, bands, shared, method, degradation, sigma,
          n_atoms, sparsity, n_iter, neighbours, high_fit, max_samples, random_state, chunk,
          workers, scheduler, overwrite, quiet):
    """Learn a model from the high-resolution rasters HR_RASTER and write it to MODEL.

    Training pairs are the references and their degraded copies; choose the
    degradation that describes how your coarse data was formed. By default
    each band gets its own model.

    \b
    Examples:
      geosr train ref1.tif ref2.tif -o drone-x4.npz --scale 4
      geosr train ortho.tif -o x2.npz -s 2 --method anchored --shared
    """
    from ..errors import DestinationError

    workers, scheduler = options.workers_and_scheduler(ctx)
    if os.path.exists(output) and not overwrite:
        raise DestinationError(
            f"The output model {output!r} must not exist already, got an existing file; "
            "use --overwrite to replace it"
        )
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
            progress=bar,
            **model_params,
        )
    if shared:
        kind = "1 model shared by every band"
    else:
        n = len(models)
        kind = f"{n} model{'s' if n != 1 else ''}, one per band"
    options.report(ctx, f"geosr: wrote {output} ({kind}, x{scale})")
