"""magnify_raster and train_from_rasters: the output raster contract end to end."""

from __future__ import annotations

import datetime as dt
import os
import signal
import subprocess
import sys
import textwrap

import numpy as np
import pytest
import rasterio
import rasterio.warp
from affine import Affine
from rasterio.control import GroundControlPoint
from rasterio.enums import ColorInterp, MaskFlags, Resampling
from rasterio.transform import from_gcps

from geosr._version import __version__
from geosr.errors import (
    DestinationError,
    GeoreferencingWarning,
    InputError,
    ModelError,
    ParameterError,
)
from geosr.pipeline.magnify import magnify_raster, train_from_rasters
from geosr.raster import MIN_CHUNK

from helpers import camera, list_dir, sha256_of


def _read(path):
    with rasterio.open(path) as ds:
        return ds.read(), ds.read_masks(), ds.profile, ds


def _whole(model, image, valid):
    """What the core gives for the whole in-memory image (the reference of chunking)."""
    return model.magnify(image, valid)


# ------------------------------------------------------------ chunked = whole
def _holes(rows, cols, seed=1):
    rng = np.random.default_rng(seed)
    valid = np.ones((rows, cols), bool)
    for _ in range(4):
        r, c = rng.integers(0, rows - 6), rng.integers(0, cols - 6)
        valid[r : r + rng.integers(2, 7), c : c + rng.integers(2, 7)] = False
    valid[:, :3] = False  # a nodata border along one edge
    return valid


@pytest.mark.parametrize("dtype,tol", [("float32", 2e-4), ("float64", 1e-9)])
def test_chunked_equals_whole_float_nan(make_raster, run_dir, tiny_model, dtype, tol):
    # Tolerance: a few units in the last place of values up to 255.
    rows, cols = 61, 77  # neither divides any chunk size below
    img = camera(rows, cols).astype(dtype)
    valid = _holes(rows, cols)
    img[~valid] = np.nan
    src = make_raster(img, nodata=float("nan"))
    expected = _whole(tiny_model, img, valid)
    halo = tiny_model.context_radius(masked=True)
    smallest = max(MIN_CHUNK, halo)
    for chunk in (smallest, 23, 40, 1024):
        dst = run_dir / f"c{chunk}.tif"
        res = magnify_raster(src, dst, tiny_model, chunk_size=chunk)
        assert res.halo == halo
        out = _read(dst)[0][0]
        assert out.dtype == np.dtype(dtype)  # float32 stays float32
        same_nan = np.isnan(out) == np.isnan(expected)
        assert same_nan.all(), f"mask differs at chunk {chunk}"
        err = np.nanmax(np.abs(out - expected))
        assert err <= tol, f"chunk {chunk}: max abs difference {err}"


def test_chunked_equals_whole_uint16_nodata(make_raster, run_dir, tiny_model):
    rows, cols = 50, 45
    img = (camera(rows, cols) * 40 + 1000).astype(np.uint16)  # 16-bit reflectance-like range
    valid = _holes(rows, cols, seed=3)
    img[~valid] = 0
    src = make_raster(img, nodata=0)
    expected = _whole(tiny_model, img.astype(np.float64), valid)
    outs = []
    for chunk in (16, 33, 1024):
        dst = run_dir / f"u{chunk}.tif"
        magnify_raster(src, dst, tiny_model, chunk_size=chunk)
        outs.append(_read(dst)[0][0])
    hr_valid = np.repeat(np.repeat(valid, 2, 0), 2, 1)
    ref = np.clip(np.rint(expected), 1, 65535)
    for out in outs:
        assert (out[~hr_valid] == 0).all()
        # Rounding may flip at exact .5 ties under float reordering: at most 1.
        assert np.abs(out[hr_valid].astype(float) - ref[hr_valid]).max() <= 1
        assert (out[hr_valid] != 0).all()
    assert np.array_equal(outs[0], outs[1]) or np.abs(outs[0].astype(int) - outs[1]).max() <= 1


def test_contract_model_matches_gdal_cubic_grid(make_raster, run_dir, bicubic_model):
    # GDAL's cubic resampling (rasterio read with out_shape) is the outside
    # reference: a pure interpolator run through the pipeline must land on
    # GDAL's grid, value for value away from the borders.
    img = camera(40, 52).astype(np.float32)
    src = make_raster(img)
    dst = run_dir / "bicubic.tif"
    magnify_raster(src, dst, bicubic_model, chunk_size=16)
    with rasterio.open(src) as s, rasterio.open(dst) as d:
        gdal = s.read(1, out_shape=(80, 104), resampling=Resampling.cubic)
        out = d.read(1)
        assert d.bounds == pytest.approx(s.bounds)
        # Pixel centres: output (row, col) sits at source ((col+0.5)/2, (row+0.5)/2).
        for r, c in [(0, 0), (7, 33), (79, 103)]:
            assert d.xy(r, c) == pytest.approx(tuple(s.transform @ ((c + 0.5) / 2, (r + 0.5) / 2)))
    assert np.abs(out[6:-6, 6:-6] - gdal[6:-6, 6:-6]).max() < 1e-3


# ------------------------------------------------------- the shared test data
def test_real_scene_crop_contract(shared_file, run_dir, tiny_model):
    # A 240 x 240 crop of RGB.byte.tif with part of its nodata border (tests/data/SOURCES.md).
    src = shared_file("rgb-byte-crop.tif")
    before = sha256_of(src)
    dst = run_dir / "rgb_x2.tif"
    res = magnify_raster(src, dst, tiny_model, chunk_size=100)
    assert res.width == 2 * 240 and res.height == 2 * 240
    with rasterio.open(src) as s, rasterio.open(dst) as d:
        assert (d.width, d.height, d.count) == (2 * s.width, 2 * s.height, s.count)
        assert d.crs == s.crs
        # Outside reference: rasterio/affine's own composition.
        assert d.transform == s.transform @ Affine.scale(0.5)
        assert d.dtypes == s.dtypes and d.nodata == s.nodata == 0
        assert d.colorinterp == s.colorinterp
        assert d.profile["tiled"] and d.profile["compress"] == "deflate"
        # Nodata border kept: the output mask is GDAL's nearest magnification of the input mask.
        ref_mask = s.read_masks(out_shape=(3, d.height, d.width), resampling=Resampling.nearest)
        out_mask = d.read_masks()
        assert np.array_equal(out_mask, ref_mask)
        data = d.read()
        assert (data[out_mask > 0] != 0).all()  # a valid pixel never takes the nodata value
        assert (data[out_mask == 0] == 0).all()
        tags = d.tags()
    assert tags["GEOSR_SOURCE"] == "rgb-byte-crop.tif"
    assert sha256_of(src) == before


