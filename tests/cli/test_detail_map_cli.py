"""``geosr magnify --detail-map PATH``: wired to the library, errors in one line."""

from __future__ import annotations

import numpy as np
import rasterio
from click.testing import CliRunner

import geosr.pipeline.magnify
from geosr.cli.main import geosr as cli

from helpers import camera, sha256_of


def test_option_reaches_the_library(recorder, tmp_path):
    calls = recorder(geosr.pipeline.magnify, "magnify_raster")
    result = CliRunner().invoke(cli, ["magnify", "a.tif", "b.tif", "-s", "2", "--detail-map", "d.tif"])
    assert result.exit_code == 0, result.output
    assert calls[0][1]["detail_map"] == "d.tif"
    CliRunner().invoke(cli, ["magnify", "a.tif", "b.tif", "-s", "2"])
    assert calls[1][1]["detail_map"] is None


def test_detail_map_written_and_source_refused(make_raster, tmp_path):
    src = make_raster(camera(32, 32).astype(np.float32), dtype="float32")
    before = sha256_of(src)
    runner = CliRunner()
    bad = runner.invoke(cli, ["magnify", str(src), str(tmp_path / "o.tif"), "-s", "2", "--detail-map", str(src)])
    assert bad.exit_code == 1
    assert bad.output.strip().splitlines()[-1].startswith("geosr: error: The destination")
    assert "Traceback" not in bad.output and sha256_of(src) == before
    ok = runner.invoke(cli, ["magnify", str(src), str(tmp_path / "o.tif"), "-s", "2", "-q",
                             "--detail-map", str(tmp_path / "d.tif")])
    assert ok.exit_code == 0, ok.output
    with rasterio.open(tmp_path / "d.tif") as ds:
        assert ds.shape == (64, 64) and ds.dtypes[0] == "float32"


def test_detail_map_is_refused_with_output_dir(tmp_path):
    result = CliRunner().invoke(cli, ["magnify", "a.tif", "b.tif", "--output-dir", str(tmp_path), "-s", "2",
                                      "--detail-map", "d.tif"])
    assert result.exit_code == 2 and "--detail-map applies to one SRC and DST" in result.output
