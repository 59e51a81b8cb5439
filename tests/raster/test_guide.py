"""Guide rasters: scale from the pixel sizes, direct and warped reads on the fine grid.

References outside the project: plain rasterio window reads, numpy.pad
(mode "symmetric") for the border extension, rasterio.warp.reproject for
guides on another grid or CRS, and hashlib for the checksums.
"""

from __future__ import annotations

import hashlib
import pickle
import warnings

import numpy as np
import pytest
import rasterio
from affine import Affine
from rasterio.crs import CRS
from rasterio.enums import Resampling
from rasterio.transform import array_bounds
from rasterio.warp import calculate_default_transform, reproject, transform_bounds
from rasterio.warp import transform as warp_points

from geosr.errors import GeoreferencingWarning, InputError, ParameterError
from geosr.raster.guide import open_guides, read_guide_block
from geosr.raster.io import inspect_source
from geosr.raster.windows import Block, block_grid

UTM33 = CRS.from_epsg(32633)
# A source grid near the central meridian of UTM zone 33 (15 degrees east).
X0, Y0 = 500_020.0, 5_000_030.0


def _write(path, data, transform, crs=UTM33, nodata=None):
    data = np.asarray(data)
    if data.ndim == 2:
        data = data[None]
    with rasterio.open(path, "w", driver="GTiff", width=data.shape[2], height=data.shape[1],
                       count=data.shape[0], dtype=data.dtype, crs=crs, transform=transform,
                       nodata=nodata) as ds:
        ds.write(data)
    return str(path)


def _coarse(tmp_path, size=30.0, shape=(13, 11), name="coarse.tif"):
    t = Affine(size, 0, X0, 0, -size, Y0)
    return inspect_source(_write(tmp_path / name, np.zeros(shape, np.uint16), t))


def _smooth(rows, cols, bands=1, seed=0):
    """Smooth test field (sum of low-frequency waves), values about 0..200."""
    rng = np.random.default_rng(seed)
    r, c = np.mgrid[0:rows, 0:cols].astype(float)
    out = []
    for _ in range(bands):
        f = np.full((rows, cols), 100.0)
        for _ in range(4):
            fr, fc, ph = rng.uniform(0.02, 0.12), rng.uniform(0.02, 0.12), rng.uniform(0, 6.28)
            f += 25 * np.sin(2 * np.pi * (fr * r + fc * c) + ph)
        out.append(f)
    return np.stack(out)


def _whole(spec, coarse):
    """Every block of a 4-pixel grid, halo 0, pasted into the fine raster."""
    s = spec.scale
    data = np.full((spec.count, spec.fine_height, spec.fine_width), np.nan)
    valid = np.zeros((spec.fine_height, spec.fine_width), bool)
    for b in block_grid(coarse.height, coarse.width, 4):
        d, v = read_guide_block(spec, b, 0)
        rows = slice(s * b.row_off, s * (b.row_off + b.height))
        cols = slice(s * b.col_off, s * (b.col_off + b.width))
        data[:, rows, cols] = d
        valid[rows, cols] = v
    return data, valid


def _one_block(coarse):
    return Block(0, 0, 0, coarse.height, coarse.width)


def test_aligned_blocks_tile_the_fine_raster_with_symmetric_borders(tmp_path):
    coarse = _coarse(tmp_path)  # 13 x 11 at 30 m
    fine = (np.arange(2 * 26 * 22).reshape(2, 26, 22) * 7 % 1000).astype(np.uint16)
    path = _write(tmp_path / "g.tif", fine, Affine(15, 0, X0, 0, -15, Y0))
    with warnings.catch_warnings():
        warnings.simplefilter("error", GeoreferencingWarning)
        spec = open_guides([path], coarse)
    assert spec.scale == 2 and spec.aligned == (True,) and spec.offsets == ((0, 0),)
    assert spec.dtype == "float32" and (spec.fine_height, spec.fine_width) == (26, 22)
    with rasterio.open(path) as ds:
        reference = ds.read().astype(np.float64)
    halo, s = 2, 2
    padded = np.pad(reference, ((0, 0), (s * halo,) * 2, (s * halo,) * 2), mode="symmetric")
    blocks = block_grid(coarse.height, coarse.width, 5)  # 5 does not divide 13 or 11
    for b in blocks:
        data, valid = read_guide_block(spec, b, halo)
        assert data.shape == (2, s * (b.height + 2 * halo), s * (b.width + 2 * halo))
        assert data.dtype == np.float32 and valid.all()
        expected = padded[:, s * b.row_off: s * (b.row_off + b.height + 2 * halo),
                          s * b.col_off: s * (b.col_off + b.width + 2 * halo)]
        np.testing.assert_array_equal(data, expected)
    data, _ = _whole(spec, coarse)
    np.testing.assert_array_equal(data, reference)