def test_all_nodata_gives_all_nodata_output_with_warning(shared_file, run_dir, tiny_model):
    src = shared_file("all-nodata.tif")
    dst = run_dir / "empty.tif"
    with pytest.warns(UserWarning, match="no valid pixel"):
        magnify_raster(src, dst, tiny_model, chunk_size=512)
    with rasterio.open(dst) as d:
        assert (d.width, d.height, d.count) == (142, 4950, 4)
        assert d.read_masks().max() == 0
        assert d.descriptions == ("blue", "green", "red", "nir")


def test_float_nan_without_crs(shared_file, run_dir, tiny_model):
    src = shared_file("float_nan.tif")
    dst = run_dir / "fnan.tif"
    with pytest.warns(GeoreferencingWarning, match="no CRS"):
        magnify_raster(src, dst, tiny_model)
    with rasterio.open(src) as s, rasterio.open(dst) as d:
        assert d.crs is None
        assert d.transform == s.transform @ Affine.scale(0.5)
        assert np.isnan(d.nodata)
        a, b = s.read(1), d.read(1)
        hr_nan = np.repeat(np.repeat(np.isnan(a), 2, 0), 2, 1)
        assert np.array_equal(np.isnan(b), hr_nan)


def test_rotated_transform(shared_file, run_dir, tiny_model):
    src = shared_file("rotated.tif")
    dst = run_dir / "rot.tif"
    with pytest.warns(GeoreferencingWarning):
        magnify_raster(src, dst, tiny_model)
    with rasterio.open(src) as s, rasterio.open(dst) as d:
        assert d.transform.almost_equals(s.transform @ Affine.scale(0.5))
        assert s.transform.b != 0  # the file really is rotated
        # The four corners of both grids are the same points.
        for col, row in [(0, 0), (s.width, 0), (0, s.height), (s.width, s.height)]:
            assert d.transform @ (2 * col, 2 * row) == pytest.approx(s.transform @ (col, row))


def test_corrupt_blocks_give_one_clear_error_and_no_output(shared_file, run_dir, tiny_model):
    src = shared_file("corrupt.tif")
    before = sha256_of(src)
    dst = run_dir / "bad.tif"
    with pytest.raises(InputError, match="read error") as info:
        magnify_raster(src, dst, tiny_model, chunk_size=512, retries=0)
    assert "corrupt.tif" in str(info.value)
    assert list_dir(run_dir) == []
    assert sha256_of(src) == before


# ------------------------------------------------------------- dtypes & masks
@pytest.mark.parametrize(
    "dtype,nodata", [("uint8", 0), ("uint16", 65535), ("int16", -9999), ("float32", float("nan"))]
)
def test_dtypes_and_nodata(make_raster, run_dir, tiny_model, dtype, nodata):
    img = camera(30, 34)
    if dtype == "int16":
        img = img * 10 - 1200
    img = img.astype(dtype)
    valid = np.ones(img.shape, bool)
    valid[5:9, 10:20] = False
    img[~valid] = nodata
    src = make_raster(img, nodata=nodata)
    dst = run_dir / "o.tif"
    magnify_raster(src, dst, tiny_model)
    with rasterio.open(src) as s, rasterio.open(dst) as d:
        assert d.dtypes[0] == dtype
        out = d.read(1)
        assert d.nodata == s.nodata or (np.isnan(d.nodata) and np.isnan(s.nodata))
        hr_valid = np.repeat(np.repeat(valid, 2, 0), 2, 1)
        if np.isnan(nodata):
            assert np.array_equal(~np.isnan(out), hr_valid)
        else:
            assert (out[~hr_valid] == nodata).all()
            assert (out[hr_valid] != nodata).all()
            info = np.iinfo(dtype)
            assert out.min() >= info.min and out.max() <= info.max


def test_valid_pixel_next_to_nodata_value_is_nudged(make_raster, run_dir, bicubic_model):
    # A dark valid area next to nodata 0: bicubic overshoot gives values that
    # round to 0 (or below); they must come out as 1, never as nodata.
    img = np.full((24, 24), 1, np.uint8)
    img[:, 12:] = 200
    src = make_raster(img, nodata=0)
    dst = run_dir / "u8.tif"
    magnify_raster(src, dst, bicubic_model)
    raw = bicubic_model.magnify(img.astype(np.float64))
    assert raw.min() < -0.5  # the cubic kernel's undershoot would round below 0
    out = _read(dst)[0][0]
    assert out.min() == 1  # clipped to 0, which is nodata, and nudged to 1
    assert np.array_equal(out, np.clip(np.rint(raw), 1, 255).astype(np.uint8))


