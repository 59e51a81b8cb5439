"""``geosr assess REFERENCE -o REPORT_DIR``: Wald's protocol against the usual baselines."""

from __future__ import annotations

import os

import click

from ..enums import Degradation
from . import options


@click.command(short_help="Assess magnification under Wald's protocol.")
@click.argument("reference", metavar="REFERENCE")
@click.option(
    "--output",
    "-o",
    "report_dir",
    required=True,
    type=click.Path(file_okay=False),
    metavar="REPORT_DIR",
    help="Folder for metrics.json, report.md and the figures.",
)
@options.scale_option(required=True)
@options.model_source_options(
    "REFERENCE",
    "Model file to assess. Default: the model shipped for --scale.",
)
@options.method_option
@click.option(
    "--degradation",
    type=options.EnumChoice(Degradation),
    default=None,
    help="How REFERENCE is degraded before it is magnified back (Wald's protocol): "
    "'bicubic' (antialiased, default), 'gaussian' (point-spread function) or 'area' (block mean).",
)
@options.sigma_option
@options.bands_option
@click.option("--consistency", is_flag=True, default=False, help="Back-project the output.")
@click.option("--ensemble", is_flag=True, default=False, help="Average the 8 flips and rotations.")
@options.spectral_guard_option
@click.option(
    "--crop",
    "crop_size",
    type=options.IntAtLeast(8),
    default=96,
    metavar="PIXELS",
    help="Side of the side-by-side crop figure in high-res pixels. Default 96.",
)
@options.overwrite_option
@options.config_option
@options.quiet_option
@click.pass_context
def assess(ctx, reference, report_dir, scale, model, self_train, train_atoms, train_samples,
           method, degradation, sigma, bands, consistency, ensemble, spectral_guard, crop_size, overwrite,
           quiet):
    """Degrade REFERENCE by --scale, magnify it back, and compare with REFERENCE.

    The same is done with GDAL's bicubic and Lanczos resampling and nearest
    neighbour. REPORT_DIR receives metrics.json, report.md and PNG figures.
    The reference is held in memory: fine up to a few thousand pixels a side.

    \b
    Example:
      geosr assess reference.tif --scale 3 -o report/
    """
    model, self_train = options.exclusive(ctx, "model", "self_train")
    if sigma is not None and degradation != "gaussian":
        raise click.UsageError(
            f"--sigma only applies to --degradation gaussian, got --degradation {degradation or 'bicubic'}",
            ctx=ctx,
        )
    training = {k: v for k, v in (("n_atoms", train_atoms), ("max_samples", train_samples))
                if v is not None}
    if training and not self_train:
        raise click.UsageError("--atoms and --samples only apply with --self-train", ctx=ctx)
    from ..assess.protocol import assess_raster
    from .progress import library_output

    with library_output(quiet):
        result = assess_raster(
            reference,
            report_dir,
            scale,
            model=model,
            self_train=self_train,
            method=method,
            degradation=degradation,
            sigma=sigma,
            bands=list(bands) if bands else None,
            consistency=consistency,
            ensemble=ensemble,
            spectral_guard=spectral_guard,
            training=training or None,
            crop_size=crop_size,
            overwrite=overwrite,
        )
    options.report(ctx, f"geosr: {_summary(result, report_dir)}")


def _summary(metrics, report_dir):
    """One line: PSNR of geosr and bicubic overall, and where the report is.

    ``metrics`` is what :func:`geosr.assess.protocol.assess_raster` returns
    (the content of metrics.json).
    """
    where = os.path.join(os.fspath(report_dir), "report.md")
    ours = metrics["geosr"]["overall"]["psnr"]
    bicubic = metrics["bicubic"]["overall"]["psnr"]
    return f"PSNR {ours:.2f} dB with geosr, {bicubic:.2f} dB with bicubic; report: {where}"