def test_a_larger_guide_on_the_grid_is_read_directly(tmp_path):
    coarse = _coarse(tmp_path)
    fine = _smooth(40, 35).astype(np.float32)
    # Origin 3 fine rows up and 5 fine columns left of the source's.
    path = _write(tmp_path / "big.tif", fine, Affine(15, 0, X0 - 5 * 15, 0, -15, Y0 + 3 * 15))
    with warnings.catch_warnings():
        warnings.simplefilter("error", GeoreferencingWarning)
        spec = open_guides(path, coarse)
    assert spec.aligned == (True,) and spec.offsets == ((3, 5),)
    data, valid = read_guide_block(spec, _one_block(coarse), 0)
    assert valid.all()
    np.testing.assert_array_equal(data[0], fine[0, 3:3 + 26, 5:5 + 22])


def test_a_guide_in_another_crs_is_resampled_like_reproject(tmp_path):
    coarse = _coarse(tmp_path, shape=(20, 24))
    fine_t = Affine(15, 0, X0, 0, -15, Y0)
    merc = CRS.from_epsg(3857)
    # The fine grid's footprint in Web Mercator, grown by 4 pixels per side.
    t, w, h = calculate_default_transform(UTM33, merc, 48, 40, *array_bounds(40, 48, fine_t))
    t = Affine(t.a, t.b, t.c - 4 * t.a, t.d, t.e, t.f - 4 * t.e)
    guide = _smooth(h + 8, w + 8, seed=3).astype(np.float32)
    path = _write(tmp_path / "merc.tif", guide, t, crs=merc)
    with pytest.warns(GeoreferencingWarning) as record:
        spec = open_guides([path], coarse)
    ours = [r for r in record if issubclass(r.category, GeoreferencingWarning)]
    assert len(ours) == 1 and "EPSG:3857" in str(ours[0].message) and "cubic" in str(ours[0].message)
    assert spec.scale == 2 and spec.aligned == (False,)
    data, valid = _whole(spec, coarse)
    # Blocks give exactly what one read of the whole fine grid gives.
    whole, whole_valid = read_guide_block(spec, _one_block(coarse), 0)
    np.testing.assert_array_equal(valid, whole_valid)
    np.testing.assert_array_equal(data[:, valid], whole[:, valid])
    expected = np.full((40, 48), np.nan, np.float32)
    with rasterio.open(path) as ds:
        reproject(rasterio.band(ds, 1), expected, dst_transform=fine_t, dst_crs=UTM33,
                  resampling=Resampling.cubic, dst_nodata=np.nan, XSCALE=1, YSCALE=1)
    np.testing.assert_array_equal(valid, np.isfinite(expected))
    assert valid.all()
    # rasterio's reproject places source pixels with GDAL's approximate
    # transformer, whose positions may be off by up to 1/8 pixel (its
    # documented default error bound); geosr's reads use the exact positions.
    # Over 1/8 pixel the values can move by at most 1/8 of the steepest
    # local slope times the cubic kernel's largest gain on a slope (1.5 for
    # Keys' kernel with a = -0.5, from memory: its derivative peaks at 1.5).
    slope = max(np.abs(np.diff(guide[0], axis=0)).max(), np.abs(np.diff(guide[0], axis=1)).max())
    bound = 0.125 * np.sqrt(2) * 1.5 * slope
    diff = np.abs(data[0] - expected)
    assert diff.max() <= bound
    assert diff.mean() <= 0.1 * bound


