"""The detail map (``detail_map=`` / ``--detail-map``): values, tags, STAC, destinations.

The map holds per pixel the RMS over the magnified bands of the output
minus the bicubic interpolation of the input. The bicubic reference in these
tests is GDAL's cubic resampling (Keys' cubic convolution, a = -0.5; Keys,
IEEE TASSP 29(6), 1981) through rasterio, not geosr's own interpolation.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import rasterio
from rasterio.enums import Resampling

from geosr.errors import DestinationError
from geosr.pipeline.magnify import magnify_raster
from geosr.raster.blocks import DetailStats, detail_magnitude

from helpers import BicubicContractModel, camera, sha256_of


def _read(path):
    with rasterio.open(path) as ds:
        return ds.read(1), ds.tags(), ds.profile


def _gdal_cubic(path, scale):
    """GDAL's cubic resampling of every band of ``path`` onto the x``scale`` grid (float64)."""
    with rasterio.open(path) as ds:
        return ds.read(out_shape=(ds.count, ds.height * scale, ds.width * scale),
                       resampling=Resampling.cubic, out_dtype="float64")


def test_constant_input_has_zero_detail(make_raster, tmp_path):
    src = make_raster(np.full((3, 48, 48), 120.0, dtype=np.float32), dtype="float32")
    magnify_raster(src, tmp_path / "out.tif", scale=2, detail_map=tmp_path / "detail.tif")
    detail, tags, profile = _read(tmp_path / "detail.tif")
    assert profile["dtype"] == "float32" and detail.shape == (96, 96)
    assert np.isfinite(detail).all()
    np.testing.assert_allclose(detail, 0.0, atol=1e-4)
    with rasterio.open(tmp_path / "out.tif") as ds:
        assert float(ds.tags()["GEOSR_DETAIL_MAX"]) <= 1e-4


def test_step_edge_concentrates_detail_along_the_edge(make_raster, tmp_path):
    step = np.where(np.arange(64)[None, :] < 32, 40.0, 200.0) * np.ones((64, 1))
    src = make_raster(step.astype(np.float32), dtype="float32")
    magnify_raster(src, tmp_path / "out.tif", scale=2, detail_map=tmp_path / "detail.tif")
    detail, _, _ = _read(tmp_path / "detail.tif")
    cols = np.arange(detail.shape[1])
    edge = 64  # the step sits between output columns 63 and 64
    far = np.abs(cols - edge) > 12
    near = np.abs(cols - edge) <= 4
    # Far from the edge the image is flat: nothing to synthesize.
    assert np.abs(detail[:, far]).max() < 1e-3 * 160
    # Along the edge the model adds detail (sharpening), a visible share of the step.
    assert detail[:, near].max() > 0.01 * 160
    assert detail[:, near].mean() > 100 * max(detail[:, far].mean(), 1e-9)
    # Independent check: |output - GDAL cubic| away from the raster's border.
    with rasterio.open(tmp_path / "out.tif") as ds:
        out = ds.read(1).astype(np.float64)
    ref = np.abs(out - _gdal_cubic(src, 2)[0])
    inner = (slice(8, -8), slice(8, -8))
    np.testing.assert_allclose(detail[inner], ref[inner], atol=1e-3)


def test_a_pure_interpolator_has_zero_detail(make_raster, tmp_path):
    # An interpolating model synthesizes nothing: its map is zero on a real photo.
    src = make_raster(camera(40, 40).astype(np.float32), dtype="float32")
    magnify_raster(src, tmp_path / "out.tif", BicubicContractModel(2), detail_map=tmp_path / "d.tif")
    detail, _, _ = _read(tmp_path / "d.tif")
    np.testing.assert_allclose(detail, 0.0, atol=1e-3)


@pytest.fixture
def photo(make_raster):
    img = camera(72, 72).astype(np.float32)
    return make_raster(np.stack([img, 0.8 * img + 10, 0.5 * img + 40]), dtype="float32")


def test_chunked_equals_whole(photo, tmp_path):
    magnify_raster(photo, tmp_path / "whole.tif", scale=2, detail_map=tmp_path / "dw.tif")
    magnify_raster(photo, tmp_path / "small.tif", scale=2, chunk_size=24, detail_map=tmp_path / "ds.tif")
    whole, wtags, _ = _read(tmp_path / "dw.tif")
    small, stags, _ = _read(tmp_path / "ds.tif")
    assert np.nanmax(whole) > 1.0  # the photo gets detail
    # float32 work: the outputs of the two cuts agree to float32 rounding.
    np.testing.assert_allclose(small, whole, rtol=1e-5, atol=1e-4)
    for key in ("GEOSR_DETAIL_MAX", "GEOSR_DETAIL_P95", "GEOSR_DETAIL_MEAN"):
        assert float(stags[key]) == pytest.approx(float(wtags[key]), rel=1e-4)


