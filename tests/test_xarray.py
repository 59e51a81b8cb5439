"""geosr.xarray.magnify against magnify_raster's files, rasterio's grid and rioxarray's I/O."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin, xy

import geosr

from helpers import TEST_DATA, camera

pytest.importorskip("xarray", reason="geosr.xarray needs the xarray extra: pip install geosr[xarray]")
rioxarray = pytest.importorskip(
    "rioxarray", reason="geosr.xarray needs the xarray extra: pip install geosr[xarray]")
import dask.array  # noqa: E402
import xarray as xr  # noqa: E402

from geosr.cautions import CAUTION  # noqa: E402
from geosr.errors import GeoreferencingWarning, InputError, ModelError, ParameterError  # noqa: E402
from geosr.xarray import magnify  # noqa: E402

CRS = "EPSG:32633"
TRANSFORM = from_origin(500_000.0, 4_200_000.0, 30.0, 30.0)


def write_tif(path, data, nodata):
    """A GeoTIFF of ``data`` (bands, rows, cols) on a 30 m UTM grid."""
    count, height, width = data.shape
    with rasterio.open(path, "w", driver="GTiff", width=width, height=height, count=count,
                       dtype=data.dtype, crs=CRS, transform=TRANSFORM, nodata=nodata) as ds:
        ds.write(data)
    return path


def float_scene(rows=70, cols=90):
    """Three float32 bands of the camera photo with a NaN hole (the nodata)."""
    img = camera(rows, cols)
    data = np.stack([img, 0.8 * img + 20, 255 - img]).astype(np.float32)
    data[:, 30:36, 40:55] = np.nan
    return data


def uint16_scene(rows=70, cols=90, fill=True):
    """Two uint16 bands of the camera photo, with a filled corner (nodata 0) unless ``fill=False``."""
    img = camera(rows, cols, row0=200, col0=250)
    data = np.stack([img * 40 + 100, img * 25 + 300]).astype(np.uint16)
    if fill:
        data[:, :12, :20] = 0
    return data


def reference(tmp_path, src, **options):
    """magnify_raster's output file (rasterio reads it back)."""
    dst = tmp_path / "reference-x2.tif"
    geosr.magnify_raster(src, dst, scale=2, **options)
    return dst


@pytest.mark.parametrize("kind", ["float32", "uint16"])
def test_values_equal_magnify_raster(tmp_path, kind):
    data, nodata = (float_scene(), np.nan) if kind == "float32" else (uint16_scene(), 0)
    src = write_tif(tmp_path / "src.tif", data, nodata)
    # chunk 32 cuts the 70 x 90 raster into 3 x 3 blocks, the last ones smaller than the halo
    dst = reference(tmp_path, src, chunk_size=32)
    da = rioxarray.open_rasterio(src, chunks={"x": 45, "y": 35})
    out = magnify(da, 2, chunk_size=32)
    assert isinstance(out.data, dask.array.Array)  # lazy until computed
    assert out.chunks[1:] == ((64, 64, 12), (64, 64, 52))  # one task per block, as magnify_raster
    with rasterio.open(dst) as ref:
        expected, ref_nodata = ref.read(), ref.nodata
    values = out.values
    assert values.dtype == expected.dtype and values.shape == expected.shape
    if kind == "float32":
        assert np.isnan(out.rio.nodata) and np.isnan(ref_nodata)
        assert np.array_equal(np.isnan(values), np.isnan(expected))
        np.testing.assert_allclose(values, expected, rtol=1e-6, atol=1e-4, equal_nan=True)
        assert np.isnan(values[:, 60:72, 80:110]).all()  # the hole, magnified
    else:
        assert out.rio.nodata == ref_nodata == 0
        np.testing.assert_array_equal(values, expected)
        assert (values[:, :24, :40] == 0).all() and (values[:, 24:, 40:] > 0).all()


def test_to_raster_writes_magnify_raster_grid_and_tags(tmp_path):
    src = write_tif(tmp_path / "src.tif", uint16_scene(), 0)
    dst = reference(tmp_path, src, chunk_size=64)
    out = magnify(rioxarray.open_rasterio(src, chunks={"x": 64, "y": 64}), 2, chunk_size=64)
    written = tmp_path / "xarray-x2.tif"
    out.rio.to_raster(written, recalc_transform=False)
    with rasterio.open(dst) as ref, rasterio.open(written) as got:
        assert got.transform == ref.transform and got.crs == ref.crs
        assert got.shape == ref.shape and got.dtypes == ref.dtypes and got.nodata == ref.nodata
        np.testing.assert_array_equal(got.read(), ref.read())
        ref_tags, tags = ref.tags(), got.tags()
    for key in ("GEOSR_SYNTHESIZED", "GEOSR_METHOD", "GEOSR_SCALE", "GEOSR_MODEL_SHA256",
                "GEOSR_SOURCE", "GEOSR_SPECTRAL_GUARD", "GEOSR_VERSION"):
        assert tags[key] == ref_tags[key], key
    assert CAUTION in tags["TIFFTAG_IMAGEDESCRIPTION"]


