"""``geosr describe MODEL``: print a model card."""

from __future__ import annotations

import json
import textwrap

import click

from . import options

_METHOD_NAMES = {
    "sparse": "sparse coding over coupled K-SVD dictionaries (Zeyde, Elad & Protter 2010)",
    "anchored": "anchored neighbourhood regression, A+ (Timofte, De Smet & Van Gool 2014)",
    "guided": "ridge regression over joint features of the band and a finer guide, "
    "learned on the scene at reduced resolution (use with --guide)",
}


def _value(v):
    if isinstance(v, float):
        return f"{v:g}"
    if isinstance(v, (list, tuple)):
        return ", ".join(_value(x) for x in v)
    if isinstance(v, dict):
        return "; ".join(f"{k}: {_value(x)}" for k, x in v.items())
    return str(v)


def format_card(card, width=78):
    """Render a model card dict (from :func:`geosr.modelfile.model_card`) as text."""
    lines = []
    label_width = 19

    def row(label, value, indent=2, wrap=True):
        head = " " * indent + f"{label:<{label_width}}"
        text = _value(value)
        wrapped = textwrap.wrap(text, width=max(20, width - len(head))) if wrap else [text]
        wrapped = wrapped or [""]
        lines.append(head + wrapped[0])
        lines.extend(" " * len(head) + w for w in wrapped[1:])

    models = card["models"]
    n = len(models)
    lines.append(f"geosr model card: {card['file']}")
    if card.get("size_bytes") is not None:
        row("file size", f"{card['size_bytes'] / 1e6:.2f} MB")
    if card.get("written_by"):
        row("written by", f"geosr {card['written_by']} (model format {card.get('format_version')})")
    row("scale", f"x{card['scale']}")
    shared = card.get("shared", n == 1)
    row("models", "1 model for every band" if shared else f"{n} model{'s' if n != 1 else ''}, one per band")

    def params_of(entry):
        return {k: v for k, v in entry["parameters"].items() if k not in ("scale", "method")}

    common = n > 0 and all(
        params_of(e) == params_of(models[0]) and e["method"] == models[0]["method"] for e in models
    )

    def method_rows(entry, indent):
        name = _METHOD_NAMES.get(entry["method"])
        row("method", f"{entry['method']}: {name}" if name else entry["method"], indent)
        row("parameters", ", ".join(f"{k}={_value(v)}" for k, v in params_of(entry).items()), indent)

    if common:
        method_rows(models[0], 2)
    for entry in models:
        lines.append("")
        title = "model" if n == 1 else f"model {entry['index'] + 1} of {n}"
        name = entry.get("band_name")
        if name:
            title += f" ({name})" if str(name).startswith("band ") else f" (band {name})"
        lines.append("  " + title)
        if not common:
            method_rows(entry, 4)
        training = entry["training"]
        if "n_images" in training:
            row("training images", training["n_images"], 4)
        if "n_samples" in training:
            row("training samples", training["n_samples"], 4)
        for key, value in training.items():
            if key not in ("n_images", "n_samples"):
                row(key.replace("_", " "), "none" if value is None else value, 4)
        row("sha256", entry.get("sha256") or "unknown", 4, wrap=False)
    lines.append("")
    lines.append("Caution")
    lines.extend("  " + w for w in textwrap.wrap(card["caution"], width=width - 2))
    return "\n".join(lines)


@click.command(short_help="Print a model card.")
@click.argument("model", required=False, metavar="[MODEL]")
@options.scale_option(
    required=False, help="Describe the model shipped in the package for this scale instead."
)
@click.option("--json", "as_json", is_flag=True, default=False, help="Print the card as JSON.")
@click.pass_context
def describe(ctx, model, scale, as_json):
    """Print the model card of MODEL: scale, method, parameters, training data,
    sample counts, sha256, the geosr version and the cautions.

    \b
    Examples:
      geosr describe drone-x4.npz
      geosr describe --scale 3          # the shipped model for x3
    """
    if (model is None) == (scale is None):
        raise click.UsageError(
            "Give either MODEL or --scale (for the shipped model), "
            f"got {'both' if model is not None else 'neither'}",
            ctx=ctx,
        )
    from ..modelfile import default_model_path, model_card

    if model is None:
        path = default_model_path(scale)
        if not path.is_file():
            from ..errors import ModelError

            raise ModelError(
                f"The 'scale' parameter must be one with a shipped model, got {scale}: "
                "this installation has no default model for it"
            )
        model = str(path)
    card = model_card(model)
    if as_json:
        click.echo(json.dumps(card, indent=2, sort_keys=False))
    else:
        click.echo(format_card(card))
