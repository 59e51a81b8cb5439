"""Sources at the edges of GDAL's world: subdatasets, VRT members, palettes, file names."""

import os
import sys

import numpy as np
import pytest
import rasterio
import rasterio.shutil
from affine import Affine

from geosr.errors import DestinationError, InputError
from geosr.raster.io import check_destination, inspect_source

from helpers import camera


def _netcdf(tmp_path, bands):
    """A netCDF file written by GDAL's netCDF driver: one variable per band."""
    if "netCDF" not in rasterio.drivers.raster_driver_extensions().values():
        pytest.skip("this GDAL has no netCDF driver")
    tif = tmp_path / "a.tif"
    data = np.stack([camera(20, 24, 100 + 50 * k, 90) for k in range(bands)]).astype(np.float32)
    with rasterio.open(tif, "w", driver="GTiff", width=24, height=20, count=bands, dtype="float32",
                       crs="EPSG:4326", transform=Affine(0.1, 0, 10, 0, -0.1, 50)) as ds:
        ds.write(data)
    path = tmp_path / "vars.nc"
    rasterio.shutil.copy(tif, path, driver="netCDF")
    return path, data


def test_netcdf_subdataset_in_rasterios_lower_case_form_opens(tmp_path):
    path, data = _netcdf(tmp_path, 2)
    with rasterio.open(path) as ds:
        names = ds.subdatasets  # the reference: what rasterio itself lists
    assert names and all(n.startswith("netcdf:") for n in names)
    info = inspect_source(names[1])
    assert (info.count, info.height, info.width) == (1, 20, 24)
    with rasterio.open(names[1]) as ds:
        assert np.array_equal(ds.read(1), data[1])


def test_container_without_bands_lists_its_subdatasets(tmp_path):
    path, _ = _netcdf(tmp_path, 6)
    with rasterio.open(path) as ds:
        names = ds.subdatasets
    assert len(names) == 6
    with pytest.raises(InputError) as err:
        inspect_source(path)
    text = str(err.value)
    assert "6 subdatasets" in text and names[0] in text and names[3] in text
    assert names[5] not in text and text.endswith("…")  # the first few, then an ellipsis


def test_vrt_member_missing_is_named(tmp_path, make_raster):
    member = make_raster(camera(16, 16).astype(np.uint8), name="member.tif")
    vrt = tmp_path / "stack.vrt"
    rasterio.shutil.copy(member, vrt, driver="VRT")
    os.unlink(member)
    with pytest.raises(InputError, match="missing file") as err:
        inspect_source(vrt)
    assert "member.tif" in str(err.value)


@pytest.mark.skipif(sys.platform != "linux", reason="Linux file names are bytes")
def test_path_with_bytes_that_are_not_utf8(tmp_path, make_raster):
    good = make_raster(camera(16, 16).astype(np.uint8), name="good.tif")
    name = os.fsdecode(os.path.join(os.fsencode(tmp_path), b"caf\xe9.tif"))  # surrogateescape
    os.link(good, name)
    assert os.path.exists(name)
    with pytest.raises(InputError) as err:
        inspect_source(name)
    text = str(err.value)
    assert "caf\\xe9.tif" in text and "UTF-8" in text and "\n" not in text
    text.encode("utf-8")  # printable: no surrogate left in the message
    with pytest.raises(DestinationError, match=r"out\\xe9"):
        check_destination(name.replace("caf", "out"))


def test_palette_and_one_bit_bands_are_categorical(make_raster):
    classes = (np.arange(16 * 16).reshape(16, 16) % 5).astype(np.uint8)
    pal = make_raster(classes, name="pal.tif")
    with rasterio.open(pal, "r+") as ds:
        ds.write_colormap(1, {k: (50 * k, 0, 255 - 50 * k, 255) for k in range(5)})
    bit = make_raster(classes % 2, name="bit.tif", nbits=1)
    grey = make_raster(classes, name="grey.tif")
    info = inspect_source(pal)
    assert info.is_categorical(1) and info.colormaps[0][4] == (200, 0, 55, 255)
    info = inspect_source(bit)
    assert info.is_categorical(1) and info.nbits == (1,)
    info = inspect_source(grey)
    assert not info.is_categorical(1) and info.colormaps == (None,) and info.nbits == (None,)


def test_rpcs_are_read(make_raster):
    from rasterio.rpc import RPC

    coeff = [1.0] + [0.0] * 19
    rpc = RPC(height_off=0, height_scale=100, lat_off=40, lat_scale=0.1, line_den_coeff=coeff,
              line_num_coeff=[0, 0, -1] + [0] * 17, line_off=8, line_scale=8, long_off=-75,
              long_scale=0.1, samp_den_coeff=coeff, samp_num_coeff=[0, 1] + [0] * 18, samp_off=8,
              samp_scale=8)
    src = make_raster(camera(16, 16).astype(np.uint8), name="rpc.tif", crs=None)
    with rasterio.open(src, "r+") as ds:
        ds.rpcs = rpc
    info = inspect_source(src)
    assert info.has_rpcs and info.rpcs.line_off == 8 and info.rpcs.samp_scale == 8