def test_a_half_pixel_shifted_guide_equals_reproject_and_marks_its_footprint(tmp_path):
    coarse = _coarse(tmp_path)
    guide = _smooth(20, 18, seed=5).astype(np.float32)
    guide[0, 6:8, 9:11] = -9999.0
    # Half a fine pixel right and down of the grid, covering only part of it.
    t = Affine(15, 0, X0 + 7.5, 0, -15, Y0 - 7.5)
    path = _write(tmp_path / "shift.tif", guide, t, nodata=-9999.0)
    with pytest.warns(GeoreferencingWarning, match="fraction of a pixel"):
        spec = open_guides([path], coarse, resampling="bilinear")
    assert spec.aligned == (False,) and spec.offsets == (None,)
    data, valid = read_guide_block(spec, _one_block(coarse), 0)
    expected = np.full((26, 22), np.nan, np.float32)
    with rasterio.open(path) as ds:
        reproject(rasterio.band(ds, 1), expected, dst_transform=Affine(15, 0, X0, 0, -15, Y0),
                  dst_crs=UTM33, resampling=Resampling.bilinear, dst_nodata=np.nan,
                  XSCALE=1, YSCALE=1)
    np.testing.assert_array_equal(valid, np.isfinite(expected))
    assert not valid[21:].any() and not valid[:, 19:].any()  # outside the footprint
    # Inside it only the 4 fine pixels centred on the 2 x 2 nodata pixels are invalid.
    rows, cols = np.nonzero(valid.any(axis=1))[0], np.nonzero(valid.any(axis=0))[0]
    inside = valid[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1]
    assert not valid[6:8, 9:11].any() and (~inside).sum() == 4
    assert np.isnan(data[0][~valid]).all()
    # Both place pixels through affine transforms only: equal to float rounding.
    np.testing.assert_allclose(data[0][valid], expected[valid], rtol=1e-6)


@pytest.mark.parametrize("coarse_size, fine_size, scale", [(30.0, 15.0, 2), (30.0, 10.0, 3),
                                                           (40.0, 5.0, 8)])
def test_the_scale_is_the_ratio_of_the_pixel_sizes(tmp_path, coarse_size, fine_size, scale):
    coarse = _coarse(tmp_path, size=coarse_size, shape=(4, 5))
    n = int(round(coarse_size / fine_size))
    g = _write(tmp_path / "g.tif", np.ones((4 * n, 5 * n), np.uint8),
               Affine(fine_size, 0, X0, 0, -fine_size, Y0))
    spec = open_guides(g, coarse)
    assert spec.scale == scale == n
    assert spec.fine_transform == Affine(fine_size, 0, X0, 0, -fine_size, Y0)
    assert open_guides(g, coarse, scale=scale).scale == scale


@pytest.mark.parametrize("coarse_size, fine_size, ratio", [(40.0, 15.0, "2.667"),
                                                           (30.0, 30.0, "1"), (45.0, 5.0, "9")])
def test_pixel_sizes_without_an_integer_ratio_from_2_to_8_are_refused(tmp_path, coarse_size,
                                                                     fine_size, ratio):
    coarse = _coarse(tmp_path, size=coarse_size, shape=(4, 5))
    g = _write(tmp_path / "g.tif", np.ones((12, 15), np.uint8),
               Affine(fine_size, 0, X0, 0, -fine_size, Y0))
    with pytest.raises(InputError) as err:
        open_guides(g, coarse)
    msg = str(err.value)
    assert "\n" not in msg
    assert f"{fine_size:g} m against {coarse_size:g} m" in msg and f"(ratio {ratio})" in msg


def test_a_scale_that_disagrees_with_the_pixel_sizes_is_refused(tmp_path):
    coarse = _coarse(tmp_path, shape=(4, 5))
    g = _write(tmp_path / "g.tif", np.ones((8, 10), np.uint8), Affine(15, 0, X0, 0, -15, Y0))
    with pytest.raises(ParameterError, match="'scale' parameter must agree") as err:
        open_guides(g, coarse, scale=3)
    assert "\n" not in str(err.value)
    with pytest.raises(ParameterError, match="from 2 to 8"):
        open_guides(g, coarse, scale=9)


