"""magnify_raster on sources at the edges of GDAL's world: categories, per-band and
infinite nodata, RPC-only georeferencing, netCDF subdatasets.

The references are GDAL's: its nearest resampling (``rasterio.warp.reproject``)
for categorical bands, its mask bands (``read_masks``) for validity, its RPC
transformer for RPC georeferencing.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import rasterio
import rasterio.shutil
import rasterio.warp
from affine import Affine
from rasterio.enums import ColorInterp, Resampling
from rasterio.rpc import RPC
from rasterio.transform import RPCTransformer

from geosr.errors import GeoreferencingWarning
from geosr.pipeline.magnify import magnify_raster

from helpers import camera, vrt_with_band_nodata

CLASSES = {k: (40 * k, 255 - 40 * k, 7 * k, 255) for k in range(6)}


def _gdal_nearest(path, band, scale):
    """GDAL's nearest-neighbour resampling of a band onto the magnified grid."""
    with rasterio.open(path) as ds:
        src = ds.read(band)
        out = np.zeros((ds.height * scale, ds.width * scale), dtype=src.dtype)
        rasterio.warp.reproject(src, out, src_transform=ds.transform, src_crs=ds.crs,
                                dst_transform=ds.transform @ Affine.scale(1 / scale),
                                dst_crs=ds.crs, resampling=Resampling.nearest)
    return out


def _palette(make_raster, classes, nodata=None):
    path = make_raster(classes, name="classes.tif", nodata=nodata)
    with rasterio.open(path, "r+") as ds:
        ds.write_colormap(1, CLASSES)
    return path


