"""RPCs of a magnified raster, checked with GDAL's own RPC transformer (through rasterio)."""

import numpy as np
import pytest
from rasterio.rpc import RPC
from rasterio.transform import RPCTransformer

from geosr.raster.transforms import scale_rpcs


def _rpc():
    """A mildly non-linear RPC over a 40 x 44 image (20-term order of GDAL's RPC domain)."""
    z = [0.0] * 20
    line = list(z)
    line[1], line[2], line[7] = 0.02, -1.0, 0.01
    samp = list(z)
    samp[1], samp[2], samp[8] = 1.0, 0.03, 0.01
    den = list(z)
    den[0], den[1] = 1.0, 0.001
    return RPC(height_off=0, height_scale=500, lat_off=40.0, lat_scale=0.05, line_den_coeff=den,
               line_num_coeff=line, line_off=20.0, line_scale=20.0, long_off=-75.0,
               long_scale=0.06, samp_den_coeff=den, samp_num_coeff=samp, samp_off=22.0,
               samp_scale=22.0, err_bias=-1.0, err_rand=-1.0)


@pytest.mark.parametrize("scale", [2, 3, 4])
def test_scaled_rpcs_put_every_ground_point_at_scale_times_its_pixel(scale):
    src, out = _rpc(), scale_rpcs(_rpc(), scale)
    lon = np.array([-75.0, -75.04, -74.97, -75.02])
    lat = np.array([40.0, 40.03, 39.96, 39.99])
    keep = lambda a: np.asarray(a, dtype=float)  # noqa: E731 - continuous pixel coordinates
    # GDAL's RPC transformer gives corner-based continuous (row, col); the
    # magnified grid puts corner-based coordinate u at scale * u.
    r0, c0 = RPCTransformer(src).rowcol(lon, lat, zs=0, op=keep)
    r1, c1 = RPCTransformer(out).rowcol(lon, lat, zs=0, op=keep)
    np.testing.assert_allclose(r1, scale * np.asarray(r0), atol=1e-6)
    np.testing.assert_allclose(c1, scale * np.asarray(c0), atol=1e-6)
    # and the other way (GDAL inverts the RPC iteratively: a tight threshold):
    # a source pixel centre and its magnified position reach the same ground
    tight = {"RPC_PIXEL_ERROR_THRESHOLD": "1e-8"}
    x0, y0 = RPCTransformer(src, **tight).xy(10, 12, zs=0, offset="center")
    x1, y1 = RPCTransformer(out, **tight).xy(scale * 10.5, scale * 12.5, zs=0, offset="ul")
    assert abs(x1 - x0) < 1e-7 and abs(y1 - y0) < 1e-7


def test_only_image_offsets_and_scales_change():
    src, out = _rpc(), scale_rpcs(_rpc(), 2)
    assert (out.line_off, out.samp_off) == (2 * 20.0 + 0.5, 2 * 22.0 + 0.5)
    assert (out.line_scale, out.samp_scale) == (40.0, 44.0)
    a, b = src.to_dict(), out.to_dict()
    for key in ("line_off", "samp_off", "line_scale", "samp_scale"):
        a.pop(key), b.pop(key)
    assert a == b
