"""Shared fixtures: tiny synthetic rasters, tiny fitted models, the shared test data.

Synthetic rasters take their pixels from photos bundled with scikit-image
(``skimage.data.camera``), so that the models see real texture.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import rasterio
from affine import Affine
from rasterio.crs import CRS
from rasterio.errors import NotGeoreferencedWarning

from helpers import SHARED_DATA, TEST_DATA, BicubicContractModel


@pytest.fixture
def shared_file():
    """Path of an open test raster: the copy vendored in tests/data, else ../shared/data.

    The small files are vendored byte for byte (tests/data/SOURCES.md), so
    a user's clone runs those tests; a test that needs one of the larger
    files is skipped, with the reason, when ../shared/data is absent.
    """

    def get(name):
        for folder in (TEST_DATA, SHARED_DATA):
            path = folder / name
            if path.is_file():
                return path
        pytest.skip(f"{name} is not in {SHARED_DATA} (the shared test data folder is absent)")

    return get


@pytest.fixture
def make_raster(tmp_path):
    """Write a small GeoTIFF and return its path.

    ``make_raster(data, name="src.tif", nodata=None, crs="EPSG:32618",
    transform=None, mask=None, colorinterp=None, gcps=None, tags=None,
    band_tags=None, descriptions=None, scales=None, offsets=None, units=None,
    **profile)``; ``data`` is (bands, rows, cols) or (rows, cols); ``mask``
    (rows, cols) bool writes an internal per-dataset mask.
    """

    def make(data, name="src.tif", *, nodata=None, crs="EPSG:32618", transform=None,
             mask=None, colorinterp=None, gcps=None, tags=None, band_tags=None,
             descriptions=None, scales=None, offsets=None, units=None, **profile):
        data = np.asarray(data)
        if data.ndim == 2:
            data = data[None]
        count, rows, cols = data.shape
        if transform is None and gcps is None:
            transform = Affine(30.0, 0.0, 500000.0, 0.0, -30.0, 4200000.0)
        path = tmp_path / name
        prof = dict(driver="GTiff", width=cols, height=rows, count=count, dtype=data.dtype.name,
                    nodata=nodata)
        if crs is not None and gcps is None:
            prof["crs"] = CRS.from_user_input(crs)
        if transform is not None:
            prof["transform"] = transform
        prof.update(profile)
        with rasterio.Env(GDAL_TIFF_INTERNAL_MASK=True), warnings.catch_warnings():
            warnings.simplefilter("ignore", NotGeoreferencedWarning)  # GCP-only rasters
            with rasterio.open(path, "w", **prof) as ds:
                ds.write(data)
                if mask is not None:
                    ds.write_mask(np.where(mask, 255, 0).astype(np.uint8))
                if colorinterp is not None:
                    ds.colorinterp = colorinterp
                if gcps is not None:
                    ds.gcps = (gcps, CRS.from_user_input(crs))
                if tags:
                    ds.update_tags(**tags)
                for i, bt in enumerate(band_tags or [], start=1):
                    ds.update_tags(i, **bt)
                for i, d in enumerate(descriptions or [], start=1):
                    ds.set_band_description(i, d)
                for i, u in enumerate(units or [], start=1):
                    ds.set_band_unit(i, u)
                if scales is not None:
                    ds.scales = scales
                if offsets is not None:
                    ds.offsets = offsets
        return path

    return make


def _fit_tiny(scale, method):
    from geosr.core.model import CoupledDictionary

    model = CoupledDictionary(scale=scale, method=method, n_atoms=32, n_iter=1,
                              max_samples=3000, neighbours=128, random_state=0)
    from skimage import data

    img = data.camera().astype(np.float64)
    return model.fit([img[:160, :160], img[300:460, 250:410], img[100:260, 350:510]])


@pytest.fixture(scope="session")
def tiny_model():
    """A tiny anchored model at x2, fitted on crops of the camera photo."""
    pytest.importorskip("geosr.core.model")
    return _fit_tiny(2, "anchored")


@pytest.fixture(scope="session")
def tiny_sparse_x3():
    """A tiny sparse-coding model at x3, fitted on crops of the camera photo."""
    pytest.importorskip("geosr.core.model")
    return _fit_tiny(3, "sparse")


@pytest.fixture
def bicubic_model():
    """A model object that follows the contract with plain bicubic interpolation (x2)."""
    return BicubicContractModel(2)


@pytest.fixture
def run_dir(tmp_path):
    """An empty output folder."""
    out = tmp_path / "out"
    out.mkdir()
    return out


