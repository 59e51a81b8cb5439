"""Creation options: parsing, GDAL's own check, defaults."""

import pytest

from geosr.errors import ParameterError
from geosr.raster.profiles import (
    DEFAULT_GTIFF_OPTIONS,
    choose_blocksize,
    cog_options,
    gtiff_options,
    parse_creation_options,
    validate_creation_options,
)


def test_parse_forms():
    assert parse_creation_options(None) == {}
    assert parse_creation_options(["compress=lzw", "ZLEVEL = 9"]) == {"COMPRESS": "lzw", "ZLEVEL": "9"}
    assert parse_creation_options({"tiled": True, "blockxsize": 64}) == {"TILED": "YES", "BLOCKXSIZE": "64"}
    assert parse_creation_options("NUM_THREADS=2") == {"NUM_THREADS": "2"}
    for bad in (["COMPRESS"], ["=x"], ["A B=1"], ["K="], [3], 5):
        with pytest.raises(ParameterError, match="creation_options"):
            parse_creation_options(bad)


def test_defaults_are_tiled_compressed_bigtiff_if_safer():
    opts = gtiff_options({}, "uint16", 256)
    assert {k: opts[k] for k in DEFAULT_GTIFF_OPTIONS} == {
        "TILED": "YES", "COMPRESS": "DEFLATE", "BIGTIFF": "IF_SAFER"}
    assert opts["PREDICTOR"] == "2" and opts["BLOCKXSIZE"] == "256"
    assert gtiff_options({}, "float32", 256)["PREDICTOR"] == "3"
    assert "PREDICTOR" not in gtiff_options({"COMPRESS": "NONE"}, "uint8", 256)
    assert gtiff_options({"COMPRESS": "ZSTD"}, "uint8", 256)["COMPRESS"] == "ZSTD"
    assert cog_options({"BLOCKSIZE": "256"}, "uint8")["BLOCKSIZE"] == "256"


def test_blocksize_divides_the_output_block():
    assert choose_blocksize(2048) == 512
    assert choose_blocksize(3 * 1024) == 512
    assert choose_blocksize(2 * 40) == 16
    assert choose_blocksize(3 * 100) == 256  # 300 is no multiple of 16: GDAL's default-like size


def test_gdal_is_the_validator():
    validate_creation_options({"COMPRESS": "LZW", "TILED": "YES"}, driver="GTiff", dtype="uint8", count=1)
    validate_creation_options({"COMPRESS": "DEFLATE", "BLOCKSIZE": "256"}, driver="COG", dtype="uint8", count=3)
    with pytest.raises(ParameterError, match="FOOBAR"):
        validate_creation_options({"FOOBAR": "1"}, driver="GTiff", dtype="uint8", count=1)
    with pytest.raises(ParameterError, match="COMPRESS"):
        validate_creation_options({"COMPRESS": "NOPE"}, driver="GTiff", dtype="uint8", count=1)
    with pytest.raises(ParameterError, match="COG"):
        validate_creation_options({"TILED": "NO"}, driver="COG", dtype="uint8", count=1)


# --- round 2: creation options refused with GDAL's reason, COG options checked up front
def test_refused_value_carries_gdals_reason_not_see_previous():
    # WEBP takes 3 or 4 bands of bytes; GDAL says so in the error it chains to.
    opts = gtiff_options({"COMPRESS": "WEBP"}, "uint8", 256)
    with pytest.raises(ParameterError) as info:
        validate_creation_options(opts, driver="GTiff", dtype="uint8", count=1)
    text = str(info.value)
    assert "WEBP" in text and "3 (RGB) or 4 (RGBA)" in text
    assert "see previous exception" not in text.lower()
    assert ParameterError.exit_code == 2


@pytest.mark.parametrize("key, value, said", [
    ("OVERVIEW_RESAMPLING", "FOO", "Unsupported resampling method"),
    ("RESAMPLING", "FOO", "Unsupported resampling method"),
])
def test_cog_options_read_while_building_overviews_are_checked(key, value, said):
    # GDAL reads them only when it builds overviews: the trial raster is one
    # pixel wider than a tile so that it does.
    opts = cog_options({key: value}, "uint8")
    with pytest.raises(ParameterError, match=said):
        validate_creation_options(opts, driver="COG", dtype="uint8", count=1)


@pytest.mark.parametrize("value", ["17", "-5", "0", "abc", "64", "100000"])
def test_cog_blocksize_checked_before_gdal_sees_it(value):
    # GDAL's COG driver hangs or aborts on some of these (negative, zero, text).
    opts = cog_options({"BLOCKSIZE": value}, "uint8")
    with pytest.raises(ParameterError, match="BLOCKSIZE a multiple of 16 from 128 to 4096"):
        validate_creation_options(opts, driver="COG", dtype="uint8", count=1)


def test_good_cog_options_pass_with_georeferencing():
    from affine import Affine
    from rasterio.crs import CRS

    opts = cog_options({"BLOCKSIZE": "256", "OVERVIEW_RESAMPLING": "AVERAGE",
                        "TILING_SCHEME": "GoogleMapsCompatible"}, "uint8")
    validate_creation_options(opts, driver="COG", dtype="uint8", count=1, crs=CRS.from_epsg(32618),
                              transform=Affine(15, 0, 500000, 0, -15, 4200000))


def test_cog_copy_refusing_an_option_is_a_usage_error(tmp_path):
    import numpy as np
    import rasterio

    from geosr.raster.writing import copy_to_cog

    src = tmp_path / "in.tif"
    with rasterio.open(src, "w", driver="GTiff", width=600, height=20, count=1, dtype="uint8",
                       crs="EPSG:32618", transform=rasterio.Affine(10, 0, 0, 0, -10, 0)) as ds:
        ds.write(np.zeros((1, 20, 600), np.uint8))
    with pytest.raises(ParameterError, match="Unsupported resampling method") as info:
        copy_to_cog(src, tmp_path / "out.tif", {"OVERVIEW_RESAMPLING": "FOO"})
    assert "disk full" not in str(info.value)
