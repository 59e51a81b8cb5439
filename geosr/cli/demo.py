"""``geosr demo OUTDIR``: the invented river valley, magnified x3 alone and guided, with a quick look."""

from __future__ import annotations

import click

from . import options


@click.command(short_help="Run the demo scenario into a folder.")
@click.argument("outdir", type=click.Path(file_okay=False), metavar="OUTDIR")
@click.option(
    "--seed",
    type=options.IntAtLeast(0),
    default=0,
    show_default=True,
    help="Seed of the generated scene; the same seed gives the same files.",
)
@click.option(
    "--size",
    type=options.IntAtLeast(192),
    default=768,
    show_default=True,
    metavar="PIXELS",
    help="Side of the generated 3 m truth in pixels, a multiple of 3.",
)
@click.option(
    "--model",
    "-m",
    type=click.Path(exists=True, dir_okay=False),
    default=None,
    metavar="MODEL",
    help="Model file of the single-image run. Default: the model shipped for x3. "
    "The guided run learns its own model on the scene.",
)
@options.quiet_option
@click.pass_context
def demo(ctx, outdir, seed, size, model, quiet):
    """Generate an invented river valley, magnify it x3 alone and guided, write a quick look.

    The scene is procedurally generated (no real place, no real data): 4 bands
    (blue, green, red, NIR) of uint16 reflectance x 10,000 on a UTM grid, with
    fields, hedges, a river, roads, farmsteads, a reservoir and a nodata
    corner. OUTDIR receives the 3 m truth, the 9 m input degraded from it, a
    3 m panchromatic-like band (the guide), the geosr output from the input
    alone, the geosr output guided by the 3 m band, and a PNG comparing
    nearest neighbour, bicubic, both geosr outputs and the truth on the same
    detail. The PSNR of each against the truth is printed last. Earlier demo
    files in OUTDIR are replaced.
    """
    from ..demo import METHODS, SCALE, run_demo

    if size % SCALE:
        raise click.BadParameter(f"must be a multiple of {SCALE}, got {size}", ctx=ctx,
                                 param_hint="'--size'")

    def echo(message):
        options.report(ctx, f"geosr demo: {message}")

    from .progress import progress_bars

    with progress_bars("magnify", quiet) as bar:
        paths = run_demo(outdir, seed=seed, size=size, model=model, progress=bar, echo=echo)
    rows = [
        ("truth (3 m, generated):", paths["truth"]),
        ("input (9 m, degraded x3):", paths["input"]),
        ("guide (3 m, pan-like):", paths["guide"]),
        ("geosr output (x3):", paths["output"]),
        ("guided output (x3):", paths["guided"]),
        ("quick look:", paths["quicklook"]),
        ("PSNR against the truth:", ", ".join(f"{name} {paths['psnr'][name]:.2f} dB" for name in METHODS)),
    ]
    for label, value in rows:
        click.echo(f"{label:<27}{value}")
    options.report(ctx, f"geosr demo: done in {paths['seconds']:.1f} s")