def test_map_is_rms_over_bands_and_tags_summarise_it(photo, tmp_path):
    dst = tmp_path / "out.tif"
    magnify_raster(photo, dst, scale=2, detail_map=tmp_path / "detail.tif", stac=True)
    detail, dtags, profile = _read(tmp_path / "detail.tif")
    with rasterio.open(dst) as ds:
        out, tags, out_profile = ds.read().astype(np.float64), ds.tags(), ds.profile
    # RMS over bands of output minus GDAL's cubic, in the interior.
    ref = np.sqrt(np.mean((out - _gdal_cubic(photo, 2)) ** 2, axis=0))
    inner = (slice(8, -8), slice(8, -8))
    np.testing.assert_allclose(detail[inner], ref[inner], atol=1e-2)
    # Same grid as the output.
    assert profile["transform"] == out_profile["transform"] and profile["crs"] == out_profile["crs"]
    # Tagged like the output.
    for key in ("GEOSR_SOURCE", "GEOSR_MODEL_SHA256", "GEOSR_SCALE", "GEOSR_METHOD", "GEOSR_SYNTHESIZED"):
        assert dtags[key] == tags[key]
    # Summary statistics: numpy's on the map (the 95th percentile from a
    # histogram with bins 0.23 % wide, hence the tolerance).
    assert float(tags["GEOSR_DETAIL_MEAN"]) == pytest.approx(float(np.nanmean(detail)), rel=1e-5)
    assert float(tags["GEOSR_DETAIL_MAX"]) == pytest.approx(float(np.nanmax(detail)), rel=1e-5)
    assert float(tags["GEOSR_DETAIL_P95"]) == pytest.approx(float(np.nanpercentile(detail, 95)), rel=3e-3)
    assert tags["GEOSR_DETAIL_MAP"] == "detail.tif"
    item = json.loads((tmp_path / "out.json").read_text())
    asset = item["assets"]["detail"]
    assert asset["href"] == "detail.tif" and "metadata" in asset["roles"]
    assert item["properties"]["geosr:detail_max"] == pytest.approx(float(np.nanmax(detail)), rel=1e-5)


def test_invalid_output_pixels_are_nan(make_raster, tmp_path):
    img = camera(48, 48)
    img[10:20, 30:44] = -9999
    src = make_raster(img.astype(np.float32), dtype="float32", nodata=-9999)
    magnify_raster(src, tmp_path / "out.tif", scale=2, detail_map=tmp_path / "detail.tif")
    detail, _, profile = _read(tmp_path / "detail.tif")
    assert np.isnan(profile["nodata"])
    assert np.isnan(detail[20:40, 60:88]).all()
    assert np.isfinite(detail[:20]).all()


@pytest.mark.parametrize("which", ["src", "dst", "stac"])
def test_destination_must_not_be_an_input_or_another_output(photo, tmp_path, which):
    before = sha256_of(photo)
    dst = tmp_path / "out.tif"
    target = {"src": photo, "dst": dst, "stac": tmp_path / "out.json"}[which]
    with pytest.raises(DestinationError, match="must differ"):
        magnify_raster(photo, dst, scale=2, stac=True, detail_map=target)
    assert sha256_of(photo) == before
    assert not dst.exists()


def test_existing_detail_map_needs_overwrite(photo, tmp_path):
    existing = tmp_path / "detail.tif"
    existing.write_bytes(b"keep me")
    with pytest.raises(DestinationError, match="must not exist"):
        magnify_raster(photo, tmp_path / "out.tif", scale=2, detail_map=existing)
    assert existing.read_bytes() == b"keep me"
    assert not (tmp_path / "out.tif").exists()


def test_detail_magnitude_and_stats_units():
    values = np.array([[[3.0, 1.0]], [[4.0, 1.0]]])
    bases = np.zeros_like(values)
    ok = np.array([[True, False]])
    got = detail_magnitude(values, bases, ok)
    # RMS of (3, 4) is sqrt(12.5).
    assert got[0, 0] == pytest.approx(np.sqrt(12.5), rel=1e-6) and np.isnan(got[0, 1])
    stats = DetailStats()
    rng = np.random.default_rng(0)
    sample = rng.gamma(2.0, 3.0, 10_000)
    stats.add(sample[:4000])
    stats.add(np.concatenate([sample[4000:], [np.nan]]))
    summary = stats.summary()
    assert summary["mean"] == pytest.approx(sample.mean(), rel=1e-12)
    assert summary["max"] == sample.max()
    assert summary["p95"] == pytest.approx(np.percentile(sample, 95), rel=3e-3)


def test_guided_run_writes_a_detail_map_independent_of_chunks(tmp_path):
    from affine import Affine

    from geosr.core.resample import degrade

    truth = np.stack([camera(96, 96), 0.7 * camera(96, 96) + 20.0])
    coarse, guide = degrade(truth, 2), truth.mean(axis=0)
    paths = []
    for name, arr, pixel in (("coarse.tif", coarse, 60.0), ("guide.tif", guide[None], 30.0)):
        with rasterio.open(tmp_path / name, "w", driver="GTiff", width=arr.shape[2], height=arr.shape[1],
                           count=arr.shape[0], dtype="float32", crs="EPSG:32618",
                           transform=Affine(pixel, 0, 500000.0, 0, -pixel, 4200000.0)) as ds:
            ds.write(arr.astype(np.float32))
        paths.append(tmp_path / name)
    for name, chunk in (("whole", 1024), ("small", 24)):
        magnify_raster(paths[0], tmp_path / f"{name}.tif", guide=paths[1], chunk_size=chunk,
                       detail_map=tmp_path / f"d-{name}.tif")
    whole, tags, _ = _read(tmp_path / "d-whole.tif")
    small, _, _ = _read(tmp_path / "d-small.tif")
    assert tags["GEOSR_METHOD"] == "guided" and whole.shape == (96, 96)
    np.testing.assert_allclose(small, whole, rtol=1e-5, atol=1e-3)
    # The guide brings detail: the map is not zero, and equals |output - GDAL cubic| inside.
    with rasterio.open(tmp_path / "whole.tif") as ds:
        out = ds.read().astype(np.float64)
    ref = np.sqrt(np.mean((out - _gdal_cubic(paths[0], 2)) ** 2, axis=0))
    assert np.nanmax(whole) > 1.0
    np.testing.assert_allclose(whole[8:-8, 8:-8], ref[8:-8, 8:-8], atol=1e-2)
    # A guide is read by the run: it can never be the detail map.
    with pytest.raises(DestinationError, match="must differ"):
        magnify_raster(paths[0], tmp_path / "x.tif", guide=paths[1], detail_map=paths[1])
