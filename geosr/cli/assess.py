"""``geosr assess REFERENCE -o REPORT_DIR``: Wald's protocol against the usual baselines."""

from __future__ import annotations

import click

from ..enums import Degradation
from . import options


def _assess_function():
    """geosr.assess_raster wherever this installation has it."""
    from ..errors import RunError

    for module in ("geosr", "geosr.assess", "geosr.assessment"):
        try:
            return options.library_function(module, "assess_raster")
        except RunError:
            continue
    raise RunError(
        "'geosr assess' needs geosr.assess_raster, which this installation does not have yet"
    )


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
@click.option(
    "--model",
    "-m",
    type=click.Path(exists=True, dir_okay=False),
    default=None,
    metavar="MODEL",
    help="Model file to assess. Default: the model shipped for --scale.",
)
@click.option(
    "--self-train",
    is_flag=True,
    default=False,
    help="Learn the model from the degraded REFERENCE itself instead of --model.",
)
@options.method_option
@click.option(
    "--degradation",
    type=options.EnumChoice(Degradation),
    default=None,
    help="How REFERENCE is degraded before it is magnified back (Wald's protocol): "
    "'bicubic' (antialiased, default), 'gaussian' (point-spread function) or 'area' (block mean).",
)
@options.bands_option
@click.option("--consistency", is_flag=True, default=False, help="Back-project the output.")
@click.option("--ensemble", is_flag=True, default=False, help="Average the 8 flips and rotations.")
@options.chunk_option
@options.workers_option
@options.scheduler_option
@options.overwrite_option
@options.config_option
@options.quiet_option
@click.pass_context
def assess(ctx, reference, report_dir, scale, model, self_train, method, degradation,
           bands, consistency, ensemble, chunk, workers, scheduler, overwrite, quiet):
    """Degrade REFERENCE by --scale, magnify it back, and compare with REFERENCE.

    The same is done with GDAL's bicubic and Lanczos resampling and nearest
    neighbour. REPORT_DIR receives metrics.json, report.md and PNG figures.

    \b
    Example:
      geosr assess reference.tif --scale 3 -o report/
    """
    model, self_train = options.exclusive(ctx, "model", "self_train")
    workers, scheduler = options.workers_and_scheduler(ctx)
    assess_raster = _assess_function()
    result = options.call_library(
        assess_raster,
        reference,
        report_dir,
        scale,
        model=model,
        self_train=self_train,
        method=method,
        degradation=degradation,
        bands=list(bands) if bands else None,
        consistency=consistency,
        ensemble=ensemble,
        chunk_size=chunk,
        workers=workers,
        scheduler=scheduler,
        overwrite=overwrite,
        quiet=quiet,
    )
    options.report(ctx, f"geosr: wrote the report to {options.result_path(result, report_dir)}")
