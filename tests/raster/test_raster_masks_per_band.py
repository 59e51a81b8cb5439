"""Per-band nodata values and infinite nodata values choose the output's nodata."""

import numpy as np
import pytest

from geosr.raster.io import inspect_source
from geosr.raster.masks import MaskMode, mask_mode, to_output_dtype

from helpers import camera, vrt_with_band_nodata


def _vrt_with_band_nodata(tmp_path, make_raster, values, dtype="uint8"):
    """A VRT over a two-band GeoTIFF whose bands declare their own nodata values."""
    data = np.stack([camera(16, 18), camera(16, 18, 300, 200)]).astype(dtype)
    return vrt_with_band_nodata(make_raster(data, name="member.tif"), tmp_path / "bands.vrt", values)


def test_different_nodata_per_band_keep_one_shared_value(tmp_path, make_raster):
    info = inspect_source(_vrt_with_band_nodata(tmp_path, make_raster, (3, 7)))
    assert info.nodatavals == (3.0, 7.0)  # GDAL's own reading of the VRT
    assert mask_mode(info, (1, 2), ()) == (MaskMode.NODATA, 3.0)
    assert mask_mode(info, (2, 1), ()) == (MaskMode.NODATA, 7.0)  # the first selected band's


def test_different_float_nodata_per_band_share_nan(tmp_path, make_raster):
    info = inspect_source(_vrt_with_band_nodata(tmp_path, make_raster, (-9999, 0), "float32"))
    mode, nodata = mask_mode(info, (1, 2), ())
    assert mode is MaskMode.NODATA and np.isnan(nodata)


@pytest.mark.parametrize("value", [-np.inf, np.inf])
def test_infinite_nodata_is_kept(make_raster, value):
    img = camera(12, 12).astype(np.float32)
    img[2, 3] = value
    info = inspect_source(make_raster(img, name="inf.tif", nodata=value))
    assert mask_mode(info, (1,), ()) == (MaskMode.NODATA, value)
    out, valid = to_output_dtype(np.where(np.isinf(img), 0, img), np.isfinite(img), np.float32, value)
    assert out[2, 3] == value and not valid[2, 3] and np.isfinite(out[valid]).all()


def test_infinite_nodata_has_no_integer_form(make_raster):
    info = inspect_source(make_raster(camera(12, 12).astype(np.float32), name="i.tif", nodata=-np.inf))
    # an integer output cannot hold -inf: the mask falls back to GDAL's mask band
    assert not np.isfinite(info.nodatavals[0])
    from geosr.raster.masks import _representable

    assert not _representable(-np.inf, np.dtype(np.int16)) and _representable(-np.inf, np.dtype("f4"))
