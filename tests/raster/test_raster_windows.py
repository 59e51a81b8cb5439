"""Block grids, halo reads and their symmetric extension."""

import numpy as np
import pytest

from geosr.errors import ParameterError
from geosr.raster.blocks import read_block
from geosr.raster.windows import (
    MIN_CHUNK,
    Block,
    block_grid,
    check_chunk_size,
    halo_read,
    pad_symmetric,
)

from helpers import camera


@pytest.mark.parametrize("shape,chunk", [((50, 37), 16), ((16, 16), 16), ((5, 3), 16), ((100, 64), 33)])
def test_grid_tiles_the_raster_exactly_once(shape, chunk):
    cover = np.zeros(shape, int)
    blocks = block_grid(*shape, chunk)
    for i, b in enumerate(blocks):
        assert b.index == i
        assert 0 < b.height <= chunk and 0 < b.width <= chunk
        cover[b.row_off : b.row_off + b.height, b.col_off : b.col_off + b.width] += 1
    assert (cover == 1).all()


def test_grid_on_the_scale_multiple():
    blocks = block_grid(60, 45, 20, multiple=3)
    assert all(b.row_off % 3 == 0 and b.col_off % 3 == 0 for b in blocks)
    assert {b.height for b in blocks} == {18, 6}  # 20 rounded down to 18


@pytest.mark.parametrize("halo", [0, 2, 7, 40])
@pytest.mark.parametrize("shape", [(23, 31), (4, 6), (1, 1)])
def test_halo_read_equals_padding_the_whole_image(shape, halo):
    # numpy.pad(..., mode="symmetric") of the whole image is the reference:
    # the core extends a whole image that way.
    img = np.arange(np.prod(shape), dtype=float).reshape(shape)
    whole = np.pad(img, halo, mode="symmetric")
    for b in block_grid(*shape, 16 if min(shape) > 16 else max(shape)):
        win, pads = halo_read(b, halo, *shape)
        r0, c0 = int(win.row_off), int(win.col_off)
        read = img[r0 : r0 + int(win.height), c0 : c0 + int(win.width)]
        got = pad_symmetric(read, pads)
        ref = whole[b.row_off : b.row_off + b.height + 2 * halo, b.col_off : b.col_off + b.width + 2 * halo]
        assert np.array_equal(got, ref)


def test_read_block_matches_padded_array(make_raster):
    img = camera(30, 41).astype(np.float32)
    img[3, 4] = np.nan
    src = make_raster(img, nodata=float("nan"))
    halo = 9
    whole = np.pad(img, halo, mode="symmetric")
    b = Block(0, 16, 32, 14, 9)  # the bottom-right corner block
    data, valid = read_block(str(src), (1,), b, halo, 30, 41)
    ref = whole[16 : 16 + 14 + 2 * halo, 32 : 32 + 9 + 2 * halo]
    assert np.array_equal(np.isnan(data[0]), np.isnan(ref))
    assert np.array_equal(np.nan_to_num(data[0]), np.nan_to_num(ref))
    assert np.array_equal(valid[0], ~np.isnan(ref))


def test_chunk_size_checks_name_both_numbers():
    assert check_chunk_size(MIN_CHUNK) == MIN_CHUNK
    assert check_chunk_size(64.0) == 64
    with pytest.raises(ParameterError, match=f"at least {MIN_CHUNK} pixels, got 8"):
        check_chunk_size(8)
    with pytest.raises(ParameterError, match="halo of 37 pixels .* got 20"):
        check_chunk_size(20, halo=37)
    for bad in ("16", 16.5, True, None):
        with pytest.raises(ParameterError, match="chunk_size"):
            check_chunk_size(bad)