def test_coordinates_are_the_new_pixel_centres():
    da = xr.DataArray(camera(20, 30)[None], dims=("band", "y", "x"), coords={
        "band": [1],
        "x": TRANSFORM.c + (np.arange(30) + 0.5) * TRANSFORM.a,
        "y": TRANSFORM.f + (np.arange(20) + 0.5) * TRANSFORM.e,
    }).rio.write_crs(CRS)
    out = magnify(da, 3)
    new = TRANSFORM @ rasterio.Affine.scale(1 / 3)
    # rasterio's own pixel-centre coordinates of the refined grid
    xs, _ = xy(new, np.zeros(90, dtype=int), np.arange(90), offset="center")
    _, ys = xy(new, np.arange(60), np.zeros(60, dtype=int), offset="center")
    np.testing.assert_allclose(out.x.values, xs, rtol=0, atol=1e-6)
    np.testing.assert_allclose(out.y.values, ys, rtol=0, atol=1e-6)
    assert out.rio.transform() == new and out.rio.crs == rasterio.crs.CRS.from_user_input(CRS)
    attrs = out.attrs
    assert attrs["GEOSR_SYNTHESIZED"] == "yes" and attrs["GEOSR_SCALE"] == "3"
    assert CAUTION in attrs["TIFFTAG_IMAGEDESCRIPTION"]


def test_numpy_backed_2d_array_and_band_selection(tmp_path):
    data = float_scene(40, 50)
    src = write_tif(tmp_path / "src.tif", data, np.nan)
    dst = reference(tmp_path, src, bands=[3])
    da = rioxarray.open_rasterio(src)  # not chunked: numpy-backed
    before = da.values.copy()
    flat = magnify(da.isel(band=2, drop=True), 2)
    picked = magnify(da, 2, bands=[3])
    with rasterio.open(dst) as ref:
        expected = ref.read(1)
    assert flat.dims == ("y", "x") and picked.dims == ("band", "y", "x")
    assert picked.band.values.tolist() == [3]
    np.testing.assert_allclose(flat.values, expected, rtol=1e-6, atol=1e-4, equal_nan=True)
    np.testing.assert_allclose(picked.values[0], expected, rtol=1e-6, atol=1e-4, equal_nan=True)
    np.testing.assert_array_equal(da.values, before)  # the input is never modified


def test_raster_smaller_than_the_halo(tmp_path):
    # the symmetric extension outgrows the array: numpy's repeated reflection must hold
    src = write_tif(tmp_path / "src.tif", uint16_scene(5, 7, fill=False), 0)
    dst = reference(tmp_path, src)
    out = magnify(rioxarray.open_rasterio(src, chunks={}), 2)
    with rasterio.open(dst) as ref:
        expected = ref.read()
    assert out.shape == (2, 10, 14) and (expected > 0).all()
    np.testing.assert_array_equal(out.values, expected)


def test_bad_input_gets_one_line_errors():
    good = xr.DataArray(np.zeros((20, 20), dtype=np.float32), dims=("y", "x"),
                        coords={"y": np.arange(20.0)[::-1], "x": np.arange(20.0)}).rio.write_crs(CRS)
    with pytest.raises(ParameterError, match="must be an xarray.DataArray, got ndarray"):
        magnify(np.zeros((20, 20)), 2)
    with pytest.raises(InputError, match="x and y spatial dimensions"):
        magnify(xr.DataArray(np.zeros((20, 20)), dims=("a", "b")), 2)
    with pytest.raises(InputError, match="integers or floats, got bool"):
        magnify(good.astype(bool), 2)
    uneven = good.assign_coords(x=np.r_[np.arange(19.0), 30.0])
    with pytest.raises(InputError, match="regularly spaced"):
        magnify(uneven, 2)
    with pytest.raises(InputError, match="2 .y, x. or 3 .band, y, x. dimensions, got 4"):
        magnify(good.expand_dims(("t", "band")), 2)
    with pytest.raises(ParameterError, match="bands"):
        magnify(good, 2, bands=[2])
    with pytest.raises(ModelError, match="requested scale 3"):
        magnify(good, 3, model=geosr.default_model(2))
    with pytest.warns(GeoreferencingWarning, match="no CRS"):
        assert magnify(good.drop_vars("spatial_ref"), 2).rio.crs is None


