"""train_from_rasters on references smaller than one training patch."""

from __future__ import annotations

import numpy as np
import pytest

from geosr.core.pairs import MIN_CELLS
from geosr.errors import InputError
from geosr.pipeline.train import train_from_rasters

from helpers import camera


@pytest.mark.parametrize("rows, cols", [(5, 40), (40, 5), (4, 4)])
def test_reference_smaller_than_a_patch_is_too_small_not_flat(make_raster, rows, cols):
    path = make_raster(camera(rows, cols).astype(np.uint8), name="small.tif")
    side = MIN_CELLS * 2
    with pytest.raises(InputError) as info:
        train_from_rasters(path, 2, max_samples=50, n_atoms=8, scheduler="synchronous")
    text = str(info.value)
    assert f"at least {side} x {side} pixels" in text and "too small" in text
    assert f"small.tif: {cols} x {rows}" in text
    assert "flat" not in text


def test_reference_of_the_minimum_height_trains(make_raster):
    # 3 low-res rows at scale 2 (6 pixels): one row of patch centres with
    # their ring, the smallest window the pair collection uses (MIN_CELLS).
    path = make_raster(camera(2 * MIN_CELLS, 200).astype(np.uint8), name="ok.tif")
    models = train_from_rasters(path, 2, max_samples=60, n_atoms=4, n_iter=2, scheduler="synchronous")
    assert len(models) == 1 and models[0].band_name_ == "band1"


def test_flat_reference_still_says_flat(make_raster):
    path = make_raster(np.full((40, 40), 7, np.uint8), name="flat.tif")
    with pytest.raises(InputError, match="flat"):
        train_from_rasters(path, 2, max_samples=50, n_atoms=8, scheduler="synchronous")
