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