def test_per_dataset_mask_and_no_leak(make_raster, run_dir, tiny_model):
    img = camera(40, 40).astype(np.uint8)
    valid = np.ones(img.shape, bool)
    valid[10:25, 12:30] = False
    other = img.copy()
    other[~valid] = 255 - other[~valid]  # different values under the mask
    a = make_raster(img, name="a.tif", mask=valid)
    b = make_raster(other, name="b.tif", mask=valid)
    with rasterio.open(a) as s:
        assert s.mask_flag_enums[0] == [MaskFlags.per_dataset]
    magnify_raster(a, run_dir / "a.tif", tiny_model, chunk_size=16)
    magnify_raster(b, run_dir / "b.tif", tiny_model, chunk_size=16)
    da, ma, _, _ = _read(run_dir / "a.tif")
    db, mb, _, _ = _read(run_dir / "b.tif")
    with rasterio.open(a) as s:
        ref = s.read_masks(1, out_shape=(80, 80), resampling=Resampling.nearest)
    assert np.array_equal(ma[0], ref) and np.array_equal(mb[0], ref)
    # Invalid inputs never leak into valid outputs.
    assert np.array_equal(da[ma > 0], db[mb > 0])


def test_alpha_band_magnified_by_nearest(make_raster, run_dir, tiny_model):
    rgb = np.stack([camera(32, 36, 100 + 40 * k, 90) for k in range(3)]).astype(np.uint8)
    alpha = np.full((32, 36), 255, np.uint8)
    alpha[:, :8] = 0
    alpha[20:, 20:] = 128
    src = make_raster(np.concatenate([rgb, alpha[None]]), photometric="RGB", alpha="YES")
    with rasterio.open(src) as s:
        assert s.colorinterp[3] == ColorInterp.alpha
    dst = run_dir / "rgba.tif"
    res = magnify_raster(src, dst, [tiny_model] * 3)
    assert res.count == 4
    with rasterio.open(dst) as d:
        assert d.colorinterp[3] == ColorInterp.alpha
        out_alpha = d.read(4)
        assert np.array_equal(out_alpha, np.repeat(np.repeat(alpha, 2, 0), 2, 1))
        assert d.tags(4)["GEOSR_RESAMPLING"] == "nearest"
        assert (d.read(1)[out_alpha == 0] == 0).all()


# ------------------------------------------------------- georeferencing cases
def test_non_epsg_wkt_crs_is_copied(make_raster, run_dir, tiny_model):
    custom = ("+proj=aea +lat_1=29.5 +lat_2=45.5 +lat_0=23 +lon_0=-96.5 +x_0=0 +y_0=0 "
              "+datum=WGS84 +units=m +no_defs")
    src = make_raster(camera(20, 20).astype(np.uint8), crs=custom)
    dst = run_dir / "aea.tif"
    magnify_raster(src, dst, tiny_model)
    with rasterio.open(src) as s, rasterio.open(dst) as d:
        assert s.crs.to_epsg() is None  # really a CRS without a code
        assert d.crs == s.crs
        assert d.crs.to_wkt() == s.crs.to_wkt()


def test_gcp_only_georeferencing_scales_pixel_coordinates(make_raster, run_dir, tiny_model):
    gcps = [
        GroundControlPoint(row=0, col=0, x=500000, y=4200000, id="a"),
        GroundControlPoint(row=0, col=30, x=500900, y=4200100, id="b"),
        GroundControlPoint(row=25, col=0, x=500050, y=4199250, id="c"),
        GroundControlPoint(row=25, col=30, x=500950, y=4199350, id="d"),
    ]
    src = make_raster(camera(25, 30).astype(np.uint8), gcps=gcps, crs="EPSG:32618")
    dst = run_dir / "gcp.tif"
    magnify_raster(src, dst, tiny_model)
    with rasterio.open(src) as s, rasterio.open(dst) as d:
        (g_src, c_src), (g_out, c_out) = s.gcps, d.gcps
        assert c_out == c_src
        assert [(g.x, g.y) for g in g_out] == [(g.x, g.y) for g in g_src]
        assert [(g.row, g.col) for g in g_out] == [(2 * g.row, 2 * g.col) for g in g_src]
        # Outside reference: rasterio's affine fit of the GCPs.
        assert from_gcps(g_out).almost_equals(from_gcps(g_src) @ Affine.scale(0.5))


def test_band_metadata_carried(make_raster, run_dir, tiny_model):
    data = np.stack([camera(20, 22), camera(20, 22, 300, 300)]).astype(np.int16)
    src = make_raster(
        data, descriptions=["B05 red edge", "B06 red edge"], units=["reflectance", "reflectance"],
        scales=[0.0001, 0.0002], offsets=[-0.1, 0.0], tags={"AREA_OR_POINT": "Point", "SCENE": "x1"},
        band_tags=[{"WAVELENGTH": "705", "STATISTICS_MEAN": "3"}, {"WAVELENGTH": "740"}],
    )
    dst = run_dir / "meta.tif"
    magnify_raster(src, dst, tiny_model)
    with rasterio.open(src) as s, rasterio.open(dst) as d:
        assert d.descriptions == s.descriptions
        assert d.units == s.units
        assert d.scales == s.scales and d.offsets == s.offsets
        assert d.colorinterp == s.colorinterp
        assert d.tags()["AREA_OR_POINT"] == "Point" and d.tags()["SCENE"] == "x1"
        assert d.tags(1)["WAVELENGTH"] == "705" and "STATISTICS_MEAN" not in d.tags(1)
        assert d.transform == s.transform @ Affine.scale(0.5)


def test_provenance_tags(make_raster, run_dir, tiny_model):
    src = make_raster(camera(20, 20).astype(np.uint8), name="scene_20m.tif")
    dst = run_dir / "tags.tif"
    before = dt.datetime.now(dt.timezone.utc).replace(microsecond=0)
    magnify_raster(src, dst, tiny_model)
    with rasterio.open(dst) as d:
        tags = d.tags()
    assert tags["GEOSR_SYNTHESIZED"] == "yes"
    assert tags["GEOSR_METHOD"] == "anchored"
    assert tags["GEOSR_SCALE"] == "2"
    assert tags["GEOSR_MODEL_SHA256"] == tiny_model.sha256_
    assert tags["GEOSR_VERSION"] == __version__
    assert tags["GEOSR_SOURCE"] == "scene_20m.tif"
    created = dt.datetime.fromisoformat(tags["GEOSR_CREATED"].replace("Z", "+00:00"))
    assert created.tzinfo is not None and created.utcoffset() == dt.timedelta(0)
    assert before <= created <= dt.datetime.now(dt.timezone.utc)
    desc = tags["TIFFTAG_IMAGEDESCRIPTION"]
    assert "synthesized" in desc and "not a measurement" in desc


