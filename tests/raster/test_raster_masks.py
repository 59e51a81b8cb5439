"""Validity masks, nearest-neighbour magnification, output pixel values."""

import numpy as np
import pytest
import rasterio
from rasterio.enums import Resampling

from geosr.raster.io import inspect_source
from geosr.raster.masks import MaskMode, mask_mode, nearest_magnify, to_output_dtype

from helpers import camera


@pytest.mark.parametrize("scale", [2, 3, 4])
def test_nearest_magnify_equals_gdal_nearest(make_raster, scale):
    img = camera(17, 23).astype(np.uint8)
    valid = np.ones(img.shape, bool)
    valid[2:7, 5:9] = False
    valid[-1, :] = False
    img[~valid] = 0
    src = make_raster(img, nodata=0)
    with rasterio.open(src) as s:
        mask = s.read_masks(1)
        # GDAL's nearest-neighbour resampling of the mask is the reference.
        ref = s.read_masks(1, out_shape=(17 * scale, 23 * scale), resampling=Resampling.nearest)
        ref_data = s.read(1, out_shape=(17 * scale, 23 * scale), resampling=Resampling.nearest)
    assert np.array_equal(nearest_magnify(mask, scale), ref)
    assert np.array_equal(nearest_magnify(img, scale), ref_data)


def test_rounding_and_clipping_to_integer_types():
    values = np.array([[-3.0, 0.4, 0.5, 1.5, 254.5, 254.6, 300.0]])
    valid = np.ones(values.shape, bool)
    out, ok = to_output_dtype(values, valid, "uint8")
    # numpy's round-half-to-even (np.rint) then the uint8 range.
    assert out.tolist() == [[0, 0, 0, 2, 254, 255, 255]]
    assert ok.all()
    out, _ = to_output_dtype(np.array([[-40000.0, 40000.0, -1.5]]), np.ones((1, 3), bool), "int16")
    assert out.tolist() == [[-32768, 32767, -2]]


def test_valid_pixel_never_takes_nodata():
    values = np.array([[0.2, -4.0, 0.0, 7.0, 255.2, 254.9]])
    valid = np.array([[True, True, True, False, True, True]])
    out, ok = to_output_dtype(values, valid, "uint8", nodata=0)
    assert out.tolist() == [[1, 1, 1, 0, 255, 255]]
    out, _ = to_output_dtype(values, valid, "uint8", nodata=255)
    assert out.tolist() == [[0, 0, 0, 255, 254, 254]]
    out, _ = to_output_dtype(np.array([[-9999.3, -9998.8, -9999.0]]), np.ones((1, 3), bool), "int16",
                             nodata=-9999)
    assert out.tolist() == [[-10000, -9998, -9998]]
    f, _ = to_output_dtype(np.array([[-9999.0, 3.0]]), np.array([[True, False]]), "float32", nodata=-9999.0)
    assert f[0, 0] != np.float32(-9999.0) and abs(f[0, 0] + 9999.0) < 1e-3
    assert f[0, 1] == np.float32(-9999.0)


def test_non_finite_outputs_become_invalid():
    values = np.array([[np.nan, np.inf, 2.0]])
    out, ok = to_output_dtype(values, np.ones((1, 3), bool), "float32")
    assert ok.tolist() == [[False, False, True]]
    assert np.isnan(out[0, :2]).all() and out[0, 2] == 2.0
    out, ok = to_output_dtype(values, np.ones((1, 3), bool), "uint16", nodata=0)
    assert out.tolist() == [[0, 0, 2]]


def test_float32_overflow_is_clipped_not_infinite():
    out, ok = to_output_dtype(np.array([[1e300]]), np.ones((1, 1), bool), "float32")
    assert ok.all() and out[0, 0] == np.finfo(np.float32).max


def test_mask_modes(make_raster):
    img = camera(10, 10).astype(np.uint8)
    assert mask_mode(inspect_source(make_raster(img, name="n.tif", nodata=0)), (1,), ())[0] is MaskMode.NODATA
    m = np.ones(img.shape, bool)
    m[0, 0] = False
    assert mask_mode(inspect_source(make_raster(img, name="m.tif", mask=m)), (1,), ())[0] is MaskMode.MASK
    assert mask_mode(inspect_source(make_raster(img, name="p.tif")), (1,), ())[0] is MaskMode.NONE
    f = inspect_source(make_raster(img.astype(np.float32), name="f.tif", nodata=float("nan")))
    mode, nodata = mask_mode(f, (1,), ())
    assert mode is MaskMode.NODATA and np.isnan(nodata)
