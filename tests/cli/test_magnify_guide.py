"""``geosr magnify --guide`` and ``geosr train --guide`` from the command line, run for real."""

from __future__ import annotations

import numpy as np
import pytest
import rasterio
from affine import Affine
from click.testing import CliRunner

from geosr.cli.main import geosr as cli

from helpers import camera


def run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


def one_line_error(result, code, *needles):
    assert result.exit_code == code, (result.exit_code, result.stderr)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("geosr: error: "), result.stderr
    for needle in needles:
        assert needle in lines[0], lines[0]


def _write(path, data, pixel):
    data = np.asarray(data, dtype=np.float32)[None]
    with rasterio.open(path, "w", driver="GTiff", width=data.shape[2], height=data.shape[1], count=1,
                       dtype="float32", crs="EPSG:32618",
                       transform=Affine(pixel, 0, 500000.0, 0, -pixel, 4200000.0)) as ds:
        ds.write(data)
    return path


@pytest.fixture
def pair(tmp_path):
    """A 48 x 48 coarse band at 20 m and its 96 x 96 guide at 10 m (the camera photo)."""
    fine = camera(96, 96).astype(np.float64)
    coarse = fine.reshape(48, 2, 48, 2).mean(axis=(1, 3))
    return _write(tmp_path / "coarse.tif", coarse, 20.0), _write(tmp_path / "fine.tif", fine, 10.0)


def test_magnify_with_a_guide(pair, tmp_path):
    coarse, fine = pair
    result = run("magnify", coarse, tmp_path / "out.tif", "--guide", fine, "--samples", 5000)
    assert result.exit_code == 0, result.stderr
    assert "x2, guided" in result.stderr
    assert "guide correlation per band" in result.stderr
    with rasterio.open(tmp_path / "out.tif") as ds:
        assert ds.shape == (96, 96)
        assert ds.tags()["GEOSR_METHOD"] == "guided"


@pytest.mark.parametrize("extra,code,needle", [
    (["--consistency"], 2, "consistency"),
    (["--atoms", "64"], 2, "--atoms"),
    (["--self-train"], 2, "--self-train"),
    (["--scale", "3"], 2, "pixel-size ratio of 2"),
])
def test_options_that_do_not_fit_a_guide(pair, tmp_path, extra, code, needle):
    coarse, fine = pair
    result = run("magnify", coarse, tmp_path / "out.tif", "--guide", fine, *extra)
    one_line_error(result, code, needle)
    assert not (tmp_path / "out.tif").exists()


def test_guide_bands_without_guide_is_a_usage_error(pair, tmp_path):
    coarse, _ = pair
    one_line_error(run("magnify", coarse, tmp_path / "out.tif", "-s", "2", "--guide-bands", "1"), 2,
                   "--guide-bands")


def test_train_a_guided_model_and_reuse_it(pair, tmp_path):
    coarse, fine = pair
    result = run("train", coarse, "--guide", fine, "-o", tmp_path / "g.npz", "--samples", 5000)
    assert result.exit_code == 0, result.stderr
    assert "guided model" in result.stderr
    card = run("describe", tmp_path / "g.npz")
    assert card.exit_code == 0, card.stderr
    assert "guided: ridge regression" in card.stdout and "guide correlation" in card.stdout
    assert "fine.tif:1" in card.stdout  # the guide band it learned with
    result = run("magnify", coarse, tmp_path / "out.tif", "--guide", fine, "--model", tmp_path / "g.npz")
    assert result.exit_code == 0, result.stderr
    one_line_error(run("magnify", coarse, tmp_path / "x.tif", "--model", tmp_path / "g.npz"), 1, "guided")
    one_line_error(run("train", coarse, coarse, "--guide", fine, "-o", tmp_path / "h.npz"), 2, "exactly one")