def test_missing_extra_names_the_install_command():
    # a fresh interpreter in which xarray cannot be imported
    code = ("import sys; sys.modules['xarray'] = None\n"
            "import numpy, geosr.xarray as gx\n"
            "try:\n    gx.magnify(numpy.zeros((4, 4)), 2)\n"
            "except ImportError as exc:\n    print(type(exc).__name__, exc)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.startswith("MissingDependencyError ")
    assert "pip install geosr[xarray]" in out.stdout and len(out.stdout.strip().splitlines()) == 1


def test_bundled_rgb_with_spectral_guard(tmp_path):
    # three uint8 bands (nodata 0): the cross-band guard runs in both paths
    src = TEST_DATA / "rgb-byte-crop.tif"
    dst = reference(tmp_path, src, chunk_size=100)
    out = magnify(rioxarray.open_rasterio(src, chunks={"x": 100, "y": 100}), 2, chunk_size=100)
    assert out.attrs["GEOSR_SPECTRAL_GUARD"] == "yes"
    exact, rebuilt = tmp_path / "exact.tif", tmp_path / "rebuilt.tif"
    out.rio.to_raster(exact, recalc_transform=False)
    out.rio.to_raster(rebuilt)  # rioxarray's default rebuilds the transform from the coordinates
    with rasterio.open(dst) as ref, rasterio.open(exact) as a, rasterio.open(rebuilt) as b:
        assert ref.tags()["GEOSR_SPECTRAL_GUARD"] == "yes"
        np.testing.assert_array_equal(out.values, ref.read())
        # the file's own 300.04 m transform, halved, is kept to the last digit
        assert a.transform == ref.transform and a.crs == ref.crs
        assert b.transform.almost_equals(ref.transform, precision=1e-9)


def test_a_slice_is_placed_by_its_coordinates(tmp_path):
    src = write_tif(tmp_path / "src.tif", uint16_scene(), 0)
    da = rioxarray.open_rasterio(src).isel(x=slice(10, 60), y=slice(5, 50))
    out = magnify(da, 2)
    # the window's own transform (rasterio) refined x2: the stored GeoTransform is stale here
    window = rasterio.windows.Window(10, 5, 50, 45)
    expected = rasterio.windows.transform(window, TRANSFORM) @ rasterio.Affine.scale(0.5)
    assert out.rio.transform().almost_equals(expected, precision=1e-6)
    assert out.shape == (2, 90, 100)


@pytest.mark.parametrize("option", ["consistency", "ensemble", "per-band models"])
def test_options_equal_magnify_raster(tmp_path, option):
    src = write_tif(tmp_path / "src.tif", float_scene(60, 70)[:2], np.nan)
    opts = {"model": [geosr.default_model(2)] * 2} if option == "per-band models" else {option: True}
    dst = reference(tmp_path, src, chunk_size=48, **opts)
    out = magnify(rioxarray.open_rasterio(src, chunks={"x": 50, "y": 50}), 2, chunk_size=48, **opts)
    with rasterio.open(dst) as ref:
        expected, tags = ref.read(), ref.tags()
    np.testing.assert_allclose(out.values, expected, rtol=1e-6, atol=1e-4, equal_nan=True)
    for key in ("GEOSR_CONSISTENCY", "GEOSR_ENSEMBLE", "GEOSR_MODEL_SHA256", "GEOSR_SPECTRAL_GUARD"):
        assert out.attrs[key] == tags[key], key


def test_nothing_is_computed_until_asked():
    from dask.callbacks import Callback

    ran = []
    da = xr.DataArray(dask.array.from_array(camera(40, 40)[None], chunks=(1, 20, 20)),
                      dims=("band", "y", "x"),
                      coords={"x": np.arange(40.0) * 30 + 15, "y": 1200 - np.arange(40.0) * 30 - 15})
    with Callback(pretask=lambda key, dsk, state: ran.append(key)):
        out = magnify(da.rio.write_crs(CRS), 2, chunk_size=20)
        assert ran == []  # magnify only builds the graph
        out.isel(x=slice(0, 10), y=slice(0, 10)).compute()
    assert ran  # computing a corner runs tasks