def test_per_band_models_and_band_count_refused(make_raster, run_dir, tiny_model):
    data = np.stack([camera(20, 20, 100 + 50 * k, 100) for k in range(3)]).astype(np.uint8)
    src = make_raster(data)
    with pytest.raises(ModelError, match="one per magnified band"):
        magnify_raster(src, run_dir / "x.tif", [tiny_model, tiny_model])
    res = magnify_raster(src, run_dir / "two.tif", [tiny_model, tiny_model], bands=[3, 1])
    assert res.count == 2
    with rasterio.open(src) as s, rasterio.open(run_dir / "two.tif") as d:
        assert d.count == 2
        single = run_dir / "b3.tif"
        magnify_raster(src, single, tiny_model, bands="3")
        with rasterio.open(single) as one:
            assert np.array_equal(one.read(1), d.read(1))  # band order follows 'bands'
        assert s.count == 3


def test_model_of_another_scale_refused(make_raster, run_dir, tiny_model):
    src = make_raster(camera(20, 20).astype(np.uint8))
    with pytest.raises(ModelError, match="scale 3"):
        magnify_raster(src, run_dir / "x.tif", tiny_model, scale=3)
    with pytest.raises(ModelError, match="method"):
        magnify_raster(src, run_dir / "x.tif", tiny_model, method="sparse")
    assert list_dir(run_dir) == []


def test_model_file_path(make_raster, run_dir, tmp_path, tiny_model):
    from geosr.modelfile import save_models

    src = make_raster(camera(20, 20).astype(np.uint8))
    path = tmp_path / "m.npz"
    save_models(path, [tiny_model])
    magnify_raster(src, run_dir / "a.tif", str(path))
    magnify_raster(src, run_dir / "b.tif", tiny_model)
    assert np.array_equal(_read(run_dir / "a.tif")[0], _read(run_dir / "b.tif")[0])


# ---------------------------------------------------------- GeoTIFF and COG
def test_creation_options(make_raster, run_dir, tiny_model):
    src = make_raster(camera(20, 20).astype(np.uint8))
    magnify_raster(src, run_dir / "lzw.tif", tiny_model,
                   creation_options=["COMPRESS=LZW", "BLOCKXSIZE=16", "BLOCKYSIZE=16"])
    with rasterio.open(run_dir / "lzw.tif") as d:
        assert d.compression.name == "lzw" and d.block_shapes[0] == (16, 16)
    for bad in (["COMPRESS"], ["=LZW"], ["COMPRESS=NOPE"], ["FOOBAR=1"]):
        with pytest.raises(ParameterError, match="creation_options"):
            magnify_raster(src, run_dir / "bad.tif", tiny_model, creation_options=bad)
    assert list_dir(run_dir) == ["lzw.tif"]


def test_cog_is_valid(make_raster, run_dir, tiny_model):
    from rio_cogeo.cogeo import cog_validate

    img = camera(300, 280).astype(np.uint8)
    img[:, :20] = 0
    src = make_raster(img, nodata=0)
    dst = run_dir / "cog.tif"
    magnify_raster(src, dst, tiny_model, cog=True, chunk_size=128)
    valid, errors, _ = cog_validate(str(dst))  # rio-cogeo's general-purpose COG validator
    assert valid, errors
    with rasterio.open(dst) as d:
        assert d.overviews(1)
        assert d.tags()["GEOSR_SYNTHESIZED"] == "yes"
        assert "synthesized" in d.tags()["TIFFTAG_IMAGEDESCRIPTION"]
        assert d.nodata == 0
    assert list_dir(run_dir) == ["cog.tif"]


# ---------------------------------------------------------- the destination
def test_destination_rules(make_raster, run_dir, tiny_model, tmp_path):
    src = make_raster(camera(20, 20).astype(np.uint8))
    before = sha256_of(src)
    with pytest.raises(DestinationError, match="differ from the source"):
        magnify_raster(src, src, tiny_model)
    link = tmp_path / "link.tif"
    link.symlink_to(src)
    with pytest.raises(DestinationError, match="differ from the source"):
        magnify_raster(src, link, tiny_model, overwrite=True)
    cwd = os.getcwd()
    try:
        os.chdir(run_dir)
        with pytest.raises(DestinationError, match="differ from the source"):
            magnify_raster(src, os.path.relpath(src), tiny_model, overwrite=True)
    finally:
        os.chdir(cwd)
    dst = run_dir / "o.tif"
    magnify_raster(src, dst, tiny_model)
    with pytest.raises(DestinationError, match="overwrite"):
        magnify_raster(src, dst, tiny_model)
    magnify_raster(src, dst, tiny_model, overwrite=True)
    with pytest.raises(DestinationError, match="folder"):
        magnify_raster(src, run_dir / "missing" / "o.tif", tiny_model)
    assert sha256_of(src) == before
    assert list_dir(run_dir) == ["o.tif"]


def test_size_guard(make_raster, run_dir, tiny_model):
    src = make_raster(camera(20, 20).astype(np.uint8))
    with pytest.raises(InputError, match="max_output_bytes"):
        magnify_raster(src, run_dir / "o.tif", tiny_model, max_output_bytes=1000)
    magnify_raster(src, run_dir / "o.tif", tiny_model, max_output_bytes=1600)


