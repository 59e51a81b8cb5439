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
@options.scale_option(
    required=False,
    help="Integer magnification factor, 2 to 8. Required, except with a --guide finer than "
    "REFERENCE (the scale is then the ratio of their pixel sizes).",
)
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
@options.guide_option
@options.guide_bands_option
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
           method, degradation, sigma, bands, consistency, ensemble, spectral_guard, guides, guide_bands,
           crop_size, overwrite, quiet):
    """Degrade REFERENCE by --scale, magnify it back, and compare with REFERENCE.

    The same is done with GDAL's bicubic and Lanczos resampling and nearest
    neighbour. REPORT_DIR receives metrics.json, report.md and PNG figures.
    The reference is held in memory: fine up to a few thousand pixels a side.

    With --guide, guided magnification is assessed too: the guide is brought
    onto REFERENCE's grid (degraded when finer), and the high-pass and GSA
    baselines and geosr's guided regression join the comparison, with QNR at
    the guide's native resolution.

    \b
    Examples:
      geosr assess reference.tif --scale 3 -o report/
      geosr assess bands-30m.tif --guide pan-15m.tif -o report/
    """
    model, self_train = options.exclusive(ctx, "model", "self_train")
    _check_guide_usage(ctx, scale, guides, guide_bands, self_train, consistency, ensemble)
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

    guide_kw = {"guide": list(guides), "guide_bands": list(guide_bands) if guide_bands else None} if guides else {}
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
            **guide_kw,
        )
    if guides:
        _report_guided(ctx, result, report_dir)
        return
    options.report(ctx, f"geosr: {_summary(result, report_dir)}")


def _check_guide_usage(ctx, scale, guides, guide_bands, self_train, consistency, ensemble):
    """--scale is required without a guide; some options do not apply with one."""
    if not guides:
        if scale is None:
            param = next(p for p in ctx.command.params if p.name == "scale")
            raise click.MissingParameter(ctx=ctx, param=param)
        if guide_bands:
            raise click.UsageError("--guide-bands only applies with --guide, got it without", ctx=ctx)
        return
    given = [flag for flag, on in (("--self-train", self_train), ("--consistency", consistency),
                                   ("--ensemble", ensemble)) if on]
    if given:
        raise click.UsageError(f"{', '.join(given)} does not apply with --guide", ctx=ctx)


def _report_guided(ctx, metrics, report_dir):
    """PSNR of the guided methods, single-image geosr and bicubic (weak correlations are warnings)."""
    where = os.path.join(os.fspath(report_dir), "report.md")
    psnr = {m: metrics[m]["overall"]["psnr"] for m in ("guided", "highpass", "substitution", "geosr", "bicubic")}
    text = ", ".join(f"{v:.2f} dB {m}" for m, v in psnr.items())
    options.report(ctx, f"geosr: PSNR {text}; report: {where}")


def _summary(metrics, report_dir):
    """One line: PSNR of geosr and bicubic overall, and where the report is.

    ``metrics`` is what :func:`geosr.assess.protocol.assess_raster` returns
    (the content of metrics.json).
    """
    where = os.path.join(os.fspath(report_dir), "report.md")
    ours = metrics["geosr"]["overall"]["psnr"]
    bicubic = metrics["bicubic"]["overall"]["psnr"]
    return f"PSNR {ours:.2f} dB with geosr, {bicubic:.2f} dB with bicubic; report: {where}"