def test_a_guide_that_does_not_overlap_is_refused(tmp_path):
    coarse = _coarse(tmp_path, shape=(4, 5))
    g = _write(tmp_path / "far.tif", np.ones((8, 10), np.uint8),
               Affine(15, 0, X0 + 10_000, 0, -15, Y0))
    with pytest.raises(InputError, match="'far.tif' must overlap the source 'coarse.tif'") as err:
        open_guides(g, coarse)
    assert "\n" not in str(err.value) and "EPSG:32633" in str(err.value)


def test_nodata_and_pixels_outside_an_aligned_guide_are_invalid(tmp_path):
    coarse = _coarse(tmp_path)
    guide = np.full((10, 12), 50, np.uint16)
    guide[2, 3] = 0
    # Starts 4 fine rows and 6 fine columns into the source; covers 10 x 12.
    path = _write(tmp_path / "part.tif", guide, Affine(15, 0, X0 + 90, 0, -15, Y0 - 60), nodata=0)
    spec = open_guides(path, coarse)
    assert spec.aligned == (True,) and spec.offsets == ((-4, -6),)
    data, valid = read_guide_block(spec, _one_block(coarse), 0)
    expected = np.zeros((26, 22), bool)
    expected[4:14, 6:18] = True
    expected[4 + 2, 6 + 3] = False
    np.testing.assert_array_equal(valid, expected)
    assert np.isnan(data[0][~valid]).all() and (data[0][valid] == 50).all()


def test_several_files_are_stacked_and_bands_selected(tmp_path):
    coarse = _coarse(tmp_path, shape=(4, 5))
    t = Affine(15, 0, X0, 0, -15, Y0)
    a = (np.arange(2 * 8 * 10).reshape(2, 8, 10) % 255).astype(np.uint8)
    b = _smooth(8, 10)  # float64
    pa = _write(tmp_path / "a.tif", a, t)
    pb = _write(tmp_path / "b.tif", b, t)
    spec = open_guides([pa, pb], coarse)
    assert spec.bands == ((0, 1), (0, 2), (1, 1)) and spec.dtype == "float64"
    data, _ = read_guide_block(spec, _one_block(coarse), 0)
    np.testing.assert_array_equal(data, np.concatenate([a, b]).astype(np.float64))
    spec = open_guides([pa, pb], coarse, guide_bands="1,3")
    assert spec.bands == ((0, 1), (1, 1))
    data, _ = read_guide_block(spec, _one_block(coarse), 0)
    np.testing.assert_array_equal(data, np.stack([a[0], b[0]]))
    spec = open_guides([pa, pb], coarse, guide_bands=[2])
    assert spec.dtype == "float32"
    with pytest.raises(ParameterError, match="'guide_bands' parameter must hold band numbers "
                                             "from 1 to 3, got 4") as err:
        open_guides([pa, pb], coarse, guide_bands="1,4")
    assert "a.tif: 2; b.tif: 1" in str(err.value) and "\n" not in str(err.value)


def test_files_giving_different_scales_are_refused(tmp_path):
    coarse = _coarse(tmp_path, shape=(4, 5))
    pa = _write(tmp_path / "a.tif", np.ones((8, 10), np.uint8), Affine(15, 0, X0, 0, -15, Y0))
    pb = _write(tmp_path / "b.tif", np.ones((12, 15), np.uint8), Affine(10, 0, X0, 0, -10, Y0))
    with pytest.raises(InputError, match="same scale, got 2 for 'a.tif', 3 for 'b.tif'"):
        open_guides([pa, pb], coarse)


def test_checksums_match_hashlib_and_the_spec_pickles(tmp_path):
    coarse = _coarse(tmp_path, shape=(4, 5))
    path = tmp_path / "g.tif"
    _write(path, np.ones((8, 10), np.uint8), Affine(15, 0, X0, 0, -15, Y0))
    spec = open_guides(path, coarse)
    assert spec.sha256 == (hashlib.sha256(path.read_bytes()).hexdigest(),)
    assert spec.paths == (str(path),) and spec.names == ("g.tif",)
    again = pickle.loads(pickle.dumps(spec))
    assert again == spec