def test_failed_write_leaves_nothing(make_raster, run_dir, tiny_model, monkeypatch):
    from geosr.raster import writing

    src = make_raster(camera(60, 60).astype(np.uint8))
    calls = {"n": 0}
    real = writing.OutputRaster.write

    def failing(self, result):
        calls["n"] += 1
        if calls["n"] == 2:
            raise writing._destination_error(self.path, OSError(28, "No space left on device"))
        return real(self, result)

    monkeypatch.setattr(writing.OutputRaster, "write", failing)
    with pytest.raises(DestinationError, match="No space left"):
        magnify_raster(src, run_dir / "o.tif", tiny_model, chunk_size=16)
    assert list_dir(run_dir) == []


def test_stale_temporary_removed(make_raster, run_dir, tiny_model):
    from geosr.raster.io import temp_path

    src = make_raster(camera(20, 20).astype(np.uint8))
    dst = run_dir / "o.tif"
    stale = temp_path(dst, ".tif")
    # A pid that cannot be alive (above the kernel's pid_max).
    stale = stale.with_name(stale.name.replace(f"-{os.getpid()}-", "-4194399-"))
    stale.write_bytes(b"half a raster")
    magnify_raster(src, dst, tiny_model)
    assert list_dir(run_dir) == ["o.tif"]


# ------------------------------------------------------ STAC, progress, misc
def test_stac_sidecar(shared_file, run_dir, bicubic_model):
    import json

    src = shared_file("rgb-byte-crop.tif")
    dst = run_dir / "rgb.tif"
    res = magnify_raster(src, dst, bicubic_model, stac=True, chunk_size=128)
    assert res.stac == run_dir / "rgb.json"
    item = json.loads(res.stac.read_text())
    assert item["type"] == "Feature" and item["stac_version"] == "1.1.0"
    props = item["properties"]
    assert props["processing:software"] == {"geosr": __version__}
    assert "synthesized" in props["processing:lineage"]
    assert props["proj:code"] == "EPSG:32618"
    assert props["proj:shape"] == [480, 480]
    # The file's transform gives 300.04 m pixels; at x2 they are about 150 m.
    assert props["gsd"] == pytest.approx(150.02, abs=0.01)
    link = [lk for lk in item["links"] if lk["rel"] == "derived_from"]
    assert len(link) == 1
    assert os.path.samefile(os.path.join(run_dir, link[0]["href"]), src)
    assert item["assets"]["data"]["href"] == "rgb.tif"
    # Outside reference: GDAL's densified bounds transformation.
    with rasterio.open(src) as s:
        ref = rasterio.warp.transform_bounds(s.crs, "EPSG:4326", *s.bounds, densify_pts=21)
    assert item["bbox"] == pytest.approx(list(ref), abs=1e-6)
    assert list_dir(run_dir) == ["rgb.json", "rgb.tif"]


def test_progress_through_the_callback_and_nothing_on_stderr(make_raster, run_dir, tiny_model, capsys,
                                                              caplog):
    src = make_raster(camera(40, 40).astype(np.uint8))
    calls = []
    with caplog.at_level("INFO", logger="geosr"):
        magnify_raster(src, run_dir / "a.tif", tiny_model, chunk_size=16, cog=True,
                       progress=lambda done, total: calls.append((done, total)))
    assert calls == [(i, 9) for i in range(10)]  # (0, total) first, then one call per block
    assert capsys.readouterr().err == ""  # the library prints nothing; the CLI renders
    assert [(r.name, r.getMessage()) for r in caplog.records] == [
        ("geosr.pipeline.magnify", "writing the Cloud Optimized GeoTIFF")]
    with pytest.raises(ParameterError, match="progress"):
        magnify_raster(src, run_dir / "b.tif", tiny_model, progress="bar")


def test_bad_parameters(make_raster, run_dir, tiny_model):
    src = make_raster(camera(20, 20).astype(np.uint8))
    cases = [
        dict(chunk_size=8),
        dict(chunk_size="big"),
        dict(bands=[4]),
        dict(bands=[1, 1]),
        dict(workers=0),
        dict(scheduler="tcp://127.0.0.1:1", workers=2),
        dict(scheduler="gpu"),
        dict(overwrite="yes"),
        dict(retries=-1),
    ]
    for kw in cases:
        with pytest.raises(ParameterError):
            magnify_raster(src, run_dir / "o.tif", tiny_model, **kw)
    with pytest.raises(ParameterError, match="scale"):
        magnify_raster(src, run_dir / "o.tif")
    assert list_dir(run_dir) == []


def test_self_training_on_the_scene(make_raster, run_dir, caplog):
    pytest.importorskip("geosr.core.model")
    src = make_raster(camera(120, 120).astype(np.uint8))
    train_calls = []
    with caplog.at_level("INFO", logger="geosr"):
        res = magnify_raster(
            src, run_dir / "self.tif", scale=2, method="anchored", self_train=True,
            training=dict(n_atoms=16, n_iter=1, neighbours=64, max_samples=1500, chunk_size=64,
                          progress=lambda done, total: train_calls.append((done, total))),
        )
    assert res.method == "anchored" and res.scale == 2
    assert [r.getMessage() for r in caplog.records if r.name == "geosr.pipeline.train"] == [
        "fitting the model for band1 on 1500 pairs"]
    assert train_calls[0][0] == 0 and train_calls[-1][0] == train_calls[-1][1] > 0
    with rasterio.open(run_dir / "self.tif") as d:
        assert d.tags()["GEOSR_MODEL_SHA256"] == res.model_sha256 != "unknown"


