"""The scripts in examples/ run as a user runs them and produce what they promise."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
import rasterio
from affine import Affine

from helpers import TEST_DATA

EXAMPLES = Path(__file__).resolve().parents[2] / "examples"


def run_example(name, *args, timeout=120):
    """Run one example in a fresh interpreter; return its stdout (exit status must be 0)."""
    proc = subprocess.run([sys.executable, str(EXAMPLES / name), *map(str, args)],
                          check=False, capture_output=True, text=True, timeout=timeout)
    assert proc.returncode == 0, proc.stderr
    return proc.stdout


def check_magnified(path, src, scale):
    """Size, grid, CRS, nodata and tags of a magnified raster against its source (rasterio)."""
    with rasterio.open(src) as s, rasterio.open(path) as o:
        assert (o.width, o.height, o.count) == (s.width * scale, s.height * scale, s.count)
        assert o.dtypes == s.dtypes and o.crs == s.crs and o.nodata == s.nodata
        # the output contract: transform = src.transform * Affine.scale(1/s), same bounds
        assert o.transform.almost_equals(s.transform @ Affine.scale(1 / scale))
        assert o.bounds == pytest.approx(s.bounds)
        tags = o.tags()
        assert tags["GEOSR_SYNTHESIZED"] == "yes" and tags["GEOSR_SCALE"] == str(scale)
        assert tags["GEOSR_SOURCE"] == Path(src).name
        return tags


def test_every_example_is_listed_and_tested():
    scripts = sorted(p.name for p in EXAMPLES.glob("*.py") if not p.name.startswith("_"))
    readme = (EXAMPLES / "README.md").read_text()
    tested = Path(__file__).read_text()
    for name in scripts:
        assert f"`{name}`" in readme and f'"{name}"' in tested, name


def test_magnify_scene(tmp_path):
    out = run_example("magnify_scene.py", "--out", tmp_path)
    dst = tmp_path / "rgb-byte-crop-x2.tif"
    tags = check_magnified(dst, TEST_DATA / "rgb-byte-crop.tif", 2)
    assert tags["GEOSR_METHOD"] in out and f"GEOSR_MODEL_SHA256 = {tags['GEOSR_MODEL_SHA256']}" in out
    assert "size (cols x rows): 240 x 240  ->  480 x 480" in out
    assert "CRS: EPSG:32618  (unchanged)" in out and "nodata: 0.0  (unchanged)" in out


def test_train_then_magnify(tmp_path):
    out = run_example("train_then_magnify.py", "--out", tmp_path)
    model_path = tmp_path / "district-x2.npz"
    import geosr

    (model,) = geosr.load_models(model_path)
    assert model.scale == 2 and model.method == "anchored" and model.n_atoms == 64
    dst = tmp_path / "landsat8-b4-crop-x2.tif"
    target = tmp_path / "inputs" / "landsat8-b4-crop.tif"  # the copy with nodata 0 declared
    tags = check_magnified(dst, target, 2)
    # the saved model file is the model the output was made with
    assert tags["GEOSR_MODEL_SHA256"] == model.sha256_ and f"model {model.sha256_[:12]}..." in out
    with rasterio.open(target) as s, rasterio.open(dst) as o:
        assert s.nodata == 0
        # the fill (about 12 % of the crop, tests/data/SOURCES.md) stays nodata, magnified
        fill_in, fill_out = (s.dataset_mask() == 0).mean(), (o.dataset_mask() == 0).mean()
        assert 0.11 < fill_in < 0.13 and fill_out == pytest.approx(fill_in)
        assert (o.read(1)[o.dataset_mask() > 0] > 0).all()  # a valid pixel never takes nodata


def test_assess_and_read_metrics(tmp_path):
    out = run_example("assess_and_read_metrics.py", "--out", tmp_path)
    metrics = json.loads((tmp_path / "report" / "metrics.json").read_text())
    for method in ("geosr", "bicubic", "lanczos", "nearest"):
        overall = metrics[method]["overall"]
        assert len(metrics[method]["bands"]) == 3
        assert 0 < overall["ssim"] <= 1 and overall["psnr"] > 10
        line = next(row for row in out.splitlines() if row.startswith(method))
        assert f"{overall['psnr']:.2f}" in line and f"{overall['ssim']:.4f}" in line
    assert (tmp_path / "report" / "report.md").is_file()


def test_guided_sharpen(tmp_path):
    out = run_example("guided_sharpen.py", "--out", tmp_path)
    dst = tmp_path / "blue-green-red-30m.tif"
    tags = check_magnified(dst, tmp_path / "blue-green-red-60m.tif", 2)
    assert tags["GEOSR_METHOD"] == "guided" and tags["GEOSR_GUIDE"] == "broad-band-30m.tif"
    with rasterio.open(dst) as o, rasterio.open(tmp_path / "broad-band-30m.tif") as g:
        assert o.transform == g.transform and o.shape == g.shape  # on the guide's grid
    psnr = {line.split()[0]: float(line.split()[-2]) for line in out.splitlines() if "PSNR" in line}
    # The guide is the mean of the truth's bands (the optimistic set-up of the
    # sharpening literature): several dB over bicubic are expected.
    assert psnr["guided"] > psnr["bicubic"] + 6


def test_xarray_magnify(tmp_path):
    pytest.importorskip("rioxarray", reason="the example needs the xarray extra: pip install geosr[xarray]")
    out = run_example("xarray_magnify.py", "--out", tmp_path)
    src = TEST_DATA / "rgb-byte-crop.tif"
    tags = check_magnified(tmp_path / "rgb-byte-crop-x2-xarray.tif", src, 2)
    ref_tags = check_magnified(tmp_path / "rgb-byte-crop-x2.tif", src, 2)
    assert tags["GEOSR_MODEL_SHA256"] == ref_tags["GEOSR_MODEL_SHA256"]
    with rasterio.open(tmp_path / "rgb-byte-crop-x2-xarray.tif") as a, \
            rasterio.open(tmp_path / "rgb-byte-crop-x2.tif") as b:
        assert a.transform == b.transform and (a.read() == b.read()).all()
    assert "versus magnify_raster: same grid True, largest difference 0" in out
    assert "lazy   : {'band': 3, 'y': 480, 'x': 480}" in out and "4 dask chunks" in out


@pytest.mark.slow
@pytest.mark.cluster
def test_cluster(tmp_path):
    pytest.importorskip("distributed")
    out = run_example("cluster.py", "--out", tmp_path, timeout=180)
    lines = out.splitlines()
    assert lines[0].startswith("started a LocalCluster at tcp://127.0.0.1:")
    address = lines[0].split()[-1]
    assert f"on dask.distributed cluster at {address}" in out and lines[-1] == "cluster shut down"
    check_magnified(tmp_path / "rgb-byte-crop-x2.tif", TEST_DATA / "rgb-byte-crop.tif", 2)


def test_examples_refuse_a_folder_that_holds_files(tmp_path):
    # An example never replaces a file: --out must be new or empty.
    keep = tmp_path / "rgb-byte-crop-x2.tif"
    keep.write_bytes(b"the user's own file")
    proc = subprocess.run([sys.executable, str(EXAMPLES / "magnify_scene.py"), "--out", str(tmp_path)],
                          check=False, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 1
    assert proc.stderr.strip().splitlines() == [
        f"error: --out must be a new or empty folder, got {str(tmp_path)!r}"
    ]
    assert keep.read_bytes() == b"the user's own file"
