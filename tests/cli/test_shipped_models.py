"""Without --model, the shipped model of --method (anchored by default); describe shows both."""

from __future__ import annotations

import json

import numpy as np
import pytest
import rasterio
from click.testing import CliRunner

from geosr.cli.main import geosr as cli
from geosr.modelfile import default_model, default_model_path

from helpers import camera


def run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


@pytest.fixture
def src(make_raster):
    return make_raster(camera(40, 44).astype(np.uint8), name="src.tif")


def _tags(path):
    with rasterio.open(path) as ds:
        return ds.tags(), ds.tags(1), ds.read(1).astype(np.float64)


@pytest.mark.parametrize("args, method", [(["--method", "sparse"], "sparse"), ([], "anchored")])
def test_magnify_without_model_uses_the_shipped_model_of_the_method(src, tmp_path, args, method):
    out = tmp_path / "out.tif"
    result = run("magnify", src, out, "--scale", 2, *args)
    assert result.exit_code == 0, result.stderr
    shipped = default_model(2, method)
    tags, band_tags, pixels = _tags(out)
    assert tags["GEOSR_METHOD"] == method and tags["GEOSR_SCALE"] == "2"
    assert tags["GEOSR_MODEL_SHA256"] == band_tags["GEOSR_MODEL_SHA256"] == shipped.sha256_
    # the pixels are that model's magnification (rounded to the source's uint8)
    assert np.abs(pixels - np.clip(shipped.magnify(camera(40, 44)), 0, 255)).max() <= 1


def test_python_api_and_the_description_name_the_shipped_method(src, tmp_path):
    from geosr.pipeline.magnify import magnify_raster
    from geosr.pipeline.plan import resolve_models

    res = magnify_raster(src, tmp_path / "o.tif", scale=3, method="sparse")
    assert res.method == "sparse" and res.model_sha256 == default_model(3, "sparse").sha256_
    assert resolve_models(None, scale=3, method="sparse", bands=(1,)).source == "shipped sparse model for x3"
    assert resolve_models(None, scale=3, bands=(1,)).source == "shipped anchored model for x3"


def test_method_with_an_unshipped_scale_is_one_line(src, tmp_path):
    result = run("magnify", src, tmp_path / "out.tif", "--scale", 5, "--method", "sparse")
    assert result.exit_code == 1
    (line,) = result.stderr.strip().splitlines()
    assert line.startswith("geosr: error: ") and "shipped model (2, 3 or 4), got 5" in line
    assert not (tmp_path / "out.tif").exists()


# ------------------------------------------------------------------ describe
def test_describe_scale_shows_the_shipped_models_of_both_methods():
    result = run("describe", "--scale", 2)
    assert result.exit_code == 0, result.stderr
    text = result.stdout
    anchored, sparse = (str(default_model_path(2, m)) for m in ("anchored", "sparse"))
    assert f"geosr model card: {anchored}" in text and f"geosr model card: {sparse}" in text
    assert text.index(anchored) < text.index(sparse)
    assert "method             anchored:" in text and "method             sparse:" in text
    for m in ("anchored", "sparse"):
        assert default_model(2, m).sha256_ in text


def test_describe_json_lists_both_or_gives_the_one_of_method():
    cards = json.loads(run("describe", "--scale", 3, "--json").stdout)
    assert [c["models"][0]["method"] for c in cards] == ["anchored", "sparse"]
    assert [c["models"][0]["sha256"] for c in cards] == [
        default_model(3, m).sha256_ for m in ("anchored", "sparse")
    ]
    card = json.loads(run("describe", "--scale", 3, "--method", "sparse", "--json").stdout)
    assert card["file"] == str(default_model_path(3, "sparse")) and card["models"][0]["method"] == "sparse"


def test_describe_method_needs_scale(tmp_path):
    result = run("describe", tmp_path / "m.npz", "--method", "sparse")
    assert result.exit_code == 2
    (line,) = result.stderr.strip().splitlines()
    assert line.startswith("geosr: error: ") and "'--method' option picks a shipped model" in line


def test_describe_names_a_missing_shipped_file(monkeypatch, tmp_path):
    import geosr.modelfile

    real = geosr.modelfile.default_model_path

    def without_sparse(scale, method="anchored"):
        return tmp_path / "none.npz" if str(method) == "sparse" else real(scale, method)

    monkeypatch.setattr(geosr.modelfile, "default_model_path", without_sparse)
    result = run("describe", "--scale", 2)
    assert result.exit_code == 0
    assert str(real(2, "anchored")) in result.stdout and "none.npz" not in result.stdout
    assert result.stderr.strip().splitlines() == [
        "geosr: warning: this installation has no shipped sparse model for x2 (none.npz)"
    ]
    result = run("describe", "--scale", 2, "--method", "sparse")
    assert result.exit_code == 1
    assert result.stderr.strip().splitlines() == [
        "geosr: error: The 'scale' parameter must be one with a shipped sparse model, got 2: "
        "this installation has no shipped sparse model for it"
    ]