# ----------------------------------------------------------------- training
def test_train_from_rasters_per_band_and_shared(make_raster, tmp_path):
    pytest.importorskip("geosr.core.model")
    data = np.stack([camera(130, 140), camera(130, 140, 300, 300)]).astype(np.uint8)
    a = make_raster(data, name="ref_a.tif", descriptions=["red", "nir"])
    b = make_raster(data[:, ::-1].copy(), name="ref_b.tif")
    params = dict(n_atoms=16, n_iter=1, neighbours=64, max_samples=1500)
    per_band = train_from_rasters([a, b], 2, chunk_size=50, **params)
    assert len(per_band) == 2 and [m.band_name_ for m in per_band] == ["red", "nir"]
    again = train_from_rasters([a, b], 2, chunk_size=50, **params)
    assert [m.sha256_ for m in again] == [m.sha256_ for m in per_band]  # seeded runs repeat
    shared = train_from_rasters([a, b], 2, shared=True, chunk_size=64, output=tmp_path / "s.npz",
                                **params)
    assert len(shared) == 1
    from geosr.modelfile import load_models

    assert [m.sha256_ for m in load_models(tmp_path / "s.npz")] == [shared[0].sha256_]
    one = make_raster(data[:1], name="one.tif")
    with pytest.raises(InputError, match="same number of bands"):
        train_from_rasters([a, one], 2, **params)


def test_train_from_all_nodata_is_clear(shared_file):
    pytest.importorskip("geosr.core.model")
    src = shared_file("all-nodata.tif")
    with pytest.raises(InputError, match="no usable training patch"):
        train_from_rasters([src], 2, n_atoms=16, n_iter=1, max_samples=500, chunk_size=512)


def test_training_windows_match_whole_image_pairs(make_raster, tiny_model):
    # Windows carry the training halo, so one window covering the raster
    # and the in-memory path see the same pairs: collect_pairs on a padded
    # whole image is the reference.
    from geosr.raster.training import TrainJob, TrainPlan, collect_window_pairs
    from geosr.raster.windows import Block

    img = camera(48, 60)
    src = make_raster(img.astype(np.float32))
    halo = tiny_model.training_halo()
    plan = TrainPlan(str(src), 48, 60, (1,), (0,), halo, True)
    seed = np.random.SeedSequence(5)
    _, got = collect_window_pairs(TrainJob(0, plan, Block(0, 0, 0, 48, 60), None, seed), [tiny_model])
    rng = np.random.default_rng(seed.spawn(1)[0])
    ref = tiny_model.collect_pairs(np.pad(img, halo, mode="symmetric"), halo, None, None, rng)
    assert np.allclose(got[0][1].windows, ref.windows) and np.allclose(got[0][1].details, ref.details)


# ------------------------------------------------------ schedulers and signals
@pytest.mark.slow
def test_processes_scheduler_equals_threads(make_raster, run_dir, tiny_model):
    src = make_raster(camera(50, 50).astype(np.uint8))
    magnify_raster(src, run_dir / "t.tif", tiny_model, chunk_size=16)
    magnify_raster(src, run_dir / "p.tif", tiny_model, chunk_size=16,
                   scheduler="processes", workers=2)
    assert np.array_equal(_read(run_dir / "t.tif")[0], _read(run_dir / "p.tif")[0])


@pytest.mark.slow
@pytest.mark.cluster
def test_local_cluster_equals_threads(make_raster, run_dir, tiny_model):
    img = camera(45, 50).astype(np.float32)
    img[:4, :] = np.nan
    src = make_raster(img, nodata=float("nan"))
    magnify_raster(src, run_dir / "t.tif", tiny_model, chunk_size=16)
    res = magnify_raster(src, run_dir / "c.tif", tiny_model, chunk_size=16, workers=2)
    assert "LocalCluster" in res.scheduler
    a, b = _read(run_dir / "t.tif")[0], _read(run_dir / "c.tif")[0]
    assert np.array_equal(np.isnan(a), np.isnan(b))
    assert np.nanmax(np.abs(a - b)) <= 1e-5
    whole = tiny_model.magnify(img)
    assert np.nanmax(np.abs(b[0] - whole)) <= 1e-3


