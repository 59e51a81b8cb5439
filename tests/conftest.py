"""Shared fixtures: tiny synthetic rasters, tiny fitted models, the shared test data.

Synthetic rasters take their pixels from photos bundled with scikit-image
(``skimage.data.camera``), so that the models see real texture.
"""

from __future__ import annotations

import hashlib
import os
import warnings
from pathlib import Path

import numpy as np
import pytest
import rasterio
from affine import Affine
from rasterio.crs import CRS
from rasterio.errors import NotGeoreferencedWarning

SHARED_DATA = Path(__file__).resolve().parent.parent.parent / "shared" / "data"


def sha256_of(path):
    """Hex sha256 of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


@pytest.fixture
def shared_file():
    """Path of a file in ../shared/data; the test is skipped when it is absent."""

    def get(name):
        path = SHARED_DATA / name
        if not path.is_file():
            pytest.skip(f"{name} is not in {SHARED_DATA} (the shared test data folder is absent)")
        return path

    return get


def camera(rows, cols, row0=120, col0=80):
    """A crop of scikit-image's bundled camera photo as float64 (0..255)."""
    from skimage import data

    img = data.camera().astype(np.float64)
    return img[row0 : row0 + rows, col0 : col0 + cols]


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


class BicubicContractModel:
    """Follows the core's model contract with plain bicubic interpolation.

    Built only from ``geosr.core.resample`` (``upscale_valid``) and
    ``geosr.core.nodata.fill_invalid`` when present, so that the raster pipeline
    can be checked against GDAL's cubic resampling: the output is what a
    pure interpolator gives, with no synthesized detail.
    """

    method = "bicubic-contract"
    FILL = 2

    def __init__(self, scale):
        self.scale = scale
        self.sha256_ = hashlib.sha256(f"bicubic-x{scale}".encode()).hexdigest()

    def context_radius(self, consistency=False, masked=False):
        return 2 + (self.FILL if masked else 0)

    def _fill(self, x, valid):
        out = np.where(valid, x, 0.0)
        known = valid.copy()
        for _ in range(self.FILL):
            w = known.astype(out.dtype)
            p, q = np.pad(out * w, 1), np.pad(w, 1)
            total = sum(p[i : i + out.shape[0], j : j + out.shape[1]] for i in range(3) for j in range(3))
            count = sum(q[i : i + out.shape[0], j : j + out.shape[1]] for i in range(3) for j in range(3))
            grow = ~known & (count > 0)
            out = np.where(grow, total / np.where(count > 0, count, 1), out)
            known |= grow
        return out

    def magnify_block(self, block, halo, valid=None, *, consistency=False, ensemble=False):
        from geosr.core.resample import upscale_valid

        x = np.asarray(block, dtype=np.float32 if block.dtype == np.float32 else np.float64)
        v = np.isfinite(x) if valid is None else (np.asarray(valid, bool) & np.isfinite(x))
        masked = not v.all()
        if masked:
            x = self._fill(x, v).astype(x.dtype)
        crop = halo - 2
        x = x[crop : x.shape[0] - crop, crop : x.shape[1] - crop]
        return upscale_valid(x, self.scale, 2)

    def magnify(self, image, valid=None, *, consistency=False, ensemble=False):
        image = np.asarray(image)
        v = np.isfinite(image) if valid is None else np.asarray(valid, bool) & np.isfinite(image)
        r = self.context_radius(masked=not v.all())
        out = self.magnify_block(np.pad(image, r, mode="symmetric"), r, np.pad(v, r, mode="symmetric"))
        hr = np.repeat(np.repeat(v, self.scale, 0), self.scale, 1)
        out[~hr] = np.nan
        return out


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


def list_dir(path):
    """Names in a folder, sorted (to check that no temporary is left)."""
    return sorted(os.listdir(path))
