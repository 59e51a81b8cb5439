"""``geosr describe MODEL``: print a model card."""

from __future__ import annotations

import json
import textwrap

import click

from ..enums import Method
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
        for ref in training.get("references") or ():
            bands = ", ".join(map(str, ref.get("bands") or ()))
            row("training image", f"{ref.get('name')}, bands {bands}", 4)
            row("  its sha256", ref.get("sha256") or "unknown", 4, wrap=False)
        if "n_images" in training:
            row("training images", training["n_images"], 4)
        if "n_windows" in training:
            row("training windows", training["n_windows"], 4)
        if "n_samples" in training:
            row("training samples", training["n_samples"], 4)
        for key, value in training.items():
            if key not in ("n_images", "n_windows", "n_samples", "references"):
                row(key.replace("_", " "), "none" if value is None else value, 4)
        row("sha256", entry.get("sha256") or "unknown", 4, wrap=False)
    lines.append("")
    lines.append("Caution")
    lines.extend("  " + w for w in textwrap.wrap(card["caution"], width=width - 2))
    return "\n".join(lines)


def _shipped_paths(scale, method):
    """The shipped model files for ``scale``: of ``method``, or of every method present."""
    import warnings

    from ..errors import ModelError
    from ..modelfile import SHIPPED_METHODS, default_model_path

    methods = SHIPPED_METHODS if method is None else (str(method),)
    paths = {m: default_model_path(scale, m) for m in methods}
    found = [str(p) for p in paths.values() if p.is_file()]
    if not found:
        which = "" if method is None else f" {method}"
        raise ModelError(
            f"The 'scale' parameter must be one with a shipped{which} model, got {scale}: "
            f"this installation has no shipped{which} model for it"
        )
    for m, p in paths.items():
        if not p.is_file():
            warnings.warn(f"this installation has no shipped {m} model for x{scale} ({p.name})",
                          UserWarning, stacklevel=2)
    return found


@click.command(short_help="Print a model card.")
@click.argument("model", required=False, metavar="[MODEL]")
@options.scale_option(
    required=False, help="Describe the models shipped in the package for this scale instead."
)
@click.option(
    "--method",
    type=options.EnumChoice(Method),
    default=None,
    help="With --scale: describe only the shipped model of this method. "
    "Default: the shipped models of both methods, anchored first.",
)
@click.option("--json", "as_json", is_flag=True, default=False, help="Print the card as JSON.")
@click.pass_context
def describe(ctx, model, scale, method, as_json):
    """Print the model card of MODEL: scale, method, parameters, training data,
    sample counts, sha256, the geosr version and the cautions.

    With --scale, the cards of the models shipped for that scale, one per
    method (--json prints them as a list), or only the one of --method.

    \b
    Examples:
      geosr describe drone-x4.npz
      geosr describe --scale 3                   # the shipped models for x3
      geosr describe --scale 3 --method sparse   # the shipped sparse model for x3
    """
    if (model is None) == (scale is None):
        raise click.UsageError(
            "Give either MODEL or --scale (for the shipped models), "
            f"got {'both' if model is not None else 'neither'}",
            ctx=ctx,
        )
    if model is not None and method is not None:
        raise click.UsageError(
            "The '--method' option picks a shipped model and needs --scale, got MODEL", ctx=ctx
        )
    from ..modelfile import model_card

    if model is not None:
        cards = [model_card(model)]
    else:
        cards = [model_card(path) for path in _shipped_paths(scale, method)]
    if as_json:
        one = model is not None or method is not None
        click.echo(json.dumps(cards[0] if one else cards, indent=2, sort_keys=False))
    else:
        click.echo("\n\n".join(format_card(card) for card in cards))
