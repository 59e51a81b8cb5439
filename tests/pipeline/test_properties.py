"""Property-based tests: small random rasters through magnify_raster, the output contract holds.

Random pixel types, nodata patterns (none, all, random), sizes down to
1 x 1, scales 2 to 4, chunk sizes and band counts. The geotransform is
checked against rasterio/affine's own composition (``transform * scale``).
The model is the bicubic contract model of conftest, so that every scale
can be drawn without fitting a model per example.
"""

from __future__ import annotations

import os
import warnings

import numpy as np
import pytest
import rasterio
from affine import Affine
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from geosr.pipeline.magnify import magnify_raster
from geosr.raster.windows import MIN_CHUNK

from helpers import BicubicContractModel

DTYPES = ("uint8", "uint16", "int16", "float32", "float64")
NODATA = {"uint8": 0, "uint16": 65535, "int16": -9999, "float32": float("nan"), "float64": -1.0e30}


@st.composite
def rasters(draw):
    dtype = draw(st.sampled_from(DTYPES))
    rows = draw(st.integers(1, 40))
    cols = draw(st.integers(1, 40))
    bands = draw(st.integers(1, 4))
    pattern = draw(st.sampled_from(["none", "all", "random"]))
    seed = draw(st.integers(0, 2**31 - 1))
    rng = np.random.default_rng(seed)
    if np.dtype(dtype).kind == "f":
        data = rng.uniform(-50, 300, (bands, rows, cols)).astype(dtype)
    else:
        info = np.iinfo(dtype)
        lo, hi = max(info.min + 1, -2000), min(info.max - 1, 3000)
        data = rng.integers(lo, hi, (bands, rows, cols)).astype(dtype)
    nodata = None if pattern == "none" else NODATA[dtype]
    valid = np.ones((rows, cols), bool)
    if pattern == "all":
        valid[:] = False
    elif pattern == "random":
        valid = rng.random((rows, cols)) > draw(st.floats(0.05, 0.7))
    if nodata is not None:
        data[:, ~valid] = nodata
    return dict(data=data, nodata=nodata, valid=valid, dtype=dtype)


@given(raster=rasters(), scale=st.integers(2, 4), chunk=st.sampled_from([MIN_CHUNK, 21, 1024]),
       georef=st.booleans())
@settings(max_examples=30, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
def test_output_contract(tmp_path, raster, scale, chunk, georef):
    data, nodata, valid, dtype = raster["data"], raster["nodata"], raster["valid"], raster["dtype"]
    bands, rows, cols = data.shape
    folder = tmp_path / f"ex{len(os.listdir(tmp_path))}"
    folder.mkdir()
    src = folder / "src.tif"
    transform = Affine(20.0, 0.0, 300000.0, 0.0, -20.0, 5000000.0)
    profile = dict(driver="GTiff", width=cols, height=rows, count=bands, dtype=dtype, nodata=nodata,
                   transform=transform)
    if georef:
        profile["crs"] = "EPSG:32633"
    with rasterio.open(src, "w", **profile) as ds:
        ds.write(data)
    model = BicubicContractModel(scale)
    halo = model.context_radius(masked=True)
    chunk = max(chunk, halo)
    dst = folder / "out.tif"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # no CRS / all nodata: warned, by design
        res = magnify_raster(src, dst, model, chunk_size=chunk)
    assert sorted(os.listdir(folder)) == ["out.tif", "src.tif"]  # no temporary left
    with rasterio.open(src) as s, rasterio.open(dst) as d:
        assert (d.width, d.height, d.count) == (scale * cols, scale * rows, bands)
        assert (res.width, res.height, res.count) == (d.width, d.height, d.count)
        # outside reference: affine's composition of the source transform with a scaling
        assert d.transform.almost_equals(s.transform @ Affine.scale(1 / scale))
        assert d.crs == s.crs
        assert d.dtypes == s.dtypes
        if nodata is None:
            assert d.nodata is None
        elif np.isnan(nodata):
            assert np.isnan(d.nodata)
        else:
            assert d.nodata == nodata
        assert d.tags()["GEOSR_SYNTHESIZED"] == "yes"
        assert "synthesized" in d.tags()["TIFFTAG_IMAGEDESCRIPTION"]
        out = d.read()
    hr_valid = np.repeat(np.repeat(valid, scale, 0), scale, 1)
    if nodata is not None:
        under = out[:, ~hr_valid]
        if np.isnan(nodata):
            assert np.isnan(under).all()
            assert np.isfinite(out[:, hr_valid]).all()
        else:
            assert (under == nodata).all()
            assert (out[:, hr_valid] != nodata).all()  # a valid pixel never takes the nodata value
    if np.dtype(dtype).kind == "f":
        assert not np.isinf(out).any()
    if pattern_is_constant(data, valid):
        # a constant valid area stays that constant (an interpolator reproduces constants)
        value = data[:, valid][:, 0]
        got = out[:, hr_valid].astype(np.float64)
        assert np.allclose(got, value[:, None].astype(np.float64), atol=1.0)


def pattern_is_constant(data, valid):
    if not valid.any():
        return False
    vals = data[:, valid]
    return bool((vals == vals[:, :1]).all())


@pytest.mark.parametrize("dtype", DTYPES)
def test_one_pixel_of_every_dtype(tmp_path, dtype):
    src = tmp_path / "one.tif"
    with rasterio.open(src, "w", driver="GTiff", width=1, height=1, count=1, dtype=dtype,
                       crs="EPSG:32633", transform=Affine(10, 0, 0, 0, -10, 0)) as ds:
        ds.write(np.full((1, 1, 1), 42, dtype))
    for scale in (2, 3, 4):
        dst = tmp_path / f"o{scale}.tif"
        magnify_raster(src, dst, BicubicContractModel(scale), chunk_size=MIN_CHUNK)
        with rasterio.open(dst) as d:
            out = d.read()
        assert out.shape == (1, scale, scale) and out.dtype == np.dtype(dtype)
        assert np.allclose(out.astype(float), 42, atol=0.5)
