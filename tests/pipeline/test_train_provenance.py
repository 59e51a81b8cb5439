"""geosr train records its reference files (name, sha256, bands) and the model card lists them."""

from __future__ import annotations

import hashlib
import json

import numpy as np
from click.testing import CliRunner

from geosr.cli.main import geosr as cli
from geosr.modelfile import load_models, model_card
from geosr.pipeline.train import train_from_rasters

from helpers import camera


def _sha(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_three_references_are_recorded_not_counted_as_windows(make_raster, tmp_path):
    paths = [make_raster(np.stack([camera(96, 96, r, c), camera(96, 96, r + 5, c + 5)]).astype(np.uint8),
                         name=f"ref{i}.tif")
             for i, (r, c) in enumerate([(100, 100), (200, 250), (300, 50)])]
    out = tmp_path / "m.npz"
    # Windows of 32 pixels: each reference is read in several windows.
    models = train_from_rasters(paths, 2, bands=[2], max_samples=200, n_atoms=8, n_iter=2,
                                chunk_size=32, scheduler="synchronous", output=out)
    expected = [{"name": f"ref{i}.tif", "sha256": _sha(p), "bands": [2]} for i, p in enumerate(paths)]
    training = models[0].training_
    assert training["references"] == expected
    assert "n_images" not in training and training["n_windows"] > len(paths)
    # Saved and read back, and shown by the card.
    assert load_models(out)[0].training_["references"] == expected
    card = model_card(out)
    assert card["models"][0]["training"]["references"] == expected
    text = CliRunner().invoke(cli, ["describe", str(out)]).output
    for ref in expected:
        assert ref["name"] in text and ref["sha256"] in text
    assert "training images" not in text and "training windows" in text
    data = json.loads(CliRunner().invoke(cli, ["describe", str(out), "--json"]).output)
    assert data["models"][0]["training"]["references"] == expected


def test_per_band_models_name_their_band_shared_names_all(make_raster):
    img = np.stack([camera(64, 64), camera(64, 64, 200, 200)]).astype(np.uint8)
    path = make_raster(img, name="two.tif")
    per_band = train_from_rasters(path, 2, max_samples=100, n_atoms=4, n_iter=1, scheduler="synchronous")
    assert [m.training_["references"][0]["bands"] for m in per_band] == [[1], [2]]
    shared = train_from_rasters(path, 2, shared=True, max_samples=100, n_atoms=4, n_iter=1, scheduler="synchronous")
    assert shared[0].training_["references"] == [{"name": "two.tif", "sha256": _sha(path), "bands": [1, 2]}]