def test_palette_band_keeps_its_classes_and_colour_table(make_raster, run_dir, tiny_model):
    classes = (camera(24, 26) // 43).astype(np.uint8)  # six classes, 0..5, in patches
    src = _palette(make_raster, classes, nodata=5)
    dst = run_dir / "o.tif"
    with pytest.warns(UserWarning, match="categorical bands are not synthesized"):
        magnify_raster(src, dst, tiny_model)
    with rasterio.open(dst) as d:
        out = d.read(1)
        assert np.array_equal(out, _gdal_nearest(src, 1, 2))
        assert set(np.unique(out)) <= set(np.unique(classes))  # no class that was not there
        assert d.colorinterp == (ColorInterp.palette,)
        with rasterio.open(src) as s:  # GDAL reads the nodata entry back transparent
            assert {k: d.colormap(1)[k] for k in CLASSES} == {k: s.colormap(1)[k] for k in CLASSES}
        assert {k: d.colormap(1)[k][:3] for k in CLASSES} == {k: v[:3] for k, v in CLASSES.items()}
        assert d.tags(1)["GEOSR_RESAMPLING"] == "nearest" and d.nodata == 5
        assert np.array_equal(d.read_masks(1) == 0, out == 5)


def test_one_bit_source_stays_one_bit(make_raster, run_dir, tiny_model):
    bits = (camera(24, 26) > 128).astype(np.uint8)
    src = make_raster(bits, name="bits.tif", nbits=1)
    dst = run_dir / "o.tif"
    with pytest.warns(UserWarning, match="categorical"):
        magnify_raster(src, dst, tiny_model)
    with rasterio.open(dst) as d:
        out = d.read(1)
        assert set(np.unique(out)) == {0, 1}
        assert d.tags(1, ns="IMAGE_STRUCTURE").get("NBITS") == "1"
        assert np.array_equal(out, _gdal_nearest(src, 1, 2))


def test_categorical_band_beside_a_magnified_band(make_raster, run_dir, bicubic_model):
    img = camera(24, 26).astype(np.uint8)
    classes = (img // 43).astype(np.uint8)
    src = make_raster(np.stack([classes, img]), name="two.tif")
    with rasterio.open(src, "r+") as ds:
        ds.write_colormap(1, CLASSES)
    dst = run_dir / "o.tif"
    with pytest.warns(UserWarning, match="band 1 .*not synthesized"):
        magnify_raster(src, dst, bicubic_model)
    with rasterio.open(dst) as d:
        assert np.array_equal(d.read(1), _gdal_nearest(src, 1, 2))
        assert d.tags(1)["GEOSR_RESAMPLING"] == "nearest" and "GEOSR_MODEL_SHA256" in d.tags(2)
        assert len(np.unique(d.read(2))) > len(np.unique(classes))  # band 2 was interpolated


def _band_nodata_vrt(tmp_path, make_raster, data, values):
    return vrt_with_band_nodata(make_raster(data, name="member.tif"), tmp_path / "bands.vrt", values)


@pytest.mark.parametrize("dtype, values", [("uint8", (3, 200)), ("float32", (-9999.0, 0.0))])
def test_per_band_nodata_keeps_per_band_validity(tmp_path, make_raster, run_dir, bicubic_model,
                                                 dtype, values):
    a, b = camera(30, 32).astype(dtype), camera(30, 32, 300, 200).astype(dtype)
    a[4:9, 5:12], b[15:22, 20:27] = values[0], values[1]
    vrt = _band_nodata_vrt(tmp_path, make_raster, np.stack([a, b]), values)
    dst = run_dir / "o.tif"
    magnify_raster(vrt, dst, bicubic_model)
    with rasterio.open(vrt) as s, rasterio.open(dst) as d:
        for band in (1, 2):
            want = np.repeat(np.repeat(s.read_masks(band) > 0, 2, 0), 2, 1)  # GDAL's per-band mask
            got = d.read_masks(band) > 0
            assert np.array_equal(got, want), band
        assert not (d.read_masks(1) == 0).all(axis=None) and (s.read_masks(1) > 0)[15:22, 20:27].all()
        if dtype == "float32":
            assert np.isnan(d.nodata)
        else:
            assert d.nodata == values[0]


@pytest.mark.parametrize("value", [-np.inf, np.inf])
def test_infinite_nodata_reaches_the_output(make_raster, run_dir, bicubic_model, value):
    img = camera(24, 26).astype(np.float32)
    img[5:8, 6:10] = value
    src = make_raster(img, name="inf.tif", nodata=value)
    dst = run_dir / "o.tif"
    magnify_raster(src, dst, bicubic_model)
    with rasterio.open(dst) as d:
        assert d.nodata == value
        out = d.read(1)
        hole = np.repeat(np.repeat(np.isinf(img), 2, 0), 2, 1)
        assert np.array_equal(out == value, hole) and np.array_equal(d.read_masks(1) == 0, hole)


def _rpc(rows, cols):
    z = [0.0] * 20
    line, samp, den = list(z), list(z), list(z)
    line[1], line[2], line[7] = 0.02, -1.0, 0.01
    samp[1], samp[2], samp[8] = 1.0, 0.03, 0.01
    den[0], den[1] = 1.0, 0.001
    return RPC(height_off=0, height_scale=500, lat_off=40.0, lat_scale=0.05, line_den_coeff=den,
               line_num_coeff=line, line_off=rows / 2, line_scale=rows / 2, long_off=-75.0,
               long_scale=0.06, samp_den_coeff=den, samp_num_coeff=samp, samp_off=cols / 2,
               samp_scale=cols / 2, err_bias=-1.0, err_rand=-1.0)


def test_rpc_only_source_keeps_its_georeferencing(make_raster, run_dir, bicubic_model):
    src = make_raster(camera(24, 26).astype(np.uint8), name="rpc.tif", crs=None,
                      transform=Affine.identity())
    with rasterio.open(src, "r+") as ds:
        ds.rpcs = _rpc(24, 26)
    dst = run_dir / "o.tif"
    with warnings.catch_warnings():
        warnings.simplefilter("error", GeoreferencingWarning)  # no "not carried", no "no CRS"
        magnify_raster(src, dst, bicubic_model)
    with rasterio.open(src) as s, rasterio.open(dst) as d:
        assert d.transform.is_identity and d.rpcs is not None  # no geotransform to shadow the RPCs
        tight = {"RPC_PIXEL_ERROR_THRESHOLD": "1e-8"}
        for row, col in [(0, 0), (11, 7), (23, 25)]:
            x0, y0 = RPCTransformer(s.rpcs, **tight).xy(row, col, zs=0, offset="center")
            x1, y1 = RPCTransformer(d.rpcs, **tight).xy(2 * row + 1, 2 * col + 1, zs=0, offset="ul")
            assert abs(x1 - x0) < 1e-7 and abs(y1 - y0) < 1e-7


def test_netcdf_subdataset_named_as_rasterio_lists_it(tmp_path, run_dir, bicubic_model):
    if "netCDF" not in rasterio.drivers.raster_driver_extensions().values():
        pytest.skip("this GDAL has no netCDF driver")
    tif = tmp_path / "a.tif"
    data = np.stack([camera(20, 24), camera(20, 24, 300, 200)]).astype(np.float32)
    with rasterio.open(tif, "w", driver="GTiff", width=24, height=20, count=2, dtype="float32",
                       crs="EPSG:4326", transform=Affine(0.1, 0, 10, 0, -0.1, 50)) as ds:
        ds.write(data)
    nc = tmp_path / "vars.nc"
    rasterio.shutil.copy(tif, nc, driver="netCDF")
    with rasterio.open(nc) as ds:
        name = ds.subdatasets[1]
    dst = run_dir / "o.tif"
    result = magnify_raster(name, dst, bicubic_model)
    assert (result.width, result.height, result.count) == (48, 40, 1)
    with rasterio.open(dst) as d:
        assert d.crs == "EPSG:4326" and np.isfinite(d.read(1)).all()