@pytest.mark.slow
@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM])
def test_interrupt_leaves_no_output(make_raster, run_dir, tmp_path, sig):
    pytest.importorskip("geosr.core.model")
    src = make_raster(camera(400, 400).astype(np.uint8))
    before = sha256_of(src)
    script = tmp_path / "run.py"
    # SIGTERM reaches the library as KeyboardInterrupt when the program says so,
    # as geosr's command line does; the library itself installs no handler.
    script.write_text(textwrap.dedent(f"""
        import numpy as np, signal, sys, time
        def on_term(signum, frame):
            raise KeyboardInterrupt("terminated by SIGTERM")
        signal.signal(signal.SIGTERM, on_term)
        from skimage import data
        from geosr.core.model import CoupledDictionary
        from geosr.pipeline.magnify import magnify_raster
        from geosr.raster import writing
        img = data.camera().astype(float)
        m = CoupledDictionary(scale=2, method="anchored", n_atoms=16, n_iter=1,
                              max_samples=1500, neighbours=64).fit([img[:128, :128]])
        real = writing.OutputRaster.write
        def slow(self, result):
            real(self, result)
            print("block", flush=True)
            time.sleep(0.2)
        writing.OutputRaster.write = slow
        magnify_raster({str(src)!r}, {str(run_dir / "o.tif")!r}, m, chunk_size=32)
    """))
    proc = subprocess.Popen([sys.executable, str(script)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        assert proc.stdout.readline().strip() == "block"
        assert any(n.startswith(".o.tif.geosr-tmp-") for n in os.listdir(run_dir))
        proc.send_signal(sig)
        proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode != 0
    assert list_dir(run_dir) == []
    assert sha256_of(src) == before


def test_damaged_inner_tile_fails_in_its_task_and_leaves_nothing(make_raster, run_dir, tiny_model):
    src = make_raster(camera(96, 96).astype(np.uint8), tiled=True, blockxsize=16, blockysize=16,
                      compress="deflate")
    raw = bytearray(src.read_bytes())
    with rasterio.open(src) as s:
        s.read(window=((80, 96), (80, 96)))  # the last tile is intact, so opening passes
    mid = len(raw) // 2
    raw[mid : mid + 64] = b"\xff" * 64  # garble a tile in the middle of the file
    src.write_bytes(bytes(raw))
    from geosr.raster.io import inspect_source

    inspect_source(src)  # still opens and its last block decodes
    with pytest.raises(InputError, match="read error in rows"):
        magnify_raster(src, run_dir / "o.tif", tiny_model, chunk_size=16, retries=1)
    assert list_dir(run_dir) == []


def test_magnify_array_is_lazy_and_equals_the_written_raster(make_raster, run_dir, tiny_model):
    import dask

    from geosr.pipeline.magnify import magnify_array

    img = camera(45, 38).astype(np.float32)
    img[10:14, 5:9] = np.nan
    src = make_raster(img, nodata=float("nan"))
    arr = magnify_array(src, tiny_model, chunk_size=16)
    assert arr.shape == (1, 90, 76) and arr.dtype == np.float32
    assert arr.chunks == ((1,), (32, 32, 26), (32, 32, 12))
    whole = tiny_model.magnify(img)
    got = arr.compute(scheduler="threads")
    assert np.array_equal(np.isnan(got[0]), np.isnan(whole))
    assert np.nanmax(np.abs(got[0] - whole)) <= 1e-3
    # A slice computes only the blocks it needs.
    part = arr[:, 40:60, 30:50]
    assert len(dask.optimize(part)[0].__dask_graph__()) < len(arr.__dask_graph__())
    assert np.allclose(part.compute(), got[:, 40:60, 30:50], equal_nan=True)
    magnify_raster(src, run_dir / "o.tif", tiny_model, chunk_size=16)
    written = _read(run_dir / "o.tif")[0]
    assert np.array_equal(np.isnan(written), np.isnan(got))
    assert np.nanmax(np.abs(written - got)) <= 1e-3  # BLAS threading may reorder sums


def test_one_pixel_raster(make_raster, run_dir, tiny_model):
    src = make_raster(np.array([[[37]]], np.uint8))
    magnify_raster(src, run_dir / "o.tif", tiny_model)
    out = _read(run_dir / "o.tif")[0]
    assert out.shape == (1, 2, 2) and (out == 37).all()  # a constant stays constant


def test_infinity_inside_valid_float_data(make_raster, run_dir, tiny_model):
    img = camera(30, 30).astype(np.float32)
    src_a = make_raster(img, name="a.tif")
    bad = img.copy()
    bad[12, 12] = np.inf
    bad[3, 20] = -np.inf
    src_b = make_raster(bad, name="b.tif")
    magnify_raster(src_b, run_dir / "b.tif", tiny_model)
    out = _read(run_dir / "b.tif")[0][0]
    hr_bad = np.repeat(np.repeat(~np.isfinite(bad), 2, 0), 2, 1)
    assert np.array_equal(np.isnan(out), hr_bad)  # invalid, and no infinity written
    assert np.isfinite(out[~hr_bad]).all()
    # The infinities do not leak: the result is the core's with those pixels masked.
    ref = tiny_model.magnify(img, np.isfinite(bad))
    assert np.nanmax(np.abs(out - ref)) <= 1e-3
    magnify_raster(src_a, run_dir / "a.tif", tiny_model)


def test_enormous_declared_size_refused_before_work(tmp_path, run_dir, tiny_model):
    path = tmp_path / "huge.tif"
    with rasterio.open(path, "w", driver="GTiff", width=400_000, height=400_000, count=1,
                       dtype="uint8", blockysize=1000, sparse_ok=True, crs="EPSG:32618",
                       transform=Affine(10, 0, 0, 0, -10, 0)):
        pass
    assert path.stat().st_size < 100_000  # a tiny file that declares 160 gigapixels
    import resource

    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # KiB on Linux
    with pytest.raises(InputError, match="max_output_bytes"):
        magnify_raster(path, run_dir / "o.tif", tiny_model)
    # The high-water mark of this process did not move by a strip (400 MB).
    assert resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - peak < 100 * 1024
    assert list_dir(run_dir) == []


def test_consistency_and_ensemble_chunked_equal_whole(make_raster, run_dir, tiny_model):
    img = camera(50, 47).astype(np.float64)
    src = make_raster(img)
    # Float rasters may hold NaN anywhere, so their blocks carry the masked halo.
    halo = tiny_model.context_radius(consistency=True, masked=True)
    assert halo > tiny_model.context_radius(masked=True)  # the back-projection adds its own reach
    with pytest.raises(ParameterError, match=f"halo of {halo} pixels"):
        magnify_raster(src, run_dir / "x.tif", tiny_model, consistency=True, chunk_size=halo - 1)
    res = magnify_raster(src, run_dir / "o.tif", tiny_model, consistency=True, ensemble=True,
                         chunk_size=halo)
    assert res.halo == halo and res.blocks == 4
    out = _read(run_dir / "o.tif")[0][0]
    ref = tiny_model.magnify(img, consistency=True, ensemble=True)
    assert np.abs(out - ref).max() <= 1e-9
    with rasterio.open(run_dir / "o.tif") as d:
        tags, band = d.tags(), d.tags(1)
    assert tags["GEOSR_CONSISTENCY"] == "yes" and tags["GEOSR_ENSEMBLE"] == "yes"
    # The residual the blocks summed is the whole image's: degrade(output) - input.
    r = tiny_model.context_radius(consistency=True)
    _, resid = tiny_model.magnify_block(np.pad(img, r, mode="symmetric"), r, consistency=True,
                                        ensemble=True, return_residual=True)
    rms, worst = np.sqrt(np.mean(resid**2)), np.abs(resid).max()
    (band_res,) = res.consistency
    assert band_res.rms == pytest.approx(rms, rel=1e-6) and band_res.max == pytest.approx(worst, rel=1e-6)
    assert float(band["GEOSR_CONSISTENCY_RMS"]) == pytest.approx(rms, rel=1e-5)
    assert float(band["GEOSR_CONSISTENCY_MAX"]) == pytest.approx(worst, rel=1e-5)
    percent = 100 * rms / (img.max() - img.min())
    assert float(band["GEOSR_CONSISTENCY_RMS_PERCENT"]) == pytest.approx(percent, rel=1e-3)
    assert band_res.within_tolerance and tags["GEOSR_CONSISTENCY_MET"] == "yes"
    assert "0.5 %" in tags["GEOSR_CONSISTENCY_TOLERANCE"]


def test_no_residual_tags_without_consistency(make_raster, run_dir, tiny_model):
    src = make_raster(camera(30, 30).astype(np.uint8))
    res = magnify_raster(src, run_dir / "o.tif", tiny_model)
    assert res.consistency is None
    with rasterio.open(run_dir / "o.tif") as d:
        assert "GEOSR_CONSISTENCY_RMS" not in d.tags(1) and "GEOSR_CONSISTENCY_MET" not in d.tags()


def test_shipped_model_when_none_is_given(make_raster, run_dir):
    import geosr.modelfile as model_mod
    if not model_mod.default_model_path(2).is_file():
        pytest.skip("no shipped model for x2 in this checkout")
    src = make_raster(camera(24, 24).astype(np.uint8))
    res = magnify_raster(src, run_dir / "o.tif", scale=2)
    shipped = model_mod.default_model(2)
    assert res.model_sha256 == shipped.sha256_ and res.method == str(shipped.method)
    with rasterio.open(run_dir / "o.tif") as d:
        assert d.tags()["GEOSR_MODEL_SHA256"] == shipped.sha256_
        assert np.abs(d.read(1).astype(float) - shipped.magnify(camera(24, 24))).max() <= 1


# ------------------------------------------------------------ spectral guard
def _guard_tag(path):
    with rasterio.open(path) as ds:
        return ds.tags()["GEOSR_SPECTRAL_GUARD"]


def _three_bands(rows, cols):
    """Three bands with different local colour (camera, mirrored and shifted)."""
    base = camera(rows, cols).astype(np.float64)
    return np.stack([base, base[:, ::-1] * 0.6 + 20, np.roll(base, 5, axis=0) * 0.3 + 5])


@pytest.mark.parametrize("dtype,tol", [("float32", 2e-4), ("float64", 1e-9)])
def test_spectral_guard_chunked_equals_whole(make_raster, run_dir, tiny_model, dtype, tol):
    from geosr.core.spectral import guard_spectra
    from geosr.pipeline.magnify import magnify_array

    rows, cols = 47, 53
    img = _three_bands(rows, cols).astype(dtype)
    valid = _holes(rows, cols, seed=5)
    img[:, ~valid] = np.nan
    src = make_raster(img, nodata=float("nan"))
    raw = np.stack([_whole(tiny_model, img[b], valid) for b in range(3)])
    base = np.stack([tiny_model.interpolate(img[b], valid) for b in range(3)])
    hr_valid = np.repeat(np.repeat(valid, 2, 0), 2, 1)
    expected = guard_spectra(raw, base, hr_valid)
    assert np.nanmax(np.abs(expected - raw)) > 1e-3  # the guard does change pixels here
    for chunk in (max(MIN_CHUNK, tiny_model.context_radius(masked=True)), 21, 1024):
        dst = run_dir / f"g{chunk}.tif"
        magnify_raster(src, dst, tiny_model, chunk_size=chunk)
        out = _read(dst)[0]
        assert _guard_tag(dst) == "yes"
        assert (np.isnan(out) == np.isnan(expected)).all()
        assert np.nanmax(np.abs(out - expected)) <= tol, f"chunk {chunk}"
        arr = magnify_array(src, tiny_model, chunk_size=chunk).compute()
        assert np.nanmax(np.abs(arr - expected)) <= tol
    dst = run_dir / "off.tif"
    magnify_raster(src, dst, tiny_model, chunk_size=21, spectral_guard=False)
    out = _read(dst)[0]
    assert _guard_tag(dst) == "no"
    assert np.nanmax(np.abs(out - raw)) <= tol


def test_spectral_guard_skips_alpha_and_single_band(make_raster, run_dir, tiny_model):
    img = camera(30, 30).astype(np.uint8)
    dst = run_dir / "one.tif"
    magnify_raster(make_raster(img, name="one_src.tif"), dst, tiny_model)
    assert _guard_tag(dst) == "no"  # one magnified band: nothing to guard
    expected = np.clip(np.rint(tiny_model.magnify(img.astype(np.float64))), 0, 255)
    assert np.abs(_read(dst)[0][0].astype(float) - expected).max() <= 1
    rgb = np.stack([camera(32, 36, 100 + 40 * k, 90) for k in range(3)]).astype(np.uint8)
    alpha = np.full((32, 36), 255, np.uint8)
    alpha[20:, 20:] = 128
    src = make_raster(np.concatenate([rgb, alpha[None]]), photometric="RGB", alpha="YES")
    dst = run_dir / "rgba.tif"
    magnify_raster(src, dst, tiny_model)
    assert _guard_tag(dst) == "yes"
    # The alpha band is outside the guard: still exactly nearest neighbour.
    assert np.array_equal(_read(dst)[0][3], np.repeat(np.repeat(alpha, 2, 0), 2, 1))


def test_spectral_guard_gives_way_to_consistency(make_raster, run_dir, tiny_model):
    # Back-projection makes the output consistent with the measured pixels; the guard
    # would move it away again, so it is not applied (and the tag says so).
    img = np.stack([camera(40, 40), camera(40, 40)[::-1], camera(40, 40)[:, ::-1]]).astype(np.float64)
    src = make_raster(img)
    magnify_raster(src, run_dir / "c.tif", tiny_model, consistency=True)
    with rasterio.open(run_dir / "c.tif") as d:
        assert d.tags()["GEOSR_SPECTRAL_GUARD"] == "no" and d.tags()["GEOSR_CONSISTENCY_MET"] == "yes"
        out = d.read()
    for b in range(3):
        ref = tiny_model.magnify(img[b], consistency=True)
        assert np.abs(out[b] - ref).max() <= 1e-9