def test_ungeoreferenced_guide_and_source_align_by_size(tmp_path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", rasterio.errors.NotGeoreferencedWarning)
        src = _write(tmp_path / "c.tif", np.zeros((4, 5), np.uint8), Affine.identity(), crs=None)
        fine = np.arange(12 * 15, dtype=np.int16).reshape(12, 15)
        g = _write(tmp_path / "g.tif", fine, Affine.identity(), crs=None)
        bad = _write(tmp_path / "bad.tif", np.zeros((12, 16), np.uint8), Affine.identity(), crs=None)
        geo = _write(tmp_path / "geo.tif", fine, Affine(10, 0, X0, 0, -10, Y0))
    coarse = inspect_source(src)
    spec = open_guides(g, coarse)
    assert spec.scale == 3 and spec.aligned == (True,)
    data, valid = read_guide_block(spec, _one_block(coarse), 0)
    np.testing.assert_array_equal(data[0], fine) and valid.all()
    with pytest.raises(InputError, match="2 to 8 times the size"):
        open_guides(bad, coarse)
    with pytest.raises(InputError, match="must have no CRS like the source"):
        open_guides(geo, coarse)
    with pytest.raises(InputError, match="must have a CRS like the source"):
        open_guides(g, _coarse(tmp_path, shape=(4, 5)))


def test_bad_paths_and_parameters_give_one_line_errors(tmp_path):
    coarse = _coarse(tmp_path, shape=(4, 5))
    with pytest.raises(InputError, match="^The guide raster .* must exist, got no such file$"):
        open_guides(tmp_path / "missing.tif", coarse)
    (tmp_path / "text.tif").write_text("not a raster")
    with pytest.raises(InputError, match="^The guide raster .* must be a raster"):
        open_guides(tmp_path / "text.tif", coarse)
    g = _write(tmp_path / "g.tif", np.ones((8, 10), np.uint8), Affine(15, 0, X0, 0, -15, Y0))
    with pytest.raises(ParameterError, match="'resampling' parameter must be one of"):
        open_guides(g, coarse, resampling="mode")
    with pytest.raises(ParameterError, match="at least one guide"):
        open_guides([], coarse)
    with pytest.raises(ParameterError, match="must not repeat a file"):
        open_guides([g, g], coarse)


def test_warped_blocks_do_not_depend_on_the_block_grid(tmp_path):
    # A geographic guide along a 13.5 km strip of noise, read in 75 blocks
    # and at once: every fine pixel gets the same value either way.
    coarse = _coarse(tmp_path, shape=(6, 450))
    fine_t = Affine(15, 0, X0, 0, -15, Y0)
    geo = CRS.from_epsg(4326)
    # Degrees per fine pixel east and north at the centre (non-square in degrees).
    cx, cy = X0 + 450 * 15, Y0 - 6 * 15
    lon, lat = warp_points(UTM33, geo, [cx, cx + 15, cx], [cy, cy, cy + 15])
    dlon, dlat = lon[1] - lon[0], lat[2] - lat[0]
    west, south, east, north = transform_bounds(UTM33, geo, *array_bounds(12, 900, fine_t))
    t = Affine(dlon, 0, west - 2 * dlon, 0, -dlat, north + 2 * dlat)
    w, h = int((east - west) / dlon) + 5, int((north - south) / dlat) + 5
    noise = np.random.default_rng(7).uniform(0, 100, (h, w)).astype(np.float32)
    path = _write(tmp_path / "geo.tif", noise, t, crs=geo)
    with pytest.warns(GeoreferencingWarning):
        spec = open_guides(path, coarse)
    data = np.concatenate([read_guide_block(spec, b, 0)[0]
                           for b in block_grid(6, 450, 6)], axis=2)
    whole, valid = read_guide_block(spec, _one_block(coarse), 0)
    assert valid.all()
    np.testing.assert_array_equal(data, whole)
